"""First run after an install: how long the numba kernels take to compile.

Runs the command ``stereomesh run`` with default settings on the committed demo
pair twice, in fresh processes sharing an empty ``NUMBA_CACHE_DIR``: the first
run compiles every kernel the default path needs (census, SGM, refinement,
geometry; the command compiles the later stages in a second process meanwhile)
and fills the cache, the second loads them. Compile time is the difference and
is reported apart from the run time. With ``--breakdown`` a third, in-process
run from another empty cache records numba's own compile events and lists the
kernels that cost most.

Run: ``.venv/bin/python benchmarks/cold_start.py [--breakdown]`` (the issue's
goal: at most 30 s of compiling on a 2-core machine).
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent

# Runs one job in this process and prints the compile events numba reports.
CHILD = r"""
import json, sys, time
from pathlib import Path
from numba.core import event

t0 = time.perf_counter()
from stereomesh.jobs import run_job
from stereomesh.params import load_config

demo = Path(sys.argv[1])
with event.install_recorder("numba:compile") as rec:
    run_job([demo / "left.png", demo / "right.png"], demo / "calib.json", Path(sys.argv[2]),
            load_config(demo / "params.toml"))
wall = time.perf_counter() - t0
starts, spent = {}, {}
depth = 0
for ts, ev in rec.buffer:
    name = getattr(ev.data.get("dispatcher"), "py_func", None)
    name = f"{name.__module__}.{name.__qualname__}" if name else "?"
    if ev.is_start:
        if depth == 0:
            starts[name] = ts
        depth += 1
    else:
        depth -= 1
        if depth == 0 and name in starts:
            spent[name] = spent.get(name, 0.0) + ts - starts.pop(name)
print(json.dumps({"wall": wall, "compile": spent}))
"""


def run_command(cache: Path, out: Path) -> float:
    demo = REPO / "demo_data"
    env = dict(os.environ, NUMBA_CACHE_DIR=str(cache))
    cmd = [sys.executable, "-m", "stereomesh", "run", str(demo / "left.png"),
           str(demo / "right.png"), "--calib", str(demo / "calib.json"), "--config",
           str(demo / "params.toml"), "--out", str(out), "--quiet"]
    t = time.perf_counter()
    done = subprocess.run(cmd, env=env, capture_output=True, text=True)
    if done.returncode:
        sys.exit(f"the run failed:\n{done.stderr[-3000:]}")
    return time.perf_counter() - t


def run_once(cache: Path, out: Path) -> dict:
    env = dict(os.environ, NUMBA_CACHE_DIR=str(cache))
    t = time.perf_counter()
    done = subprocess.run([sys.executable, "-c", CHILD, str(REPO / "demo_data"), str(out)],
                          env=env, capture_output=True, text=True)
    if done.returncode:
        sys.exit(f"the run failed:\n{done.stderr[-3000:]}")
    figures = json.loads(done.stdout.strip().splitlines()[-1])
    figures["process"] = time.perf_counter() - t
    return figures


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--top", type=int, default=8, help="kernels to list")
    ap.add_argument("--breakdown", action="store_true",
                    help="also list the kernels that take longest to compile")
    args = ap.parse_args(argv)
    with tempfile.TemporaryDirectory() as tmp:
        cache = Path(tmp) / "numba-cache"
        cold = run_command(cache, Path(tmp) / "cold")
        warm = run_command(cache, Path(tmp) / "warm")
        events = run_once(Path(tmp) / "cache-2", Path(tmp) / "events") if args.breakdown \
            else None
    print(f"demo pair, default settings, {os.cpu_count()} cores")
    print(f"first run, empty cache: {cold:.1f} s")
    print(f"second run, cache filled: {warm:.1f} s")
    print(f"compiling: {cold - warm:.1f} s (goal <= 30 s)")
    if events:
        print(f"in one process, numba's compile events: {sum(events['compile'].values()):.1f} s; "
              "the largest:")
        for name, seconds in sorted(events["compile"].items(), key=lambda kv: -kv[1])[: args.top]:
            print(f"  {seconds:6.1f} s  {name}")


if __name__ == "__main__":
    main()
