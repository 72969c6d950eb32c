"""PLY files: binary little-endian meshes and clouds with stereomesh's per-vertex fields.

Writers use numpy structured arrays, so millions of vertices are written in one
``tofile`` call, and go through :func:`~stereomesh.io.atomic.atomic_path`.
Every vertex carries, in this order::

    x y z            float   position, the rig's length unit
    nx ny nz         float   unit normal (zeros when none was estimated)
    red green blue   uchar   colour
    confidence       float   matching confidence in [0, 1]
    sigma_z          float   one-sigma depth uncertainty, length unit
    filled           uchar   1 for vertices invented by hole filling

and faces are ``property list uchar int vertex_indices``.
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np

from stereomesh.errors import InputError

VERTEX_DTYPE = np.dtype(
    [
        ("x", "<f4"),
        ("y", "<f4"),
        ("z", "<f4"),
        ("nx", "<f4"),
        ("ny", "<f4"),
        ("nz", "<f4"),
        ("red", "u1"),
        ("green", "u1"),
        ("blue", "u1"),
        ("confidence", "<f4"),
        ("sigma_z", "<f4"),
        ("filled", "u1"),
    ]
)
FACE_DTYPE = np.dtype([("count", "u1"), ("vertex_indices", "<i4", (3,))])

_PLY_TYPES = {
    "char": "i1",
    "int8": "i1",
    "uchar": "u1",
    "uint8": "u1",
    "short": "i2",
    "int16": "i2",
    "ushort": "u2",
    "uint16": "u2",
    "int": "i4",
    "int32": "i4",
    "uint": "u4",
    "uint32": "u4",
    "float": "f4",
    "float32": "f4",
    "double": "f8",
    "float64": "f8",
}
_NAMES_OUT = {"f4": "float", "u1": "uchar", "i4": "int"}


# Files travel without their report, so the header carries the units and the caution.
def _caution_comments(scale: str) -> list[str]:
    import textwrap

    from stereomesh import CAUTION

    if scale not in ("metric", "unscaled"):
        raise ValueError(f"scale must be 'metric' or 'unscaled', got {scale!r}")
    units = "metres" if scale == "metric" else "unscaled (nominal baseline, not metres)"
    lines = [f"units: {units}; sigma_z: 1-sigma depth uncertainty"]
    lines += textwrap.wrap(CAUTION, 76)
    return [f"comment {line}" for line in lines]


def _header(n_vertices: int, n_faces: int | None, comment: str, scale: str) -> bytes:
    lines = ["ply", "format binary_little_endian 1.0", f"comment {comment}",
             *_caution_comments(scale)]
    lines.append(f"element vertex {n_vertices}")
    for name in VERTEX_DTYPE.names:
        lines.append(f"property {_NAMES_OUT[VERTEX_DTYPE[name].base.str[1:]]} {name}")
    if n_faces is not None:
        lines.append(f"element face {n_faces}")
        lines.append("property list uchar int vertex_indices")
    lines.append("end_header")
    return ("\n".join(lines) + "\n").encode("ascii")


def _vertex_records(points, normals, colors, confidence, sigma_z, filled) -> np.ndarray:
    rec = np.empty(len(points), VERTEX_DTYPE)
    rec["x"], rec["y"], rec["z"] = points[:, 0], points[:, 1], points[:, 2]
    if normals is None:
        rec["nx"] = rec["ny"] = rec["nz"] = 0.0
    else:
        rec["nx"], rec["ny"], rec["nz"] = normals[:, 0], normals[:, 1], normals[:, 2]
    rec["red"], rec["green"], rec["blue"] = colors[:, 0], colors[:, 1], colors[:, 2]
    rec["confidence"] = confidence
    rec["sigma_z"] = sigma_z
    rec["filled"] = filled
    return rec


def _write(path, header: bytes, vertices: np.ndarray, faces: np.ndarray | None) -> None:
    from stereomesh.io.atomic import atomic_path

    with atomic_path(path) as tmp, open(tmp, "wb") as fh:
        fh.write(header)
        vertices.tofile(fh)
        if faces is not None:
            faces.tofile(fh)


def write_mesh_ply(path: str | os.PathLike, mesh, *, scale: str = "metric") -> None:
    """Write a :class:`~stereomesh.geometry.data.TriMesh` as binary PLY.

    Parameters
    ----------
    path : str or path-like
        Target file; written atomically.
    mesh : TriMesh
        Positions are stored as float32 (about 0.1 µm resolution at 1 m).
    scale : {"metric", "unscaled"}
        What the header says the lengths are.

    Examples
    --------
    >>> import numpy as np, tempfile, pathlib
    >>> from stereomesh.geometry.data import TriMesh
    >>> m = TriMesh(np.eye(3), np.array([[0, 1, 2]]), np.zeros((3, 3), np.uint8),
    ...             np.ones(3, np.float32), np.zeros(3, np.float32), np.zeros(3, np.uint8))
    >>> p = pathlib.Path(tempfile.mkdtemp()) / "m.ply"
    >>> write_mesh_ply(p, m)
    >>> read_ply(p)["faces"].tolist()
    [[0, 1, 2]]
    """
    verts = _vertex_records(
        mesh.vertices, mesh.normals, mesh.colors, mesh.confidence, mesh.sigma_z, mesh.filled
    )
    faces = np.empty(len(mesh.faces), FACE_DTYPE)
    faces["count"] = 3
    faces["vertex_indices"] = mesh.faces
    _write(path, _header(len(verts), len(faces), "stereomesh mesh", scale), verts, faces)


def write_cloud_ply(path: str | os.PathLike, cloud, *, scale: str = "metric") -> None:
    """Write a :class:`~stereomesh.geometry.data.PointCloud` as binary PLY (no faces).

    Parameters
    ----------
    path : str or path-like
        Target file; written atomically.
    cloud : PointCloud
        ``filled`` is written as 0 for every point.
    scale : {"metric", "unscaled"}
        What the header says the lengths are.

    Examples
    --------
    >>> import numpy as np, tempfile, pathlib
    >>> from stereomesh.geometry.data import PointCloud
    >>> pc = PointCloud(np.ones((2, 3)), np.full((2, 3), 7, np.uint8),
    ...                 np.ones(2, np.float32), np.zeros(2, np.float32))
    >>> p = pathlib.Path(tempfile.mkdtemp()) / "c.ply"
    >>> write_cloud_ply(p, pc)
    >>> read_ply(p)["red"].tolist()
    [7, 7]
    """
    n = len(cloud)
    verts = _vertex_records(
        cloud.points,
        cloud.normals,
        cloud.colors,
        cloud.confidence,
        cloud.sigma_z,
        np.zeros(n, np.uint8),
    )
    _write(path, _header(n, None, "stereomesh point cloud", scale), verts, None)


def _parse_header(fh, path: Path):
    first = fh.readline()
    if first.strip() != b"ply":
        raise InputError(f"{path}: not a PLY file (no 'ply' magic line)")
    fmt = None
    elements = []  # [name, count, [(prop_name, dtype) | (prop_name, count_dtype, item_dtype)]]
    while True:
        line = fh.readline()
        if not line:
            raise InputError(f"{path}: PLY header has no end_header line")
        words = line.decode("ascii", "replace").split()
        if not words or words[0] in ("comment", "obj_info"):
            continue
        if words[0] == "end_header":
            break
        if words[0] == "format":
            fmt = words[1]
        elif words[0] == "element":
            elements.append([words[1], int(words[2]), []])
        elif words[0] == "property":
            if not elements:
                raise InputError(f"{path}: PLY property before any element")
            try:
                if words[1] == "list":
                    prop = (words[4], _PLY_TYPES[words[2]], _PLY_TYPES[words[3]])
                else:
                    prop = (words[2], _PLY_TYPES[words[1]])
            except (KeyError, IndexError) as exc:
                raise InputError(f"{path}: unsupported PLY property line {line!r}") from exc
            elements[-1][2].append(prop)
    if fmt not in ("binary_little_endian", "binary_big_endian"):
        raise InputError(f"{path}: PLY format {fmt!r} is not supported; give a binary PLY")
    return ("<" if fmt == "binary_little_endian" else ">"), elements


def _read_list_element(data: bytes, offset: int, count: int, props, endian: str, path: Path):
    """Read an element whose only property is a list, assuming one list length throughout."""
    if len(props) != 1:
        raise InputError(f"{path}: PLY elements mixing lists and scalars are not supported")
    name, cdt, idt = props[0]
    if count == 0:
        return name, np.zeros((0, 3), np.int64), offset
    n0 = int(np.frombuffer(data, endian + cdt, 1, offset)[0])
    rec = np.dtype([("n", endian + cdt), ("v", endian + idt, (n0,))])
    if offset + rec.itemsize * count > len(data):
        raise InputError(f"{path}: PLY file is truncated")
    arr = np.frombuffer(data, rec, count, offset)
    if not np.all(arr["n"] == n0):
        raise InputError(f"{path}: PLY faces of mixed sizes are not supported")
    return name, arr["v"].astype(np.int64), offset + rec.itemsize * count


def read_ply(path: str | os.PathLike) -> dict[str, np.ndarray]:
    """Read a binary PLY file into arrays.

    Parameters
    ----------
    path : str or path-like

    Returns
    -------
    dict of str to ndarray
        One (N,) array per vertex property, by its name and with the file's
        type (e.g. ``x`` float32, ``red`` uint8), and ``faces`` as (F, k)
        int32 when the file has a face element (k = 3 for triangles).

    Raises
    ------
    InputError
        If the file is missing, ASCII, truncated or uses polygons of mixed sizes.

    Examples
    --------
    See :func:`write_mesh_ply`.
    """
    path = Path(path)
    if not path.is_file():
        raise InputError(f"{path}: PLY file not found")
    with open(path, "rb") as fh:
        endian, elements = _parse_header(fh, path)
        data = fh.read()
    out: dict[str, np.ndarray] = {}
    offset = 0
    for name, count, props in elements:
        if any(len(p) == 3 for p in props):
            _, values, offset = _read_list_element(data, offset, count, props, endian, path)
            if name == "face":
                out["faces"] = values.astype(np.int32)
            continue
        dt = np.dtype([(p[0], endian + p[1]) for p in props])
        if offset + dt.itemsize * count > len(data):
            raise InputError(f"{path}: PLY file is truncated in element {name!r}")
        arr = np.frombuffer(data, dt, count, offset)
        offset += dt.itemsize * count
        if name == "vertex":
            for p in props:
                out[p[0]] = arr[p[0]].astype(arr[p[0]].dtype.newbyteorder("="))
    return out


def write_exchange_cloud_ply(path: str | os.PathLike, cloud, *, scale: str = "metric") -> None:
    """Write a cloud as :func:`write_cloud_ply` does, plus its source pixels.

    The editor plugin keeps each point's left-image pixel so that a cloud edited
    in the editor can still be meshed as a depth grid. The pixel travels as two
    extra vertex properties, ``col`` and ``row`` (int), after the standard ones;
    readers that ignore unknown properties read the file as a plain cloud.

    Parameters
    ----------
    path : str or path-like
        Target file; written atomically.
    cloud : PointCloud
        Without ``pixels`` the file is exactly :func:`write_cloud_ply`'s.
    scale : str
        ``"metric"`` or ``"unscaled"``, stated in the header as :func:`write_cloud_ply` does.

    Examples
    --------
    >>> import numpy as np, tempfile, pathlib
    >>> from stereomesh.geometry.data import PointCloud
    >>> pc = PointCloud(np.ones((2, 3)), np.zeros((2, 3), np.uint8), np.ones(2, np.float32),
    ...                 np.zeros(2, np.float32), pixels=np.array([[3, 4], [5, 6]]))
    >>> p = pathlib.Path(tempfile.mkdtemp()) / "c.ply"
    >>> write_exchange_cloud_ply(p, pc)
    >>> read_cloud_ply(p).pixels.tolist()
    [[3, 4], [5, 6]]
    """
    if cloud.pixels is None:
        write_cloud_ply(path, cloud, scale=scale)
        return
    n = len(cloud)
    base = _vertex_records(cloud.points, cloud.normals, cloud.colors, cloud.confidence,
                           cloud.sigma_z, np.zeros(n, np.uint8))
    dtype = np.dtype(base.dtype.descr + [("col", "<i4"), ("row", "<i4")])
    rec = np.empty(n, dtype)
    for name in base.dtype.names:
        rec[name] = base[name]
    rec["col"], rec["row"] = cloud.pixels[:, 0], cloud.pixels[:, 1]
    header = _header(n, None, "stereomesh point cloud", scale).decode("ascii")
    header = header.replace("end_header\n", "property int col\nproperty int row\nend_header\n")
    _write(path, header.encode("ascii"), rec, None)


def _vertex_fields(data: dict[str, np.ndarray], path: Path):
    """Positions, colours, confidence, sigma_z, normals of a read PLY, with defaults."""
    missing = [k for k in ("x", "y", "z") if k not in data]
    if missing:
        raise InputError(f"{path}: PLY vertices lack {', '.join(missing)}; give a point file")
    points = np.stack([data["x"], data["y"], data["z"]], axis=1).astype(np.float64)
    n = len(points)
    if all(k in data for k in ("red", "green", "blue")):
        colors = np.stack([data["red"], data["green"], data["blue"]], axis=1)
        if colors.dtype != np.uint8:  # 16-bit or float colours: bring them to bytes
            top = 65535.0 if np.issubdtype(colors.dtype, np.integer) and colors.max() > 255 \
                else (1.0 if np.issubdtype(colors.dtype, np.floating) else 255.0)
            colors = np.clip(colors / top * 255.0 + 0.5, 0, 255).astype(np.uint8)
    else:
        colors = np.full((n, 3), 200, np.uint8)
    confidence = data.get("confidence", np.ones(n, np.float32))
    sigma_z = data.get("sigma_z", np.zeros(n, np.float32))
    normals = None
    if all(k in data for k in ("nx", "ny", "nz")):
        normals = np.stack([data["nx"], data["ny"], data["nz"]], axis=1)
    return points, colors, confidence, sigma_z, normals


def read_cloud_ply(path: str | os.PathLike):
    """Read a binary PLY's vertices as a :class:`~stereomesh.geometry.data.PointCloud`.

    Parameters
    ----------
    path : str or path-like
        Needs ``x y z``; colours default to light grey, ``confidence`` to 1,
        ``sigma_z`` to 0; ``col``/``row`` become ``pixels`` when present. Faces
        are ignored.

    Returns
    -------
    PointCloud

    Raises
    ------
    InputError
        If the file is not a readable binary PLY with vertex positions.

    Examples
    --------
    See :func:`write_exchange_cloud_ply`.
    """
    from stereomesh.geometry.data import PointCloud

    path = Path(path)
    data = read_ply(path)
    points, colors, confidence, sigma_z, normals = _vertex_fields(data, path)
    pixels = None
    if "col" in data and "row" in data:
        pixels = np.stack([data["col"], data["row"]], axis=1).astype(np.int32)
    return PointCloud(points, colors, confidence, sigma_z, normals=normals, pixels=pixels)


def read_mesh_ply(path: str | os.PathLike):
    """Read a binary triangle PLY as a :class:`~stereomesh.geometry.data.TriMesh`.

    Parameters
    ----------
    path : str or path-like
        Vertex fields as in :func:`read_cloud_ply`; ``filled`` defaults to 0.

    Returns
    -------
    TriMesh

    Raises
    ------
    InputError
        If the file has no vertex positions or its faces are not triangles.

    Examples
    --------
    >>> import numpy as np, tempfile, pathlib
    >>> from stereomesh.geometry.data import TriMesh
    >>> m = TriMesh(np.eye(3), np.array([[0, 1, 2]]), np.zeros((3, 3), np.uint8),
    ...             np.ones(3, np.float32), np.zeros(3, np.float32), np.array([0, 1, 0], np.uint8))
    >>> p = pathlib.Path(tempfile.mkdtemp()) / "m.ply"
    >>> write_mesh_ply(p, m)
    >>> read_mesh_ply(p).filled.tolist()
    [0, 1, 0]
    """
    from stereomesh.geometry.data import TriMesh

    path = Path(path)
    data = read_ply(path)
    points, colors, confidence, sigma_z, normals = _vertex_fields(data, path)
    faces = data.get("faces", np.zeros((0, 3), np.int32))
    if faces.ndim != 2 or (faces.size and faces.shape[1] != 3):
        raise InputError(f"{path}: faces have {faces.shape[1]} corners; triangulate the mesh")
    if faces.size and (faces.min() < 0 or faces.max() >= len(points)):
        raise InputError(f"{path}: faces index vertices that do not exist")
    filled = data.get("filled", np.zeros(len(points), np.uint8)).astype(np.uint8)
    return TriMesh(points, faces, colors, confidence, sigma_z, filled, normals=normals)
