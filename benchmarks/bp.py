"""Belief propagation against our semi-global matching, measured in one run.

Accuracy pairs: scikit-image's ``stereo_motorcycle`` (Middlebury 2014,
Scharstein et al., GCPR 2014, downscaled by scikit-image; range 0:80) and the
demo pair in ``demo_data/`` (non-occluded pixels; range 64:192); with
``--big`` also the demo scene rendered at 1368 x 1026 (range 128:384).

Printed per pair: density (share of ground-truth pixels with an output) and
bad-2.0 (share of output pixels with |d - gt| > 2) of both solvers, then both
at *equal density*: the denser solver keeps only its most confident pixels
(ranked by its own confidence) down to the other's density; the ratio BP / SGM
is the target figure (at most 1.2). Also each solver's energy in belief
propagation's pairwise term (the schema's ``bp_weight``/``bp_truncation``).

On the 1.4 MP pair with 256 disparities: ``compute_disparity`` time of BP
against SGM, in-process with the kernels compiled, the two alternated, median
of the per-round ratios; and the peak resident memory of a process running
each once.

Run: ``.venv/bin/python benchmarks/bp.py`` (``--quick`` skips time and memory,
``--big`` adds the 1.4 MP pair to the accuracy table).
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO))

from stereomesh.matching.disparity import compute_disparity  # noqa: E402
from stereomesh.params import DisparityParams  # noqa: E402


def _demo_pair(folder):
    from PIL import Image

    from stereomesh.io.pfm import read_pfm

    occ = np.asarray(Image.open(folder / "gt_occlusion.png")) > 0
    gt = read_pfm(folder / "gt_disparity.pfm")
    gt[occ] = np.nan  # judged on non-occluded pixels
    return (np.asarray(Image.open(folder / "left.png").convert("RGB")),
            np.asarray(Image.open(folder / "right.png").convert("RGB")), gt)


def accuracy_pairs(big_folder=None):
    from skimage import data

    left, right, gt = data.stereo_motorcycle()
    yield "motorcycle", left, right, np.where(np.isfinite(gt), gt, np.nan), (0, 80)
    yield ("demo", *_demo_pair(REPO / "demo_data"), (64, 192))
    if big_folder is not None:
        yield ("demo 1.4 MP", *_demo_pair(big_folder), (128, 384))


def errors(disparity, gt):
    """Absolute errors of the output pixels with ground truth, and the density."""
    known = np.isfinite(gt)
    out = np.isfinite(disparity) & known
    return np.abs(disparity - gt)[out], out, float(out.sum() / known.sum())


def bad2_at_density(disparity, confidence, gt, density):
    """Bad-2.0 of the most confident output pixels, as many as ``density`` of the known."""
    err, out, own = errors(disparity, gt)
    keep = min(err.size, int(round(density * np.isfinite(gt).sum())))
    order = np.argsort(-confidence[out], kind="stable")[:keep]
    return float((err[order] > 2).mean())


def accuracy_table(big_folder=None):
    print(f"{'pair':<13}{'solver':<5}{'density':>9}{'bad2':>8}{'energy':>11}"
          f"{'equal density':>15}{'bad2':>8}{'BP/SGM':>8}")
    worst = 0.0
    for name, left, right, gt, (lo, hi) in accuracy_pairs(big_folder):
        res = {m: compute_disparity(left, right, DisparityParams(method=m, disp_range=f"{lo}:{hi}"))
               for m in ("sgm", "bp")}
        dens = {m: errors(r.disparity, gt)[2] for m, r in res.items()}
        common = min(dens.values())
        at = {m: bad2_at_density(r.disparity, r.confidence, gt, common) for m, r in res.items()}
        ratio = at["bp"] / at["sgm"]
        worst = max(worst, ratio)
        for m, r in res.items():
            err = errors(r.disparity, gt)[0]
            energy = r.figures["energy_bp_term"]["total"]
            tail = f"{ratio:>8.2f}" if m == "bp" else ""
            print(f"{name if m == 'sgm' else '':<13}{m:<5}{dens[m]:>9.3f}"
                  f"{(err > 2).mean():>8.4f}{energy:>11.4g}{common:>15.3f}{at[m]:>8.4f}{tail}")
    print(f"worst BP/SGM bad-2.0 at equal density: {worst:.2f} (target <= 1.2)")


def render_speed_pair(folder, width=1368):
    subprocess.run([sys.executable, "-m", "stereomesh.demo_scene", "--out", str(folder),
                    "--width", str(width)], check=True, capture_output=True)
    return folder


PEAK_SCRIPT = """
import sys, numpy as np
from PIL import Image
from stereomesh.matching.disparity import compute_disparity
from stereomesh.params import DisparityParams
folder, method = sys.argv[1:]
left = np.asarray(Image.open(folder + "/left.png"))
right = np.asarray(Image.open(folder + "/right.png"))
compute_disparity(left, right, DisparityParams(method=method, disp_range="128:384"))
"""

# A child forked from this (large) process would report this process's peak as
# its own: a small wrapper process starts the measured one and reads its peak.
WRAPPER = """
import resource, subprocess, sys
subprocess.run(sys.argv[1:], check=True)
print(resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024)
"""


def speed_table(folder, rounds=5):
    left, right = _demo_pair(folder)[:2]
    params = {m: DisparityParams(method=m, disp_range="128:384") for m in ("sgm", "bp")}
    for p in params.values():
        compute_disparity(left, right, p)  # compile or load the kernels
    ratios, times = [], {"sgm": [], "bp": []}
    for _ in range(rounds):
        for m in ("sgm", "bp"):
            t = time.perf_counter()
            compute_disparity(left, right, params[m])
            times[m].append(time.perf_counter() - t)
        ratios.append(times["bp"][-1] / times["sgm"][-1])
    h, w = left.shape[:2]
    print(f"\n{w}x{h}, 256 disparities, {rounds} alternated rounds: sgm median "
          f"{np.median(times['sgm']):.2f} s, bp median {np.median(times['bp']):.2f} s; "
          f"BP/SGM time ratio median {np.median(ratios):.2f} (best {min(ratios):.2f}, "
          f"target <= 3)")
    env = {**os.environ, "PYTHONPATH": str(REPO)}
    for m in ("sgm", "bp"):
        out = subprocess.run([sys.executable, "-c", WRAPPER, sys.executable, "-c", PEAK_SCRIPT,
                              str(folder), m], capture_output=True, text=True, check=True,
                             env=env)
        print(f"peak resident memory of a process running {m} once: "
              f"{float(out.stdout.split()[-1]):.0f} MB")


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="accuracy only")
    parser.add_argument("--big", action="store_true", help="add the 1.4 MP pair to accuracy")
    parser.add_argument("--rounds", type=int, default=5)
    parser.add_argument("--pair", type=Path, help="folder of an already rendered 1.4 MP pair")
    args = parser.parse_args(argv)
    folder = args.pair
    if folder is None and (args.big or not args.quick):
        folder = render_speed_pair(Path(tempfile.mkdtemp()) / "pair")
    accuracy_table(folder if args.big else None)
    if not args.quick:
        speed_table(folder, args.rounds)


if __name__ == "__main__":
    main()
