"""The in-memory core: a stereo pair in; disparity, cloud, mesh and figures out.

No file is read or written here. Readers in :mod:`stereomesh.io.inputs` make the
:class:`StereoPair`; :func:`reconstruct` chains the stages; the front doors
(:mod:`stereomesh.jobs` for the CLI, the batch runner and the editor's worker)
write what it returns. Each stage is also callable on its own, on in-memory
data such as a cloud or mesh the editor sends:

==================  ======================================  ==========================
stage               function                                result
==================  ======================================  ==========================
``disparity``       :func:`disparity_of_pair`               ``DisparityResult``
``triangulate``     :func:`cloud_from_disparity`            per-pixel ``PointCloud``
``filter_cloud``    :func:`clean_cloud`, :func:`thin_cloud` cleaned cloud
``surface``         :func:`surface_from_cloud`              ``TriMesh``
``repair``          :func:`repair_surface`                  repaired ``TriMesh``
==================  ======================================  ==========================

Every stage function returns its result and a dict of figures for the report.
Parameters arrive validated (:class:`~stereomesh.params.Params`); the stage
functions pass each schema section to the geometry functions by field name,
so a parameter is named once, in the schema.
"""

from __future__ import annotations

import dataclasses
import inspect
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from types import SimpleNamespace

import numpy as np

from stereomesh.errors import InputError
from stereomesh.params import Params
from stereomesh.rectify import RectifiedRig

Progress = Callable[[str, float], None]
"""``progress(step, fraction_done)``; it may raise (e.g. ``Cancelled``) to stop a run."""

STAGES = ("disparity", "triangulate", "filter_cloud", "surface", "repair")
"""The stages :func:`reconstruct` runs, in order."""


@dataclass
class StereoPair:
    """A rectified pair ready for the core: images, rig and where they came from.

    Attributes
    ----------
    left, right : (H, W, 3) uint8 or uint16 arrays
        Rectified images, RGB; rows are epipolar lines.
    rig : RectifiedRig
        Geometry of the rectified pair (lengths in metres when ``rig.metric``).
    sources : list of Path
        Files the pair was read from (images, calibration), for the report.
    info : dict
        Figures of reading and rectifying (layout, residuals), for the report.
    warnings : list of str
        Things the reader noticed that the user should know.
    rectification : stereomesh.rectify.Rectification or None
        When the reader rectified the pair: the transforms and the maps from the
        rectified grid back to the original images.
    """

    left: np.ndarray
    right: np.ndarray
    rig: RectifiedRig
    sources: list[Path] = field(default_factory=list)
    info: dict = field(default_factory=dict)
    warnings: list[str] = field(default_factory=list)
    rectification: object | None = None

    def __post_init__(self) -> None:
        for name in ("left", "right"):
            image = np.asarray(getattr(self, name))
            if image.ndim == 2:
                image = np.repeat(image[:, :, None], 3, axis=2)
            if image.ndim != 3 or image.shape[2] != 3:
                raise InputError(f"{name} image must be (H, W) or (H, W, 3), got {image.shape}")
            if image.dtype not in (np.uint8, np.uint16):
                raise InputError(f"{name} image must be uint8 or uint16, got {image.dtype}")
            setattr(self, name, np.ascontiguousarray(image))
        if self.left.shape != self.right.shape:
            raise InputError(
                f"left {self.left.shape[1]}x{self.left.shape[0]} and right "
                f"{self.right.shape[1]}x{self.right.shape[0]} images differ in size"
            )
        w, h = self.rig.image_size
        if (w, h) != (0, 0) and (w, h) != (self.left.shape[1], self.left.shape[0]):
            raise InputError(
                f"the calibration is for {w}x{h} images but the pair is "
                f"{self.left.shape[1]}x{self.left.shape[0]}"
            )

    @property
    def colour(self) -> np.ndarray:
        """The left image as 8-bit RGB, for point and vertex colours."""
        from stereomesh.io.images import to_uint8

        return to_uint8(self.left)


@dataclass
class Reconstruction:
    """What :func:`reconstruct` returns: every stage's result and figures.

    Attributes
    ----------
    pair : StereoPair
    params : Params
    disparity : DisparityResult or None
        Disparity, confidence and occlusion classes on the left rectified grid.
    cloud : PointCloud or None
        The cleaned (and, with ``voxel_size``, thinned) coloured cloud, metres.
    mesh : TriMesh or None
        The repaired surface.
    figures : dict
        ``{stage: {"seconds": ..., figures...}}`` in the order the stages ran.
    warnings : list of str
    """

    pair: StereoPair
    params: Params
    disparity: object | None = None
    cloud: object | None = None
    mesh: object | None = None
    figures: dict = field(default_factory=dict)
    warnings: list[str] = field(default_factory=list)

    @property
    def scale(self) -> str:
        """``"metric"`` when the rig's baseline is known in metres, else ``"unscaled"``."""
        return "metric" if self.pair.rig.metric else "unscaled"


class StageFailed(Exception):
    """A stage of :func:`reconstruct` raised; ``partial`` holds the stages before it.

    The original exception is ``__cause__`` (an ``InputError`` for bad input,
    ``Cancelled`` when the progress callback stopped the run).
    """

    def __init__(self, stage: str, partial: Reconstruction):
        super().__init__(f"stage {stage} failed")
        self.stage = stage
        self.partial = partial


def section_arguments(section, function: Callable) -> dict:
    """The fields of a schema ``section`` that ``function`` takes as keywords.

    Geometry functions name their options as the schema does, so the core
    passes them through without a hand-written mapping.

    Examples
    --------
    >>> from stereomesh.params import SurfaceParams
    >>> def f(x, *, grid_step=1, max_depth_jump=0.1): ...
    >>> sorted(section_arguments(SurfaceParams(), f))
    ['grid_step', 'max_depth_jump']
    """
    names = inspect.signature(function).parameters
    return {f.name: getattr(section, f.name) for f in dataclasses.fields(section)
            if f.name in names}


def _nothing(step: str, fraction: float) -> None:
    return None


def disparity_of_pair(pair: StereoPair, params: Params, workspace=None,
                      progress: Progress | None = None):
    """The disparity engine on a rectified pair (see :func:`compute_disparity`).

    Returns
    -------
    DisparityResult, dict
        The maps and the engine's figures.
    """
    from stereomesh.matching.disparity import compute_disparity

    result = compute_disparity(pair.left, pair.right, params.disparity, progress, workspace)
    return result, dict(result.figures)


def cloud_from_disparity(pair: StereoPair, disparity, params: Params):
    """Triangulate every valid disparity into a coloured point of the left camera frame.

    Parameters
    ----------
    pair : StereoPair
    disparity : DisparityResult
    params : Params
        ``cloud.sigma_d`` gives the disparity uncertainty behind ``sigma_z``
        unless the refinement estimated one per pixel (``disparity.sigma_d``).

    Returns
    -------
    PointCloud, dict
        One point per valid pixel (with ``pixels`` set) and its figures.
    """
    from stereomesh.geometry.triangulate import triangulate

    # The refinement's per-pixel sigma when it has one, else the schema's constant.
    sigma_d = params.cloud.sigma_d
    per_pixel = getattr(disparity, "sigma_d", None)
    if per_pixel is not None:
        sigma_d = np.where(np.isfinite(per_pixel), per_pixel, params.cloud.sigma_d)
    cloud = triangulate(disparity.disparity, pair.rig, pair.colour, disparity.confidence,
                        sigma_d=sigma_d)
    figures = {"points": len(cloud)}
    if len(cloud):
        figures.update(median_depth=float(np.median(cloud.points[:, 2])),
                       median_sigma_z=float(np.median(cloud.sigma_z)))
    return cloud, figures


def clean_cloud(cloud, params: Params):
    """Depth and confidence gates, statistical outlier removal and normals.

    Points keep their pixel of origin, so a grid surface can still be built
    from what is left (see :func:`surface_from_cloud`); thinning is a separate
    step (:func:`thin_cloud`).

    Parameters
    ----------
    cloud : PointCloud
        Points in the left camera frame (an edited cloud from the editor too).
    params : Params
        The ``cloud`` section.

    Returns
    -------
    PointCloud, dict
        The kept points with camera-facing normals, and the point counts after
        each step.
    """
    from stereomesh.geometry.filters import filter_cloud

    options = section_arguments(params.cloud, filter_cloud)
    options["voxel_size"] = 0.0
    cleaned, counts = filter_cloud(cloud, **options)
    return cleaned, {"points": counts}


def thin_cloud(cloud, params: Params):
    """Voxel averaging of a cleaned cloud to ``voxel_size`` (a no-op at 0).

    Returns
    -------
    PointCloud, dict
    """
    from stereomesh.geometry.filters import voxel_average

    size = params.cloud.voxel_size
    if size <= 0:
        return cloud, {}
    thinned = voxel_average(cloud, size)
    return thinned, {"voxel_size": size, "points_after_voxel": len(thinned)}


def _maps_from_cloud(cloud, rig: RectifiedRig):
    """Disparity, colour, confidence and sigma_d maps holding the cloud's points."""
    w, h = rig.image_size
    cols, rows = cloud.pixels[:, 0], cloud.pixels[:, 1]
    if (w, h) == (0, 0):
        w, h = int(cols.max()) + 1, int(rows.max()) + 1
    if cols.min() < 0 or rows.min() < 0 or cols.max() >= w or rows.max() >= h:
        raise InputError(f"the cloud's pixel positions fall outside the {w}x{h} image of its rig")
    from stereomesh.geometry.grid_repair import pixel_maps

    disparity, confidence, sigma_d = pixel_maps(cloud.pixels, cloud.points, cloud.confidence,
                                                cloud.sigma_z, rig, (h, w))
    image = np.zeros((h, w, 3), np.uint8)
    image[rows, cols] = cloud.colors
    return disparity, image, confidence, sigma_d


def surface_from_cloud(cloud, params: Params, rig: RectifiedRig | None = None):
    """Reconstruct a surface: a depth-map grid mesh or screened Poisson.

    Parameters
    ----------
    cloud : PointCloud
        For ``surface = "grid"`` the points must carry ``pixels`` (as
        :func:`cloud_from_disparity` makes them) and ``rig`` must be given: the
        mesh joins neighbouring pixels that survived the filters. Poisson needs
        normals (:func:`clean_cloud` estimates them).
    params : Params
        The ``surface`` section (and, for Poisson, ``repair.max_hole_edges``:
        holes that small are not trimmed away).
    rig : RectifiedRig, optional
        Required for the grid; for Poisson it adds the view test and the small
        holes to the trim (see :func:`~stereomesh.geometry.surface.poisson_mesh`).

    Returns
    -------
    TriMesh, dict
    """
    sp = params.surface
    if len(cloud) == 0:
        raise InputError("no points are left to mesh: the filters removed every point; "
                         "lower cloud_min_confidence or widen depth_min/depth_max")
    if sp.surface == "grid":
        from stereomesh.geometry.surface import depth_grid_mesh

        if cloud.pixels is None or rig is None:
            raise InputError("a grid surface needs a cloud with the pixel of each point and "
                             "its calibration; use surface = 'poisson' for other clouds")
        disparity, image, confidence, sigma_d = _maps_from_cloud(cloud, rig)
        mesh = depth_grid_mesh(disparity, rig, image, confidence, sigma_d=sigma_d,
                               **section_arguments(sp, depth_grid_mesh))
    else:
        from stereomesh.geometry.surface import poisson_mesh

        if cloud.normals is None:
            from stereomesh.geometry.filters import estimate_normals

            cloud = estimate_normals(cloud)
        # The rig lets the trim test the camera's view and keep the small holes
        # repair would fill; a cloud from elsewhere may come without one.
        mesh = poisson_mesh(cloud, rig=rig, max_hole_edges=params.repair.max_hole_edges,
                            **section_arguments(sp, poisson_mesh))
    return mesh, {"method": sp.surface, "vertices": len(mesh.vertices),
                  "faces": len(mesh.faces)}


def repair_surface(mesh, params: Params, pair: StereoPair | None = None):
    """Remove small parts and defects, close small holes only, smooth and decimate.

    A grid mesh (``mesh.pixels`` set) of ``pair`` is repaired in pixel space
    (:func:`~stereomesh.geometry.grid_repair.repair_grid_mesh`): its holes
    are the pixels without a vertex and its filled vertices take the colour of
    their pixel. Any other mesh, or a grid mesh without its pair, goes through
    PyMeshLab (:func:`~stereomesh.geometry.repair.repair_mesh`). Smoothing and
    decimation always do.

    Returns
    -------
    TriMesh, dict
        The repaired mesh (``filled = 1`` on vertices hole filling made) and
        the repair figures (holes filled, boundary loops before and after...).
    """
    from stereomesh.geometry.repair import repair_mesh

    if len(mesh.faces) == 0:
        raise InputError("the surface has no faces to repair; check the surface parameters")
    rp = params.repair
    if mesh.pixels is None or pair is None:
        return repair_mesh(mesh, **section_arguments(rp, repair_mesh))
    from stereomesh.geometry.grid_repair import repair_grid_mesh

    mesh, figures = repair_grid_mesh(
        mesh, pair.rig, pair.colour, max_hole_edges=rp.max_hole_edges,
        min_component_fraction=rp.min_component_fraction,
        max_depth_jump=params.surface.max_depth_jump, grid_step=params.surface.grid_step)
    if rp.smooth_iterations > 0 or 0 < rp.target_faces < len(mesh.faces):
        mesh, more = repair_mesh(mesh, max_hole_edges=0, min_component_fraction=0.0,
                                 smooth_iterations=rp.smooth_iterations,
                                 target_faces=rp.target_faces)
        figures.update(faces_after=more["faces_after"], vertices_after=more["vertices_after"],
                       boundary_loops_after=more["boundary_loops_after"])
    return mesh, figures


def reconstruct(
    pair: StereoPair,
    params: Params | None = None,
    *,
    workspace=None,
    progress: Progress | None = None,
    stop_after: str = "repair",
    on_stage: Callable[[str, Reconstruction], None] | None = None,
) -> Reconstruction:
    """The whole pipeline in memory: disparity, cloud, cleaning, surface, repair.

    Parameters
    ----------
    pair : StereoPair
        A rectified pair (from :func:`stereomesh.io.inputs.read_stereo_input` or
        built from arrays).
    params : Params, optional
        Validated parameters; the defaults when omitted.
    workspace : stereomesh.matching.sgm.Workspace, optional
        Solver work memory reused across calls (many pairs in one process).
    progress : callable, optional
        ``progress(step, fraction)``; an exception it raises stops the run.
    stop_after : str
        Last stage to run, one of :data:`STAGES`.
    on_stage : callable, optional
        ``on_stage(stage, result)`` after each stage, with the results so far
        (a caller can start writing them while the next stages run; it must
        not modify them). An exception it raises stops the run like a failed stage.

    Returns
    -------
    Reconstruction

    Raises
    ------
    StageFailed
        When a stage raises; ``partial`` keeps the results of the stages before.

    Examples
    --------
    >>> import numpy as np
    >>> from stereomesh.rectify import RectifiedRig
    >>> rng = np.random.default_rng(0)
    >>> right = (rng.random((48, 96, 3)) * 255).astype(np.uint8)
    >>> pair = StereoPair(np.roll(right, 8, axis=1), right,
    ...                   RectifiedRig(focal_px=100.0, cx=48.0, cy=24.0, baseline=0.1))
    >>> params = Params().with_overrides({"disp_range": "0:16"})
    >>> out = reconstruct(pair, params, stop_after="triangulate")
    >>> round(float(np.median(out.cloud.points[:, 2])), 2)   # Z = f B / d = 100 * 0.1 / 8
    1.25
    """
    if stop_after not in STAGES:
        raise ValueError(f"stop_after must be one of {STAGES}, got {stop_after!r}")
    params = params or Params()
    progress = progress or _nothing
    result = Reconstruction(pair, params, warnings=list(pair.warnings))
    if not pair.rig.metric:
        result.warnings.append("baseline is nominal: lengths are unscaled, not metres")
    last = STAGES.index(stop_after)
    plan = [("disparity", 0.0, 0.5), ("triangulate", 0.5, 0.55), ("filter_cloud", 0.55, 0.7),
            ("surface", 0.7, 0.85), ("repair", 0.85, 1.0)]
    per_pixel = None
    for stage, lo, hi in plan[: last + 1]:
        def sub(step, frac, lo=lo, hi=hi):
            progress(step, lo + (hi - lo) * frac)

        progress(stage.replace("_", " "), lo)
        t = time.perf_counter()
        try:
            if stage == "disparity":
                result.disparity, figs = disparity_of_pair(pair, params, workspace, sub)
                result.warnings.extend(result.disparity.warnings)
            elif stage == "triangulate":
                result.cloud, figs = cloud_from_disparity(pair, result.disparity, params)
            elif stage == "filter_cloud":
                per_pixel, figs = clean_cloud(result.cloud, params)
                result.cloud, more = thin_cloud(per_pixel, params)
                figs.update(more)
            elif stage == "surface":
                # The grid joins pixels, so it is built from the per-pixel cloud
                # even when the exported cloud is thinned.
                source = per_pixel if params.surface.surface == "grid" else result.cloud
                result.mesh, figs = surface_from_cloud(source, params, pair.rig)
            else:
                result.mesh, figs = repair_surface(result.mesh, params, pair)
        except Exception as exc:
            raise StageFailed(stage, result) from exc
        result.figures[stage] = {"seconds": round(time.perf_counter() - t, 4), **figs}
        if on_stage is not None:
            try:
                on_stage(stage, result)
            except Exception as exc:
                raise StageFailed(stage, result) from exc
    progress("done", 1.0)
    return result


def warm_up_stages(stop_after: str = "repair") -> None:
    """Compile (or load) the kernels of the stages around the solver, on a tiny pair.

    Runs the stages with default parameters on a 48 × 64 synthetic pair, the
    solver replaced by a fixed answer (the pair's true shift), so that the
    kernels the default path needs besides the SGM solver are compiled: the
    refinement, alignment and energy kernels and the geometry stages up to
    ``stop_after``. The first run after an install starts it in a second
    process while the first compiles the solver.

    The order is the command's needs: first the kernels right after the solver
    (the sub-pixel alignment is the longest compile after it), then the
    geometry from the last stage back, so that the command's process, which
    reaches the geometry in stage order, and this one compile from opposite
    ends and meet in the middle instead of compiling the same kernels. The σ
    and confidence kernels, which the command reaches as this process would
    finish the alignment, are left to the command.

    Examples
    --------
    >>> warm_up_stages("disparity")
    """
    from stereomesh.geometry._mesh_kernels import kept_faces
    from stereomesh.geometry.grid_repair import _hole_labels
    from stereomesh.geometry.repair import _small_components, count_boundary_loops
    from stereomesh.io._render_kernels import downsample, rasterise
    from stereomesh.matching import confidence
    from stereomesh.matching import disparity as engine
    from stereomesh.matching._sgm_kernels import census_unary
    from stereomesh.matching.winners import Winners

    shift = 6
    rng = np.random.default_rng(0)
    right = (rng.random((48, 64, 3)) * 255).astype(np.uint8)
    left = np.roll(right, shift, axis=1)
    pair = StereoPair(left, right, RectifiedRig(focal_px=100.0, cx=32.0, cy=24.0,
                                                baseline=0.1, image_size=(64, 48)))

    def fixed_answer(gl, gr, d_min, n_disp, params, workspace=None):
        # The arrays a solver returns, with the dtypes and layout SGM gives them.
        h, w = gl.shape
        best = np.full((h, w), shift - d_min, np.int32)
        low, high = np.zeros((h, w), np.float32), np.full((h, w), 10.0, np.float32)
        return Winners(best, low, high, high * 0.5, high * 0.5, best.copy(), low.copy()), {}

    def fixed_sigma(sigma_fit, disparity=None):
        return np.full(sigma_fit.shape, 0.1, np.float32)

    def fixed_confidence(c_best, *args, **kwargs):
        return np.ones(np.shape(c_best), np.float32)

    params = Params().with_overrides({"disp_range": "0:16", "speckle_size": 0})
    planes = np.zeros((3, 4, 8), np.uint16)
    census_unary(planes, planes, np.zeros((4, 8), np.int32), 0, 48.0)
    # The σ and confidence kernels come right after the alignment: the command
    # reaches them as this process would, so it compiles them itself and this
    # one goes on to the geometry.
    saved = engine._solve, engine.alignment_sigma, confidence.confidence_map
    engine._solve, engine.alignment_sigma, confidence.confidence_map = (
        fixed_answer, fixed_sigma, fixed_confidence)
    try:
        disparity_of_pair(pair, params)
    finally:
        engine._solve, engine.alignment_sigma, confidence.confidence_map = saved
    last = STAGES.index(stop_after)
    if last < STAGES.index("filter_cloud"):
        return
    square = np.array([[0, 1, 2], [0, 2, 3]], np.int32)
    corners = np.array([[0.0, 0, 1], [1, 0, 1], [1, 1, 1], [0, 1, 1]])
    if stop_after == "repair":  # the mesh preview, drawn last
        image, zbuf = rasterise(corners[:, :2] * 4.0, np.ones(4), np.zeros((4, 3), np.float32),
                                square.astype(np.int64), 4, 4)
        downsample(image, zbuf, 2, np.zeros(3, np.float32))
        _small_components(corners, square, 0.01)
        count_boundary_loops(square, 4)
        kept_faces(square, np.ones(2, bool), 4)
        _hole_labels(np.ones((4, 4), bool))
    # A made-up disparity map with a small hole for the repair.
    disparity = np.full((48, 64), float(shift), np.float32)
    disparity[20:23, 30:33] = np.nan
    maps = SimpleNamespace(disparity=disparity, confidence=np.ones_like(disparity),
                           sigma_d=np.full_like(disparity, 0.1))
    cloud, _ = cloud_from_disparity(pair, maps, params)
    if last >= STAGES.index("surface"):
        # The grid mesh needs no normals: surface and repair before the cloud filter.
        mesh, _ = surface_from_cloud(cloud, params, pair.rig)
        if last >= STAGES.index("repair"):
            repair_surface(mesh, params, pair)
    clean_cloud(cloud, params)
