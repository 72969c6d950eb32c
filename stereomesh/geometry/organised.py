"""Organised-cloud operations: neighbourhoods from the image grid, not a k-d tree.

A cloud triangulated from one disparity map keeps the pixel of every point
(``PointCloud.pixels``), also after filtering or editing. Its neighbours are the
points of nearby pixels, so outlier statistics and normals cost a window scan
per point instead of a nearest-neighbour search (on the 640 × 480 demo, Open3D's
statistical removal and normal fit took 1.9 s; these take milliseconds).
Clouds without pixels keep the Open3D paths of :mod:`stereomesh.geometry.filters`,
which stay the references in the tests.
"""

from __future__ import annotations

import math

import numpy as np

from stereomesh.geometry.data import PointCloud


def is_organised(cloud: PointCloud) -> bool:
    """True when every point has a pixel and no two points share one."""
    if cloud.pixels is None or len(cloud) == 0:
        return False
    pix = cloud.pixels
    if pix.min() < 0:
        return False
    width = int(pix[:, 0].max()) + 1
    key = pix[:, 1].astype(np.int64) * width + pix[:, 0]
    # A count per pixel is linear in the image size; np.unique would sort.
    return int(np.bincount(key).max()) <= 1


def pixel_index(cloud: PointCloud, shape: tuple[int, int] | None = None) -> np.ndarray:
    """``(H, W)`` int64 image of point indices (−1 where no point) of an organised cloud.

    Parameters
    ----------
    cloud : PointCloud
        With ``pixels`` (``(col, row)``) set, each pixel at most once.
    shape : (int, int), optional
        ``(H, W)``; by default just large enough for the pixels.

    Examples
    --------
    >>> import numpy as np
    >>> pc = PointCloud(np.ones((2, 3)), np.zeros((2, 3), np.uint8), np.ones(2, np.float32),
    ...                 np.zeros(2, np.float32), pixels=np.array([[2, 0], [0, 1]]))
    >>> pixel_index(pc).tolist()
    [[-1, -1, 0], [1, -1, -1]]
    """
    if cloud.pixels is None:
        raise ValueError("the cloud has no pixel positions")
    cols, rows = cloud.pixels[:, 0], cloud.pixels[:, 1]
    if shape is None:
        shape = (int(rows.max()) + 1, int(cols.max()) + 1) if len(cloud) else (0, 0)
    index = np.full(shape, -1, np.int64)
    index[rows, cols] = np.arange(len(cloud))
    return index


def _window_radius(neighbors: int) -> int:
    # The smallest square window holding twice ``neighbors`` other pixels, so that
    # the nearest in space are among them: with just enough candidates (5 x 5 for
    # 20) every candidate counts, grazing surfaces inflate the spread of the means,
    # and mixed pixels at depth edges survive (demo mesh precision 0.977 against
    # 0.999 for 7 x 7 and for Open3D's k-d tree).
    side = math.ceil(math.sqrt(2 * neighbors + 1))
    return max(1, (side + (side % 2 == 0)) // 2)


def grid_outlier_keep(cloud: PointCloud, neighbors: int = 20, std_ratio: float = 2.0
                      ) -> np.ndarray:
    """Indices of points that pass the statistical outlier test over grid neighbours.

    The test of Rusu et al. (2008), as Open3D's ``remove_statistical_outlier``
    applies it: each point's mean distance to its ``neighbors`` nearest
    neighbours; points whose mean exceeds the cloud's mean of means by more than
    ``std_ratio`` standard deviations are outliers. The candidates are the points
    of the smallest square pixel window holding ``neighbors`` other pixels
    (7 × 7 for 20): on a surface seen in an image, its nearest points in space.
    A point with no neighbour in its window is an outlier.

    Parameters
    ----------
    cloud : PointCloud
        Organised (see :func:`is_organised`).
    neighbors : int
        Neighbours averaged per point; 0 keeps every point.
    std_ratio : float
        Threshold in standard deviations.

    Returns
    -------
    (M,) int64
        Indices of the kept points, increasing.

    Examples
    --------
    >>> import numpy as np
    >>> rows, cols = np.mgrid[0:20, 0:20]
    >>> pts = np.c_[cols.ravel() * 0.01, rows.ravel() * 0.01, np.ones(400)]
    >>> pts[210, 2] = 3.0                       # one point far off the plane
    >>> pc = PointCloud(pts, np.zeros((400, 3), np.uint8), np.ones(400, np.float32),
    ...                 np.zeros(400, np.float32), pixels=np.c_[cols.ravel(), rows.ravel()])
    >>> 210 in grid_outlier_keep(pc)
    False
    """
    from stereomesh.geometry import _grid_kernels

    if neighbors <= 0 or len(cloud) == 0:
        return np.arange(len(cloud))
    if not is_organised(cloud):
        raise ValueError("grid outlier removal needs an organised cloud (unique pixels)")
    index = pixel_index(cloud)
    mean = _grid_kernels.mean_neighbour_distance(
        cloud.points, cloud.pixels.astype(np.int64), index, int(neighbors),
        _window_radius(int(neighbors)))
    return np.flatnonzero(_passes(mean, std_ratio))


def _passes(mean: np.ndarray, std_ratio: float) -> np.ndarray:
    finite = np.isfinite(mean)
    if not finite.any():
        return finite
    mu = mean[finite].mean()
    sd = mean[finite].std()
    return finite & (mean <= mu + std_ratio * sd)


def _grid_normals_reference(cloud: PointCloud, radius: int = 2) -> np.ndarray:
    """:func:`grid_normals` point by point over the whole window (slow, for the tests)."""
    index = pixel_index(cloud)
    h, w = index.shape
    p = cloud.points
    out = np.zeros((len(cloud), 3), np.float32)
    for i, (col, row) in enumerate(cloud.pixels):
        u = np.zeros(3)
        v = np.zeros(3)
        nu = nv = 0
        for r in range(max(row - radius, 0), min(row + radius, h - 1) + 1):
            for c in range(max(col - radius, 0), min(col + radius, w - 1) + 1):
                if 0 < c < w - 1 and index[r, c - 1] >= 0 and index[r, c + 1] >= 0:
                    u += p[index[r, c + 1]] - p[index[r, c - 1]]
                    nu += 1
                if 0 < r < h - 1 and index[r - 1, c] >= 0 and index[r + 1, c] >= 0:
                    v += p[index[r + 1, c]] - p[index[r - 1, c]]
                    nv += 1
        normal = np.cross(u, v)
        length = np.linalg.norm(normal)
        if nu == 0 or nv == 0 or length == 0:
            out[i] = (0.0, 0.0, -1.0)
            continue
        out[i] = normal / (length if normal @ -p[i] >= 0 else -length)
    return out


def grid_outlier_keep_reference(cloud: PointCloud, neighbors: int = 20,
                                std_ratio: float = 2.0) -> np.ndarray:
    """:func:`grid_outlier_keep` in plain numpy, point by point (slow, for the tests)."""
    if neighbors <= 0 or len(cloud) == 0:
        return np.arange(len(cloud))
    index = pixel_index(cloud)
    h, w = index.shape
    r = _window_radius(neighbors)
    mean = np.full(len(cloud), np.inf)
    for i, (col, row) in enumerate(cloud.pixels):
        win = index[max(0, row - r):min(h, row + r + 1), max(0, col - r):min(w, col + r + 1)]
        others = win[(win >= 0) & (win != i)]
        if len(others):
            d = np.sort(np.linalg.norm(cloud.points[others] - cloud.points[i], axis=1))
            mean[i] = d[:neighbors].mean()
    return np.flatnonzero(_passes(mean, std_ratio))


def grid_normals(cloud: PointCloud, radius: int = 2) -> np.ndarray:
    """Unit normals of an organised cloud from image-space gradients, toward the camera.

    The tangent plane at a point is spanned by the mean central differences of
    position along rows and along columns over a ``(2 radius + 1)²`` pixel window
    (the averaged 3-D gradients of organised-cloud normal estimation); the
    normal is their cross product, turned to face the camera at the origin.

    Parameters
    ----------
    cloud : PointCloud
        Organised.
    radius : int
        Window half-size, pixels.

    Returns
    -------
    (N, 3) float32
        ``dot(n, −p) >= 0``; ``(0, 0, −1)`` where no gradient could be formed.

    Examples
    --------
    >>> import numpy as np
    >>> rows, cols = np.mgrid[0:9, 0:9]
    >>> pts = np.c_[cols.ravel() * 0.01, rows.ravel() * 0.01, np.full(81, 2.0)]
    >>> pc = PointCloud(pts, np.zeros((81, 3), np.uint8), np.ones(81, np.float32),
    ...                 np.zeros(81, np.float32), pixels=np.c_[cols.ravel(), rows.ravel()])
    >>> (np.round(grid_normals(pc)[40], 3) + 0.0).tolist()   # facing the camera
    [0.0, 0.0, -1.0]
    """
    from stereomesh.geometry import _grid_kernels

    if len(cloud) == 0:
        return np.zeros((0, 3), np.float32)
    if not is_organised(cloud):
        raise ValueError("grid normals need an organised cloud (unique pixels)")
    return _grid_kernels.gradient_normals(cloud.points, cloud.pixels.astype(np.int64),
                                          pixel_index(cloud), int(radius))
