"""Geometry stages: triangulation, cloud filters, surfaces and mesh repair."""

import numpy as np
import pytest

from stereomesh.geometry.data import PointCloud, TriMesh
from stereomesh.geometry.filters import estimate_normals, filter_cloud, voxel_average
from stereomesh.geometry.repair import count_boundary_loops, repair_mesh, split_at_centroids
from stereomesh.geometry.surface import (
    depth_grid_mesh,
    poisson_mesh,
    support_points,
    supported_faces,
    vertex_normals,
)
from stereomesh.geometry.triangulate import triangulate
from stereomesh.rectify import RectifiedRig

RIG = RectifiedRig(focal_px=500.0, cx=31.7, cy=22.4, baseline=0.12, doffs=3.5, image_size=(64, 48))


def _image(h, w, seed=0):
    return np.random.default_rng(seed).integers(0, 256, (h, w, 3), dtype=np.uint8)


def _cloud(points, seed=0, **kw):
    n = len(points)
    rng = np.random.default_rng(seed)
    return PointCloud(
        points,
        rng.integers(0, 256, (n, 3), dtype=np.uint8),
        kw.pop("confidence", np.ones(n, np.float32)),
        kw.pop("sigma_z", np.full(n, 0.001, np.float32)),
        **kw,
    )


def _face_normals(vertices, faces):
    a, b, c = (vertices[faces[:, k]] for k in range(3))
    return np.cross(b - a, c - a)


# ---------------------------------------------------------------- containers


def test_pointcloud_subset_keeps_attributes_aligned():
    pc = _cloud(np.arange(12.0).reshape(4, 3), pixels=np.array([[0, 0], [1, 0], [2, 0], [3, 0]]))
    sub = pc.subset(np.array([False, True, False, True]))
    assert len(sub) == 2
    np.testing.assert_array_equal(sub.points, pc.points[[1, 3]])
    np.testing.assert_array_equal(sub.colors, pc.colors[[1, 3]])
    np.testing.assert_array_equal(sub.pixels, [[1, 0], [3, 0]])
    assert sub.pixels.dtype == np.int32
    np.testing.assert_array_equal(pc.subset(np.array([2])).points, pc.points[[2]])


def test_containers_refuse_wrong_dtypes_and_shapes():
    with pytest.raises(TypeError):
        PointCloud(np.zeros((2, 3)), np.zeros((2, 3)), np.ones(2), np.ones(2))
    with pytest.raises(ValueError):
        PointCloud(np.zeros((2, 3)), np.zeros((3, 3), np.uint8), np.ones(2), np.ones(2))
    with pytest.raises(ValueError):
        TriMesh(
            np.zeros((3, 3)),
            np.array([[0, 1, 3]]),
            np.zeros((3, 3), np.uint8),
            np.ones(3),
            np.ones(3),
            np.zeros(3, np.uint8),
        )


# ---------------------------------------------------------------- triangulation


def test_triangulate_matches_opencv_reprojection():
    import cv2

    h, w = 48, 64
    rng = np.random.default_rng(1)
    disp = rng.uniform(5.0, 60.0, (h, w)).astype(np.float32)
    disp[rng.random((h, w)) < 0.1] = np.nan
    pc = triangulate(disp, RIG, _image(h, w))
    # reference: OpenCV cv2.reprojectImageTo3D with the rig's Q (OpenCV's convention,
    # right camera at +baseline, so Q[3, 2] = 1/B and W = (d + doffs)/B).
    ref = cv2.reprojectImageTo3D(np.nan_to_num(disp, nan=0.0), RIG.Q.astype(np.float64))
    cols, rows = pc.pixels[:, 0], pc.pixels[:, 1]
    expected = ref[rows, cols].astype(np.float64)
    scale = np.linalg.norm(expected, axis=1, keepdims=True)
    assert np.all(np.abs(pc.points - expected) <= 1e-6 * scale)
    assert len(pc) == int(np.isfinite(disp).sum())
    np.testing.assert_array_equal(pc.colors, _image(h, w)[rows, cols])


def test_triangulate_sigma_z_is_derivative_of_depth():
    disp = np.array([[4.0, 10.0, 40.0]], np.float32)
    sigma_d = 0.3
    pc = triangulate(disp, RIG, _image(1, 3), sigma_d=sigma_d)
    h = 1e-4
    d = disp[0].astype(np.float64)
    # formula: central finite difference of Z(d) = f·B/(d + doffs)
    dz = (RIG.depth_from_disparity(d - h) - RIG.depth_from_disparity(d + h)) / (2 * h)
    np.testing.assert_allclose(pc.sigma_z, dz * sigma_d, rtol=1e-5)


def test_triangulate_per_pixel_sigma_and_confidence():
    disp = np.full((2, 2), 10.0, np.float32)
    sig = np.array([[0.1, 0.2], [0.3, 0.4]])
    conf = np.array([[0.5, 0.6], [0.7, 0.8]])
    pc = triangulate(disp, RIG, _image(2, 2), confidence=conf, sigma_d=sig)
    z = RIG.focal_px * RIG.baseline / (10.0 + RIG.doffs)
    np.testing.assert_allclose(pc.sigma_z, z * z * sig.ravel() / (RIG.focal_px * RIG.baseline))
    np.testing.assert_allclose(pc.confidence, conf.ravel(), rtol=1e-6)


def test_triangulate_drops_points_behind_camera_and_checks_shapes():
    disp = np.array([[-RIG.doffs, -10.0, 1.0]], np.float32)
    assert len(triangulate(disp, RIG, _image(1, 3))) == 1
    with pytest.raises(ValueError):
        triangulate(disp, RIG, _image(2, 3))
    with pytest.raises(ValueError):
        triangulate(disp, RIG, _image(1, 3), sigma_d=np.ones((2, 2)))


# ---------------------------------------------------------------- filters


def _noisy_plane_with_outliers(seed=0):
    rng = np.random.default_rng(seed)
    g = rng.uniform(-0.5, 0.5, (3000, 2))
    z = 2.0 + 0.3 * g[:, 0] + rng.normal(0, 0.002, len(g))
    plane = np.c_[g, z]
    outliers = np.c_[rng.uniform(-0.5, 0.5, (30, 2)), rng.uniform(0.8, 1.6, 30)]
    return plane, outliers


def test_filter_cloud_removes_planted_outliers_and_orients_normals():
    plane, outliers = _noisy_plane_with_outliers()
    pts = np.r_[plane, outliers]
    n = len(pts)
    # Encode each point's index in its confidence to check alignment afterwards.
    # No pixels: an unorganised cloud takes Open3D's k-d tree path.
    conf = (np.arange(n) / n).astype(np.float32)
    pc = _cloud(pts, confidence=conf)
    out, counts = filter_cloud(pc, outlier_neighbors=20, outlier_std_ratio=2.0)
    assert counts["input"] == n
    assert set(counts) == {
        "input",
        "after_depth_range",
        "after_confidence",
        "after_statistical",
        "after_radius",
        "after_voxel",
    }
    kept = np.rint(out.confidence * n).astype(int)
    assert not np.any(kept >= len(plane)), "a planted outlier survived"
    assert len(out) > 0.9 * len(plane)
    np.testing.assert_array_equal(out.points, pts[kept])
    np.testing.assert_array_equal(out.colors, pc.colors[kept])
    assert np.all(np.einsum("ij,ij->i", out.normals, -out.points) > 0)
    np.testing.assert_allclose(np.linalg.norm(out.normals, axis=1), 1.0, atol=1e-5)


def test_filter_cloud_depth_confidence_radius_and_voxel_steps():
    plane, outliers = _noisy_plane_with_outliers(1)
    pts = np.r_[plane, outliers]
    conf = np.where(np.arange(len(pts)) % 10 == 0, 0.1, 0.9).astype(np.float32)
    pc = _cloud(pts, confidence=conf)
    out, counts = filter_cloud(
        pc,
        depth_min=1.7,
        depth_max=3.0,
        cloud_min_confidence=0.5,
        outlier_neighbors=0,
        radius=0.05,
        radius_min_points=5,
        voxel_size=0.05,
    )
    z = pts[:, 2]
    in_range = (z >= 1.7) & (z <= 3.0)
    assert counts["after_depth_range"] == int(in_range.sum())
    assert counts["after_confidence"] == int((in_range & (conf >= 0.5)).sum())
    assert counts["after_statistical"] == counts["after_confidence"]
    assert counts["after_radius"] <= counts["after_statistical"]
    assert counts["after_voxel"] == len(out) < counts["after_radius"]
    assert out.points[:, 2].min() >= 1.7


def test_voxel_average_averages_attributes():
    pts = np.array([[0.01, 0.01, 1.01], [0.03, 0.01, 1.01], [0.5, 0.5, 1.5]])
    pc = PointCloud(
        pts,
        np.array([[0, 100, 200], [10, 110, 201], [7, 7, 7]], np.uint8),
        np.array([0.2, 0.4, 1.0], np.float32),
        np.array([0.01, 0.03, 0.05], np.float32),
        pixels=np.array([[0, 0], [1, 0], [5, 5]], np.int32),
    )
    out = voxel_average(pc, 0.1)
    assert len(out) == 2
    np.testing.assert_allclose(out.points[0], [0.02, 0.01, 1.01])
    np.testing.assert_array_equal(out.colors[0], [5, 105, 200])  # 200.5 rounds to even
    np.testing.assert_allclose(out.confidence[0], 0.3, rtol=1e-6)
    np.testing.assert_allclose(out.sigma_z[0], 0.02, rtol=1e-6)
    np.testing.assert_array_equal(out.points[1], pts[2])
    assert out.pixels[1].tolist() == [5, 5]


def test_estimate_normals_on_tilted_plane():
    g = np.mgrid[0:20, 0:20].reshape(2, -1).T * 0.02
    pts = np.c_[g, 1.0 + 0.5 * g[:, 0]]
    pc = estimate_normals(_cloud(pts), radius=0.1)
    expected = np.array([0.5, 0.0, -1.0]) / np.linalg.norm([0.5, 0.0, -1.0])
    np.testing.assert_allclose(pc.normals, np.tile(expected, (len(pts), 1)), atol=1e-4)


# ---------------------------------------------------------------- grid mesh


def _plane_disparity(h, w, rig, tilt=0.0):
    rows, cols = np.mgrid[0:h, 0:w]
    return (20.0 + tilt * cols + 0.0 * rows).astype(np.float32)


def test_depth_grid_mesh_plane_counts_positions_and_winding():
    h, w = 12, 16
    disp = _plane_disparity(h, w, RIG, tilt=0.3)
    img = _image(h, w)
    mesh = depth_grid_mesh(disp, RIG, img, max_depth_jump=0.05)
    assert mesh.faces.dtype == np.int32
    assert len(mesh.vertices) == h * w
    assert len(mesh.faces) == 2 * (h - 1) * (w - 1)
    # Same points as triangulation, in the same (row-major) order.
    pc = triangulate(disp, RIG, img)
    np.testing.assert_allclose(mesh.vertices, pc.points, rtol=1e-12)
    np.testing.assert_array_equal(mesh.colors, pc.colors)
    fn = _face_normals(mesh.vertices, mesh.faces)
    centroid = mesh.vertices[mesh.faces].mean(axis=1)
    assert np.all(np.einsum("ij,ij->i", fn, centroid) < 0), "a face looks away from the camera"
    assert np.all(np.einsum("ij,ij->i", mesh.normals, mesh.vertices) < 0)
    np.testing.assert_allclose(mesh.normals, vertex_normals(mesh.vertices, mesh.faces), atol=1e-5)
    assert mesh.filled.sum() == 0


def test_depth_grid_mesh_uv_convention():
    h, w = 4, 5
    mesh = depth_grid_mesh(np.full((h, w), 10.0, np.float32), RIG, _image(h, w))
    # pixel (col 0, row 0) is the top-left texel centre; OpenGL's v axis points up
    np.testing.assert_allclose(mesh.uv[0], [0.5 / w, 1 - 0.5 / h])
    np.testing.assert_allclose(mesh.uv[-1], [(w - 0.5) / w, 1 - (h - 0.5) / h])


def test_depth_grid_mesh_cuts_depth_discontinuities():
    h, w = 10, 10
    disp = np.full((h, w), 20.0, np.float32)
    disp[:, 5:] = 40.0  # foreground half at half the depth
    mesh = depth_grid_mesh(disp, RIG, _image(h, w), max_depth_jump=0.03)
    z = mesh.vertices[mesh.faces][:, :, 2]
    assert np.all(z.max(axis=1) / z.min(axis=1) - 1 <= 0.03)
    assert len(mesh.faces) == 2 * (h - 1) * (4 + 4)
    # A gentle slope of 1 % per pixel is kept whole.
    slope = (20.0 * (1 + 0.002 * np.arange(w)))[None, :].repeat(h, 0).astype(np.float32)
    assert len(depth_grid_mesh(slope, RIG, _image(h, w)).faces) == 2 * (h - 1) * (w - 1)


def _edges(faces):
    e = np.sort(faces[:, [0, 1, 1, 2, 2, 0]].reshape(-1, 2), axis=1)
    return {tuple(x) for x in e.tolist()}


def test_depth_grid_mesh_splits_along_shorter_diagonal():
    disp = np.full((2, 2), 20.0, np.float32)
    disp[1, 1] = 20.4  # bottom-right corner nearer: the a-e diagonal is longer in 3-D
    rig = RectifiedRig(focal_px=500.0, cx=0.5, cy=0.5, baseline=0.12)
    edges = _edges(depth_grid_mesh(disp, rig, _image(2, 2), max_depth_jump=0.1).faces)
    assert (1, 2) in edges and (0, 3) not in edges
    disp[1, 1] = 20.0
    disp[0, 1] = 19.6  # top-right corner off the plane instead: now b-c is the longer one
    edges = _edges(depth_grid_mesh(disp, rig, _image(2, 2), max_depth_jump=0.1).faces)
    assert (0, 3) in edges and (1, 2) not in edges


def test_depth_grid_mesh_invalid_pixels_and_step():
    disp = np.full((3, 3), 20.0, np.float32)
    disp[0, 0] = np.nan
    mesh = depth_grid_mesh(disp, RIG, _image(3, 3))
    # 3 full blocks give 2 triangles each, the block missing a corner gives 1.
    assert len(mesh.faces) == 7 and len(mesh.vertices) == 8
    big = np.full((9, 9), 20.0, np.float32)
    coarse = depth_grid_mesh(big, RIG, _image(9, 9), grid_step=4)
    assert len(coarse.vertices) == 9 and len(coarse.faces) == 8
    np.testing.assert_allclose(coarse.uv[1, 0], 4.5 / 9)
    with pytest.raises(ValueError):
        depth_grid_mesh(big, RIG, _image(9, 9), grid_step=0)


def _face_set(faces):
    return sorted(map(tuple, np.asarray(faces).tolist()))


@pytest.mark.parametrize("shape", [(1, 1), (1, 6), (2, 2), (7, 9), (41, 33)])
def test_grid_mesh_kernels_match_the_array_version(shape):
    # Slow reference: the NumPy version kept in surface.py; the kernels must give
    # the same vertices and faces and the same float32 normal sums to the bit.
    from stereomesh.geometry._grid_kernels import grid_faces, grid_triangles, grid_vertices
    from stereomesh.geometry.surface import _grid_topology_reference

    h, w = shape
    rng = np.random.default_rng(h * 100 + w)
    z = (2 + 0.2 * rng.random(shape)).astype(np.float32)
    z[rng.random(shape) < 0.1] *= 1.5  # depth jumps
    z[rng.random(shape) < 0.2] = np.nan
    valid = np.isfinite(z)
    cols = ((np.arange(w) - w / 2) / 50).astype(np.float32)
    rows = ((np.arange(h) - h / 2) / 50).astype(np.float32)
    limit = np.float32(1.03)
    code = grid_triangles(z, valid, cols, rows, limit)
    vid, normals = grid_vertices(code, z, cols, rows)
    faces = grid_faces(code, vid)
    used, faces_ref, normals_ref = _grid_topology_reference(z, valid, cols, rows, limit)
    np.testing.assert_array_equal(vid >= 0, used)
    assert _face_set(faces) == _face_set(faces_ref)
    np.testing.assert_array_equal(normals, normals_ref)


def test_kept_faces_matches_the_array_version():
    from stereomesh.geometry._mesh_kernels import kept_faces
    from stereomesh.geometry.grid_repair import _keep_faces_reference

    rng = np.random.default_rng(3)
    faces = rng.integers(0, 50, (200, 3)).astype(np.int32)
    keep = rng.random(200) < 0.3
    got, used = kept_faces(faces, keep, 60)
    want, used_ref = _keep_faces_reference(faces, keep, 60)
    np.testing.assert_array_equal(used, used_ref)
    np.testing.assert_array_equal(got, want)


# ---------------------------------------------------------------- Poisson


def test_poisson_mesh_reconstructs_plane_near_the_samples():
    rng = np.random.default_rng(0)
    g = rng.uniform(-0.5, 0.5, (4000, 2))
    pts = np.c_[g, 2.0 + 0.2 * g[:, 1]]
    conf = rng.uniform(0.5, 1.0, len(pts)).astype(np.float32)
    cloud = estimate_normals(_cloud(pts, confidence=conf))
    mesh = poisson_mesh(cloud, poisson_depth=6)
    assert len(mesh.faces) > 100
    residual = mesh.vertices[:, 2] - (2.0 + 0.2 * mesh.vertices[:, 1])
    assert np.median(np.abs(residual)) < 0.01
    lo, hi = pts.min(0), pts.max(0)
    margin = 0.05 * (hi - lo) + 1e-9
    assert np.all(mesh.vertices >= lo - margin) and np.all(mesh.vertices <= hi + margin)
    measured = mesh.filled == 0
    assert measured.mean() > 0.5
    assert np.all(mesh.confidence[measured] >= 0.5)
    assert np.all(mesh.confidence[~measured] == 0)
    # The surface faces the camera, as the cloud's normals did.
    fn = _face_normals(mesh.vertices, mesh.faces)
    assert np.mean(fn[:, 2] < 0) > 0.95


def _plane_cloud(rig, z, missing):
    """A per-pixel cloud of the plane Z = ``z`` seen by ``rig``, without the ``missing`` pixels."""
    w, h = rig.image_size
    rows, cols = np.mgrid[0:h, 0:w]
    keep = ~missing[rows, cols]
    pix = np.c_[cols[keep], rows[keep]].astype(np.int32)
    pts = np.c_[(pix[:, 0] - rig.cx) * z / rig.focal_px, (pix[:, 1] - rig.cy) * z / rig.focal_px,
                np.full(len(pix), z)]
    cloud = _cloud(pts, pixels=pix)
    cloud.normals = np.tile(np.array([0, 0, -1], np.float32), (len(pts), 1))
    return cloud


def _supported_faces_reference(vertices, faces, support, max_spacings, rig=None, shape=None):
    # Brute force over every pair of points: the k-d tree's answer, the slow way.
    def nearest(p):
        d = np.linalg.norm(p[:, None, :] - support[None, :, :], axis=2)
        return d.min(axis=1), d.argmin(axis=1)

    d_ss = np.sort(np.linalg.norm(support[:, None] - support[None], axis=2), axis=1)
    spacing = d_ss[:, 4]
    d, i = nearest(vertices)
    ok = d <= max_spacings * spacing[i]
    if rig is not None:
        u = rig.focal_px * vertices[:, 0] / vertices[:, 2] + rig.cx
        v = rig.focal_px * vertices[:, 1] / vertices[:, 2] + rig.cy
        ok &= (vertices[:, 2] > 0) & (u >= -0.5) & (u < shape[1] - 0.5) & (v >= -0.5) \
            & (v < shape[0] - 0.5)
    dc, ic = nearest(vertices[faces].mean(axis=1))
    return ok[faces].all(axis=1) & (dc <= max_spacings * spacing[ic])


def test_supported_faces_matches_brute_force(monkeypatch):
    rng = np.random.default_rng(3)
    support = np.c_[rng.uniform(-0.2, 0.2, (300, 2)), rng.uniform(1.99, 2.01, 300)]
    # Vertices near the points and far from them, in the view and out of it;
    # each face joins a vertex to its two nearest.
    vertices = support[:200] + rng.normal(0.0, 0.03, (200, 3))
    vertices[:20, :2] *= 4.0
    d = np.linalg.norm(vertices[:, None] - vertices[None], axis=2)
    faces = np.c_[np.arange(200), np.argsort(d, axis=1)[:, 1:3]]
    shape = (48, 64)
    for k, rig in ((1.5, None), (3.0, RIG), (8.0, RIG)):
        got = supported_faces(vertices, faces, support, k, rig, shape if rig else None)
        want = _supported_faces_reference(vertices, faces, support, k, rig, shape)
        np.testing.assert_array_equal(got, want)
        assert 0 < got.sum() < len(faces)
    # The spacings measured in chunks (12-megapixel clouds) give the same answer.
    from stereomesh.geometry import surface

    monkeypatch.setattr(surface, "_SPACING_CHUNK", 7)
    np.testing.assert_array_equal(supported_faces(vertices, faces, support, 3.0, RIG, shape),
                                  _supported_faces_reference(vertices, faces, support, 3.0,
                                                             RIG, shape))
    with pytest.raises(ValueError):
        supported_faces(vertices, faces, support, 0.0)
    with pytest.raises(ValueError):
        supported_faces(vertices, faces, support, 2.0, RIG)


def test_support_points_fill_small_inner_holes_only():
    rig = RectifiedRig(focal_px=100.0, cx=20.0, cy=15.0, baseline=0.1, image_size=(40, 30))
    missing = np.zeros((30, 40), bool)
    missing[5:7, 5:7] = True          # small: a loop of 8 edges, filled
    missing[10:22, 20:32] = True      # 48 edges: beyond the default 30, left open
    missing[0:3, 30:33] = True        # small but on the border: left open
    cloud = _plane_cloud(rig, 2.0, missing)
    support, shape = support_points(cloud, rig)
    assert shape == (30, 40)
    fill = support[len(cloud):]
    assert len(fill) == 4
    # Harmonic interpolation reproduces a plane exactly (see grid_repair).
    np.testing.assert_allclose(fill[:, 2], 2.0, rtol=1e-6)
    cols = np.rint(fill[:, 0] * 100 / 2.0 + 20).astype(int)
    rows = np.rint(fill[:, 1] * 100 / 2.0 + 15).astype(int)
    assert set(zip(rows.tolist(), cols.tolist(), strict=True)) == {(5, 5), (5, 6), (6, 5), (6, 6)}
    # Without pixels the points are projected: the same fill.
    bare = _cloud(cloud.points)
    np.testing.assert_allclose(support_points(bare, rig)[0][len(cloud):], fill, atol=1e-9)
    assert len(support_points(cloud, rig, max_hole_edges=0)[0]) == len(cloud)


def _covered(mesh, rig, u, v):
    """Whether the ray of each left-image position (u, v) hits the mesh (Open3D's ray caster)."""
    import open3d as o3d

    scene = o3d.t.geometry.RaycastingScene()
    scene.add_triangles(o3d.core.Tensor(mesh.vertices.astype(np.float32)),
                        o3d.core.Tensor(mesh.faces.astype(np.uint32)))
    d = np.c_[(u - rig.cx) / rig.focal_px, (v - rig.cy) / rig.focal_px, np.ones(len(u))]
    rays = np.c_[np.zeros((len(u), 3)), d].astype(np.float32)
    return np.isfinite(scene.cast_rays(o3d.core.Tensor(rays))["t_hit"].numpy())


def test_poisson_trim_opens_large_holes_keeps_small_ones_and_stays_in_view():
    # A plane seen by the camera with a 12 x 12 pixel hole (larger than the
    # small-hole limit) and a 4 x 4 one (smaller): Poisson closes both; the
    # trim must reopen the large one, keep the small one covered and keep the
    # rest of the plane. Positions are probed by rays through the image.
    rig = RectifiedRig(focal_px=100.0, cx=20.0, cy=15.0, baseline=0.1, image_size=(40, 30))
    z = 2.0
    missing = np.zeros((30, 40), bool)
    missing[5:9, 5:9] = True
    missing[10:22, 20:32] = True
    cloud = _plane_cloud(rig, z, missing)
    spacing = z / rig.focal_px
    k = 1.5
    # Pixel (r, c) covers [c - 0.5, c + 0.5); the large hole's cols 20:32 and
    # rows 10:22 shrunk by the trim distance (k spacings, one pixel each here)
    # and the half pixel from a pixel's centre to its edge.
    gu, gv = np.meshgrid(np.arange(21.5, 30.6, 0.5), np.arange(11.5, 20.6, 0.5))
    deep = (gu > 19.5 + k + 0.5) & (gu < 31.5 - k - 0.5) & (gv > 9.5 + k + 0.5) \
        & (gv < 21.5 - k - 0.5)
    gu, gv = gu[deep], gv[deep]
    # The small hole's middle is 2.5 pixels from its rim: the distance alone
    # would open it.
    small_u, small_v = np.array([6.0, 6.5, 7.0]), np.array([6.5, 6.5, 6.5])

    closed = poisson_mesh(cloud, poisson_depth=7, trim_spacings=0.0)
    assert _covered(closed, rig, gu, gv).mean() > 0.5      # Poisson closed the large hole

    mesh = poisson_mesh(cloud, poisson_depth=7, trim_spacings=k, rig=rig)
    assert not _covered(mesh, rig, gu, gv).any()
    assert _covered(mesh, rig, small_u, small_v).all()
    unfilled = poisson_mesh(cloud, poisson_depth=7, trim_spacings=k, rig=rig, max_hole_edges=0)
    assert not _covered(unfilled, rig, small_u, small_v).any()
    # In view: every vertex projects into the image.
    v = mesh.vertices
    u_img = rig.focal_px * v[:, 0] / v[:, 2] + rig.cx
    v_img = rig.focal_px * v[:, 1] / v[:, 2] + rig.cy
    assert np.all((u_img >= -0.5) & (u_img < 39.5) & (v_img >= -0.5) & (v_img < 29.5))
    # On the plane, and the kept area is the image's plane minus the large
    # hole, to within the trim band around the hole and the image's rim.
    np.testing.assert_allclose(v[:, 2], z, atol=0.05 * spacing)
    a, b, c = (v[mesh.faces[:, j]] for j in range(3))
    area = 0.5 * np.linalg.norm(np.cross(b - a, c - a), axis=1).sum() / spacing**2
    expected = 40 * 30 - 12 * 12   # the small hole is covered
    rim = 2 * (40 + 30) + 4 * 12
    assert abs(area - expected) < 0.5 * rim, (area, expected)
    # Without the rig only the distance applies: the large hole opens too.
    bare = poisson_mesh(cloud, poisson_depth=7, trim_spacings=k)
    assert not _covered(bare, rig, gu, gv).any()
    with pytest.raises(ValueError):
        poisson_mesh(cloud, trim_spacings=-1.0)


def test_poisson_mesh_needs_normals():
    with pytest.raises(ValueError, match="normals"):
        poisson_mesh(_cloud(np.random.default_rng(0).random((50, 3))))


# ---------------------------------------------------------------- repair


def _grid_mesh(n, holes, spacing=0.01, seed=0):
    """n×n vertex grid at z = 1 without the cells in ``holes`` (r0, r1, c0, c1)."""
    xs, ys = np.meshgrid(np.arange(n, dtype=float), np.arange(n, dtype=float))
    verts = np.c_[xs.ravel() * spacing, ys.ravel() * spacing, np.ones(n * n)]
    faces = []
    for r in range(n - 1):
        for c in range(n - 1):
            if any(r0 <= r < r1 and c0 <= c < c1 for r0, r1, c0, c1 in holes):
                continue
            a = r * n + c
            faces += [[a, a + n, a + n + 1], [a, a + n + 1, a + 1]]
    return verts, np.array(faces)


def _as_mesh(verts, faces, seed=0):
    rng = np.random.default_rng(seed)
    n = len(verts)
    return TriMesh(
        verts,
        faces,
        rng.integers(0, 256, (n, 3), dtype=np.uint8),
        rng.uniform(0.5, 1.0, n).astype(np.float32),
        rng.uniform(0.001, 0.002, n).astype(np.float32),
        np.zeros(n, np.uint8),
    )


def _trimesh_loops(verts, faces):
    import trimesh

    # reference: trimesh Trimesh.outline(), one path entity per closed boundary loop
    return len(trimesh.Trimesh(verts, faces, process=False).outline().entities)


def test_repair_closes_small_hole_keeps_large_hole_and_drops_fragment():
    verts, faces = _grid_mesh(30, [(5, 8, 5, 8), (14, 25, 12, 25)])
    off = len(verts)
    verts = np.r_[verts, [[0.5, 0.5, 1.2], [0.51, 0.5, 1.2], [0.5, 0.51, 1.2]]]
    faces = np.r_[faces, [[off, off + 2, off + 1]]]
    mesh = _as_mesh(verts, faces)
    assert count_boundary_loops(mesh.faces) == _trimesh_loops(verts, faces) == 4

    out, fig = repair_mesh(mesh, max_hole_edges=30, min_component_fraction=0.01)
    assert fig["boundary_loops_before"] == 4
    assert fig["components_removed"] == 1
    assert fig["holes_filled"] == 1
    assert fig["boundary_loops_after"] == 2  # the rim and the large hole
    assert _trimesh_loops(out.vertices, out.faces) == 2
    assert fig["faces_after"] == len(out.faces) and fig["vertices_after"] == len(out.vertices)

    filled = out.filled == 1
    assert filled.sum() == fig["filled_vertices"] > 0
    assert np.all(out.confidence[filled] == 0)
    # The invented vertices lie inside the small hole, none in the large one.
    fv = out.vertices[filled]
    assert np.all((fv[:, 0] > 0.05) & (fv[:, 0] < 0.08) & (fv[:, 1] > 0.05) & (fv[:, 1] < 0.08))
    # Measured vertices keep position, colour, confidence and sigma exactly.
    from scipy.spatial import cKDTree

    dist, src = cKDTree(verts).query(out.vertices[~filled])
    assert dist.max() == 0
    np.testing.assert_array_equal(out.colors[~filled], mesh.colors[src])
    np.testing.assert_array_equal(out.confidence[~filled], mesh.confidence[src])
    np.testing.assert_array_equal(out.sigma_z[~filled], mesh.sigma_z[src])
    assert np.all(out.vertices[:, 2] == 1.0)
    assert np.all(out.normals[:, 2] < -0.99)  # winding kept toward the camera


def test_repair_never_caps_the_rim_of_a_small_open_surface():
    verts, faces = _grid_mesh(4, [])  # rim of 12 edges, below max_hole_edges
    out, fig = repair_mesh(_as_mesh(verts, faces), max_hole_edges=30)
    assert fig["holes_filled"] == 0 and fig["boundary_loops_after"] == 1
    assert len(out.faces) == len(faces)


def test_repair_removes_duplicates_and_counts_nonmanifold():
    verts, faces = _grid_mesh(6, [])
    # A duplicate face, and a fin: a third face on an interior edge.
    fin = len(verts)
    verts = np.r_[verts, [[0.02, 0.02, 0.9]]]
    a, b = faces[24][0], faces[24][1]  # left edge of cell (2, 2), shared with (2, 1)
    faces = np.r_[faces, faces[:1], [[a, b, fin]]]
    out, fig = repair_mesh(_as_mesh(verts, faces), min_component_fraction=0.0)
    assert fig["nonmanifold_fixed"] >= 1
    _, counts = np.unique(np.sort(out.faces, axis=1), axis=0, return_counts=True)
    assert counts.max() == 1
    edges = np.sort(out.faces[:, [0, 1, 1, 2, 2, 0]].reshape(-1, 2), axis=1)
    _, uses = np.unique(edges, axis=0, return_counts=True)
    assert uses.max() <= 2, "a non-manifold edge survived"


def test_repair_smoothing_and_decimation_keep_attributes_consistent():
    verts, faces = _grid_mesh(25, [(10, 12, 10, 12)])
    rng = np.random.default_rng(3)
    verts = verts + np.c_[np.zeros((len(verts), 2)), rng.normal(0, 0.001, len(verts))]
    mesh = _as_mesh(verts, faces)
    out, fig = repair_mesh(mesh, smooth_iterations=5, target_faces=300)
    assert len(out.faces) <= 330
    assert out.colors.shape == (len(out.vertices), 3)
    assert np.std(out.vertices[:, 2]) < np.std(verts[:, 2])
    assert fig["boundary_loops_after"] == count_boundary_loops(out.faces, len(out.vertices))


def test_count_boundary_loops_matches_trimesh_on_random_holes():
    rng = np.random.default_rng(5)
    holes = []
    for _ in range(6):
        r, c = rng.integers(2, 36, 2)
        holes.append((r, r + 2, c, c + 2))
    verts, faces = _grid_mesh(40, holes)
    assert count_boundary_loops(faces, len(verts)) == _trimesh_loops(verts, faces)


def test_split_at_centroids_keeps_orientation():
    verts, faces = _grid_mesh(3, [])
    v, f = split_at_centroids(verts, faces, np.array([0, 3]))
    assert len(v) == len(verts) + 2 and len(f) == len(faces) + 4
    assert np.all(_face_normals(v, f)[:, 2] < 0)
    assert count_boundary_loops(f) == 1


def _organised_surface(h=60, w=80, seed=0):
    """A curved, slanted surface seen by a camera: points on the image grid."""
    rng = np.random.default_rng(seed)
    rows, cols = np.mgrid[0:h, 0:w]
    f = 100.0
    z = 2.0 + 0.004 * cols + 0.3 * np.sin(rows / 15.0) + rng.normal(0, 0.001, (h, w))
    pts = np.stack([(cols - w / 2) * z / f, (rows - h / 2) * z / f, z], -1).reshape(-1, 3)
    pixels = np.c_[cols.ravel(), rows.ravel()]
    return pts, pixels


def test_grid_outlier_removal_matches_its_reference_and_open3d():
    # Exact check against the slow reference; then against Open3D's statistical
    # outlier removal (k-d tree neighbours) on the same points: the planted
    # outliers go in both, and the two keep nearly the same points otherwise.
    from stereomesh.geometry.filters import _statistical_keep
    from stereomesh.geometry.organised import grid_outlier_keep, grid_outlier_keep_reference

    pts, pixels = _organised_surface()
    rng = np.random.default_rng(1)
    planted = rng.choice(len(pts), 40, replace=False)
    pts[planted, 2] += rng.uniform(0.2, 0.6, 40)
    pc = _cloud(pts, pixels=pixels)
    keep = grid_outlier_keep(pc, 20, 2.0)
    np.testing.assert_array_equal(keep, grid_outlier_keep_reference(pc, 20, 2.0))
    assert not np.isin(planted, keep).any()
    o3d_keep = _statistical_keep(pts, 20, 2.0)
    assert not np.isin(planted, o3d_keep).any()
    inliers = np.setdiff1d(np.arange(len(pts)), planted)
    agree = np.isin(inliers, keep) == np.isin(inliers, o3d_keep)
    assert agree.mean() > 0.97, agree.mean()
    # A subset (an edited cloud) is still organised: holes are just empty pixels.
    half = pc.subset(np.arange(0, len(pts), 2))
    np.testing.assert_array_equal(grid_outlier_keep(half, 8, 2.0),
                                  grid_outlier_keep_reference(half, 8, 2.0))


@pytest.mark.parametrize("k, radius", [(1, 2), (3, 2), (20, 2), (24, 2), (30, 2), (20, 3)])
def test_mean_neighbour_distance_matches_brute_force(k, radius):
    # Brute force: every window candidate's distance, sorted, the k smallest averaged.
    # k >= 24 keeps every candidate of a 5 x 5 window; 20 in 7 x 7 is the default.
    from stereomesh.geometry._grid_kernels import mean_neighbour_distance
    from stereomesh.geometry.organised import pixel_index

    pts, pixels = _organised_surface()
    keep = np.random.default_rng(2).random(len(pts)) < 0.8  # empty pixels too
    pc = _cloud(pts[keep], pixels=pixels[keep])
    index = pixel_index(pc)
    got = mean_neighbour_distance(pc.points, pc.pixels.astype(np.int64), index, k, radius)
    h, w = index.shape
    for i in np.random.default_rng(3).choice(len(pc), 300, replace=False):
        col, row = pc.pixels[i]
        win = index[max(0, row - radius):row + radius + 1, max(0, col - radius):col + radius + 1]
        others = win[(win >= 0) & (win != i)]
        d = np.sort(np.linalg.norm(pc.points[others] - pc.points[i], axis=1))[:k]
        want = d.mean() if len(d) else np.inf
        np.testing.assert_allclose(got[i], want, rtol=1e-12)


@pytest.mark.parametrize("radius", [1, 2, 3])
def test_grid_normals_kernel_matches_the_whole_window_reference(radius):
    # The box-sum kernel against the point-by-point window sums, with missing
    # pixels (scattered and a block) and the image border in the windows.
    from stereomesh.geometry.organised import _grid_normals_reference, grid_normals

    pts, pixels = _organised_surface(h=23, w=31, seed=3)
    rng = np.random.default_rng(4)
    keep = rng.random(len(pts)) > 0.15
    block = (pixels[:, 0] >= 10) & (pixels[:, 0] < 15) & (pixels[:, 1] >= 6) & (pixels[:, 1] < 9)
    keep &= ~block
    pc = _cloud(pts[keep], pixels=pixels[keep])
    np.testing.assert_allclose(grid_normals(pc, radius), _grid_normals_reference(pc, radius),
                               atol=1e-6)


def test_grid_normals_agree_with_open3d_plane_fits():
    # Reference: Open3D's estimate_normals (local plane fits, oriented to the camera).
    from stereomesh.geometry.organised import grid_normals

    pts, pixels = _organised_surface(seed=2)
    pc = _cloud(pts, pixels=pixels)
    ours = grid_normals(pc)
    theirs = estimate_normals(_cloud(pts)).normals
    cos = np.clip(np.einsum("ij,ij->i", ours, theirs), -1, 1)
    angle = np.degrees(np.arccos(cos))
    assert np.median(angle) < 3.0, np.median(angle)
    assert np.all(np.einsum("ij,ij->i", ours, -pts) > 0)
    np.testing.assert_allclose(np.linalg.norm(ours, axis=1), 1.0, atol=1e-5)
