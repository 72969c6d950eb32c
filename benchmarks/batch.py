"""Batch throughput: ``--workers 2`` against ``--workers 1``, warm disparity against OpenCV.

Eight demo-sized pairs (copies of ``demo_data/``'s 640 x 480 pair under eight
names, the demo's search range from its ``params.toml``), one run of each:

- ``stereomesh batch --workers 1`` (one worker with every core's numba thread)
  and ``--workers 2`` (two workers, one numba thread each, as the batch sets
  them): whole-command wall time, pairs per minute, the ratio (goal >= 1.7);
  and ``--workers 1 --threads 1``, so that the scaling of the workers alone
  shows apart from that of the kernels' threads;
- per pair, in this process with the kernels loaded and one solver
  ``Workspace`` reused (a warm worker), ``compute_disparity`` against OpenCV
  StereoSGBM MODE_SGBM (the disparity benchmark's settings, same range) on the
  same pair, alternated, medians (goal <= 0.6); the disparity stage seconds
  the workers themselves recorded in the reports are printed beside it;
- default settings (no config, automatic range, default worker count):
  pairs per minute and the peak memory of each worker (from the reports).

Run: ``.venv/bin/python benchmarks/batch.py`` (``--pairs N`` for more pairs).
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

# The threading layer the command and its workers use (cli.configure_process), so the
# in-process timing runs the kernels as a worker does.
os.environ.setdefault("NUMBA_THREADING_LAYER_PRIORITY", "omp tbb workqueue")

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO))
sys.path.insert(0, str(REPO / "benchmarks"))

from disparity import opencv_disparity, opencv_matcher  # noqa: E402

DEMO = REPO / "demo_data"


def run_batch(src: Path, out: Path, *extra: str) -> float:
    t = time.perf_counter()
    proc = subprocess.run([sys.executable, "-m", "stereomesh", "batch", str(src), "--out",
                           str(out), "--calib", str(DEMO / "calib.json"), "--quiet", *extra],
                          capture_output=True, text=True)
    wall = time.perf_counter() - t
    if proc.returncode != 0:
        raise RuntimeError(f"batch {extra} failed ({proc.returncode}): {proc.stderr[-2000:]}")
    return wall


def reports(out: Path) -> list[dict]:
    return [json.loads(p.read_text()) for p in sorted(out.glob("*/report.json"))]


def busy_seconds(out: Path) -> float:
    """Seconds of the busiest worker converting its pairs (warm-up and start excluded)."""
    per_worker: dict = {}
    for r in reports(out):
        pid = r["batch"]["worker"]["pid"]
        per_worker[pid] = per_worker.get(pid, 0.0) + r["total_seconds"]
    return max(per_worker.values())


def warm_disparity_against_opencv(rounds: int, threads: int | None = None):
    """Medians (s) of our warm ``compute_disparity`` and OpenCV MODE_SGBM on the demo pair.

    ``threads``: numba threads for ours (default: every core), as a worker would have.
    """
    import numba
    import numpy as np

    numba.set_num_threads(threads or numba.config.NUMBA_NUM_THREADS)

    from stereomesh.io.inputs import read_stereo_input
    from stereomesh.matching.disparity import compute_disparity
    from stereomesh.matching.sgm import Workspace
    from stereomesh.params import load_config

    params = load_config(DEMO / "params.toml").disparity
    pair = read_stereo_input([DEMO / "left.png", DEMO / "right.png"], DEMO / "calib.json")
    lo, hi = (int(v) for v in params.disp_range.split(":"))
    matcher = opencv_matcher(lo, hi, "sgbm")
    ws = Workspace()
    compute_disparity(pair.left, pair.right, params, workspace=ws)  # load kernels, size ws
    opencv_disparity(matcher, pair.left, pair.right, lo)
    ours, cv = [], []
    for _ in range(rounds):
        t = time.perf_counter()
        opencv_disparity(matcher, pair.left, pair.right, lo)
        cv.append(time.perf_counter() - t)
        t = time.perf_counter()
        result = compute_disparity(pair.left, pair.right, params, workspace=ws)
        ours.append(time.perf_counter() - t)
    assert np.isfinite(result.disparity).mean() > 0.5
    return statistics.median(ours), statistics.median(cv)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--pairs", type=int, default=8)
    ap.add_argument("--rounds", type=int, default=7, help="repetitions of the in-process timing")
    args = ap.parse_args(argv)
    tmp = Path(tempfile.mkdtemp(prefix="stereomesh-batch-bench-"))
    src = tmp / "pairs"
    src.mkdir()
    for i in range(args.pairs):
        shutil.copy(DEMO / "left.png", src / f"pair{i:02d}_L.png")
        shutil.copy(DEMO / "right.png", src / f"pair{i:02d}_R.png")
    config = ["--config", str(DEMO / "params.toml")]
    # The first command compiles or loads the kernels into numba's cache; not timed.
    subprocess.run([sys.executable, "-m", "stereomesh", "disparity", str(DEMO / "left.png"),
                    str(DEMO / "right.png"), "--calib", str(DEMO / "calib.json"), "--out",
                    str(tmp / "warm"), "--quiet", *config], check=True)
    n = args.pairs
    t1 = run_batch(src, tmp / "w1", "--workers", "1", *config)
    t2 = run_batch(src, tmp / "w2", "--workers", "2", *config)
    t11 = run_batch(src, tmp / "w11", "--workers", "1", "--threads", "1", *config)
    stage = statistics.median(r["stages"]["disparity"]["seconds"] for r in reports(tmp / "w1"))
    stage2 = statistics.median(r["stages"]["disparity"]["seconds"] for r in reports(tmp / "w2"))
    ours, cv = warm_disparity_against_opencv(args.rounds)
    ours1, cv1 = warm_disparity_against_opencv(args.rounds, threads=1)
    td = run_batch(src, tmp / "default")
    per_worker: dict = {}
    for r in reports(tmp / "default"):
        pid = r["batch"]["worker"]["pid"]
        per_worker[pid] = max(per_worker.get(pid, 0.0), r["peak_memory_mb"])
    print(f"{n} pairs of the demo scene (640 x 480, disparities 64:192), one run each")
    print(f"--workers 1 (2 numba threads): {t1:.1f} s, {60 * n / t1:.1f} pairs/min")
    print(f"--workers 2 (1 numba thread each): {t2:.1f} s, {60 * n / t2:.1f} pairs/min")
    print(f"ratio workers 2 / workers 1: {t1 / t2:.2f} x (goal >= 1.7)")
    b1, b2 = busy_seconds(tmp / "w1"), busy_seconds(tmp / "w2")
    print(f"  once warm (busiest worker's pair times, start-up excluded): {60 * n / b1:.1f} "
          f"against {60 * n / b2:.1f} pairs/min, {b1 / b2:.2f} x")
    # How the workers themselves scale: one worker on one thread against two of them.
    print(f"--workers 1 --threads 1: {t11:.1f} s, {60 * n / t11:.1f} pairs/min; --workers 2 "
          f"against it: {t11 / t2:.2f} x")
    print(f"warm disparity, in this process: ours {ours * 1000:.0f} ms (all cores), OpenCV "
          f"MODE_SGBM {cv * 1000:.0f} ms, ratio {ours / cv:.2f} (goal <= 0.6)")
    print(f"  with 1 numba thread (a worker of --workers 2): ours {ours1 * 1000:.0f} ms, OpenCV "
          f"{cv1 * 1000:.0f} ms, ratio {ours1 / cv1:.2f}")
    print(f"disparity stage in the workers' reports (median): {stage * 1000:.0f} ms with 2 "
          f"threads, {stage2 * 1000:.0f} ms with 1 thread")
    print(f"default settings (automatic range, default workers: {len(per_worker)}): "
          f"{td:.1f} s, {60 * n / td:.1f} pairs/min; peak memory per worker "
          + ", ".join(f"{m:.0f} MB" for m in per_worker.values()))
    shutil.rmtree(tmp, ignore_errors=True)


if __name__ == "__main__":
    main()
