"""The command line: fixed outputs, exit codes and one-line reasons for bad input."""

import json

import numpy as np
import pytest
from conftest import DEMO, run_cli
from PIL import Image

from stereomesh.io.pfm import read_pfm


def test_help_is_instant_and_lists_commands():
    code, out, _ = run_cli("--help")
    assert code == 0
    for cmd in ("disparity", "run", "demo"):
        assert cmd in out


def test_disparity_on_motorcycle_meets_accuracy(motorcycle, tmp_path):
    # External check: Middlebury 2014 ground truth shipped by scikit-image
    # (Scharstein et al., GCPR 2014); the goal is bad-2.0 <= 8 % on our
    # output pixels at >= 80 % density.
    d = motorcycle["dir"]
    out = tmp_path / "out"
    code, stdout, stderr = run_cli("disparity", d / "left.png", d / "right.png",
                                   "--calib", d / "calib.json", "--out", out,
                                   "--disp-range", "0:80")
    assert code == 0, stderr
    assert len(stdout.strip().splitlines()) == 1
    disp = read_pfm(out / "disparity.pfm")
    conf = read_pfm(out / "confidence.pfm")
    occ = np.asarray(Image.open(out / "occlusion.png"))
    gt = motorcycle["gt"]
    assert disp.shape == gt.shape == conf.shape == occ.shape
    assert (conf[np.isnan(disp)] == 0).all() and conf.min() >= 0 and conf.max() <= 1
    assert set(np.unique(occ)) <= {0, 1, 2, 3, 4}
    assert ((occ == 0) == np.isfinite(disp)).all()
    known = np.isfinite(gt)
    density = np.isfinite(disp)[known].mean()
    both = known & np.isfinite(disp)
    bad2 = (np.abs(disp - gt)[both] > 2.0).mean()
    assert density >= 0.80, density
    assert bad2 <= 0.08, bad2
    report = json.loads((out / "report.json").read_text())
    for key in ("version", "inputs", "params", "scale", "stages", "peak_memory_mb", "warnings"):
        assert key in report
    assert report["scale"] == "metric"
    assert all(len(i["sha256"]) == 64 for i in report["inputs"])
    assert report["params"]["disparity"]["disp_range"] == "0:80"


def test_quiet_prints_nothing(motorcycle, tmp_path):
    d = motorcycle["dir"]
    code, stdout, _ = run_cli("disparity", d / "left.png", d / "right.png", "--calib",
                              d / "calib.json", "--out", tmp_path, "--quiet",
                              "--disp-range", "0:64", "--paths", "4")
    assert code == 0 and stdout == ""


def _bad_input_cases(tmp_path):
    left = DEMO / "left.png"
    right = DEMO / "right.png"
    calib = DEMO / "calib.json"
    garbage = tmp_path / "garbage.png"
    garbage.write_bytes(b"this is not an image")
    small = tmp_path / "small.png"
    Image.open(right).resize((320, 240)).save(small)
    wrong_calib = tmp_path / "wrong.json"
    c = json.loads(calib.read_text())
    c["image_size"] = [1024, 768]
    wrong_calib.write_text(json.dumps(c))
    return {
        "missing file": ([tmp_path / "nope.png", right, calib], "nope.png"),
        "unreadable image": ([garbage, right, calib], "garbage.png"),
        "size mismatch": ([left, small, calib], "small.png"),
        "calibration size": ([left, right, wrong_calib], "wrong.json"),
    }


@pytest.mark.parametrize("case", ["missing file", "unreadable image", "size mismatch",
                                  "calibration size"])
@pytest.mark.parametrize("command", ["disparity", "run"])
def test_bad_input_exit_code_2_with_one_line_reason(tmp_path, case, command):
    (left, right, calib), names = _bad_input_cases(tmp_path)[case]
    code, stdout, stderr = run_cli(command, left, right, "--calib", calib, "--out", tmp_path / "o")
    assert code == 2, stderr
    lines = stderr.strip().splitlines()
    assert len(lines) == 1 and names in lines[0], stderr


def test_bad_parameter_is_exit_code_2(tmp_path):
    code, _, stderr = run_cli("disparity", DEMO / "left.png", DEMO / "right.png", "--calib",
                              DEMO / "calib.json", "--out", tmp_path, "--disp-range", "9")
    assert code == 2 and "disp-range" in stderr


def test_bad_config_is_exit_code_2(tmp_path):
    cfg = tmp_path / "c.toml"
    cfg.write_text("[disparity]\nno_such = 1\n")
    code, _, stderr = run_cli("run", DEMO / "left.png", DEMO / "right.png", "--calib",
                              DEMO / "calib.json", "--out", tmp_path, "--config", cfg)
    assert code == 2 and "c.toml" in stderr and "no_such" in stderr


def test_run_on_motorcycle_writes_every_output(motorcycle, tmp_path):
    # scikit-image's Middlebury 2014 pair with the nominal calibration of the fixture.
    d = motorcycle["dir"]
    out = tmp_path / "run"
    code, stdout, stderr = run_cli("run", d / "left.png", d / "right.png", "--calib",
                                   d / "calib.json", "--out", out, "--disp-range", "0:80")
    assert code == 0, stderr
    assert len(stdout.strip().splitlines()) == 1 and "mesh.ply" in stdout
    for name in ("mesh.ply", "cloud.ply", "disparity.pfm", "confidence.pfm", "occlusion.png",
                 "report.json"):
        assert (out / name).is_file(), name
    assert any((out / "previews").glob("*.png"))
    report = json.loads((out / "report.json").read_text())
    assert report["status"] == "ok" and report["stages"]["repair"]["faces_after"] > 1000


def test_run_poisson_surface_with_voxel_cloud(motorcycle, tmp_path):
    # The closed-surface path: voxel-downsampled cloud, screened Poisson, repair.
    d = motorcycle["dir"]
    out = tmp_path / "poisson"
    code, _, stderr = run_cli("run", d / "left.png", d / "right.png", "--calib",
                              d / "calib.json", "--out", out, "--disp-range", "0:80",
                              "--surface", "poisson", "--voxel-size", "0.005",
                              "--poisson-depth", "8", "--quiet")
    assert code == 0, stderr
    report = json.loads((out / "report.json").read_text())
    assert report["stages"]["surface"]["method"] == "poisson"
    assert report["stages"]["filter_cloud"]["points"]["after_voxel"] < \
        report["stages"]["filter_cloud"]["points"]["input"]
    assert report["stages"]["repair"]["faces_after"] > 1000


def test_first_run_compiles_the_later_stages_in_a_second_process(monkeypatch, capsys):
    # On a first run (no cached kernels) the command says why it is slow and
    # starts a helper that warms the later stages; the helper never outlives it.
    from stereomesh import cli
    from stereomesh.matching import disparity

    monkeypatch.setattr(disparity, "kernels_cached", lambda: False)
    with cli._first_run(quiet=False, stop_after="disparity") as helper:
        assert helper is not None and helper.args[0]
    assert helper.poll() is not None
    assert "compiling the matching kernels" in capsys.readouterr().err
    monkeypatch.setattr(disparity, "kernels_cached", lambda: True)
    with cli._first_run(quiet=False) as helper:
        assert helper is None


def test_command_setup_skips_numbas_blas_probe_and_keeps_linear_algebra():
    # A fresh interpreter, as a command has: numba's array maths loads without
    # importing scipy.linalg, and a kernel that does need BLAS still compiles and
    # gives numpy's answer.
    import subprocess
    import sys

    code = (
        "import sys\n"
        "from stereomesh.cli import configure_process\n"
        "configure_process()\n"
        "assert 'scipy.linalg' not in sys.modules, 'scipy.linalg was imported'\n"
        "import numba, numpy as np\n"
        "f = numba.njit(lambda a, b: np.dot(a, b))\n"
        "a = np.arange(9.0).reshape(3, 3)\n"
        "assert np.array_equal(f(a, a), a @ a)\n"
        "print('ok')\n"
    )
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                          timeout=300)
    assert proc.returncode == 0 and proc.stdout.strip() == "ok", proc.stderr[-2000:]
