"""Whole-command time and peak memory on the demo scene rendered large.

Renders the demo scene at a chosen width (not committed), then runs, as whole
commands in the same run, ``stereomesh disparity`` and a small script running
OpenCV StereoSGBM (MODE_SGBM, the disparity benchmark's settings) on the same
files with the same number of disparities, and prints wall time, peak RSS and
their ratios.

Run: ``.venv/bin/python benchmarks/large_pair.py --width 1368 --disp-range 128:384``
(1.4 MP, 256 disparities) or ``--width 4000 --disp-range 448:704`` (12 MP).
"""

from __future__ import annotations

import argparse
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
    ap.add_argument("--method", default="sgm")
    ap.add_argument("--memory-budget-mb", default="640")
    args = ap.parse_args(argv)
    from stereomesh.demo_scene import write_demo_scene

    tmp = Path(tempfile.mkdtemp())
    write_demo_scene(tmp, width=args.width)
    lo, hi = args.disp_range.split(":")
    ours = [sys.executable, "-m", "stereomesh", "disparity", str(tmp / "left.png"),
            str(tmp / "right.png"), "--calib", str(tmp / "calib.json"), "--out", str(tmp / "o"),
            "--quiet", "--disp-range", args.disp_range, "--method", args.method,
            "--memory-budget-mb", args.memory_budget_mb]
    cv = [sys.executable, "-c", OPENCV_SCRIPT, str(tmp / "left.png"), str(tmp / "right.png"),
          str(tmp / "cv.pfm"), lo, hi, "sgbm"]
    run_command(ours)  # fill the JIT cache
    t_ours, m_ours = run_command(ours)
    t_cv, m_cv = run_command(cv)
    print(f"{args.width} px wide, {int(hi) - int(lo)} disparities, method {args.method}")
    print(f"stereomesh disparity: {t_ours:.2f} s, peak RSS {m_ours:.0f} MB")
    print(f"OpenCV MODE_SGBM script: {t_cv:.2f} s, peak RSS {m_cv:.0f} MB")
    print(f"ratios (ours / OpenCV): time {t_ours / t_cv:.2f}, memory {m_ours / m_cv:.2f}")


if __name__ == "__main__":
    main()
