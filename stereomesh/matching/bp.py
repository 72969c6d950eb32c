"""Loopy min-sum belief propagation on the 4-connected grid.

Minimises ``E(D) = Σ_p C(p, d_p) + Σ_{p~q} V(d_p, d_q)`` with a Potts or
truncated-linear ``V``: messages are computed in O(D) per edge by the distance
transform, updated on a checkerboard schedule, and initialised coarse-to-fine
from a pyramid whose levels sum the data costs of 2×2 blocks (Felzenszwalb and
Huttenlocher 2006). On a tree (a single scanline) min-sum belief propagation is
exact (Pearl 1988); on the grid it is an approximation judged by the same
:func:`~stereomesh.matching.energy.grid_energy` as every other solver.
"""

from __future__ import annotations

import numpy as np

from stereomesh.matching.energy import Potts, TruncatedLinear


def _kind(pairwise) -> tuple[int, float, float]:
    if isinstance(pairwise, TruncatedLinear):
        return 1, float(pairwise.weight), float(pairwise.truncation)
    if isinstance(pairwise, Potts):
        return 0, float(pairwise.weight), 0.0
    raise TypeError(f"belief propagation takes Potts or TruncatedLinear, got {pairwise!r}")


def _coarser(data: np.ndarray) -> np.ndarray:
    h, w, d = data.shape
    h2, w2 = (h + 1) // 2, (w + 1) // 2
    padded = np.zeros((h2 * 2, w2 * 2, d), np.float32)
    padded[:h, :w] = data
    return padded.reshape(h2, 2, w2, 2, d).sum(axis=(1, 3))


def belief_propagation(
    cost: np.ndarray,
    pairwise: Potts | TruncatedLinear,
    *,
    iterations: int = 5,
    levels: int = 4,
    tolerance: float = 1e-3,
    return_info: bool = False,
):
    """Beliefs of loopy min-sum belief propagation.

    Parameters
    ----------
    cost : (H, W, D) array
        Unary costs (any real dtype).
    pairwise : Potts or TruncatedLinear
        The pairwise term ``V`` in cost units.
    iterations : int
        Iterations per pyramid level (one iteration = both checkerboard colours).
    levels : int
        Pyramid levels, 1 for none; coarse levels start the finer ones.
    tolerance : float
        At the finest level, stop once the share of pixels whose winning label
        changed in an iteration falls below this.

    Returns
    -------
    (H, W, D) float32
        Beliefs ``C(p, ·) + Σ incoming messages``; their per-pixel minimum is the
        belief-propagation labelling. With ``return_info``, also a dict with
        ``iterations`` run at the finest level and the last ``changed`` share.

    Examples
    --------
    >>> import numpy as np
    >>> cost = np.random.default_rng(0).integers(0, 9, (6, 8, 4)).astype(np.float32)
    >>> b = belief_propagation(cost, TruncatedLinear(2.0, 2.0), iterations=4, levels=2)
    >>> b.shape
    (6, 8, 4)
    """
    from stereomesh.matching import _kernels

    cost = np.asarray(cost)
    if cost.ndim != 3:
        raise ValueError(f"cost must be (H, W, D), got shape {cost.shape}")
    if iterations < 1 or levels < 1:
        raise ValueError("iterations and levels must be at least 1")
    kind, weight, trunc = _kind(pairwise)
    pyramid = [np.ascontiguousarray(cost, np.float32)]
    for _ in range(levels - 1):
        if min(pyramid[-1].shape[:2]) < 8:
            break
        pyramid.append(_coarser(pyramid[-1]))
    msgs = None
    info = {"iterations": 0, "changed": 1.0}
    for level in range(len(pyramid) - 1, -1, -1):
        data = pyramid[level]
        h, w, _ = data.shape
        if msgs is None:
            msgs = [np.zeros(data.shape, np.float32) for _ in range(4)]
        else:
            # Each pixel starts from the messages its parent block received.
            msgs = [np.ascontiguousarray(np.repeat(np.repeat(m, 2, 0), 2, 1)[:h, :w])
                    for m in msgs]
        up, down, left, right = msgs
        finest = level == 0
        labels = None
        beliefs = np.empty(data.shape, np.float32) if finest else None
        for it in range(iterations):
            _kernels.bp_sweep(data, up, down, left, right, 0, kind, weight, trunc)
            _kernels.bp_sweep(data, up, down, left, right, 1, kind, weight, trunc)
            if finest:
                _kernels.bp_beliefs(data, up, down, left, right, beliefs)
                new = _kernels.argmin_labels(beliefs)
                if labels is not None:
                    info["changed"] = float((new != labels).mean())
                labels = new
                info["iterations"] = it + 1
                if info["changed"] < tolerance:
                    break
    return (beliefs, info) if return_info else beliefs
