"""Loopy min-sum belief propagation on the 4-connected grid.

Minimises ``E(D) = Σ_p C(p, d_p) + Σ_{p~q} V(d_p, d_q)`` with a Potts or
truncated-linear ``V``. On a tree (a single scanline) min-sum belief propagation
is exact (Pearl 1988); on the grid it is an approximation judged by the same
:func:`~stereomesh.matching.energy.grid_energy` as every other solver.

Method
------
A full-label solver sends ``4·D`` values per pixel and iteration; at 1.4
megapixels and 256 hypotheses one iteration streams gigabytes. This one
narrows the label space coarse to fine, in the spirit of constant-space belief
propagation (Yang, Wang & Ahuja 2010), with *label windows* in place of its
candidate sets:

* **Pyramid.** Level ``l`` joins ``2**l × 2**l`` pixels. Its data cost is the
  block's summed matching cost and its ``V`` the finest level's, as in
  hierarchical belief propagation (Felzenszwalb & Huttenlocher 2006); both are
  divided by ``2**l`` to keep the numbers in range (:func:`level_pairwise`).
  Coarse levels thus follow the data closely and leave the smoothing to the
  finer ones. The coarsest level holds every hypothesis and starts from zero
  messages.
* **Two label windows per pixel** at every finer level, each 32 consecutive
  hypotheses (one 16-bit vector), 16-aligned: window A has the parent's winner
  at least 8 labels inside; window B does the same for the winner of the
  adjacent parent (beside, above or below the child's quarter, or diagonal)
  that differs most from it, so that pixels near a depth edge keep both
  depths. (With window A alone children stay stuck in a parent's wrong
  window: the result shows the blocks of the coarse levels.) Belief
  propagation then runs exactly on each pixel's own label set: a message from
  ``p`` to ``q`` is the min-sum message over ``p``'s labels evaluated at ``q``'s
  (beyond a window the lower envelope rises by ``w`` per label), so neighbours
  with different windows talk correctly. The first messages of a level are
  the parent's, re-read at the child's labels.
* **Messages** take O(window) time: the distance transform of the
  truncated-linear term is two log-step scans across the vector lanes (only
  ``⌈log2(reach)⌉`` steps each, since farther labels meet the truncation), Potts
  one minimum. Costs are integers scaled by ``2**e`` (exact when the weight and
  the truncation cost are multiples of ``2**-e``); messages are stored as uint8.
* **Schedule.** Checkerboard (red-black) updates, ``iterations`` per level;
  the levels held in memory stop early once fewer than ``tolerance`` of the
  pixels change winner in an iteration. The finest level is *streamed*: its
  half-iterations run as a wavefront down the rows (half-iteration ``h`` of row
  ``y`` at step ``y + h + 1``), which reproduces the plain checkerboard exactly
  in ``2·iterations + 2`` rows of memory and picks winners as rows finish; it
  always runs ``iterations`` iterations and reports its last changed share.
* **Costs** are census Hamming distances computed from the census strings
  where a level needs them (one vector per window and pixel), so no cost
  volume is ever held; other costs come from their volume.
* **Left-right check.** The right image's winners come from a second,
  independent solve with the right image as reference (the same solver on the
  mirrored pair). Winners read off the left beliefs along diagonals mostly
  agree with the left labelling wherever the smoothing decided it, so they
  let its errors through; an independent solve does not.
* **Confidence.** Beliefs are defined up to a constant per pixel; they are
  reported relative to the winner's, plus ``CONFIDENCE_OFFSET`` truncation
  costs. Then the peak ratio of :func:`~stereomesh.matching.confidence.confidence_map`
  grows with the belief margin ``c_second − c_best``, the energy it would cost
  to move the pixel at least two labels, instead of saturating.

Memory at 1.4 megapixels and 256 hypotheses: about 60 bytes per pixel for the
census strings and outputs, twice the coarsest level's full hypotheses (a
1/64 of the pixels × 6 bytes per hypothesis) and about 400 bytes per pixel of
the level below the finest (1/4 of the pixels); about 330 MB in all.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from stereomesh.matching.energy import Potts, TruncatedLinear
from stereomesh.matching.winners import Winners

MAX_MESSAGE = 255
"""Messages are stored as uint8: the scaled truncation cost must not exceed this."""
DEFAULT_PAIRWISE = TruncatedLinear(6.0, 2.0)
"""The schema's default ``V`` (``bp_weight``, ``bp_truncation``)."""
_PAD = 0xC000
_LANES = 32


def _kind(pairwise) -> tuple[int, float, float]:
    if isinstance(pairwise, TruncatedLinear):
        return 1, float(pairwise.weight), float(pairwise.truncation)
    if isinstance(pairwise, Potts):
        return 0, float(pairwise.weight), 0.0
    raise TypeError(f"belief propagation takes Potts or TruncatedLinear, got {pairwise!r}")


@dataclass(frozen=True)
class Plan:
    """How one problem is laid out: levels, scaling and the message parameters.

    Attributes
    ----------
    shapes : list of (int, int)
        ``(rows, columns)`` of each level, finest first.
    dp : int
        Hypotheses padded to a whole number of 32-lane vectors.
    e : int
        Costs are scaled by ``2**e`` before rounding to integers.
    pw : tuple of int
        ``(kind, steps, w, cap)``: Potts (0) or truncated linear (1), scan steps,
        scaled weight per label and scaled truncation cost.
    """

    shapes: list
    dp: int
    e: int
    pw: tuple

    @property
    def levels(self) -> int:
        return len(self.shapes)


def plan(height: int, width: int, n_disp: int, pairwise, *, levels: int = 4,
         max_cost: int = 63) -> Plan:
    """Pyramid, scaling and message parameters for a problem of this size.

    Parameters
    ----------
    height, width : int
        Image size, pixels.
    n_disp : int
        Hypotheses.
    pairwise : Potts or TruncatedLinear
        ``V`` in matching-cost units.
    levels : int
        Pyramid levels wanted. Levels stop before a side would drop below 4
        pixels, or block sums of ``max_cost`` would overflow 16 bits.
    max_cost : int
        Largest matching cost (census: the window's bit count).

    Returns
    -------
    Plan
        The scale ``2**e`` is the largest (up to 16) that keeps the scaled
        truncation cost within a byte and every belief below the padding cost.

    Examples
    --------
    >>> p = plan(480, 640, 128, TruncatedLinear(6.0, 2.0), levels=4, max_cost=34)
    >>> p.shapes, p.dp, p.e, p.pw
    ([(480, 640), (240, 320), (120, 160), (60, 80)], 128, 4, (1, 1, 96, 192))
    """
    kind, weight, trunc = _kind(pairwise)
    if weight < 0 or (kind == 1 and trunc < 0):
        raise ValueError("the pairwise weight and truncation must be non-negative")
    shapes = [(int(height), int(width))]
    while (len(shapes) < levels and min(shapes[-1]) >= 8
           and 4 ** len(shapes) * max(max_cost, 1) <= 0xFFFF):
        h, w = shapes[-1]
        shapes.append(((h + 1) // 2, (w + 1) // 2))
    cap_real = weight * trunc if kind == 1 else weight
    top = len(shapes) - 1
    for e in range(4, -9, -1):
        cap = round(cap_real * 2.0**e)
        # Largest scaled block cost plus four messages must stay below the padding.
        if cap <= MAX_MESSAGE and 2.0 ** (top + e) * max_cost + 4 * MAX_MESSAGE < _PAD:
            break
    else:
        raise ValueError(f"pairwise term {pairwise!r} too large for 8-bit messages")
    if kind == 1:
        w = min(round(weight * 2.0**e), cap)
        reach = (cap - 1) // w if w > 0 else 0
        steps = min(5, int(reach).bit_length())
    else:
        w = cap
        steps = 0
    dp = -(-int(n_disp) // _LANES) * _LANES
    return Plan(shapes, dp, e, (kind, steps, int(w), int(cap)))


def _census_source(left, right, d_min, n_disp, window):
    from stereomesh.matching import _bp_kernels, _kernels
    from stereomesh.matching.costs import census_transform

    cl = census_transform(left, window)
    cr = census_transform(right, window)
    invalid = window[0] * window[1] - 1
    pad = _bp_kernels.CENSUS_PAD
    crev = _kernels.census_planes(cr, max(1, -(-invalid // 16)), pad, pad, True)
    dummy = np.zeros((1, 1, 1), np.uint16)
    return (cl, crev, dummy, False, int(d_min), int(n_disp), int(invalid)), cr, invalid


def _mirrored_census_source(cl, cr, d_min, n_disp, invalid):
    """The census source of the mirrored pair (right image as reference).

    Mirroring permutes the bits of every census string the same way in both
    images, which leaves Hamming distances unchanged: the strings are reused.
    """
    from stereomesh.matching import _bp_kernels, _kernels

    cl_m = np.ascontiguousarray(cr[:, ::-1])
    pad = _bp_kernels.CENSUS_PAD
    crev = _kernels.census_planes(np.ascontiguousarray(cl[:, ::-1]), max(1, -(-invalid // 16)),
                                  pad, pad, True)
    dummy = np.zeros((1, 1, 1), np.uint16)
    return (cl_m, crev, dummy, False, int(d_min), int(n_disp), int(invalid))


def _volume_source(volume, d_min):
    h, w, n = volume.shape
    # Only the shape of the census strings is read when costs come from a volume.
    cl = np.zeros((h, w), np.uint64)
    crev = np.zeros((1, 1, 1), np.uint16)
    return (cl, crev, np.ascontiguousarray(volume, np.uint16), True, int(d_min), int(n), 0)


def level_pairwise(plan_: Plan, level: int) -> tuple:
    """``(kind, steps, w, cap)`` of a level: the finest level's halved per level up.

    Each level's data cost is its block's summed cost divided by ``2**level``;
    with ``V`` divided likewise this is hierarchical belief propagation's coarse
    energy (Felzenszwalb & Huttenlocher 2006: summed data, the same ``V``), whose
    coarse levels follow the data closely and leave the smoothing to the finer.
    (Dividing the data alone would keep the fine grid's energy at every level;
    on the reference pairs those coarse levels smooth thin structures away.)

    Examples
    --------
    >>> p = plan(480, 640, 128, TruncatedLinear(6.0, 2.0), levels=4, max_cost=34)
    >>> [level_pairwise(p, level) for level in range(3)]
    [(1, 1, 96, 192), (1, 1, 48, 96), (1, 1, 24, 48)]
    """
    kind, _, w, cap = plan_.pw
    cap_l = int(round(cap / 2**level))
    if kind == 0:
        return (0, 0, cap_l, cap_l)
    w_l = min(int(round(w / 2**level)), cap_l)
    reach = (cap_l - 1) // w_l if w_l > 0 else 0
    return (1, min(5, int(reach).bit_length()), w_l, cap_l)


def _level_specs(plan_, stream):
    """``(shape, dtype)`` of every level's arrays, coarsest first (see :func:`_pyramid`)."""
    top = plan_.levels - 1
    hl, wl = plan_.shapes[top]
    specs = [((hl, wl, plan_.dp), np.uint16), ((hl, 4, wl, plan_.dp), np.uint8),
             ((hl, wl), np.int32)]
    for level in range(top - 1, 0 if stream else -1, -1):
        hl, wl = plan_.shapes[level]
        specs += [((hl, wl, 2, _LANES), np.uint16), ((hl, wl, 2), np.int32),
                  ((hl, 4, wl, 2, _LANES), np.uint8), ((hl, wl), np.int32)]
    return specs


def _pyramid(src, plan_, iterations, tolerance, stream, offset, workspace=None,
             winners_only=False):
    """Solve every level; returns the finest level's result and per-level figures.

    The result is ``("streamed", winners)``, ``("stored", (data, off, msg))`` for
    a windowed finest level held in memory, or ``("full", (data, msg))`` when
    the finest level is the one holding every hypothesis. The levels' arrays
    live in ``workspace`` (a :class:`~stereomesh.matching.sgm.Workspace`),
    whose memory a caller solving many pairs reuses. With ``winners_only`` a
    streamed finest level fills only the winners.
    """
    from stereomesh.matching import _bp_kernels as K
    from stereomesh.matching.sgm import Workspace

    e, dp = plan_.e, plan_.dp
    top = plan_.levels - 1
    hl, wl = plan_.shapes[top]
    nv = dp // _LANES
    pw = level_pairwise(plan_, top)
    arrays = (workspace or Workspace()).arrays(_level_specs(plan_, stream))
    data, msg, lab = arrays[:3]
    level_arrays = arrays[3:]
    K.fill_full_level_data(src, top, e, hl, wl, nv, data)
    msg[...] = 0
    lab[...] = -1
    run, changed = K.iterate_full_level(data, msg, lab, pw, iterations, tolerance)
    figures = [{"level": top, "iterations": run, "changed": changed}]
    if top == 0:
        return ("full", (data, msg)), figures
    parent = (K.full_level_labels(data, msg), np.zeros((hl, wl, 2), np.int32),
              msg.reshape(hl, 4, wl, nv, _LANES), True, pw[2])
    for level in range(top - 1, -1, -1):
        hl, wl = plan_.shapes[level]
        pw = level_pairwise(plan_, level)
        if level == 0 and stream:
            from stereomesh.matching.sgm import _lane_columns

            bounds = _lane_columns(wl, None)  # even shares: no horizontal sweep here
            out = K.stream_finest(src, e, dp, parent, pw, int(iterations), bounds, offset,
                                  winners_only)
            counts = out[5]
            changed = float(counts.sum() / (hl * wl)) if iterations > 1 else 1.0
            figures.append({"level": 0, "iterations": int(iterations), "changed": changed})
            return ("streamed", out[:5]), figures
        data, off, msg, lab = level_arrays[:4]
        level_arrays = level_arrays[4:]
        K.fill_level(src, level, e, hl, wl, dp, parent, pw, data, off, msg, lab)
        run, changed = K.iterate_level(data, off, msg, lab, pw, iterations, tolerance)
        figures.append({"level": level, "iterations": run, "changed": changed})
        parent = (K.level_labels(data, off, msg), off, msg, False, pw[2])
    return ("stored", (data, off, msg)), figures


def _dense(result, n_labels, scale):
    """Beliefs (H, W, n_labels) float32 of a level held in memory (inf outside its windows)."""
    from stereomesh.matching import _bp_kernels as K

    form, arrays = result
    if form == "full":
        data, msg = arrays
        return K.full_dense_beliefs(data, msg, n_labels, scale)
    data, off, msg = arrays
    return K.dense_beliefs(data, off, msg, n_labels, scale)


CONFIDENCE_OFFSET = 10.0
"""Reported beliefs sit this many truncation costs above 0 at the winner (see
:func:`belief_propagation_matching`)."""


def _truncation_cost(pairwise) -> float:
    kind, weight, trunc = _kind(pairwise)
    return weight * trunc if kind == 1 else weight


def _check_common(iterations, levels, tolerance):
    if iterations < 1 or levels < 1:
        raise ValueError("iterations and levels must be at least 1")
    if not 0.0 <= tolerance <= 1.0:
        raise ValueError(f"tolerance must be in [0, 1], got {tolerance}")


def belief_propagation(
    cost: np.ndarray,
    pairwise: Potts | TruncatedLinear,
    *,
    iterations: int = 5,
    levels: int = 4,
    tolerance: float = 1e-3,
    return_info: bool = False,
):
    """Beliefs of loopy min-sum belief propagation on a cost volume.

    The volume form of :func:`belief_propagation_matching` (same pyramid and
    windows), for small problems and for checks: every level is held in memory.

    Parameters
    ----------
    cost : (H, W, D) array
        Unary costs, non-negative and finite (any real dtype). They are rounded
        to multiples of ``2**-q`` with the largest ``q <= 4`` that keeps them
        below 2**12 (integers stay exact).
    pairwise : Potts or TruncatedLinear
        The pairwise term ``V`` in cost units.
    iterations : int
        Iterations per pyramid level (one iteration = both checkerboard colours).
    levels : int
        Pyramid levels, 1 for none.
    tolerance : float
        A level stops once the share of pixels whose winning label changed in an
        iteration falls below this.

    Returns
    -------
    (H, W, D) float32
        Beliefs ``C(p, ·) + Σ incoming messages`` over each pixel's label windows
        (every label with ``levels=1`` or ``D <= 32``), ``inf`` elsewhere; their
        per-pixel minimum is the belief-propagation labelling. With
        ``return_info``, also a dict with ``iterations`` and ``changed`` of the
        finest level and ``levels``, the figures of every level.

    Examples
    --------
    >>> import numpy as np
    >>> cost = np.random.default_rng(0).integers(0, 9, (6, 8, 4)).astype(np.float32)
    >>> b = belief_propagation(cost, TruncatedLinear(2.0, 2.0), iterations=4, levels=2)
    >>> b.shape
    (6, 8, 4)
    """
    cost = np.asarray(cost)
    if cost.ndim != 3 or 0 in cost.shape:
        raise ValueError(f"cost must be a non-empty (H, W, D) volume, got shape {cost.shape}")
    if not np.isfinite(cost).all() or cost.min() < 0:
        raise ValueError("costs must be finite and non-negative")
    _check_common(iterations, levels, tolerance)
    top = float(cost.max())
    q = 0
    while q < 4 and top * 2.0 ** (q + 1) < 2**12:
        q += 1
    quantised = np.rint(cost * 2.0**q).astype(np.uint16)
    kind, weight, trunc = _kind(pairwise)
    scaled = (TruncatedLinear(weight * 2.0**q, trunc) if kind == 1 else Potts(weight * 2.0**q))
    h, w, d = cost.shape
    plan_ = plan(h, w, d, scaled, levels=levels, max_cost=int(quantised.max()))
    src = _volume_source(quantised, 0)
    result, figures = _pyramid(src, plan_, iterations, tolerance, False, 0.0)
    beliefs = _dense(result, d, 2.0 ** (-plan_.e - q))
    info = {"iterations": figures[-1]["iterations"], "changed": figures[-1]["changed"],
            "levels": figures}
    return (beliefs, info) if return_info else beliefs


def _winners(src, plan_, d_min, n_disp, iterations, tolerance, stream, offset, workspace=None,
             winners_only=False):
    """Left winners ``(best_k, c_best, c_second, c_minus, c_plus)`` of one solve.

    With ``winners_only`` (the mirrored solve, which serves the consistency
    check) only ``best_k`` is meaningful.
    """
    from stereomesh.matching import _kernels

    result, figures = _pyramid(src, plan_, iterations, tolerance, stream, offset, workspace,
                               winners_only)
    if result[0] == "streamed":
        return result[1], figures
    # The finest level in memory: the same rules through the dense beliefs.
    beliefs = _dense(result, n_disp, 2.0**-plan_.e)
    best_k, c1, c2, cm, cp = _kernels.select_left(beliefs, int(d_min))
    cm = np.where(np.isfinite(cm), cm, c1)
    cp = np.where(np.isfinite(cp), cp, c1)
    valid = best_k >= 0
    rel = [np.where(valid, v - c1 + np.float32(offset), 0).astype(np.float32)
           for v in (c2, cm, cp)]
    c1 = np.where(valid, np.float32(offset), 0).astype(np.float32)
    return (best_k, c1, *rel), figures


def belief_propagation_matching(
    left: np.ndarray,
    right: np.ndarray,
    d_min: int,
    n_disp: int,
    *,
    pairwise: Potts | TruncatedLinear = DEFAULT_PAIRWISE,
    cost: str = "census",
    window: tuple[int, int] = (7, 5),
    iterations: int = 5,
    levels: int = 4,
    tolerance: float = 1e-3,
    stream: bool = True,
    offset: float | None = None,
    return_info: bool = False,
    workspace=None,
):
    """Belief-propagation disparity of a rectified pair, straight to the winners.

    Costs are computed from the census strings where a level needs them and
    the finest level is streamed (see the module notes), so memory grows with
    the pixels, not with pixels × hypotheses. The right image's winners come
    from a second solve with the right image as reference.

    Parameters
    ----------
    left, right : (H, W) float arrays
        Rectified grey images, 0–255 scale; a left pixel ``x`` matches right
        pixel ``x − d``.
    d_min, n_disp : int
        Hypothesis ``k`` is disparity ``d_min + k`` pixels, ``0 <= k < n_disp``.
    pairwise : Potts or TruncatedLinear
        ``V`` in matching-cost units per label (the energy's pairwise term).
    cost : str
        A name from :data:`~stereomesh.matching.costs.COST_FUNCTIONS`; census
        runs from the strings, any other cost from its volume.
    window : (int, int)
        Matching window ``(width, height)``, pixels.
    iterations, levels, tolerance
        As for :func:`belief_propagation`; the streamed finest level always runs
        ``iterations`` iterations.
    stream : bool
        False holds the finest level in memory like the others (same result,
        more memory; for checks).
    offset : float, optional
        Reported beliefs are ``offset + (b − b_winner)`` in cost units; by
        default ``CONFIDENCE_OFFSET`` truncation costs (see the module notes).
    return_info : bool
        Also return the solver's figures.
    workspace : stereomesh.matching.sgm.Workspace, optional
        Memory for the levels, kept for the next call (fresh memory costs a
        page fault per page; a caller solving many pairs passes one).

    Returns
    -------
    Winners
        ``best_k`` and ``best_right`` (int32, -1 where no hypothesis is valid);
        ``c_best`` (float32, always ``offset``), ``c_second``, ``c_minus`` and
        ``c_plus`` (beliefs relative to the winner's, plus ``offset``; over the
        labels the windows hold); ``unary``, the census cost at the winner. With
        ``return_info``, also a dict with ``iterations`` and ``changed`` (the
        finest level's iterations and the share of pixels whose winner changed
        in its last one) and ``levels`` (those of every level, coarsest first).

    Examples
    --------
    >>> import numpy as np
    >>> rng = np.random.default_rng(0)
    >>> right = (rng.random((40, 90)) * 255).astype(np.float32)
    >>> left = np.roll(right, 7, axis=1)
    >>> w = belief_propagation_matching(left, right, 0, 48)
    >>> int(np.median(w.best_k[:, 20:])), int(np.median(w.best_right[:, :60]))
    (7, 7)
    """
    from stereomesh.matching import _bp_kernels as K

    left = np.ascontiguousarray(left, np.float32)
    right = np.ascontiguousarray(right, np.float32)
    if left.ndim != 2 or left.shape != right.shape:
        raise ValueError(f"need two grey images of one shape, got {left.shape}, {right.shape}")
    if n_disp < 1:
        raise ValueError(f"n_disp must be at least 1, got {n_disp}")
    _check_common(iterations, levels, tolerance)
    h, w = left.shape
    # The right image's own solve is the left solve of the mirrored pair: right
    # pixel xr matches left pixel xr + d, which mirrored reads x' matches x' - d.
    if cost == "census":
        src, cr, invalid = _census_source(left, right, d_min, n_disp, window)
        src_r = _mirrored_census_source(src[0], cr, d_min, n_disp, invalid)
        max_cost = invalid
    else:
        from stereomesh.matching.costs import COST_FUNCTIONS

        volume = COST_FUNCTIONS[cost](left, right, d_min, n_disp, window=window)
        src = _volume_source(volume, d_min)
        src_r = _volume_source(COST_FUNCTIONS[cost](right[:, ::-1], left[:, ::-1], d_min,
                                                    n_disp, window=window), d_min)
        max_cost = int(max(volume.max(), src_r[2].max())) if volume.size else 0
    plan_ = plan(h, w, n_disp, pairwise, levels=levels, max_cost=max_cost)
    if offset is None:
        offset = CONFIDENCE_OFFSET * _truncation_cost(pairwise)
    if workspace is None:
        from stereomesh.matching.sgm import Workspace

        workspace = Workspace()  # shared by both solves
    (best_k, c1, c2, cm, cp), figures = _winners(src, plan_, d_min, n_disp, iterations,
                                                 tolerance, stream, offset, workspace)
    right_k = _winners(src_r, plan_, d_min, n_disp, iterations, tolerance, stream, offset,
                       workspace, winners_only=True)[0][0]
    best_right = np.ascontiguousarray(right_k[:, ::-1])
    labels = np.maximum(best_k, 0)
    if cost == "census":
        unary = K.census_at_labels(src[0], cr, labels, int(d_min), float(invalid))
    else:
        unary = np.take_along_axis(volume, labels[..., None], axis=2)[..., 0].astype(np.float32)
    winners = Winners(best_k, c1, c2, cm, cp, best_right, unary)
    info = {"iterations": figures[-1]["iterations"], "changed": figures[-1]["changed"],
            "levels": figures}
    return (winners, info) if return_info else winners


def window_labels(off: np.ndarray) -> np.ndarray:
    """The labels of two windows per pixel: ``(H, W, 2)`` offsets to ``(H, W, 64)`` labels.

    Examples
    --------
    >>> window_labels(np.array([[[0, 48]]]))[0, 0, [0, 31, 32, 63]].tolist()
    [0, 31, 48, 79]
    """
    lanes = np.arange(_LANES)
    return np.concatenate([off[..., :1] + lanes, off[..., 1:] + lanes], axis=-1)


def belief_propagation_reference(data, labels, msg, pw, iterations):
    """Plain checkerboard belief propagation on per-pixel label sets, in numpy.

    Slow reference for the tests, with brute-force ``O(P²)`` messages: the
    message from ``p`` to ``q`` at ``q``'s entry ``i`` is ``min_j h(j) + V(l_p(j),
    l_q(i))`` over ``p``'s entries ``j``, less ``min_j h(j)``.

    Parameters
    ----------
    data : (H, W, P) int array
        Scaled data cost of entry ``i`` of each pixel's label set.
    labels : (H, W, P) int array
        The label of each entry (a label may appear twice).
    msg : (H, 4, W, P) int array
        Starting messages into each pixel from above, below, left and right, at
        the receiver's entries; updated in place.
    pw : tuple
        ``(kind, steps, w, cap)`` as in :class:`Plan` (``steps`` unused).
    iterations : int
        Both colours, this many times.

    Returns
    -------
    (H, W, P) int64
        Beliefs ``data + Σ messages``.

    Examples
    --------
    >>> import numpy as np
    >>> data = np.array([[[0, 9], [5, 0]]])           # two pixels, labels 0 and 1
    >>> labels = np.array([[[0, 1], [0, 1]]])
    >>> msg = np.zeros((1, 4, 2, 2), np.int64)
    >>> belief_propagation_reference(data, labels, msg, (1, 1, 3, 3), 1)[0, 1].tolist()
    [5, 3]
    """
    kind, _, w, cap = pw
    data = np.asarray(data, np.int64)
    labels = np.asarray(labels, np.int64)
    h, wd, _ = data.shape

    def message(hv, from_labels, to_labels):
        dist = np.abs(from_labels[:, None] - to_labels[None, :])
        v = np.minimum(w * dist, cap) if kind == 1 else np.where(dist > 0, cap, 0)
        return (hv[:, None] + v).min(axis=0) - hv.min()

    # (direction into the neighbour, dy, dx, the neighbour's slot for this sender)
    moves = ((0, -1, 0, 1), (1, 1, 0, 0), (2, 0, -1, 3), (3, 0, 1, 2))
    for _ in range(iterations):
        for colour in (0, 1):
            for y in range(h):
                for x in range(wd):
                    if (x + y) % 2 != colour:
                        continue
                    tot = data[y, x] + msg[y, :, x].sum(axis=0)
                    for own, dy, dx, slot in moves:
                        qy, qx = y + dy, x + dx
                        if 0 <= qy < h and 0 <= qx < wd:
                            msg[qy, slot, qx] = message(tot - msg[y, own, x], labels[y, x],
                                                        labels[qy, qx])
    return data + msg.sum(axis=1)


def memory_bytes(height: int, width: int, n_disp: int, *, levels: int = 4,
                 iterations: int = 5, cost: str = "census") -> int:
    """Bytes :func:`belief_propagation_matching` allocates for an image of this size.

    Census strings of both solves, the output maps, one solve's levels held in
    memory (two windows of data and four messages per pixel below the finest,
    every hypothesis at the coarsest) and the streamed ring; other costs add
    both solves' volumes (uint8 and a uint16 copy).

    Examples
    --------
    >>> memory_bytes(1026, 1368, 256) < 400 * 2**20
    True
    """
    p = plan(height, width, n_disp, DEFAULT_PAIRWISE, levels=levels)
    pixels = height * width
    # Strings and 16-bit planes of both solves; twelve 4-byte maps.
    total = pixels * 44 + pixels * 48
    windowed = 2 * _LANES * (2 + 4) + 12
    for level, (h, w) in enumerate(p.shapes):
        if level == p.levels - 1:
            total += h * w * p.dp * (6 if level > 0 else 10)
        elif level > 0:
            total += h * w * windowed
    total += (2 * iterations + 2) * width * windowed
    if cost != "census":
        total += 2 * pixels * n_disp * 3
    return int(total)


def bytes_per_cell(height: int, width: int, n_disp: int, **kwargs) -> float:
    """:func:`memory_bytes` per pixel and hypothesis, for the strip planner.

    Examples
    --------
    >>> round(bytes_per_cell(480, 640, 128), 2)
    1.86
    """
    return memory_bytes(height, width, n_disp, **kwargs) / max(1, height * width * n_disp)
