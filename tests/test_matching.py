"""Disparity engine: exact checks of each kernel, then behaviour on synthetic pairs."""

import itertools

import numpy as np
import pytest

from stereomesh.matching import _kernels
from stereomesh.matching.costs import census_cost, census_cost_reference, census_transform
from stereomesh.matching.disparity import compute_disparity
from stereomesh.matching.energy import Potts, StepPenalty, TruncatedLinear, grid_energy
from stereomesh.matching.refine import speckle_mask, subpixel_offset
from stereomesh.matching.sgm import aggregate_costs, path_costs_reference
from stereomesh.params import DisparityParams


def test_census_bits_hand_worked():
    # 3x3 window, neighbours read row-major, centre skipped; bit set where darker.
    patch = np.array([[10, 50, 30], [60, 40, 20], [45, 35, 90]], float)
    # neighbours: 10 50 30 60 20 45 35 90 vs centre 40 -> 1 0 1 0 1 0 1 0
    assert int(census_transform(patch, (3, 3))[1, 1]) == 0b10101010


def test_census_hamming_hand_worked():
    left = np.array([[10, 50, 30], [60, 40, 20], [45, 35, 90]], float)
    right = np.array([[50, 50, 30], [60, 40, 20], [45, 35, 10]], float)
    # centre bits: left 10101010, right 00101011 -> two bits differ
    cost = census_cost(left, right, 0, 1, (3, 3))
    assert cost[1, 1, 0] == 2


@pytest.mark.parametrize("d_min", [-3, 0, 4])
def test_census_cost_matches_reference(d_min):
    rng = np.random.default_rng(3)
    left = rng.integers(0, 255, (9, 23)).astype(float)
    right = rng.integers(0, 255, (9, 23)).astype(float)
    fast = census_cost(left, right, d_min, 7, (5, 3))
    slow = census_cost_reference(left, right, d_min, 7, (5, 3))
    np.testing.assert_array_equal(fast, slow)


def _single_path(cost_line, p1, p2):
    cost = np.ascontiguousarray(cost_line[None], np.uint8)
    total = np.zeros(cost.shape, np.uint16)
    gray = np.zeros(cost.shape[:2], np.float32)
    _kernels.aggregate_horizontal(cost, gray, p1, p2, 0.0, total, False)
    return total[0].astype(np.int64)


def test_sgm_single_path_equals_brute_force_minimum():
    # Exact check: one SGM path is dynamic programming on a chain, so its minimum
    # plus the subtracted running minima equals the chain energy's global
    # minimum found by enumerating every labelling.
    rng = np.random.default_rng(7)
    w, n, p1, p2 = 6, 4, 3, 11
    for trial in range(5):
        cost_line = rng.integers(0, 30, (w, n))
        path = _single_path(cost_line, p1, p2)
        np.testing.assert_array_equal(path, path_costs_reference(cost_line, p1, p2))
        dp_min = path[-1].min() + sum(path[x].min() for x in range(w - 1))
        vol = cost_line[None].astype(np.float64)
        brute = min(
            grid_energy(np.array([labels]), vol, StepPenalty(p1, p2))["total"]
            for labels in itertools.product(range(n), repeat=w)
        )
        assert dp_min == brute, trial


def test_energy_hand_computed():
    cost = np.zeros((2, 2, 3))
    cost[0, 0] = [1, 5, 9]
    cost[0, 1] = [4, 0, 2]
    cost[1, 0] = [3, 3, 3]
    cost[1, 1] = [7, 6, 1]
    labels = np.array([[0, 1], [0, 2]])
    # unary 1 + 0 + 3 + 1 = 5; edges (0,0)-(0,1): 0|1, (1,0)-(1,1): 0|2,
    # (0,0)-(1,0): 0|0, (0,1)-(1,1): 1|2
    assert grid_energy(labels, cost, Potts(2.0)) == {"unary": 5.0, "pairwise": 6.0, "total": 11.0}
    tl = grid_energy(labels, cost, TruncatedLinear(1.5, 1.0))
    assert tl["pairwise"] == 1.5 * (1 + 1 + 0 + 1)
    st = grid_energy(labels, cost, StepPenalty(1.0, 4.0))
    assert st["pairwise"] == 1.0 + 4.0 + 0.0 + 1.0


def test_aggregate_costs_flat_volume_is_uniform():
    cost = np.full((5, 6, 4), 3, np.uint8)
    total = aggregate_costs(cost, paths=8)
    assert (total == 8 * 3).all()


def test_subpixel_exact_on_model_curves():
    x0 = 0.3
    quad = [(k - x0) ** 2 for k in (-1, 0, 1)]
    assert subpixel_offset(*map(np.float32, quad), method="parabola") == pytest.approx(x0)
    vee = [abs(k - x0) for k in (-1, 0, 1)]
    assert subpixel_offset(*map(np.float32, vee), method="equiangular") == pytest.approx(x0)


def test_speckle_mask_flags_small_blob_only():
    d = np.full((20, 20), 10.0, np.float32)
    d[5:7, 5:7] = 40.0  # 4-pixel blob
    d[12:20, 12:20] = 25.0  # 64-pixel region
    mask = speckle_mask(d, max_size=10, max_diff=1.0)
    assert mask[5:7, 5:7].all() and mask.sum() == 4


def _shifted_pair(shift=6, h=48, w=96, seed=0):
    rng = np.random.default_rng(seed)
    right = (rng.random((h, w)) * 255).astype(np.uint8)
    left = np.roll(right, shift, axis=1)
    return left, right


@pytest.mark.parametrize("method", ["sgm", "wta"])
def test_constant_shift_recovered(method):
    left, right = _shifted_pair()
    res = compute_disparity(left, right, DisparityParams(method=method, disp_range="0:16"))
    valid = np.isfinite(res.disparity)
    assert valid[:, 20:].mean() > 0.95
    err = np.abs(res.disparity[:, 20:] - 6)[valid[:, 20:]]
    # np.roll wraps the first columns, so only the inner part has a true answer.
    assert (err < 0.51).mean() > (0.999 if method == "sgm" else 0.99)
    assert (res.confidence[~valid] == 0).all()
    # The leftmost columns have no partner in the right image at any disparity of the range.
    assert (res.classes[:, :1] == 4).all()


def test_occluded_band_beside_a_foreground_block():
    # A block in front (disparity 14) over a background (disparity 4): the right
    # camera cannot see the 10 background columns just left of the block.
    rng = np.random.default_rng(5)
    h, w = 60, 120
    bg = rng.random((h, w + 40)) * 255
    fg = rng.random((h, w + 40)) * 255
    x = np.arange(w)
    left = np.empty((h, w))
    right = np.empty((h, w))
    block = (x >= 50) & (x < 90)
    left[:] = bg[:, x + 4 + 20]
    left[:, block] = fg[:, x[block] + 14]
    # right pixel xr sees the block where xr + 14 falls in the block
    xr = np.arange(w)
    in_block = ((xr + 14) >= 50) & ((xr + 14) < 90)
    right[:] = bg[:, xr + 4 + 4 + 20]  # background point at left x = xr + 4
    right[:, in_block] = fg[:, xr[in_block] + 14 + 14]
    res = compute_disparity(left.astype(np.uint8), right.astype(np.uint8),
                            DisparityParams(disp_range="0:24"))
    band = res.classes[10:-10, 41:49]
    assert (band == 1).mean() > 0.7
    elsewhere = res.classes[10:-10, 60:110]
    assert (elsewhere == 1).mean() < 0.05
    # reference: ground truth by construction (background 4 px, block 14 px)
    assert np.nanmedian(res.disparity[10:-10, 60:85]) == pytest.approx(14, abs=0.2)


def test_ad_gradient_cost_matches_formula():
    import cv2

    from stereomesh.matching.costs import ad_gradient_cost

    rng = np.random.default_rng(11)
    left = (rng.random((7, 19)) * 255).astype(np.float32)
    right = (rng.random((7, 19)) * 255).astype(np.float32)
    cost = ad_gradient_cost(left, right, -2, 6, (1, 1))
    # Reference for the gradient: OpenCV's 3x3 Sobel x-derivative (weights 1-2-1 by
    # -1-0-1, sum of absolute weights 8, hence / 8 for grey levels per pixel).
    gl = cv2.Sobel(left, cv2.CV_32F, 1, 0, ksize=3) / 8
    gr = cv2.Sobel(right, cv2.CV_32F, 1, 0, ksize=3) / 8
    for y, x, k in [(0, 0, 0), (3, 10, 2), (6, 18, 5), (2, 5, 4)]:
        xr = x - (k - 2)
        if not 0 <= xr < 19:
            assert cost[y, x, k] == 34
            continue
        expected = 34 * (0.5 * min(abs(left[y, x] - right[y, xr]), 20) / 20
                         + 0.5 * min(abs(gl[y, x] - gr[y, xr]), 8) / 8)
        assert abs(int(cost[y, x, k]) - expected) <= 0.5 + 1e-4


def test_ad_gradient_recovers_shift():
    left, right = _shifted_pair()
    res = compute_disparity(left, right, DisparityParams(cost="ad_gradient", disp_range="0:16"))
    assert np.nanmedian(res.disparity[:, 20:]) == pytest.approx(6, abs=0.1)


def test_strips_bound_memory_and_keep_results_and_energy():
    # A small memory budget forces overlapping row strips; the stitched result
    # must match the one-piece result closely, and the energy summed strip by
    # strip must equal the energy of the stitched labels on the whole volume.
    from conftest import DEMO
    from PIL import Image

    left = np.asarray(Image.open(DEMO / "left.png"))
    right = np.asarray(Image.open(DEMO / "right.png"))
    whole = compute_disparity(left, right, DisparityParams(disp_range="64:192"))
    tiled = compute_disparity(left, right, DisparityParams(disp_range="64:192",
                                                           memory_budget_mb=16))
    assert whole.figures["strips"] == 1 and tiled.figures["strips"] > 1
    both = np.isfinite(whole.disparity) & np.isfinite(tiled.disparity)
    assert both.sum() > 0.97 * np.isfinite(whole.disparity).sum()
    assert (np.abs(whole.disparity - tiled.disparity)[both] > 1).mean() < 0.01
    cost = census_cost(_gray(left), _gray(right), 64, 128, (7, 5))
    direct = grid_energy(tiled.labels, cost, StepPenalty(8, 96))
    assert tiled.figures["energy"]["total"] == pytest.approx(direct["total"], rel=1e-9)


def _gray(image):
    from stereomesh.matching.disparity import to_gray

    return to_gray(image)


def test_fused_horizontal_paths_equal_two_single_passes():
    rng = np.random.default_rng(12)
    cost = rng.integers(0, 35, (9, 31, 12)).astype(np.uint8)
    gray = (rng.random((9, 31)) * 255).astype(np.float32)
    two = np.zeros(cost.shape, np.uint16)
    _kernels.aggregate_horizontal(cost, gray, 8, 60, 8.0, two, False)
    _kernels.aggregate_horizontal(cost, gray, 8, 60, 8.0, two, True)
    fused = np.full(cost.shape, 999, np.uint16)  # overwritten, not added to
    _kernels.aggregate_horizontal_both(cost, gray, 8, 60, 8.0, fused)
    np.testing.assert_array_equal(fused, two)


@pytest.mark.parametrize("paths", [4, 8])
@pytest.mark.parametrize("g_scale", [0.0, 8.0])
def test_aggregate_costs_equal_the_path_definition_in_every_direction(paths, g_scale):
    # Reference: the path recurrence of Hirschmüller 2008 (eq. 13) evaluated pixel by
    # pixel for each direction, with P2 adapted to the intensity step; the sum over the
    # 4 or 8 directions must be exactly what the vectorised kernels aggregate.
    from stereomesh.matching.sgm import SGM_DIRECTIONS, path_volume_reference

    rng = np.random.default_rng(21)
    cost = rng.integers(0, 35, (7, 11, 9)).astype(np.uint8)
    gray = (rng.random((7, 11)) * 255).astype(np.float32)
    total = aggregate_costs(cost, gray, p1=8, p2=60, p2_gradient_scale=g_scale, paths=paths)
    expected = sum(path_volume_reference(cost, gray, r, 8, 60, g_scale)
                   for r in SGM_DIRECTIONS[:paths])
    np.testing.assert_array_equal(total, expected)


def test_penalty2_reference_hand_worked():
    # Hand-worked: 96 / (1 + 24 / 8) = 24; a large step never drops to P1 or below.
    from stereomesh.matching.sgm import penalty2_reference

    assert penalty2_reference(8, 96, 8.0, 100.0, 124.0) == 24
    assert penalty2_reference(8, 96, 8.0, 0.0, 255.0) == 9
    assert penalty2_reference(8, 96, 0.0, 0.0, 255.0) == 96


def test_ad_gradient_box_window_is_the_mean_of_pixel_costs():
    # Reference: SciPy's uniform_filter (a box mean) with mode "mirror", which reflects
    # about the edge pixel like OpenCV's default BORDER_REFLECT_101 used by cv2.blur;
    # the volume is uint8, so values may differ by the rounding of the mean.
    from scipy.ndimage import uniform_filter

    from stereomesh.matching.costs import ad_gradient_cost

    rng = np.random.default_rng(13)
    left = (rng.random((12, 23)) * 255).astype(np.float32)
    right = np.roll(left, 2, axis=1) + rng.normal(0, 3, left.shape).astype(np.float32)
    pixel = ad_gradient_cost(left, right, 0, 5, (1, 1)).astype(np.float64)
    boxed = ad_gradient_cost(left, right, 0, 5, (5, 3))
    expected = uniform_filter(pixel, size=(3, 5, 1), mode="mirror")
    assert np.abs(boxed - expected).max() <= 0.5 + 1e-6
