"""`stereomesh calibrate` on chessboard pairs rendered through a known rig."""

import json

import numpy as np
import pytest
from conftest import run_cli
from rigs import render_board, rotation

from stereomesh.calibrate import board_points, find_board
from stereomesh.io.images import write_png

K1 = np.array([[800.0, 0, 318.0], [0, 800.0, 242.0], [0, 0, 1]])
K2 = np.array([[810.0, 0, 323.0], [0, 810.0, 238.0], [0, 0, 1]])
D1 = np.array([-0.08, 0.02, 0.0, 0.0, 0.0])
D2 = np.array([-0.06, 0.01, 0.0, 0.0, 0.0])
R = rotation(0.3, -1.5, 0.2)
T = np.array([-0.12, 0.002, 0.001])
PATTERN, SQUARE, SIZE = (9, 6), 0.03, (640, 480)


def _poses():
    """Board poses at 0.6 to 0.9 m, tilted up to 30 degrees, centred between the cameras."""
    centre = board_points(PATTERN, SQUARE).mean(axis=0)
    poses = []
    tilts = [(0, 0, 0), (25, 0, 5), (-25, 0, -5), (0, 25, 0), (0, -28, 10), (18, 18, 0),
             (-18, 18, 8), (18, -18, -8), (-15, -20, 15), (10, 5, 30), (-5, 12, -25),
             (28, -10, 3)]
    for n, (ax, ay, az) in enumerate(tilts):
        Rb = rotation(ax, ay, az)
        z = 0.6 + 0.3 * (n % 4) / 3
        t = np.array([0.06 + 0.05 * np.sin(n), 0.04 * np.cos(2 * n), z]) - Rb @ centre
        poses.append((Rb, t))
    return poses


@pytest.fixture(scope="module")
def boards(tmp_path_factory):
    folder = tmp_path_factory.mktemp("boards")
    for n, (Rb, t) in enumerate(_poses()):
        left = render_board(K1, D1, Rb, t, PATTERN, SQUARE, SIZE)
        right = render_board(K2, D2, R @ Rb, R @ t + T, PATTERN, SQUARE, SIZE)
        write_png(folder / f"left_{n:02d}.png", left)
        write_png(folder / f"right_{n:02d}.png", right)
    # A pair where the board is out of the right camera's view: listed, not fatal.
    write_png(folder / "left_99.png", render_board(K1, D1, *_poses()[0], PATTERN, SQUARE, SIZE))
    write_png(folder / "right_99.png", np.full((480, 640), 120, np.uint8))
    return folder


def test_board_corners_found_where_opencv_projects_them():
    # Reference: cv2.projectPoints of the board's corners through the same camera; the
    # render's 2x2 supersampling leaves about a tenth of a pixel of aliasing.
    import cv2

    Rb, t = _poses()[1]
    img = render_board(K1, D1, Rb, t, PATTERN, SQUARE, SIZE)
    found = find_board(img, PATTERN)
    truth = cv2.projectPoints(board_points(PATTERN, SQUARE), cv2.Rodrigues(Rb)[0], t, K1,
                              D1)[0].reshape(-1, 2)
    assert found is not None
    assert np.median(np.linalg.norm(found - truth, axis=1)) < 0.2


def test_calibrate_recovers_the_rig(boards, tmp_path):
    out = tmp_path / "cal"
    code, stdout, stderr = run_cli("calibrate", "--pattern", "9x6", "--square", SQUARE,
                                   "--left", boards / "left_*.png",
                                   "--right", boards / "right_*.png", "--out", out)
    assert code == 0, stderr
    assert "RMS" in stdout
    report = json.loads((out / "report.json").read_text())
    assert report["pairs_used"] >= 10
    assert report["pairs_used"] + len(report["not_found"]) == 13
    blank = [e for e in report["not_found"] if e["right"].endswith("right_99.png")]
    assert blank and blank[0]["not_found_in"] == ["right"]
    assert report["rms_px"] < 0.3 and len(report["per_image"]) == report["pairs_used"]
    cal = json.loads((out / "calibration.json").read_text())
    # Stated tolerances: focal lengths within 1 %, baseline within 1 %, R within 0.3 degree.
    assert cal["left"]["K"][0][0] == pytest.approx(800.0, rel=0.01)
    assert cal["right"]["K"][0][0] == pytest.approx(810.0, rel=0.01)
    assert np.linalg.norm(cal["T"]) == pytest.approx(np.linalg.norm(T), rel=0.01)
    import cv2

    turn = cv2.Rodrigues(np.array(cal["R"]) @ R.T)[0]
    assert np.degrees(np.linalg.norm(turn)) < 0.3
    # And `run` accepts what `calibrate` wrote.
    from stereomesh.io.calibration import load_calibration

    assert load_calibration(out / "calibration.json").metric


def test_calibrate_with_no_board_found_is_bad_input(boards, tmp_path):
    code, _, stderr = run_cli("calibrate", "--pattern", "7x7", "--square", SQUARE,
                              "--left", boards / "left_0*.png",
                              "--right", boards / "right_0*.png", "--out", tmp_path / "c")
    assert code == 2 and "pattern" in stderr
