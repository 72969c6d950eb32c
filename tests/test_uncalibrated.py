"""Pairs with no calibration: rectified from their own feature matches."""

import json

import cv2
import numpy as np
import pytest
from conftest import DEMO, run_cli
from rigs import DEMO_K, rig_of, rotation, unrectify

from stereomesh.io.images import read_image, write_png
from stereomesh.rectify import focal_from_fundamental, grey8, uncalibrated_rectification

TURN_LEFT, TURN_RIGHT = rotation(0.5, -1.0, 0.3), rotation(-0.3, 1.0, -0.4)


@pytest.fixture(scope="module")
def turned_pair():
    """The demo pair as two cameras (the demo's K, no distortion) turned about a degree."""
    left = unrectify(read_image(DEMO / "left.png"), DEMO_K, np.zeros(5), TURN_LEFT)
    right = unrectify(read_image(DEMO / "right.png"), DEMO_K, np.zeros(5), TURN_RIGHT)
    return left, right


def test_uncalibrated_rectification_of_a_turned_pair(turned_pair):
    left, right = turned_pair
    rect, figures = uncalibrated_rectification(grey8(left), grey8(right))
    assert figures["held_out"]["median_px"] < 0.5, figures
    assert figures["inliers"] > 300 and not figures["swapped"]
    assert not rect.rig.metric and rect.rig.baseline == pytest.approx(1.0)
    # Independent check: scene points projected by OpenCV (cv2.projectPoints) through
    # the true rig land on one row after the estimated rectification.
    R, T = rig_of(DEMO_K, None, DEMO_K, None, TURN_LEFT, TURN_RIGHT)
    rng = np.random.default_rng(2)
    pts = np.column_stack([rng.uniform(-1.5, 1.5, 400), rng.uniform(-1.0, 1.0, 400),
                           rng.uniform(3.4, 3.9, 400)])
    pts = (TURN_LEFT.T @ pts.T).T  # scene points in the left camera's own frame
    pl = cv2.projectPoints(pts, np.zeros(3), np.zeros(3), DEMO_K, None)[0].reshape(-1, 2)
    pr = cv2.projectPoints(pts, cv2.Rodrigues(R)[0], T, DEMO_K, None)[0].reshape(-1, 2)
    dy = rect.rectify_points(pr, "right")[:, 1] - rect.rectify_points(pl)[:, 1]
    assert np.median(np.abs(dy)) < 0.5, np.median(np.abs(dy))


def test_swapped_views_are_noticed(turned_pair):
    left, right = turned_pair
    _, figures = uncalibrated_rectification(grey8(right), grey8(left))
    assert figures["swapped"]


def test_focal_from_a_converging_rig():
    # F = K^-T [t]x R K^-1 (Hartley and Zisserman, eq. 9.12) of a rig turned 20 degrees
    # toward its subject; the equal-singular-value condition recovers f.
    K = np.array([[800.0, 0, 319.5], [0, 800.0, 239.5], [0, 0, 1]])
    R, t = rotation(0, -20, 0), np.array([-1.0, 0.0, 0.35])
    tx = np.array([[0, -t[2], t[1]], [t[2], 0, -t[0]], [-t[1], t[0], 0]])
    Kinv = np.linalg.inv(K)
    f, _ = focal_from_fundamental(Kinv.T @ tx @ R @ Kinv, (640, 480))
    assert f == pytest.approx(800.0, rel=0.02)
    # Parallel cameras do not fix the focal length.
    f, figures = focal_from_fundamental(Kinv.T @ tx @ np.eye(3) @ Kinv, (640, 480))
    assert f is None and figures["band"] > 1.3


def test_run_without_calibration(tmp_path, turned_pair):
    left, right = turned_pair
    write_png(tmp_path / "left.png", left)
    write_png(tmp_path / "right.png", right)
    out = tmp_path / "out"
    code, _, stderr = run_cli("run", tmp_path / "left.png", tmp_path / "right.png",
                              "--out", out, "--quiet")
    assert code == 0, stderr
    report = json.loads((out / "report.json").read_text())
    rect = report["pair"]["rectification"]
    assert report["scale"] == "unscaled" and rect["shape"] == "approximate"
    assert rect["held_out"]["median_px"] < 0.5
    assert "default" in rect["focal_source"]
    assert report["stages"]["disparity"]["density"] > 0.7


def test_unrelated_views_are_refused(tmp_path):
    rng = np.random.default_rng(3)
    write_png(tmp_path / "a.png", (rng.random((240, 320, 3)) * 255).astype(np.uint8))
    write_png(tmp_path / "b.png", (rng.random((240, 320, 3)) * 255).astype(np.uint8))
    code, _, stderr = run_cli("run", tmp_path / "a.png", tmp_path / "b.png",
                              "--out", tmp_path / "out", "--quiet")
    assert code == 2
    assert "cannot be rectified" in stderr.strip().splitlines()[-1]
