"""numba kernels of belief propagation (the method is described in :mod:`.bp`).

The coarsest level holds every hypothesis: ``nv`` vectors of ``LANES`` labels
per pixel. Every finer level holds two *windows* per pixel, each one vector of
``LANES`` consecutive labels from a 16-aligned offset. Arrays of a windowed
level, with ``R`` rows (all rows, or a ring of rows for the streamed finest
level):

* ``data`` (R, W, 2, LANES) uint16: matching costs at the windows' labels,
  scaled by ``2**e`` (see :func:`_scaled`); padded hypotheses hold ``PAD``;
* ``msg`` (R, 4, W, 2, LANES) uint8: the message into each pixel from its
  neighbour above, below, left and right (``FROM_*``), at the receiver's labels,
  normalised so that the sender's smallest ``h`` maps to 0; at most ``cap``;
* ``off`` (R, W, 2) int32: the windows' first labels; ``lab`` (R, W) int32:
  the winner at the pixel's last send (for the changed share).

The full level uses the same layout with ``nv`` vectors in place of the two
windows and no offsets. Integer arithmetic is on 16-bit vector lanes
(:mod:`._simd`); no sum can overflow because data stay below ``PAD`` and
messages below 256.
"""

from __future__ import annotations

import numpy as np
from numba import njit, prange

from stereomesh._parallel import prange_only
from stereomesh.matching._kernels import _popcount64, _valid_range
from stereomesh.matching._simd import (
    LANES,
    vadd,
    vadds,
    vfill_outside,
    vget,
    vhamming,
    vhmin,
    vlane_index,
    vload,
    vmin,
    vmul,
    vselect_between,
    vselect_equal,
    vshift_in_high,
    vshift_in_high2,
    vshift_in_high4,
    vshift_in_high8,
    vshift_in_high16,
    vshift_in_low,
    vshift_in_low2,
    vshift_in_low4,
    vshift_in_low8,
    vshift_in_low16,
    vshl,
    vshr,
    vsplat,
    vstore,
    vsub,
)

INF16 = 0xFFFF
PAD = 0xC000
"""Data cost of the hypotheses that only fill the last vector (never a minimum)."""
CENSUS_PAD = LANES
"""Columns of padding on both sides of the reversed right census rows."""
FROM_UP, FROM_DOWN, FROM_LEFT, FROM_RIGHT = 0, 1, 2, 3
POTTS, TRUNCATED_LINEAR = 0, 1


# ---------------------------------------------------------------------------
# Messages on one vector


@njit(cache=True, inline="always")
def _scan_forward(f, steps, w):
    """``min(f(i), f(i - j) + w·j)`` for ``0 < j < 2**steps`` (log-step scan)."""
    inf = vsplat(np.uint16(INF16))
    if steps >= 1:
        f = vmin(f, vadds(vshift_in_low(inf, f), vsplat(np.uint16(w))))
    if steps >= 2:
        f = vmin(f, vadds(vshift_in_low2(inf, f), vsplat(np.uint16(2 * w))))
    if steps >= 3:
        f = vmin(f, vadds(vshift_in_low4(inf, f), vsplat(np.uint16(4 * w))))
    if steps >= 4:
        f = vmin(f, vadds(vshift_in_low8(inf, f), vsplat(np.uint16(8 * w))))
    if steps >= 5:
        f = vmin(f, vadds(vshift_in_low16(inf, f), vsplat(np.uint16(16 * w))))
    return f


@njit(cache=True, inline="always")
def _scan_backward(f, steps, w):
    """``min(f(i), f(i + j) + w·j)`` for ``0 < j < 2**steps``."""
    inf = vsplat(np.uint16(INF16))
    if steps >= 1:
        f = vmin(f, vadds(vshift_in_high(f, inf), vsplat(np.uint16(w))))
    if steps >= 2:
        f = vmin(f, vadds(vshift_in_high2(f, inf), vsplat(np.uint16(2 * w))))
    if steps >= 3:
        f = vmin(f, vadds(vshift_in_high4(f, inf), vsplat(np.uint16(4 * w))))
    if steps >= 4:
        f = vmin(f, vadds(vshift_in_high8(f, inf), vsplat(np.uint16(8 * w))))
    if steps >= 5:
        f = vmin(f, vadds(vshift_in_high16(f, inf), vsplat(np.uint16(16 * w))))
    return f


@njit(cache=True, inline="always")
def _clamp16(v):
    return np.uint16(min(max(v, 0), INF16))


@njit(cache=True, inline="always")
def _rewindow(f, delta, w):
    """``f`` read at lanes ``i + delta``; outside the vector it grows by ``w`` per label.

    That is the lower envelope of a truncated-linear (or Potts) message at labels
    beyond the sender's window: the edge value plus ``w`` per step. ``delta`` is a
    multiple of 16.
    """
    if delta == 0:
        return f
    if delta == 16:
        ramp = vmul(vlane_index(1), vsplat(np.uint16(w)))
        return vshift_in_high16(f, vadds(vsplat(vget(f, LANES - 1)), ramp))
    if delta == -16:
        ramp = vmul(vsub(vsplat(np.uint16(LANES)), vlane_index(0)), vsplat(np.uint16(w)))
        return vshift_in_low16(vadds(vsplat(vget(f, 0)), ramp), f)
    if delta > 0:
        ramp = vmul(vlane_index(1), vsplat(np.uint16(w)))
        base = np.int64(vget(f, LANES - 1)) + w * (delta - LANES)
        return vadds(vsplat(_clamp16(base)), ramp)
    ramp = vmul(vsub(vsplat(np.uint16(LANES)), vlane_index(0)), vsplat(np.uint16(w)))
    base = np.int64(vget(f, 0)) + w * (-delta - LANES)
    return vadds(vsplat(_clamp16(base)), ramp)


@njit(cache=True, inline="always")
def _envelope(h, kind, steps, w):
    """``min_j h(j) + w·|j − i|`` over the vector (before the truncation), or ``h`` for Potts.

    Two log-step scans; ``steps`` covers every distance below the truncation.
    """
    if kind == TRUNCATED_LINEAR:
        return _scan_backward(_scan_forward(h, steps, w), steps, w)
    return h


@njit(cache=True, inline="always")
def _truncate(f, hm, cap):
    """The message from a lower envelope ``f``: capped at ``hm + cap``, ``hm`` subtracted."""
    return vsub(vmin(f, vsplat(_clamp16(hm + cap))), vsplat(np.uint16(hm)))


@njit(cache=True, inline="always")
def _message(h, delta, kind, steps, w, cap):
    """Message ``min_j h(j) + V(j, i)`` at the receiver's lanes ``i`` (offset ``delta``).

    ``V`` is ``min(w·|j − i|, cap)`` (truncated linear) or ``cap·[j ≠ i]`` (Potts,
    ``w == cap``): a distance transform by two log-step scans, capped at
    ``min(h) + cap``, then ``min(h)`` subtracted.
    """
    hm = np.int64(vhmin(h))
    return _truncate(_rewindow(_envelope(h, kind, steps, w), delta, w), hm, cap)


@njit(cache=True, parallel=prange_only())
def messages(h, delta, kind, steps, w, cap):
    """:func:`_message` of each row of ``h`` ((N, LANES) uint16), as (N, LANES) uint8.

    For the exact checks of the tests.
    """
    n = h.shape[0]
    out = np.empty((n, LANES), np.uint8)
    for i in prange(n):
        vstore(out, i * LANES, _message(vload(h, i * LANES), np.int64(delta[i]), kind, steps,
                                        w, cap))
    return out


# ---------------------------------------------------------------------------
# Data costs


@njit(cache=True, parallel=prange_only())
def census_at_labels(cl, cr, labels, d_min, invalid):
    """Census cost of each pixel at its label (``invalid`` where the match leaves the image)."""
    h, w = labels.shape
    out = np.empty((h, w), np.float32)
    for y in prange(h):
        for x in range(w):
            xr = x - (d_min + labels[y, x])
            if 0 <= xr < w:
                out[y, x] = _popcount64(cl[y, x] ^ cr[y, xr])
            else:
                out[y, x] = invalid
    return out


@njit(cache=True, inline="always")
def _scaled(acc, net, n_real):
    """Block sums ``acc`` times ``2**net`` (rounded), hypotheses from ``n_real`` on set to PAD."""
    if net >= 0:
        v = vshl(acc, net)
    else:
        v = vshr(vadd(acc, vsplat(np.uint16(1 << (-net - 1)))), -net)
    return vfill_outside(v, 0, n_real, PAD)


@njit(cache=True)
def _row_costs(src, l, e, y, x0, x1, offs, full, out, row_base, tmp):
    """Scaled data of the level-``l`` pixels ``(y, x0 .. x1 - 1)``, all windows.

    Each pixel sums the costs of its ``2**l × 2**l`` block of full-resolution
    pixels (clipped at the image border). ``offs[x, j]`` is window ``j``'s first
    label (with ``full``, window ``j`` starts at ``j·LANES``, as many as ``out``
    holds per pixel); the vectors go to ``out.flat[row_base + (x·n + j)·LANES]``.
    Census costs come from the strings (``src`` is ``(cl, crev, vol,
    use_volume, d_min, n_disp, invalid)``, ``crev`` the right strings as
    reversed 16-bit planes from ``_kernels.census_planes``); hypotheses whose
    right pixel falls outside the image cost ``invalid``. With ``use_volume``
    they come from the uint16 volume. One call per row: array arguments inside
    a per-pixel loop would cost a reference-count update per call.
    """
    cl, crev, vol, use_volume, d_min, n_disp, invalid = src
    H0, W0 = cl.shape
    n_planes = crev.shape[0]
    row_len = crev.shape[2]
    nwin = out.shape[-1] // LANES if full else 2
    y0 = y << l
    y1 = min(H0, (y + 1) << l)
    inv = vsplat(np.uint16(invalid))
    net = e - l
    for x in range(x0, x1):
        fx0 = x << l
        fx1 = min(W0, (x + 1) << l)
        for j in range(nwin):
            o = j * LANES if full else np.int64(offs[x, j])
            acc = vsplat(np.uint16(0))
            for fy in range(y0, y1):
                for fx in range(fx0, fx1):
                    if use_volume:
                        base = (fy * W0 + fx) * n_disp + o
                        if o + LANES <= n_disp:
                            v = vload(vol, base)
                        else:
                            for i in range(LANES):
                                tmp[i] = vol.flat[base + i] if o + i < n_disp else 0
                            v = vload(tmp, 0)
                    else:
                        k_lo, k_hi = _valid_range(fx, W0, d_min, n_disp)
                        lo = k_lo - o
                        hi = k_hi - o
                        if hi <= 0 or lo >= LANES or hi <= lo:
                            v = inv
                        else:
                            # Lanes past the valid ones read at most LANES - 1 padding columns.
                            rb = fy * row_len + CENSUS_PAD + W0 - 1 - fx + d_min + o
                            c = cl[fy, fx]
                            v = vhamming(crev, rb, np.uint16(c & np.uint64(0xFFFF)))
                            for p in range(1, n_planes):
                                bits = np.uint16((c >> np.uint64(16 * p)) & np.uint64(0xFFFF))
                                v = vadd(v, vhamming(crev, p * H0 * row_len + rb, bits))
                            v = vfill_outside(v, lo, hi, invalid)
                    acc = vadd(acc, v)
            vstore(out, row_base + (x * nwin + j) * LANES, _scaled(acc, net, n_disp - o))


@njit(cache=True, parallel=prange_only())
def fill_full_level_data(src, l, e, hl, wl, nv, data):
    """:func:`full_level_data` into ``data`` (for reused memory)."""
    offs = np.zeros((1, 2), np.int32)
    for y in prange(hl):
        tmp = np.empty(LANES, np.uint16)
        _row_costs(src, l, e, y, 0, wl, offs, True, data, y * wl * nv * LANES, tmp)


@njit(cache=True)
def full_level_data(src, l, e, hl, wl, nv):
    """Scaled data of every hypothesis at level ``l``: (hl, wl, nv·LANES) uint16."""
    data = np.empty((hl, wl, nv * LANES), np.uint16)
    fill_full_level_data(src, l, e, hl, wl, nv, data)
    return data


# ---------------------------------------------------------------------------
# Windowed levels: initialisation from the parent, one half-iteration of a row


@njit(cache=True, inline="always")
def _window(b, dp):
    """The 16-aligned window with label ``b`` at least 8 labels from both ends."""
    return min(max(16 * ((b - 8) // 16), 0), dp - LANES)


@njit(cache=True)
def _init_row(y, s0, x0, x1, hl, wl, src, l, e, dp, parent, pw, data, off, msg, lab, tmp):
    """Windows, data and first messages of row ``y`` (ring slot ``s0``), columns ``[x0, x1)``.

    ``parent`` is ``(plab, poff, pmsg, pfull, pw_w)`` of the level above (winners,
    window offsets, messages as (H, 4, W, vectors, LANES), whether it holds every
    label, its weight per label). Window A is the one around the parent's winner; window B the one
    around the winner of the adjacent parent (beside, above or below the
    child's quarter, or diagonal) farthest from it, which gives pixels at a
    depth edge both depths. Both labels are clamped to the hypotheses valid
    somewhere in the block. The messages start as the parent's (their lower
    envelope over the parent's windows at the child's labels), doubled
    because a parent's pairwise term is half its child's, and capped.
    """
    plab, poff, pmsg, pfull, pw_w = parent
    cap = pw[3]
    cl, crev, vol, use_volume, d_min, n_disp, invalid = src
    W0 = cl.shape[1]
    hp, wp = plab.shape
    py = y >> 1
    ny = min(max(py + (1 if y & 1 else -1), 0), hp - 1)
    capv = vsplat(np.uint16(cap))
    zero = vsplat(np.uint16(0))
    pvp = pmsg.shape[3] * LANES
    for x in range(x0, x1):
        px = x >> 1
        nx = min(max(px + (1 if x & 1 else -1), 0), wp - 1)
        a = np.int64(plab[py, px])
        b = a
        far = 0
        for c in (np.int64(plab[ny, px]), np.int64(plab[py, nx]), np.int64(plab[ny, nx])):
            if abs(c - a) > far:
                far = abs(c - a)
                b = c
        if not use_volume:
            k_lo = _valid_range(x << l, W0, d_min, n_disp)[0]
            k_hi = _valid_range(min(W0, (x + 1) << l) - 1, W0, d_min, n_disp)[1]
            if k_hi > k_lo:
                a = min(max(a, k_lo), k_hi - 1)
                b = min(max(b, k_lo), k_hi - 1)
        lab[s0, x] = -1
        off[s0, x, 0] = _window(a, dp)
        off[s0, x, 1] = _window(b, dp)
    _row_costs(src, l, e, y, x0, x1, off[s0], False, data, s0 * wl * 2 * LANES, tmp)
    for x in range(x0, x1):
        px = x >> 1
        for win in range(2):
            o = np.int64(off[s0, x, win])
            for d in range(4):
                pb = ((py * 4 + d) * wp + px) * pvp
                if pfull:
                    m = vload(pmsg, pb + o)
                else:
                    m = vmin(_rewindow(vload(pmsg, pb), o - np.int64(poff[py, px, 0]), pw_w),
                             _rewindow(vload(pmsg, pb + LANES), o - np.int64(poff[py, px, 1]),
                                       pw_w))
                m = vmin(vadds(m, m), capv)
                outside = ((d == FROM_UP and y == 0) or (d == FROM_DOWN and y == hl - 1)
                           or (d == FROM_LEFT and x == 0) or (d == FROM_RIGHT and x == wl - 1))
                vstore(msg, (((s0 * 4 + d) * wl + x) * 2 + win) * LANES, zero if outside else m)


@njit(cache=True, inline="always")
def _best_of_two(ta, tb, oa, ob):
    """Smallest belief over both windows and its label (smallest label on ties)."""
    lanes = vlane_index(0)
    inf = vsplat(np.uint16(INF16))
    va = np.int64(vhmin(ta))
    vb = np.int64(vhmin(tb))
    ka = oa + np.int64(vhmin(vselect_equal(ta, vsplat(np.uint16(va)), lanes, inf)))
    kb = ob + np.int64(vhmin(vselect_equal(tb, vsplat(np.uint16(vb)), lanes, inf)))
    if vb < va or (vb == va and kb < ka):
        return vb, kb
    return va, ka


@njit(cache=True, inline="always")
def _send(ta, tb, ma, mb, oa, ob, qa, qb, kind, steps, w, cap):
    """Message to a neighbour with windows at ``qa``, ``qb``, from beliefs ``ta``, ``tb``
    less that neighbour's own message ``ma``, ``mb``: the lower envelope over both
    of the sender's windows, read at each of the receiver's."""
    ha = vsub(ta, ma)
    hb = vsub(tb, mb)
    hm = min(np.int64(vhmin(ha)), np.int64(vhmin(hb)))
    fa = _envelope(ha, kind, steps, w)
    fb = _envelope(hb, kind, steps, w)
    out_a = _truncate(vmin(_rewindow(fa, qa - oa, w), _rewindow(fb, qa - ob, w)), hm, cap)
    out_b = _truncate(vmin(_rewindow(fa, qb - oa, w), _rewindow(fb, qb - ob, w)), hm, cap)
    return out_a, out_b


@njit(cache=True)
def _half_row(y, colour, x0, x1, hl, wl, sm, s0, sp, data, off, msg, lab, pw, track):
    """Pixels of row ``y`` with ``(x + y) % 2 == colour`` in ``[x0, x1)`` send their messages.

    Rows ``y - 1, y, y + 1`` are in ring slots ``sm, s0, sp``. Senders of one
    colour write only into pixels of the other colour, so any split of the
    columns runs in parallel. ``track`` 1 records each sender's current winner
    in ``lab``; 2 also counts the senders whose winner changed (returned).
    """
    kind, steps, w, cap = pw
    changed = 0
    plane = wl * 2 * LANES
    for x in range(x0 + ((x0 + y + colour) & 1), x1, 2):
        oa = np.int64(off[s0, x, 0])
        ob = np.int64(off[s0, x, 1])
        mb_ = (s0 * 4 * wl + x) * 2 * LANES
        db = (s0 * wl + x) * 2 * LANES
        ua = vload(msg, mb_)
        ub = vload(msg, mb_ + LANES)
        da = vload(msg, mb_ + plane)
        dbv = vload(msg, mb_ + plane + LANES)
        la = vload(msg, mb_ + 2 * plane)
        lb = vload(msg, mb_ + 2 * plane + LANES)
        ra = vload(msg, mb_ + 3 * plane)
        rb = vload(msg, mb_ + 3 * plane + LANES)
        ta = vadd(vadd(vload(data, db), vadd(ua, da)), vadd(la, ra))
        tb = vadd(vadd(vload(data, db + LANES), vadd(ub, dbv)), vadd(lb, rb))
        if track > 0:
            k = _best_of_two(ta, tb, oa, ob)[1]
            if track == 2 and lab[s0, x] != k:
                changed += 1
            lab[s0, x] = k
        if y > 0:
            qa, qb = np.int64(off[sm, x, 0]), np.int64(off[sm, x, 1])
            na, nb = _send(ta, tb, ua, ub, oa, ob, qa, qb, kind, steps, w, cap)
            t = (((sm * 4 + FROM_DOWN) * wl + x) * 2) * LANES
            vstore(msg, t, na)
            vstore(msg, t + LANES, nb)
        if y + 1 < hl:
            qa, qb = np.int64(off[sp, x, 0]), np.int64(off[sp, x, 1])
            na, nb = _send(ta, tb, da, dbv, oa, ob, qa, qb, kind, steps, w, cap)
            t = (((sp * 4 + FROM_UP) * wl + x) * 2) * LANES
            vstore(msg, t, na)
            vstore(msg, t + LANES, nb)
        if x > 0:
            qa, qb = np.int64(off[s0, x - 1, 0]), np.int64(off[s0, x - 1, 1])
            na, nb = _send(ta, tb, la, lb, oa, ob, qa, qb, kind, steps, w, cap)
            t = (((s0 * 4 + FROM_RIGHT) * wl + x - 1) * 2) * LANES
            vstore(msg, t, na)
            vstore(msg, t + LANES, nb)
        if x + 1 < wl:
            qa, qb = np.int64(off[s0, x + 1, 0]), np.int64(off[s0, x + 1, 1])
            na, nb = _send(ta, tb, ra, rb, oa, ob, qa, qb, kind, steps, w, cap)
            t = (((s0 * 4 + FROM_LEFT) * wl + x + 1) * 2) * LANES
            vstore(msg, t, na)
            vstore(msg, t + LANES, nb)
    return changed


@njit(cache=True, parallel=prange_only())
def fill_level(src, l, e, hl, wl, dp, parent, pw, data, off, msg, lab):
    """:func:`init_level` into the given arrays (for reused memory)."""
    for y in prange(hl):
        tmp = np.empty(LANES, np.uint16)
        _init_row(y, y, 0, wl, hl, wl, src, l, e, dp, parent, pw, data, off, msg, lab, tmp)


@njit(cache=True)
def init_level(src, l, e, hl, wl, dp, parent, pw):
    """Windows, data and first messages of a whole windowed level."""
    data = np.empty((hl, wl, 2, LANES), np.uint16)
    off = np.empty((hl, wl, 2), np.int32)
    msg = np.empty((hl, 4, wl, 2, LANES), np.uint8)
    lab = np.empty((hl, wl), np.int32)
    fill_level(src, l, e, hl, wl, dp, parent, pw, data, off, msg, lab)
    return data, off, msg, lab


@njit(cache=True, parallel=prange_only())
def _sweep(data, off, msg, lab, pw, colour, track, counts):
    hl, wl = lab.shape
    for y in prange(hl):
        counts[y] = _half_row(y, colour, 0, wl, hl, wl, max(y - 1, 0), y, min(y + 1, hl - 1),
                              data, off, msg, lab, pw, track)


def iterate_level(data, off, msg, lab, pw, iterations, tolerance):
    """Checkerboard iterations of a windowed level held in memory, in place.

    Stops early once the share of pixels whose winner changed between two
    iterations falls below ``tolerance``. Returns ``(iterations run, last share)``.
    """
    counts = np.zeros(lab.shape[0], np.int64)
    changed = 1.0
    run = 0
    for it in range(iterations):
        track = 2 if it > 0 else 1
        n = 0
        for colour in (0, 1):
            _sweep(data, off, msg, lab, pw, colour, track, counts)
            n += int(counts.sum())
        run = it + 1
        if it > 0:
            changed = n / lab.size
            if changed < tolerance:
                break
    return run, changed


# ---------------------------------------------------------------------------
# The coarsest level: every hypothesis, nv vectors per pixel


@njit(cache=True)
def _half_row_wide(y, colour, hl, wl, nv, data, msg, lab, pw, track, buf):
    """:func:`_half_row` for a level holding every hypothesis (offsets 0, ``nv`` vectors).

    The distance transform runs across the vectors with a carry: the forward
    value at the last lane of a vector bounds the next vector's lanes by
    ``carry + w·(i + 1)`` (and backwards likewise).
    """
    kind, steps, w, cap = pw
    vp = nv * LANES
    plane = wl * vp
    changed = 0
    lanes = vlane_index(0)
    inf = vsplat(np.uint16(INF16))
    ramp_up = vmul(vlane_index(1), vsplat(np.uint16(w)))
    ramp_down = vmul(vsub(vsplat(np.uint16(LANES)), lanes), vsplat(np.uint16(w)))
    for x in range(((y + colour) & 1), wl, 2):
        mb = (y * 4 * wl + x) * vp
        db = (y * wl + x) * vp
        bv = INF16
        bk = 0
        for b in range(nv):
            o = b * LANES
            t = vadd(vload(data, db + o), vadd(vload(msg, mb + o), vload(msg, mb + plane + o)))
            t = vadd(t, vadd(vload(msg, mb + 2 * plane + o), vload(msg, mb + 3 * plane + o)))
            vstore(buf, o, t)
            if track > 0:
                m = np.int64(vhmin(t))
                if m < bv:
                    bv = m
                    bk = o + np.int64(vhmin(vselect_equal(t, vsplat(np.uint16(m)), lanes, inf)))
        if track > 0:
            if track == 2 and lab[y, x] != bk:
                changed += 1
            lab[y, x] = bk
        for d in range(4):
            if d == FROM_UP:
                if y == 0:
                    continue
                dst = ((y - 1) * 4 + FROM_DOWN) * wl + x
            elif d == FROM_DOWN:
                if y + 1 >= hl:
                    continue
                dst = ((y + 1) * 4 + FROM_UP) * wl + x
            elif d == FROM_LEFT:
                if x == 0:
                    continue
                dst = (y * 4 + FROM_RIGHT) * wl + x - 1
            else:
                if x + 1 >= wl:
                    continue
                dst = (y * 4 + FROM_LEFT) * wl + x + 1
            hm = INF16
            carry = INF16
            for b in range(nv):
                o = b * LANES
                h = vsub(vload(buf, o), vload(msg, mb + d * plane + o))
                hm = min(hm, np.int64(vhmin(h)))
                if kind == TRUNCATED_LINEAR:
                    h = vmin(_scan_forward(h, steps, w),
                             vadds(vsplat(np.uint16(carry)), ramp_up))
                    carry = np.int64(vget(h, LANES - 1))
                vstore(buf, vp + o, h)
            capv = vsplat(_clamp16(hm + cap))
            hmv = vsplat(np.uint16(hm))
            carry = INF16
            for b in range(nv - 1, -1, -1):
                o = b * LANES
                f = vload(buf, vp + o)
                if kind == TRUNCATED_LINEAR:
                    f = vmin(_scan_backward(f, steps, w),
                             vadds(vsplat(np.uint16(carry)), ramp_down))
                    carry = np.int64(vget(f, 0))
                vstore(msg, dst * vp + o, vsub(vmin(f, capv), hmv))
    return changed


@njit(cache=True, parallel=prange_only())
def _sweep_wide(data, msg, lab, pw, colour, track, counts):
    hl, wl = lab.shape
    nv = data.shape[2] // LANES
    for y in prange(hl):
        buf = np.empty(2 * nv * LANES, np.uint16)
        counts[y] = _half_row_wide(y, colour, hl, wl, nv, data, msg, lab, pw, track, buf)


def iterate_full_level(data, msg, lab, pw, iterations, tolerance):
    """:func:`iterate_level` for a level holding every hypothesis."""
    counts = np.zeros(lab.shape[0], np.int64)
    changed = 1.0
    run = 0
    for it in range(iterations):
        track = 2 if it > 0 else 1
        n = 0
        for colour in (0, 1):
            _sweep_wide(data, msg, lab, pw, colour, track, counts)
            n += int(counts.sum())
        run = it + 1
        if it > 0:
            changed = n / lab.size
            if changed < tolerance:
                break
    return run, changed


# ---------------------------------------------------------------------------
# Beliefs and winners


@njit(cache=True, parallel=prange_only())
def full_level_labels(data, msg):
    """Winner (smallest belief, smallest label on ties) of every pixel of the full level."""
    hl, _, wl, vp = msg.shape
    nv = vp // LANES
    plane = wl * vp
    out = np.empty((hl, wl), np.int32)
    lanes = vlane_index(0)
    inf = vsplat(np.uint16(INF16))
    for y in prange(hl):
        for x in range(wl):
            mb = (y * 4 * wl + x) * vp
            db = (y * wl + x) * vp
            bv = INF16
            bk = 0
            for b in range(nv):
                o = b * LANES
                t = vadd(vload(data, db + o), vadd(vload(msg, mb + o), vload(msg, mb + plane + o)))
                t = vadd(t, vadd(vload(msg, mb + 2 * plane + o), vload(msg, mb + 3 * plane + o)))
                m = np.int64(vhmin(t))
                if m < bv:
                    bv = m
                    bk = o + np.int64(vhmin(vselect_equal(t, vsplat(np.uint16(m)), lanes, inf)))
            out[y, x] = bk
    return out


@njit(cache=True, parallel=prange_only())
def level_labels(data, off, msg):
    """Winner (smallest belief over both windows, smallest label on ties) of every pixel."""
    hl, wl = off.shape[:2]
    plane = wl * 2 * LANES
    out = np.empty((hl, wl), np.int32)
    for y in prange(hl):
        for x in range(wl):
            mb = (y * 4 * wl + x) * 2 * LANES
            db = (y * wl + x) * 2 * LANES
            ta = vadd(vadd(vload(data, db), vadd(vload(msg, mb), vload(msg, mb + plane))),
                      vadd(vload(msg, mb + 2 * plane), vload(msg, mb + 3 * plane)))
            mb += LANES
            tb = vadd(vadd(vload(data, db + LANES), vadd(vload(msg, mb), vload(msg, mb + plane))),
                      vadd(vload(msg, mb + 2 * plane), vload(msg, mb + 3 * plane)))
            out[y, x] = _best_of_two(ta, tb, np.int64(off[y, x, 0]), np.int64(off[y, x, 1]))[1]
    return out


@njit(cache=True, parallel=prange_only())
def dense_beliefs(data, off, msg, n_labels, scale):
    """Beliefs ``(H, W, n_labels)`` float32 times ``scale``; inf outside both windows."""
    hl, wl = off.shape[:2]
    out = np.full((hl, wl, n_labels), np.inf, np.float32)
    for y in prange(hl):
        for x in range(wl):
            for win in range(2):
                o = off[y, x, win]
                db = ((y * wl + x) * 2 + win) * LANES
                for i in range(LANES):
                    k = o + i
                    if k < n_labels:
                        t = np.int64(data.flat[db + i])
                        for d in range(4):
                            t += msg[y, d, x, win, i]
                        out[y, x, k] = t * scale
    return out


@njit(cache=True, parallel=prange_only())
def full_dense_beliefs(data, msg, n_labels, scale):
    """:func:`dense_beliefs` of the full level."""
    hl, _, wl, vp = msg.shape
    out = np.empty((hl, wl, n_labels), np.float32)
    for y in prange(hl):
        for x in range(wl):
            for k in range(n_labels):
                t = np.int64(data[y, x, k])
                for d in range(4):
                    t += msg[y, d, x, k]
                out[y, x, k] = t * scale
    return out


@njit(cache=True, inline="always")
def _belief_of(ta, tb, oa, ob, k, lo, hi, fallback):
    """Belief of label ``k`` if a window holds it and it is in ``[lo, hi)``, else ``fallback``."""
    if k < lo or k >= hi:
        return fallback
    if oa <= k < oa + LANES:
        return np.int64(vget(ta, k - oa))
    if ob <= k < ob + LANES:
        return np.int64(vget(tb, k - ob))
    return fallback


@njit(cache=True)
def _final_row(y, s0, x0, x1, wl, d_min, n_disp, use_volume, data, off, msg, winners, scale,
               offset, winners_only):
    """Left winners of row ``y`` into ``winners`` = ``(best_k, c_best, c_second, c_minus,
    c_plus)``.

    The rules of :func:`stereomesh.matching._kernels.select_left` over the labels
    both windows hold (others count as infinitely costly; a neighbour of the
    winner that no window holds reads as the winner's belief). Beliefs are
    reported relative to the winner's: ``offset + (b − b_best) · scale``. With
    ``winners_only`` only ``best_k`` is written.
    """
    best_k, c_best, c_second, c_minus, c_plus = winners
    inf = vsplat(np.uint16(INF16))
    plane = wl * 2 * LANES
    for x in range(x0, x1):
        oa = np.int64(off[s0, x, 0])
        ob = np.int64(off[s0, x, 1])
        mb = (s0 * 4 * wl + x) * 2 * LANES
        db = (s0 * wl + x) * 2 * LANES
        ta = vadd(vadd(vload(data, db), vadd(vload(msg, mb), vload(msg, mb + plane))),
                  vadd(vload(msg, mb + 2 * plane), vload(msg, mb + 3 * plane)))
        mb += LANES
        tb = vadd(vadd(vload(data, db + LANES), vadd(vload(msg, mb), vload(msg, mb + plane))),
                  vadd(vload(msg, mb + 2 * plane), vload(msg, mb + 3 * plane)))
        if use_volume:
            k_lo, k_hi = 0, n_disp
        else:
            k_lo, k_hi = _valid_range(x, wl, d_min, n_disp)
        va = vfill_outside(ta, k_lo - oa, k_hi - oa, INF16)
        vb = vfill_outside(tb, k_lo - ob, k_hi - ob, INF16)
        bv, k = _best_of_two(va, vb, oa, ob)
        if winners_only:
            best_k[y, x] = -1 if bv == INF16 else k
            continue
        if bv == INF16:
            best_k[y, x] = -1
            c_best[y, x] = 0.0
            c_second[y, x] = 0.0
            c_minus[y, x] = 0.0
            c_plus[y, x] = 0.0
            continue
        second = min(
            np.int64(vhmin(vselect_between(vlane_index(oa), k - 1, k + 2, inf, va))),
            np.int64(vhmin(vselect_between(vlane_index(ob), k - 1, k + 2, inf, vb))))
        best_k[y, x] = k
        c_best[y, x] = offset
        c_second[y, x] = np.inf if second == INF16 else offset + (second - bv) * scale
        c_minus[y, x] = offset + (_belief_of(ta, tb, oa, ob, k - 1, k_lo, k_hi, bv) - bv) * scale
        c_plus[y, x] = offset + (_belief_of(ta, tb, oa, ob, k + 1, k_lo, k_hi, bv) - bv) * scale


# ---------------------------------------------------------------------------
# The finest level, streamed


@njit(cache=True, parallel=prange_only())
def stream_finest(src, e, dp, parent, pw, iterations, bounds, offset, winners_only=False):
    """Checkerboard belief propagation on the finest level in a ring of rows.

    Half-iteration ``h`` (colour ``h % 2``) of row ``y`` runs at step
    ``y + h + 1``, after row ``y`` entered the ring (step ``y``) and before it
    leaves (step ``y + 2·iterations + 1``, when its winners are picked). This
    order gives every message exactly the inputs of the plain schedule (all
    rows, one colour after the other), so the result is that schedule's, in
    ``2·iterations + 2`` rows of memory. Each step splits the columns into the
    lanes of ``bounds``.

    Returns ``best_k, c_best, c_second, c_minus, c_plus`` (see
    :func:`_final_row`; with ``winners_only`` only ``best_k`` is filled) and,
    per lane and colour, how many senders changed winner in the last
    iteration.
    """
    cl = src[0]
    use_volume = src[3]
    d_min = src[4]
    n_disp = src[5]
    hl, wl = cl.shape
    lanes = bounds.shape[0] - 1
    ring = 2 * iterations + 2
    data = np.empty((ring, wl, 2, LANES), np.uint16)
    off = np.empty((ring, wl, 2), np.int32)
    msg = np.empty((ring, 4, wl, 2, LANES), np.uint8)
    lab = np.empty((ring, wl), np.int32)
    best_k = np.empty((hl, wl), np.int32)
    c_best = np.empty((hl, wl), np.float32)
    c_second = np.empty((hl, wl), np.float32)
    c_minus = np.empty((hl, wl), np.float32)
    c_plus = np.empty((hl, wl), np.float32)
    counts = np.zeros((lanes, 2), np.int64)
    winners = (best_k, c_best, c_second, c_minus, c_plus)
    scale = 1.0 / (1 << e) if e >= 0 else float(1 << -e)
    n_half = 2 * iterations
    for t in range(hl + n_half + 1):
        for lane in prange(lanes):
            x0 = bounds[lane]
            x1 = bounds[lane + 1]
            if t < hl:
                tmp = np.empty(LANES, np.uint16)
                _init_row(t, t % ring, x0, x1, hl, wl, src, 0, e, dp, parent, pw, data, off,
                          msg, lab, tmp)
            for h in range(n_half):
                y = t - 1 - h
                if 0 <= y < hl:
                    # Winners at the sends of the last two iterations give the changed share.
                    track = 0
                    if h >= n_half - 4:
                        track = 2 if h >= n_half - 2 else 1
                    c = _half_row(y, h & 1, x0, x1, hl, wl, (y - 1) % ring, y % ring,
                                  (y + 1) % ring, data, off, msg, lab, pw, track)
                    if track == 2:
                        counts[lane, h & 1] += c
            yf = t - n_half - 1
            if 0 <= yf < hl:
                _final_row(yf, yf % ring, x0, x1, wl, d_min, n_disp, use_volume, data, off, msg,
                           winners, scale, offset, winners_only)
    return best_k, c_best, c_second, c_minus, c_plus, counts
