"""Synthetic rigs for the input tests: known K, distortion, R and T, and pairs seen through them.

The demo pair is rectified (focal 700 px, baseline 0.4 m). ``unrectify`` resamples
it into the images two real cameras of a chosen rig would take: each camera is
rotated off the rectified frame and has its own intrinsics and lens distortion,
so rectifying with the rig's calibration must bring the demo geometry back.
"""

from __future__ import annotations

import cv2
import numpy as np

DEMO_K = np.array([[700.0, 0.0, 319.5], [0.0, 700.0, 239.5], [0.0, 0.0, 1.0]])
DEMO_BASELINE = 0.4


def rotation(rx_deg: float, ry_deg: float, rz_deg: float) -> np.ndarray:
    """Rotation matrix from a rotation vector given in degrees (``cv2.Rodrigues``)."""
    return cv2.Rodrigues(np.radians([rx_deg, ry_deg, rz_deg]))[0]


def rig_of(K1, d1, K2, d2, R1, R2, baseline=DEMO_BASELINE):
    """R and T (``X_right = R X_left + T``) of cameras turned by R1, R2 off the rectified frame.

    ``X_rect = R_i X_cam_i`` and the right camera's centre is at ``(B, 0, 0)``, so
    ``X_r = R2^T (R1 X_l - C)``: ``R = R2^T R1``, ``T = -R2^T C``.
    """
    C = np.array([baseline, 0.0, 0.0])
    return R2.T @ R1, -R2.T @ C


def unrectify(image: np.ndarray, K: np.ndarray, dist: np.ndarray, R_cam: np.ndarray,
              K_rect: np.ndarray = DEMO_K) -> np.ndarray:
    """The image a camera (K, dist, turned by ``R_cam``) takes of a rectified view.

    For every pixel of the camera, ``cv2.undistortPoints`` with ``R=R_cam`` and
    ``P=K_rect`` gives where its ray falls on the rectified image; that image is
    sampled there (bilinear).
    """
    h, w = image.shape[:2]
    u, v = np.meshgrid(np.arange(w, dtype=np.float64), np.arange(h, dtype=np.float64))
    pts = np.stack([u.ravel(), v.ravel()], 1).reshape(-1, 1, 2)
    rect = cv2.undistortPoints(pts, K, dist, R=R_cam, P=K_rect).reshape(h, w, 2)
    return cv2.remap(image, rect[..., 0].astype(np.float32), rect[..., 1].astype(np.float32),
                     cv2.INTER_LINEAR, borderMode=cv2.BORDER_REFLECT)


def demo_rig():
    """A rig like the demo's but with real-camera faults: K, distortion, small turns."""
    K1 = np.array([[690.0, 0.0, 322.0], [0.0, 692.0, 236.0], [0.0, 0.0, 1.0]])
    K2 = np.array([[706.0, 0.0, 316.0], [0.0, 705.0, 243.0], [0.0, 0.0, 1.0]])
    d1 = np.array([-0.06, 0.01, 0.0005, -0.0003, 0.0])
    d2 = np.array([-0.04, 0.005, -0.0004, 0.0002, 0.0])
    R1 = rotation(0.6, -0.8, 0.5)
    R2 = rotation(-0.4, 0.7, -0.6)
    R, T = rig_of(K1, d1, K2, d2, R1, R2)
    return {"K1": K1, "d1": d1, "K2": K2, "d2": d2, "R1": R1, "R2": R2, "R": R, "T": T}


MOUNT = (196, 182, 150)


def stereo_card(left: np.ndarray, right: np.ndarray, *, scale: float = 1.03,
                turn_deg: float = 2.0, margin: int = 44, gap: int = 36, stain: bool = True):
    """A scanned stereo card made of a pair: a mount around two prints, the right print
    ``scale`` times larger and turned ``turn_deg`` about its centre, and a stain.

    Returns the card and the left print's top-left corner on it (the left print is the
    left image unchanged, so card pixels map back to it by that offset).
    """
    h, w = left.shape[:2]
    rng = np.random.default_rng(5)
    card = np.empty((h + 2 * margin, 2 * w + 2 * margin + gap, 3), np.float32)
    card[:] = MOUNT
    card += rng.normal(0, 2.0, card.shape[:2])[..., None]  # card grain
    card[margin:margin + h, margin:margin + w] = left
    m = cv2.getRotationMatrix2D(((w - 1) / 2, (h - 1) / 2), turn_deg, scale)
    turned = cv2.warpAffine(right, m, (w, h), flags=cv2.INTER_LINEAR,
                            borderMode=cv2.BORDER_CONSTANT, borderValue=MOUNT)
    x0 = margin + w + gap
    card[margin:margin + h, x0:x0 + w] = turned
    if stain:
        # A brown water stain across the left print's lower corner and the mount.
        yy, xx = np.mgrid[:card.shape[0], :card.shape[1]]
        blot = ((xx - margin - 0.85 * w) / 70.0) ** 2 + ((yy - margin - h) / 45.0) ** 2 < 1
        card[blot] = 0.65 * card[blot] + 0.35 * np.array([120, 80, 40], np.float32)
    return np.clip(card, 0, 255).astype(np.uint8), (margin, margin)


def render_board(K, dist, R_board, t_board, pattern, square, size, *, supersample=2):
    """Image of a chessboard (``pattern`` inner corners) one camera sees, with a white margin.

    The board's plane is ``X_cam = R_board [x, y, 0] + t_board`` (the pose
    ``cv2.projectPoints`` takes). Each pixel's ray, from ``cv2.undistortPoints``
    (so lens distortion is rendered), is cut with that plane; the board square
    it lands on gives black or white, averaged over ``supersample``² rays.
    """
    w, h = size
    s = supersample
    u, v = np.meshgrid((np.arange(w * s) + 0.5) / s - 0.5, (np.arange(h * s) + 0.5) / s - 0.5)
    pts = np.stack([u.ravel(), v.ravel()], 1).reshape(-1, 1, 2)
    xy = cv2.undistortPoints(pts, K, dist).reshape(-1, 2)
    rays = np.column_stack([xy, np.ones(len(xy))])
    rb = R_board.T @ rays.T  # rays in board coordinates
    ob = R_board.T @ np.asarray(t_board, np.float64).ravel()
    lam = ob[2] / rb[2]
    bx, by = lam * rb[0] - ob[0], lam * rb[1] - ob[1]
    cols, rows = pattern
    i, j = np.floor(bx / square) + 1, np.floor(by / square) + 1  # squares from -1
    on_board = (i >= 0) & (i <= cols) & (j >= 0) & (j <= rows)
    black = on_board & ((i + j) % 2 == 0)
    margin = (i >= -1) & (i <= cols + 1) & (j >= -1) & (j <= rows + 1)
    value = np.where(black, 25.0, np.where(margin, 235.0, 120.0))
    value[lam <= 0] = 120.0
    img = value.reshape(h * s, w * s).astype(np.float32)
    img = cv2.resize(img, (w, h), interpolation=cv2.INTER_AREA)
    return np.clip(img, 0, 255).astype(np.uint8)
