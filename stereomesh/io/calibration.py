"""Calibration files (JSON).

Rectified form (fixed by the design)::

    {"rectified": true, "image_size": [W, H], "focal_px": f, "cx": cx, "cy": cy,
     "baseline": B, "doffs": 0.0, "units": "m"}

``units`` may be ``"m"`` (metric) or ``"unscaled"`` (baseline nominal). The full
form with intrinsics, distortion, R and T arrives with calibrated rectification.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

from stereomesh.errors import InputError
from stereomesh.rectify import RectifiedRig

_REQUIRED = ("image_size", "focal_px", "cx", "cy", "baseline")


def rig_from_dict(data: dict, source: str = "calibration") -> RectifiedRig:
    """Build a :class:`RectifiedRig` from the rectified JSON form, checking every field."""
    if not isinstance(data, dict):
        raise InputError(f"{source}: expected a JSON object")
    if data.get("rectified") is not True:
        raise InputError(
            f"{source}: only the rectified form is read so far; set \"rectified\": true "
            "with focal_px, cx, cy, baseline and image_size"
        )
    missing = [k for k in _REQUIRED if k not in data]
    if missing:
        raise InputError(f"{source}: missing field(s) {', '.join(missing)}")
    size = data["image_size"]
    if not (isinstance(size, list | tuple) and len(size) == 2 and all(int(v) > 0 for v in size)):
        raise InputError(f"{source}: image_size must be [width, height] in pixels")
    try:
        values = {k: float(data[k]) for k in ("focal_px", "cx", "cy", "baseline")}
        doffs = float(data.get("doffs", 0.0))
    except (TypeError, ValueError):
        raise InputError(
            f"{source}: focal_px, cx, cy, baseline and doffs must be numbers"
        ) from None
    if not all(math.isfinite(v) for v in [*values.values(), doffs]):
        raise InputError(f"{source}: calibration values must be finite")
    if values["focal_px"] <= 0 or values["baseline"] <= 0:
        raise InputError(f"{source}: focal_px and baseline must be positive")
    units = str(data.get("units", "m"))
    return RectifiedRig(
        focal_px=values["focal_px"],
        cx=values["cx"],
        cy=values["cy"],
        baseline=values["baseline"],
        doffs=doffs,
        image_size=(int(size[0]), int(size[1])),
        units=units,
        metric=units == "m",
    )


def read_calibration(path: str | Path) -> RectifiedRig:
    """Read a calibration JSON file."""
    path = Path(path)
    if not path.is_file():
        raise InputError(f"{path}: calibration file not found; check --calib")
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise InputError(f"{path}: not valid JSON ({exc})") from None
    return rig_from_dict(data, str(path))


def check_image_size(rig: RectifiedRig, width: int, height: int, calib_path, image_path) -> None:
    """Raise :class:`InputError` when the images do not have the calibrated size."""
    if tuple(rig.image_size) != (width, height):
        raise InputError(
            f"{calib_path}: calibrated for {rig.image_size[0]}x{rig.image_size[1]} but "
            f"{image_path} is {width}x{height}; use the calibration of this camera or resize"
        )


def write_calibration(path: str | Path, rig: RectifiedRig) -> None:
    """Write the rectified JSON form atomically."""
    from stereomesh.io.atomic import write_text_atomic

    write_text_atomic(path, json.dumps(rig.to_dict(), indent=2) + "\n")
