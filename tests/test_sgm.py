"""Fused semi-global matching: exact against the volume reference, and its building blocks."""

import numpy as np
import pytest
from numba import njit

from stereomesh.matching import _kernels, _sgm_kernels
from stereomesh.matching._simd import (
    BYTE_LANES,
    LANES,
    badds,
    bfill_outside,
    bhmin,
    bload,
    bmin,
    bnarrow,
    bshift_in_high,
    bshift_in_low,
    bsplat,
    bstore,
    bsub,
    bwiden_high,
    bwiden_low,
    vfill_outside,
    vhamming,
    vhmin,
    vload,
    vselect_between,
    vshift_in_high,
    vshift_in_low,
    vstore,
)
from stereomesh.matching.confidence import confidence_map, confidence_map_reference
from stereomesh.matching.costs import ad_gradient_cost, census_cost, census_transform
from stereomesh.matching.refine import subpixel_offset
from stereomesh.matching.sgm import (
    Workspace,
    _lane_columns,
    aggregate_costs,
    memory_bytes,
    semi_global_matching,
)


def _pair(h, w, shift=4, seed=0):
    rng = np.random.default_rng(seed)
    right = (rng.random((h, w)) * 255).astype(np.float32)
    left = np.roll(right, shift, axis=1) + rng.normal(0, 3, (h, w)).astype(np.float32)
    return left, right


def _reference_winners(cost, gray, d_min, p1, p2, paths):
    total = aggregate_costs(cost, gray, p1=p1, p2=p2, p2_gradient_scale=8.0, paths=paths)
    return _kernels.select_left(total, d_min) + (_kernels.select_right(total, d_min),)


CASES = [
    # h, w, d_min, n_disp, paths, cost, block_rows, p2
    (20, 50, 0, 16, 8, "census", None, 60),
    (31, 77, -5, 40, 8, "census", 4, 60),
    (25, 64, 3, 64, 4, "census", 3, 60),
    (12, 40, 0, 70, 8, "census", 1, 60),
    (23, 45, -3, 37, 8, "ad_gradient", 5, 60),
    (3, 5, 0, 8, 8, "census", None, 60),
    (1, 40, 2, 10, 4, "ad_gradient", None, 60),
    (40, 33, 0, 20, 8, "census", 40, 60),
    (40, 33, 0, 20, 8, "census", 39, 60),
    (30, 50, -2, 33, 8, "census", 6, 400),  # path values beyond uint8: 16-bit buffers
    (9, 40, 35, 20, 8, "census", None, 60),  # most hypotheses beyond the right image
    (9, 40, -70, 20, 8, "census", None, 60),  # none inside it
    (7, 30, -4, 260, 8, "census", 3, 60),  # past the register window of right winners
    (8, 33, 1, 256, 4, "census", None, 60),  # a full register window
]


@pytest.mark.parametrize("h, w, d_min, n_disp, paths, cost, block_rows, p2", CASES)
def test_fused_sgm_equals_volume_reference(h, w, d_min, n_disp, paths, cost, block_rows, p2):
    # Exact check: the fused solver (row-wise costs, checkpointed forward sums,
    # 16-bit vector lanes, padded hypotheses) must give bit-identical winners
    # and costs to summing the reference path volumes, whose single path is in
    # turn checked against brute-force enumeration in test_matching.py.
    left, right = _pair(h, w)
    vol = (census_cost(left, right, d_min, n_disp) if cost == "census"
           else ad_gradient_cost(left, right, d_min, n_disp, (7, 5)))
    got = semi_global_matching(left, right, d_min, n_disp, cost=cost, p1=8, p2=p2, paths=paths,
                               block_rows=block_rows)
    want = _reference_winners(vol, left, d_min, 8, p2, paths)
    names = ("best_k", "c_best", "c_second", "c_minus", "c_plus", "best_right")
    for name, ref in zip(names, want, strict=True):
        np.testing.assert_array_equal(getattr(got, name), ref, err_msg=name)
    labels = np.maximum(got.best_k, 0)
    np.testing.assert_array_equal(
        got.unary, np.take_along_axis(vol, labels[..., None], 2)[..., 0].astype(np.float32))


def test_lane_split_workspace_and_lane_width_do_not_change_the_result():
    # The column split only balances the workers; any split, any number of
    # lanes, a reused workspace and 8- or 16-bit path arithmetic (with the
    # padding each needs) must give the same bits.
    left, right = _pair(26, 70, seed=3)
    d_min, n_disp = -2, 30
    cl = _kernels.census_planes_of_image(_kernels.edge_padded(left, 2, 3), 7, 5, 3, 0, 0, False)
    ws = Workspace()
    results = []
    for byte_paths, dp in ((False, 32), (True, 64)):
        pads = _sgm_kernels._right_pad(d_min, dp)
        crev = _kernels.census_planes_of_image(_kernels.edge_padded(right, 2, 3), 7, 5, 3,
                                               *pads, True)
        # The planes straight from the image equal the census strings split afterwards.
        np.testing.assert_array_equal(
            crev, _kernels.census_planes(census_transform(right), 3, *pads, True))
        for lanes, block_rows in ((1, 26), (2, 5), (3, 7), (5, 26)):
            specs = _sgm_kernels.buffer_shapes(26, 70, dp, True, block_rows, True, byte_paths)
            bounds = [_lane_columns(70, f, lanes) for f in (None, True, False)]
            out = _sgm_kernels.sgm_solve(
                cl, crev, np.zeros((1, 1, 1), np.uint8), False, left, d_min, n_disp, dp, 34,
                34 + 2 * 96 + 1, 8, 96, 8.0, True, block_rows,
                *_sgm_kernels.cost_packing(34, 96, 34 + 2 * 96 + 1, True), *bounds,
                *ws.arrays(specs))
            results.append(out)
    for other in results[1:]:
        for a, b in zip(results[0], other, strict=True):
            np.testing.assert_array_equal(a, b)


def test_memory_grows_with_the_square_root_of_the_rows():
    small = memory_bytes(1000, 1000, 256)
    volume = memory_bytes(1000, 1000, 256, block_rows=1000)
    assert small < volume / 4
    # 4x the rows, about 2x the work memory (outputs and census grow linearly).
    assert memory_bytes(4000, 1000, 256) < 4 * small


@njit(cache=True)
def _simd_probe(a16, planes, out, lo, hi, bits):
    v = vload(a16, 0)
    w = vload(a16, LANES)
    vstore(out, 0, vshift_in_low(v, w))
    vstore(out, LANES, vshift_in_high(v, w))
    vstore(out, 2 * LANES, vfill_outside(v, lo, hi, 0xFFFF))
    vstore(out, 4 * LANES, vhamming(planes, 0, bits))
    vstore(out, 5 * LANES, vselect_between(v, lo, hi, w, v))
    return vhmin(v)


def test_simd_intrinsics_against_numpy():
    rng = np.random.default_rng(0)
    a16 = rng.integers(0, 60000, 2 * LANES).astype(np.uint16)
    a64 = rng.integers(0, 2**16, LANES).astype(np.uint16)
    bits = np.uint16(0x5A3C)
    lo, hi = 5, 20
    out = np.zeros(6 * LANES, np.uint16)
    smallest = _simd_probe(a16, a64, out, lo, hi, bits)
    v, w = a16[:LANES], a16[LANES:]
    lane = np.arange(LANES)
    inside = (lane >= lo) & (lane < hi)
    assert smallest == v.min()
    np.testing.assert_array_equal(out[:LANES], np.concatenate([[v[-1]], w[:-1]]))
    np.testing.assert_array_equal(out[LANES : 2 * LANES], np.concatenate([v[1:], [w[0]]]))
    np.testing.assert_array_equal(out[2 * LANES : 3 * LANES], np.where(inside, v, 0xFFFF))
    popcount = np.array([bin(int(x) ^ int(bits)).count("1") for x in a64])
    np.testing.assert_array_equal(out[4 * LANES : 5 * LANES], popcount)
    between = (v >= lo) & (v < hi)
    np.testing.assert_array_equal(out[5 * LANES :], np.where(between, w, v))


def test_refine_winners_subpixel_matches_numpy_reference():
    rng = np.random.default_rng(4)
    h, w = 6, 40
    best = rng.integers(1, 20, (h, w)).astype(np.int32)
    right = np.full((h, w), -1, np.int32)
    for y in range(h):  # every left pixel consistent with its own match
        for x in range(w):
            xr = x - best[y, x]
            if 0 <= xr < w:
                right[y, xr] = best[y, x]
    cm, c0, cp = (rng.random((3, h, w)) * 50).astype(np.float32)
    c0 = np.minimum(c0, np.minimum(cm, cp))
    for kind, name in enumerate(("parabola", "equiangular", "none")):
        classes, _, disparity = _kernels.refine_winners(best, right, cm, c0, cp, 0, 21, 0, kind,
                                                        np.float32(1.0))
        ok = classes == 0
        assert ok.sum() > 0.3 * ok.size
        want = best + subpixel_offset(cm, c0, cp, name)
        np.testing.assert_allclose(disparity[ok], want[ok], rtol=0, atol=1e-5)
        assert np.isnan(disparity[~ok]).all()


def test_confidence_kernel_matches_opencv_reference():
    # The numba confidence reproduces the numpy/OpenCV formulation (Sobel and
    # box filter with OpenCV's default reflected border).
    rng = np.random.default_rng(5)
    h, w = 37, 53
    gray = (rng.random((h, w)) * 255).astype(np.float32)
    c1 = (rng.random((h, w)) * 100).astype(np.float32)
    c2 = c1 + (rng.random((h, w)) * 40).astype(np.float32)
    c2[::7, ::5] = np.inf
    lr = rng.integers(0, 4, (h, w)).astype(np.float32)
    lr[::9, ::4] = np.inf
    np.testing.assert_allclose(confidence_map(c1, c2, lr, gray),
                               confidence_map_reference(c1, c2, lr, gray), atol=2e-6)


def _classes_reference(best_left, best_right, d_min, n_disp, max_diff):
    # The definition, pixel by pixel: a failed pixel is a mismatch when some
    # hypothesis maps it to a right pixel whose winner points back to it (the
    # occlusion/mismatch distinction of Hirschmüller 2008, semi-global matching).
    h, w = best_left.shape
    classes = np.zeros((h, w), np.uint8)
    for y in range(h):
        for x in range(w):
            k = best_left[y, x]
            if k < 0 or k == 0 or k == n_disp - 1:
                classes[y, x] = 4
                continue
            kr = best_right[y, x - d_min - k]
            if kr >= 0 and abs(k - kr) <= max_diff:
                continue
            back = any(0 <= x - d_min - k2 < w and best_right[y, x - d_min - k2] >= 0
                       and abs(best_right[y, x - d_min - k2] - k2) <= max_diff
                       for k2 in range(n_disp))
            classes[y, x] = 2 if back else 1
        # Failed pixels whose match, at the disparity of the nearest consistent
        # pixel to their right, falls left of the right image: outside the overlap.
        d_right = np.nan
        for x in range(w - 1, -1, -1):
            if classes[y, x] == 0:
                d_right = d_min + best_left[y, x]
            elif classes[y, x] in (1, 2) and x < d_right:
                classes[y, x] = 4
    return classes


@pytest.mark.parametrize("max_diff", [0, 1, 3])
def test_consistency_classes_match_their_definition(max_diff):
    rng = np.random.default_rng(8)
    h, w, d_min, n_disp = 5, 60, -2, 12
    best_left = np.full((h, w), -1, np.int32)
    for x in range(w):  # only hypotheses whose right pixel lies inside the image
        lo, hi = max(0, x - w + 1 - d_min), min(n_disp, x - d_min + 1)
        if hi > lo:
            best_left[:, x] = rng.integers(lo, hi, h)
    best_right = rng.integers(-1, n_disp, (h, w)).astype(np.int32)
    zeros = np.zeros((h, w), np.float32)
    classes, _, _ = _kernels.refine_winners(best_left, best_right, zeros, zeros, zeros, d_min,
                                            n_disp, max_diff, 2, np.float32(-1e9))
    # Every step counts as a step forward (min_step -1e9): the occluded/mismatch
    # split of the check itself is compared, without the depth-step rule.
    want = _classes_reference(best_left, best_right, d_min, n_disp, max_diff)
    np.testing.assert_array_equal(classes, want)


@pytest.mark.parametrize("window", [(9, 7), (3, 3), (7, 5), (1, 3), (5, 1)])
def test_census_planes_of_image_equal_the_split_strings(window):
    # The plane-by-plane 16-bit census must put every comparison at the bit
    # the 64-bit strings give it, for windows of one to four planes.
    ww, wh = window
    gray = (np.random.default_rng(1).random((23, 41)) * 255).astype(np.float32)
    planes = -(-(ww * wh - 1) // 16)
    padded = _kernels.edge_padded(gray, wh // 2, ww // 2)
    for reverse in (False, True):
        np.testing.assert_array_equal(
            _kernels.census_planes_of_image(padded, ww, wh, planes, 2, 7, reverse),
            _kernels.census_planes(_kernels.census_transform(padded, ww, wh), planes, 2, 7,
                                   reverse))


@njit(cache=True)
def _byte_probe(a8, a16, out8, out16, lo, hi):
    v = bload(a8, 0)
    w = bload(a8, BYTE_LANES)
    bstore(out8, 0, bshift_in_low(v, w))
    bstore(out8, BYTE_LANES, bshift_in_high(v, w))
    bstore(out8, 2 * BYTE_LANES, bmin(v, w))
    bstore(out8, 3 * BYTE_LANES, badds(v, w))
    bstore(out8, 4 * BYTE_LANES, bsub(v, w))
    bstore(out8, 5 * BYTE_LANES, bfill_outside(v, lo, hi, 255))
    bstore(out8, 6 * BYTE_LANES, bnarrow(vload(a16, 0), vload(a16, LANES)))
    bstore(out8, 7 * BYTE_LANES, bsplat(7))
    vstore(out16, 0, bwiden_low(v))
    vstore(out16, LANES, bwiden_high(v))
    return bhmin(v)


def test_byte_intrinsics_against_numpy():
    # Reference: numpy's uint8 arithmetic on the same lanes (saturation and
    # modular wrap written out with np.minimum and % 256).
    rng = np.random.default_rng(1)
    a8 = rng.integers(0, 256, 2 * BYTE_LANES).astype(np.uint8)
    a16 = rng.integers(0, 2**16, 2 * LANES).astype(np.uint16)
    out8 = np.zeros(8 * BYTE_LANES, np.uint8)
    out16 = np.zeros(2 * LANES, np.uint16)
    lo, hi = 5, 40
    smallest = _byte_probe(a8, a16, out8, out16, lo, hi)
    v, w = a8[:BYTE_LANES].astype(int), a8[BYTE_LANES:].astype(int)
    lane = np.arange(BYTE_LANES)
    parts = out8.reshape(8, BYTE_LANES)
    assert smallest == v.min()
    np.testing.assert_array_equal(parts[0], np.concatenate([[v[-1]], w[:-1]]))
    np.testing.assert_array_equal(parts[1], np.concatenate([v[1:], [w[0]]]))
    np.testing.assert_array_equal(parts[2], np.minimum(v, w))
    np.testing.assert_array_equal(parts[3], np.minimum(v + w, 255))
    np.testing.assert_array_equal(parts[4], (v - w) % 256)
    np.testing.assert_array_equal(parts[5], np.where((lane >= lo) & (lane < hi), v, 255))
    np.testing.assert_array_equal(parts[6], a16 % 256)
    np.testing.assert_array_equal(parts[7], 7)
    np.testing.assert_array_equal(out16, v)
