"""glTF 2.0 binary (GLB) with vertex colours (COLOR_0), metres, +Y up (via trimesh)."""

from __future__ import annotations

import numpy as np

from stereomesh.io.exporters import Y_UP_FRAME, y_up

KIND = "mesh"
SUFFIX = ".glb"
DESCRIPTION = "glTF 2.0 binary mesh with vertex colours, metres, y up"
FRAME = Y_UP_FRAME


def write(path, mesh, *, image=None, rig=None, scale="metric") -> dict:
    import trimesh

    from stereomesh.io.atomic import atomic_path

    rgba = np.concatenate([mesh.colors, np.full((len(mesh.colors), 1), 255, np.uint8)], axis=1)
    tm = trimesh.Trimesh(vertices=y_up(mesh.vertices), faces=mesh.faces, vertex_colors=rgba,
                         process=False)
    data = tm.export(file_type="glb")
    with atomic_path(path) as tmp:
        tmp.write_bytes(data)
    return {"files": [str(path)], "vertices": len(mesh.vertices), "faces": len(mesh.faces)}
