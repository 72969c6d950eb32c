"""Belief propagation: exact on chains, and judged by the shared grid energy."""

import itertools

import numpy as np
import pytest
from PIL import Image

from stereomesh.matching.bp import belief_propagation
from stereomesh.matching.disparity import compute_disparity
from stereomesh.matching.energy import Potts, TruncatedLinear, grid_energy
from stereomesh.params import DisparityParams


@pytest.mark.parametrize("pairwise", [TruncatedLinear(3.0, 2.0), Potts(5.0)])
def test_bp_on_a_chain_reaches_the_brute_force_minimum(pairwise):
    # Pearl 1988: min-sum belief propagation is exact on trees; a single scanline
    # is a chain, so its labelling must reach the enumerated global minimum.
    rng = np.random.default_rng(4)
    for trial in range(4):
        cost = rng.integers(0, 20, (1, 6, 4)).astype(np.float32)
        beliefs = belief_propagation(cost, pairwise, iterations=10, levels=1)
        energy = grid_energy(beliefs.argmin(-1), cost, pairwise)["total"]
        brute = min(
            grid_energy(np.array([labels]), cost, pairwise)["total"]
            for labels in itertools.product(range(4), repeat=6)
        )
        assert energy == brute, trial


def test_bp_distance_transform_matches_brute_force_message():
    # The O(D) message equals min_j h(j) + V(j, k) computed in O(D^2).
    rng = np.random.default_rng(9)
    cost = rng.integers(0, 30, (1, 2, 7)).astype(np.float32)
    v = TruncatedLinear(2.5, 3.0)
    beliefs = belief_propagation(cost, v, iterations=1, levels=1)
    # For two pixels, belief of pixel 1 = C1 + message from pixel 0.
    j, k = np.meshgrid(np.arange(7), np.arange(7), indexing="ij")
    pair = 2.5 * np.minimum(np.abs(j - k), 3.0)
    msg = (cost[0, 0][:, None] + pair).min(axis=0)
    msg -= msg.min()
    np.testing.assert_allclose(beliefs[0, 1], cost[0, 1] + msg, atol=1e-4)


def _energies(left, right, disp_range):
    params = DisparityParams(disp_range=disp_range)
    out = {}
    for method in ("wta", "sgm", "bp"):
        res = compute_disparity(left, right, DisparityParams(**{**vars(params), "method": method}))
        out[method] = res.figures["energy_bp_term"]["total"]
    return out


def test_energy_order_on_reference_pairs():
    # One truncated-linear V for all three solvers (the schema's bp_weight and
    # bp_truncation); BP minimises it directly, SGM approximately, WTA not at all.
    # Pairs: scikit-image's stereo_motorcycle (Middlebury 2014, Scharstein et al.)
    # and the demo pair.
    from conftest import DEMO
    from skimage import data

    left, right, _ = data.stereo_motorcycle()
    e = _energies(left, right, "0:80")
    assert e["bp"] < e["sgm"] < e["wta"], e
    dl = np.asarray(Image.open(DEMO / "left.png"))
    dr = np.asarray(Image.open(DEMO / "right.png"))
    e = _energies(dl, dr, "64:192")
    assert e["bp"] < e["sgm"] < e["wta"], e
