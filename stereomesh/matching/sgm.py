"""Semi-global matching: the grid energy approximated by 1-D paths.

Each path minimises the chain energy ``Σ C(p, d_p) + Σ V(d_p, d_q)`` with
``V = 0`` for equal labels, ``P1`` for a step of one and ``P2`` beyond
(Hirschmüller 2008); the per-path costs are summed over 4 or 8 directions and
the winner taken per pixel.

:func:`semi_global_matching` is the solver the engine runs: fused, row by row,
on 16-bit vector lanes, in memory growing with the square root of the rows.
:func:`aggregate_costs` builds the whole summed volume the plain way; it is the
reference the fused solver is tested against, and serves whoever needs the
volume itself.
"""

from __future__ import annotations

import numpy as np

from stereomesh.matching.winners import Winners
from stereomesh.params import MAX_P2, DisparityParams

# The schema's defaults are the solver's defaults (a dataclass keeps each
# field's default as a class attribute).
_D = DisparityParams

# Relative work of the parts of one row, measured on this project's reference
# machine (2 cores, AVX-512): going down, the two horizontal paths that lane 0
# sweeps over the whole row, and going up, the winner selection that lane 1
# runs, both against the vertical and diagonal paths of all columns (= 1).
# They only set the first split; the solver rebalances as it measures, and
# results do not depend on either.
_HORIZONTAL_LOAD = {True: (0.45, 0.0), False: (0.0, 0.45)}


def aggregate_costs(
    cost: np.ndarray,
    gray: np.ndarray | None = None,
    *,
    p1: int = _D.p1,
    p2: int = _D.p2,
    p2_gradient_scale: float = _D.p2_gradient_scale,
    paths: int = _D.paths,
) -> np.ndarray:
    """Sum of the semi-global path costs over 4 or 8 directions.

    Parameters
    ----------
    cost : (H, W, D) uint8 array
        Matching cost volume.
    gray : (H, W) array, optional
        Left grey image; ``P2`` is divided by ``1 + |ΔI| / p2_gradient_scale``
        between neighbours that differ by ``ΔI`` in intensity, never below
        ``P1 + 1``. Without it, ``P2`` is constant.
    p1, p2 : int
        Penalties for a disparity step of one and of more than one, in cost units.
    p2_gradient_scale : float
        Intensity difference (grey levels) that halves ``P2``; 0 turns the
        adaptation off.
    paths : {4, 8}
        Horizontal and vertical paths, or those plus the diagonals.

    Returns
    -------
    (H, W, D) uint16
        Aggregated costs.

    Examples
    --------
    >>> import numpy as np
    >>> cost = np.random.default_rng(1).integers(0, 20, (6, 7, 5)).astype(np.uint8)
    >>> aggregate_costs(cost, paths=4).shape
    (6, 7, 5)
    """
    cost = np.ascontiguousarray(cost)
    if cost.ndim != 3 or cost.dtype != np.uint8:
        raise ValueError(f"cost must be an (H, W, D) uint8 volume, got {cost.dtype} {cost.shape}")
    if paths not in (4, 8):
        raise ValueError(f"paths must be 4 or 8, got {paths}")
    if not (0 <= p1 < p2 <= MAX_P2):
        raise ValueError(f"need 0 <= p1 < p2 <= {MAX_P2}, got p1={p1}, p2={p2}")
    h, w, _ = cost.shape
    if gray is None:
        gray = np.zeros((h, w), np.float32)
        p2_gradient_scale = 0.0
    gray = np.ascontiguousarray(gray, dtype=np.float32)
    if gray.shape != (h, w):
        raise ValueError(f"gray {gray.shape} does not match the cost volume {(h, w)}")
    from stereomesh.matching import _kernels

    total = np.empty(cost.shape, np.uint16)
    g = float(p2_gradient_scale)
    diag = paths == 8
    _kernels.aggregate_horizontal_both(cost, gray, int(p1), int(p2), g, total)
    _kernels.aggregate_vertical(cost, gray, int(p1), int(p2), g, total, False, diag)
    _kernels.aggregate_vertical(cost, gray, int(p1), int(p2), g, total, True, diag)
    return total


def semi_global_matching(
    left: np.ndarray,
    right: np.ndarray,
    d_min: int,
    n_disp: int,
    *,
    cost: str = "census",
    window: tuple[int, int] = (_D.census_width, _D.census_height),
    p1: int = _D.p1,
    p2: int = _D.p2,
    p2_gradient_scale: float = _D.p2_gradient_scale,
    paths: int = _D.paths,
    block_rows: int | None = None,
    workspace: Workspace | None = None,
) -> Winners:
    """Semi-global matching of a rectified pair, straight to the winners.

    The same result as :func:`aggregate_costs` followed by picking winners, in
    ``O(sqrt(H) · W · D)`` memory instead of a volume: census costs are computed
    a row at a time, the forward path sums are recomputed block by block from
    checkpoints (see :mod:`._sgm_kernels`), winners of the left and the right
    image are picked as the pass up finishes each row, and all arithmetic runs
    on 16-bit vector lanes.

    Parameters
    ----------
    left, right : (H, W) float arrays
        Rectified grey images, 0–255 scale.
    d_min, n_disp : int
        Hypothesis ``k`` is disparity ``d_min + k``, ``0 <= k < n_disp``.
    cost : str
        A name from :data:`~stereomesh.matching.costs.COST_FUNCTIONS`. Census
        runs row by row; any other cost is computed as a volume first.
    window : (int, int)
        Matching window ``(width, height)`` of the cost.
    p1, p2, p2_gradient_scale, paths
        As for :func:`aggregate_costs`.
    block_rows : int, optional
        Rows per recomputed block: ``H`` stores every forward sum (fastest, most
        memory); by default the size that needs least memory
        (:func:`best_block_rows`); :func:`plan_block_rows` picks for a budget.
    workspace : Workspace, optional
        Work memory to reuse across calls (fresh memory costs page faults).

    Returns
    -------
    Winners

    Examples
    --------
    >>> import numpy as np
    >>> rng = np.random.default_rng(0)
    >>> right = (rng.random((30, 60)) * 255).astype(np.float32)
    >>> left = np.roll(right, 5, axis=1)
    >>> w = semi_global_matching(left, right, 0, 16)
    >>> int(np.median(w.best_k[:, 20:]))
    5
    """
    from stereomesh.matching import _kernels, _sgm_kernels
    from stereomesh.matching._simd import LANES
    from stereomesh.matching.costs import COST_FUNCTIONS, MAX_CENSUS_BITS

    left = np.ascontiguousarray(left, np.float32)
    right = np.ascontiguousarray(right, np.float32)
    if left.ndim != 2 or left.shape != right.shape:
        raise ValueError(f"need two grey images of one shape, got {left.shape}, {right.shape}")
    if paths not in (4, 8):
        raise ValueError(f"paths must be 4 or 8, got {paths}")
    if not (0 <= p1 < p2 <= MAX_P2):
        raise ValueError(f"need 0 <= p1 < p2 <= {MAX_P2}, got p1={p1}, p2={p2}")
    if n_disp < 1:
        raise ValueError(f"n_disp must be at least 1, got {n_disp}")
    h, w = left.shape
    if block_rows is None:
        block_rows = best_block_rows(h, paths)
    block_rows = int(min(max(1, block_rows), h))
    if cost == "census":
        ww, wh = (int(v) for v in window)
        invalid = ww * wh - 1
        if ww % 2 == 0 or wh % 2 == 0 or invalid > MAX_CENSUS_BITS:
            raise ValueError(f"census window must have odd sides and at most "
                             f"{MAX_CENSUS_BITS} comparisons, got {window}")
        volume = np.zeros((1, 1, 1), np.uint8)
        max_cost = invalid
    else:
        volume = np.ascontiguousarray(COST_FUNCTIONS[cost](left, right, d_min, n_disp,
                                                           window=window))
        invalid = 0
        max_cost = int(volume.max()) if volume.size else 0
    # Larger than any path cost can reach by more than P2: padded hypotheses stay inert.
    pad_cost = max_cost + 2 * p2 + 1
    # Path values never exceed the largest cost plus P2 (the step term is at
    # most P2 above the previous minimum, which is subtracted).
    narrow = max_cost + p2 <= 255
    byte_paths = _sgm_kernels.byte_lanes_fit(max_cost, p2, pad_cost, narrow)
    lanes = 2 * LANES if byte_paths else LANES
    dp = -(-n_disp // lanes) * lanes
    if cost == "census":
        planes = -(-invalid // 16)
        pads = _sgm_kernels._right_pad(d_min, dp)
        left_planes = _kernels.census_planes_of_image(
            _kernels.edge_padded(left, wh // 2, ww // 2), ww, wh, planes, 0, 0, False)
        right_planes = _kernels.census_planes_of_image(
            _kernels.edge_padded(right, wh // 2, ww // 2), ww, wh, planes, *pads, True)
    else:
        left_planes = right_planes = np.zeros((1, 1, 1), np.uint16)
    # Costs travel in the low bits of the stored forward sums when they fit.
    packing = _sgm_kernels.cost_packing(max_cost, p2, pad_cost, paths == 8)
    shapes = _sgm_kernels.buffer_shapes(h, w, dp, paths == 8, block_rows, narrow, byte_paths)
    buffers = (workspace or Workspace()).arrays(shapes)
    best_k, c1, c2, cm, cp, best_right = _sgm_kernels.sgm_solve(
        left_planes, right_planes, volume, cost != "census", left, int(d_min), int(n_disp), dp,
        int(invalid), int(pad_cost), int(p1), int(p2), float(p2_gradient_scale), paths == 8,
        block_rows, *packing, _lane_columns(w, None), _lane_columns(w, True),
        _lane_columns(w, False), *buffers,
    )
    labels = np.maximum(best_k, 0)
    if cost == "census":
        unary = _sgm_kernels.census_unary(left_planes, right_planes, labels, int(d_min),
                                          float(invalid))
    else:
        unary = np.take_along_axis(volume, labels[..., None], axis=2)[..., 0].astype(np.float32)
    return Winners(best_k, c1, c2, cm, cp, best_right, unary)


class Workspace:
    """Work memory of :func:`semi_global_matching`, kept for the next call.

    Fresh memory costs a page fault per page on first use, which on some
    machines takes longer than the matching; a caller solving many pairs (or
    many strips) passes one workspace to every call. It grows to the largest
    request and is released with the object. While it is empty, the engine
    plans for the least memory (see :func:`plan_block_rows`).

    Examples
    --------
    >>> ws = Workspace()
    >>> a, b = ws.arrays([((4, 8), np.uint16), ((3,), np.uint8)])
    >>> a.shape, b.dtype.name, a.ctypes.data % 64
    ((4, 8), 'uint8', 0)
    """

    ALIGN = 64

    def __init__(self) -> None:
        self._buffer = np.empty(0, np.uint8)

    @property
    def nbytes(self) -> int:
        return self._buffer.nbytes

    def arrays(self, specs: list[tuple[tuple[int, ...], type]]) -> list[np.ndarray]:
        """Arrays of the given ``(shape, dtype)``, each 64-byte aligned, in this memory."""
        sizes = [int(np.prod(shape)) * np.dtype(dtype).itemsize for shape, dtype in specs]
        padded = [-(-n // self.ALIGN) * self.ALIGN for n in sizes]
        need = sum(padded) + self.ALIGN
        if self._buffer.size < need:
            self._buffer = np.empty(need, np.uint8)
        start = -self._buffer.ctypes.data % self.ALIGN
        out = []
        for (shape, dtype), n, step in zip(specs, sizes, padded, strict=True):
            out.append(self._buffer[start : start + n].view(dtype).reshape(shape))
            start += step
        return out


def best_block_rows(height: int, paths: int = _D.paths) -> int:
    """Rows per recomputed block that minimise checkpoints plus block buffer.

    Checkpoints hold ``ndir`` rows of path values each (3 directions from above
    with 8 paths, 1 with 4), one per block; the block buffer holds one row of
    sums per block row: ``(H / k) · ndir + k`` rows, least at ``k = sqrt(ndir · H)``.
    """
    ndir = 3 if paths == 8 else 1
    return max(1, min(height, int(round(np.sqrt(ndir * height)))))


def memory_bytes(height: int, width: int, n_disp: int, *, paths: int = _D.paths,
                 cost: str = _D.cost, block_rows: int | None = None, p2: int = _D.p2,
                 window: tuple[int, int] = (_D.census_width, _D.census_height)) -> int:
    """Bytes :func:`semi_global_matching` allocates for an image of this size.

    Work buffers, census strings, the output maps and (for costs other than
    census) the cost volume; ``block_rows``, ``p2`` and ``window`` as for
    :func:`semi_global_matching`. Path buffers are bytes only when the largest
    cost plus ``p2`` fits one; volume costs are assumed not to (their largest
    value is known only once they are computed).
    """
    from stereomesh.matching._sgm_kernels import buffer_shapes
    from stereomesh.matching._simd import LANES

    dp = -(-n_disp // (2 * LANES)) * 2 * LANES  # the wider padding of byte lanes, at most
    k = best_block_rows(height, paths) if block_rows is None else min(block_rows, height)
    max_cost = window[0] * window[1] - 1 if cost == "census" else 255
    narrow = max_cost + p2 <= 255
    work = sum(int(np.prod(shape)) * np.dtype(dtype).itemsize
               for shape, dtype in buffer_shapes(height, width, dp, paths == 8, k, narrow))
    pixels = height * width
    # The edge-padded float32 images the census is taken of, and its 16-bit
    # planes (up to 4 per image).
    census = pixels * 4 * 2 + 4 * 2 * (pixels + height * (width + 2 * dp))
    volume = 0 if cost == "census" else pixels * n_disp
    return work + census + volume + pixels * 4 * 7


def plan_block_rows(height: int, width: int, n_disp: int, budget_bytes: int, *,
                    paths: int = _D.paths, cost: str = _D.cost, fresh: bool = False,
                    p2: int = _D.p2,
                    window: tuple[int, int] = (_D.census_width, _D.census_height)) -> int | None:
    """Rows per block for a memory budget, or None if even the smallest need does not fit.

    Larger blocks recompute fewer rows (the first pass covers all rows above
    the last block: ``2 H - k`` forward rows in all, ``H`` when the block is
    the whole image), so the largest block that fits is taken, unless the
    work memory is ``fresh`` (a new :class:`Workspace`): the first touch of
    new memory costs more than recomputing rows (on this project's reference
    VM about 0.3 ms per block row of memory at 1.4 MP x 256 hypotheses,
    against 0.05 ms per recomputed row), so a one-off call takes the block
    that needs least memory, and a workspace grows once it is reused.
    """
    def need(k):
        return memory_bytes(height, width, n_disp, paths=paths, cost=cost, block_rows=k, p2=p2,
                            window=window)

    lo = best_block_rows(height, paths)
    if need(lo) > budget_bytes:
        return None
    if fresh:
        return lo
    hi = height
    while lo < hi:  # need() grows with k above the least-memory size
        mid = (lo + hi + 1) // 2
        lo, hi = (mid, hi) if need(mid) <= budget_bytes else (lo, mid - 1)
    return lo


def _lane_columns(width: int, forward: bool | None, lanes: int | None = None) -> np.ndarray:
    """Column slices of the worker lanes for one pass (see ``_sgm_kernels``).

    Going down, lane 0 sweeps the horizontal paths; going up, lane 1 picks the winners;
    the columns are shared so that every lane ends each row at the same time.
    ``forward`` None: the first pass, with neither (even shares).
    """
    if lanes is None:
        import numba

        lanes = numba.get_num_threads()
    lanes = max(1, min(lanes, width))
    fixed = np.zeros(lanes)
    if forward is not None:
        fixed[0] += _HORIZONTAL_LOAD[forward][0]
        fixed[min(1, lanes - 1)] += _HORIZONTAL_LOAD[forward][1]
    # Water-fill the columns (total work 1) over the lanes' fixed loads.
    level = (1.0 + fixed.sum()) / lanes
    for _ in range(lanes):
        share = np.clip(level - fixed, 0.0, None)
        level += (1.0 - share.sum()) / max(1, int((share > 0).sum()))
    share = np.clip(level - fixed, 0.0, None)
    share /= share.sum()
    bounds = np.concatenate([[0], np.rint(np.cumsum(share) * width)]).astype(np.int64)
    bounds[-1] = width
    return bounds


def path_costs_reference(cost_line: np.ndarray, p1: int, p2: int) -> np.ndarray:
    """One left-to-right path's costs ``L(x, d)`` along a scanline, in plain numpy.

    Slow reference for the tests; ``cost_line`` is ``(W, D)``. Returns int64
    ``(W, D)`` with the running minimum subtracted at every step, as the kernel does.
    """
    cost_line = np.asarray(cost_line, np.int64)
    w, n = cost_line.shape
    out = np.empty_like(cost_line)
    out[0] = cost_line[0]
    for x in range(1, w):
        prev = out[x - 1]
        m = prev.min()
        best = np.minimum(prev, m + p2)
        best[1:] = np.minimum(best[1:], prev[:-1] + p1)
        best[:-1] = np.minimum(best[:-1], prev[1:] + p1)
        out[x] = cost_line[x] + best - m
    return out


SGM_DIRECTIONS = ((0, 1), (0, -1), (1, 0), (-1, 0), (1, 1), (1, -1), (-1, 1), (-1, -1))
"""The 8 path directions ``(dy, dx)`` a path steps along; the first 4 are the 4-path set."""


def penalty2_reference(p1: int, p2: int, p2_gradient_scale: float, a: float, b: float) -> int:
    """P2 between neighbours of intensities ``a`` and ``b``, in plain Python.

    ``P2 / (1 + |a − b| / scale)`` truncated to an integer, never below
    ``P1 + 1`` (so a large jump always costs more than a step of one); the
    constant ``P2`` when ``scale`` is 0.
    """
    p = p2 / (1.0 + abs(float(a) - float(b)) / p2_gradient_scale) if p2_gradient_scale > 0 else p2
    p = int(p)
    return p if p > p1 else p1 + 1


def path_volume_reference(cost: np.ndarray, gray: np.ndarray, direction: tuple[int, int],
                          p1: int, p2: int, p2_gradient_scale: float) -> np.ndarray:
    """One path direction's costs ``L_r(p, d)`` over the whole image, by the definition.

    ``L_r(p, d) = C(p, d) + min(L_r(q, d), L_r(q, d ± 1) + P1, min_k L_r(q, k) + P2(p, q))
    − min_k L_r(q, k)`` with ``q = p − r`` the pixel before ``p`` on the path; a path
    starts afresh (``L_r = C``) where ``q`` is outside the image (Hirschmüller 2008,
    eq. 13, with ``P2`` adapted to the intensity step between ``p`` and ``q``).
    A slow reference for the tests: pixels are visited in an order where ``q``
    always comes first.
    """
    cost = np.asarray(cost, np.int64)
    gray = np.asarray(gray, np.float32)
    h, w, _ = cost.shape
    dy, dx = direction
    out = np.zeros_like(cost)
    ys = range(h) if dy >= 0 else range(h - 1, -1, -1)
    xs = list(range(w) if dx >= 0 else range(w - 1, -1, -1))
    for y in ys:
        for x in xs:
            qy, qx = y - dy, x - dx
            if not (0 <= qy < h and 0 <= qx < w):
                out[y, x] = cost[y, x]
                continue
            prev = out[qy, qx]
            m = prev.min()
            pen = penalty2_reference(p1, p2, p2_gradient_scale, gray[y, x], gray[qy, qx])
            best = np.minimum(prev, m + pen)
            best[1:] = np.minimum(best[1:], prev[:-1] + p1)
            best[:-1] = np.minimum(best[:-1], prev[1:] + p1)
            out[y, x] = cost[y, x] + best - m
    return out
