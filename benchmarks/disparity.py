"""Disparity benchmark: ours (sgm, bp, wta) against OpenCV StereoSGBM in the same run.

Pairs: scikit-image's ``stereo_motorcycle`` (Middlebury 2014, Scharstein et al.,
GCPR 2014, downscaled by scikit-image) and the demo pair in ``demo_data/``.
OpenCV settings as the disparity issue fixes them: blockSize 5, P1 = 8·3·25,
P2 = 32·3·25, uniquenessRatio 10, speckle window 100 / range 2, disp12MaxDiff 1,
the same number of disparities as ours.

Printed per pair and method: time ratio to OpenCV MODE_SGBM (in-process, kernels
warm), density (share of ground-truth pixels with an output), bad-2.0 on output
pixels, bad-2.0 at OpenCV MODE_SGBM's density using our confidence ranking, mean
absolute error, area under the sparsification curve, and, as whole commands,
wall time ratio and peak RSS of ``stereomesh disparity`` against a small script
that runs OpenCV on the same files. Cold JIT compilation is reported apart.

Run: ``.venv/bin/python benchmarks/disparity.py`` (``make bench``).
"""

from __future__ import annotations

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


def opencv_disparity(left, right, lo, hi, mode):
    import cv2

    m = {"sgbm": cv2.STEREO_SGBM_MODE_SGBM, "hh": cv2.STEREO_SGBM_MODE_HH,
         "3way": cv2.STEREO_SGBM_MODE_SGBM_3WAY}[mode]
    s = cv2.StereoSGBM_create(lo, hi - lo, 5, 8 * 3 * 25, 32 * 3 * 25, 1, 0, 10, 100, 2, m)
    bgr_l = np.ascontiguousarray(left[..., ::-1])
    bgr_r = np.ascontiguousarray(right[..., ::-1])
    d = s.compute(bgr_l, bgr_r).astype(np.float32) / 16.0
    d[d < lo] = np.nan
    return d


def timed(fn, repeat=3):
    best = np.inf
    out = None
    for _ in range(repeat):
        t = time.perf_counter()
        out = fn()
        best = min(best, time.perf_counter() - t)
    return best, out


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


def pairs():
    from PIL import Image
    from skimage import data

    left, right, gt = data.stereo_motorcycle()
    yield "motorcycle", left, right, np.where(np.isfinite(gt), gt, np.nan), (0, 80)
    demo = REPO / "demo_data"
    if (demo / "gt_disparity.pfm").is_file():
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


def main():
    print(f"cold JIT compile (fresh cache, tiny pair): {cold_jit_seconds():.1f} s")
    rows = []
    tmp = Path(tempfile.mkdtemp())
    for name, left, right, gt, (lo, hi) in pairs():
        t_cv, d_cv = timed(lambda: opencv_disparity(left, right, lo, hi, "sgbm"))  # noqa: B023
        cv_row = measure(d_cv, gt)
        results = {"opencv sgbm": (t_cv, cv_row)}
        t_hh, d_hh = timed(lambda: opencv_disparity(left, right, lo, hi, "hh"), 1)  # noqa: B023
        results["opencv hh"] = (t_hh, measure(d_hh, gt))
        for method, cost in (("sgm", "census"), ("sgm", "ad_gradient"), ("bp", "census"),
                             ("wta", "census")):
            p = DisparityParams(method=method, cost=cost, disp_range=f"{lo}:{hi}")
            compute_disparity(left, right, p)  # warm the kernels
            t, res = timed(lambda: compute_disparity(left, right, p))  # noqa: B023
            results[f"ours {method} {cost}"] = (
                t, measure(res.disparity, gt, res.confidence, cv_row["density"]))
        # whole commands on the same files
        from PIL import Image

        Image.fromarray(left).save(tmp / f"{name}_l.png")
        Image.fromarray(right).save(tmp / f"{name}_r.png")
        h, w = gt.shape
        (tmp / f"{name}.json").write_text(json.dumps(
            {"rectified": True, "image_size": [w, h], "focal_px": 1000.0, "cx": w / 2,
             "cy": h / 2, "baseline": 0.2, "doffs": 0.0, "units": "m"}))
        cmd_ours = [sys.executable, "-m", "stereomesh", "disparity", str(tmp / f"{name}_l.png"),
                    str(tmp / f"{name}_r.png"), "--calib", str(tmp / f"{name}.json"),
                    "--out", str(tmp / name), "--quiet", "--disp-range", f"{lo}:{hi}"]
        cmd_cv = [sys.executable, "-c", OPENCV_SCRIPT, str(tmp / f"{name}_l.png"),
                  str(tmp / f"{name}_r.png"), str(tmp / f"{name}_cv.pfm"), str(lo), str(hi),
                  "sgbm"]
        run_command(cmd_ours)  # warm the JIT cache
        wall_ours, rss_ours = run_command(cmd_ours)
        wall_cv, rss_cv = run_command(cmd_cv)
        print(f"\n== {name}: {w}x{h}, {hi - lo} disparities ==")
        print(f"{'method':<22}{'t/sgbm':>8}{'density':>9}{'bad2':>8}{'bad2@cv':>9}"
              f"{'mae':>7}{'auc':>7}")
        for method, (t, row) in results.items():
            print(f"{method:<22}{t / t_cv:>8.2f}{row['density']:>9.3f}{row['bad2']:>8.3f}"
                  f"{row.get('bad2_at_cv_density', np.nan):>9.3f}{row['mae']:>7.2f}"
                  f"{row.get('auc', np.nan):>7.3f}")
        print(f"whole command: stereomesh disparity {wall_ours:.2f} s, {rss_ours:.0f} MB peak RSS;"
              f" OpenCV MODE_SGBM script {wall_cv:.2f} s, {rss_cv:.0f} MB; "
              f"time ratio {wall_ours / wall_cv:.2f}")
        rows.append((name, results))


if __name__ == "__main__":
    main()
