"""Stereo calibration from chessboard image pairs (OpenCV), on arrays.

:func:`find_board` finds a board's inner corners in one grey image;
:func:`calibrate_stereo` turns the corners of the pairs where both views saw the
board into a :class:`~stereomesh.rectify.StereoCalibration` and the figures of the
fit. Reading image files and writing the results is in
:mod:`stereomesh.io.chessboard`.
"""

from __future__ import annotations

import numpy as np

from stereomesh.rectify import StereoCalibration


def parse_pattern(text: str) -> tuple[int, int]:
    """``"COLSxROWS"`` (inner corners) as ``(cols, rows)``.

    Examples
    --------
    >>> parse_pattern("9x6")
    (9, 6)
    """
    parts = str(text).lower().split("x")
    if len(parts) != 2 or not all(p.strip().isdigit() for p in parts):
        raise ValueError(f"pattern {text!r} is not COLSxROWS, e.g. 9x6 (inner corners)")
    cols, rows = (int(p) for p in parts)
    if cols < 2 or rows < 2:
        raise ValueError(f"pattern {text!r}: a board needs at least 2x2 inner corners")
    return cols, rows


def board_points(pattern: tuple[int, int], square: float) -> np.ndarray:
    """Inner corners of the board in its own plane, row by row, in ``square`` units.

    Returns
    -------
    (cols * rows, 3) float32 array
        ``(x, y, 0)``, the order ``cv2.findChessboardCorners`` reports.

    Examples
    --------
    >>> board_points((3, 2), 0.5)[:4].tolist()
    [[0.0, 0.0, 0.0], [0.5, 0.0, 0.0], [1.0, 0.0, 0.0], [0.0, 0.5, 0.0]]
    """
    cols, rows = pattern
    grid = np.zeros((rows * cols, 3), np.float32)
    grid[:, :2] = np.mgrid[0:cols, 0:rows].T.reshape(-1, 2) * square
    return grid


def find_board(grey: np.ndarray, pattern: tuple[int, int]) -> np.ndarray | None:
    """Inner corners of a chessboard, refined to sub-pixel, or None when not found.

    Parameters
    ----------
    grey : (H, W) uint8 array
    pattern : (int, int)
        Inner corners ``(cols, rows)``.

    Returns
    -------
    (cols * rows, 2) float32 array or None
    """
    import cv2

    flags = cv2.CALIB_CB_ADAPTIVE_THRESH | cv2.CALIB_CB_NORMALIZE_IMAGE
    found, corners = cv2.findChessboardCorners(grey, pattern, flags=flags)
    if not found:
        return None
    criteria = (cv2.TERM_CRITERIA_EPS + cv2.TERM_CRITERIA_MAX_ITER, 50, 1e-3)
    corners = cv2.cornerSubPix(grey, corners, (5, 5), (-1, -1), criteria)
    return corners.reshape(-1, 2)


def _view_rms(obj, corners, K, dist) -> float:
    """RMS reprojection error of one view, with its board pose fitted by ``cv2.solvePnP``."""
    import cv2

    ok, rvec, tvec = cv2.solvePnP(obj, corners, K, dist)
    proj = cv2.projectPoints(obj, rvec, tvec, K, dist)[0].reshape(-1, 2)
    return float(np.sqrt(np.mean(np.sum((proj - corners) ** 2, axis=1))))


def calibrate_stereo(left_corners: list, right_corners: list, pattern: tuple[int, int],
                     square: float, image_size: tuple[int, int]):
    """Calibrate a stereo rig from board corners seen in both views.

    Each camera is calibrated on its own (``cv2.calibrateCamera``), then both
    together with those intrinsics as the starting guess
    (``cv2.stereoCalibrate``), giving R and T of the right camera. Distortion
    is ``k1 k2 p1 p2`` with ``k3`` held at 0.

    Parameters
    ----------
    left_corners, right_corners : lists of (N, 2) float32 arrays
        Corners of the same board poses, in the same order.
    pattern : (int, int)
    square : float
        Side of a square, metres.
    image_size : (int, int)
        ``(width, height)``.

    Returns
    -------
    StereoCalibration, dict
        The calibration (metres) and figures: ``rms_px`` (overall, of the
        stereo fit), ``per_image`` (left and right RMS of each pair, pixels).

    Raises
    ------
    ValueError
        With fewer than 3 pairs.
    """
    import cv2

    if len(left_corners) < 3:
        raise ValueError(f"the board was found in both views of only {len(left_corners)} "
                         "pair(s); at least 3 (better 10 or more, at varied angles) are needed")
    obj = board_points(pattern, square)
    objs = [obj] * len(left_corners)
    lc = [c.reshape(-1, 1, 2).astype(np.float32) for c in left_corners]
    rc = [c.reshape(-1, 1, 2).astype(np.float32) for c in right_corners]
    # k3 stays 0: with a dozen views of one board it fits noise, not the lens.
    fix = cv2.CALIB_FIX_K3
    _, K1, d1, _, _ = cv2.calibrateCamera(objs, lc, image_size, None, None, flags=fix)
    _, K2, d2, _, _ = cv2.calibrateCamera(objs, rc, image_size, None, None, flags=fix)
    criteria = (cv2.TERM_CRITERIA_EPS + cv2.TERM_CRITERIA_MAX_ITER, 100, 1e-6)
    rms, K1, d1, K2, d2, R, T, _E, _F = cv2.stereoCalibrate(
        objs, lc, rc, K1, d1, K2, d2, image_size, criteria=criteria,
        flags=cv2.CALIB_USE_INTRINSIC_GUESS | fix)
    per_image = [{"left_rms_px": round(_view_rms(obj, a, K1, d1), 4),
                  "right_rms_px": round(_view_rms(obj, b, K2, d2), 4)}
                 for a, b in zip(left_corners, right_corners, strict=True)]
    cal = StereoCalibration(K1, d1.ravel(), K2, d2.ravel(), R, T.ravel(),
                            (int(image_size[0]), int(image_size[1])))
    figures = {"rms_px": round(float(rms), 4), "pairs_used": len(left_corners),
               "baseline_m": round(float(np.linalg.norm(T)), 6),
               "focal_px": [round(float(K1[0, 0]), 3), round(float(K2[0, 0]), 3)],
               "per_image": per_image}
    return cal, figures
