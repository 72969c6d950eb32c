"""Calibration files (JSON).

Rectified form (fixed by the design)::

    {"rectified": true, "image_size": [W, H], "focal_px": f, "cx": cx, "cy": cy,
     "baseline": B, "doffs": 0.0, "units": "m"}

``units`` names the unit of ``baseline``: ``"m"`` (also ``"metre"``, ``"meter"``
and their plurals), ``"cm"`` or ``"mm"`` (converted to metres, the unit of every
output), or ``"unscaled"`` when the baseline is nominal and the scale unknown.
``image_size`` holds two positive whole numbers. The full form with
intrinsics, distortion, R and T arrives with calibrated rectification.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

from stereomesh.errors import InputError
from stereomesh.rectify import RectifiedRig

_REQUIRED = ("image_size", "focal_px", "cx", "cy", "baseline")

UNITS_IN_METRES = {"m": 1.0, "metre": 1.0, "metres": 1.0, "meter": 1.0, "meters": 1.0,
                   "cm": 0.01, "mm": 0.001}
"""Baseline units read as metric, with their length in metres."""


def _image_size(value, source: str) -> tuple[int, int]:
    fix = f"{source}: image_size must be [width, height], two positive whole numbers of pixels"
    if not (isinstance(value, list | tuple) and len(value) == 2):
        raise InputError(f"{fix}; got {value!r}")
    size = []
    for v in value:
        if isinstance(v, bool) or not isinstance(v, int | float) or v != int(v) or v <= 0:
            raise InputError(f"{fix}; got {value!r}")
        size.append(int(v))
    return size[0], size[1]


def _units(value, source: str) -> tuple[float | None, str]:
    """Metres per baseline unit (None when unscaled) and the unit as written."""
    text = str(value).strip()
    if text == "unscaled":
        return None, text
    if text.lower() in UNITS_IN_METRES:
        return UNITS_IN_METRES[text.lower()], text
    raise InputError(
        f"{source}: units {value!r} is not known; give \"m\", \"cm\" or \"mm\" for the "
        "baseline's unit, or \"unscaled\" when the baseline is nominal"
    )


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
    size = _image_size(data["image_size"], source)
    values = {}
    for key in ("focal_px", "cx", "cy", "baseline", "doffs"):
        value = data.get(key, 0.0)
        if isinstance(value, bool) or not isinstance(value, int | float):
            raise InputError(f"{source}: {key} must be a number, got {value!r}")
        if not math.isfinite(value):
            raise InputError(f"{source}: {key} must be finite, got {value!r}")
        values[key] = float(value)
    if values["focal_px"] <= 0 or values["baseline"] <= 0:
        raise InputError(f"{source}: focal_px and baseline must be positive")
    metres, units = _units(data.get("units", "m"), source)
    return RectifiedRig(
        focal_px=values["focal_px"],
        cx=values["cx"],
        cy=values["cy"],
        baseline=values["baseline"] * (metres or 1.0),
        doffs=values["doffs"],
        image_size=size,
        units="m" if metres else "unscaled",
        metric=metres is not None,
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
