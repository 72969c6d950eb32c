"""The disparity engine as one call: cost, solver, refinement, classes, confidence."""

from __future__ import annotations

import dataclasses
import time
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np

from stereomesh.matching.winners import Winners
from stereomesh.params import DisparityParams, parse_disp_range

OCCLUSION_CLASSES = {
    0: "valid",
    1: "occluded (seen by the left camera only)",
    2: "mismatch (failed the consistency check, not occluded)",
    3: "rejected by a filter (confidence, speckle)",
    4: "outside the search range or the image overlap",
}
"""Values of ``occlusion.png`` (fixed by the design)."""

# Relative cost margins of belief propagation's beliefs are about half those of
# the summed path costs of semi-global matching (measured on the demo and the
# motorcycle pairs), so its peak ratio counts as fully distinct at half.
_PEAK_RATIO_SCALE = {"sgm": 1.0, "wta": 1.0, "bp": 0.5}


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
    warnings : list of str
        What the user should know about this result (a guessed search range...).
    sigma_d : (H, W) float32 or None
        One-sigma disparity uncertainty per pixel (pixels, NaN where
        ``disparity`` is NaN) when the refinement estimates it (``subpixel =
        'alignment'``), else None and callers use a constant.
    """

    disparity: np.ndarray
    confidence: np.ndarray
    classes: np.ndarray
    labels: np.ndarray
    d_min: int
    n_disp: int
    figures: dict = field(default_factory=dict)
    warnings: list[str] = field(default_factory=list)
    sigma_d: np.ndarray | None = None


def to_gray(image: np.ndarray) -> np.ndarray:
    """Luma (ITU-R BT.601 weights) of an RGB or grey image as float32, 0–255 scale.

    16-bit images are scaled to the 8-bit range, and float images (taken to
    be in [0, 1], as scikit-image has them) multiplied by 255, so that
    penalties and thresholds mean the same for all.

    Examples
    --------
    >>> import numpy as np
    >>> float(to_gray(np.full((1, 1, 3), 65535, np.uint16))[0, 0])
    255.0
    """
    image = np.asarray(image)
    if image.dtype == np.uint16:
        scale = 255.0 / 65535.0
    elif np.issubdtype(image.dtype, np.floating):
        scale = 255.0
    else:
        scale = 1.0
    if image.ndim == 3 and image.shape[2] == 3 and image.dtype in (np.uint8, np.uint16):
        from stereomesh.matching import _kernels

        return _kernels.luma(np.ascontiguousarray(image), scale)
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
    workspace=None,
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
    workspace : stereomesh.matching.sgm.Workspace, optional
        Work memory of semi-global matching or belief propagation to reuse
        across calls (many pairs).

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
    >>> round(float(np.nanmedian(res.disparity)), 3)   # the alignment fit is not exact to 1e-5
    6.0
    """
    from stereomesh.matching import _kernels
    from stereomesh.matching.confidence import confidence_map
    from stereomesh.matching.energy import StepPenalty, grid_energy
    from stereomesh.matching.refine import SUBPIXEL_METHODS, speckle_mask

    params = params or DisparityParams()
    if not isinstance(params, DisparityParams):
        raise TypeError(f"params must be DisparityParams, got {type(params).__name__}")
    params.validate()
    _check_images(left, right)
    report = progress or (lambda step, frac: None)
    t0 = time.perf_counter()
    gl, gr = to_gray(left), to_gray(right)
    figures: dict = {}
    warnings: list[str] = []
    rng = parse_disp_range(params.disp_range)
    if rng is None:
        from stereomesh.matching.search_range import estimate_disparity_range

        rng, range_figures = estimate_disparity_range(
            np.clip(gl, 0, 255).astype(np.uint8), np.clip(gr, 0, 255).astype(np.uint8)
        )
        figures["auto_range"] = range_figures
        if range_figures.get("fallback"):
            warnings.append(
                f"too few feature matches ({range_figures['matches']}) to estimate the "
                f"disparity range; searched the default {rng[0]}:{rng[1]} instead; give "
                "--disp-range MIN:MAX if the scene is nearer"
            )
    d_min, d_max = rng
    n_disp = d_max - d_min
    figures["disp_range"] = [d_min, d_max]
    h, w = gl.shape

    strips = row_strips(h, w, n_disp, params)
    figures["strips"] = len(strips)
    if params.method in ("sgm", "bp") and workspace is None:
        from stereomesh.matching.sgm import Workspace

        workspace = Workspace()  # shared by the strips
    parts = []
    timings = {"solver": 0.0, "energy": 0.0}
    terms = {"step": StepPenalty(params.p1, params.p2), "bp": pairwise_term(params)}
    energies = {key: _zero_energy() for key in terms}
    bp_info = []
    for i, (a, b, a0, b0) in enumerate(strips):
        report("disparity", 0.9 * i / len(strips))
        t = time.perf_counter()
        winners, info = _solve(gl[a0:b0], gr[a0:b0], d_min, n_disp, params, workspace)
        if info and params.method == "bp":
            bp_info.append(info)
        elif info:
            figures.update(info)
        winners = winners.rows(a - a0, b - a0)
        parts.append(winners)
        timings["solver"] += time.perf_counter() - t
        t = time.perf_counter()
        # Energy over the rows this strip owns; edges across seams are added below,
        # once the labels on both sides are final.
        labels = np.maximum(winners.best_k, 0)
        for key, term in terms.items():
            e = grid_energy(labels, winners.unary, term)
            for part in e:
                energies[key][part] += e[part]
        timings["energy"] += time.perf_counter() - t
    maps = {f: np.concatenate([getattr(p, f) for p in parts]) if len(parts) > 1
            else getattr(parts[0], f) for f in Winners.__dataclass_fields__}
    for a, _, _, _ in strips[1:]:
        pair = np.maximum(maps["best_k"][a - 1 : a + 1], 0)
        for key, term in terms.items():
            extra = seam_pairwise(pair, term)
            energies[key]["pairwise"] += extra
            energies[key]["total"] += extra
    if len(strips) > 1:
        figures["strip_rows"] = [[int(a), int(b)] for a, b, _, _ in strips]

    t = time.perf_counter()
    best_k = maps["best_k"]
    # The alignment starts from the parabola fit (its support test compares neighbours).
    start = "parabola" if params.subpixel == "alignment" else params.subpixel
    classes, lr_diff, disparity = _kernels.refine_winners(
        best_k, maps["best_right"], maps["c_minus"], maps["c_best"], maps["c_plus"], d_min,
        n_disp, params.lr_max_diff, SUBPIXEL_METHODS.index(start),
        np.float32(max(1.0, params.lr_max_diff)),
    )
    sigma_d = None
    if params.subpixel == "alignment":
        from stereomesh.matching.refine import align_subpixel

        t_align = time.perf_counter()
        disparity, sigma_fit, converged = align_subpixel(
            gl, gr, disparity, window=(params.align_width, params.align_height),
            iterations=params.align_iterations, passes=params.align_passes,
            first_window=(params.align_first_width, params.align_first_height))
        sigma_d = alignment_sigma(sigma_fit, disparity)
        timings["subpixel"] = time.perf_counter() - t_align
        valid = np.isfinite(disparity)
        n_valid = max(np.count_nonzero(valid), 1)  # counts: no copies of masked pixels
        figures["alignment"] = {
            "converged_fraction": float(np.count_nonzero(converged & valid) / n_valid),
            "failed_fraction": float(np.count_nonzero(np.isnan(sigma_fit) & valid) / n_valid),
        }
    confidence = confidence_map(maps["c_best"], maps["c_second"], lr_diff, gl,
                                peak_ratio_scale=_PEAK_RATIO_SCALE[params.method])

    speckles = speckle_mask(disparity, params.speckle_size, params.speckle_range)
    low_conf = (classes == 0) & (confidence < params.min_confidence)
    rejected = speckles | low_conf
    classes[rejected] = 3
    disparity[rejected] = np.nan
    confidence[~np.isfinite(disparity)] = 0.0
    if sigma_d is not None:
        sigma_d[~np.isfinite(disparity)] = np.nan
        figures["median_sigma_d"] = (float(np.nanmedian(sigma_d))
                                     if np.isfinite(sigma_d).any() else None)
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
    labels = np.maximum(best_k, 0).astype(np.int32, copy=False)
    return DisparityResult(disparity, confidence, classes, labels, d_min, n_disp, figures,
                           warnings, sigma_d)


ALIGNMENT_SIGMA_SCALE = 1.8
"""Factor from the Gauss–Newton sigma of the alignment to the disparity's sigma.

The Gauss–Newton covariance assumes independent residuals; neighbouring
windows share pixels and interpolation error is not white, so on its own it
covers only about 35 % of the errors within one sigma. This factor, the floor
and the edge factor below were fitted once on the rendered demo views (frontal
and oblique: about 68–71 % of the errors within one sigma and 91 % within two
on both), so they are an empirical calibration, not a derivation;
``benchmarks/accuracy.py`` prints the coverage they give.
"""

ALIGNMENT_SIGMA_FLOOR = 0.025
"""Smallest disparity sigma, pixels: what the window's residual cannot see
(texture aliasing, rectification error)."""

ALIGNMENT_EDGE_FACTOR = 3.0
"""Sigma factor near depth edges: within 2 px of a disparity step over 1 px
(or of a rejected pixel), where a window may straddle two surfaces. On the
demo views these 8–10 % of the pixels hold 4–5 times the share of errors
beyond two fitted sigmas that the others do."""

ALIGNMENT_SIGMA_FAILED = 0.5
"""Sigma given to pixels whose fit failed (they keep the parabola's value), pixels."""


def alignment_sigma(sigma_fit: np.ndarray, disparity: np.ndarray | None = None) -> np.ndarray:
    """Disparity sigma per pixel from the alignment's Gauss–Newton sigma.

    ``sqrt((ALIGNMENT_SIGMA_SCALE * s)^2 + ALIGNMENT_SIGMA_FLOOR^2)``, times
    ``ALIGNMENT_EDGE_FACTOR`` near depth edges of ``disparity`` (when given),
    and ``ALIGNMENT_SIGMA_FAILED`` where the fit failed (NaN ``s``).

    Examples
    --------
    >>> import numpy as np
    >>> alignment_sigma(np.array([np.nan], np.float32))[0] == ALIGNMENT_SIGMA_FAILED
    np.True_
    >>> round(float(alignment_sigma(np.array([0.0], np.float32))[0]), 3)
    0.025
    """
    if disparity is not None and np.ndim(disparity) == 2:
        from stereomesh.matching._align_kernels import sigma_d_map

        return sigma_d_map(
            np.ascontiguousarray(sigma_fit, np.float32),
            np.ascontiguousarray(disparity, np.float32),
            np.float32(ALIGNMENT_SIGMA_SCALE), np.float32(ALIGNMENT_SIGMA_FLOOR**2),
            np.float32(ALIGNMENT_EDGE_FACTOR), np.float32(ALIGNMENT_SIGMA_FAILED))
    return _alignment_sigma_reference(sigma_fit, disparity)


def _alignment_sigma_reference(sigma_fit, disparity=None):
    """Array version of :func:`alignment_sigma` (numpy and OpenCV), the kernel's reference."""
    # In place in float32: np.hypot's per-element library call costs four times as much.
    s = np.multiply(np.asarray(sigma_fit, np.float32), np.float32(ALIGNMENT_SIGMA_SCALE))
    np.multiply(s, s, out=s)
    np.add(s, np.float32(ALIGNMENT_SIGMA_FLOOR**2), out=s)
    np.sqrt(s, out=s)
    if disparity is not None:
        import cv2

        filled = np.where(np.isfinite(disparity), disparity, np.float32(-1e4)).astype(
            np.float32, copy=False)
        # 5 x 5 maximum minus minimum; OpenCV's dilate and erode ignore the pixels
        # beyond the border as scipy's reflecting filters do in effect (the same
        # values), about six times faster.
        box = np.ones((5, 5), np.uint8)
        spread = cv2.dilate(filled, box) - cv2.erode(filled, box)
        np.multiply(s, np.float32(ALIGNMENT_EDGE_FACTOR), out=s, where=spread > 1.0)
    np.copyto(s, np.float32(ALIGNMENT_SIGMA_FAILED), where=np.isnan(sigma_fit))
    return s


def _check_images(left, right) -> None:
    """Refuse images the engine would misread, saying what to give instead."""
    for name, image in (("left", left), ("right", right)):
        image = np.asarray(image)
        if image.ndim not in (2, 3) or (image.ndim == 3 and image.shape[2] != 3):
            raise ValueError(f"{name} image must be (H, W) or (H, W, 3), got {image.shape}")
        kind = image.dtype
        if kind in (np.uint8, np.uint16):
            continue
        if not np.issubdtype(kind, np.floating):
            raise ValueError(f"{name} image must be uint8, uint16 or float in [0, 1], got {kind}")
        finite = np.isfinite(image)
        if not finite.all():
            raise ValueError(f"{name} image has NaN or infinite values")
        if image.size and (image.min() < 0.0 or image.max() > 1.0):
            raise ValueError(
                f"{name} image is float with values in [{image.min():g}, {image.max():g}]; "
                "float images must be in [0, 1] (convert 0-255 data to uint8)"
            )
    if np.shape(left)[:2] != np.shape(right)[:2]:
        raise ValueError(f"left {np.shape(left)} and right {np.shape(right)} differ in size")


def warm_up(params: DisparityParams | None = None) -> None:
    """Load (or compile) the kernels :func:`compute_disparity` will run with ``params``.

    A fresh process spends a few tenths of a second loading compiled kernels on
    first use; calling this first lets a caller overlap that with reading files.
    """
    params = params or DisparityParams()
    small = dataclasses.replace(params, disp_range="0:8", speckle_size=0,
                                memory_budget_mb=max(params.memory_budget_mb, 16))
    image = np.random.default_rng(0).integers(0, 255, (12, 40, 3), dtype=np.uint8)
    compute_disparity(image, image, small)


def kernels_cached() -> bool:
    """Whether compiled disparity kernels are on disk (else the first call compiles them).

    numba keeps an index file per cached function in ``__pycache__`` beside the
    module, or under ``NUMBA_CACHE_DIR``. A stale index (after a source edit)
    still counts as cached here, so this can only miss a recompile, never
    announce one that does not happen.
    """
    import os
    from pathlib import Path

    here = Path(__file__).resolve().parent
    custom = os.environ.get("NUMBA_CACHE_DIR")
    folders = [Path(custom)] if custom else [here / "__pycache__"]
    return any(any(folder.rglob("_sgm_kernels.sgm_solve-*.nbi")) for folder in folders
               if folder.is_dir())


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

    The strips are sized so that what the solver allocates for one strip fits
    the memory budget; the overlap gives vertical and diagonal paths (or
    messages) room to settle before the kept rows. Semi-global matching needs
    memory growing only with the square root of the rows, so it is split only
    for very large images.
    """
    budget = params.memory_budget_mb * 2**20
    if params.method == "sgm":
        from stereomesh.matching.sgm import plan_block_rows

        def fits(rows):
            return plan_block_rows(rows, width, n_disp, budget, paths=params.paths,
                                   cost=params.cost, p2=params.p2,
                                   window=(params.census_width, params.census_height)
                                   ) is not None
    else:
        # Bytes per (pixel, hypothesis): the cost volume of winner-takes-all;
        # belief propagation keeps every hypothesis only at its coarsest level.
        from stereomesh.matching.bp import bytes_per_cell

        per_cell = {"wta": 1, "bp": bytes_per_cell(
            height, width, n_disp, levels=params.bp_levels, iterations=params.bp_iterations,
            cost=params.cost)}[params.method]

        def fits(rows):
            return rows * width * n_disp * per_cell <= budget

    if fits(height):
        return [(0, height, 0, height)]
    lo, hi = 1, height
    while lo < hi:  # the most rows that fit
        mid = (lo + hi + 1) // 2
        lo, hi = (mid, hi) if fits(mid) else (lo, mid - 1)
    overlap = params.tile_overlap
    core = max(16, lo - 2 * overlap)
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


def _solve(gl, gr, d_min, n_disp, params, workspace=None):
    """Winners of the chosen solver on one strip, and the solver's figures."""
    if params.method == "sgm":
        from stereomesh.matching.sgm import plan_block_rows, semi_global_matching

        h, w = gl.shape
        block_rows = plan_block_rows(h, w, n_disp, params.memory_budget_mb * 2**20,
                                     paths=params.paths, cost=params.cost,
                                     fresh=workspace is None or workspace.nbytes == 0,
                                     p2=params.p2,
                                     window=(params.census_width, params.census_height))
        return semi_global_matching(
            gl, gr, d_min, n_disp, cost=params.cost,
            window=(params.census_width, params.census_height), p1=params.p1, p2=params.p2,
            p2_gradient_scale=params.p2_gradient_scale, paths=params.paths,
            block_rows=block_rows, workspace=workspace,
        ), {"block_rows": block_rows}
    if params.method == "bp":
        # Costs come from the census strings level by level: no volume is built here.
        from stereomesh.matching.bp import belief_propagation_matching

        return belief_propagation_matching(
            gl, gr, d_min, n_disp, pairwise=pairwise_term(params), cost=params.cost,
            window=(params.census_width, params.census_height),
            iterations=params.bp_iterations, levels=params.bp_levels,
            tolerance=params.bp_tolerance, return_info=True, workspace=workspace,
        )
    from stereomesh.matching.winners import select_winners

    cost = _cost_volume(gl, gr, d_min, n_disp, params)
    if params.method == "wta":
        return select_winners(cost, d_min, cost), None
    raise ValueError(f"unknown method {params.method!r}")
