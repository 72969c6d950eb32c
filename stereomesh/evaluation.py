"""Accuracy measures for disparity maps, confidence maps and reconstructed surfaces.

Used by the tests, the benchmarks and the run report. Every function takes
arrays and returns plain floats or arrays; none reads files.
"""

from __future__ import annotations

import numpy as np

DEFAULT_FRACTIONS = np.linspace(0.0, 0.95, 20)


def _pair(disparity, gt, mask):
    d = np.asarray(disparity, np.float64)
    g = np.asarray(gt, np.float64)
    if d.shape != g.shape:
        raise ValueError(f"disparity {d.shape} and ground truth {g.shape} differ in shape")
    keep = np.isfinite(d) & np.isfinite(g)
    if mask is not None:
        m = np.asarray(mask)
        if m.shape != d.shape:
            raise ValueError(f"mask must have shape {d.shape}, got {m.shape}")
        keep &= m.astype(bool)
    return d[keep], g[keep]


def bad_pixel_rate(
    disparity: np.ndarray, gt: np.ndarray, threshold: float = 2.0, mask: np.ndarray | None = None
) -> float:
    """Share of pixels whose disparity error exceeds ``threshold``.

    Parameters
    ----------
    disparity, gt : (H, W) float arrays
        Estimated and true disparity, pixels; NaN or inf where unknown.
    threshold : float
        Error bound in pixels; an error ``> threshold`` is bad.
    mask : (H, W) bool array, optional
        Pixels to consider (e.g. non-occluded).

    Returns
    -------
    float
        In [0, 1], over pixels where both maps are finite (and ``mask`` is
        true); NaN if there are none. Missing estimates are not counted here,
        see :func:`density`.

    Examples
    --------
    >>> import numpy as np
    >>> bad_pixel_rate(np.array([1.0, 5.0, np.nan]), np.array([1.5, 1.0, 2.0]))
    0.5
    """
    d, g = _pair(disparity, gt, mask)
    if d.size == 0:
        return float("nan")
    return float(np.mean(np.abs(d - g) > threshold))


def mean_abs_error(disparity: np.ndarray, gt: np.ndarray, mask: np.ndarray | None = None) -> float:
    """Mean absolute disparity error in pixels over pixels where both maps are finite.

    Parameters
    ----------
    disparity, gt : (H, W) float arrays
        Disparity in pixels; NaN or inf where unknown.
    mask : (H, W) bool array, optional

    Returns
    -------
    float
        Pixels; NaN if no pixel qualifies.

    Examples
    --------
    >>> import numpy as np
    >>> mean_abs_error(np.array([1.0, 4.0]), np.array([2.0, 2.0]))
    1.5
    """
    d, g = _pair(disparity, gt, mask)
    return float(np.mean(np.abs(d - g))) if d.size else float("nan")


def density(disparity: np.ndarray, gt_valid_mask: np.ndarray) -> float:
    """Share of pixels with known ground truth that received a finite estimate.

    Parameters
    ----------
    disparity : (H, W) float array
        NaN where the matcher gave no value.
    gt_valid_mask : (H, W) bool array
        Pixels with ground truth.

    Returns
    -------
    float
        In [0, 1]; NaN if ``gt_valid_mask`` is all false.

    Examples
    --------
    >>> import numpy as np
    >>> density(np.array([1.0, np.nan, 3.0, np.nan]), np.array([True, True, True, False]))
    0.6666666666666666
    """
    d = np.asarray(disparity)
    m = np.asarray(gt_valid_mask, bool)
    if d.shape != m.shape:
        raise ValueError(f"disparity {d.shape} and mask {m.shape} differ in shape")
    n = int(m.sum())
    return float(np.isfinite(d[m]).sum() / n) if n else float("nan")


def _curve(abs_error: np.ndarray, order: np.ndarray, fractions: np.ndarray) -> np.ndarray:
    """Mean error of what is left after dropping the first ``f·N`` entries of ``order``."""
    e = abs_error[order]
    n = len(e)
    # Suffix sums give every fraction's mean in one pass.
    suffix = np.r_[np.cumsum(e[::-1])[::-1], 0.0]
    removed = np.minimum(np.round(fractions * n).astype(np.int64), n)
    kept = n - removed
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(kept > 0, suffix[removed] / kept, np.nan)


def _check_fractions(fractions) -> np.ndarray:
    fr = np.asarray(fractions, np.float64)
    if fr.ndim != 1 or fr.size == 0 or np.any((fr < 0) | (fr >= 1)) or np.any(np.diff(fr) <= 0):
        raise ValueError("fractions must be a non-empty increasing 1-D array in [0, 1)")
    return fr


def _finite_pairs(abs_error, confidence=None):
    e = np.asarray(abs_error, np.float64).ravel()
    if confidence is None:
        keep = np.isfinite(e)
        return e[keep], None
    c = np.asarray(confidence, np.float64).ravel()
    if c.shape != e.shape:
        raise ValueError(f"abs_error {np.shape(abs_error)} and confidence differ in size")
    keep = np.isfinite(e) & np.isfinite(c)
    return e[keep], c[keep]


def sparsification_curve(
    abs_error: np.ndarray, confidence: np.ndarray, fractions: np.ndarray = DEFAULT_FRACTIONS
) -> tuple[np.ndarray, np.ndarray]:
    """Mean error of the pixels kept after removing the least confident ones.

    A confidence that ranks errors well gives a curve that falls quickly; a
    random one gives a flat curve.

    Parameters
    ----------
    abs_error : array
        Absolute error per pixel (any shape); non-finite entries are ignored.
    confidence : array
        Confidence per pixel, same size; higher means more trusted. Ties are
        removed in input order.
    fractions : (K,) float array
        Increasing shares of pixels to remove, in [0, 1).

    Returns
    -------
    fractions : (K,) float64
    mean_error : (K,) float64
        Mean absolute error of the remaining pixels, NaN where none remain.

    Examples
    --------
    >>> import numpy as np
    >>> f, e = sparsification_curve(np.array([4.0, 1, 1, 2]), np.array([0.1, 0.9, 0.8, 0.5]),
    ...                             np.array([0.0, 0.25, 0.5]))
    >>> e.tolist()
    [2.0, 1.3333333333333333, 1.0]
    """
    fr = _check_fractions(fractions)
    e, c = _finite_pairs(abs_error, confidence)
    return fr, _curve(e, np.argsort(c, kind="stable"), fr)


def oracle_sparsification_curve(
    abs_error: np.ndarray, fractions: np.ndarray = DEFAULT_FRACTIONS
) -> tuple[np.ndarray, np.ndarray]:
    """Best possible sparsification curve: the largest errors are removed first.

    Parameters
    ----------
    abs_error : array
        Absolute error per pixel; non-finite entries are ignored.
    fractions : (K,) float array
        Increasing shares of pixels to remove, in [0, 1).

    Returns
    -------
    fractions, mean_error : (K,) float64

    Examples
    --------
    >>> import numpy as np
    >>> oracle_sparsification_curve(np.array([4.0, 1, 1, 2]), np.array([0.0, 0.5]))[1].tolist()
    [2.0, 1.0]
    """
    fr = _check_fractions(fractions)
    e, _ = _finite_pairs(abs_error)
    return fr, _curve(e, np.argsort(-e, kind="stable"), fr)


def sparsification_auc(
    abs_error: np.ndarray, confidence: np.ndarray, fractions: np.ndarray = DEFAULT_FRACTIONS
) -> float:
    """Area under the sparsification curve (trapezoidal rule over ``fractions``).

    Parameters
    ----------
    abs_error, confidence, fractions
        As for :func:`sparsification_curve`.

    Returns
    -------
    float
        Error unit times fraction; lower is better. Compare with the oracle's
        area (:func:`oracle_sparsification_curve`) on the same errors.

    Examples
    --------
    >>> import numpy as np
    >>> sparsification_auc(np.ones(10), np.arange(10.0), np.array([0.0, 0.5]))
    0.5
    """
    fr, curve = sparsification_curve(abs_error, confidence, fractions)
    return _trapezoid(curve, fr)


def oracle_sparsification_auc(
    abs_error: np.ndarray, fractions: np.ndarray = DEFAULT_FRACTIONS
) -> float:
    """Area under :func:`oracle_sparsification_curve` (trapezoidal rule)."""
    fr, curve = oracle_sparsification_curve(abs_error, fractions)
    return _trapezoid(curve, fr)


def _trapezoid(y: np.ndarray, x: np.ndarray) -> float:
    if len(x) < 2:
        return 0.0
    return float(np.sum((y[1:] + y[:-1]) * np.diff(x)) / 2.0)


def covisible_points(
    points: np.ndarray, occlusion: np.ndarray, focal_px: float, cx: float, cy: float
) -> np.ndarray:
    """The points whose left-image pixel both cameras see.

    Parameters
    ----------
    points : (N, 3) float array
        Points in the left rectified camera frame (x right, y down, z forward).
    occlusion : (H, W) uint8 array
        Occlusion classes of the left image (0 where the right camera sees the pixel).
    focal_px, cx, cy : float
        Left rectified intrinsics, pixels.

    Returns
    -------
    (M, 3) float array
        The points projecting to a class-0 pixel inside the image.

    Examples
    --------
    >>> import numpy as np
    >>> occ = np.zeros((2, 2), np.uint8); occ[0, 0] = 1
    >>> pts = np.array([[-0.5, -0.5, 1.0], [0.5, 0.5, 1.0]])
    >>> covisible_points(pts, occ, 1.0, 0.5, 0.5).tolist()
    [[0.5, 0.5, 1.0]]
    """
    points = np.asarray(points, np.float64)
    u = np.rint(focal_px * points[:, 0] / points[:, 2] + cx).astype(int)
    v = np.rint(focal_px * points[:, 1] / points[:, 2] + cy).astype(int)
    h, w = occlusion.shape
    inside = (u >= 0) & (u < w) & (v >= 0) & (v < h)
    keep = np.zeros(len(points), bool)
    keep[inside] = occlusion[v[inside], u[inside]] == 0
    return points[keep]


def sample_surface(vertices: np.ndarray, faces: np.ndarray, n: int, seed: int = 0) -> np.ndarray:
    """Points drawn uniformly by area from a triangle mesh.

    Parameters
    ----------
    vertices : (V, 3) float array
    faces : (F, 3) int array
    n : int
        Number of samples.
    seed : int
        Seed of the random generator, for repeatable benchmarks.

    Returns
    -------
    (n, 3) float64
        Sample positions, in the unit of ``vertices``.

    Examples
    --------
    >>> import numpy as np
    >>> p = sample_surface(np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0]], float),
    ...                    np.array([[0, 1, 2]]), 100)
    >>> bool(np.all(p.sum(axis=1) <= 1 + 1e-12)), p.shape
    (True, (100, 3))
    """
    v = np.asarray(vertices, np.float64)
    f = np.asarray(faces)
    if v.ndim != 2 or v.shape[1] != 3:
        raise ValueError(f"vertices must have shape (V, 3), got {v.shape}")
    if f.ndim != 2 or f.shape[1] != 3 or not np.issubdtype(f.dtype, np.integer):
        raise ValueError(f"faces must be an (F, 3) integer array, got {f.shape} {f.dtype}")
    if n < 0:
        raise ValueError(f"n must be >= 0, got {n}")
    a, b, c = v[f[:, 0]], v[f[:, 1]], v[f[:, 2]]
    area = 0.5 * np.linalg.norm(np.cross(b - a, c - a), axis=1)
    total = area.sum()
    if not total > 0:
        raise ValueError("the mesh has no area to sample")
    rng = np.random.default_rng(seed)
    tri = rng.choice(len(f), size=int(n), p=area / total)
    r1 = np.sqrt(rng.random(int(n)))
    r2 = rng.random(int(n))
    # Square-root warping of the first coordinate makes the barycentric draw uniform.
    return (
        (1 - r1)[:, None] * a[tri] + (r1 * (1 - r2))[:, None] * b[tri] + (r1 * r2)[:, None] * c[tri]
    )


def f_score(pred_points: np.ndarray, gt_points: np.ndarray, tau: float) -> dict:
    """Precision, recall and F-score of a reconstruction at distance ``tau``.

    As defined by Knapitsch et al. 2017 (Tanks and Temples): precision is the
    share of predicted points closer than ``tau`` to the ground truth, recall
    the share of ground-truth points closer than ``tau`` to the prediction,
    and ``F = 2·P·R / (P + R)``.

    Parameters
    ----------
    pred_points : (N, 3) float array
        Reconstructed points (e.g. from :func:`sample_surface`).
    gt_points : (M, 3) float array
        Ground-truth points, same unit.
    tau : float
        Distance threshold, same unit; a distance ``< tau`` counts as a match.

    Returns
    -------
    dict
        ``precision``, ``recall`` and ``f_score``, floats in [0, 1] (0 when a
        set is empty or both shares are 0).

    Examples
    --------
    >>> import numpy as np
    >>> r = f_score(np.array([[0, 0, 0], [5, 0, 0.]]), np.array([[0.1, 0, 0]]), tau=0.5)
    >>> r["precision"], r["recall"], round(r["f_score"], 4)
    (0.5, 1.0, 0.6667)
    """
    from scipy.spatial import cKDTree

    p = np.asarray(pred_points, np.float64).reshape(-1, 3)
    g = np.asarray(gt_points, np.float64).reshape(-1, 3)
    if not tau > 0:
        raise ValueError(f"tau must be positive, got {tau}")
    if len(p) == 0 or len(g) == 0:
        return {"precision": 0.0, "recall": 0.0, "f_score": 0.0}
    d_pred, _ = cKDTree(g).query(p, k=1)
    d_gt, _ = cKDTree(p).query(g, k=1)
    precision = float(np.mean(d_pred < tau))
    recall = float(np.mean(d_gt < tau))
    f = 2 * precision * recall / (precision + recall) if precision + recall > 0 else 0.0
    return {"precision": precision, "recall": recall, "f_score": float(f)}


def distance_to_mesh(points: np.ndarray, vertices: np.ndarray, faces: np.ndarray) -> np.ndarray:
    """Unsigned distance from each point to the nearest point of a triangle mesh.

    Open3D's ``RaycastingScene.compute_distance`` (exact closest point over the
    triangles, single precision).

    Parameters
    ----------
    points : (N, 3) float array
    vertices : (V, 3) float array
    faces : (F, 3) int array, F >= 1

    Returns
    -------
    (N,) float64
        Distances, in the unit of ``vertices``; single-precision accuracy, so
        keep coordinates within a few thousand units of the origin for
        millimetre answers in metres.

    Examples
    --------
    >>> import numpy as np
    >>> tri = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0]], float)
    >>> distance_to_mesh(np.array([[0.2, 0.2, 0.5], [2.0, 0.0, 0.0]]), tri,
    ...                  np.array([[0, 1, 2]])).round(6).tolist()
    [0.5, 1.0]
    """
    import open3d as o3d

    p = np.asarray(points, np.float64).reshape(-1, 3)
    v = np.asarray(vertices, np.float64)
    f = np.asarray(faces)
    if v.ndim != 2 or v.shape[1] != 3:
        raise ValueError(f"vertices must have shape (V, 3), got {v.shape}")
    if f.ndim != 2 or f.shape[1] != 3 or len(f) == 0 or not np.issubdtype(f.dtype, np.integer):
        raise ValueError(f"faces must be a non-empty (F, 3) integer array, got {f.shape}")
    scene = o3d.t.geometry.RaycastingScene()
    scene.add_triangles(o3d.core.Tensor(v.astype(np.float32)),
                        o3d.core.Tensor(f.astype(np.uint32)))
    d = scene.compute_distance(o3d.core.Tensor(p.astype(np.float32)))
    return d.numpy().astype(np.float64)
