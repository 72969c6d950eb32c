"""The disparity engine as one call: cost, solver, refinement, classes, confidence."""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np

from stereomesh.params import DisparityParams, parse_disp_range

OCCLUSION_CLASSES = {
    0: "valid",
    1: "occluded (seen by the left camera only)",
    2: "mismatch (failed the consistency check, not occluded)",
    3: "rejected by a filter (confidence, speckle)",
    4: "outside the search range or the image overlap",
}
"""Values of ``occlusion.png`` (fixed by the design)."""


@dataclass
class DisparityResult:
    """Output of :func:`compute_disparity` on the left rectified grid.

    Attributes
    ----------
    disparity : (H, W) float32
        Disparity in pixels, NaN where rejected.
    confidence : (H, W) float32
        In [0, 1]; 0 wherever ``disparity`` is NaN.
    classes : (H, W) uint8
        The :data:`OCCLUSION_CLASSES` code of every pixel.
    labels : (H, W) int32
        The solver's integer hypothesis per pixel before any rejection (for
        energy comparisons); hypothesis ``k`` is disparity ``d_min + k``.
    d_min, n_disp : int
        The search range used.
    figures : dict
        Quality figures and timings for the report.
    """

    disparity: np.ndarray
    confidence: np.ndarray
    classes: np.ndarray
    labels: np.ndarray
    d_min: int
    n_disp: int
    figures: dict = field(default_factory=dict)


def to_gray(image: np.ndarray) -> np.ndarray:
    """Luma (ITU-R BT.601 weights) of an RGB or grey image as float32, 0–255 scale.

    16-bit images are scaled to the 8-bit range so that penalties and
    thresholds mean the same for both.

    Examples
    --------
    >>> import numpy as np
    >>> float(to_gray(np.full((1, 1, 3), 65535, np.uint16))[0, 0])
    255.0
    """
    image = np.asarray(image)
    scale = 255.0 / 65535.0 if image.dtype == np.uint16 else 1.0
    img = image.astype(np.float32) * np.float32(scale)
    if img.ndim == 3:
        img = img[..., 0] * 0.299 + img[..., 1] * 0.587 + img[..., 2] * 0.114
    return np.ascontiguousarray(img, np.float32)


def pairwise_term(params: DisparityParams):
    """The belief-propagation pairwise term ``V`` the parameters describe."""
    from stereomesh.matching.energy import Potts, TruncatedLinear

    if params.bp_potential == "potts":
        return Potts(params.bp_weight)
    return TruncatedLinear(params.bp_weight, params.bp_truncation)


def compute_disparity(
    left: np.ndarray,
    right: np.ndarray,
    params: DisparityParams | None = None,
    progress: Callable[[str, float], None] | None = None,
) -> DisparityResult:
    """Regularised disparity of a rectified pair, with occlusion classes and confidence.

    Parameters
    ----------
    left, right : (H, W) or (H, W, 3) arrays
        Rectified images (uint8 or uint16, RGB or grey); rows are epipolar lines
        and a left pixel ``x`` matches right pixel ``x − d``.
    params : DisparityParams, optional
        Schema parameters; defaults when omitted.
    progress : callable, optional
        Called as ``progress(step_name, fraction_done)``.

    Returns
    -------
    DisparityResult

    Examples
    --------
    >>> import numpy as np
    >>> from stereomesh.params import DisparityParams
    >>> rng = np.random.default_rng(0)
    >>> right = (rng.random((40, 80)) * 255).astype(np.uint8)
    >>> left = np.roll(right, 6, axis=1)
    >>> res = compute_disparity(left, right, DisparityParams(disp_range="0:16"))
    >>> float(np.nanmedian(res.disparity))
    6.0
    """
    from stereomesh.matching import _kernels
    from stereomesh.matching.confidence import confidence_map
    from stereomesh.matching.energy import StepPenalty, grid_energy
    from stereomesh.matching.refine import speckle_mask, subpixel_offset

    params = params or DisparityParams()
    report = progress or (lambda step, frac: None)
    t0 = time.perf_counter()
    gl, gr = to_gray(left), to_gray(right)
    if gl.shape != gr.shape:
        raise ValueError(f"left {gl.shape} and right {gr.shape} differ in size")
    figures: dict = {}
    rng = parse_disp_range(params.disp_range)
    if rng is None:
        from stereomesh.matching.search_range import estimate_disparity_range

        rng, range_figures = estimate_disparity_range(
            np.clip(gl, 0, 255).astype(np.uint8), np.clip(gr, 0, 255).astype(np.uint8)
        )
        figures["auto_range"] = range_figures
    d_min, d_max = rng
    n_disp = d_max - d_min
    figures["disp_range"] = [d_min, d_max]
    h, w = gl.shape

    strips = row_strips(h, w, n_disp, params)
    figures["strips"] = len(strips)
    names = ("best_k", "c1", "c2", "cm", "cp", "best_right")
    maps = {n: np.empty((h, w), np.int32 if n.startswith("best") else np.float32) for n in names}
    timings = {"cost": 0.0, "solver": 0.0, "select": 0.0}
    energies = {"step": _zero_energy(), "bp": _zero_energy()}
    bp_info = []
    for i, (a, b, a0, b0) in enumerate(strips):
        report("disparity", 0.9 * i / len(strips))
        t = time.perf_counter()
        cost = _cost_volume(gl[a0:b0], gr[a0:b0], d_min, n_disp, params)
        timings["cost"] += time.perf_counter() - t
        t = time.perf_counter()
        volume, info = _solve(cost, gl[a0:b0], params)
        if info:
            bp_info.append(info)
        timings["solver"] += time.perf_counter() - t
        t = time.perf_counter()
        out = _kernels.select_left(volume, d_min) + (_kernels.select_right(volume, d_min),)
        del volume
        for name, arr in zip(names, out, strict=True):
            maps[name][a:b] = arr[a - a0 : b - a0]
        # Energy over the rows this strip owns; edges across seams are added below,
        # once the labels on both sides are final.
        labels = np.where(maps["best_k"][a:b] >= 0, maps["best_k"][a:b], 0)
        for key, term in (("step", StepPenalty(params.p1, params.p2)),
                          ("bp", pairwise_term(params))):
            e = grid_energy(labels, cost[a - a0 : b - a0], term)
            for part in e:
                energies[key][part] += e[part]
        del cost
        timings["select"] += time.perf_counter() - t
    for a, _, _, _ in strips[1:]:
        pair = np.where(maps["best_k"][a - 1 : a + 1] >= 0, maps["best_k"][a - 1 : a + 1], 0)
        for key, term in (("step", StepPenalty(params.p1, params.p2)),
                          ("bp", pairwise_term(params))):
            extra = seam_pairwise(pair, term)
            energies[key]["pairwise"] += extra
            energies[key]["total"] += extra
    if len(strips) > 1:
        figures["strip_rows"] = [[int(a), int(b)] for a, b, _, _ in strips]

    t = time.perf_counter()
    best_k = maps["best_k"]
    classes, lr_diff = _kernels.consistency_classes(
        best_k, maps["best_right"], d_min, n_disp, params.lr_max_diff
    )
    offset = subpixel_offset(maps["cm"], maps["c1"], maps["cp"], params.subpixel)
    disparity = np.where(classes == 0, d_min + best_k + offset, np.nan).astype(np.float32)
    _kernels.mark_left_border(classes, disparity)
    _kernels.occlusion_by_step(classes, disparity, np.float32(max(1.0, params.lr_max_diff)))
    confidence = confidence_map(maps["c1"], maps["c2"], lr_diff, gl)

    speckles = speckle_mask(disparity, params.speckle_size, params.speckle_range)
    low_conf = (classes == 0) & (confidence < params.min_confidence)
    rejected = speckles | low_conf
    classes[rejected] = 3
    disparity[rejected] = np.nan
    confidence[~np.isfinite(disparity)] = 0.0
    timings["refine"] = time.perf_counter() - t
    timings["total"] = time.perf_counter() - t0
    report("done", 1.0)

    n = classes.size
    if bp_info:
        figures["bp"] = {"iterations": max(i["iterations"] for i in bp_info),
                         "changed": max(i["changed"] for i in bp_info)}
    figures.update(
        method=params.method,
        cost=params.cost,
        n_disp=int(n_disp),
        density=float(np.isfinite(disparity).mean()),
        occluded_fraction=float((classes == 1).mean()),
        mismatch_fraction=float((classes == 2).mean()),
        rejected_fraction=float((classes == 3).mean()),
        outside_fraction=float((classes == 4).mean()),
        confident_fraction=float((confidence >= 0.5).sum() / n),
        speckle_pixels=int(speckles.sum()),
        energy=energies["step"],
        energy_pairwise_term={"kind": "step", "p1": params.p1, "p2": params.p2},
        energy_bp_term=energies["bp"],
        step_seconds=timings,
    )
    labels = np.where(best_k >= 0, best_k, 0).astype(np.int32)
    return DisparityResult(disparity, confidence, classes, labels, d_min, n_disp, figures)


def _zero_energy() -> dict:
    return {"unary": 0.0, "pairwise": 0.0, "total": 0.0}


def seam_pairwise(two_rows: np.ndarray, pairwise) -> float:
    """Pairwise energy of the vertical edges between two label rows, ``(2, W)``."""
    from stereomesh.matching.energy import grid_energy

    zero = np.zeros((*two_rows.shape, int(two_rows.max()) + 1), np.float32)
    both = grid_energy(two_rows, zero, pairwise)["pairwise"]
    top = grid_energy(two_rows[:1], zero[:1], pairwise)["pairwise"]
    bottom = grid_energy(two_rows[1:], zero[1:], pairwise)["pairwise"]
    return both - top - bottom


def row_strips(height: int, width: int, n_disp: int, params: DisparityParams) -> list:
    """Row strips ``(a, b, a0, b0)``: rows ``[a, b)`` kept from rows ``[a0, b0)`` solved.

    The strips are sized so that the volumes of one strip fit the memory budget;
    the overlap gives vertical and diagonal paths (or messages) room to settle
    before the kept rows.
    """
    per_cell = {"sgm": 3, "wta": 1, "bp": 4 + 24 + 8}[params.method]
    row_bytes = width * n_disp * per_cell
    budget = params.memory_budget_mb * 2**20
    fit = int(budget // max(row_bytes, 1))
    if fit >= height:
        return [(0, height, 0, height)]
    overlap = params.tile_overlap
    core = max(16, fit - 2 * overlap)
    strips = []
    for a in range(0, height, core):
        b = min(height, a + core)
        strips.append((a, b, max(0, a - overlap), min(height, b + overlap)))
    return strips


def _cost_volume(gl, gr, d_min, n_disp, params):
    from stereomesh.matching.costs import COST_FUNCTIONS

    return COST_FUNCTIONS[params.cost](
        gl, gr, d_min, n_disp, window=(params.census_width, params.census_height)
    )


def _solve(cost, gray, params):
    """Regularised volume (lower is better) of the chosen solver, and its figures."""
    if params.method == "sgm":
        from stereomesh.matching.sgm import aggregate_costs

        return aggregate_costs(
            cost, gray, p1=params.p1, p2=params.p2,
            p2_gradient_scale=params.p2_gradient_scale, paths=params.paths,
        ), None
    if params.method == "bp":
        from stereomesh.matching.bp import belief_propagation

        return belief_propagation(
            cost, pairwise_term(params), iterations=params.bp_iterations,
            levels=params.bp_levels, tolerance=params.bp_tolerance, return_info=True,
        )
    if params.method == "wta":
        return cost, None
    raise ValueError(f"unknown method {params.method!r}")
