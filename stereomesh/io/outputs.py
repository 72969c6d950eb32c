"""Writing a reconstruction to a folder: maps, cloud, mesh, exports and previews.

The layout of an output folder (fixed by the design)::

    disparity.pfm     float32, left rectified grid, NaN where rejected
    confidence.pfm    float32 in [0, 1], 0 where the disparity is NaN
    occlusion.png     uint8 classes (see OCCLUSION_CLASSES)
    cloud.ply         the cleaned coloured cloud
    mesh.ply          the repaired surface
    previews/         PNG previews
    report.json       written last by the caller

Every file is written atomically; whatever a partial reconstruction holds is
written, so a failed stage never costs the user the earlier results.
"""

from __future__ import annotations

import time
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np


def write_disparity_outputs(out_dir: Path, result, report) -> None:
    """``disparity.pfm``, ``confidence.pfm`` and ``occlusion.png`` of a DisparityResult."""
    from stereomesh.io.images import write_png
    from stereomesh.io.pfm import write_pfm

    write_pfm(out_dir / "disparity.pfm", result.disparity)
    write_pfm(out_dir / "confidence.pfm", result.confidence)
    write_png(out_dir / "occlusion.png", result.classes)
    for name in ("disparity.pfm", "confidence.pfm", "occlusion.png"):
        report.output(name.split(".")[0], out_dir / name)


def write_disparity_previews(out_dir: Path, result, report) -> None:
    """Rectified pair, disparity, confidence and occlusion-class previews."""
    from stereomesh.io import previews
    from stereomesh.io.images import to_uint8

    pair, disparity = result.pair, result.disparity
    pdir = out_dir / "previews"
    previews.write_image_previews(pdir, pair.colour, to_uint8(pair.right), disparity.disparity,
                                  disparity.confidence, disparity.classes, rig=pair.rig)
    report.output("previews", pdir)


# Faces rendered for the mesh preview at most (grid meshes are re-gridded coarser).
PREVIEW_FACES = 600_000


def write_mesh_preview(out_dir: Path, mesh, pair=None) -> None:
    """A shaded render of the mesh from the left camera (``previews/mesh.png``)."""
    from stereomesh.io.previews import render_mesh_png

    if pair is not None and mesh.pixels is not None and len(mesh.faces) > PREVIEW_FACES:
        from stereomesh.geometry.grid_repair import coarser_grid_mesh

        step = int(np.ceil(np.sqrt(len(mesh.faces) / PREVIEW_FACES)))
        mesh = coarser_grid_mesh(mesh, pair.rig, pair.colour, step)
    render_mesh_png(out_dir / "previews" / "mesh.png", mesh.vertices, mesh.faces, mesh.colors,
                    normals=mesh.normals)


def write_exports(out_dir: Path, result, report) -> None:
    """The ``--format`` exports beyond ``mesh.ply`` and ``cloud.ply``."""
    names = [name for name in result.params.export.formats if name != "ply"]
    try:
        from stereomesh.io import exporters
    except ImportError:
        for name in names:
            report.warn(f"export format {name!r} is not available yet; skipped")
        return
    for name in names:
        record = exporters.export(name, out_dir, mesh=result.mesh, cloud=result.cloud,
                                  image=result.pair.colour, rig=result.pair.rig,
                                  scale=result.scale)
        report.data.setdefault("exports", {})[name] = record


def _timed(function, *args) -> float:
    t = time.perf_counter()
    function(*args)
    return time.perf_counter() - t


def write_disparity_files(out_dir: str | Path, result, report, *, previews: bool = True
                          ) -> dict[str, float]:
    """The disparity maps and, with ``previews``, their preview PNGs.

    Needs only ``result.disparity``, so a caller can run it while the geometry
    stages are still working; :func:`write_outputs` then skips these files.

    Returns
    -------
    dict
        Seconds spent: ``maps`` and, with ``previews``, ``previews``.
    """
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    seconds = {"maps": _timed(write_disparity_outputs, out_dir, result.disparity, report)}
    if previews:
        seconds["previews"] = _timed(write_disparity_previews, out_dir, result, report)
    return seconds


def write_cloud_file(out_dir: str | Path, result, report) -> float:
    """``cloud.ply`` of a reconstruction past its cloud filter; seconds taken.

    The cleaned cloud is final once that stage ends, so a caller can write it
    while the surface stages run; :func:`write_outputs` then skips it.
    """
    from stereomesh.io.ply import write_cloud_ply

    t = time.perf_counter()
    path = Path(out_dir) / "cloud.ply"
    write_cloud_ply(path, result.cloud, scale=result.scale)
    report.output("cloud", path)
    return time.perf_counter() - t


def write_outputs(out_dir: str | Path, result, report, *, previews: bool = True,
                  disparity_written: dict[str, float] | None = None,
                  cloud_written: float | None = None) -> None:
    """Write everything a (possibly partial) reconstruction holds into ``out_dir``.

    Parameters
    ----------
    out_dir : str or Path
        Created if needed.
    result : Reconstruction
        From :func:`stereomesh.pipeline.reconstruct` or a ``StageFailed.partial``.
    report : Report
        Receives the output paths, the previews' timing and any warnings.
    previews : bool
        Also write the preview PNGs.
    disparity_written : dict, optional
        What an earlier :func:`write_disparity_files` call returned: those files
        are already written and are not written again.
    cloud_written : float, optional
        What an earlier :func:`write_cloud_file` call returned: ``cloud.ply``
        is already written.
    """
    from stereomesh.io.ply import write_mesh_ply

    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    if disparity_written is not None:
        seconds = dict(disparity_written)
    elif result.disparity is not None:
        seconds = write_disparity_files(out_dir, result, report, previews=previews)
    else:
        seconds = {}
    complete = "repair" in result.figures
    preview = None
    with ThreadPoolExecutor(1, thread_name_prefix="stereomesh-preview") as pool:
        if previews and result.mesh is not None and complete:
            # Drawn beside the file writes below: both spend most of their
            # time outside the interpreter (the rasteriser releases it).
            preview = pool.submit(_timed, write_mesh_preview, out_dir, result.mesh,
                                  result.pair)
        if cloud_written is not None:
            seconds["cloud"] = cloud_written
        elif result.cloud is not None and "filter_cloud" in result.figures:
            seconds["cloud"] = write_cloud_file(out_dir, result, report)
        if result.mesh is not None and complete:
            t = time.perf_counter()
            write_mesh_ply(out_dir / "mesh.ply", result.mesh, scale=result.scale)
            report.output("mesh", out_dir / "mesh.ply")
            write_exports(out_dir, result, report)
            seconds["mesh"] = time.perf_counter() - t
        if preview is not None:
            seconds["previews"] = seconds.get("previews", 0.0) + preview.result()
    report.stage("export", sum(v for k, v in seconds.items() if k != "previews"),
                 **({"faces": len(result.mesh.faces), "vertices": len(result.mesh.vertices)}
                    if result.mesh is not None and complete else {}))
    if "previews" in seconds:
        report.stage("previews", seconds["previews"])
