"""PLY meshes (binary, vertex colours, confidence, sigma_z, filled): see ``io/ply.py``."""

from __future__ import annotations

from stereomesh.io.exporters import CAMERA_FRAME

KIND = "mesh"
SUFFIX = ".ply"
DESCRIPTION = "binary PLY mesh with colours, confidence, sigma_z and filled flags"
FRAME = CAMERA_FRAME


def write(path, mesh, *, image=None, rig=None, scale="metric") -> dict:
    from stereomesh.io.ply import write_mesh_ply

    write_mesh_ply(path, mesh, scale=scale)
    return {"files": [str(path)], "vertices": len(mesh.vertices), "faces": len(mesh.faces)}
