"""Rectified stereo geometry.

Today only pre-rectified pairs are handled; calibrated (K, distortion, R, T) and
uncalibrated rectification will produce the same :class:`RectifiedRig`, so every
later stage works on one description of the rectified pair.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np


@dataclass(frozen=True)
class RectifiedRig:
    """Intrinsics of a rectified stereo pair, in the left rectified camera.

    Parameters
    ----------
    focal_px : float
        Focal length in pixels (same for both rectified images).
    cx, cy : float
        Principal point of the left rectified image, pixels.
    baseline : float
        Distance between the camera centres, in ``units`` (metres by default).
        The right camera sits at ``+baseline`` along x of the left camera.
    doffs : float
        Difference of the principal points, ``cx_right - cx_left`` in pixels, so
        that depth is ``Z = focal_px * baseline / (d + doffs)``.
    image_size : tuple of int
        ``(width, height)`` of the rectified images, pixels.
    units : str
        Unit of ``baseline`` and of every length derived from it.
    metric : bool
        False when the baseline is nominal (scale unknown).
    """

    focal_px: float
    cx: float
    cy: float
    baseline: float
    doffs: float = 0.0
    image_size: tuple[int, int] = (0, 0)
    units: str = "m"
    metric: bool = True

    @property
    def Q(self) -> np.ndarray:  # noqa: N802  (OpenCV's name for this matrix)
        """4×4 reprojection matrix in OpenCV's convention.

        ``[X Y Z W]^T = Q [x y d 1]^T`` as ``cv2.stereoRectify`` returns it for a
        horizontal rig whose right camera is at ``+baseline`` (OpenCV writes
        ``Tx = -baseline``).
        """
        f, b = self.focal_px, self.baseline
        return np.array(
            [
                [1.0, 0.0, 0.0, -self.cx],
                [0.0, 1.0, 0.0, -self.cy],
                [0.0, 0.0, 0.0, f],
                [0.0, 0.0, 1.0 / b, self.doffs / b],
            ]
        )

    def depth_from_disparity(self, disparity: np.ndarray) -> np.ndarray:
        """Depth ``Z = f·B / (d + doffs)`` in ``units``; NaN where ``d`` is NaN."""
        d = np.asarray(disparity, dtype=np.float64)
        with np.errstate(divide="ignore", invalid="ignore"):
            z = self.focal_px * self.baseline / (d + self.doffs)
        z[~np.isfinite(z) | (z <= 0)] = np.nan
        return z

    def to_dict(self) -> dict:
        """The rectified calibration JSON form fixed in the design."""
        out = asdict(self)
        out["image_size"] = list(self.image_size)
        out["rectified"] = True
        out.pop("metric")
        return out
