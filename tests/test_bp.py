"""Belief propagation: exact checks of every kernel, then behaviour on reference pairs."""

import itertools

import numpy as np
import pytest
from PIL import Image

from stereomesh.matching import _bp_kernels as K
from stereomesh.matching.bp import (
    _census_source,
    belief_propagation,
    belief_propagation_matching,
    belief_propagation_reference,
    level_pairwise,
    plan,
    window_labels,
)
from stereomesh.matching.costs import census_cost_reference
from stereomesh.matching.disparity import compute_disparity
from stereomesh.matching.energy import Potts, TruncatedLinear, grid_energy
from stereomesh.params import DisparityParams

LANES = 32


def _steps(kind, w, cap):
    return 0 if kind == 0 or w == 0 else min(5, ((cap - 1) // w).bit_length())


@pytest.mark.parametrize("kind, w, cap", [(1, 96, 192), (1, 5, 37), (1, 3, 200), (1, 7, 255),
                                          (1, 50, 50), (0, 20, 20)])
def test_message_matches_brute_force(kind, w, cap):
    # The O(window) message (log-step distance transform, then read at a
    # neighbour's window `delta` labels away) equals min_j h(j) + V(j, k) over
    # the sender's window computed in O(D^2), less min h (Felzenszwalb &
    # Huttenlocher 2006 for the distance transform of V).
    rng = np.random.default_rng(kind * 1000 + w)
    n = 400
    h = rng.integers(0, 600, (n, LANES)).astype(np.uint16)
    h[::5] = rng.integers(0, 3, (len(h[::5]), LANES))  # flat: ties everywhere
    delta = rng.choice([-80, -48, -32, -16, 0, 0, 16, 32, 48, 80], n).astype(np.int64)
    out = K.messages(h, delta, kind, _steps(kind, w, cap), w, cap)
    lanes = np.arange(LANES)
    for i in range(n):
        dist = np.abs(lanes[:, None] - (lanes[None, :] + delta[i]))
        v = np.minimum(w * dist, cap) if kind == 1 else np.where(dist > 0, cap, 0)
        brute = (h[i].astype(np.int64)[:, None] + v).min(axis=0) - h[i].min()
        np.testing.assert_array_equal(out[i], brute, err_msg=f"row {i}, delta {delta[i]}")


def _random_messages(rng, shape, cap):
    return rng.integers(0, cap + 1, shape).astype(np.uint8)


@pytest.mark.parametrize("pw", [(1, 1, 96, 192), (1, 3, 7, 50), (0, 0, 40, 40)])
def test_windowed_level_matches_reference(pw):
    # Two windows per pixel at random 16-aligned offsets (one pixel with both
    # windows the same): three checkerboard iterations of the kernel give the
    # messages of the brute-force reference on the same label sets, exactly.
    rng = np.random.default_rng(2)
    h, w, dp = 6, 7, 128
    off = (rng.integers(0, (dp - LANES) // 16 + 1, (h, w, 2)) * 16).astype(np.int32)
    off[0, 0, 1] = off[0, 0, 0]
    labels = window_labels(off)
    data = rng.integers(0, 700, (h, w, 2 * LANES)).astype(np.uint16)
    data[labels >= 100] = K.PAD  # padded hypotheses past the real ones
    msg = _random_messages(rng, (h, 4, w, 2, LANES), pw[3])
    expected = msg.reshape(h, 4, w, 2 * LANES).astype(np.int64)
    belief_propagation_reference(data, labels, expected, pw, 3)
    lab = np.full((h, w), -1, np.int32)
    run, _ = K.iterate_level(data.reshape(h, w, 2, LANES), off, msg, lab, pw, 3, 0.0)
    assert run == 3
    np.testing.assert_array_equal(msg.reshape(expected.shape), expected)


@pytest.mark.parametrize("pw", [(1, 1, 96, 192), (1, 5, 3, 200), (0, 0, 30, 30)])
def test_full_level_matches_reference(pw):
    # The coarsest level holds every hypothesis in three vectors; its distance
    # transform carries across the vectors.
    rng = np.random.default_rng(3)
    h, w, dp = 5, 6, 96
    data = rng.integers(0, 500, (h, w, dp)).astype(np.uint16)
    data[..., 90:] = K.PAD
    msg = _random_messages(rng, (h, 4, w, dp), pw[3])
    expected = msg.astype(np.int64)
    belief_propagation_reference(data, np.broadcast_to(np.arange(dp), data.shape), expected,
                                 pw, 3)
    K.iterate_full_level(data, msg, np.full((h, w), -1, np.int32), pw, 3, 0.0)
    np.testing.assert_array_equal(msg, expected)


def _pair(h=37, w=70, shift=9, seed=1):
    rng = np.random.default_rng(seed)
    right = (rng.random((h, w)) * 255).astype(np.float32)
    left = np.roll(right, shift, axis=1) + rng.random((h, w)).astype(np.float32) * 20
    return left, right


def test_level_costs_are_scaled_block_sums_of_census_costs():
    # Reference: the numpy census volume (pixels outside the right image cost
    # the window's bit count), summed over 2^l x 2^l blocks clipped at the
    # border, times 2^(e - l); hypotheses past the real ones hold PAD.
    left, right = _pair(13, 29)
    d_min, n = -3, 40
    src, _, invalid = _census_source(left, right, d_min, n, (7, 5))
    volume = census_cost_reference(left, right, d_min, n, (7, 5)).astype(np.int64)
    e, dp = 4, 64
    for level in (0, 1, 2):
        s = 2**level
        hl, wl = -(-13 // s), -(-29 // s)
        padded = np.zeros((hl * s, wl * s, n), np.int64)
        padded[:13, :29] = volume
        sums = padded.reshape(hl, s, wl, s, n).sum(axis=(1, 3)) * 2 ** (e - level)
        data = K.full_level_data(src, level, e, hl, wl, dp // LANES)
        np.testing.assert_array_equal(data[..., :n], sums)
        assert (data[..., n:] == K.PAD).all()
        # A windowed level takes the same sums at its windows' labels.
        parent_lab = np.random.default_rng(level).integers(0, n, (-(-hl // 2), -(-wl // 2)))
        hp, wp = parent_lab.shape
        parent = (parent_lab.astype(np.int32), np.zeros((hp, wp, 2), np.int32),
                  np.zeros((hp, 4, wp, dp // LANES, LANES), np.uint8), True, 0)
        wdata, off, _, _ = K.init_level(src, level, e, hl, wl, dp, parent, (1, 1, 16, 32))
        full = np.concatenate([sums, np.full((hl, wl, dp - n), K.PAD)], axis=-1)
        taken = np.take_along_axis(full, window_labels(off), axis=-1)
        np.testing.assert_array_equal(wdata.reshape(hl, wl, -1), taken)


def test_windows_hold_the_parent_winner_well_inside():
    # Window A is 16-aligned with the parent's winner at least 8 labels from
    # both ends (unless the range ends first); window B does the same for the
    # adjacent parent that differs most.
    left, right = _pair(16, 40)
    src = _census_source(left, right, 0, 128, (7, 5))[0]
    rng = np.random.default_rng(5)
    parent_lab = rng.integers(0, 128, (8, 20)).astype(np.int32)
    parent = (parent_lab, np.zeros((8, 20, 2), np.int32),
              np.zeros((8, 4, 20, 4, LANES), np.uint8), True, 0)
    _, off, _, _ = K.init_level(src, 0, 4, 16, 40, 128, parent, (1, 1, 16, 32))
    assert (off % 16 == 0).all() and (off >= 0).all() and (off <= 96).all()
    for y, x in itertools.product(range(16), range(40)):
        py, px = y // 2, x // 2
        ny = min(max(py + (1 if y % 2 else -1), 0), 7)
        nx = min(max(px + (1 if x % 2 else -1), 0), 19)
        a = parent_lab[py, px]
        cands = [parent_lab[ny, px], parent_lab[py, nx], parent_lab[ny, nx]]
        far = max(abs(c - a) for c in cands)
        b = a if far == 0 else next(c for c in cands if abs(c - a) == far)
        k_hi = min(128, x + 1)  # d_min 0: hypotheses up to x match inside the image
        for label, o in ((min(a, k_hi - 1), off[y, x, 0]), (min(b, k_hi - 1), off[y, x, 1])):
            assert o <= label < o + LANES
            assert label - o >= 8 or o == 0
            assert o + LANES - label > 8 or o == 96


@pytest.mark.parametrize("d_min, n, pairwise", [(0, 48, TruncatedLinear(4.0, 3.0)),
                                                (-5, 70, Potts(10.0)),
                                                (3, 100, TruncatedLinear(2.5, 5.0))])
def test_streamed_finest_level_equals_the_plain_schedule(d_min, n, pairwise):
    # The wavefront over a ring of rows reproduces the checkerboard of the
    # level held in memory exactly; the held level's winners come through the
    # dense beliefs and the volume selection of winner-takes-all, an
    # independent implementation of the winner rules.
    left, right = _pair()
    a = belief_propagation_matching(left, right, d_min, n, levels=3, iterations=4,
                                    pairwise=pairwise)
    b = belief_propagation_matching(left, right, d_min, n, levels=3, iterations=4,
                                    pairwise=pairwise, stream=False)
    for field in ("best_k", "c_best", "c_second", "c_minus", "c_plus", "best_right", "unary"):
        np.testing.assert_array_equal(getattr(a, field), getattr(b, field), err_msg=field)


def test_right_winners_come_from_the_mirrored_solve():
    # Right pixel xr matches left pixel xr + d: mirrored, the right image is the
    # left one of a pair with the same disparities, so its left winners read
    # back are the right winners.
    left, right = _pair()
    w = belief_propagation_matching(left, right, 0, 48)
    m = belief_propagation_matching(right[:, ::-1], left[:, ::-1], 0, 48)
    np.testing.assert_array_equal(w.best_right, m.best_k[:, ::-1])
    assert np.median(w.best_right[:, :55]) == 9


@pytest.mark.parametrize("pairwise", [TruncatedLinear(3.0, 2.0), Potts(5.0)])
def test_bp_on_a_chain_reaches_the_brute_force_minimum(pairwise):
    # Pearl 1988: min-sum belief propagation is exact on trees; a single scanline
    # is a chain, so its labelling must reach the enumerated global minimum.
    rng = np.random.default_rng(4)
    for trial in range(4):
        cost = rng.integers(0, 20, (1, 6, 4)).astype(np.float32)
        beliefs = belief_propagation(cost, pairwise, iterations=10, levels=1, tolerance=0.0)
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


def test_coarse_levels_halve_the_pairwise_term_and_scaling_is_exact():
    p = plan(480, 640, 128, TruncatedLinear(2.5, 3.0), levels=4, max_cost=34)
    kind, steps, w, cap = p.pw
    assert (w, cap) == (2.5 * 2**p.e, 7.5 * 2**p.e) and cap <= 255
    assert 2 ** (steps - 1) <= (cap - 1) // w < 2**steps  # the scans reach the truncation
    for level in range(1, 4):
        assert level_pairwise(p, level)[2:] == (round(w / 2**level), round(cap / 2**level))
    assert level_pairwise(plan(8, 8, 4, Potts(5.0), levels=1), 0) == (0, 0, 80, 80)


def test_constant_shift_recovered():
    rng = np.random.default_rng(0)
    right = (rng.random((48, 96)) * 255).astype(np.uint8)
    left = np.roll(right, 6, axis=1)
    res = compute_disparity(left, right, DisparityParams(method="bp", disp_range="0:16"))
    valid = np.isfinite(res.disparity)
    assert valid[:, 20:].mean() > 0.95
    err = np.abs(res.disparity[:, 20:] - 6)[valid[:, 20:]]
    assert (err < 0.51).mean() > 0.99
    assert (res.confidence[~valid] == 0).all()
    figures = res.figures["bp"]
    assert figures["iterations"] == DisparityParams().bp_iterations
    assert 0.0 <= figures["changed"] <= 1.0


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
