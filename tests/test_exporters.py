"""Every --format writes its file, re-read by a library other than the writer."""

import json
import re
import struct
import xml.etree.ElementTree as ET

import numpy as np
import pytest

from stereomesh.geometry.data import PointCloud, TriMesh
from stereomesh.io import exporters
from stereomesh.rectify import RectifiedRig

RIG = RectifiedRig(focal_px=80.0, cx=31.5, cy=23.5, baseline=0.2, image_size=(64, 48))


def _mesh():
    rng = np.random.default_rng(0)
    rows, cols = np.mgrid[0:6, 0:8]
    z = 2.0 + 0.05 * rows
    v = np.stack([(cols * 8 - RIG.cx) * z / RIG.focal_px, (rows * 8 - RIG.cy) * z / RIG.focal_px,
                  z], -1).reshape(-1, 3)
    faces = []
    for r in range(5):
        for c in range(7):
            i = r * 8 + c
            faces += [[i, i + 8, i + 1], [i + 1, i + 8, i + 9]]
    n = len(v)
    return TriMesh(v, np.array(faces), rng.integers(0, 256, (n, 3), dtype=np.uint8),
                   rng.random(n).astype(np.float32), np.full(n, 0.003, np.float32),
                   np.zeros(n, np.uint8))


def _cloud():
    m = _mesh()
    return PointCloud(m.vertices, m.colors, m.confidence, m.sigma_z)


def _image():
    return np.random.default_rng(1).integers(0, 256, (48, 64, 3), dtype=np.uint8)


def test_registry_names_are_the_format_choices():
    from stereomesh.params import Params

    assert exporters.names() == ("e57", "glb", "las", "obj", "ply")
    assert Params().with_overrides({"format": "ply,obj,glb,las,e57"}).export.formats[-1] == "e57"


def test_obj_read_back_by_open3d_and_trimesh(tmp_path):
    # Readers: Open3D's OBJ reader (positions, faces, texture) and trimesh (colours).
    import open3d as o3d
    import trimesh

    mesh = _mesh()
    rec = exporters.export("obj", tmp_path, mesh=mesh, image=_image(), rig=RIG)
    assert rec["textured"] and len(rec["files"]) == 3 and "y up" in rec["frame"]
    o3 = o3d.io.read_triangle_mesh(str(tmp_path / "mesh.obj"))
    verts = np.asarray(o3.vertices)
    assert len(verts) == len(mesh.vertices) and len(o3.triangles) == len(mesh.faces)
    expected = mesh.vertices * [1, -1, -1]  # turned 180 deg about x
    # Open3D may reorder vertices while it attaches the texture: compare as sets.
    np.testing.assert_allclose(verts[np.lexsort(verts.T)], expected[np.lexsort(expected.T)],
                               atol=1e-5)
    assert o3.has_triangle_uvs()
    textured = o3d.io.read_triangle_mesh(str(tmp_path / "mesh.obj"), enable_post_processing=True)
    assert textured.has_textures()
    tm = trimesh.load(tmp_path / "mesh.obj", process=False)
    assert len(tm.vertices) == len(mesh.vertices) and tm.visual.material.image.size == (64, 48)
    # The uv of the first vertex addresses its pixel centre (0, 0): the top-left texel.
    uv = np.asarray(o3.triangle_uvs)[0]
    assert uv == pytest.approx([0.5 / 64, 1 - 0.5 / 48], abs=1e-5)
    text = (tmp_path / "mesh.obj").read_text()
    first = re.search(r"^v (\S+) (\S+) (\S+) (\S+) (\S+) (\S+)$", text, re.M).groups()
    assert [round(float(c) * 255) for c in first[3:]] == mesh.colors[0].tolist()


def test_glb_read_back_by_pygltflib(tmp_path):
    # Reader: pygltflib (trimesh wrote it); glTF 2.0 spec: COLOR_0 and POSITION accessors.
    import pygltflib

    mesh = _mesh()
    exporters.export("glb", tmp_path, mesh=mesh)
    gltf = pygltflib.GLTF2().load(str(tmp_path / "mesh.glb"))
    prim = gltf.meshes[0].primitives[0]
    pos_acc = gltf.accessors[prim.attributes.POSITION]
    assert pos_acc.count == len(mesh.vertices)
    expected = mesh.vertices * [1, -1, -1]
    np.testing.assert_allclose(pos_acc.min, expected.min(axis=0), atol=1e-5)
    np.testing.assert_allclose(pos_acc.max, expected.max(axis=0), atol=1e-5)
    blob = gltf.binary_blob()
    col_acc = gltf.accessors[prim.attributes.COLOR_0]
    view = gltf.bufferViews[col_acc.bufferView]
    assert col_acc.componentType == pygltflib.UNSIGNED_BYTE
    raw = np.frombuffer(blob, np.uint8, count=view.byteLength,
                        offset=view.byteOffset + (col_acc.byteOffset or 0))
    colours = raw.reshape(-1, 4)[: col_acc.count, :3]
    np.testing.assert_array_equal(colours, mesh.colors)
    assert gltf.accessors[prim.indices].count == 3 * len(mesh.faces)


def test_las_read_back_from_its_header_and_records(tmp_path):
    # Reader: the LAS 1.4 layout (ASPRS LAS 1.4 R15, table 3 header, table 9 point
    # format 7) parsed with numpy, not with laspy that wrote it.
    cloud = _cloud()
    rec = exporters.export("las", tmp_path, cloud=cloud)
    data = (tmp_path / "cloud.las").read_bytes()
    assert data[:4] == b"LASF" and data[24:26] == bytes([1, 4])
    header_size, = struct.unpack_from("<H", data, 94)
    offset_to_points, = struct.unpack_from("<I", data, 96)
    point_format, record_length = struct.unpack_from("<BH", data, 104)
    scale = np.array(struct.unpack_from("<3d", data, 131))
    offset = np.array(struct.unpack_from("<3d", data, 155))
    count, = struct.unpack_from("<Q", data, 247)
    assert header_size == 375 and point_format & 0x3F == 7 and count == len(cloud)
    np.testing.assert_allclose(scale, 1e-4)
    np.testing.assert_allclose(offset, rec["offset"])
    records = np.frombuffer(data, np.uint8, count=count * record_length,
                            offset=offset_to_points).reshape(count, record_length)
    xyz = records[:, :12].copy().view("<i4").reshape(count, 3) * scale + offset
    np.testing.assert_allclose(xyz, cloud.points, atol=0.6e-4)
    rgb = records[:, 30:36].copy().view("<u2").reshape(count, 3)
    np.testing.assert_array_equal(rgb // 257, cloud.colors)
    extra = records[:, 36:44].copy().view("<f4").reshape(count, 2)
    np.testing.assert_allclose(extra[:, 0], cloud.confidence)
    np.testing.assert_allclose(extra[:, 1], cloud.sigma_z)


def _e57_xml(data: bytes) -> ET.Element:
    # ASTM E2807: a 48-byte header (signature, version, file length, XML offset and
    # logical length, page size); pages of 1020 data bytes followed by a 4-byte CRC.
    assert data[:8] == b"ASTM-E57"
    _, _, _, xml_offset, xml_length, page = struct.unpack_from("<IIQQQQ", data, 8)
    logical = bytearray()
    pos = xml_offset
    while len(logical) < xml_length:
        page_start = pos - pos % page
        end = page_start + page - 4
        logical += data[pos:end]
        pos = end + 4
    return ET.fromstring(bytes(logical[:xml_length]))


def test_e57_read_back_from_its_xml_section(tmp_path):
    # No second E57 reader is on the registry for this check, so the file's own
    # structure is parsed per ASTM E2807: point count and cartesian bounds.
    cloud = _cloud()
    exporters.export("e57", tmp_path, cloud=cloud)
    root = _e57_xml((tmp_path / "cloud.e57").read_bytes())
    text = ET.tostring(root, encoding="unicode")
    ns = {"e": "http://www.astm.org/COMMIT/E57/2010-e57-v1.0"}
    points = root.find(".//e:data3D/e:vectorChild/e:points", ns)
    assert int(points.get("recordCount")) == len(cloud)
    bounds = root.find(".//e:data3D/e:vectorChild/e:cartesianBounds", ns)
    for axis, k in (("x", 0), ("y", 1), ("z", 2)):
        lo = float(bounds.find(f"e:{axis}Minimum", ns).text)
        hi = float(bounds.find(f"e:{axis}Maximum", ns).text)
        assert lo == pytest.approx(cloud.points[:, k].min(), abs=1e-9)
        assert hi == pytest.approx(cloud.points[:, k].max(), abs=1e-9)
    assert "colorRed" in text and "intensity" in text


def test_run_writes_every_format(tmp_path):
    # The whole command with every --format: each file exists and the report says
    # which frame each one uses.
    from conftest import DEMO, run_cli

    code, _, err = run_cli("run", DEMO / "left.png", DEMO / "right.png", "--calib",
                           DEMO / "calib.json", "--out", tmp_path, "--quiet",
                           "--disp-range", "64:192", "--format", "ply,obj,glb,las,e57",
                           "--grid-step", "4")
    assert code == 0, err
    report = json.loads((tmp_path / "report.json").read_text())
    for name in ("mesh.obj", "mesh.mtl", "mesh_texture.png", "mesh.glb", "cloud.las",
                 "cloud.e57"):
        assert (tmp_path / name).is_file(), name
    assert set(report["exports"]) == {"obj", "glb", "las", "e57"}
    assert "y up" in report["exports"]["glb"]["frame"]
    assert report["warnings"] == []
