"""Export formats: one module per format; the module's name is the ``--format`` choice.

Each module declares ``KIND`` (``"mesh"`` or ``"cloud"``: what it writes),
``SUFFIX``, ``DESCRIPTION``, ``FRAME`` (the coordinate frame of its files) and
``write(path, geometry, *, image=None, rig=None, scale="metric") -> dict``.
:func:`names` lists the modules without importing them, so the parameter schema
can validate ``--format`` at start-up; :func:`export` imports one lazily.

Frames: the core works in the left camera frame of OpenCV (x right, y down,
z forward, metres). Formats whose readers expect y up (OBJ, glTF) are turned
180° about x (x right, y up, the camera looking along −z); survey formats (LAS,
E57) keep the camera frame. Every record says which frame its file uses.
"""

from __future__ import annotations

import importlib
import pkgutil
from pathlib import Path

CAMERA_FRAME = "left camera, x right, y down, z forward (OpenCV), metres"
Y_UP_FRAME = "left camera turned 180 deg about x: x right, y up, camera looking along -z, metres"


def names() -> tuple[str, ...]:
    """The export format names, sorted (module names of this package).

    Examples
    --------
    >>> names()
    ('e57', 'glb', 'las', 'obj', 'ply')
    """
    return tuple(sorted(m.name for m in pkgutil.iter_modules(__path__)
                        if not m.name.startswith("_")))


def get(name: str):
    """The exporter module of ``name`` (imported on first use)."""
    if name not in names():
        raise ValueError(f"unknown export format {name!r}; known: {', '.join(names())}")
    return importlib.import_module(f"{__name__}.{name}")


def export(name: str, out_dir: str | Path, *, mesh=None, cloud=None, image=None, rig=None,
           scale: str = "metric", stem: str | None = None) -> dict:
    """Write ``mesh`` or ``cloud`` (whichever the format takes) as ``out_dir/STEM.SUFFIX``.

    Parameters
    ----------
    name : str
        One of :func:`names`.
    out_dir : str or Path
    mesh : TriMesh, optional
    cloud : PointCloud, optional
    image : (H, W, 3) uint8, optional
        The rectified left image (texture of OBJ).
    rig : RectifiedRig, optional
        Projects vertices into ``image`` when the mesh has no texture coordinates.
    scale : {"metric", "unscaled"}
    stem : str, optional
        File name without suffix; ``mesh`` or ``cloud`` by default.

    Returns
    -------
    dict
        ``files`` written, ``frame``, ``kind`` and the format's own figures.
    """
    module = get(name)
    geometry = mesh if module.KIND == "mesh" else cloud
    if geometry is None:
        raise ValueError(f"format {name!r} writes a {module.KIND}, and none was given")
    path = Path(out_dir) / f"{stem or module.KIND}{module.SUFFIX}"
    record = module.write(path, geometry, image=image, rig=rig, scale=scale)
    return {"kind": module.KIND, "frame": module.FRAME, **record}


def y_up(points):
    """Camera-frame points (y down, z forward) turned 180° about x (y up, −z forward)."""
    import numpy as np

    out = np.array(points, np.float64, copy=True)
    out[:, 1:] *= -1.0
    return out
