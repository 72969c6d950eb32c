"""The whole ``stereomesh run`` against OpenCV's StereoSGBM command, stage by stage.

Renders the demo scene at a chosen width (not committed), then, in the same run,
times ``stereomesh run`` with default settings (previews included) and a small
script running OpenCV StereoSGBM (MODE_SGBM, the disparity benchmark's
settings) on the same files and range, as whole commands; prints both, the
ratio, peak memory and the seconds of every stage from our report. The first
``run`` fills the JIT cache and is reported apart (cold start).

Run: ``.venv/bin/python benchmarks/pipeline.py --width 1368 --disp-range 128:384``
(the issue's goal: ours at most 3 x OpenCV's command, peak memory at most 1 GB).
"""

from __future__ import annotations

import argparse
import json
import statistics
import sys
import tempfile
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO))
sys.path.insert(0, str(REPO / "benchmarks"))

from disparity import OPENCV_SCRIPT, run_command  # noqa: E402


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--width", type=int, default=1368)
    ap.add_argument("--disp-range", default="128:384")
    ap.add_argument("--rounds", type=int, default=3)
    args = ap.parse_args(argv)
    from stereomesh.demo_scene import write_demo_scene

    tmp = Path(tempfile.mkdtemp())
    write_demo_scene(tmp, width=args.width)
    lo, hi = args.disp_range.split(":")
    ours = [sys.executable, "-m", "stereomesh", "run", str(tmp / "left.png"),
            str(tmp / "right.png"), "--calib", str(tmp / "calib.json"), "--out", str(tmp / "o"),
            "--quiet", "--disp-range", args.disp_range]
    cv = [sys.executable, "-c", OPENCV_SCRIPT, str(tmp / "left.png"), str(tmp / "right.png"),
          str(tmp / "cv.pfm"), lo, hi, "sgbm"]
    t_first, _ = run_command(ours)
    times, cv_times, memory = [], [], []
    for _ in range(args.rounds):  # alternated: this machine's speed drifts
        t, m = run_command(ours)
        times.append(t)
        memory.append(m)
        cv_times.append(run_command(cv)[0])
    report = json.loads((tmp / "o" / "report.json").read_text())
    t_ours, t_cv = statistics.median(times), statistics.median(cv_times)
    print(f"demo scene {args.width} px wide, disparities {args.disp_range}")
    print(f"first run (compiles or loads the kernels): {t_first:.1f} s")
    print(f"stereomesh run: {t_ours:.2f} s median, peak RSS {max(memory):.0f} MB")
    print(f"OpenCV MODE_SGBM command: {t_cv:.2f} s median")
    print(f"ratio ours / OpenCV: {t_ours / t_cv:.2f} (goal <= 3)")
    print("stages of the last run (s):")
    for name, figures in report["stages"].items():
        print(f"  {name:14s} {figures.get('seconds', 0):7.2f}")


if __name__ == "__main__":
    main()
