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
                 "pymeshlab", "pillow", "vtk", "trimesh", "laspy", "pye57"):
        try:
            out[dist] = metadata.version(dist)
        except metadata.PackageNotFoundError:
            pass
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
