"""numba kernels of the fused semi-global matching solver.

The solver never holds a matching-cost volume: a row of costs is computed when
a pass reaches it, and the largest buffer is the ``(block_rows, W, Dp)``
uint16 forward sums of one block of rows. Two passes over the rows:

* forward (top to bottom): both horizontal paths and the paths arriving from
  the row above (vertical and, with 8 paths, both diagonals); their sum is
  written into the volume;
* backward (bottom to top): the paths arriving from the row below are added,
  which leaves the full sum.

Winners for the left and the right image are picked from the sum as rows
finish. Sums are on 16-bit vector lanes (:mod:`._simd`); the path recurrences
run on 8-bit lanes, twice as many per instruction, whenever every value they
meet fits a byte (:func:`byte_lanes_fit`: the default census and penalties),
and on 16-bit lanes otherwise.

Parallel layout: in the pass over row ``r`` the columns are split into one
slice per worker ("lane"); each lane computes the cost row and the
vertical/diagonal paths of its columns. Going down, lane 0 also runs both
horizontal paths of row ``r - 1``, whose cost row the previous step finished,
interleaved: each is one long dependency chain along the row. Going up, lane 1
picks the winners of row ``r + 1``. Both get fewer columns to make up for it.

Padding: hypotheses ``n_disp <= k < Dp`` exist only to fill the last vector.
Their cost ``pad_cost`` exceeds every reachable path value by more than ``P2``,
so they never win a minimum over a real hypothesis and leave the real path
costs exactly as without them.

Neighbouring hypotheses ``k - 1`` and ``k + 1`` come from lane shifts of the
vectors before and after (0xFFFF past the ends; the saturating add keeps it
out of every minimum), so every load is aligned with the store that wrote it
and store-to-load forwarding works on the horizontal path.
"""

from __future__ import annotations

import numpy as np
from numba import njit, prange, types
from numba.extending import overload

from stereomesh._parallel import prange_only
from stereomesh.matching._kernels import _penalty2, _popcount64, _valid_range
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
    cycle_counter,
    prefetch,
    vadd,
    vadds,
    vand,
    vfill_outside,
    vget,
    vhamming,
    vhmin,
    vlane_index,
    vload,
    vmax,
    vmin,
    vselect_between,
    vselect_equal,
    vselect_less,
    vshift_in_high,
    vshift_in_low,
    vshl,
    vshr,
    vsplat,
    vstore,
    vstream,
    vsub,
)

INF16 = 0xFFFF
PREFETCH_AHEAD = 8


@njit(cache=True)
def _right_pad(d_min, dp):
    """Zero columns before and after the reversed right census rows.

    Left pixel ``x`` reads columns ``left + W - 1 - x + d_min + k`` for
    ``0 <= k < dp``: from ``left + d_min`` (at ``x = W - 1``) to
    ``left + W + d_min + dp - 2`` (at ``x = 0``), all inside the padded row.
    """
    return max(0, -d_min), max(0, d_min + dp)


@njit(cache=True, inline="always")
def _cost_row(crow, r, x0, x1, cl, crev, vol, use_volume, d_min, n_disp, dp, invalid, pad_cost):
    """Costs of left pixels ``(r, x0 .. x1 - 1)`` for all ``dp`` hypotheses, into ``crow[r & 1]``.

    Census strings come as 16-bit planes (``cl``: ``(P, H, W)``; ``crev``: the
    right strings in reverse column order with the zero columns of
    :func:`_right_pad` on both sides), so that the strings of hypotheses
    ``k .. k + LANES`` are one contiguous load per plane and their Hamming
    distances one vector popcount each.
    """
    W = crow.shape[0] // (2 * dp)
    for x in range(x0, x1):
        cb = ((r & 1) * W + x) * dp
        if use_volume:
            full = n_disp - n_disp % LANES
            for o in range(0, full, LANES):
                vstore(crow, cb + o, vload(vol, (r * W + x) * n_disp + o))
            for k in range(full, n_disp):
                crow[cb + k] = vol[r, x, k]
            for k in range(n_disp, dp):
                crow[cb + k] = pad_cost
        else:
            # Hypotheses whose right pixel x - d_min - k lies inside the image.
            k_lo, k_hi = _valid_range(x, W, d_min, n_disp)
            planes, H, wide = crev.shape
            rb = _right_pad(d_min, dp)[0] + W - 1 - x + d_min
            for o in range(0, dp, LANES):
                v = vhamming(crev, r * wide + rb + o, cl[0, r, x])
                for p in range(1, planes):
                    v = vadd(v, vhamming(crev, (p * H + r) * wide + rb + o, cl[p, r, x]))
                v = vfill_outside(v, k_lo - o, k_hi - o, invalid)
                v = vfill_outside(v, 0, n_disp - o, pad_cost)
                vstore(crow, cb + o, v)


@njit(cache=True, inline="always")
def _path_block(cost, below, cur, above, p1v, base, sub):
    """One semi-global recurrence step on one vector of hypotheses.

    ``below``, ``cur``, ``above``: the previous pixel's path costs in the vectors
    before, at and after this one (all-0xFFFF past the ends).
    """
    near = vadds(vmin(vshift_in_low(below, cur), vshift_in_high(cur, above)), p1v)
    return vsub(vadd(cost, vmin(vmin(cur, near), base)), sub)


@njit(cache=True, inline="always")
def _byte_path_block(cost, below, cur, above, p1v, base, sub):
    """:func:`_path_block` on 8-bit lanes.

    Valid when the previous minimum plus ``P2`` and every cost stay below 256
    (:func:`byte_lanes_fit`): then ``min(...) - sub`` never underflows and
    adding the cost never overflows for real hypotheses; padded ones saturate
    at 255, above every real value.
    """
    near = badds(bmin(bshift_in_low(below, cur), bshift_in_high(cur, above)), p1v)
    return badds(bsub(bmin(bmin(cur, near), base), sub), cost)


@njit(cache=True, inline="always")
def _load_path(work, index, block, fix_block, tail):
    """Path values of one vector of hypotheses from ``work``.

    In uint8 buffers the padded hypotheses past the ``tail`` real ones of the
    last vector saturate at 255, which no longer keeps them out of the minimum
    beside the last real hypothesis; in block ``fix_block`` (see
    :func:`_pad_fix_block`) they are read as 0xFFFF instead.
    """
    v = vload(work, index)
    if block == fix_block:
        v = vfill_outside(v, 0, tail, INF16)
    return v


@njit(cache=True, inline="always")
def _pad_fix_block(work, nb, tail):
    """The block :func:`_load_path` must mend, or -1: one compare per load."""
    return nb - 1 if work.itemsize == 1 and tail < LANES else -1


@njit(cache=True, inline="always")
def _arrivals(r, rs, fresh, x, W, dp, ndir, prev_off, pmin, pprev, gray, penalties):
    """Per direction arriving at ``(r, x)`` from row ``rs``: ``(src, min, P2)`` three times.

    Where the previous pixel's path values start in ``work``, their minimum
    and the penalty of the step; zeros where the path starts afresh (the
    all-zero row at the start of ``work``).
    """
    p1, p2, g_scale = penalties
    src0 = 0
    m0 = 0
    pen0 = 0
    src1 = 0
    m1 = 0
    pen1 = 0
    src2 = 0
    m2 = 0
    pen2 = 0
    if not fresh:
        g = gray[r, x]
        src0 = prev_off + x * dp
        m0 = np.int64(pmin[pprev, 0, x])
        pen0 = _penalty2(p1, p2, g_scale, g, gray[rs, x])
        if ndir == 3:
            if x >= 1:
                src1 = prev_off + (W + x - 1) * dp
                m1 = np.int64(pmin[pprev, 1, x - 1])
                pen1 = _penalty2(p1, p2, g_scale, g, gray[rs, x - 1])
            if x + 1 < W:
                src2 = prev_off + (2 * W + x + 1) * dp
                m2 = np.int64(pmin[pprev, 2, x + 1])
                pen2 = _penalty2(p1, p2, g_scale, g, gray[rs, x + 1])
    return src0, m0, pen0, src1, m1, pen1, src2, m2, pen2


@njit(cache=True)
def _columns(r, rs, fresh, x0, x1, mode, source, penalties, gray, ndir, crow, work, prev_off,
             cur_off, pmin, pprev, pcur, part, fwd, fwd_row, ckpt, ckpt_min, ckpt_slot, packing):
    """Cost row and the non-horizontal paths of columns ``[x0, x1)`` of row ``r``.

    The paths arrive from row ``rs`` (``r - 1`` or ``r + 1``) whose values are in
    ``work`` at ``prev_off``, or with ``fresh`` start afresh (from the all-zero
    row at the start of ``work``). ``mode`` 0 only advances the paths; 1 writes
    their sum to the row buffer ``part[r & 1]``; 2 writes their sum plus the
    forward sum ``fwd[fwd_row]`` (then ``part`` holds the final sums). With
    ``ckpt_slot >= 0`` the new path values are also saved as checkpoint
    ``ckpt_slot``. ``source`` is ``(cl, crev, vol,
    use_volume, d_min, n_disp, invalid, pad_cost)`` (see :func:`_cost_row`),
    ``penalties`` is ``(p1, p2, g_scale)``, ``packing`` is ``(cost_bits,
    fwd_pad)`` (see :func:`sgm_solve`): with ``cost_bits > 0`` mode 2 takes the
    costs from the low bits of the forward sums instead of computing them.
    """
    cl, crev, vol, use_volume, d_min, n_disp, invalid, pad_cost = source
    p1 = penalties[0]
    cost_bits, fwd_pad = packing
    unpack = mode == 2 and cost_bits > 0
    W = gray.shape[1]
    dp = crow.shape[0] // (2 * W)
    nb = dp // LANES
    tail = n_disp - (nb - 1) * LANES
    fix_block = _pad_fix_block(work, nb, tail)
    p1v = vsplat(np.uint16(p1))
    inf = vsplat(np.uint16(INF16))
    cost_mask = vsplat(np.uint16((1 << cost_bits) - 1))
    if not unpack:
        _cost_row(crow, r, x0, x1, cl, crev, vol, use_volume, d_min, n_disp, dp, invalid,
                  pad_cost)
    for x in range(x0, x1):
        cb = ((r & 1) * W + x) * dp
        src0, m0, pen0, src1, m1, pen1, src2, m2, pen2 = _arrivals(
            r, rs, fresh, x, W, dp, ndir, prev_off, pmin, pprev, gray, penalties)
        base0 = vsplat(np.uint16(m0 + pen0))
        base1 = vsplat(np.uint16(m1 + pen1))
        base2 = vsplat(np.uint16(m2 + pen2))
        sub0 = vsplat(np.uint16(m0))
        sub1 = vsplat(np.uint16(m1))
        sub2 = vsplat(np.uint16(m2))
        mv0 = inf
        mv1 = inf
        mv2 = inf
        lo0 = inf
        lo1 = inf
        lo2 = inf
        at0 = _load_path(work, src0, 0, fix_block, tail)
        at1 = _load_path(work, src1, 0, fix_block, tail)
        at2 = _load_path(work, src2, 0, fix_block, tail)
        dst = cur_off + x * dp
        fb = (fwd_row * W + x) * dp
        kb = ((ckpt_slot * ndir) * W + x) * dp
        for b in range(nb):
            o = b * LANES
            last = b + 1 == nb
            if unpack:
                packed = vload(fwd, fb + o)
                # With large blocks the forward sums come from memory: ask ahead.
                prefetch(fwd, fb + o + PREFETCH_AHEAD * dp)
                c = vand(packed, cost_mask)
                fsum = vshr(packed, cost_bits)
                if last and tail < LANES:
                    # Padded hypotheses were not packed faithfully (see sgm_solve).
                    c = vfill_outside(c, 0, tail, pad_cost)
                    fsum = vfill_outside(fsum, 0, tail, fwd_pad)
            else:
                c = vload(crow, cb + o)
                fsum = inf
            hi0 = inf if last else _load_path(work, src0 + o + LANES, b + 1, fix_block,
                                                   tail)
            l0 = _path_block(c, lo0, at0, hi0, p1v, base0, sub0)
            vstore(work, dst + o, l0)
            mv0 = vmin(mv0, l0)
            lo0 = at0
            at0 = hi0
            acc = l0
            if ckpt_slot >= 0:
                vstore(ckpt, kb + o, l0)
            if ndir == 3:
                hi1 = inf if last else _load_path(work, src1 + o + LANES, b + 1, fix_block,
                                                   tail)
                l1 = _path_block(c, lo1, at1, hi1, p1v, base1, sub1)
                vstore(work, dst + W * dp + o, l1)
                mv1 = vmin(mv1, l1)
                lo1 = at1
                at1 = hi1
                hi2 = inf if last else _load_path(work, src2 + o + LANES, b + 1, fix_block,
                                                   tail)
                l2 = _path_block(c, lo2, at2, hi2, p1v, base2, sub2)
                vstore(work, dst + 2 * W * dp + o, l2)
                mv2 = vmin(mv2, l2)
                lo2 = at2
                at2 = hi2
                acc = vadd(acc, vadd(l1, l2))
                if ckpt_slot >= 0:
                    vstore(ckpt, kb + W * dp + o, l1)
                    vstore(ckpt, kb + 2 * W * dp + o, l2)
            if unpack:
                acc = vadd(acc, fsum)
            elif mode == 2:
                acc = vadd(acc, vload(fwd, fb + o))
                prefetch(fwd, fb + o + PREFETCH_AHEAD * dp)
            if mode >= 1:
                vstore(part, cb + o, acc)
        pmin[pcur, 0, x] = vhmin(mv0)
        if ndir == 3:
            pmin[pcur, 1, x] = vhmin(mv1)
            pmin[pcur, 2, x] = vhmin(mv2)
        if ckpt_slot >= 0:
            for j in range(ndir):
                ckpt_min[ckpt_slot, j, x] = pmin[pcur, j, x]


@njit(cache=True)
def _columns_bytes(r, rs, fresh, x0, x1, mode, source, penalties, gray, ndir, crow8, work,
                   prev_off, cur_off, pmin, pprev, pcur, part, fwd, fwd_row, ckpt, ckpt_min,
                   ckpt_slot, packing):
    """:func:`_columns` with the path recurrences on 8-bit lanes.

    ``crow8`` holds the cost rows in bytes, ``work`` and ``ckpt`` the path
    values (uint8); sums are widened into 16-bit lanes. ``dp`` is a multiple
    of ``BYTE_LANES``; the caller checks :func:`byte_lanes_fit`.
    """
    cl, crev, vol, use_volume, d_min, n_disp, invalid, pad_cost = source
    p1 = penalties[0]
    cost_bits, fwd_pad = packing
    unpack = mode == 2 and cost_bits > 0
    W = gray.shape[1]
    dp = crow8.shape[0] // (2 * W)
    nb = dp // BYTE_LANES
    tail = n_disp - (nb - 1) * BYTE_LANES
    p1v = bsplat(p1)
    inf = bsplat(255)
    inf16 = vsplat(np.uint16(INF16))
    cost_mask = vsplat(np.uint16((1 << cost_bits) - 1))
    if not unpack:
        _cost_row(crow8, r, x0, x1, cl, crev, vol, use_volume, d_min, n_disp, dp, invalid,
                  pad_cost)
    for x in range(x0, x1):
        cb = ((r & 1) * W + x) * dp
        src0, m0, pen0, src1, m1, pen1, src2, m2, pen2 = _arrivals(
            r, rs, fresh, x, W, dp, ndir, prev_off, pmin, pprev, gray, penalties)
        base0 = bsplat(m0 + pen0)
        base1 = bsplat(m1 + pen1)
        base2 = bsplat(m2 + pen2)
        sub0 = bsplat(m0)
        sub1 = bsplat(m1)
        sub2 = bsplat(m2)
        mv0 = inf
        mv1 = inf
        mv2 = inf
        lo0 = inf
        lo1 = inf
        lo2 = inf
        at0 = bload(work, src0)
        at1 = bload(work, src1)
        at2 = bload(work, src2)
        dst = cur_off + x * dp
        fb = (fwd_row * W + x) * dp
        kb = ((ckpt_slot * ndir) * W + x) * dp
        for b in range(nb):
            o = b * BYTE_LANES
            last = b + 1 == nb
            if unpack:
                packed_low = vload(fwd, fb + o)
                packed_high = vload(fwd, fb + o + LANES)
                # A block spans two cache lines of forward sums: ask for both.
                prefetch(fwd, fb + o + PREFETCH_AHEAD * dp)
                prefetch(fwd, fb + o + LANES + PREFETCH_AHEAD * dp)
                c = bnarrow(vand(packed_low, cost_mask), vand(packed_high, cost_mask))
                f_low = vshr(packed_low, cost_bits)
                f_high = vshr(packed_high, cost_bits)
                if last and tail < BYTE_LANES:
                    # Padded hypotheses were not packed faithfully (see sgm_solve).
                    c = bfill_outside(c, 0, tail, pad_cost)
                    f_low = vfill_outside(f_low, 0, tail, fwd_pad)
                    f_high = vfill_outside(f_high, 0, tail - LANES, fwd_pad)
            else:
                c = bload(crow8, cb + o)
                f_low = inf16
                f_high = inf16
            hi0 = inf if last else bload(work, src0 + o + BYTE_LANES)
            l0 = _byte_path_block(c, lo0, at0, hi0, p1v, base0, sub0)
            bstore(work, dst + o, l0)
            mv0 = bmin(mv0, l0)
            lo0 = at0
            at0 = hi0
            acc_low = bwiden_low(l0)
            acc_high = bwiden_high(l0)
            if ckpt_slot >= 0:
                bstore(ckpt, kb + o, l0)
            if ndir == 3:
                hi1 = inf if last else bload(work, src1 + o + BYTE_LANES)
                l1 = _byte_path_block(c, lo1, at1, hi1, p1v, base1, sub1)
                bstore(work, dst + W * dp + o, l1)
                mv1 = bmin(mv1, l1)
                lo1 = at1
                at1 = hi1
                hi2 = inf if last else bload(work, src2 + o + BYTE_LANES)
                l2 = _byte_path_block(c, lo2, at2, hi2, p1v, base2, sub2)
                bstore(work, dst + 2 * W * dp + o, l2)
                mv2 = bmin(mv2, l2)
                lo2 = at2
                at2 = hi2
                acc_low = vadd(acc_low, vadd(bwiden_low(l1), bwiden_low(l2)))
                acc_high = vadd(acc_high, vadd(bwiden_high(l1), bwiden_high(l2)))
                if ckpt_slot >= 0:
                    bstore(ckpt, kb + W * dp + o, l1)
                    bstore(ckpt, kb + 2 * W * dp + o, l2)
            if unpack:
                acc_low = vadd(acc_low, f_low)
                acc_high = vadd(acc_high, f_high)
            elif mode == 2:
                acc_low = vadd(acc_low, vload(fwd, fb + o))
                acc_high = vadd(acc_high, vload(fwd, fb + o + LANES))
                prefetch(fwd, fb + o + PREFETCH_AHEAD * dp)
                prefetch(fwd, fb + o + LANES + PREFETCH_AHEAD * dp)
            if mode >= 1:
                vstore(part, cb + o, acc_low)
                vstore(part, cb + o + LANES, acc_high)
        pmin[pcur, 0, x] = bhmin(mv0)
        if ndir == 3:
            pmin[pcur, 1, x] = bhmin(mv1)
            pmin[pcur, 2, x] = bhmin(mv2)
        if ckpt_slot >= 0:
            for j in range(ndir):
                ckpt_min[ckpt_slot, j, x] = pmin[pcur, j, x]


@njit(cache=True, inline="always")
def _pick(m1, m2, at, inf):
    """Winner ``(cost, hypothesis, second cost)`` from the lane minima of :func:`_select_row`."""
    bv = vhmin(m1)
    k_of_min = vadd(at, vlane_index(0))
    bk = np.int64(vhmin(vselect_equal(m1, vsplat(bv), k_of_min, inf)))
    second = vhmin(vselect_between(k_of_min, bk - 1, bk + 2, m2, m1))
    return bv, bk, second


@njit(cache=True)
def _select_row(r, final, d_min, n_disp, best_k, c_best, c_second, c_minus, c_plus):
    """Left winners of row ``r`` from its summed costs, row ``r & 1`` of ``final``.

    ``final`` holds two rows of ``W * dp`` sums, flat (pixel-major).

    Ties go to the smallest hypothesis; ``c_second`` is the best cost at least
    two hypotheses from the winner (inf if none); ``c_minus``/``c_plus`` equal
    ``c_best`` at the ends of the valid range.

    One pass keeps, per lane (hypotheses ``k ≡ j mod LANES``), the smallest and
    second-smallest cost and where the smallest is. The winner is the smallest
    ``k`` among lanes holding the overall minimum; the three excluded
    hypotheses ``bk - 1 .. bk + 1`` fall in three different lanes, each of which
    then offers its second-smallest cost if its smallest is the excluded one.
    Two pixels, half a row apart, go through the loop together: the
    reductions at the end of a pixel are a long dependency chain, and two
    independent chains keep the core busy.
    """
    H, W = best_k.shape
    dp = final.shape[0] // (2 * W)
    nb = dp // LANES
    inf = vsplat(np.uint16(INF16))
    half = (W + 1) // 2
    for i in range(half):
        # With an odd width the last pair takes the last pixel twice.
        xa = i
        xb = min(i + half, W - 1)
        fa = ((r & 1) * W + xa) * dp
        fb = ((r & 1) * W + xb) * dp
        # Hypotheses whose right pixel lies inside the image; the others, and
        # the padded ones, must neither win nor pose as a second best.
        alo, ahi = _valid_range(xa, W, d_min, n_disp)
        blo, bhi = _valid_range(xb, W, d_min, n_disp)
        am1 = inf
        am2 = inf
        a_at = vsplat(np.uint16(0))
        bm1 = inf
        bm2 = inf
        b_at = vsplat(np.uint16(0))
        for b in range(nb):
            o = b * LANES
            key = vlane_index(o)
            ov = vsplat(np.uint16(o))
            va = vselect_between(key, alo, ahi, vload(final, fa + o), inf)
            vb = vselect_between(key, blo, bhi, vload(final, fb + o), inf)
            a_at = vselect_less(va, am1, ov, a_at)
            am2 = vmin(am2, vmax(am1, va))
            am1 = vmin(am1, va)
            b_at = vselect_less(vb, bm1, ov, b_at)
            bm2 = vmin(bm2, vmax(bm1, vb))
            bm1 = vmin(bm1, vb)
        a_best, a_k, a_second = _pick(am1, am2, a_at, inf)
        b_best, b_k, b_second = _pick(bm1, bm2, b_at, inf)
        for j in range(2):
            x = xa if j == 0 else xb
            f0 = fa if j == 0 else fb
            k_lo = alo if j == 0 else blo
            k_hi = ahi if j == 0 else bhi
            bv = a_best if j == 0 else b_best
            bk = a_k if j == 0 else b_k
            second = a_second if j == 0 else b_second
            if k_hi <= k_lo:
                best_k[r, x] = -1
                c_best[r, x] = 0.0
                c_second[r, x] = 0.0
                c_minus[r, x] = 0.0
                c_plus[r, x] = 0.0
            else:
                best_k[r, x] = bk
                c_best[r, x] = bv
                c_second[r, x] = np.inf if second == INF16 else np.float32(second)
                c_minus[r, x] = final[f0 + bk - 1] if bk > k_lo else bv
                c_plus[r, x] = final[f0 + bk + 1] if bk < k_hi - 1 else bv


@njit(cache=True)
def _horizontal(r, gray, p1, p2, g_scale, crow, part, hbuf, out, out_row, cost_bits):
    """Both horizontal paths of row ``r``, added to the other paths in ``part[r & 1]``.

    The sums go to row ``out_row`` of the forward sums ``out``; with
    ``cost_bits > 0`` shifted left by ``cost_bits`` with the matching cost in
    the low bits. The two directions run interleaved, the left-to-right one
    at ``x = i`` and the other at ``W - 1 - i``: whichever reaches a pixel
    first adds its values into ``part``, the second writes the sum out.
    ``hbuf`` holds an all-zero row (where a path starts afresh) and two
    ping-pong rows per direction.
    """
    W = gray.shape[1]
    dp = crow.shape[0] // (2 * W)
    nb = dp // LANES
    p1v = vsplat(np.uint16(p1))
    inf = vsplat(np.uint16(INF16))
    cost_mask = vsplat(np.uint16((1 << cost_bits) - 1))  # 0 leaves the sums as they are
    f_prev, f_cur = dp, 2 * dp
    b_prev, b_cur = 3 * dp, 4 * dp
    fm = 0
    bm = 0
    for i in range(W):
        xf = i
        xb = W - 1 - i
        # A pixel's first visitor adds into part; in the middle of an odd row
        # the left-to-right path comes first.
        f_first = 2 * i <= W - 1
        b_first = 2 * i < W - 1
        cf = ((r & 1) * W + xf) * dp
        cb = ((r & 1) * W + xb) * dp
        of = (out_row * W + xf) * dp
        ob = (out_row * W + xb) * dp
        if i == 0:
            f_src = 0
            b_src = 0
            f_pen = 0
            b_pen = 0
        else:
            f_src = f_prev
            b_src = b_prev
            f_pen = _penalty2(p1, p2, g_scale, gray[r, xf], gray[r, xf - 1])
            b_pen = _penalty2(p1, p2, g_scale, gray[r, xb], gray[r, xb + 1])
        f_base = vsplat(np.uint16(fm + f_pen))
        f_sub = vsplat(np.uint16(fm))
        b_base = vsplat(np.uint16(bm + b_pen))
        b_sub = vsplat(np.uint16(bm))
        f_mv = inf
        b_mv = inf
        f_lo = inf
        b_lo = inf
        f_at = vload(hbuf, f_src)
        b_at = vload(hbuf, b_src)
        for b in range(nb):
            o = b * LANES
            last = b + 1 == nb
            f_hi = inf if last else vload(hbuf, f_src + o + LANES)
            b_hi = inf if last else vload(hbuf, b_src + o + LANES)
            f_c = vload(crow, cf + o)
            b_c = vload(crow, cb + o)
            f_l = _path_block(f_c, f_lo, f_at, f_hi, p1v, f_base, f_sub)
            b_l = _path_block(b_c, b_lo, b_at, b_hi, p1v, b_base, b_sub)
            vstore(hbuf, f_cur + o, f_l)
            vstore(hbuf, b_cur + o, b_l)
            f_mv = vmin(f_mv, f_l)
            b_mv = vmin(b_mv, b_l)
            f_lo = f_at
            f_at = f_hi
            b_lo = b_at
            b_at = b_hi
            f_sum = vadd(vload(part, cf + o), f_l)
            if f_first:
                vstore(part, cf + o, f_sum)
            else:
                # Read again only a block of rows later: past the caches.
                vstream(out, of + o, vadd(vshl(f_sum, cost_bits), vand(f_c, cost_mask)))
            b_sum = vadd(vload(part, cb + o), b_l)
            if b_first:
                vstore(part, cb + o, b_sum)
            else:
                vstream(out, ob + o, vadd(vshl(b_sum, cost_bits), vand(b_c, cost_mask)))
        fm = np.int64(vhmin(f_mv))
        bm = np.int64(vhmin(b_mv))
        f_prev, f_cur = f_cur, f_prev
        b_prev, b_cur = b_cur, b_prev


@njit(cache=True)
def _horizontal_bytes(r, gray, p1, p2, g_scale, crow8, part, hbuf8, out, out_row, cost_bits):
    """:func:`_horizontal` on 8-bit lanes (``crow8`` and ``hbuf8`` hold bytes)."""
    W = gray.shape[1]
    dp = crow8.shape[0] // (2 * W)
    nb = dp // BYTE_LANES
    p1v = bsplat(p1)
    inf = bsplat(255)
    cost_mask = vsplat(np.uint16((1 << cost_bits) - 1))
    f_prev, f_cur = dp, 2 * dp
    b_prev, b_cur = 3 * dp, 4 * dp
    fm = 0
    bm = 0
    for i in range(W):
        xf = i
        xb = W - 1 - i
        f_first = 2 * i <= W - 1
        b_first = 2 * i < W - 1
        cf = ((r & 1) * W + xf) * dp
        cb = ((r & 1) * W + xb) * dp
        of = (out_row * W + xf) * dp
        ob = (out_row * W + xb) * dp
        if i == 0:
            f_src = 0
            b_src = 0
            f_pen = 0
            b_pen = 0
        else:
            f_src = f_prev
            b_src = b_prev
            f_pen = _penalty2(p1, p2, g_scale, gray[r, xf], gray[r, xf - 1])
            b_pen = _penalty2(p1, p2, g_scale, gray[r, xb], gray[r, xb + 1])
        f_base = bsplat(fm + f_pen)
        f_sub = bsplat(fm)
        b_base = bsplat(bm + b_pen)
        b_sub = bsplat(bm)
        f_mv = inf
        b_mv = inf
        f_lo = inf
        b_lo = inf
        f_at = bload(hbuf8, f_src)
        b_at = bload(hbuf8, b_src)
        for b in range(nb):
            o = b * BYTE_LANES
            last = b + 1 == nb
            f_hi = inf if last else bload(hbuf8, f_src + o + BYTE_LANES)
            b_hi = inf if last else bload(hbuf8, b_src + o + BYTE_LANES)
            f_c = bload(crow8, cf + o)
            b_c = bload(crow8, cb + o)
            f_l = _byte_path_block(f_c, f_lo, f_at, f_hi, p1v, f_base, f_sub)
            b_l = _byte_path_block(b_c, b_lo, b_at, b_hi, p1v, b_base, b_sub)
            bstore(hbuf8, f_cur + o, f_l)
            bstore(hbuf8, b_cur + o, b_l)
            f_mv = bmin(f_mv, f_l)
            b_mv = bmin(b_mv, b_l)
            f_lo = f_at
            f_at = f_hi
            b_lo = b_at
            b_at = b_hi
            for h in range(2):
                oh = o + h * LANES
                f_add = bwiden_low(f_l) if h == 0 else bwiden_high(f_l)
                b_add = bwiden_low(b_l) if h == 0 else bwiden_high(b_l)
                f_sum = vadd(vload(part, cf + oh), f_add)
                if f_first:
                    vstore(part, cf + oh, f_sum)
                else:
                    f_cost = bwiden_low(f_c) if h == 0 else bwiden_high(f_c)
                    vstream(out, of + oh, vadd(vshl(f_sum, cost_bits), vand(f_cost, cost_mask)))
                b_sum = vadd(vload(part, cb + oh), b_add)
                if b_first:
                    vstore(part, cb + oh, b_sum)
                else:
                    b_cost = bwiden_low(b_c) if h == 0 else bwiden_high(b_c)
                    vstream(out, ob + oh, vadd(vshl(b_sum, cost_bits), vand(b_cost, cost_mask)))
        fm = np.int64(bhmin(f_mv))
        bm = np.int64(bhmin(b_mv))
        f_prev, f_cur = f_cur, f_prev
        b_prev, b_cur = b_cur, b_prev


def _row_columns(r, rs, fresh, x0, x1, mode, source, penalties, gray, ndir, crow, work,
                 prev_off, cur_off, pmin, pprev, pcur, part, fwd, fwd_row, ckpt, ckpt_min,
                 ckpt_slot, packing):
    """:func:`_columns_bytes` when the cost rows ``crow`` are bytes, else :func:`_columns`.

    Chosen when numba types the call, so each specialisation of
    :func:`sgm_solve` compiles one of them.
    """


@overload(_row_columns, inline="always")
def _row_columns_typed(r, rs, fresh, x0, x1, mode, source, penalties, gray, ndir, crow, work,
                       prev_off, cur_off, pmin, pprev, pcur, part, fwd, fwd_row, ckpt, ckpt_min,
                       ckpt_slot, packing):
    kernel = _columns_bytes if crow.dtype == types.uint8 else _columns

    def impl(r, rs, fresh, x0, x1, mode, source, penalties, gray, ndir, crow, work, prev_off,
             cur_off, pmin, pprev, pcur, part, fwd, fwd_row, ckpt, ckpt_min, ckpt_slot,
             packing):
        kernel(r, rs, fresh, x0, x1, mode, source, penalties, gray, ndir, crow, work, prev_off,
               cur_off, pmin, pprev, pcur, part, fwd, fwd_row, ckpt, ckpt_min, ckpt_slot,
               packing)

    return impl


def _row_horizontal(r, gray, p1, p2, g_scale, crow, part, hbuf, out, out_row, cost_bits):
    """:func:`_horizontal_bytes` when ``crow`` holds bytes, else :func:`_horizontal`."""


@overload(_row_horizontal, inline="always")
def _row_horizontal_typed(r, gray, p1, p2, g_scale, crow, part, hbuf, out, out_row, cost_bits):
    kernel = _horizontal_bytes if crow.dtype == types.uint8 else _horizontal

    def impl(r, gray, p1, p2, g_scale, crow, part, hbuf, out, out_row, cost_bits):
        kernel(r, gray, p1, p2, g_scale, crow, part, hbuf, out, out_row, cost_bits)

    return impl


def byte_lanes_fit(max_cost, p2, pad_cost, narrow_paths):
    """Whether the path recurrences may run on 8-bit lanes (see :func:`_byte_path_block`).

    Path values stay at most ``max_cost + P2`` and the step term at most
    ``P2`` above the previous minimum, so everything below 256 needs
    ``max_cost + 2 P2 < 256``; the padded hypotheses' cost must fit a byte.

    Examples
    --------
    >>> byte_lanes_fit(34, 96, 34 + 2 * 96 + 1, True)
    True
    >>> byte_lanes_fit(34, 120, 34 + 2 * 120 + 1, True)
    False
    """
    return bool(narrow_paths and max_cost + 2 * p2 <= 254 and pad_cost <= 255)


WINDOW_VECTORS = 8  # hypotheses up to 8 * LANES: right winners from a register window


@njit(cache=True, inline="always")
def _merge_right(v, o, m, a):
    """Fold one vector of sums into the window minima ``m`` and their hypotheses ``a``.

    A smaller sum takes the entry; an equal one keeps the smaller hypothesis,
    so the result does not depend on the order pixels arrive in.
    """
    k = vlane_index(o)
    return vmin(m, v), vselect_less(v, m, k, vselect_equal(v, m, vmin(a, k), a))


@njit(cache=True)
def _right_winners(r, final, d_min, n_disp, rmin, rarg, best_right):
    """Right-image winners of row ``r`` from its final sums, row ``r & 1`` of ``final``.

    ``final`` holds two rows of ``W * dp`` sums, flat (pixel-major).

    Right pixel ``xr`` takes the hypothesis ``k`` minimising the sum at left pixel
    ``xr + d_min + k`` (smallest ``k`` on ties; -1 if none is valid): the
    minimum along a diagonal ``jj = W - 1 - x + k`` of the row's sums.

    With up to ``WINDOW_VECTORS * LANES`` hypotheses, the left pixels are
    visited from right to left and the diagonals they touch are held in
    registers: a window of ``jj`` from ``W - 1 - x`` on. After each pixel the
    lowest diagonal is complete, and the window moves up one lane. Wider
    ranges gather the minima in the buffers ``rmin``/``rarg`` (indexed by
    ``jj``), visiting pixels ``LANES`` apart so that each load meets the
    aligned store before it.
    """
    H, W = best_right.shape
    dp = final.shape[0] // (2 * W)
    nb = dp // LANES
    row = (r & 1) * W * dp
    if nb > WINDOW_VECTORS:
        _right_winners_buffered(r, final, d_min, n_disp, rmin, rarg, best_right)
        return
    for xr in range(W):
        best_right[r, xr] = -1
    inf = vsplat(np.uint16(INF16))
    m0, m1, m2, m3, m4, m5, m6, m7 = inf, inf, inf, inf, inf, inf, inf, inf
    a0, a1, a2, a3, a4, a5, a6, a7 = inf, inf, inf, inf, inf, inf, inf, inf
    for i in range(W + dp):
        if i < W:
            fb = row + (W - 1 - i) * dp
            m0, a0 = _merge_right(vload(final, fb), 0, m0, a0)
            if nb > 1:
                m1, a1 = _merge_right(vload(final, fb + LANES), LANES, m1, a1)
            if nb > 2:
                m2, a2 = _merge_right(vload(final, fb + 2 * LANES), 2 * LANES, m2, a2)
            if nb > 3:
                m3, a3 = _merge_right(vload(final, fb + 3 * LANES), 3 * LANES, m3, a3)
            if nb > 4:
                m4, a4 = _merge_right(vload(final, fb + 4 * LANES), 4 * LANES, m4, a4)
            if nb > 5:
                m5, a5 = _merge_right(vload(final, fb + 5 * LANES), 5 * LANES, m5, a5)
            if nb > 6:
                m6, a6 = _merge_right(vload(final, fb + 6 * LANES), 6 * LANES, m6, a6)
            if nb > 7:
                m7, a7 = _merge_right(vload(final, fb + 7 * LANES), 7 * LANES, m7, a7)
        elif W - 1 - d_min - i < 0:
            break  # the remaining diagonals belong to no right pixel
        # Diagonal jj = i is complete: right pixel W - 1 - d_min - i.
        xr = W - 1 - d_min - i
        if 0 <= xr < W:
            k = np.int64(vget(a0, 0))
            best_right[r, xr] = k if k < n_disp else -1
        # Hypotheses count from the window's start: moving it up lowers them by one.
        m0, m1, m2, m3 = (vshift_in_high(m0, m1), vshift_in_high(m1, m2),
                          vshift_in_high(m2, m3), vshift_in_high(m3, m4))
        m4, m5, m6, m7 = (vshift_in_high(m4, m5), vshift_in_high(m5, m6),
                          vshift_in_high(m6, m7), vshift_in_high(m7, inf))
        a0, a1, a2, a3 = (vshift_in_high(a0, a1), vshift_in_high(a1, a2),
                          vshift_in_high(a2, a3), vshift_in_high(a3, a4))
        a4, a5, a6, a7 = (vshift_in_high(a4, a5), vshift_in_high(a5, a6),
                          vshift_in_high(a6, a7), vshift_in_high(a7, inf))


@njit(cache=True, inline="always")
def _right_winners_buffered(r, final, d_min, n_disp, rmin, rarg, best_right):
    """:func:`_right_winners` for any number of hypotheses, through memory buffers.

    Right pixel ``xr`` takes the hypothesis ``k`` minimising the sum at left pixel
    ``xr + d_min + k`` (smallest ``k`` on ties; -1 if none is valid). The
    minima are gathered along diagonals into buffers indexed
    ``jj = W - 1 - x + k``, so every access is a contiguous vector; pixels are
    visited ``LANES`` apart so that each load meets the aligned store before it.
    """
    H, W = best_right.shape
    dp = final.shape[0] // (2 * W)
    nb = dp // LANES
    row = (r & 1) * W * dp
    rmin[:] = INF16
    rarg[:] = INF16
    for phase in range(LANES):
        for x in range(phase, W, LANES):
            fb = row + x * dp
            jb = W - 1 - x
            for b in range(nb):
                o = b * LANES
                v = vload(final, fb + o)
                m = vload(rmin, jb + o)
                a = vload(rarg, jb + o)
                k = vlane_index(o)
                # A smaller sum takes the pixel; an equal one keeps the smaller hypothesis.
                a = vselect_less(v, m, k, vselect_equal(v, m, vmin(a, k), a))
                vstore(rarg, jb + o, a)
                vstore(rmin, jb + o, vmin(m, v))
    for xr in range(W):
        jj = W - 1 - xr - d_min
        k = np.int64(rarg[jj]) if 0 <= jj < rarg.shape[0] else -1
        best_right[r, xr] = k if 0 <= k < n_disp else -1


REBALANCE_STEPS = 8


@njit(cache=True)
def _rebalance(edges, spent, W):
    """Move the lanes' column boundaries toward equal time per step.

    ``spent`` is the time (cycles) each lane worked over the last steps. The
    boundary after a group of lanes that took more than their share moves
    left by half the excess, converted to columns at the mean cost of a column.
    Only the speed depends on this: every split gives the same result.
    """
    lanes = spent.shape[0]
    total = 0.0
    for t in range(lanes):
        total += spent[t]
    if total <= 0:
        return
    mean = total / lanes
    per_column = total / W
    excess = 0.0
    for t in range(1, lanes):
        excess += spent[t - 1] - mean
        edges[t] -= 0.5 * excess / per_column
    for t in range(1, lanes):
        edges[t] = min(max(edges[t], edges[t - 1]), W)
    edges[0] = 0.0
    edges[lanes] = W


# Fields of one step of the schedule (one parallel region).
_PHASE, _COLS, _FROM, _FRESH, _MODE, _FWD_ROW, _SAVE, _HORIZ, _HORIZ_OUT, _SELECT, _LOAD, \
    _PARITY = range(12)
_PASS1, _DOWN, _UP = range(3)


@njit(cache=True)
def _schedule(H, block_rows):
    """The steps of :func:`sgm_solve`, one row of ints per parallel region.

    Pass 1 goes down to the last checkpoint, saving one at the end of every
    block. Then, block by block from the bottom, the block's forward sums are
    recomputed from its checkpoint (``_DOWN`` steps, the horizontal paths one
    row behind the others) and the pass up crosses the block (``_UP`` steps,
    the winners one row behind; they catch up in the next block, or in a last
    step).
    """
    n_blocks = (H + block_rows - 1) // block_rows
    # Blocks are counted from the bottom, so that a short block is the top one
    # and the first pass stops block_rows above the bottom.
    starts = np.empty(n_blocks + 1, np.int64)
    for block in range(n_blocks + 1):
        starts[block] = max(0, H - (n_blocks - block) * block_rows)
    n = starts[n_blocks - 1] + H + n_blocks + H + 2
    steps = np.full((n, 12), -1, np.int64)
    i = 0
    parity = 0
    for r in range(starts[n_blocks - 1]):
        steps[i, _PHASE] = _PASS1
        steps[i, _COLS] = r
        steps[i, _FROM] = r - 1
        steps[i, _FRESH] = r == 0
        steps[i, _MODE] = 0
        # Checkpoint `block - 1` holds the paths at the last row above `block`.
        for block in range(1, n_blocks):
            if r == starts[block] - 1:
                steps[i, _SAVE] = block - 1
        steps[i, _PARITY] = parity
        parity = 1 - parity
        i += 1
    up_parity = 0
    for block in range(n_blocks - 1, -1, -1):
        a = starts[block]
        b = starts[block + 1]
        parity = 0
        for step in range(b - a + 1):
            r = a + step
            steps[i, _PHASE] = _DOWN
            steps[i, _PARITY] = parity
            if step == 0 and block > 0:
                steps[i, _LOAD] = block - 1
            if r < b:
                steps[i, _COLS] = r
                steps[i, _FROM] = r - 1
                steps[i, _FRESH] = r == 0
                steps[i, _MODE] = 1
            if r > a:
                steps[i, _HORIZ] = r - 1
                steps[i, _HORIZ_OUT] = r - 1 - a
            parity = 1 - parity
            i += 1
        extra = 1 if block == 0 else 0
        for step in range(b - a + extra):
            r = b - 1 - step
            steps[i, _PHASE] = _UP
            steps[i, _PARITY] = up_parity
            if r >= a:
                steps[i, _COLS] = r
                steps[i, _FROM] = r + 1
                steps[i, _FRESH] = r == H - 1
                steps[i, _MODE] = 2
                steps[i, _FWD_ROW] = r - a
            if 0 <= r + 1 < H:
                steps[i, _SELECT] = r + 1
            up_parity = 1 - up_parity
            i += 1
    return steps[:i]


def cost_packing(max_cost, p2, pad_cost, diagonals):
    """``(cost_bits, fwd_pad)`` for :func:`sgm_solve`; ``cost_bits`` 0 where packing does not fit.

    The forward sums of the ``ndir + 2`` paths going down are each at most
    ``max_cost + p2`` (a path value never exceeds its cost plus ``P2`` above the
    previous minimum, which is subtracted), so they fit beside a cost of
    ``cost_bits`` bits in 16 when ``(ndir + 1) · (max_cost + p2) < 2 ** (16 -
    cost_bits)``. ``fwd_pad`` is above every real total of all paths.

    Examples
    --------
    >>> cost_packing(34, 96, 227, True)  # census 7 x 5, the default penalties
    (6, 1041)
    >>> cost_packing(255, 96, 448, True)
    (0, 0)
    """
    ndir = 3 if diagonals else 1
    paths_down = ndir + 2
    bits = max(1, int(max_cost).bit_length())
    if paths_down * (max_cost + p2) >= 1 << (16 - bits):
        return 0, 0
    fwd_pad = 2 * (ndir + 1) * (max_cost + p2) + 1
    assert fwd_pad + ndir * (pad_cost + p2) <= INF16
    return bits, fwd_pad


def buffer_shapes(H, W, dp, diagonals, block_rows, narrow_paths, byte_paths=False):
    """``(shape, dtype)`` of the work buffers :func:`sgm_solve` takes, in its argument order.

    With ``narrow_paths`` the path values (and their checkpoints) are kept in
    uint8, which halves the memory they stream through; callers ensure that
    every real path value fits (matching cost + P2 <= 255). With
    ``byte_paths`` (see :func:`byte_lanes_fit`) the cost rows are bytes too,
    which makes :func:`sgm_solve` run the path recurrences on byte lanes.
    """
    ndir = 3 if diagonals else 1
    n_ckpt = max((H + block_rows - 1) // block_rows - 1, 1)
    path = np.uint8 if narrow_paths else np.uint16
    work = (dp + 2 * ndir * W * dp,)
    row2 = (2 * W * dp,)
    cost_type = np.uint8 if byte_paths else np.uint16
    return [(work, path), (work, path), ((n_ckpt, ndir, W, dp), path),
            ((n_ckpt, ndir, W), np.uint16), ((block_rows, W, dp), np.uint16),
            (row2, np.uint16), (row2, cost_type), (row2, cost_type), (row2, np.uint16)]


@njit(cache=True, parallel=prange_only())
def sgm_solve(cl, crev, vol, use_volume, gray, d_min, n_disp, dp, invalid, pad_cost, p1, p2,
              g_scale, diagonals, block_rows, cost_bits, fwd_pad, bounds_even, bounds_down,
              bounds_up, work_down, work_up, ckpt, ckpt_min, fwd, final, crow_down, crow_up,
              part_down):
    """Semi-global matching with 4 or 8 paths and the winners of both images.

    Costs come from census strings in 16-bit planes (``cl`` and ``crev``, see
    :func:`_cost_row`) or,
    with ``use_volume``, from the (H, W, n_disp) uint8 volume ``vol``.
    ``bounds_*`` hold the column slices of the lanes in the first pass and in
    the passes down and up (T + 1 increasing ints from 0 to W). The uint16
    work buffers have the shapes :func:`buffer_shapes` gives.

    Memory is ``O(sqrt(H) · W · dp)``: the rows form blocks of ``block_rows``. A
    first pass down saves the state of the paths from above at the end of every
    block (a checkpoint). Then, block by block from the bottom, the forward
    sums of the block are recomputed from its checkpoint into a block buffer,
    and the pass up adds the paths from below and picks the winners (see
    :func:`_schedule`). The result is exactly that of storing every forward sum.

    With ``cost_bits > 0`` the forward sums are stored shifted left by that
    many bits with the matching cost in the low bits, so that the pass up
    need not compute the costs again. The caller ensures that every real
    forward sum and cost fits (see :func:`cost_packing`). Padded hypotheses do
    not fit: the pass up reads their costs as ``pad_cost`` and their forward
    sums as ``fwd_pad``, which must exceed every real total.

    Returns ``best_k`` (int32, -1 where no hypothesis is valid), ``c_best``,
    ``c_second``, ``c_minus``, ``c_plus`` (float32, see :func:`_select_row`)
    and ``best_right`` (int32, see :func:`_right_winners`).
    """
    H, W = gray.shape
    ndir = 3 if diagonals else 1
    lanes = bounds_down.shape[0] - 1
    half = ndir * W * dp
    # Path values: [zero row][previous rows of each direction][current rows of each direction]
    work_down[:dp] = 0
    work_up[:dp] = 0
    pmin_down = np.zeros((2, ndir, W), np.uint16)
    pmin_up = np.zeros((2, ndir, W), np.uint16)
    # Vector-aligned: the horizontal paths read each store back at once. Path
    # values have the cost rows' type (bytes on byte lanes).
    hbuf_memory = np.zeros(5 * dp + BYTE_LANES, crow_down.dtype)
    start = ((-hbuf_memory.ctypes.data) % BYTE_LANES) // hbuf_memory.itemsize
    hbuf = hbuf_memory[start : start + 5 * dp]
    rmin = np.empty(W + dp, np.uint16)
    rarg = np.empty(W + dp, np.uint16)
    best_k = np.empty((H, W), np.int32)
    c_best = np.empty((H, W), np.float32)
    c_second = np.empty((H, W), np.float32)
    c_minus = np.empty((H, W), np.float32)
    c_plus = np.empty((H, W), np.float32)
    best_right = np.empty((H, W), np.int32)
    right_lane = min(1, lanes - 1)
    source = (cl, crev, vol, use_volume, d_min, n_disp, invalid, pad_cost)
    penalties = (p1, p2, g_scale)
    packing = (cost_bits, fwd_pad)
    steps = _schedule(H, block_rows)
    # Column split per phase, adapted to the measured time of each lane (see _rebalance).
    edges = np.empty((3, lanes + 1), np.float64)
    for j in range(lanes + 1):
        edges[_PASS1, j] = bounds_even[j]
        edges[_DOWN, j] = bounds_down[j]
        edges[_UP, j] = bounds_up[j]
    busy = np.zeros(lanes, np.int64)
    spent = np.zeros((3, lanes), np.int64)
    measured = np.zeros(3, np.int64)
    bounds = np.empty(lanes + 1, np.int64)
    for i in range(steps.shape[0]):
        st = steps[i]
        phase = st[_PHASE]
        up = phase == _UP
        work = work_up if up else work_down
        pmin = pmin_up if up else pmin_down
        crow = crow_up if up else crow_down
        part = final if up else part_down
        parity = st[_PARITY]
        for j in range(lanes + 1):
            bounds[j] = min(max(np.int64(edges[phase, j] + 0.5), 0), W)
        if st[_LOAD] >= 0:
            # Resume the paths from above at the checkpoint of this block.
            slot = st[_LOAD]
            for t in prange(lanes):
                for j in range(ndir):
                    for x in range(bounds[t], bounds[t + 1]):
                        start = dp + (j * W + x) * dp
                        for k in range(dp):
                            work[start + k] = ckpt[slot, j, x, k]
                        pmin[parity, j, x] = ckpt_min[slot, j, x]
        for t in prange(lanes):
            start_cycles = cycle_counter()
            if st[_COLS] >= 0:
                _row_columns(st[_COLS], st[_FROM], st[_FRESH] == 1, bounds[t], bounds[t + 1],
                             st[_MODE], source, penalties, gray, ndir, crow, work,
                             dp + parity * half, dp + (1 - parity) * half, pmin, parity,
                             1 - parity, part, fwd, st[_FWD_ROW], ckpt, ckpt_min, st[_SAVE],
                             packing)
            if t == 0 and st[_HORIZ] >= 0:
                _row_horizontal(st[_HORIZ], gray, p1, p2, g_scale, crow, part, hbuf, fwd,
                                st[_HORIZ_OUT], cost_bits)
            if t == right_lane and st[_SELECT] >= 0:
                _select_row(st[_SELECT], final, d_min, n_disp, best_k, c_best, c_second,
                            c_minus, c_plus)
                _right_winners(st[_SELECT], final, d_min, n_disp, rmin, rarg, best_right)
            busy[t] = cycle_counter() - start_cycles
        if st[_COLS] >= 0 and lanes > 1:
            # Element by element: a slice assigned from an array compiles numba's
            # shape-mismatch message formatting, seconds of a cold start.
            for t in range(lanes):
                spent[phase, t] += busy[t]
            measured[phase] += 1
            if measured[phase] == REBALANCE_STEPS:
                _rebalance(edges[phase], spent[phase], W)
                spent[phase] = 0
                measured[phase] = 0
    return best_k, c_best, c_second, c_minus, c_plus, best_right


@njit(cache=True, parallel=prange_only())
def census_unary(cl, crev, labels, d_min, invalid):
    """Census cost of each pixel at its label (the unary term of the energy).

    ``cl`` and ``crev`` are the census planes :func:`sgm_solve` takes.
    """
    planes, H, wide = crev.shape
    W = labels.shape[1]
    left_pad = max(0, -d_min)
    out = np.empty((H, W), np.float32)
    for y in prange(H):
        for x in range(W):
            xr = x - (d_min + labels[y, x])
            if 0 <= xr < W:
                j = left_pad + W - 1 - xr
                c = 0
                for p in range(planes):
                    c += _popcount64(np.uint64(cl[p, y, x] ^ crev[p, y, j]))
                out[y, x] = c
            else:
                out[y, x] = invalid
    return out
