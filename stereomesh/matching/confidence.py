"""Per-pixel confidence in [0, 1] whose ranking predicts disparity error."""

from __future__ import annotations

import numpy as np


def confidence_map(
    c_best: np.ndarray,
    c_second: np.ndarray,
    lr_diff: np.ndarray,
    gray: np.ndarray,
    *,
    peak_ratio_scale: float = 1.0,
    lr_sigma: float = 1.0,
    texture_scale: float = 0.25,
) -> np.ndarray:
    """Confidence from the cost curve, left-right agreement and local texture.

    The three cues fail in different places (repetitive texture, occlusion
    borders, flat regions), so they are multiplied: a pixel is confident only
    when all three agree. The peak ratio ``(c2 − c1) / c2`` is the cue that
    ranks errors (Hu & Mordohai 2012 compare such measures); it must not
    saturate, or the ranking is lost: with a scale of 0.25 most pixels of a
    semi-global solve sat at 1 and the sparsification curve on scikit-image's
    motorcycle pair was flat (area 0.99 of the mean error; 0.42 at scale 1).
    Strong texture goes with depth edges, where errors are larger, so the
    texture cue only marks nearly flat windows (scale 0.25 grey levels/pixel).

    Parameters
    ----------
    c_best, c_second : (H, W) float arrays
        Winning cost and best cost at least two hypotheses away.
    lr_diff : (H, W) float array
        ``|d_left − d_right|`` of the left-right check, pixels (inf if undefined).
    gray : (H, W) array
        Left grey image, grey levels of 0–255.
    peak_ratio_scale : float
        Relative margin ``(c2 − c1) / c2`` that counts as fully distinct; 1
        keeps the margin itself.
    lr_sigma : float
        Left-right disagreement (pixels) at which that cue drops to ``e^-0.5``.
    texture_scale : float
        Mean gradient magnitude (grey levels per pixel) at which that cue reaches
        ``1 − 1/e``.

    Returns
    -------
    (H, W) float32 in [0, 1]

    Examples
    --------
    >>> import numpy as np
    >>> g = np.random.default_rng(0).random((4, 4)) * 255
    >>> c = confidence_map(np.ones((4, 4)), np.full((4, 4), 4.0), np.zeros((4, 4)), g)
    >>> bool((c > 0.5).all())
    True
    """
    from stereomesh.matching import _kernels

    arrays = [np.ascontiguousarray(a, np.float32) for a in (c_best, c_second, lr_diff, gray)]
    shape = arrays[3].shape
    if any(a.shape != shape for a in arrays) or len(shape) != 2:
        raise ValueError(f"all inputs must be one (H, W) shape, got {[a.shape for a in arrays]}")
    return _kernels.confidence_kernel(*arrays, float(peak_ratio_scale), float(lr_sigma),
                                      float(texture_scale))


def confidence_map_reference(
    c_best: np.ndarray,
    c_second: np.ndarray,
    lr_diff: np.ndarray,
    gray: np.ndarray,
    *,
    peak_ratio_scale: float = 1.0,
    lr_sigma: float = 1.0,
    texture_scale: float = 0.25,
) -> np.ndarray:
    """:func:`confidence_map` in numpy and OpenCV, kept as the reference for the tests."""
    import cv2

    c1 = np.asarray(c_best, np.float32)
    c2 = np.asarray(c_second, np.float32)
    with np.errstate(divide="ignore", invalid="ignore"):
        margin = np.where(np.isfinite(c2) & (c2 > 0), (c2 - c1) / c2, 1.0)
    peak = np.clip(margin / peak_ratio_scale, 0.0, 1.0)
    lr = np.exp(-0.5 * (np.asarray(lr_diff, np.float32) / lr_sigma) ** 2)
    g = np.asarray(gray, np.float32)
    gx = cv2.Sobel(g, cv2.CV_32F, 1, 0, ksize=3) / 8.0
    gy = cv2.Sobel(g, cv2.CV_32F, 0, 1, ksize=3) / 8.0
    grad = cv2.blur(np.hypot(gx, gy), (5, 5))
    texture = 1.0 - np.exp(-grad / texture_scale)
    conf = peak * lr * texture
    return np.clip(np.nan_to_num(conf, nan=0.0), 0.0, 1.0).astype(np.float32)
