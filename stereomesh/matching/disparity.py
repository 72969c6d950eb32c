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
    from stereomesh.matching.costs import COST_FUNCTIONS
    from stereomesh.matching.energy import StepPenalty, grid_energy
    from stereomesh.matching.refine import speckle_mask, subpixel_offset
    from stereomesh.matching.sgm import aggregate_costs

    params = params or DisparityParams()
    report = progress or (lambda step, frac: None)
    timings: dict[str, float] = {}
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
    report("matching cost", 0.0)

    cost = COST_FUNCTIONS[params.cost](
        gl, gr, d_min, n_disp, window=(params.census_width, params.census_height)
    )
    timings["cost"] = time.perf_counter() - t0
    report("regularise", 0.2)

    t = time.perf_counter()
    if params.method == "sgm":
        volume = aggregate_costs(
            cost,
            gl,
            p1=params.p1,
            p2=params.p2,
            p2_gradient_scale=params.p2_gradient_scale,
            paths=params.paths,
        )
    elif params.method == "bp":
        from stereomesh.matching.bp import belief_propagation

        volume, bp_info = belief_propagation(
            cost,
            pairwise_term(params),
            iterations=params.bp_iterations,
            levels=params.bp_levels,
            tolerance=params.bp_tolerance,
            return_info=True,
        )
        figures["bp"] = bp_info
    elif params.method == "wta":
        volume = cost
    else:
        raise ValueError(f"unknown method {params.method!r}")
    timings["solver"] = time.perf_counter() - t
    report("refine", 0.7)

    t = time.perf_counter()
    best_k, c1, c2, cm, cp = _kernels.select_left(volume, d_min)
    best_right = _kernels.select_right(volume, d_min)
    del volume
    labels = np.where(best_k >= 0, best_k, 0).astype(np.int32)
    # One energy for every solver (SGM's step penalty on the 4-connected grid),
    # so that results of different solvers can be compared in the report.
    energy = grid_energy(labels, cost, StepPenalty(params.p1, params.p2))
    bp_energy = grid_energy(labels, cost, pairwise_term(params))
    del cost
    classes, lr_diff = _kernels.consistency_classes(
        best_k, best_right, d_min, n_disp, params.lr_max_diff
    )
    offset = subpixel_offset(cm, c1, cp, params.subpixel)
    disparity = np.where(classes == 0, d_min + best_k + offset, np.nan).astype(np.float32)
    _kernels.mark_left_border(classes, disparity)
    _kernels.occlusion_by_step(classes, disparity, np.float32(max(1.0, params.lr_max_diff)))
    confidence = confidence_map(c1, c2, lr_diff, gl)

    speckles = speckle_mask(disparity, params.speckle_size, params.speckle_range)
    low_conf = (classes == 0) & (confidence < params.min_confidence)
    rejected = speckles | low_conf
    classes[rejected] = 3
    disparity[rejected] = np.nan
    confidence[~np.isfinite(disparity)] = 0.0
    timings["refine"] = time.perf_counter() - t
    report("done", 1.0)

    n = classes.size
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
        energy=energy,
        energy_pairwise_term={"kind": "step", "p1": params.p1, "p2": params.p2},
        energy_bp_term=bp_energy,
        step_seconds=timings,
    )
    return DisparityResult(disparity, confidence, classes, labels, d_min, n_disp, figures)
