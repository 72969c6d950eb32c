"""Disparity benchmark: ours (sgm, bp, wta) against OpenCV StereoSGBM in the same run.

Accuracy pairs: scikit-image's ``stereo_motorcycle`` (Middlebury 2014,
Scharstein et al., GCPR 2014, downscaled by scikit-image) and the demo pair in
``demo_data/`` (non-occluded pixels). Speed pair: the demo scene rendered at
1368 x 1026 (1.4 megapixels) with 256 disparities, written to a temporary folder.

OpenCV settings as the disparity issue fixes them: blockSize 5, P1 = 8·3·25,
P2 = 32·3·25, uniquenessRatio 10, speckle window 100 / range 2, disp12MaxDiff 1,
the same number of disparities as ours.

Printed:

- per accuracy pair and method: density (share of ground-truth pixels with an
  output), bad-2.0 on output pixels, bad-2.0 at OpenCV MODE_SGBM's density using
  our confidence ranking, mean absolute error, area under the sparsification
  curve;
- on the 1.4 MP pair, in-process (kernels compiled, each solver's object or
  work memory reused across repetitions, as a caller matching many pairs would),
  the time of ``compute_disparity`` (cost, solver, left-right check,
  sub-pixel, confidence, speckles) against OpenCV MODE_SGBM and
  MODE_SGBM_3WAY, each ratio taken against the OpenCV run next to it;
- on the same pair, the sub-pixel alignment refinement's time against the
  SGM solve's in the same calls (``--refinement``: only this);
- whole commands on the 1.4 MP pair: ``stereomesh disparity`` against a small
  script running OpenCV MODE_SGBM on the same files, wall time and peak RSS,
  alternated, median of the ratios;
- cold JIT compilation, apart.

Run: ``.venv/bin/python benchmarks/disparity.py`` (``make bench``); ``--quick``
skips the whole-command and belief-propagation timings.
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

import numpy as np

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO))

from stereomesh.evaluation import sparsification_auc  # noqa: E402
from stereomesh.matching.disparity import compute_disparity  # noqa: E402
from stereomesh.params import DisparityParams  # noqa: E402

OPENCV_SCRIPT = """
import sys, cv2, numpy as np
left, right, out, lo, hi, mode = sys.argv[1:]
l = cv2.imread(left); r = cv2.imread(right)
m = {"sgbm": cv2.STEREO_SGBM_MODE_SGBM, "hh": cv2.STEREO_SGBM_MODE_HH,
     "3way": cv2.STEREO_SGBM_MODE_SGBM_3WAY}[mode]
s = cv2.StereoSGBM_create(int(lo), int(hi) - int(lo), 5, 8 * 3 * 25, 32 * 3 * 25, 1, 0, 10,
                          100, 2, m)
d = s.compute(l, r).astype(np.float32) / 16.0
d[d < int(lo)] = np.nan
cv2.imwrite(out, d)
"""

MODES = ("sgbm", "hh", "3way")


def opencv_matcher(lo, hi, mode):
    import cv2

    m = {"sgbm": cv2.STEREO_SGBM_MODE_SGBM, "hh": cv2.STEREO_SGBM_MODE_HH,
         "3way": cv2.STEREO_SGBM_MODE_SGBM_3WAY}[mode]
    return cv2.StereoSGBM_create(lo, hi - lo, 5, 8 * 3 * 25, 32 * 3 * 25, 1, 0, 10, 100, 2, m)


def opencv_disparity(matcher, left, right, lo):
    bgr_l = np.ascontiguousarray(left[..., ::-1])
    bgr_r = np.ascontiguousarray(right[..., ::-1])
    d = matcher.compute(bgr_l, bgr_r).astype(np.float32) / 16.0
    d[d < lo] = np.nan
    return d


def measure(disp, gt, conf=None, target_density=None):
    known = np.isfinite(gt)
    out = np.isfinite(disp) & known
    err = np.abs(disp - gt)[out]
    row = {
        "density": float(out.sum() / known.sum()),
        "bad2": float((err > 2).mean()) if err.size else np.nan,
        "mae": float(err.mean()) if err.size else np.nan,
    }
    if conf is not None:
        c = conf[out]
        row["auc"] = sparsification_auc(err, c)
        if target_density is not None:
            keep = int(round(target_density * known.sum()))
            order = np.argsort(-c, kind="stable")[: min(keep, err.size)]
            row["bad2_at_cv_density"] = float((err[order] > 2).mean())
    return row


RSS_WRAPPER = """
import resource, subprocess, sys, time
t = time.perf_counter()
code = subprocess.run(sys.argv[1:], stdout=subprocess.DEVNULL).returncode
wall = time.perf_counter() - t
print(code, wall, resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss)
"""


def run_command(args):
    """Wall time (s) and peak RSS (MB) of a command.

    A small wrapper process starts it, because a child forked from this (large)
    process would report this process's memory as its own peak.
    """
    out = subprocess.run([sys.executable, "-c", RSS_WRAPPER, *args], capture_output=True,
                         text=True, check=True)
    code, wall, rss_kb = out.stdout.split()
    if int(code) != 0:
        raise RuntimeError(f"{args[:4]} failed with exit code {code}")
    return float(wall), int(rss_kb) / 1024.0


def accuracy_pairs():
    from PIL import Image
    from skimage import data

    left, right, gt = data.stereo_motorcycle()
    yield "motorcycle", left, right, np.where(np.isfinite(gt), gt, np.nan), (0, 80)
    demo = REPO / "demo_data"
    from stereomesh.io.pfm import read_pfm

    occ = np.asarray(Image.open(demo / "gt_occlusion.png")) > 0
    gtd = read_pfm(demo / "gt_disparity.pfm")
    gtd[occ] = np.nan  # judged on non-occluded pixels
    yield ("demo", np.asarray(Image.open(demo / "left.png").convert("RGB")),
           np.asarray(Image.open(demo / "right.png").convert("RGB")), gtd, (64, 192))


def cold_jit_seconds():
    code = ("import time, numpy as np; from stereomesh.matching.disparity import "
            "compute_disparity as c; from stereomesh.params import DisparityParams as P; "
            "r = np.random.default_rng(0).integers(0, 255, (40, 80), dtype=np.uint8); "
            "t = time.perf_counter(); c(r, r, P(disp_range='0:16')); "
            "print(time.perf_counter() - t)")
    env = {**os.environ, "NUMBA_CACHE_DIR": tempfile.mkdtemp(), "PYTHONPATH": str(REPO)}
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env,
                         check=True)
    return float(out.stdout.strip().splitlines()[-1])


METHODS = (("sgm", "census"), ("sgm", "ad_gradient"), ("bp", "census"), ("wta", "census"))


def accuracy_table():
    for name, left, right, gt, (lo, hi) in accuracy_pairs():
        cv = {mode: measure(opencv_disparity(opencv_matcher(lo, hi, mode), left, right, lo), gt)
              for mode in MODES}
        rows = {f"opencv {mode}": row for mode, row in cv.items()}
        for method, cost in METHODS:
            p = DisparityParams(method=method, cost=cost, disp_range=f"{lo}:{hi}")
            res = compute_disparity(left, right, p)
            rows[f"ours {method} {cost}"] = measure(res.disparity, gt, res.confidence,
                                                    cv["sgbm"]["density"])
        print(f"\n== accuracy, {name}: {gt.shape[1]}x{gt.shape[0]}, {hi - lo} disparities ==")
        print(f"{'method':<22}{'density':>9}{'bad2':>8}{'bad2@cv':>9}{'mae':>7}{'auc':>7}")
        for method, row in rows.items():
            print(f"{method:<22}{row['density']:>9.3f}{row['bad2']:>8.3f}"
                  f"{row.get('bad2_at_cv_density', np.nan):>9.3f}{row['mae']:>7.2f}"
                  f"{row.get('auc', np.nan):>7.3f}")
        ours, cvs = rows["ours sgm census"], rows["opencv sgbm"]
        print(f"goal checks: density {ours['density']:.3f} vs {cvs['density']:.3f}; "
              f"bad2 ratio {ours['bad2'] / cvs['bad2']:.2f} (<= 0.7); at OpenCV's density "
              f"{ours['bad2_at_cv_density'] / cvs['bad2']:.2f} (<= 0.5)")


def render_speed_pair(width=1368):
    from stereomesh.demo_scene import write_demo_scene

    folder = Path(tempfile.mkdtemp(prefix="stereomesh-bench-"))
    write_demo_scene(folder, width=width)
    return folder


def speed_table(folder, rounds=7, with_bp=True):
    from PIL import Image

    from stereomesh.matching.sgm import Workspace

    left = np.asarray(Image.open(folder / "left.png").convert("RGB"))
    right = np.asarray(Image.open(folder / "right.png").convert("RGB"))
    lo, hi = 128, 384
    h, w = left.shape[:2]
    matchers = {mode: opencv_matcher(lo, hi, mode) for mode in ("sgbm", "3way")}
    workspace = Workspace()
    params = DisparityParams(disp_range=f"{lo}:{hi}")

    def ours():
        return compute_disparity(left, right, params, workspace=workspace)

    # Load the kernels and size the work memory: a new workspace starts with
    # the least memory, and grows to the budget's block once it is reused.
    ours()
    ours()
    for m in matchers.values():
        opencv_disparity(m, left, right, lo)
    ratios = {mode: [] for mode in matchers}
    times = {"ours": [], **{mode: [] for mode in matchers}}
    for _ in range(rounds):
        for mode, m in matchers.items():
            t = time.perf_counter()
            opencv_disparity(m, left, right, lo)
            t_cv = time.perf_counter() - t
            t = time.perf_counter()
            ours()
            t_ours = time.perf_counter() - t
            ratios[mode].append(t_ours / t_cv)
            times[mode].append(t_cv)
            times["ours"].append(t_ours)
    print(f"\n== speed, demo scene {w}x{h}, {hi - lo} disparities, in-process ==")
    print(f"ours (sgm, census, 8 paths, left-right, sub-pixel, confidence, speckles): "
          f"{np.median(times['ours']):.3f} s median")
    for mode in matchers:
        print(f"OpenCV MODE_{mode.upper()}: {np.median(times[mode]):.3f} s median; "
              f"ours / it: median {np.median(ratios[mode]):.2f}, best {min(ratios[mode]):.2f}")
    if with_bp:
        bp = DisparityParams(method="bp", disp_range=f"{lo}:{hi}")
        bp_workspace = Workspace()
        compute_disparity(left, right, bp, workspace=bp_workspace)
        bp_ratio = []
        for _ in range(3):
            t = time.perf_counter()
            compute_disparity(left, right, bp, workspace=bp_workspace)
            t_bp = time.perf_counter() - t
            t = time.perf_counter()
            ours()
            bp_ratio.append(t_bp / (time.perf_counter() - t))
        print(f"belief propagation / ours sgm: median {np.median(bp_ratio):.2f} "
              f"(best {min(bp_ratio):.2f})")


def refinement_table(folder, rounds=5):
    """Time of the alignment refinement against the SGM solve of the same call."""
    from PIL import Image

    from stereomesh.matching.sgm import Workspace

    left = np.asarray(Image.open(folder / "left.png").convert("RGB"))
    right = np.asarray(Image.open(folder / "right.png").convert("RGB"))
    h, w = left.shape[:2]
    workspace = Workspace()
    params = DisparityParams(disp_range="128:384", subpixel="alignment")
    # Load the kernels and size the memory; a reused workspace grows once more on its
    # second call (DEVELOPERS.md), which is not the steady state either.
    for _ in range(2):
        compute_disparity(left, right, params, workspace=workspace)
    solver, refine = [], []
    for _ in range(rounds):
        steps = compute_disparity(left, right, params, workspace=workspace).figures[
            "step_seconds"]
        solver.append(steps["solver"])
        refine.append(steps["subpixel"])
    ratios = np.array(refine) / np.array(solver)
    print(f"\n== sub-pixel alignment vs the SGM solve, {w}x{h}, 256 disparities ==")
    print(f"SGM solve {np.median(solver):.3f} s median, alignment refinement "
          f"{np.median(refine):.3f} s median; ratio median {np.median(ratios):.2f}, best "
          f"{ratios.min():.2f} (goal <= 0.5)")


def command_table(folder, rounds=5):
    lo, hi = "128", "384"
    out = Path(tempfile.mkdtemp(prefix="stereomesh-cmd-"))
    ours = [sys.executable, "-m", "stereomesh", "disparity", str(folder / "left.png"),
            str(folder / "right.png"), "--calib", str(folder / "calib.json"), "--out",
            str(out / "ours"), "--quiet", "--disp-range", f"{lo}:{hi}"]
    cv = [sys.executable, "-c", OPENCV_SCRIPT, str(folder / "left.png"),
          str(folder / "right.png"), str(out / "cv.pfm"), lo, hi, "sgbm"]
    run_command(ours)  # make sure the JIT cache is warm
    run_command(cv)
    walls, rss, ratios = {"ours": [], "cv": []}, {"ours": [], "cv": []}, []
    for _ in range(rounds):
        w_cv, m_cv = run_command(cv)
        w_ours, m_ours = run_command(ours)
        walls["ours"].append(w_ours)
        walls["cv"].append(w_cv)
        rss["ours"].append(m_ours)
        rss["cv"].append(m_cv)
        ratios.append(w_ours / w_cv)
    report = json.loads((out / "ours" / "report.json").read_text())
    print("\n== whole commands on the 1.4 MP pair (alternated) ==")
    print(f"stereomesh disparity: {np.median(walls['ours']):.2f} s median, peak RSS "
          f"{max(rss['ours']):.0f} MB (report.json: {report['peak_memory_mb']:.0f} MB)")
    print(f"OpenCV MODE_SGBM script: {np.median(walls['cv']):.2f} s median, peak RSS "
          f"{max(rss['cv']):.0f} MB")
    print(f"time ratio ours / OpenCV: median {np.median(ratios):.2f}, best {min(ratios):.2f}")


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="accuracy and in-process SGM only")
    ap.add_argument("--refinement", action="store_true",
                    help="only the sub-pixel refinement against the SGM solve")
    args = ap.parse_args(argv)
    if args.refinement:
        refinement_table(render_speed_pair())
        return
    print(f"cold JIT compile (fresh cache, tiny pair): {cold_jit_seconds():.1f} s")
    accuracy_table()
    folder = render_speed_pair()
    speed_table(folder, with_bp=not args.quick)
    refinement_table(folder)
    if not args.quick:
        command_table(folder)


if __name__ == "__main__":
    main()
