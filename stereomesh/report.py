"""The provenance record (``report.json``) that archives keep beside every result.

A :class:`Report` gathers the inputs with their SHA-256, every parameter,
software versions, each stage's timing and figures, warnings, outputs and
peak memory. The front doors fill it from a
:class:`~stereomesh.pipeline.Reconstruction` and write it last, atomically.
"""

from __future__ import annotations

import hashlib
import json
import platform
import resource
import sys
import time
from collections.abc import Sequence
from importlib import metadata
from pathlib import Path

import numpy as np

from stereomesh import CAUTION, __version__
from stereomesh.params import Params


def sha256_of(path: str | Path) -> str:
    """SHA-256 of a file's bytes, hex."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def input_records(sources: Sequence[Path]) -> list[dict]:
    """``[{"path", "sha256"}]`` of the files a pair was read from."""
    return [{"path": str(p), "sha256": sha256_of(p)} for p in sources if Path(p).is_file()]


def peak_memory_mb() -> float:
    """Peak resident memory of this process so far, MB."""
    usage = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return usage / (1024.0 * 1024.0) if sys.platform == "darwin" else usage / 1024.0


def software_versions() -> dict[str, str]:
    """Versions of stereomesh, Python and the libraries that shape the results."""
    out = {"stereomesh": __version__, "python": platform.python_version()}
    for dist in ("numpy", "scipy", "numba", "opencv-python-headless", "open3d-cpu", "open3d",
                 "pymeshlab", "pillow", "trimesh", "laspy", "pye57"):
        try:
            out[dist] = metadata.version(dist)
        except metadata.PackageNotFoundError:
            pass
    return out


DEFAULT_SCALE_UNCERTAINTY = 0.01
"""Relative one-sigma scale uncertainty assumed when the calibration states none.

A rule of thumb (common practice, from memory, not measured here): a stereo
rig calibrated with a printed chessboard typically knows its baseline and
focal length to a few tenths of a per cent to about one per cent; 1 % is
stated as the default so that the figure errs on the side of caution.
"""


def accuracy_statement(rig, cloud, disparity=None, sigma_d_default: float = 0.25) -> dict:
    """The report's accuracy statement: matching uncertainty and, apart, the scale's.

    Parameters
    ----------
    rig : RectifiedRig
        ``baseline_std`` and ``focal_std_px`` give the scale uncertainty when
        stated, else :data:`DEFAULT_SCALE_UNCERTAINTY` is used and said so.
    cloud : PointCloud or None
        The cleaned cloud; its median depth and per-point ``sigma_z``.
    disparity : DisparityResult, optional
        Tells whether ``sigma_d`` came from the fit or is the constant.
    sigma_d_default : float
        The constant ``cloud.sigma_d`` (pixels) used without a per-pixel one.

    Returns
    -------
    dict
        ``median_depth``, ``depth_sigma_at_median_depth`` (from matching: the
        median disparity sigma through ``Z² σ_d / (f B)``), ``sigma_d_median_px``,
        ``sigma_d_source``, ``scale_uncertainty_relative`` and ``_source``,
        ``scale_sigma_at_median_depth``, and a ``note`` in words (lengths in the
        rig's unit).

    Examples
    --------
    >>> from stereomesh.rectify import RectifiedRig
    >>> rig = RectifiedRig(focal_px=700.0, cx=0.0, cy=0.0, baseline=0.4)
    >>> accuracy_statement(rig, None)["scale_uncertainty_relative"]
    0.01
    """
    out: dict = {}
    fb = rig.focal_px * rig.baseline
    if cloud is not None and len(cloud):
        z = cloud.points[:, 2].astype(np.float64)
        zm = float(np.median(z))
        sigma_d = cloud.sigma_z.astype(np.float64) * fb / (z * z)
        sd = float(np.median(sigma_d))
        out.update(median_depth=zm, sigma_d_median_px=sd,
                   depth_sigma_at_median_depth=zm * zm * sd / fb)
    per_pixel = disparity is not None and getattr(disparity, "sigma_d", None) is not None
    out["sigma_d_source"] = ("per pixel, from the alignment fit's residual and curvature"
                             if per_pixel else
                             f"constant cloud.sigma_d = {sigma_d_default:g} px")
    if not rig.metric:
        out.update(scale_uncertainty_relative=None,
                   scale_uncertainty_source="unscaled: the baseline is nominal, so the "
                   "scale is unknown and lengths are not measurements")
    else:
        parts = []
        if rig.baseline_std is not None:
            parts.append(rig.baseline_std / rig.baseline)
        if rig.focal_std_px is not None:
            parts.append(rig.focal_std_px / rig.focal_px)
        if parts:
            rel = float(np.sqrt(np.sum(np.square(parts))))
            source = "from the calibration's stated baseline and focal length uncertainty"
        else:
            rel = DEFAULT_SCALE_UNCERTAINTY
            source = ("a stated default: the calibration gives no baseline or focal length "
                      "uncertainty (add baseline_std and focal_std_px to it)")
        out.update(scale_uncertainty_relative=rel, scale_uncertainty_source=source)
        if "median_depth" in out:
            out["scale_sigma_at_median_depth"] = rel * out["median_depth"]
    out["note"] = (
        "sigma_z of each point is the matching uncertainty only. Errors of the calibration "
        "scale all lengths together (Z = f B / d: a baseline or focal length off by 1 % puts "
        "every depth off by 1 %), apart from and on top of sigma_z; rectification and lens "
        "model errors add more. " + CAUTION)
    return out


class Report:
    """Collects the provenance record as a job runs.

    Parameters
    ----------
    command : str
        The front door and command (``run``, ``disparity``, ``demo``, ``worker``...).
    params : Params
        Every parameter used (written in full).
    inputs : list of dict
        :func:`input_records` of the pair's files.
    """

    def __init__(self, command: str, params: Params, inputs: list[dict]):
        self.data: dict = {
            "version": __version__,
            "command": command,
            "status": "running",
            "inputs": inputs,
            "params": params.to_dict(),
            "scale": "unscaled",
            "stages": {},
            "outputs": {},
            "peak_memory_mb": 0.0,
            "warnings": [],
            "software": software_versions(),
            "caution": CAUTION,
        }
        self._t0 = time.perf_counter()

    def stage(self, name: str, seconds: float, **figures) -> None:
        self.data["stages"][name] = {"seconds": round(seconds, 4), **figures}

    def warn(self, message: str) -> None:
        if message not in self.data["warnings"]:
            self.data["warnings"].append(message)

    def output(self, key: str, path: Path) -> None:
        self.data["outputs"][key] = str(path)

    def add_reconstruction(self, result) -> None:
        """Stage figures, scale, pair figures and warnings of a (partial) reconstruction."""
        self.data["scale"] = result.scale
        if result.pair.info:
            self.data["pair"] = result.pair.info
        for name, figures in result.figures.items():
            self.data["stages"][name] = dict(figures)
        for message in result.warnings:
            self.warn(message)
        if result.cloud is not None:
            self.data["accuracy"] = accuracy_statement(
                result.pair.rig, result.cloud, result.disparity, result.params.cloud.sigma_d)

    def fail(self, stage: str, exc: BaseException) -> None:
        """Mark the record failed at ``stage`` with the reason."""
        self.data["failed_stage"] = stage
        self.warn(f"stage {stage} failed: {type(exc).__name__}: {exc}")

    def finish(self, path: Path, status: str = "ok") -> dict:
        """Close the record (status, total time, peak memory) and write it atomically."""
        from stereomesh.io.atomic import write_text_atomic

        self.data["status"] = status
        self.data["total_seconds"] = round(time.perf_counter() - self._t0, 3)
        self.data["peak_memory_mb"] = round(peak_memory_mb(), 1)
        write_text_atomic(path, json.dumps(jsonable(self.data), indent=2) + "\n")
        return self.data


def jsonable(obj):
    """``obj`` with numpy scalars, paths and non-finite floats made JSON-safe."""
    if isinstance(obj, dict):
        return {str(k): jsonable(v) for k, v in obj.items()}
    if isinstance(obj, list | tuple):
        return [jsonable(v) for v in obj]
    if isinstance(obj, np.generic):
        obj = obj.item()
    if isinstance(obj, float) and not np.isfinite(obj):
        return None
    if isinstance(obj, Path):
        return str(obj)
    return obj
