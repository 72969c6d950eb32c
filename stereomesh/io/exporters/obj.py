"""Wavefront OBJ + MTL + texture PNG, with vertex colours.

Positions are written y up (see the package docstring), with the common
``v x y z r g b`` extension for vertex colours (0–1) that most readers take.
Texture coordinates come from the mesh (the grid mesh has them) or from
projecting the vertices into the left image; the texture is that image.
"""

from __future__ import annotations

import numpy as np

from stereomesh.io.exporters import Y_UP_FRAME, y_up

KIND = "mesh"
SUFFIX = ".obj"
DESCRIPTION = "OBJ mesh with an MTL material and the left image as texture"
FRAME = Y_UP_FRAME


def write(path, mesh, *, image=None, rig=None, scale="metric") -> dict:
    from pathlib import Path

    from stereomesh.io.atomic import atomic_path, write_text_atomic
    from stereomesh.io.images import write_png

    path = Path(path)
    uv = mesh.uv
    if uv is None and image is not None and rig is not None:
        from stereomesh.geometry.texture import project_uv

        uv = project_uv(mesh.vertices, rig, image.shape[1], image.shape[0])
    files = [str(path)]
    header = [f"# stereomesh mesh, {FRAME}",
              "# lengths: " + ("metres" if scale == "metric" else "unscaled (nominal baseline)")]
    if uv is not None and image is not None:
        texture = path.with_name(path.stem + "_texture.png")
        material = path.with_suffix(".mtl")
        write_png(texture, np.ascontiguousarray(image))
        write_text_atomic(material, f"newmtl stereomesh\nKa 1 1 1\nKd 1 1 1\nKs 0 0 0\n"
                                    f"illum 1\nmap_Kd {texture.name}\n")
        header += [f"mtllib {material.name}", "usemtl stereomesh"]
        files += [str(material), str(texture)]
    else:
        uv = None
    pos = y_up(mesh.vertices)
    rgb = mesh.colors.astype(np.float64) / 255.0
    lines = ["\n".join(header)]
    lines.append("\n".join(
        f"v {x:.7g} {y:.7g} {z:.7g} {r:.4g} {g:.4g} {b:.4g}"
        for (x, y, z), (r, g, b) in zip(pos, rgb, strict=True)))
    if uv is not None:
        lines.append("\n".join(f"vt {u:.6f} {v:.6f}" for u, v in uv))
    f = mesh.faces + 1
    if uv is not None:
        lines.append("\n".join(f"f {a}/{a} {b}/{b} {c}/{c}" for a, b, c in f))
    else:
        lines.append("\n".join(f"f {a} {b} {c}" for a, b, c in f))
    with atomic_path(path) as tmp:
        tmp.write_text("\n".join(lines) + "\n", encoding="ascii")
    return {"files": files, "vertices": len(pos), "faces": len(f), "textured": uv is not None}
