"""Refinement of an integer disparity winner: sub-pixel offset and speckle removal."""

from __future__ import annotations

import numpy as np

SUBPIXEL_METHODS = ("parabola", "equiangular", "none")


def subpixel_offset(
    c_minus: np.ndarray, c_best: np.ndarray, c_plus: np.ndarray, method: str = "parabola"
) -> np.ndarray:
    """Sub-pixel offset of a cost minimum from its two neighbours.

    Parameters
    ----------
    c_minus, c_best, c_plus : array
        Costs at hypotheses ``k − 1``, ``k`` (the winner) and ``k + 1``.
    method : {'parabola', 'equiangular', 'none'}
        Fit a parabola (suits quadratic-like costs) or two lines of equal and
        opposite slope (suits absolute-difference-like costs such as Hamming
        distances).

    Returns
    -------
    array of float32
        Offset in ``[-0.5, 0.5]`` to add to the winner.

    Examples
    --------
    >>> import numpy as np
    >>> # samples of (x - 0.25)^2 at -1, 0, 1
    >>> float(subpixel_offset(np.array(1.5625), np.array(0.0625), np.array(0.5625))[()])
    0.25
    """
    cm = np.asarray(c_minus, np.float32)
    c0 = np.asarray(c_best, np.float32)
    cp = np.asarray(c_plus, np.float32)
    if method == "none":
        return np.zeros(np.broadcast(cm, c0, cp).shape, np.float32)
    with np.errstate(divide="ignore", invalid="ignore"):
        if method == "parabola":
            denom = 2.0 * (cm - 2.0 * c0 + cp)
            off = np.where(denom > 0, (cm - cp) / denom, 0.0)
        elif method == "equiangular":
            denom = 2.0 * np.maximum(cm - c0, cp - c0)
            off = np.where(denom > 0, (cm - cp) / denom, 0.0)
        else:
            raise ValueError(f"subpixel method must be one of {SUBPIXEL_METHODS}, got {method!r}")
    return np.clip(off, -0.5, 0.5).astype(np.float32)


def speckle_mask(disparity: np.ndarray, max_size: int, max_diff: float) -> np.ndarray:
    """Pixels in small connected blobs of similar disparity (likely wrong matches).

    Parameters
    ----------
    disparity : (H, W) float array
        Disparity in pixels, NaN where invalid.
    max_size : int
        Blobs of at most this many pixels are speckles; 0 disables the filter.
    max_diff : float
        Neighbours whose disparities differ by at most this much (pixels) join a blob.

    Returns
    -------
    (H, W) bool
        True on speckle pixels.

    Examples
    --------
    >>> import numpy as np
    >>> d = np.full((5, 5), 10.0); d[2, 2] = 30.0
    >>> speckle_mask(d, max_size=2, max_diff=1.0)[2, 2]
    np.True_
    """
    import cv2

    from stereomesh.matching import _kernels

    disparity = np.ascontiguousarray(disparity, np.float32)
    if max_size <= 0:
        return np.zeros(disparity.shape, bool)
    # OpenCV's speckle filter works on fixed-point int16 disparities (1/16 px).
    fixed = _kernels.fixed_point_disparity(disparity, np.int16(-16))
    marked = fixed.copy()
    cv2.filterSpeckles(marked, -16, int(max_size), int(round(max_diff * 16)))
    return _kernels.newly_marked(fixed, marked, np.int16(-16))
