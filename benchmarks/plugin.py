"""Plugin overhead: the editor's whole-pipeline action against ``stereomesh run``, same run.

Pair: the demo pair in ``demo_data/`` with ``disp_range 64:192`` (both sides).

- ``stereomesh run`` as a command, with warm kernels (one untimed run first fills
  numba's cache and the page cache); each timed run is a fresh process, so it
  includes the interpreter start and imports, and it writes every output the
  command writes (PLY, PFM, PNG previews, report).
- The action ``bpy.ops.stereomesh.mesh_from_pair`` in a headless bpy session
  (the built zip installed as an extension) with a warm worker (one untimed action
  first): request, worker run, PLY through a file, mesh object with its attributes
  and the camera created in the scene.

The two are alternated and the median of the per-round ratios printed
(goal: at most 1.3), with the add-on's own share (action time less the worker's).
Needs ``.venv-blender`` (``make blender-venv``) or ``$STEREOMESH_BPY_PYTHON``.

Run: ``.venv/bin/python benchmarks/plugin.py [--rounds 3]``.
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import tempfile
import textwrap
import time
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent
DEMO = REPO / "demo_data"
RANGE = "64:192"
BPY_PYTHON = Path(os.environ.get("STEREOMESH_BPY_PYTHON",
                                 REPO / ".venv-blender" / "bin" / "python"))

# The editor side: one session, driven line by line from stdin so that its timed
# actions can alternate with the command's runs.
SESSION = textwrap.dedent("""
    import json, sys, time
    import bpy
    zip_path, core_python, demo, rng = sys.argv[1:5]
    bpy.ops.extensions.package_install_files(filepath=zip_path, repo="user_default",
                                             enable_on_install=True)
    mod = "bl_ext.user_default.stereomesh"
    bpy.context.preferences.addons[mod].preferences.python_path = core_python
    pair = dict(left=demo + "/left.png", right=demo + "/right.png",
                calib=demo + "/calib.json", disp_range=rng)
    print(json.dumps({"ready": True}), flush=True)
    for line in sys.stdin:
        t = time.perf_counter()
        assert bpy.ops.stereomesh.mesh_from_pair(**pair) == {"FINISHED"}
        seconds = time.perf_counter() - t
        client = sys.modules[mod + ".client"].current_client()
        job = max(client._jobs.values(), key=lambda j: j.id)
        print(json.dumps({"seconds": seconds, "worker": job.result["seconds"]}), flush=True)
""")


def _json_line(stream) -> dict:
    for line in stream:
        line = line.strip()
        if line.startswith("{"):
            return json.loads(line)
    raise RuntimeError("the editor session ended early")


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rounds", type=int, default=3)
    args = parser.parse_args()
    if not BPY_PYTHON.is_file():
        print(f"no bpy interpreter at {BPY_PYTHON}: run 'make blender-venv'", file=sys.stderr)
        return 2
    tmp = Path(tempfile.mkdtemp(prefix="stereomesh-bench-plugin-"))
    subprocess.run([sys.executable, str(REPO / "plugin_manifest" / "build.py"), "--out",
                    str(tmp / "dist"), "--no-wheel"], check=True, capture_output=True)
    (zip_path,) = (tmp / "dist").glob("stereomesh-*.zip")
    command = [str(Path(sys.executable).with_name("stereomesh")), "run", str(DEMO / "left.png"),
               str(DEMO / "right.png"), "--calib", str(DEMO / "calib.json"), "--disp-range",
               RANGE, "--quiet", "--out"]

    def run_command(i: int) -> float:
        t = time.perf_counter()
        subprocess.run([*command, str(tmp / f"run{i}")], check=True, capture_output=True)
        return time.perf_counter() - t

    env = {k: v for k, v in os.environ.items() if not k.startswith("PYTHON")}
    env["BLENDER_USER_RESOURCES"] = str(tmp / "blender_user")
    (tmp / "session.py").write_text(SESSION)
    session = subprocess.Popen(
        [str(BPY_PYTHON), str(tmp / "session.py"), str(zip_path), sys.executable, str(DEMO),
         RANGE], stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.DEVNULL,
        text=True, bufsize=1, env=env, cwd=tmp)
    _json_line(session.stdout)

    def run_action() -> tuple[float, float]:
        session.stdin.write("go\n")
        session.stdin.flush()
        out = _json_line(session.stdout)
        return out["seconds"], out["worker"]

    warm_cli, (warm_action, _) = run_command(-1), run_action()  # untimed: caches, worker
    rows = []
    for i in range(args.rounds):
        cli = run_command(i)
        action, in_worker = run_action()
        rows.append((cli, action, action / cli, action - in_worker))
        print(f"round {i + 1}: stereomesh run {cli:6.2f} s   editor action {action:6.2f} s "
              f"(worker {in_worker:5.2f} s)   ratio {action / cli:.2f}")
    session.stdin.close()
    session.wait(60)
    cli_med = statistics.median(r[0] for r in rows)
    action_med = statistics.median(r[1] for r in rows)
    ratio = statistics.median(r[2] for r in rows)
    print(f"first (untimed) runs: command {warm_cli:.2f} s, action with worker start "
          f"{warm_action:.2f} s")
    overhead = statistics.median(r[3] for r in rows)
    print(f"median: stereomesh run {cli_med:.2f} s, editor action {action_med:.2f} s, "
          f"ratio {ratio:.2f} (goal <= 1.3)")
    print(f"the add-on's own share of the action (request, PLY read, mesh object, camera): "
          f"{overhead:.2f} s; the command also writes previews and disparity files")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
