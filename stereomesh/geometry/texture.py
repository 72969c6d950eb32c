"""Texture coordinates for any mesh: its vertices projected into the left image."""

from __future__ import annotations

import numpy as np


def project_uv(vertices: np.ndarray, rig, width: int, height: int) -> np.ndarray:
    """Texture coordinates of camera-frame vertices in the left rectified image.

    A vertex ``(X, Y, Z)`` falls on pixel ``u = f X / Z + cx``, ``v = f Y / Z + cy``;
    texture coordinates address pixel centres in the OpenGL convention of
    :class:`~stereomesh.geometry.data.TriMesh` (origin bottom-left, v up), as the
    grid mesh's do. Vertices behind the camera get (0, 0).

    Parameters
    ----------
    vertices : (V, 3) float array
        Left camera frame, the rig's length unit.
    rig : RectifiedRig
    width, height : int
        Image size, pixels.

    Returns
    -------
    (V, 2) float32

    Examples
    --------
    >>> import numpy as np
    >>> from stereomesh.rectify import RectifiedRig
    >>> rig = RectifiedRig(focal_px=100.0, cx=1.5, cy=1.5, baseline=0.1)
    >>> project_uv(np.array([[0.0, 0.0, 2.0]]), rig, 4, 4).tolist()
    [[0.5, 0.5]]
    """
    v = np.asarray(vertices, np.float64)
    z = v[:, 2]
    with np.errstate(divide="ignore", invalid="ignore"):
        u = rig.focal_px * v[:, 0] / z + rig.cx
        r = rig.focal_px * v[:, 1] / z + rig.cy
    uv = np.zeros((len(v), 2), np.float32)
    front = z > 0
    uv[front, 0] = (u[front] + 0.5) / width
    uv[front, 1] = 1.0 - (r[front] + 0.5) / height
    return uv
