import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

# The command sets this for itself (cli.configure_process); in-process tests do the same.
os.environ.setdefault("NUMBA_THREADING_LAYER_PRIORITY", "omp tbb workqueue")

REPO = Path(__file__).resolve().parent.parent
DEMO = REPO / "demo_data"


def run_cli(*args, cwd=None):
    """Run the real command in a subprocess; return (exit code, stdout, stderr)."""
    proc = subprocess.run(
        [sys.executable, "-m", "stereomesh", *map(str, args)],
        capture_output=True, text=True, cwd=cwd, timeout=900,
    )
    return proc.returncode, proc.stdout, proc.stderr


@pytest.fixture(scope="session")
def motorcycle(tmp_path_factory):
    """scikit-image's stereo_motorcycle pair written to PNG, with its ground truth.

    Source: Middlebury 2014 'Motorcycle' (Scharstein et al., GCPR 2014), as
    shipped (downscaled) by scikit-image's ``skimage.data.stereo_motorcycle``.
    It ships no calibration: ``calib.json`` here is a nominal rectified one
    (focal 1000 px, baseline 0.2 m, principal point at the centre) written by
    this fixture, so only disparities, not depths, are checked against truth.
    """
    from PIL import Image
    from skimage import data

    left, right, gt = data.stereo_motorcycle()
    folder = tmp_path_factory.mktemp("motorcycle")
    Image.fromarray(left).save(folder / "left.png")
    Image.fromarray(right).save(folder / "right.png")
    h, w = left.shape[:2]
    calib = {"rectified": True, "image_size": [w, h], "focal_px": 1000.0,
             "cx": (w - 1) / 2, "cy": (h - 1) / 2, "baseline": 0.2, "doffs": 0.0, "units": "m"}
    (folder / "calib.json").write_text(json.dumps(calib))
    gt = np.where(np.isfinite(gt), gt, np.nan).astype(np.float32)
    return {"dir": folder, "left": left, "right": right, "gt": gt}

# Run by the bpy venv's interpreter (tests/test_plugin.py), never imported here.
collect_ignore = ["blender_session.py"]
