"""Point cloud cleaning: range and confidence gates, outlier removal, thinning, normals."""

from __future__ import annotations

import math

import numpy as np

from stereomesh.geometry.data import PointCloud

# Common practice: a normal-estimation radius of a few point spacings gives a
# stable plane fit without rounding off edges.
_NORMAL_RADIUS_SPACINGS = 4.0


def _o3d_cloud(points: np.ndarray):
    import open3d as o3d

    pcd = o3d.geometry.PointCloud()
    pcd.points = o3d.utility.Vector3dVector(np.ascontiguousarray(points, np.float64))
    return pcd


def _statistical_keep(points: np.ndarray, neighbors: int, std_ratio: float) -> np.ndarray:
    # Open3D cannot rank a point against more neighbours than the cloud holds.
    if neighbors <= 0 or len(points) <= neighbors:
        return np.arange(len(points))
    _, ind = _o3d_cloud(points).remove_statistical_outlier(
        nb_neighbors=int(neighbors), std_ratio=float(std_ratio)
    )
    return np.asarray(ind, dtype=np.int64)


def _radius_keep(points: np.ndarray, radius: float, min_points: int) -> np.ndarray:
    if len(points) == 0:
        return np.arange(0)
    _, ind = _o3d_cloud(points).remove_radius_outlier(nb_points=int(min_points), radius=radius)
    return np.asarray(ind, dtype=np.int64)


def voxel_average(cloud: PointCloud, voxel_size: float) -> PointCloud:
    """Replace the points of each voxel by one point carrying their mean attributes.

    Parameters
    ----------
    cloud : PointCloud
    voxel_size : float
        Edge of the cubic voxels, in the cloud's length unit; the grid starts at
        the minimum corner of the cloud's bounding box.

    Returns
    -------
    PointCloud
        One point per occupied voxel, ordered by first occurrence in ``cloud``.
        Position, colour, confidence, ``sigma_z`` and normals (renormalised) are
        averaged; ``pixels`` is that of the member nearest the voxel's mean.

    Examples
    --------
    >>> import numpy as np
    >>> pc = PointCloud(np.array([[0, 0, 1], [0.01, 0, 1], [1, 0, 1]]),
    ...                 np.zeros((3, 3), np.uint8), np.ones(3, np.float32),
    ...                 np.zeros(3, np.float32))
    >>> len(voxel_average(pc, 0.1))
    2
    """
    if voxel_size <= 0:
        raise ValueError(f"voxel_size must be positive, got {voxel_size}")
    n = len(cloud)
    if n == 0:
        return cloud.subset(np.arange(0))
    p = cloud.points
    ijk = np.floor((p - p.min(axis=0)) / voxel_size).astype(np.int64)
    dims = ijk.max(axis=0) + 1
    if float(np.prod(dims.astype(np.float64))) >= 2.0**62:
        raise ValueError(f"voxel_size {voxel_size} is too small for the cloud's extent")
    key = (ijk[:, 0] * dims[1] + ijk[:, 1]) * dims[2] + ijk[:, 2]
    _, first, inv = np.unique(key, return_index=True, return_inverse=True)
    # Renumber voxels by first occurrence so the output keeps the input's scan order.
    order = np.argsort(first, kind="stable")
    rank = np.empty_like(order)
    rank[order] = np.arange(len(order))
    inv = rank[inv.ravel()]
    m = len(order)
    count = np.bincount(inv, minlength=m).astype(np.float64)

    def mean(values: np.ndarray) -> np.ndarray:
        values = values.reshape(n, -1).astype(np.float64)
        out = np.empty((m, values.shape[1]))
        for j in range(values.shape[1]):
            out[:, j] = np.bincount(inv, weights=values[:, j], minlength=m) / count
        return out

    pts = mean(p)
    colors = np.clip(np.rint(mean(cloud.colors)), 0, 255).astype(np.uint8)
    conf = mean(cloud.confidence)[:, 0]
    # The mean sigma, not sigma/sqrt(n): neighbouring pixels share matching errors,
    # so averaging them does not make the depth independent-sample accurate.
    sigma = mean(cloud.sigma_z)[:, 0]
    normals = None
    if cloud.normals is not None:
        normals = mean(cloud.normals)
        length = np.linalg.norm(normals, axis=1, keepdims=True)
        normals = np.divide(normals, length, out=np.zeros_like(normals), where=length > 0)
    pixels = None
    if cloud.pixels is not None:
        dist = np.linalg.norm(p - pts[inv], axis=1)
        # lexsort by (voxel, distance): the first row of each voxel is its nearest member.
        by = np.lexsort((dist, inv))
        starts = np.searchsorted(inv[by], np.arange(m))
        pixels = cloud.pixels[by[starts]]
    return PointCloud(pts, colors, conf, sigma, normals, pixels)


def estimate_normals(
    cloud: PointCloud, *, radius: float | None = None, max_neighbors: int = 30
) -> PointCloud:
    """Unit normals from local plane fits, oriented toward the camera at the origin.

    Parameters
    ----------
    cloud : PointCloud
    radius : float, optional
        Search radius of the plane fit, in the cloud's length unit. By default
        four times the median nearest-neighbour spacing.
    max_neighbors : int
        Most neighbours used per fit (Open3D hybrid KD-tree search).

    Returns
    -------
    PointCloud
        The same points with ``normals`` set, (N, 3) float32, ``dot(n, -p) >= 0``.

    Examples
    --------
    >>> import numpy as np
    >>> g = np.mgrid[0:5, 0:5].reshape(2, -1).T * 0.1
    >>> pts = np.c_[g, np.ones(25)]
    >>> pc = PointCloud(pts, np.zeros((25, 3), np.uint8), np.ones(25, np.float32),
    ...                 np.zeros(25, np.float32))
    >>> np.round(estimate_normals(pc).normals[12], 3)
    array([ 0.,  0., -1.], dtype=float32)
    """
    import open3d as o3d

    n = len(cloud)
    if n < 3:
        normals = np.zeros((n, 3), np.float32)
        normals[:, 2] = -1.0
        return _with(cloud, normals=normals)
    pcd = _o3d_cloud(cloud.points)
    if radius is None:
        spacing = np.asarray(pcd.compute_nearest_neighbor_distance())
        spacing = spacing[spacing > 0]
        scale = float(np.median(spacing)) if spacing.size else 1.0
        radius = _NORMAL_RADIUS_SPACINGS * scale
    search = o3d.geometry.KDTreeSearchParamHybrid(radius=float(radius), max_nn=int(max_neighbors))
    pcd.estimate_normals(search_param=search)
    pcd.orient_normals_towards_camera_location(camera_location=np.zeros(3))
    return _with(cloud, normals=np.asarray(pcd.normals, dtype=np.float32))


def _kept(cloud: PointCloud, keep: np.ndarray) -> PointCloud:
    """``cloud.subset(keep)``, or ``cloud`` itself when ``keep`` selects every point.

    ``keep`` is a boolean mask or an array of distinct indices.
    """
    keep = np.asarray(keep)
    everything = keep.all() if keep.dtype == bool else len(keep) == len(cloud)
    return cloud if everything else cloud.subset(keep)


def _with(cloud: PointCloud, **changes) -> PointCloud:
    fields = dict(
        points=cloud.points,
        colors=cloud.colors,
        confidence=cloud.confidence,
        sigma_z=cloud.sigma_z,
        normals=cloud.normals,
        pixels=cloud.pixels,
    )
    fields.update(changes)
    return PointCloud(**fields)


def filter_cloud(
    cloud: PointCloud,
    *,
    depth_min: float = 0.0,
    depth_max: float = 0.0,
    cloud_min_confidence: float = 0.0,
    outlier_neighbors: int = 20,
    outlier_std_ratio: float = 2.0,
    radius: float | None = None,
    radius_min_points: int = 0,
    voxel_size: float = 0.0,
    normal_radius: float | None = None,
    normal_neighbors: int = 30,
) -> tuple[PointCloud, dict]:
    """Clean a triangulated cloud and give it camera-facing normals.

    Steps, in order: keep depths ``z`` in ``[depth_min, depth_max]``; keep
    ``confidence >= cloud_min_confidence``; statistical outlier removal (over grid
    neighbours for an organised cloud, see :mod:`stereomesh.geometry.organised`;
    else Open3D's)
    (mean distance to ``outlier_neighbors`` neighbours beyond
    ``outlier_std_ratio`` standard deviations of the cloud's mean is
    removed); optional Open3D radius outlier removal (fewer than
    ``radius_min_points`` neighbours within ``radius``); optional voxel
    averaging; normal estimation oriented toward the camera at the origin (grid
    gradients for an organised cloud, averaged by the voxels; else Open3D plane fits).

    Parameters
    ----------
    cloud : PointCloud
        Points in the left camera frame (camera at the origin, z forward).
    depth_min, depth_max : float
        Inclusive depth range kept, in the cloud's length unit; ``depth_max``
        0 (or infinity) means no far limit.
    cloud_min_confidence : float
        Lowest confidence kept, in [0, 1].
    outlier_neighbors : int
        Neighbours of the statistical test; 0 skips the step.
    outlier_std_ratio : float
        Threshold of the statistical test, in standard deviations.
    radius : float, optional
        Radius of the radius test, length unit; None skips the step.
    radius_min_points : int
        Neighbours required within ``radius``.
    voxel_size : float
        Voxel edge for averaging, length unit; 0 skips the step.
    normal_radius : float, optional
        Search radius of the normal fit; by default four point spacings.
    normal_neighbors : int
        Most neighbours per normal fit.

    Returns
    -------
    cloud : PointCloud
        The kept points with all attributes aligned and ``normals`` set.
    counts : dict
        Point counts ``input``, ``after_depth_range``, ``after_confidence``,
        ``after_statistical``, ``after_radius`` and ``after_voxel`` (a skipped
        step repeats the previous count).

    Examples
    --------
    >>> import numpy as np
    >>> rng = np.random.default_rng(0)
    >>> pts = np.c_[rng.random((500, 2)), np.ones(500)]
    >>> pc = PointCloud(pts, np.zeros((500, 3), np.uint8), np.ones(500, np.float32),
    ...                 np.zeros(500, np.float32))
    >>> out, counts = filter_cloud(pc, depth_min=0.5, depth_max=2.0)
    >>> counts["input"], out.normals.shape[1]
    (500, 3)
    """
    if not isinstance(cloud, PointCloud):
        raise TypeError(f"cloud must be a PointCloud, got {type(cloud).__name__}")
    z_min = float(depth_min)
    z_max = math.inf if depth_max in (0, None) else float(depth_max)
    if not 0 <= z_min <= z_max:
        raise ValueError(f"need 0 <= depth_min <= depth_max, got {depth_min}, {depth_max}")
    if radius is not None and radius <= 0:
        raise ValueError(f"radius must be positive or None, got {radius}")
    if voxel_size < 0:
        raise ValueError(f"voxel_size must be >= 0, got {voxel_size}")

    counts = {"input": len(cloud)}
    z = cloud.points[:, 2]
    keep = (z >= z_min) & (z <= z_max)
    counts["after_depth_range"] = int(keep.sum())
    if cloud_min_confidence > 0:
        keep &= cloud.confidence >= cloud_min_confidence
    counts["after_confidence"] = int(keep.sum())
    # One copy for both gates, none when they keep everything (a megapixel
    # cloud's copy costs a tenth of a second).
    cloud = _kept(cloud, keep)
    from stereomesh.geometry.organised import grid_normals, grid_outlier_keep, is_organised

    # Points from one disparity map find their neighbours on the image grid.
    organised = is_organised(cloud)
    if organised:
        keep = grid_outlier_keep(cloud, outlier_neighbors, outlier_std_ratio)
    else:
        keep = _statistical_keep(cloud.points, outlier_neighbors, outlier_std_ratio)
    cloud = _kept(cloud, keep)
    counts["after_statistical"] = len(cloud)
    if radius is not None and radius_min_points > 0:
        cloud = _kept(cloud, _radius_keep(cloud.points, radius, radius_min_points))
    counts["after_radius"] = len(cloud)
    if organised and normal_radius is None:
        cloud = _with(cloud, normals=grid_normals(cloud))
    if voxel_size > 0:
        cloud = voxel_average(cloud, voxel_size)
    counts["after_voxel"] = len(cloud)
    if cloud.normals is None:
        cloud = estimate_normals(cloud, radius=normal_radius, max_neighbors=normal_neighbors)
    return cloud, counts
