"""The stages chained: pair in, disparity, cloud, surface, repair, files and report out.

Pure stage functions live in ``matching/`` and ``geometry/``; this module
orders them, times them, collects their figures into the report and does the
file I/O through ``io/``. Every output is written atomically; when a stage
fails, the outputs of the stages before it stay on disk and the report is
written with ``"status": "failed"`` and the failing stage named.
"""

from __future__ import annotations

import hashlib
import json
import platform
import resource
import sys
import time
import traceback
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from importlib import metadata
from pathlib import Path

import numpy as np

from stereomesh import __version__
from stereomesh.errors import InputError
from stereomesh.params import Params
from stereomesh.rectify import RectifiedRig

Progress = Callable[[str, float], None]

CAUTION = (
    "Stereo-derived geometry is an estimate: every point carries a stated depth "
    "uncertainty (sigma_z). For structural, legal or survey use, defer to licensed "
    "surveyors and local codes."
)


@dataclass
class PairInput:
    """A rectified pair ready for the core: images, rig and where they came from."""

    left: np.ndarray
    right: np.ndarray
    rig: RectifiedRig
    sources: list[Path] = field(default_factory=list)


def _sha256(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def peak_memory_mb() -> float:
    """Peak resident memory of this process so far, MB."""
    usage = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return usage / (1024.0 * 1024.0) if sys.platform == "darwin" else usage / 1024.0


def software_versions() -> dict[str, str]:
    out = {"stereomesh": __version__, "python": platform.python_version()}
    for dist in ("numpy", "scipy", "numba", "opencv-python-headless", "open3d-cpu", "open3d",
                 "pymeshlab", "pillow", "pyvista"):
        try:
            out[dist] = metadata.version(dist)
        except metadata.PackageNotFoundError:
            pass
    return out


def load_pair(inputs: Sequence[str | Path], calib: str | Path | None) -> PairInput:
    """Read the input files and the calibration, checking sizes against each other."""
    from stereomesh.io.calibration import check_image_size, read_calibration
    from stereomesh.io.images import read_pair

    paths = [Path(p) for p in inputs]
    if len(paths) != 2:
        raise InputError(
            "give two image files (LEFT RIGHT); single MPO and side-by-side inputs "
            "are not supported yet"
        )
    if calib is None:
        raise InputError("--calib CALIB.json is required (the uncalibrated path is not built yet)")
    left, right = read_pair(paths[0], paths[1])
    rig = read_calibration(calib)
    check_image_size(rig, left.shape[1], left.shape[0], calib, paths[0])
    return PairInput(left, right, rig, [*paths, Path(calib)])


def load_pair_while_warming(inputs, calib, params: Params) -> tuple[PairInput, list[dict]]:
    """:func:`load_pair` and the input hashes, while the disparity kernels load.

    Loading compiled kernels takes the interpreter for a few tenths of a second
    in a fresh process; image decoding and hashing do not need it, so they run
    in a thread meanwhile. Errors of either surface here, as they would alone.
    """
    from concurrent.futures import ThreadPoolExecutor

    from stereomesh.matching.disparity import warm_up

    def read():
        pair = load_pair(inputs, calib)
        return pair, _input_records(pair.sources)

    with ThreadPoolExecutor(1) as pool:
        future = pool.submit(read)
        try:
            warm_up(params.disparity)
        finally:
            pair, records = future.result()
    return pair, records


def _input_records(sources: Sequence[Path]) -> list[dict]:
    return [{"path": str(p), "sha256": _sha256(p)} for p in sources if p.is_file()]


class Report:
    """Collects the provenance record as the stages run."""

    def __init__(self, command: str, params: Params, sources: Sequence[Path],
                 inputs: list[dict] | None = None):
        self.data: dict = {
            "version": __version__,
            "command": command,
            "status": "running",
            "inputs": _input_records(sources) if inputs is None else inputs,
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
        self.data["warnings"].append(message)

    def output(self, key: str, path: Path) -> None:
        self.data["outputs"][key] = str(path)

    def finish(self, path: Path, status: str = "ok") -> dict:
        from stereomesh.io.atomic import write_text_atomic

        self.data["status"] = status
        self.data["total_seconds"] = round(time.perf_counter() - self._t0, 3)
        self.data["peak_memory_mb"] = round(peak_memory_mb(), 1)
        write_text_atomic(path, json.dumps(_jsonable(self.data), indent=2) + "\n")
        return self.data


def _jsonable(obj):
    if isinstance(obj, dict):
        return {str(k): _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, list | tuple):
        return [_jsonable(v) for v in obj]
    if isinstance(obj, np.generic):
        obj = obj.item()
    if isinstance(obj, float) and not np.isfinite(obj):
        return None
    if isinstance(obj, Path):
        return str(obj)
    return obj


def write_disparity_outputs(out_dir: Path, result, report: Report) -> None:
    """``disparity.pfm``, ``confidence.pfm`` and ``occlusion.png`` on the left grid."""
    from stereomesh.io.images import write_png
    from stereomesh.io.pfm import write_pfm

    write_pfm(out_dir / "disparity.pfm", result.disparity)
    write_pfm(out_dir / "confidence.pfm", result.confidence)
    write_png(out_dir / "occlusion.png", result.classes)
    for name in ("disparity.pfm", "confidence.pfm", "occlusion.png"):
        report.output(name.split(".")[0], out_dir / name)


def disparity_stage(pair: PairInput, params: Params, report: Report, progress: Progress):
    """Run the disparity engine and record its figures (and the result's energy)."""
    from stereomesh.matching.disparity import compute_disparity

    t = time.perf_counter()
    result = compute_disparity(pair.left, pair.right, params.disparity, progress)
    figs = dict(result.figures)
    report.stage("disparity", time.perf_counter() - t, **figs)
    return result


def run_disparity(
    inputs: Sequence[str | Path],
    calib: str | Path | None,
    out_dir: str | Path,
    params: Params,
    progress: Progress | None = None,
    command: str = "disparity",
    previews: bool = False,
) -> dict:
    """The ``stereomesh disparity`` job: disparity outputs, the report, optional previews."""
    progress = progress or (lambda step, frac: None)
    out_dir = Path(out_dir)
    pair, records = load_pair_while_warming(inputs, calib, params)
    report = Report(command, params, pair.sources, records)
    report.data["scale"] = "metric" if pair.rig.metric else "unscaled"
    out_dir.mkdir(parents=True, exist_ok=True)
    try:
        result = disparity_stage(pair, params, report, progress)
        write_disparity_outputs(out_dir, result, report)
        if previews:
            _disparity_previews(out_dir, pair, result, report)
    except Exception:
        report.warn("failed: " + traceback.format_exc(limit=3).strip().splitlines()[-1])
        report.finish(out_dir / "report.json", status="failed")
        raise
    return report.finish(out_dir / "report.json")


def _disparity_previews(out_dir: Path, pair: PairInput, result, report: Report) -> None:
    from stereomesh.io.images import to_uint8

    t = time.perf_counter()
    pdir = out_dir / "previews"
    try:
        from stereomesh.io import previews

        previews.write_image_previews(
            pdir, to_uint8(pair.left), to_uint8(pair.right), result.disparity,
            result.confidence, result.classes,
        )
        report.output("previews", pdir)
    except Exception as exc:  # previews must never cost the user the results
        report.warn(f"previews not written: {exc}")
    report.data["stages"].setdefault("previews", {"seconds": 0.0})
    report.data["stages"]["previews"]["seconds"] = round(time.perf_counter() - t, 4)


def run_pipeline(
    inputs: Sequence[str | Path],
    calib: str | Path | None,
    out_dir: str | Path,
    params: Params,
    progress: Progress | None = None,
    command: str = "run",
) -> dict:
    """The ``stereomesh run`` job: disparity, cloud, mesh, exports, previews and report.

    Returns the report dictionary (also written to ``out_dir/report.json``).
    """
    from stereomesh.geometry.filters import filter_cloud
    from stereomesh.geometry.repair import repair_mesh
    from stereomesh.geometry.triangulate import triangulate
    from stereomesh.io.images import to_uint8
    from stereomesh.io.ply import write_cloud_ply, write_mesh_ply

    progress = progress or (lambda step, frac: None)
    out_dir = Path(out_dir)
    pair = load_pair(inputs, calib)
    report = Report(command, params, pair.sources)
    rig = pair.rig
    report.data["scale"] = "metric" if rig.metric else "unscaled"
    if not rig.metric:
        report.warn("baseline is nominal: lengths are unscaled, not metres")
    out_dir.mkdir(parents=True, exist_ok=True)
    stage = "disparity"
    try:
        def sub(lo, hi):
            return lambda step, frac: progress(step, lo + (hi - lo) * frac)

        result = disparity_stage(pair, params, report, sub(0.0, 0.5))
        write_disparity_outputs(out_dir, result, report)
        _disparity_previews(out_dir, pair, result, report)
        colour = to_uint8(pair.left)
        cp = params.cloud

        stage = "triangulate"
        progress("triangulate", 0.55)
        t = time.perf_counter()
        cloud = triangulate(result.disparity, rig, colour, result.confidence, sigma_d=cp.sigma_d)
        report.stage("triangulate", time.perf_counter() - t, points=len(cloud),
                     median_depth=float(np.median(cloud.points[:, 2])) if len(cloud) else None,
                     median_sigma_z=float(np.median(cloud.sigma_z)) if len(cloud) else None)

        stage = "filter_cloud"
        progress("filter cloud", 0.6)
        t = time.perf_counter()
        depth_max = cp.depth_max if cp.depth_max > 0 else np.inf
        cloud, counts = filter_cloud(
            cloud,
            depth_range=(cp.depth_min, depth_max),
            min_confidence=cp.cloud_min_confidence,
            statistical_neighbors=cp.outlier_neighbors,
            statistical_std_ratio=cp.outlier_std_ratio,
            voxel_size=cp.voxel_size,
        )
        report.stage("filter_cloud", time.perf_counter() - t, points=counts)
        write_cloud_ply(out_dir / "cloud.ply", cloud)
        report.output("cloud", out_dir / "cloud.ply")

        stage = "surface"
        progress("surface", 0.7)
        t = time.perf_counter()
        sp = params.surface
        keep = _kept_pixels(result, cloud, params)
        if sp.surface == "grid":
            from stereomesh.geometry.surface import depth_grid_mesh

            disp_kept = np.where(keep, result.disparity, np.nan).astype(np.float32)
            mesh = depth_grid_mesh(disp_kept, rig, colour, result.confidence,
                                   sigma_d=cp.sigma_d, max_depth_jump=sp.max_depth_jump,
                                   step=sp.grid_step)
        else:
            from stereomesh.geometry.surface import poisson_mesh

            mesh = poisson_mesh(cloud, depth=sp.poisson_depth,
                                density_quantile=sp.density_quantile)
        report.stage("surface", time.perf_counter() - t, method=sp.surface,
                     vertices=len(mesh.vertices), faces=len(mesh.faces))

        stage = "repair"
        progress("repair", 0.85)
        t = time.perf_counter()
        rp = params.repair
        mesh, rfig = repair_mesh(
            mesh,
            max_hole_edges=rp.max_hole_edges,
            min_component_fraction=rp.min_component_fraction,
            smooth_iterations=rp.smooth_iterations,
            target_faces=rp.target_faces or None,
        )
        report.stage("repair", time.perf_counter() - t, **rfig)

        stage = "export"
        progress("export", 0.95)
        t = time.perf_counter()
        write_mesh_ply(out_dir / "mesh.ply", mesh)
        report.output("mesh", out_dir / "mesh.ply")
        _extra_exports(out_dir, mesh, cloud, params, report)
        _mesh_preview(out_dir, mesh, report)
        report.stage("export", time.perf_counter() - t, faces=len(mesh.faces),
                     vertices=len(mesh.vertices))
    except Exception as exc:
        if not isinstance(exc, InputError):
            report.warn(f"stage {stage} failed: {type(exc).__name__}: {exc}")
        report.data["failed_stage"] = stage
        report.finish(out_dir / "report.json", status="failed")
        raise
    progress("done", 1.0)
    return report.finish(out_dir / "report.json")


def _kept_pixels(result, cloud, params: Params) -> np.ndarray:
    """Pixels whose point survived the cloud filters (so the grid mesh honours them).

    After voxel downsampling points no longer stand for single pixels; the grid
    mesh then keeps every pixel that passed the per-pixel filters.
    """
    disparity = result.disparity
    if params.cloud.voxel_size > 0 or cloud.pixels is None:
        return np.isfinite(disparity) & (result.confidence >= params.cloud.cloud_min_confidence)
    keep = np.zeros(disparity.shape, bool)
    if len(cloud):
        keep[cloud.pixels[:, 1], cloud.pixels[:, 0]] = True
    return keep


def _extra_exports(out_dir: Path, mesh, cloud, params: Params, report: Report) -> None:
    formats = [f.strip() for f in params.export.format.split(",") if f.strip()]
    for fmt in formats:
        if fmt == "ply":
            continue
        report.warn(f"export format {fmt!r} is not available yet; skipped")


def _mesh_preview(out_dir: Path, mesh, report: Report) -> None:
    try:
        from stereomesh.io.previews import render_mesh_png

        path = out_dir / "previews" / "mesh.png"
        render_mesh_png(path, mesh.vertices, mesh.faces, mesh.colors)
    except Exception as exc:  # a missing preview must not cost the user the mesh
        report.warn(f"mesh preview not rendered: {exc}")
