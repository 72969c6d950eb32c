"""The MRF energy of a disparity map, one function for every solver.

``E(D) = Σ_p C(p, d_p) + Σ_{p~q} V(d_p, d_q)`` over the 4-connected grid, so
that winner-takes-all, semi-global matching and belief propagation results can
be compared on the same footing.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class Potts:
    """``V(a, b) = weight`` when ``a != b``, else 0."""

    weight: float


@dataclass(frozen=True)
class TruncatedLinear:
    """``V(a, b) = weight · min(|a − b|, truncation)``."""

    weight: float
    truncation: float


@dataclass(frozen=True)
class StepPenalty:
    """The semi-global form: 0 for equal labels, ``p1`` for a step of one, ``p2`` beyond."""

    p1: float
    p2: float


Pairwise = Potts | TruncatedLinear | StepPenalty


def grid_energy(labels: np.ndarray, cost: np.ndarray, pairwise: Pairwise) -> dict:
    """Energy of an integer labelling on the 4-connected grid.

    Parameters
    ----------
    labels : (H, W) int array
        Hypothesis index per pixel, ``0 <= labels < D``.
    cost : (H, W, D) or (H, W) array
        Unary costs of every hypothesis, or already taken at ``labels`` (the
        cost of each pixel at its own label; for solvers that keep no volume).
    pairwise : Potts, TruncatedLinear or StepPenalty
        The pairwise term ``V``, passed explicitly so that every solver is
        judged by the same energy.

    Returns
    -------
    dict
        ``unary``, ``pairwise`` and ``total`` (floats).

    Examples
    --------
    >>> import numpy as np
    >>> cost = np.zeros((1, 3, 2)); cost[0, :, 1] = 1
    >>> grid_energy(np.array([[0, 1, 1]]), cost, Potts(5.0))
    {'unary': 2.0, 'pairwise': 5.0, 'total': 7.0}
    """
    labels = np.ascontiguousarray(labels, dtype=np.int32)
    cost = np.ascontiguousarray(cost)
    if labels.shape != cost.shape[:2] or cost.ndim not in (2, 3):
        raise ValueError(f"labels {labels.shape} do not match cost {cost.shape}")
    at_labels = cost.ndim == 2
    if at_labels:
        cost = cost[..., None]
    elif labels.size and (labels.min() < 0 or labels.max() >= cost.shape[2]):
        raise ValueError("labels must index the cost volume's last axis")
    from stereomesh.matching import _kernels

    if isinstance(pairwise, Potts):
        args = (0, float(pairwise.weight), 0.0, 0.0, 0.0)
    elif isinstance(pairwise, TruncatedLinear):
        args = (1, float(pairwise.weight), float(pairwise.truncation), 0.0, 0.0)
    elif isinstance(pairwise, StepPenalty):
        args = (2, 0.0, 0.0, float(pairwise.p1), float(pairwise.p2))
    else:
        raise TypeError(f"unknown pairwise term {pairwise!r}")
    unary, pair = _kernels.grid_energy_terms(labels, cost, at_labels, *args)
    return {"unary": float(unary), "pairwise": float(pair), "total": float(unary + pair)}
