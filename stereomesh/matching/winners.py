"""Winners of a regularised cost: the left labelling and what refinement needs of it."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass
class Winners:
    """Per-pixel winners on the left rectified grid.

    Attributes
    ----------
    best_k : (H, W) int32
        Winning hypothesis, -1 where none is valid (every match outside the
        right image); hypothesis ``k`` is disparity ``d_min + k``.
    c_best : (H, W) float32
        Regularised cost of the winner.
    c_second : (H, W) float32
        Best regularised cost at least two hypotheses from the winner (inf if none).
    c_minus, c_plus : (H, W) float32
        Regularised costs at ``best_k - 1`` and ``best_k + 1`` (``c_best`` at the
        ends of the valid range), for sub-pixel interpolation.
    best_right : (H, W) int32
        Winner of each right-image pixel ``xr`` among the left pixels
        ``xr + d_min + k`` (-1 where none is valid), for the left-right check.
    unary : (H, W) float32
        Matching cost (the unary term) at ``max(best_k, 0)``, for the energy.
    """

    best_k: np.ndarray
    c_best: np.ndarray
    c_second: np.ndarray
    c_minus: np.ndarray
    c_plus: np.ndarray
    best_right: np.ndarray
    unary: np.ndarray

    def rows(self, start: int, stop: int) -> Winners:
        """The winners of rows ``[start, stop)``."""
        return Winners(*(getattr(self, f)[start:stop] for f in self.__dataclass_fields__))


def select_winners(volume: np.ndarray, d_min: int, cost: np.ndarray) -> Winners:
    """Winners of a regularised volume (lower is better).

    Parameters
    ----------
    volume : (H, W, D) array
        Regularised costs (belief-propagation beliefs, or the matching cost
        itself for winner-takes-all).
    d_min : int
        Disparity of hypothesis 0.
    cost : (H, W, D) array
        The matching cost, for :attr:`Winners.unary`.

    Returns
    -------
    Winners

    Examples
    --------
    >>> import numpy as np
    >>> vol = np.tile(np.array([5, 1, 4, 3], np.float32), (1, 4, 1))  # (1, 4, 4)
    >>> w = select_winners(vol, 0, vol)  # pixel 3 can match all four hypotheses
    >>> int(w.best_k[0, 3]), float(w.c_second[0, 3])
    (1, 3.0)
    """
    from stereomesh.matching import _kernels

    volume = np.ascontiguousarray(volume)
    best_k, c1, c2, cm, cp = _kernels.select_left(volume, int(d_min))
    best_right = _kernels.select_right(volume, int(d_min))
    labels = np.maximum(best_k, 0)
    unary = np.take_along_axis(cost, labels[..., None], axis=2)[..., 0].astype(np.float32)
    return Winners(best_k, c1, c2, cm, cp, best_right, unary)
