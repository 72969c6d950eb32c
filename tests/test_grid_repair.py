"""Pixel-space repair of grid meshes, against closed forms, a slow reference,
PyMeshLab's repair (the general path) and trimesh's boundary count."""

import numpy as np
import pytest

from stereomesh.geometry.grid_repair import (
    fill_small_holes,
    fill_small_holes_reference,
    find_small_holes,
    repair_grid_mesh,
)
from stereomesh.geometry.repair import repair_mesh
from stereomesh.geometry.surface import depth_grid_mesh
from stereomesh.rectify import RectifiedRig

RIG = RectifiedRig(focal_px=500.0, cx=60.0, cy=50.0, baseline=0.1)


def _plane(h=100, w=120, a=0.05, b=-0.03, c=40.0):
    rows, cols = np.mgrid[0:h, 0:w].astype(np.float64)
    return a * cols + b * rows + c


def _image(h, w):
    rng = np.random.default_rng(3)
    return rng.integers(0, 255, (h, w, 3), dtype=np.uint8)


def _trimesh_boundary_loops(mesh) -> int:
    """Boundary loops counted by trimesh: edges used once, joined where they share a vertex."""
    import trimesh

    tm = trimesh.Trimesh(mesh.vertices, mesh.faces, process=False)
    once = trimesh.grouping.group_rows(tm.edges_sorted, require_count=1)
    edges = tm.edges_sorted[once]
    if len(edges) == 0:
        return 0
    return len(trimesh.graph.connected_components(edges, min_len=1))


def _scene_with_holes():
    """A slanted plane with small holes, a large opening holding a tiny island,
    a raised block (depth discontinuity) and a notch on the image border."""
    d = _plane()
    for r, c, k in ((10, 10, 1), (10, 30, 2), (10, 50, 3), (10, 70, 5), (30, 10, 7), (30, 30, 8)):
        d[r:r + k, c:c + k] = np.nan
    d[55:75, 10:32] = np.nan                # 80+ boundary edges: a real opening
    d[63:66, 19:22] = 40.0                   # an island in it, 4 faces
    d[50:80, 60:90] *= 2.0                   # a block twice as near: a discontinuity
    d[62:66, 58:63] = np.nan                 # a small gap astride the block's edge
    d[0:3, 100:104] = np.nan                 # a notch in the image border
    return d.astype(np.float32)


def test_fill_matches_the_slow_reference():
    rng = np.random.default_rng(0)
    rows, cols = np.mgrid[0:80, 0:90]
    # A curved surface with scattered holes of every size and a step.
    d = 30.0 + 5.0 * np.sin(cols / 15.0) + 0.02 * (rows - 40.0) ** 2 / 10
    d[:, 60:] += 12.0
    d[rng.random(d.shape) < 0.08] = np.nan
    d[20:24, 20:25] = np.nan
    fast, fast_mask, n_fast = fill_small_holes(d, 30, 0.03)
    slow, slow_mask, n_slow = fill_small_holes_reference(d, 30, 0.03)
    assert n_fast == n_slow > 50
    np.testing.assert_array_equal(fast_mask, slow_mask)
    np.testing.assert_allclose(fast[fast_mask], slow[slow_mask], rtol=1e-5)
    untouched = ~fast_mask
    np.testing.assert_array_equal(np.isnan(fast[untouched]), np.isnan(d[untouched]))


def test_plane_is_filled_exactly():
    # Closed form: disparity on a 3-D plane is affine in (col, row), and the
    # 5-point Laplacian of an affine function is zero, so the fill is exact.
    truth = _plane()
    d = truth.copy()
    d[40:46, 50:56] = np.nan
    out, filled, n = fill_small_holes(d, 30, 0.03)
    assert n == 1 and filled.sum() == 36
    np.testing.assert_allclose(out[filled], truth[filled], rtol=1e-6)


def test_which_holes_are_filled():
    d = _scene_with_holes()
    labels, fillable = find_small_holes(d, 30, 0.03)

    def ok(r, c):
        return bool(fillable[labels[r, c]])

    # A missing k x k square leaves a loop of 4k edges: up to 7 x 7 within 30.
    assert all(ok(r, c) for r, c in ((10, 10), (10, 30), (10, 50), (10, 70), (30, 10)))
    assert not ok(30, 30)            # 8 x 8: 32 edges
    assert not ok(60, 12)            # the opening
    assert not ok(63, 60)            # astride the discontinuity
    assert not ok(0, 101)            # reaches the border


def test_grid_mesh_has_no_nonmanifold_edges():
    rng = np.random.default_rng(1)
    d = _plane().astype(np.float32)
    d[rng.random(d.shape) < 0.3] = np.nan
    mesh = depth_grid_mesh(d, RIG, _image(*d.shape))
    edges = np.sort(mesh.faces[:, [0, 1, 1, 2, 2, 0]].reshape(-1, 2), axis=1)
    _, counts = np.unique(edges, axis=0, return_counts=True)
    assert counts.max() <= 2


def test_same_holes_closed_as_pymeshlab():
    # The general path (PyMeshLab's hole closing on the mesh) is the reference:
    # on the same depth map both close the same holes and keep the same openings,
    # with boundary loops counted by trimesh, independently of both.
    d = _scene_with_holes()
    image = _image(*d.shape)
    mesh = depth_grid_mesh(d, RIG, image, max_depth_jump=0.03)
    ours, fig = repair_grid_mesh(mesh, RIG, image, max_hole_edges=30,
                                 min_component_fraction=0.01, max_depth_jump=0.03)
    ref, ref_fig = repair_mesh(mesh, max_hole_edges=30, min_component_fraction=0.01)
    loops_before = _trimesh_boundary_loops(mesh)
    assert loops_before == fig["boundary_loops_before"]
    assert _trimesh_boundary_loops(ours) == _trimesh_boundary_loops(ref)
    assert fig["boundary_loops_after"] == _trimesh_boundary_loops(ours)
    assert fig["holes_filled"] == 5
    assert fig["components_removed"] == ref_fig["components_removed"] == 1
    assert fig["nonmanifold_fixed"] == 0


def test_attributes_of_measured_and_filled_vertices():
    d = _plane().astype(np.float32)
    d[20:23, 20:23] = np.nan
    image = _image(*d.shape)
    sigma = np.full(d.shape, 0.2, np.float32)
    sigma[19, 21] = 0.5
    mesh = depth_grid_mesh(d, RIG, image, np.full(d.shape, 0.9, np.float32), sigma_d=sigma)
    out, fig = repair_grid_mesh(mesh, RIG, image)
    new = out.filled == 1
    assert fig["filled_vertices"] == new.sum() == 9
    cols, rows = out.pixels[new, 0], out.pixels[new, 1]
    np.testing.assert_array_equal(out.colors[new], image[rows, cols])
    assert np.all(out.confidence[new] == 0)
    # The fill is as uncertain as the least certain pixel around it.
    z = out.vertices[new, 2]
    np.testing.assert_allclose(out.sigma_z[new], z * z * 0.5 / (RIG.focal_px * RIG.baseline),
                               rtol=1e-5)
    # Measured vertices stay where they were, with their attributes.
    key = {tuple(p): i for i, p in enumerate(mesh.pixels)}
    idx = np.array([key[tuple(p)] for p in out.pixels[~new]])
    np.testing.assert_array_equal(out.vertices[~new], mesh.vertices[idx])
    np.testing.assert_array_equal(out.confidence[~new], mesh.confidence[idx])


def test_grid_step_is_respected():
    d = _plane().astype(np.float32)
    d[40:44, 40:44] = np.nan           # on a step-2 grid: a 2 x 2 hole
    image = _image(*d.shape)
    mesh = depth_grid_mesh(d, RIG, image, grid_step=2)
    out, fig = repair_grid_mesh(mesh, RIG, image, grid_step=2)
    assert fig["holes_filled"] == 1 and fig["filled_vertices"] == 4
    assert np.all(out.pixels % 2 == 0)


def test_rejects_a_mesh_without_pixels():
    d = _plane(10, 10).astype(np.float32)
    mesh = depth_grid_mesh(d, RIG, _image(10, 10))
    mesh.pixels = None
    with pytest.raises(ValueError, match="grid mesh"):
        repair_grid_mesh(mesh, RIG, _image(10, 10))


@pytest.mark.parametrize("seed", [0, 1])
def test_topology_kernels_match_their_references(seed):
    # The numba passes against the sorting / SciPy-graph versions they replace,
    # on a grid mesh with holes plus loose faces, a shared (non-manifold) edge
    # and unreferenced vertices.
    from stereomesh.geometry import repair

    rng = np.random.default_rng(seed)
    d = _plane(60, 70).astype(np.float32)
    d[rng.random(d.shape) < 0.25] = np.nan
    mesh = depth_grid_mesh(d, RIG, _image(*d.shape))
    nv = len(mesh.vertices) + 5
    extra = np.array([[0, 1, nv - 1], [0, 1, nv - 2], [nv - 3, nv - 4, nv - 5]])
    faces = np.vstack([mesh.faces, extra])
    for fast, slow in ((repair._edge_use, repair._edge_use_reference),):
        b1, o1, n1 = fast(faces, nv)
        b2, o2, n2 = slow(faces, nv)
        np.testing.assert_array_equal(b1, b2)
        np.testing.assert_array_equal(o1, o2)
        assert n1 == n2 == 1
    l1, k1 = repair._loops(b1, nv)
    l2, k2 = repair._loops_reference(b1)
    np.testing.assert_array_equal(l1, l2)
    assert k1 == k2
    c1, m1 = repair._components(faces, nv)
    c2, m2 = repair._components_reference(faces, nv)
    np.testing.assert_array_equal(c1, c2)
    assert m1 == m2


def test_pipeline_repairs_grid_meshes_in_pixel_space_then_decimates():
    # The repair stage takes the pixel path for a grid mesh of its pair and hands
    # decimation to PyMeshLab, which keeps colours and the filled flags.
    from stereomesh.params import Params
    from stereomesh.pipeline import StereoPair, repair_surface

    d = _plane().astype(np.float32)
    d[40:43, 40:43] = np.nan
    image = _image(*d.shape)
    mesh = depth_grid_mesh(d, RIG, image)
    pair = StereoPair(image, image, RIG)
    out, fig = repair_surface(mesh, Params(), pair)
    assert fig["method"] == "pixel grid" and fig["holes_filled"] == 1
    small, fig2 = repair_surface(mesh, Params().with_overrides({"target_faces": 2000}), pair)
    assert len(small.faces) <= 2000 and fig2["faces_after"] == len(small.faces)
    assert small.colors.shape == (len(small.vertices), 3) and small.filled.max() <= 1
    # Without its pair the same mesh goes the general way.
    _, fig3 = repair_surface(mesh, Params())
    assert "method" not in fig3 and fig3["holes_filled"] == 1


@pytest.mark.parametrize("density", [0.05, 0.3, 0.5, 0.7, 0.95])
def test_hole_labels_match_scipy(density):
    # Reference: SciPy's ndimage.label with the full 3 x 3 structure (8-connected),
    # numbering included.
    from stereomesh.geometry.grid_repair import _hole_labels, _hole_labels_reference

    rng = np.random.default_rng(int(density * 100))
    for shape in [(1, 1), (1, 9), (7, 1), (40, 53)]:
        valid = rng.random(shape) > density
        labels, n = _hole_labels(valid)
        want, n_want = _hole_labels_reference(valid)
        assert n == n_want
        np.testing.assert_array_equal(labels, want)


def test_hole_laplacian_cg_equals_scipys_direct_solve():
    # The matrix-free conjugate gradients against scipy.sparse's direct solver on
    # the 5-point Laplacian of the whole grid (built here independently, by
    # Kronecker sums), restricted to the holes; and the direct path the fill
    # falls back to if CG stalls, on the same holes.
    from scipy import sparse
    from scipy.sparse.linalg import spsolve

    from stereomesh.geometry import grid_repair

    rng = np.random.default_rng(4)
    h, w = 70, 90
    rows, cols = np.mgrid[0:h, 0:w]
    values = 30.0 + 5.0 * np.sin(cols / 9.0) + 0.03 * (rows - 30.0) ** 2
    hole = np.zeros(values.shape, bool)
    for r, c, hh, ww in ((5, 5, 1, 1), (5, 20, 2, 7), (20, 5, 8, 8), (40, 40, 3, 20),
                         (20, 60, 12, 2)):
        hole[r:r + hh, c:c + ww] = True
    hole[rng.random(hole.shape) < 0.05] = True
    hole[[0, -1]] = False
    hole[:, [0, -1]] = False
    values[hole] = np.nan

    def path(m):
        return sparse.diags([np.ones(m - 1), np.ones(m - 1)], [-1, 1])

    adjacency = sparse.kronsum(path(w), path(h)).tocsr()  # 4-neighbour grid graph
    laplacian = (4.0 * sparse.identity(h * w) - adjacency).tocsr()
    inside, known = np.flatnonzero(hole), np.flatnonzero(~hole)
    b = -laplacian[inside][:, known] @ values.ravel()[known]
    expected = spsolve(laplacian[inside][:, inside].tocsc(), b)

    fast = grid_repair._harmonic_fill(values, hole)
    np.testing.assert_allclose(fast.ravel()[inside], expected, rtol=1e-9)
    np.testing.assert_array_equal(fast[~hole], values[~hole])
    unknown = np.full(h * w, len(inside))
    unknown[inside] = np.arange(len(inside))
    neighbours = np.stack([unknown[inside + dr * w + dc]
                           for dr, dc in grid_repair._EDGE_NEIGHBOURS])
    np.testing.assert_allclose(grid_repair._laplace_direct(neighbours, b), expected, rtol=1e-12)
    assert grid_repair._laplace_cg(neighbours, b) is not None  # the fast path took it
