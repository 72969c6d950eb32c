"""The binary PLY files exchanged with the worker, read and written with numpy only.

The add-on cannot import the core (its dependencies would clash with the
editor's own), so it carries this small reader and writer of the one layout
the core uses: little-endian scalar vertex properties and triangle faces
(``property list uchar int vertex_indices``).
"""

from __future__ import annotations

import numpy as np

_TYPES = {
    "char": "i1", "int8": "i1", "uchar": "u1", "uint8": "u1", "short": "i2", "int16": "i2",
    "ushort": "u2", "uint16": "u2", "int": "i4", "int32": "i4", "uint": "u4", "uint32": "u4",
    "float": "f4", "float32": "f4", "double": "f8", "float64": "f8",
}
_NAMES = {"f4": "float", "u1": "uchar", "i4": "int"}


def read_ply(path) -> dict:
    """Vertex properties by name (1-D arrays) and ``faces`` (F, 3) int32 when present.

    Raises
    ------
    ValueError
        For ASCII files, polygons other than triangles, or a truncated file.
    """
    with open(path, "rb") as fh:
        if fh.readline().strip() != b"ply":
            raise ValueError(f"{path}: not a PLY file")
        endian, elements = "<", []
        while True:
            line = fh.readline()
            if not line:
                raise ValueError(f"{path}: PLY header has no end_header")
            words = line.decode("ascii", "replace").split()
            if not words or words[0] in ("comment", "obj_info"):
                continue
            if words[0] == "end_header":
                break
            if words[0] == "format":
                if words[1] not in ("binary_little_endian", "binary_big_endian"):
                    raise ValueError(f"{path}: only binary PLY files are read")
                endian = "<" if words[1] == "binary_little_endian" else ">"
            elif words[0] == "element":
                elements.append((words[1], int(words[2]), []))
            elif words[0] == "property":
                if words[1] == "list":
                    elements[-1][2].append((words[4], _TYPES[words[2]], _TYPES[words[3]]))
                else:
                    elements[-1][2].append((words[2], _TYPES[words[1]]))
        data = fh.read()
    out, offset = {}, 0
    for name, count, props in elements:
        if any(len(p) == 3 for p in props):
            _, cdt, idt = props[0]
            rec = np.dtype([("n", endian + cdt), ("v", endian + idt, (3,))])
            arr = np.frombuffer(data, rec, count, offset)
            if count and not np.all(arr["n"] == 3):
                raise ValueError(f"{path}: only triangle faces are read")
            offset += rec.itemsize * count
            if name == "face":
                out["faces"] = arr["v"].astype(np.int32)
            continue
        rec = np.dtype([(p[0], endian + p[1]) for p in props])
        if offset + rec.itemsize * count > len(data):
            raise ValueError(f"{path}: PLY file is truncated")
        arr = np.frombuffer(data, rec, count, offset)
        offset += rec.itemsize * count
        if name == "vertex":
            for p in props:
                column = arr[p[0]]
                out[p[0]] = column.astype(column.dtype.newbyteorder("="))
    return out


def write_ply(path, fields: dict, faces=None) -> None:
    """Write vertex ``fields`` (name -> (N,) array of float32, uint8 or int32) and faces.

    Field order is kept; ``faces`` is (F, 3) integer or None for a cloud.
    """
    names = list(fields)
    n = len(fields[names[0]]) if names else 0
    dtype = np.dtype([(k, "<" + np.asarray(fields[k]).dtype.str[1:]) for k in names])
    rec = np.empty(n, dtype)
    for k in names:
        rec[k] = fields[k]
    lines = ["ply", "format binary_little_endian 1.0", "comment written by the stereomesh add-on",
             f"element vertex {n}"]
    lines += [f"property {_NAMES[dtype[k].str[1:]]} {k}" for k in names]
    if faces is not None:
        lines += [f"element face {len(faces)}", "property list uchar int vertex_indices"]
    lines.append("end_header")
    with open(path, "wb") as fh:
        fh.write(("\n".join(lines) + "\n").encode("ascii"))
        rec.tofile(fh)
        if faces is not None:
            frec = np.empty(len(faces), [("n", "u1"), ("v", "<i4", (3,))])
            frec["n"] = 3
            frec["v"] = faces
            frec.tofile(fh)
