"""Calibration files (JSON).

Rectified form (fixed by the design)::

    {"rectified": true, "image_size": [W, H], "focal_px": f, "cx": cx, "cy": cy,
     "baseline": B, "doffs": 0.0, "units": "m"}

``units`` names the unit of ``baseline``: ``"m"`` (also ``"metre"``, ``"meter"``
and their plurals), ``"cm"`` or ``"mm"`` (converted to metres, the unit of every
output), or ``"unscaled"`` when the baseline is nominal and the scale unknown.
``image_size`` holds two positive whole numbers.

Full form (a calibrated rig, rectified on reading with OpenCV)::

    {"rectified": false, "image_size": [W, H], "units": "m",
     "left":  {"K": [[fx, 0, cx], [0, fy, cy], [0, 0, 1]], "dist": [k1, k2, p1, p2, k3]},
     "right": {"K": [[...], [...], [...]], "dist": [...]},
     "R": [[...], [...], [...]], "T": [tx, ty, tz]}

``K`` is each camera's 3x3 intrinsic matrix in pixels; ``dist`` its distortion
coefficients in OpenCV's order (4, 5, 8, 12 or 14 numbers; ``[]`` for none);
``R`` (3x3 rotation) and ``T`` (3 numbers, in ``units``) take a point from left-
camera to right-camera coordinates, ``X_right = R X_left + T``, the convention of
``cv2.stereoCalibrate`` (a right camera 10 cm to the right has ``T = [-0.1, 0, 0]``
in metres). ``units`` follows the rectified form's rules. OpenCV FileStorage files
(``.yml``, ``.yaml``, ``.xml``) with nodes ``K1``/``M1``, ``D1``, ``K2``/``M2``, ``D2``,
``R``, ``T`` and ``image_size`` (or ``width`` and ``height``) are read too; their
``T`` is taken in metres unless a ``units`` string node says otherwise.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

from stereomesh.errors import InputError
from stereomesh.rectify import RectifiedRig, StereoCalibration

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
            f"{source}: not the rectified form; set \"rectified\": true with focal_px, cx, "
            "cy, baseline and image_size, or give the full form (\"rectified\": false, "
            "left/right K and dist, R, T)"
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
    stds = {}
    for key in ("baseline_std", "focal_std_px"):
        value = data.get(key)
        if value is None:
            stds[key] = None
            continue
        if isinstance(value, bool) or not isinstance(value, int | float) or not (
                math.isfinite(value) and value >= 0):
            raise InputError(f"{source}: {key} must be a number >= 0, got {value!r}")
        stds[key] = float(value)
    if stds["baseline_std"] is not None:
        stds["baseline_std"] *= metres or 1.0
    return RectifiedRig(
        focal_px=values["focal_px"],
        cx=values["cx"],
        cy=values["cy"],
        baseline=values["baseline"] * (metres or 1.0),
        doffs=values["doffs"],
        image_size=size,
        units="m" if metres else "unscaled",
        metric=metres is not None,
        **stds,
    )


def _matrix(value, shape, field: str, source: str):
    import numpy as np

    what = "x".join(map(str, shape))
    try:
        arr = np.array(value, dtype=np.float64)
    except (TypeError, ValueError):
        raise InputError(f"{source}: {field} must be a {what} array of numbers, "
                         f"got {value!r}") from None
    if arr.shape != shape and not (len(shape) == 1 and arr.size == shape[0]):
        raise InputError(f"{source}: {field} must be {what} numbers, got shape {arr.shape}")
    if not np.isfinite(arr).all():
        raise InputError(f"{source}: {field} must hold finite numbers")
    return arr.reshape(shape)


def _camera(data, side: str, source: str):
    import numpy as np

    if not isinstance(data, dict):
        raise InputError(f"{source}: {side} must be an object with K and dist")
    if "K" not in data:
        raise InputError(f"{source}: missing field {side}.K (3x3 intrinsic matrix, pixels)")
    K = _matrix(data["K"], (3, 3), f"{side}.K", source)
    if K[0, 0] <= 0 or K[1, 1] <= 0 or abs(K[2, 2] - 1) > 1e-9 or np.any(K[2, :2] != 0):
        raise InputError(f"{source}: {side}.K must be [[fx, s, cx], [0, fy, cy], [0, 0, 1]] "
                         "with positive fx and fy")
    dist = np.array(data.get("dist", []) or [], dtype=np.float64).ravel() \
        if isinstance(data.get("dist", []), list) else None
    if dist is None or dist.size not in (0, 4, 5, 8, 12, 14) or not np.isfinite(dist).all():
        raise InputError(f"{source}: {side}.dist must be a list of 0, 4, 5, 8, 12 or 14 "
                         f"numbers in OpenCV's order (k1 k2 p1 p2 k3 ...), got "
                         f"{data.get('dist')!r}")
    return K, (dist if dist.size else np.zeros(5))


def calibration_from_dict(data: dict, source: str = "calibration") -> StereoCalibration:
    """Build a :class:`StereoCalibration` from the full JSON form, checking every field."""
    import numpy as np

    if not isinstance(data, dict):
        raise InputError(f"{source}: expected a JSON object")
    missing = [k for k in ("image_size", "left", "right", "R", "T") if k not in data]
    if missing:
        raise InputError(f"{source}: missing field(s) {', '.join(missing)} of the full form")
    size = _image_size(data["image_size"], source)
    K1, d1 = _camera(data["left"], "left", source)
    K2, d2 = _camera(data["right"], "right", source)
    R = _matrix(data["R"], (3, 3), "R", source)
    if np.abs(R @ R.T - np.eye(3)).max() > 1e-4 or np.linalg.det(R) < 0:
        raise InputError(f"{source}: R must be a rotation matrix (orthonormal, determinant 1)")
    T = _matrix(data["T"], (3,), "T", source)
    if not np.linalg.norm(T) > 0:
        raise InputError(f"{source}: T must not be zero (the cameras need a baseline)")
    metres, _ = _units(data.get("units", "m"), source)
    return StereoCalibration(K1, d1, K2, d2, R, T * (metres or 1.0), size,
                             metric=metres is not None)


def calibration_to_dict(cal: StereoCalibration) -> dict:
    """The full JSON form of a calibration (lengths in metres, or unscaled)."""
    return {
        "rectified": False, "image_size": list(cal.image_size),
        "units": "m" if cal.metric else "unscaled",
        "left": {"K": cal.K1.tolist(), "dist": cal.dist1.ravel().tolist()},
        "right": {"K": cal.K2.tolist(), "dist": cal.dist2.ravel().tolist()},
        "R": cal.R.tolist(), "T": cal.T.ravel().tolist(),
    }


def _opencv_storage(path: Path) -> dict:
    """The nodes of an OpenCV FileStorage stereo calibration as the full JSON form."""
    import cv2

    try:
        fs = cv2.FileStorage(str(path), cv2.FILE_STORAGE_READ)
    except cv2.error as exc:
        raise InputError(f"{path}: not a readable OpenCV YAML/XML file ({exc.err})") from None
    try:
        def node(*names):
            for name in names:
                n = fs.getNode(name)
                if not n.empty():
                    return n
            return None

        def mat(*names):
            n = node(*names)
            if n is None:
                raise InputError(f"{path}: missing node {' or '.join(names)}")
            m = n.mat()
            return (m if m is not None else [n.at(i).real() for i in range(n.size())])

        size = node("image_size", "imageSize")
        if size is not None:
            m = size.mat()
            wh = list(m.ravel()) if m is not None else [size.at(i).real() for i in range(2)]
        elif node("width") is not None and node("height") is not None:
            wh = [node("width").real(), node("height").real()]
        else:
            raise InputError(f"{path}: missing node image_size (or width and height)")
        units = node("units")
        return {"rectified": False, "image_size": [float(v) for v in wh],
                "units": units.string() if units is not None else "m",
                "left": {"K": mat("K1", "M1", "cameraMatrix1").tolist(),
                         "dist": list(map(float, mat("D1", "dist1", "distCoeffs1").ravel()))},
                "right": {"K": mat("K2", "M2", "cameraMatrix2").tolist(),
                          "dist": list(map(float, mat("D2", "dist2", "distCoeffs2").ravel()))},
                "R": mat("R").tolist(), "T": list(map(float, mat("T").ravel()))}
    finally:
        fs.release()


def load_calibration(path: str | Path) -> RectifiedRig | StereoCalibration:
    """Read a calibration file in either form.

    Parameters
    ----------
    path : str or Path
        JSON (rectified or full form) or an OpenCV FileStorage ``.yml``/``.yaml``/``.xml``.

    Returns
    -------
    RectifiedRig or StereoCalibration
        A rig for the rectified form, a calibration to rectify with otherwise.
    """
    path = Path(path)
    if not path.is_file():
        raise InputError(f"{path}: calibration file not found; check --calib")
    if path.suffix.lower() in (".yml", ".yaml", ".xml"):
        return calibration_from_dict(_opencv_storage(path), str(path))
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise InputError(f"{path}: not valid JSON ({exc})") from None
    if isinstance(data, dict) and data.get("rectified") is False:
        return calibration_from_dict(data, str(path))
    return rig_from_dict(data, str(path))


def read_calibration(path: str | Path) -> RectifiedRig:
    """Read a calibration JSON file in the rectified form."""
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
