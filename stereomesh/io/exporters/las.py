"""LAS 1.4 point clouds (laspy): RGB, confidence and sigma_z as extra bytes.

Coordinates are stored as integers times a scale of 0.1 mm plus an offset at
the cloud's minimum corner (both recorded), so metre-range clouds keep full
precision. The frame is the left camera's (a survey tool places it).
"""

from __future__ import annotations

import numpy as np

from stereomesh.io.exporters import CAMERA_FRAME

KIND = "cloud"
SUFFIX = ".las"
DESCRIPTION = "LAS 1.4 cloud with RGB, confidence and sigma_z"
FRAME = CAMERA_FRAME
SCALE = 1e-4
"""Coordinate resolution, metres (0.1 mm)."""


def write(path, cloud, *, image=None, rig=None, scale="metric") -> dict:
    import laspy

    from stereomesh.io.atomic import atomic_path

    header = laspy.LasHeader(point_format=7, version="1.4")
    offset = np.floor(cloud.points.min(axis=0)) if len(cloud) else np.zeros(3)
    header.offsets = offset
    header.scales = np.full(3, SCALE)
    header.add_extra_dims([
        laspy.ExtraBytesParams(name="confidence", type=np.float32,
                               description="matching confidence 0-1"),
        laspy.ExtraBytesParams(name="sigma_z", type=np.float32,
                               description="1-sigma depth uncertainty m"),
    ])
    las = laspy.LasData(header)
    las.x, las.y, las.z = cloud.points[:, 0], cloud.points[:, 1], cloud.points[:, 2]
    # LAS colours are 16-bit.
    colours = cloud.colors.astype(np.uint16) * 257
    las.red, las.green, las.blue = colours[:, 0], colours[:, 1], colours[:, 2]
    las.confidence = cloud.confidence
    las.sigma_z = cloud.sigma_z
    with atomic_path(path) as tmp:
        las.write(str(tmp))
    return {"files": [str(path)], "points": len(cloud), "offset": offset.tolist(),
            "scale": [SCALE] * 3, "units": "metres" if scale == "metric" else "unscaled"}
