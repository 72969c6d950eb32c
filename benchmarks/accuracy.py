"""Accuracy figures of the whole pipeline, printed for the closing notes.

- Demo pair (``demo_data/``, our own rendered scene with exact ground truth):
  disparity bad-2.0 and density on non-occluded pixels, occlusion-class
  precision/recall against the true occlusion mask, and the mesh F-score at
  tau = 1 % of the median depth (Knapitsch et al. 2017, Tanks and Temples).
- scikit-image's motorcycle pair (Middlebury 2014, Scharstein et al., GCPR 2014):
  bad-2.0 on output pixels and density.

Run: ``.venv/bin/python benchmarks/accuracy.py``.
"""

from __future__ import annotations

import json
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO))

from stereomesh.evaluation import covisible_points, f_score, sample_surface  # noqa: E402
from stereomesh.io.pfm import read_pfm  # noqa: E402
from stereomesh.io.ply import read_ply  # noqa: E402
from stereomesh.jobs import run_job  # noqa: E402
from stereomesh.params import load_config  # noqa: E402


def demo_figures(out: Path) -> None:
    from PIL import Image

    demo = REPO / "demo_data"
    params = load_config(demo / "params.toml")
    t = time.perf_counter()
    report = run_job([demo / "left.png", demo / "right.png"], demo / "calib.json", out, params)
    wall = time.perf_counter() - t
    disp = read_pfm(out / "disparity.pfm")
    classes = np.asarray(Image.open(out / "occlusion.png"))
    gt = read_pfm(demo / "gt_disparity.pfm")
    occ = np.asarray(Image.open(demo / "gt_occlusion.png")) > 0
    both = np.isfinite(disp) & ~occ
    bad2 = (np.abs(disp - gt)[both] > 2).mean()
    density = np.isfinite(disp)[~occ].mean()
    pred_occ = classes == 1
    true_occ = np.asarray(Image.open(demo / "gt_occlusion.png")) == 1
    precision = (pred_occ & true_occ).sum() / max(pred_occ.sum(), 1)
    recall = (pred_occ & true_occ).sum() / max(true_occ.sum(), 1)
    mesh = read_ply(out / "mesh.ply")
    gtm = read_ply(demo / "gt_mesh.ply")
    pv = np.column_stack([mesh["x"], mesh["y"], mesh["z"]]).astype(float)
    gv = np.column_stack([gtm["x"], gtm["y"], gtm["z"]]).astype(float)
    tau = 0.01 * float(np.median(gv[:, 2]))
    pred = sample_surface(pv, mesh["faces"], 200_000, seed=1)
    truth = sample_surface(gv, gtm["faces"], 200_000, seed=2)
    score = f_score(pred, truth, tau)
    calib = json.loads((demo / "calib.json").read_text())
    gt_classes = np.asarray(Image.open(demo / "gt_occlusion.png"))
    seen = covisible_points(truth, gt_classes, calib["focal_px"], calib["cx"], calib["cy"])
    recall_both = f_score(pred, seen, tau)["recall"]
    f_both = 2 * score["precision"] * recall_both / (score["precision"] + recall_both)
    print(f"demo pair ({gt.shape[1]}x{gt.shape[0]}), pipeline {wall:.1f} s "
          f"(peak {report['peak_memory_mb']:.0f} MB)")
    print(f"  disparity on non-occluded pixels: bad-2.0 {bad2:.2%}, density {density:.2%}")
    print(f"  occluded class vs truth: precision {precision:.2f}, recall {recall:.2f}")
    print(f"  mesh vs ground truth, tau = {tau * 100:.1f} cm: precision {score['precision']:.3f}")
    print(f"    over the surface both cameras see: recall {recall_both:.3f}, F-score {f_both:.3f}")
    print(f"    over all the left camera sees: recall {score['recall']:.3f}, "
          f"F-score {score['f_score']:.3f}")
    print(f"  mesh: {report['stages']['repair']}")


def motorcycle_figures() -> None:
    from skimage import data

    from stereomesh.matching.disparity import compute_disparity
    from stereomesh.params import DisparityParams

    left, right, gt = data.stereo_motorcycle()
    res = compute_disparity(left, right, DisparityParams(disp_range="0:80"))
    known = np.isfinite(gt)
    both = known & np.isfinite(res.disparity)
    bad2 = (np.abs(res.disparity - gt)[both] > 2).mean()
    print(f"motorcycle pair: bad-2.0 {bad2:.2%} on output pixels, density "
          f"{both.sum() / known.sum():.2%}")


if __name__ == "__main__":
    with tempfile.TemporaryDirectory() as tmp:
        demo_figures(Path(tmp))
    motorcycle_figures()
