"""Semi-global matching: the grid energy approximated by 1-D paths.

Each path minimises the chain energy ``Σ C(p, d_p) + Σ V(d_p, d_q)`` with
``V = 0`` for equal labels, ``P1`` for a step of one and ``P2`` beyond
(Hirschmüller 2008); the per-path costs are summed over 4 or 8 directions and
the winner taken per pixel.
"""

from __future__ import annotations

import numpy as np

MAX_P2 = 1000


def aggregate_costs(
    cost: np.ndarray,
    gray: np.ndarray | None = None,
    *,
    p1: int = 8,
    p2: int = 96,
    p2_gradient_scale: float = 8.0,
    paths: int = 8,
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
