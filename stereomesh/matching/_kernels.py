"""numba kernels of the disparity engine.

Public, validated entry points live in the sibling modules; these functions
assume contiguous arrays of the documented dtypes and do no checking.

Layout: cost and aggregated volumes are ``(H, W, D)`` C-contiguous with the
disparity hypothesis innermost, so that every per-pixel update walks one
contiguous run of memory. Hypothesis ``k`` means disparity ``d_min + k``.
"""

from __future__ import annotations

import numpy as np
from numba import njit, prange

from stereomesh._parallel import prange_only

_BIG = np.int32(1 << 28)


@njit(cache=True, inline="always")
def _popcount64(v):
    # SWAR popcount; LLVM recognises the pattern and emits a popcnt instruction.
    v = v - ((v >> np.uint64(1)) & np.uint64(0x5555555555555555))
    v = (v & np.uint64(0x3333333333333333)) + ((v >> np.uint64(2)) & np.uint64(0x3333333333333333))
    v = (v + (v >> np.uint64(4))) & np.uint64(0x0F0F0F0F0F0F0F0F)
    return (v * np.uint64(0x0101010101010101)) >> np.uint64(56)


@njit(cache=True, inline="always")
def _valid_range(fx, width, d_min, n_disp):
    """Hypotheses of left column ``fx`` whose right pixel lies inside the image."""
    return max(0, fx - d_min - width + 1), min(n_disp, fx - d_min + 1)


# The four helpers below are single array expressions: NumPy runs them in a few
# milliseconds, while as parallel numba kernels they cost seconds of compiling
# on the first run after an install.
def luma(image, scale):
    """ITU-R BT.601 luma of an (H, W, 3) image times ``scale``, float32."""
    image = np.asarray(image)
    out = np.float32(0.299 * scale) * image[..., 0].astype(np.float32)
    out += np.float32(0.587 * scale) * image[..., 1].astype(np.float32)
    out += np.float32(0.114 * scale) * image[..., 2].astype(np.float32)
    return out


def edge_padded(image, pad_rows, pad_cols):
    """``image`` with its border rows and columns replicated ``pad_rows``/``pad_cols`` times."""
    return np.pad(image, ((pad_rows, pad_rows), (pad_cols, pad_cols)), mode="edge")


@njit(cache=True, parallel=prange_only())
def census_planes(strings, planes, pad_left, pad_right, reverse):
    """Census strings split into 16-bit planes, ``(planes, H, pad_left + W + pad_right)``.

    Plane ``p`` holds bits ``16 p .. 16 p + 15`` (uint16); with ``reverse`` each
    row is in reverse column order; zero columns pad both sides.
    """
    H, W = strings.shape
    out = np.zeros((planes, H, pad_left + W + pad_right), np.uint16)
    for y in prange(H):
        for x in range(W):
            s = strings[y, W - 1 - x if reverse else x]
            for p in range(planes):
                out[p, y, pad_left + x] = np.uint16((s >> np.uint64(16 * p)) & np.uint64(0xFFFF))
    return out


@njit(cache=True, inline="always")
def _census_row(padded, y, win_w, win_h, row):
    """Census strings of row ``y`` into ``row`` (zeroed), one neighbour offset at a time."""
    rw = win_w // 2
    rh = win_h // 2
    W = row.shape[0]
    one = np.uint64(1)
    zero = np.uint64(0)
    centre = padded[y + rh, rw : rw + W]
    for dy in range(-rh, rh + 1):
        for dx in range(-rw, rw + 1):
            if dy == 0 and dx == 0:
                continue
            src = padded[y + rh + dy, rw + dx : rw + dx + W]
            for x in range(W):
                row[x] = (row[x] << one) | (one if src[x] < centre[x] else zero)


@njit(cache=True, parallel=prange_only())
def census_transform(padded, win_w, win_h):
    """Census bit string per pixel: bit set where the neighbour is darker than the centre.

    ``padded`` is the grey image with ``win_h // 2`` rows and ``win_w // 2``
    columns of replicated border on each side. One neighbour offset at a time
    over a whole row, so that the comparisons vectorise across pixels.
    """
    H = padded.shape[0] - 2 * (win_h // 2)
    W = padded.shape[1] - 2 * (win_w // 2)
    out = np.zeros((H, W), np.uint64)
    for y in prange(H):
        _census_row(padded, y, win_w, win_h, out[y])
    return out


@njit(cache=True, parallel=prange_only())
def census_planes_of_image(padded, win_w, win_h, planes, pad_left, pad_right, reverse):
    """:func:`census_transform` written straight into 16-bit planes (see :func:`census_planes`).

    Each plane is built on its own in 16-bit lanes, four times as many per
    vector as the 64-bit strings: comparison ``j`` (in window order, centre
    skipped) is bit ``n - 1 - j`` of the ``n``-bit string.
    """
    H = padded.shape[0] - 2 * (win_h // 2)
    W = padded.shape[1] - 2 * (win_w // 2)
    rw = win_w // 2
    rh = win_h // 2
    n_bits = win_w * win_h - 1
    out = np.zeros((planes, H, pad_left + W + pad_right), np.uint16)
    one = np.uint16(1)
    zero = np.uint16(0)
    for y in prange(H):
        row = np.empty(W, np.uint16)
        centre = padded[y + rh, rw : rw + W]
        for p in range(planes):
            row[:] = 0
            # Comparisons whose bits fall in this plane, highest bit first.
            j_first = max(0, n_bits - 16 * (p + 1))
            j_last = n_bits - 1 - 16 * p
            j = 0
            for dy in range(-rh, rh + 1):
                for dx in range(-rw, rw + 1):
                    if dy == 0 and dx == 0:
                        continue
                    if j_first <= j <= j_last:
                        src = padded[y + rh + dy, rw + dx : rw + dx + W]
                        for x in range(W):
                            row[x] = (row[x] << one) | (one if src[x] < centre[x] else zero)
                    j += 1
            dst = out[p, y]
            if reverse:
                for x in range(W):
                    dst[pad_left + x] = row[W - 1 - x]
            else:
                for x in range(W):
                    dst[pad_left + x] = row[x]
    return out


@njit(cache=True, parallel=prange_only())
def census_cost_volume(census_left, census_right, d_min, n_disp, invalid_cost):
    """Hamming distance between left pixel x and right pixel x - d for each hypothesis."""
    H, W = census_left.shape
    cost = np.empty((H, W, n_disp), np.uint8)
    for y in prange(H):
        for x in range(W):
            cl = census_left[y, x]
            for k in range(n_disp):
                xr = x - (d_min + k)
                if xr < 0 or xr >= W:
                    cost[y, x, k] = invalid_cost
                else:
                    cost[y, x, k] = np.uint8(_popcount64(cl ^ census_right[y, xr]))
    return cost


@njit(cache=True, inline="always")
def _penalty2(p1, p2, g_scale, a, b):
    # P2 shrinks across intensity edges, where depth edges are likely.
    diff = abs(a - b)
    p = p2 / (1.0 + diff / g_scale) if g_scale > 0 else p2
    pi = np.int32(p)
    return pi if pi > p1 else np.int32(p1 + 1)


@njit(cache=True, inline="always")
def _path_step(c, prev, prev_min, out, p1, p2):
    # One semi-global matching recurrence step; returns min over d of the new costs.
    D = c.shape[0]
    base = prev_min + p2
    m = _BIG
    for k in range(D):
        v = prev[k]
        if k > 0:
            t = prev[k - 1] + p1
            if t < v:
                v = t
        if k < D - 1:
            t = prev[k + 1] + p1
            if t < v:
                v = t
        if base < v:
            v = base
        val = np.int32(c[k]) + v - prev_min
        out[k] = val
        if val < m:
            m = val
    return m


@njit(cache=True, inline="always")
def _horizontal_row(cost, gray, y, p1, p2, g_scale, total, reverse, overwrite, prev, cur):
    """One row's horizontal path costs, written into (or added to) ``total[y]``."""
    W = cost.shape[1]
    D = cost.shape[2]
    x = W - 1 if reverse else 0
    pm = _BIG
    for k in range(D):
        prev[k] = cost[y, x, k]
        if overwrite:
            total[y, x, k] = cost[y, x, k]
        else:
            total[y, x, k] += cost[y, x, k]
        if prev[k] < pm:
            pm = prev[k]
    for i in range(1, W):
        if reverse:
            x = W - 1 - i
            xp = x + 1
        else:
            x = i
            xp = x - 1
        pen = _penalty2(p1, p2, g_scale, gray[y, x], gray[y, xp])
        pm = _path_step(cost[y, x], prev, pm, cur, p1, pen)
        if overwrite:
            for k in range(D):
                total[y, x, k] = cur[k]
        else:
            for k in range(D):
                total[y, x, k] += cur[k]
        tmp = prev
        prev = cur
        cur = tmp


@njit(cache=True, parallel=prange_only())
def aggregate_horizontal(cost, gray, p1, p2, g_scale, total, reverse):
    """Add the left-to-right (or right-to-left) path costs into ``total``."""
    H, W, D = cost.shape
    for y in prange(H):
        prev = np.empty(D, np.int32)
        cur = np.empty(D, np.int32)
        _horizontal_row(cost, gray, y, p1, p2, g_scale, total, reverse, False, prev, cur)
    return total


@njit(cache=True, parallel=prange_only())
def aggregate_vertical(cost, gray, p1, p2, g_scale, total, upward, diagonals):
    """Add the vertical (and, if ``diagonals``, both diagonal) path costs into ``total``.

    Rows are swept in order; the pixels of one row are independent given the
    previous row, so they run in parallel. Private ping-pong row buffers keep
    reads and writes apart.
    """
    H, W, D = cost.shape
    ndir = 3 if diagonals else 1
    prev = np.empty((ndir, W, D), np.int32)
    cur = np.empty((ndir, W, D), np.int32)
    prev_min = np.empty((ndir, W), np.int32)
    cur_min = np.empty((ndir, W), np.int32)
    y0 = H - 1 if upward else 0
    for x in prange(W):
        m = _BIG
        for k in range(D):
            c = np.int32(cost[y0, x, k])
            for j in range(ndir):
                prev[j, x, k] = c
            total[y0, x, k] += ndir * c
            if c < m:
                m = c
        for j in range(ndir):
            prev_min[j, x] = m
    for i in range(1, H):
        y = H - 1 - i if upward else i
        yp = y + 1 if upward else y - 1
        for xi in prange(W):
            x = np.int64(xi)
            g = gray[y, x]
            for j in range(ndir):
                xp = x
                if j == 1:
                    xp = x - 1
                elif j == 2:
                    xp = x + 1
                if xp < 0 or xp >= W:
                    # The diagonal path enters the image here: it starts afresh.
                    m = _BIG
                    for k in range(D):
                        c = np.int32(cost[y, x, k])
                        cur[j, x, k] = c
                        if c < m:
                            m = c
                    cur_min[j, x] = m
                else:
                    pen = _penalty2(p1, p2, g_scale, g, gray[yp, xp])
                    cur_min[j, x] = _path_step(
                        cost[y, x], prev[j, xp], prev_min[j, xp], cur[j, x], p1, pen
                    )
            for k in range(D):
                s = np.int32(0)
                for j in range(ndir):
                    s += cur[j, x, k]
                total[y, x, k] += s
        tmp = prev
        prev = cur
        cur = tmp
        tmp2 = prev_min
        prev_min = cur_min
        cur_min = tmp2
    return total


@njit(cache=True, parallel=prange_only())
def select_left(volume, d_min):
    """Winner per pixel with its cost, the second-best cost away from it, and neighbours.

    Returns ``best_k`` (int32, -1 where no hypothesis is valid), ``c_best``,
    ``c_second`` (best cost at least two hypotheses away from the winner),
    ``c_minus`` and ``c_plus`` (costs at the winner's neighbours; equal to
    ``c_best`` at the ends of the range), all float32.
    """
    H, W, D = volume.shape
    best_k = np.empty((H, W), np.int32)
    c_best = np.empty((H, W), np.float32)
    c_second = np.empty((H, W), np.float32)
    c_minus = np.empty((H, W), np.float32)
    c_plus = np.empty((H, W), np.float32)
    for y in prange(H):
        for x in range(W):
            # Hypotheses whose right pixel lies inside the image.
            k_lo = max(0, x - W + 1 - d_min)
            k_hi = min(D, x - d_min + 1)
            if k_hi <= k_lo:
                best_k[y, x] = -1
                c_best[y, x] = 0.0
                c_second[y, x] = 0.0
                c_minus[y, x] = 0.0
                c_plus[y, x] = 0.0
                continue
            bk = k_lo
            bv = volume[y, x, k_lo]
            for k in range(k_lo + 1, k_hi):
                v = volume[y, x, k]
                if v < bv:
                    bv = v
                    bk = k
            sv = np.float32(np.inf)
            for k in range(k_lo, k_hi):
                if abs(k - bk) > 1:
                    v = np.float32(volume[y, x, k])
                    if v < sv:
                        sv = v
            best_k[y, x] = bk
            c_best[y, x] = bv
            c_second[y, x] = sv
            c_minus[y, x] = volume[y, x, bk - 1] if bk > k_lo else bv
            c_plus[y, x] = volume[y, x, bk + 1] if bk < k_hi - 1 else bv
    return best_k, c_best, c_second, c_minus, c_plus


@njit(cache=True, parallel=prange_only())
def select_right(volume, d_min):
    """Winner for each right-image pixel, read diagonally from the left volume.

    Right pixel ``xr`` matches left pixel ``xr + d``; -1 where no hypothesis is valid.
    """
    H, W, D = volume.shape
    best = np.empty((H, W), np.int32)
    for y in prange(H):
        for xr in range(W):
            bk = -1
            bv = np.inf
            for k in range(D):
                x = xr + d_min + k
                if x < 0 or x >= W:
                    continue
                v = np.float64(volume[y, x, k])
                if v < bv:
                    bv = v
                    bk = k
            best[y, xr] = bk
    return best


@njit(cache=True, inline="always")
def _consistency_row(y, best_left, best_right, d_min, n_disp, max_diff, classes, lr_diff):
    """Left-right check of row ``y`` with occluded and mismatched pixels told apart.

    A left pixel that fails the check is *mismatched* when some hypothesis maps
    it to a right pixel whose own winner points back to it, and *occluded* when
    none does (the right-image test of semi-global matching). Classes: 0
    consistent, 1 occluded, 2 mismatch, 4 no valid hypothesis or the winner at
    an end of the search range; ``lr_diff`` is ``|k_left - k_right|`` (inf where
    undefined).
    """
    W = best_left.shape[1]
    # Left pixels that some right pixel's winner points back to (within max_diff).
    pointed = np.zeros(W, np.bool_)
    for xr in range(W):
        kr = best_right[y, xr]
        if kr < 0:
            continue
        for k2 in range(max(kr - max_diff, 0), min(kr + max_diff, n_disp - 1) + 1):
            x = xr + d_min + k2
            if 0 <= x < W:
                pointed[x] = True
    for x in range(W):
        lr_diff[y, x] = np.inf
        classes[y, x] = 0
        k = best_left[y, x]
        if k < 0:
            classes[y, x] = 4
            continue
        xr = x - (d_min + k)
        kr = best_right[y, xr]
        if kr >= 0:
            lr_diff[y, x] = abs(k - kr)
        if k == 0 or k == n_disp - 1:
            classes[y, x] = 4
            continue
        if kr >= 0 and abs(k - kr) <= max_diff:
            continue
        classes[y, x] = 2 if pointed[x] else 1


@njit(cache=True, inline="always")
def _subpixel(cm, c0, cp, kind):
    """Offset of the cost minimum in [-0.5, 0.5]: 0 parabola, 1 equiangular, 2 none.

    The same formulas as :func:`stereomesh.matching.refine.subpixel_offset`.
    """
    if kind == 2:
        return 0.0
    if kind == 0:
        denom = 2.0 * (cm - 2.0 * c0 + cp)
    else:
        denom = 2.0 * max(cm - c0, cp - c0)
    off = (cm - cp) / denom if denom > 0 else 0.0
    return min(max(off, -0.5), 0.5)


@njit(cache=True, inline="always")
def _left_border_row(y, classes, disparity):
    """Re-label failed pixels of row ``y`` that map outside the right image as class 4.

    A failed left pixel ``x`` takes the disparity ``d`` of the nearest consistent
    pixel to its right (the surface it most likely belongs to, since occluded
    background lies left of the nearer surface); if ``x - d < 0`` its match would
    fall left of the right image: it is outside the overlap, not occluded.
    """
    W = classes.shape[1]
    d_right = np.float32(np.nan)
    for x in range(W - 1, -1, -1):
        c = classes[y, x]
        if c == 0:
            d_right = disparity[y, x]
        elif (c == 1 or c == 2) and d_right == d_right and x < d_right:
            classes[y, x] = 4


@njit(cache=True, inline="always")
def _occlusion_by_step_row(y, classes, disparity, min_step):
    """Keep a failed pixel of row ``y`` as occluded only where the scene steps forward.

    In a rectified pair with the right camera at +x, the left camera alone sees
    background just left of a nearer surface. A run of failed pixels between
    consistent pixels with disparities ``d_left`` and ``d_right`` is therefore
    occluded only if ``d_right - d_left >= min_step``; otherwise the failure is a
    mismatch (low texture, repetition). Runs touching the image border keep
    their class.
    """
    W = classes.shape[1]
    x = 0
    last_valid = -1
    while x < W:
        if classes[y, x] == 0:
            last_valid = x
            x += 1
            continue
        if classes[y, x] != 1 and classes[y, x] != 2:
            x += 1
            continue
        start = x
        while x < W and (classes[y, x] == 1 or classes[y, x] == 2):
            x += 1
        if last_valid < 0 or x >= W or classes[y, x] != 0:
            continue
        step = disparity[y, x] - disparity[y, last_valid]
        if step < min_step:
            for i in range(start, x):
                if classes[y, i] == 1:
                    classes[y, i] = 2


@njit(cache=True, parallel=prange_only())
def refine_winners(best_left, best_right, c_minus, c_best, c_plus, d_min, n_disp, max_diff,
                   subpixel_kind, min_step):
    """Classes, left-right differences and sub-pixel disparity, row by row.

    The left-right check with its classes, the sub-pixel disparity of the
    consistent pixels (NaN elsewhere), the outside-overlap re-labelling and the
    occluded-or-mismatch decision by the depth step; see the row helpers.
    """
    H, W = best_left.shape
    classes = np.empty((H, W), np.uint8)
    lr_diff = np.empty((H, W), np.float32)
    disparity = np.empty((H, W), np.float32)
    for y in prange(H):
        _consistency_row(y, best_left, best_right, d_min, n_disp, max_diff, classes, lr_diff)
        for x in range(W):
            if classes[y, x] == 0:
                off = _subpixel(c_minus[y, x], c_best[y, x], c_plus[y, x], subpixel_kind)
                disparity[y, x] = np.float32(d_min + best_left[y, x] + off)
            else:
                disparity[y, x] = np.nan
        _left_border_row(y, classes, disparity)
        _occlusion_by_step_row(y, classes, disparity, min_step)
    return classes, lr_diff, disparity


@njit(cache=True, parallel=prange_only())
def confidence_kernel(c_best, c_second, lr_diff, gray, peak_ratio_scale, lr_sigma, texture_scale):
    """Product of the peak-ratio, left-right and texture cues; see ``confidence_map``.

    Texture: magnitude of the 3×3 Sobel gradient (divided by 8), averaged over
    5×5, with reflected borders (OpenCV's default, ``gfedcb|abcdefgh|gfedcba``).
    All in float32; the border columns take the reflected indices, the
    others a straight loop the compiler vectorises.
    """
    H, W = gray.shape
    f32 = np.float32
    two = f32(2.0)
    eighth = f32(0.125)
    grad = np.empty((H, W), np.float32)
    for y in prange(H):
        a = gray[_reflect101(y - 1, H)]
        m = gray[y]
        b = gray[_reflect101(y + 1, H)]
        g = grad[y]
        for x in range(1, W - 1):
            gx = (a[x + 1] - a[x - 1]) + two * (m[x + 1] - m[x - 1]) + (b[x + 1] - b[x - 1])
            gy = (b[x - 1] - a[x - 1]) + two * (b[x] - a[x]) + (b[x + 1] - a[x + 1])
            g[x] = np.sqrt(gx * gx + gy * gy) * eighth
        for x in (0, W - 1):
            xm = _reflect101(x - 1, W)
            xp = _reflect101(x + 1, W)
            gx = (a[xp] - a[xm]) + two * (m[xp] - m[xm]) + (b[xp] - b[xm])
            gy = (b[xm] - a[xm]) + two * (b[x] - a[x]) + (b[xp] - a[xp])
            g[x] = np.sqrt(gx * gx + gy * gy) * eighth
    conf = np.empty((H, W), np.float32)
    inv_area_scale = f32(1.0 / (25.0 * texture_scale))
    inv_ratio = f32(1.0 / peak_ratio_scale)
    lr_k = f32(-0.5 / (lr_sigma * lr_sigma))
    for y in prange(H):
        g0 = grad[_reflect101(y - 2, H)]
        g1 = grad[_reflect101(y - 1, H)]
        g2 = grad[y]
        g3 = grad[_reflect101(y + 1, H)]
        g4 = grad[_reflect101(y + 2, H)]
        rows = np.empty(W, np.float32)
        for x in range(W):
            rows[x] = g0[x] + g1[x] + g2[x] + g3[x] + g4[x]
        for x in range(W):
            if 2 <= x < W - 2:
                acc = rows[x - 2] + rows[x - 1] + rows[x] + rows[x + 1] + rows[x + 2]
            else:
                acc = f32(0.0)
                for dx in range(-2, 3):
                    acc += rows[_reflect101(x + dx, W)]
            texture = f32(1.0) - np.exp(-acc * inv_area_scale)
            c1 = c_best[y, x]
            c2 = c_second[y, x]
            margin = (c2 - c1) / c2 if (np.isfinite(c2) and c2 > 0) else f32(1.0)
            peak = min(max(margin * inv_ratio, f32(0.0)), f32(1.0))
            d = lr_diff[y, x]
            lr = np.exp(lr_k * d * d)
            c = peak * lr * texture
            conf[y, x] = min(max(c, f32(0.0)), f32(1.0)) if c == c else f32(0.0)
    return conf


def fixed_point_disparity(disparity, invalid):
    """Disparity as int16 sixteenths of a pixel above its minimum (plus one pixel).

    ``invalid`` where the disparity is not finite; the offset keeps every valid
    value positive and within int16 for spans up to 2047 pixels.
    """
    d = np.asarray(disparity, np.float64)
    finite = np.isfinite(d)
    lo = d[finite].min() if finite.any() else np.inf
    with np.errstate(invalid="ignore"):
        fixed = np.round((d - lo + 1.0) * 16.0)
    return np.where(finite, fixed, invalid).astype(np.int16)


def newly_marked(before, after, invalid):
    """Pixels that hold ``invalid`` in ``after`` but did not in ``before``."""
    return (after == invalid) & (before != invalid)


@njit(cache=True, inline="always")
def _reflect101(i, n):
    if n == 1:
        return 0
    if i < 0:
        return -i
    if i >= n:
        return 2 * n - 2 - i
    return i


@njit(cache=True, parallel=prange_only())
def grid_energy_terms(labels, cost, at_labels, kind, weight, trunc, p1, p2):
    """Unary and pairwise sums of the 4-connected grid energy for integer labels.

    With ``at_labels`` the (H, W, 1) ``cost`` already holds each pixel's cost at
    its label.

    ``kind``: 0 Potts (``weight`` per label change), 1 truncated linear
    (``weight * min(|a-b|, trunc)``), 2 the semi-global form (0, ``p1`` for a
    step of one, ``p2`` beyond).
    """
    H, W = labels.shape
    unary_rows = np.zeros(H, np.float64)
    pair_rows = np.zeros(H, np.float64)
    for y in prange(H):
        u = 0.0
        p = 0.0
        for x in range(W):
            a = labels[y, x]
            u += cost[y, x, 0] if at_labels else cost[y, x, a]
            for n in range(2):
                if n == 0:
                    if x + 1 >= W:
                        continue
                    b = labels[y, x + 1]
                else:
                    if y + 1 >= H:
                        continue
                    b = labels[y + 1, x]
                diff = abs(a - b)
                if kind == 0:
                    p += weight if diff != 0 else 0.0
                elif kind == 1:
                    p += weight * min(diff, trunc)
                else:
                    if diff == 1:
                        p += p1
                    elif diff > 1:
                        p += p2
        unary_rows[y] = u
        pair_rows[y] = p
    return unary_rows.sum(), pair_rows.sum()


@njit(cache=True, parallel=prange_only())
def ad_gradient_cost_volume(left, right, grad_left, grad_right, d_min, n_disp, trunc_intensity,
                            trunc_gradient, gradient_weight, scale, invalid_cost):
    """Truncated absolute intensity + horizontal-gradient difference, scaled to ``scale``."""
    H, W = left.shape
    cost = np.empty((H, W, n_disp), np.uint8)
    wi = (1.0 - gradient_weight) / trunc_intensity
    wg = gradient_weight / trunc_gradient
    for y in prange(H):
        for x in range(W):
            for k in range(n_disp):
                xr = x - (d_min + k)
                if xr < 0 or xr >= W:
                    cost[y, x, k] = invalid_cost
                    continue
                a = min(abs(left[y, x] - right[y, xr]), trunc_intensity)
                g = min(abs(grad_left[y, x] - grad_right[y, xr]), trunc_gradient)
                cost[y, x, k] = np.uint8(scale * (wi * a + wg * g) + 0.5)
    return cost


@njit(cache=True, parallel=prange_only())
def aggregate_horizontal_both(cost, gray, p1, p2, g_scale, total):
    """Write both horizontal path costs into ``total`` (overwriting it), row by row.

    Doing both directions on one row while it is in cache saves a full pass
    over the sum volume compared with two calls of :func:`aggregate_horizontal`.
    """
    H, W, D = cost.shape
    for y in prange(H):
        prev = np.empty(D, np.int32)
        cur = np.empty(D, np.int32)
        _horizontal_row(cost, gray, y, p1, p2, g_scale, total, False, True, prev, cur)
        _horizontal_row(cost, gray, y, p1, p2, g_scale, total, True, False, prev, cur)
    return total
