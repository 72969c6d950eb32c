"""Disparity to 3-D points in the left rectified camera, with depth uncertainty."""

from __future__ import annotations

import numpy as np

from stereomesh.geometry.data import PointCloud
from stereomesh.params import CloudParams
from stereomesh.rectify import RectifiedRig


def _check_maps(disparity, image, confidence, sigma_d):
    disparity = np.asarray(disparity)
    if disparity.ndim != 2 or not np.issubdtype(disparity.dtype, np.floating):
        raise ValueError(
            f"disparity must be a 2-D float map, got shape {disparity.shape} "
            f"dtype {disparity.dtype}"
        )
    shape = disparity.shape
    image = np.asarray(image)
    if image.shape != shape + (3,) or image.dtype != np.uint8:
        raise ValueError(
            f"image must be {shape + (3,)} uint8 to match the disparity, "
            f"got {image.shape} {image.dtype}"
        )
    if confidence is not None:
        confidence = np.asarray(confidence)
        if confidence.shape != shape:
            raise ValueError(f"confidence must have shape {shape}, got {confidence.shape}")
    sigma = np.asarray(sigma_d, dtype=np.float64)
    if sigma.ndim not in (0, 2) or (sigma.ndim == 2 and sigma.shape != shape):
        raise ValueError(f"sigma_d must be a scalar or a {shape} map, got shape {sigma.shape}")
    return disparity, image, confidence, sigma


def valid_disparity_mask(disparity: np.ndarray, rig: RectifiedRig) -> np.ndarray:
    """Pixels whose disparity gives a point in front of the camera.

    Parameters
    ----------
    disparity : (H, W) float array
        Disparity in pixels, NaN where unknown.
    rig : RectifiedRig

    Returns
    -------
    (H, W) bool
        True where ``d`` is finite and ``d + doffs > 0``.

    Examples
    --------
    >>> import numpy as np
    >>> from stereomesh.rectify import RectifiedRig
    >>> valid_disparity_mask(np.array([[1.0, np.nan, -2.0]]), RectifiedRig(100, 0, 0, 0.1))
    array([[ True, False, False]])
    """
    d = np.asarray(disparity)
    with np.errstate(invalid="ignore"):
        return np.isfinite(d) & (d + rig.doffs > 0)


def triangulate(
    disparity: np.ndarray,
    rig: RectifiedRig,
    image: np.ndarray,
    confidence: np.ndarray | None = None,
    sigma_d: float | np.ndarray = CloudParams.sigma_d,
) -> PointCloud:
    """Back-project every valid disparity to a coloured 3-D point.

    With ``f`` the focal length, ``B`` the baseline and ``(cx, cy)`` the left
    principal point, a pixel ``(u, v)`` of disparity ``d`` maps to
    ``Z = f·B / (d + doffs)``, ``X = (u − cx)·Z / f``, ``Y = (v − cy)·Z / f``,
    and a disparity uncertainty ``σ_d`` to a depth uncertainty
    ``σ_Z = |dZ/dd|·σ_d = Z²·σ_d / (f·B)``.

    Parameters
    ----------
    disparity : (H, W) float32 array
        Left disparity in pixels, NaN where invalid.
    rig : RectifiedRig
        Rectified rig; lengths come out in ``rig.units``.
    image : (H, W, 3) uint8 array
        Rectified left image, RGB, giving the point colours.
    confidence : (H, W) float array, optional
        Matching confidence in [0, 1]; every point gets 1 when omitted.
    sigma_d : float or (H, W) float array
        One-sigma disparity uncertainty in pixels.

    Returns
    -------
    PointCloud
        One point per pixel with finite ``d`` and ``d + doffs > 0``, in row-major
        pixel order, with ``pixels`` set to ``(col, row)``. ``points`` are
        float64 in ``rig.units``; ``sigma_z`` float32 in the same unit.

    Examples
    --------
    >>> import numpy as np
    >>> from stereomesh.rectify import RectifiedRig
    >>> rig = RectifiedRig(focal_px=100.0, cx=1.0, cy=0.0, baseline=0.1)
    >>> d = np.array([[10.0, np.nan]], np.float32)
    >>> pc = triangulate(d, rig, np.zeros((1, 2, 3), np.uint8))
    >>> pc.points
    array([[-0.01,  0.  ,  1.  ]])
    """
    disparity, image, confidence, sigma = _check_maps(disparity, image, confidence, sigma_d)
    valid = valid_disparity_mask(disparity, rig)
    width = valid.shape[1]
    # Flat positions and np.take: (row, col) fancy indexing is several times slower.
    index = np.flatnonzero(valid)
    rows, cols = index // width, index % width

    def at_valid(arr):
        return np.take(arr.reshape(valid.size, *arr.shape[2:]), index, axis=0)

    f, b = float(rig.focal_px), float(rig.baseline)
    d = at_valid(disparity).astype(np.float64)
    z = f * b / (d + rig.doffs)
    pts = np.empty((len(z), 3), np.float64)
    pts[:, 0] = (cols - rig.cx) * z / f
    pts[:, 1] = (rows - rig.cy) * z / f
    pts[:, 2] = z
    sig = sigma if sigma.ndim == 0 else at_valid(sigma)
    sigma_z = (z * z * sig / (f * b)).astype(np.float32)
    if confidence is None:
        conf = np.ones(len(z), np.float32)
    else:
        conf = at_valid(confidence).astype(np.float32)
    return PointCloud(
        points=pts,
        colors=at_valid(image),
        confidence=conf,
        sigma_z=sigma_z,
        normals=None,
        pixels=np.stack([cols, rows], axis=1).astype(np.int32),
    )
