"""Disparity search range from sparse feature matches."""

from __future__ import annotations

import numpy as np


def estimate_disparity_range(
    left: np.ndarray, right: np.ndarray, *, margin: float = 0.15, multiple: int = 16
) -> tuple[tuple[int, int], dict]:
    """Disparity range ``(MIN, MAX)`` (MAX exclusive) that covers the scene.

    ORB features are matched with a ratio test on the rectified pair, matches
    off the epipolar line (more than 2 px vertically) are dropped, and the 1st
    and 99th percentiles of the horizontal offsets, widened by ``margin`` of
    their span, give the range, rounded outward to ``multiple``.

    Parameters
    ----------
    left, right : (H, W) uint8 arrays
        Rectified grey images.
    margin : float
        Share of the measured span added on each side.
    multiple : int
        The range ends are rounded outward to multiples of this.

    Returns
    -------
    (int, int)
        ``(MIN, MAX)``.
    dict
        Figures: ``matches`` (kept), ``low`` and ``high`` percentiles found.

    Examples
    --------
    >>> import numpy as np
    >>> rng = np.random.default_rng(0)
    >>> right = (rng.random((200, 300)) * 255).astype(np.uint8)
    >>> left = np.roll(right, 20, axis=1)
    >>> (lo, hi), _ = estimate_disparity_range(left, right)
    >>> lo <= 20 < hi
    True
    """
    import cv2

    left = np.ascontiguousarray(left, np.uint8)
    right = np.ascontiguousarray(right, np.uint8)
    width = left.shape[1]
    orb = cv2.ORB_create(nfeatures=4000)
    kl, dl = orb.detectAndCompute(left, None)
    kr, dr = orb.detectAndCompute(right, None)
    offsets = []
    if dl is not None and dr is not None and len(kl) >= 2 and len(kr) >= 2:
        matcher = cv2.BFMatcher(cv2.NORM_HAMMING)
        for pair in matcher.knnMatch(dl, dr, k=2):
            if len(pair) < 2 or pair[0].distance > 0.8 * pair[1].distance:
                continue
            pl = kl[pair[0].queryIdx].pt
            pr = kr[pair[0].trainIdx].pt
            if abs(pl[1] - pr[1]) <= 2.0:
                offsets.append(pl[0] - pr[0])
    figures = {"matches": len(offsets)}
    if len(offsets) < 10:
        # Too few matches to trust: fall back to a wide, non-negative range.
        hi = int(np.ceil(width / 4 / multiple) * multiple)
        figures.update(low=None, high=None, fallback=True)
        return (0, max(hi, multiple)), figures
    lo_p, hi_p = np.percentile(offsets, [1, 99])
    span = max(hi_p - lo_p, 8.0)
    lo = int(np.floor((lo_p - margin * span) / multiple) * multiple)
    hi = int(np.ceil((hi_p + margin * span) / multiple) * multiple)
    if lo_p >= 0:
        lo = max(lo, 0)
    figures.update(low=float(lo_p), high=float(hi_p), fallback=False)
    return (lo, max(hi, lo + multiple)), figures
