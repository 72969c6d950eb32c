"""Real pairs in: full calibrations, calibrated rectification, MPO files."""

import json

import cv2
import numpy as np
import pytest
from conftest import DEMO, run_cli
from rigs import DEMO_BASELINE, demo_rig, rotation, unrectify

from stereomesh.errors import InputError
from stereomesh.io.calibration import calibration_from_dict, calibration_to_dict, load_calibration
from stereomesh.io.images import read_image, write_png
from stereomesh.io.inputs import read_stereo_input
from stereomesh.io.pfm import read_pfm
from stereomesh.rectify import StereoCalibration, stereo_rectification, vertical_residuals


def _calibration(rig, size=(640, 480)):
    return StereoCalibration(rig["K1"], rig["d1"], rig["K2"], rig["d2"], rig["R"], rig["T"],
                             size)


def test_calibrated_rectification_puts_matches_on_one_row():
    # Reference: OpenCV's own projection (cv2.projectPoints) of a 3-D point set into both
    # cameras of a rig with known K, distortion, R and T; after rectification
    # (cv2.stereoRectify + undistortPoints) matching points must share a row within 0.1 px.
    rig = demo_rig()
    cal = _calibration(rig)
    rng = np.random.default_rng(1)
    pts = np.column_stack([rng.uniform(-1.2, 1.2, 500), rng.uniform(-0.9, 0.9, 500),
                           rng.uniform(2.0, 6.0, 500)])
    pl, _ = cv2.projectPoints(pts, np.zeros(3), np.zeros(3), rig["K1"], rig["d1"])
    pr, _ = cv2.projectPoints(pts, cv2.Rodrigues(rig["R"])[0], rig["T"], rig["K2"], rig["d2"])
    pl, pr = pl.reshape(-1, 2), pr.reshape(-1, 2)
    inside = ((pl >= 0) & (pl < [640, 480])).all(1) & ((pr >= 0) & (pr < [640, 480])).all(1)
    rect = stereo_rectification(cal)
    dy = vertical_residuals(rect, pl[inside], pr[inside])
    assert inside.sum() > 300
    assert np.abs(dy).max() < 0.1, np.abs(dy).max()
    # The rectified rig read off P1, P2: baseline |T|, and depth from the
    # rectified disparity equals the points' depth in the rectified left frame.
    assert rect.rig.baseline == pytest.approx(np.linalg.norm(rig["T"]), rel=1e-9)
    ll, rr = rect.rectify_points(pl[inside]), rect.rectify_points(pr[inside], "right")
    z = rect.rig.depth_from_disparity(ll[:, 0] - rr[:, 0])
    z_true = (rect.R1 @ pts[inside].T)[2]
    np.testing.assert_allclose(z, z_true, rtol=1e-6)


def test_full_form_round_trip_and_errors(tmp_path):
    rig = demo_rig()
    data = calibration_to_dict(_calibration(rig))
    data["units"] = "mm"
    data["T"] = (rig["T"] * 1000).tolist()
    path = tmp_path / "calib.json"
    path.write_text(json.dumps(data))
    cal = load_calibration(path)
    np.testing.assert_allclose(cal.T, rig["T"])
    assert cal.metric
    bad = dict(data, left={"K": [[1, 0], [0, 1]], "dist": []})
    with pytest.raises(InputError, match="left.K"):
        calibration_from_dict(bad, "c.json")
    with pytest.raises(InputError, match="right.dist"):
        calibration_from_dict(dict(data, right={"K": data["right"]["K"], "dist": [1, 2]}), "c")
    with pytest.raises(InputError, match="R must be a rotation"):
        calibration_from_dict(dict(data, R=(2 * np.eye(3)).tolist()), "c")
    with pytest.raises(InputError, match="missing field.*T"):
        calibration_from_dict({k: v for k, v in data.items() if k != "T"}, "c")


def test_opencv_filestorage_calibration(tmp_path):
    # Written with OpenCV's own cv2.FileStorage, the node names of its stereo samples.
    rig = demo_rig()
    path = tmp_path / "extrinsics.yml"
    fs = cv2.FileStorage(str(path), cv2.FILE_STORAGE_WRITE)
    for name, value in (("M1", rig["K1"]), ("D1", rig["d1"]), ("M2", rig["K2"]),
                        ("D2", rig["d2"]), ("R", rig["R"]), ("T", rig["T"].reshape(3, 1))):
        fs.write(name, value)
    fs.write("image_size", np.array([640, 480], np.float64))
    fs.release()
    cal = load_calibration(path)
    np.testing.assert_allclose(cal.K2, rig["K2"])
    np.testing.assert_allclose(cal.T, rig["T"])
    assert tuple(cal.image_size) == (640, 480)


def _write_calibrated_pair(folder):
    """The demo pair as the demo rig's two real cameras would take it."""
    rig = demo_rig()
    left = unrectify(read_image(DEMO / "left.png"), rig["K1"], rig["d1"], rig["R1"])
    right = unrectify(read_image(DEMO / "right.png"), rig["K2"], rig["d2"], rig["R2"])
    write_png(folder / "left.png", left)
    write_png(folder / "right.png", right)
    (folder / "calib.json").write_text(json.dumps(calibration_to_dict(_calibration(rig))))
    return rig


def test_calibrated_pair_reads_rectified(tmp_path):
    _write_calibrated_pair(tmp_path)
    pair = read_stereo_input([tmp_path / "left.png", tmp_path / "right.png"],
                             tmp_path / "calib.json")
    info = pair.info["rectification"]
    assert info["method"] == "calibrated" and pair.rig.metric
    assert pair.rig.baseline == pytest.approx(DEMO_BASELINE)
    # Residual rows of verified feature matches on the resampled images.
    assert info["vertical_residual"]["matches"] > 100
    assert info["vertical_residual"]["median_px"] < 0.2, info
    assert pair.rectification.maps[0].shape == (480, 640)


def test_run_two_files_with_full_calibration(tmp_path):
    # The scene's depths come from its renderer (demo_data/gt_disparity.pfm with
    # Z = f B / d); the rectified frame differs from the demo's by a small turn.
    _write_calibrated_pair(tmp_path)
    out = tmp_path / "out"
    code, _, stderr = run_cli("run", tmp_path / "left.png", tmp_path / "right.png",
                              "--calib", tmp_path / "calib.json", "--out", out,
                              "--disp-range", "48:208", "--quiet")
    assert code == 0, stderr
    report = json.loads((out / "report.json").read_text())
    assert report["scale"] == "metric"
    assert report["pair"]["rectification"]["vertical_residual"]["median_px"] < 0.2
    gt = read_pfm(DEMO / "gt_disparity.pfm")
    z_true = float(np.nanmedian(700.0 * DEMO_BASELINE / gt))
    z = report["stages"]["triangulate"]["median_depth"]
    assert z == pytest.approx(z_true, rel=0.02)
    assert report["stages"]["disparity"]["density"] > 0.7


def test_swapped_rig_is_refused(tmp_path):
    rig = demo_rig()
    data = calibration_to_dict(_calibration(rig))
    data["T"] = (-rig["T"]).tolist()
    (tmp_path / "c.json").write_text(json.dumps(data))
    img = np.zeros((480, 640, 3), np.uint8)
    write_png(tmp_path / "l.png", img)
    write_png(tmp_path / "r.png", img)
    with pytest.raises(InputError, match="swap"):
        read_stereo_input([tmp_path / "l.png", tmp_path / "r.png"], tmp_path / "c.json")


def test_rotation_helper_matches_rodrigues():
    # cv2.Rodrigues is the reference: a turn about y by 90 degrees takes z to x.
    np.testing.assert_allclose(rotation(0, 90, 0) @ [0, 0, 1], [1, 0, 0], atol=1e-12)


def _disparity(pair, disp_range="64:192"):
    from stereomesh.params import Params
    from stereomesh.pipeline import reconstruct

    params = Params().with_overrides({"disp_range": disp_range})
    return reconstruct(pair, params, stop_after="disparity").disparity.disparity


@pytest.fixture(scope="module")
def plain_disparity():
    pair = read_stereo_input([DEMO / "left.png", DEMO / "right.png"], DEMO / "calib.json")
    return _disparity(pair)


def _agreement(disp, reference):
    both = np.isfinite(disp) & np.isfinite(reference)
    return (float(np.median(np.abs(disp - reference)[both])),
            float(np.isfinite(disp).mean() - np.isfinite(reference).mean()))


def test_mpo_file_gives_the_plain_pairs_disparity(tmp_path, plain_disparity):
    # A two-frame MPO (CIPA DC-007) written by Pillow's own MPO encoder from the demo pair.
    from PIL import Image

    left, right = Image.open(DEMO / "left.png"), Image.open(DEMO / "right.png")
    path = tmp_path / "pair.MPO"
    left.save(path, save_all=True, append_images=[right], format="MPO", quality=95)
    with Image.open(path) as im:
        assert im.format == "MPO" and im.n_frames == 2
    pair = read_stereo_input([path], DEMO / "calib.json")
    assert pair.info["layout"] == "mpo"
    # JPEG coding changes the pixels a little: the same disparity to a tenth of a pixel
    # in the median, the same density within 2 %.
    median_diff, density_diff = _agreement(_disparity(pair), plain_disparity)
    assert median_diff < 0.1 and abs(density_diff) < 0.02, (median_diff, density_diff)
    with pytest.raises(InputError, match="holds 1 image"):
        left.save(tmp_path / "one.mpo", format="MPO")
        read_stereo_input([tmp_path / "one.mpo"], DEMO / "calib.json")


def test_exif_focal_length_in_pixels(tmp_path):
    # EXIF 2.3: FocalLengthIn35mmFilm (0xA405) refers to a 36 mm wide frame, so
    # f_px = f35 / 36 * width; FocalLength (0x920A) with FocalPlaneXResolution
    # (0xA20E, unit 0xA210: 2 = inch) gives f_px = f_mm * res / 25.4.
    from PIL import Image

    from stereomesh.io.inputs import exif_focal_px

    image = Image.fromarray(np.zeros((30, 72, 3), np.uint8))
    exif = Image.Exif()
    exif.get_ifd(0x8769)[0xA405] = 50
    image.save(tmp_path / "a.jpg", exif=exif)
    assert exif_focal_px(tmp_path / "a.jpg", 72) == pytest.approx(100.0)
    exif = Image.Exif()
    ifd = exif.get_ifd(0x8769)
    ifd[0x920A], ifd[0xA20E], ifd[0xA210] = 5.0, 2540.0, 2
    image.save(tmp_path / "b.jpg", exif=exif)
    assert exif_focal_px(tmp_path / "b.jpg", 72) == pytest.approx(500.0)
    image.save(tmp_path / "c.png")  # no EXIF: no focal length, and no full decode
    assert exif_focal_px(tmp_path / "c.png", 72) is None
