"""PLY writer and reader: exact round trip, and readable by other libraries."""

import numpy as np
import pytest

from stereomesh.errors import InputError
from stereomesh.geometry.data import PointCloud, TriMesh
from stereomesh.io.ply import read_ply, write_cloud_ply, write_mesh_ply

VERTEX_PROPERTIES = [
    "property float x",
    "property float y",
    "property float z",
    "property float nx",
    "property float ny",
    "property float nz",
    "property uchar red",
    "property uchar green",
    "property uchar blue",
    "property float confidence",
    "property float sigma_z",
    "property uchar filled",
]


def _mesh(n=50, seed=0):
    rng = np.random.default_rng(seed)
    verts = rng.uniform(-1, 1, (n, 3)) + [0, 0, 3]
    faces = np.stack([rng.choice(n, 3, replace=False) for _ in range(2 * n)]).astype(np.int32)
    normals = rng.normal(size=(n, 3)).astype(np.float32)
    normals /= np.linalg.norm(normals, axis=1, keepdims=True)
    return TriMesh(
        verts,
        faces,
        rng.integers(0, 256, (n, 3), dtype=np.uint8),
        rng.random(n).astype(np.float32),
        rng.random(n).astype(np.float32) * 0.01,
        (rng.random(n) < 0.2).astype(np.uint8),
        normals,
    )


def _cloud(n=40, seed=1, normals=True):
    rng = np.random.default_rng(seed)
    return PointCloud(
        rng.uniform(-1, 1, (n, 3)),
        rng.integers(0, 256, (n, 3), dtype=np.uint8),
        rng.random(n).astype(np.float32),
        rng.random(n).astype(np.float32),
        rng.normal(size=(n, 3)).astype(np.float32) if normals else None,
    )


def _header_lines(path):
    data = path.read_bytes()
    return data[: data.index(b"end_header\n")].decode("ascii").splitlines()


def test_mesh_round_trip(tmp_path):
    mesh = _mesh()
    path = tmp_path / "mesh.ply"
    write_mesh_ply(path, mesh)
    got = read_ply(path)
    np.testing.assert_array_equal(got["faces"], mesh.faces)
    xyz = np.stack([got["x"], got["y"], got["z"]], 1)
    np.testing.assert_array_equal(xyz, mesh.vertices.astype(np.float32))
    nrm = np.stack([got["nx"], got["ny"], got["nz"]], 1)
    np.testing.assert_array_equal(nrm, mesh.normals)
    np.testing.assert_array_equal(np.stack([got["red"], got["green"], got["blue"]], 1), mesh.colors)
    np.testing.assert_array_equal(got["confidence"], mesh.confidence)
    np.testing.assert_array_equal(got["sigma_z"], mesh.sigma_z)
    np.testing.assert_array_equal(got["filled"], mesh.filled)
    assert got["red"].dtype == np.uint8 and got["x"].dtype == np.float32


def test_header_has_the_fixed_property_order(tmp_path):
    write_mesh_ply(tmp_path / "m.ply", _mesh())
    lines = _header_lines(tmp_path / "m.ply")
    assert lines[:2] == ["ply", "format binary_little_endian 1.0"]
    props = [ln for ln in lines if ln.startswith("property")]
    assert props == VERTEX_PROPERTIES + ["property list uchar int vertex_indices"]
    write_cloud_ply(tmp_path / "c.ply", _cloud(normals=False))
    lines = _header_lines(tmp_path / "c.ply")
    assert [ln for ln in lines if ln.startswith("property")] == VERTEX_PROPERTIES
    assert not any(ln.startswith("element face") for ln in lines)


def test_cloud_round_trip_without_normals(tmp_path):
    cloud = _cloud(normals=False)
    write_cloud_ply(tmp_path / "c.ply", cloud)
    got = read_ply(tmp_path / "c.ply")
    assert "faces" not in got
    np.testing.assert_array_equal(got["filled"], 0)
    np.testing.assert_array_equal(got["nx"], 0)
    np.testing.assert_allclose(got["x"], cloud.points[:, 0], rtol=1e-7)


def test_open3d_reads_mesh_and_cloud(tmp_path):
    import open3d as o3d

    mesh, cloud = _mesh(), _cloud()
    write_mesh_ply(tmp_path / "m.ply", mesh)
    write_cloud_ply(tmp_path / "c.ply", cloud)
    # reference: Open3D's PLY reader (read_triangle_mesh / read_point_cloud)
    om = o3d.io.read_triangle_mesh(str(tmp_path / "m.ply"))
    np.testing.assert_allclose(np.asarray(om.vertices), mesh.vertices, rtol=1e-6, atol=1e-7)
    np.testing.assert_array_equal(np.asarray(om.triangles), mesh.faces)
    np.testing.assert_allclose(np.asarray(om.vertex_colors) * 255, mesh.colors, atol=1e-6)
    oc = o3d.io.read_point_cloud(str(tmp_path / "c.ply"))
    np.testing.assert_allclose(np.asarray(oc.points), cloud.points, rtol=1e-6, atol=1e-7)
    np.testing.assert_allclose(np.asarray(oc.colors) * 255, cloud.colors, atol=1e-6)
    np.testing.assert_allclose(np.asarray(oc.normals), cloud.normals, rtol=1e-6)


def test_trimesh_loads_mesh(tmp_path):
    import trimesh

    mesh = _mesh()
    write_mesh_ply(tmp_path / "m.ply", mesh)
    # reference: trimesh's PLY loader
    tm = trimesh.load(tmp_path / "m.ply", process=False)
    np.testing.assert_allclose(tm.vertices, mesh.vertices, rtol=1e-6, atol=1e-7)
    np.testing.assert_array_equal(tm.faces, mesh.faces)
    np.testing.assert_array_equal(tm.visual.vertex_colors[:, :3], mesh.colors)


def test_write_is_atomic_and_leaves_no_temporaries(tmp_path):
    path = tmp_path / "m.ply"
    path.write_bytes(b"old")
    with pytest.raises(AttributeError):
        write_mesh_ply(path, object())
    assert path.read_bytes() == b"old"
    write_mesh_ply(path, _mesh())
    assert sorted(p.name for p in tmp_path.iterdir()) == ["m.ply"]


def test_read_ply_errors(tmp_path):
    with pytest.raises(InputError, match="not found"):
        read_ply(tmp_path / "missing.ply")
    (tmp_path / "a.ply").write_text("ply\nformat ascii 1.0\nelement vertex 0\nend_header\n")
    with pytest.raises(InputError, match="binary"):
        read_ply(tmp_path / "a.ply")
    write_mesh_ply(tmp_path / "t.ply", _mesh())
    data = (tmp_path / "t.ply").read_bytes()
    (tmp_path / "t.ply").write_bytes(data[:-20])
    with pytest.raises(InputError, match="truncated"):
        read_ply(tmp_path / "t.ply")
