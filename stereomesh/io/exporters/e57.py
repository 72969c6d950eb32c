"""E57 point clouds (ASTM E2807, written with pye57): XYZ, colours, intensity.

Intensity carries the matching confidence (0–1). Coordinates are stored as
doubles in the left camera frame.
"""

from __future__ import annotations

import numpy as np

from stereomesh.io.exporters import CAMERA_FRAME

KIND = "cloud"
SUFFIX = ".e57"
DESCRIPTION = "E57 cloud with colours and confidence as intensity"
FRAME = CAMERA_FRAME


def write(path, cloud, *, image=None, rig=None, scale="metric") -> dict:
    import pye57

    from stereomesh.io.atomic import atomic_path

    data = {
        "cartesianX": np.ascontiguousarray(cloud.points[:, 0]),
        "cartesianY": np.ascontiguousarray(cloud.points[:, 1]),
        "cartesianZ": np.ascontiguousarray(cloud.points[:, 2]),
        "colorRed": np.ascontiguousarray(cloud.colors[:, 0]),
        "colorGreen": np.ascontiguousarray(cloud.colors[:, 1]),
        "colorBlue": np.ascontiguousarray(cloud.colors[:, 2]),
        "intensity": np.ascontiguousarray(cloud.confidence, np.float64),
    }
    with atomic_path(path) as tmp:
        tmp.unlink()  # pye57 creates the file itself
        e57 = pye57.E57(str(tmp), mode="w")
        try:
            e57.write_scan_raw(data, name="stereomesh cloud")
        finally:
            e57.close()
    return {"files": [str(path)], "points": len(cloud),
            "units": "metres" if scale == "metric" else "unscaled"}
