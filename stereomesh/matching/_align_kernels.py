"""numba kernels of the sub-pixel alignment stage (see :mod:`stereomesh.matching.refine`).

Kept apart from ``_kernels.py`` so that numba's per-file cache of the other
kernels stays valid when these change. Inputs are C-contiguous float32 and
unchecked; :func:`stereomesh.matching.refine.align_subpixel` validates them.
"""

from __future__ import annotations

import numpy as np
from llvmlite import ir
from numba import njit, prange, types
from numba.extending import intrinsic

from stereomesh._parallel import prange_only
from stereomesh.matching._simd import _element_pointer


@intrinsic
def _copy4(typingctx, src, si, dst, di):
    """Copy ``src[si : si + 4]`` to ``dst[di : di + 4]`` of float32 arrays as one 16-byte move.

    The four taps of a sample sit at a data-dependent place in the row, a
    gather the loop vectoriser leaves scalar; one unaligned vector move a
    sample keeps that scalar loop short. The caller keeps both ranges inside
    the arrays.
    """
    if not all(isinstance(a, types.Array) and a.dtype == types.float32 for a in (src, dst)):
        return None
    sig = types.void(src, types.intp, dst, types.intp)

    def codegen(context, builder, signature, args):
        vec = ir.VectorType(ir.FloatType(), 4)
        a = _element_pointer(context, builder, signature.args[0], args[0], args[1])
        b = _element_pointer(context, builder, signature.args[2], args[2], args[3])
        value = builder.load(builder.bitcast(a, vec.as_pointer()), align=4)
        builder.store(value, builder.bitcast(b, vec.as_pointer()), align=4)
        return context.get_dummy_value()

    return sig, codegen


_STOP = 0.005  # pixels: a Gauss-Newton step below this ends the fit
_CENTRE = np.float32(128.0)  # intensities are centred so float32 sums keep their digits


@njit(cache=True, inline="always")
def _solve3(m00, m01, m02, m11, m12, m22, r0, r1, r2):
    """Solution of a symmetric 3x3 system and the (2, 2) entry of its inverse (Cramer).

    Returns ``ok`` False for a (near) singular matrix, with finite values to
    ignore: no early return, so a loop of solves vectorises.
    """
    c00 = m11 * m22 - m12 * m12
    c01 = m02 * m12 - m01 * m22
    c02 = m01 * m12 - m02 * m11
    det = m00 * c00 + m01 * c01 + m02 * c02
    ok = abs(det) > 1e-9
    inv = 1.0 / (det if ok else 1.0)
    c11 = m00 * m22 - m02 * m02
    c12 = m01 * m02 - m00 * m12
    c22 = m00 * m11 - m01 * m01
    x0 = (c00 * r0 + c01 * r1 + c02 * r2) * inv
    x1 = (c01 * r0 + c11 * r1 + c12 * r2) * inv
    x2 = (c02 * r0 + c12 * r1 + c22 * r2) * inv
    return ok, x0, x1, x2, c22 * inv


_FAST = {"reassoc", "contract", "nsz", "arcp"}  # not "nnan": the support test relies on NaN
_BLOCK = 128  # pixels of a row fitted together; their work rows (30 x 512 bytes) stay in L1
# Rows of a block's float32 work array, ``_BLOCK`` values each: the ten window sums, then
# the per-pixel inputs of the step and its per-sample temporaries. One array, so that the
# vectoriser sees constant distances between them instead of pointers that might overlap.
_GROUP = 3  # window samples whose sums are read and written once (a 9-wide row: 3 groups)
_D0, _SHIFT, _SLOPE_A, _SLOPE_B, _BASE, _SPACING, _ROW_SUMS = (r * _BLOCK for r in range(10, 17))
_T, _W, _LV = (r * _BLOCK for r in range(21, 21 + 3 * _GROUP, _GROUP))  # _GROUP rows each
_WORK_ROWS = 21 + 3 * _GROUP
_U = np.uint64  # unsigned indices: numba's wraparound of negative ones defeats vectorising


@njit(cache=True, parallel=prange_only())
def align_subpixel_kernel(left, right, init, rx, ry, tol, iterations, max_shift):
    """Disparity, its Gauss-Newton standard deviation and a converged flag per pixel.

    For every finite ``init`` pixel: the slopes of the disparity plane from
    its similar neighbours, then ``iterations`` Gauss-Newton steps on the
    offset, matching the left window against the right image sampled (cubic
    interpolation along the row) at ``x - d(i, j)`` with gain and offset. NaN
    pixels stay NaN; pixels whose fit fails keep ``init`` with a NaN sigma.

    The interpolant is the Keys (a = -1/2) cubic, rather than a linear one whose
    smoothing varies with the fractional position and pulls the fit toward
    whole pixels. Its four taps are read as one 16-byte copy and turned into
    polynomial coefficients in the vectorised loop, so no table of
    coefficients (16 bytes a pixel, built per call) is needed.
    """
    H, W = init.shape
    out = np.empty((H, W), np.float32)
    sigma = np.empty((H, W), np.float32)
    converged = np.zeros((H, W), np.bool_)
    for y in prange(H):
        # prange's index is unsigned: ``-y`` in the window bounds would wrap.
        _align_row(left, right, init, np.int64(y), rx, ry, tol, iterations, max_shift,
                   out, sigma, converged)
    return out, sigma, converged


@njit(cache=True, fastmath=_FAST)
def _align_row(left, right, init, y, rx, ry, tol, iterations, max_shift, out, sigma, converged):
    """One row of ``align_subpixel_kernel``, in blocks of ``_BLOCK`` pixels.

    The window sums of a block's pixels are accumulated a few window samples
    at a time with the innermost loop over the pixels: their left and support
    reads are then neighbours in memory and the loop vectorises, which a loop
    over one pixel's 9-sample window row does not.
    """
    H, W = init.shape
    tol32 = np.float32(tol)
    j0, j1 = max(-ry, -y), min(ry, H - 1 - y)
    work = np.zeros(_WORK_ROWS * _BLOCK, np.float32)
    taps = np.zeros(_GROUP * _BLOCK, np.int32)
    taps4 = np.zeros(4 * _GROUP * _BLOCK, np.float32)
    delta = np.empty(_BLOCK, np.float64)
    var = np.empty(_BLOCK, np.float64)
    fits = np.empty(3 * _BLOCK, np.float64)
    state = np.empty(_BLOCK, np.int8)  # 0 fitting, 1 converged, -1 failed or NaN
    x0 = np.int64(0)  # not the literal 0: numba would compile the callees for it too
    while x0 < W:
        # Blocks start and end on finite pixels: NaN runs (occlusions, the
        # image's unmatched side) cost no vector lanes.
        if not init[y, x0] == init[y, x0]:
            out[y, x0] = np.nan
            sigma[y, x0] = np.nan
            x0 += 1
            continue
        nb = min(_BLOCK, W - x0)
        while not init[y, x0 + nb - 1] == init[y, x0 + nb - 1]:
            nb -= 1
        for q in range(nb):
            v = init[y, x0 + q]
            finite = v == v
            # NaN centres take part with a harmless 0 (the float-to-int of NaN is undefined).
            work[_D0 + q] = v if finite else np.float32(0.0)
            work[_SHIFT + q] = 0.0
            state[q] = 0 if finite else -1
            delta[q] = 0.0
            var[q] = np.nan
        _plane_sums(init, y, x0, nb, rx, j0, j1, tol32, work)
        _plane_slopes(work, nb)
        for _ in range(iterations):
            _step_sums(left, right, init, y, x0, nb, rx, j0, j1, tol32, work, taps, taps4)
            _steps(work, nb, fits)
            fitting = 0
            for q in range(nb):
                if state[q] != 0:
                    continue
                ok = fits[2 * _BLOCK + q] == 1.0
                step = fits[q]
                delta[q] += step
                var[q] = fits[_BLOCK + q]
                work[_SHIFT + q] = np.float32(delta[q])
                if not ok or not abs(delta[q]) <= max_shift:
                    state[q] = -1
                    work[_SHIFT + q] = 0.0  # keeps a failed pixel's samples in the row
                elif abs(step) < _STOP:
                    state[q] = 1
                else:
                    fitting += 1
            if fitting == 0:
                break
        for q in range(nb):
            x = x0 + q
            if state[q] < 0:
                out[y, x] = init[y, x]
                sigma[y, x] = np.nan
            else:
                out[y, x] = work[_D0 + q] + delta[q]
                sigma[y, x] = np.sqrt(var[q])
                converged[y, x] = state[q] == 1
        x0 += nb


@njit(cache=True, fastmath=_FAST)
def _plane_sums(init, y, x0, nb, rx, j0, j1, tol, work):
    """Least-squares sums of the plane fit of pixels ``x0 .. x0 + nb`` into work rows 0-8.

    Neighbours within ``tol`` of the centre's disparity are taken as the same
    surface. The integer sums are exact in float32 and the disparity
    differences are at most ``tol``, so float32 loses nothing the solve keeps.
    The sums over a window row come first (five of them, the factors in ``j``
    are constant along it; ``_GROUP`` samples at a time where the group lies
    inside the row), then the nine of the window.
    """
    W = init.shape[1]
    work[: 9 * _BLOCK] = 0.0
    for j in range(j0, j1 + 1):
        row = init[y + j]
        fj = np.float32(j)
        work[_ROW_SUMS : _ROW_SUMS + 5 * _BLOCK] = 0.0
        for g in range(-rx, rx + 1, _GROUP):
            if g + _GROUP - 1 <= rx and x0 + g >= 0 and x0 + nb + g + _GROUP - 1 <= W:
                # A whole group inside the row for every pixel: its sums in registers.
                for q in range(nb):
                    d0 = work[_U(_D0 + q)]
                    n = np.float32(0.0)
                    si = np.float32(0.0)
                    sii = np.float32(0.0)
                    sd = np.float32(0.0)
                    sid = np.float32(0.0)
                    for m in range(_GROUP):
                        fi = np.float32(g + m)
                        dq = row[_U(x0 + q + g + m)] - d0
                        same = abs(dq) <= tol  # also false for NaN
                        w = np.float32(1.0) if same else np.float32(0.0)
                        dq = dq if same else np.float32(0.0)
                        n += w
                        si += w * fi
                        sii += w * (fi * fi)
                        sd += dq
                        sid += dq * fi
                    work[_U(_ROW_SUMS + q)] += n
                    work[_U(_ROW_SUMS + _BLOCK + q)] += si
                    work[_U(_ROW_SUMS + 2 * _BLOCK + q)] += sii
                    work[_U(_ROW_SUMS + 3 * _BLOCK + q)] += sd
                    work[_U(_ROW_SUMS + 4 * _BLOCK + q)] += sid
                continue
            for i in range(g, min(g + _GROUP, rx + 1)):
                fi = np.float32(i)
                # Pixels whose sample ``x + i`` lies outside the row skip it.
                for q in range(max(0, -i - x0), min(nb, W - i - x0)):
                    dq = row[_U(x0 + q + i)] - work[_U(_D0 + q)]
                    same = abs(dq) <= tol  # also false for NaN
                    w = np.float32(1.0) if same else np.float32(0.0)
                    dq = dq if same else np.float32(0.0)
                    work[_U(_ROW_SUMS + q)] += w
                    work[_U(_ROW_SUMS + _BLOCK + q)] += w * fi
                    work[_U(_ROW_SUMS + 2 * _BLOCK + q)] += w * (fi * fi)
                    work[_U(_ROW_SUMS + 3 * _BLOCK + q)] += dq
                    work[_U(_ROW_SUMS + 4 * _BLOCK + q)] += dq * fi
        for q in range(nb):
            n = work[_U(_ROW_SUMS + q)]
            si = work[_U(_ROW_SUMS + _BLOCK + q)]
            sd = work[_U(_ROW_SUMS + 3 * _BLOCK + q)]
            work[_U(q)] += n
            work[_U(_BLOCK + q)] += si
            work[_U(2 * _BLOCK + q)] += n * fj
            work[_U(3 * _BLOCK + q)] += work[_U(_ROW_SUMS + 2 * _BLOCK + q)]
            work[_U(4 * _BLOCK + q)] += si * fj
            work[_U(5 * _BLOCK + q)] += n * (fj * fj)
            work[_U(6 * _BLOCK + q)] += sd
            work[_U(7 * _BLOCK + q)] += work[_U(_ROW_SUMS + 4 * _BLOCK + q)]
            work[_U(8 * _BLOCK + q)] += sd * fj


@njit(cache=True, fastmath=_FAST)
def _plane_slopes(work, nb):
    """Slopes ``(a, b)`` of the planes ``d = d_p + c + a i + b j`` into their work rows.

    From the sums of ``_plane_sums``; 0 where fewer than six neighbours support
    the plane or it is singular.
    """
    for q in range(nb):
        n = np.float64(work[_U(q)])
        ok, c, a, b, _ = _solve3(
            n, np.float64(work[_U(_BLOCK + q)]), np.float64(work[_U(2 * _BLOCK + q)]),
            np.float64(work[_U(3 * _BLOCK + q)]), np.float64(work[_U(4 * _BLOCK + q)]),
            np.float64(work[_U(5 * _BLOCK + q)]), np.float64(work[_U(6 * _BLOCK + q)]),
            np.float64(work[_U(7 * _BLOCK + q)]), np.float64(work[_U(8 * _BLOCK + q)]))
        ok = ok & (n >= 6.0)
        # Steeper than one pixel of disparity per pixel is no surface a window can follow.
        a = min(max(a, -1.0), 1.0)
        b = min(max(b, -1.0), 1.0)
        work[_U(_SLOPE_A + q)] = np.float32(a) if ok else np.float32(0.0)
        work[_U(_SLOPE_B + q)] = np.float32(b) if ok else np.float32(0.0)


@njit(cache=True, fastmath=_FAST)
def _step_sums(left, right, init, y, x0, nb, rx, j0, j1, tol, work, taps, taps4):
    """Normal-equation sums of one Gauss-Newton step of pixels ``x0 .. x0 + nb`` (rows 0-9).

    Window samples go in groups of ``_GROUP`` along a window row. Per sample:
    its positions, weights and left values (vectorised), then the four
    right-image taps at each position (a gather, kept apart because it stops
    the vectoriser, and only copying). Per group: the Keys cubic and the sums
    (vectorised), the sums read and written once for the group's samples.
    Within a window row the position is ``base + i (1 - a)``; a group's
    missing samples and pixels whose sample leaves the row weigh 0.
    """
    W = init.shape[1]
    last = np.float32(W - 2.0)
    top = np.float32(W - 3.0)
    zero = np.float32(0.0)
    work[: 10 * _BLOCK] = 0.0
    for q in range(nb):
        work[_U(_SPACING + q)] = np.float32(1.0) - work[_U(_SLOPE_A + q)]
    for j in range(j0, j1 + 1):
        yy = y + j
        srow = init[yy]
        lrow = left[yy]
        rrow = right[yy]
        fj = np.float32(j)
        for q in range(nb):
            work[_U(_BASE + q)] = np.float32(x0 + q) - (
                work[_U(_D0 + q)] + work[_U(_SHIFT + q)] + work[_U(_SLOPE_B + q)] * fj)
        for g in range(-rx, rx + 1, _GROUP):
            for m in range(_GROUP):
                i = g + m
                o = m * _BLOCK
                qa, qb = max(0, -i - x0), min(nb, W - i - x0)
                if i > rx:
                    qa = qb = nb
                if qa > 0 or qb < nb:
                    for q in range(nb):
                        work[_U(_W + o + q)] = zero
                        work[_U(_T + o + q)] = zero
                        work[_U(_LV + o + q)] = zero
                        taps[_U(o + q)] = 0
                fi = np.float32(i)
                for q in range(qa, qb):
                    xr = work[_U(_BASE + q)] + fi * work[_U(_SPACING + q)]
                    # Weights 0 or 1 instead of branches keep the loop free of jumps.
                    inside = ((abs(srow[_U(x0 + q + i)] - work[_U(_D0 + q)]) <= tol)
                              & (xr >= np.float32(1.0)) & (xr < last))
                    w = np.float32(1.0) if inside else zero
                    k = np.int32(min(max(xr, np.float32(1.0)), top))
                    taps[_U(o + q)] = k - np.int32(1)
                    work[_U(_T + o + q)] = xr - np.float32(k)
                    work[_U(_W + o + q)] = w
                    work[_U(_LV + o + q)] = (lrow[_U(x0 + q + i)] - _CENTRE) * w
                for q in range(nb):
                    _copy4(rrow, taps[_U(o + q)], taps4, 4 * (o + q))
            for q in range(nb):
                s_n = zero
                s_rr = zero
                s_r = zero
                s_rg = zero
                s_g = zero
                s_gg = zero
                s_lr = zero
                s_l = zero
                s_lg = zero
                s_ll = zero
                for m in range(_GROUP):
                    o = m * _BLOCK
                    t = work[_U(_T + o + q)]
                    w = work[_U(_W + o + q)]
                    lv = work[_U(_LV + o + q)]
                    p0 = taps4[_U(4 * (o + q))]
                    p1 = taps4[_U(4 * (o + q) + 1)]
                    p2 = taps4[_U(4 * (o + q) + 2)]
                    p3 = taps4[_U(4 * (o + q) + 3)]
                    # Keys (a = -1/2) cubic on [p1, p2); the taps' centring cancels but in c0.
                    c0 = p1 - _CENTRE
                    c1 = np.float32(0.5) * (p2 - p0)
                    c2 = p0 - np.float32(2.5) * p1 + np.float32(2.0) * p2 - np.float32(0.5) * p3
                    c3 = np.float32(0.5) * (p3 - p0) + np.float32(1.5) * (p1 - p2)
                    r = (((c3 * t + c2) * t + c1) * t + c0) * w
                    g_ = ((np.float32(3.0) * c3 * t + np.float32(2.0) * c2) * t + c1) * w
                    s_n += w
                    s_rr += r * r
                    s_r += r
                    s_rg += r * g_
                    s_g += g_
                    s_gg += g_ * g_
                    s_lr += lv * r
                    s_l += lv
                    s_lg += lv * g_
                    s_ll += lv * lv
                work[_U(q)] += s_n
                work[_U(_BLOCK + q)] += s_rr
                work[_U(2 * _BLOCK + q)] += s_r
                work[_U(3 * _BLOCK + q)] += s_rg
                work[_U(4 * _BLOCK + q)] += s_g
                work[_U(5 * _BLOCK + q)] += s_gg
                work[_U(6 * _BLOCK + q)] += s_lr
                work[_U(7 * _BLOCK + q)] += s_l
                work[_U(8 * _BLOCK + q)] += s_lg
                work[_U(9 * _BLOCK + q)] += s_ll


@njit(cache=True, fastmath=_FAST)
def _steps(work, nb, fits):
    """Gauss-Newton steps from the sums of ``_step_sums`` into ``fits``.

    Per pixel ``q``: the step ``fits[q]``, the offset variance
    ``fits[_BLOCK + q]`` and 1 in ``fits[2 * _BLOCK + q]``, or 0, NaN and 0
    where the fit fails (too few samples, singular, gain at most 0.05).
    """
    for q in range(nb):
        n = np.float64(work[_U(q)])
        # The solve in float64: the normal matrix is poorly conditioned where the
        # intensities and their slopes correlate.
        # Left = gain * right + offset + c * slope, linear in (gain, offset, c):
        # gain and offset remove the exposure difference of the two cameras.
        s_lr = np.float64(work[_U(6 * _BLOCK + q)])
        s_l = np.float64(work[_U(7 * _BLOCK + q)])
        s_lg = np.float64(work[_U(8 * _BLOCK + q)])
        ok, gain, offset, c, inv_cc = _solve3(
            np.float64(work[_U(_BLOCK + q)]), np.float64(work[_U(2 * _BLOCK + q)]),
            np.float64(work[_U(3 * _BLOCK + q)]), n, np.float64(work[_U(4 * _BLOCK + q)]),
            np.float64(work[_U(5 * _BLOCK + q)]), s_lr, s_l, s_lg)
        ok = ok & (n >= 8.0) & (gain > 0.05)
        gain = gain if ok else 1.0
        ssr = np.float64(work[_U(9 * _BLOCK + q)]) - (gain * s_lr + offset * s_l + c * s_lg)
        var = max(ssr, 0.0) / max(n - 3.0, 1.0) * inv_cc / (gain * gain)
        fits[_U(q)] = -c / gain if ok else 0.0
        fits[_U(_BLOCK + q)] = var if ok else np.nan
        fits[_U(2 * _BLOCK + q)] = 1.0 if ok else 0.0


@njit(cache=True, parallel=prange_only())
def sigma_d_map(sigma_fit, disparity, scale, floor2, edge_factor, failed):
    """Disparity sigma from the fit's: see :func:`stereomesh.matching.disparity.alignment_sigma`.

    ``sqrt((scale s)^2 + floor2)``, times ``edge_factor`` where the 5 x 5
    spread (maximum minus minimum, window clipped at the image border) of
    ``disparity`` exceeds 1 px, NaN disparities counting as -1e4, and
    ``failed`` where ``s`` is NaN. One pass and one output array in place of
    the eight full-image temporaries of the array version (in a one-shot
    command each costs fresh pages). Float32 throughout, no fast-math: equal
    to the array version to the bit. The constants come as float32.
    """
    H, W = disparity.shape
    out = np.empty((H, W), np.float32)
    low = np.float32(-1e4)
    high = np.float32(1e4)
    one = np.float32(1.0)
    for y in prange(H):
        yy = np.int64(y)  # prange's index is unsigned: ``y - 2`` would wrap
        # Column maxima and minima over the window's rows, two entries of padding
        # each side that never win, so that the row pass has fixed offsets.
        col_max = np.full(W + 4, low, np.float32)
        col_min = np.full(W + 4, high, np.float32)
        for r in range(max(yy - 2, 0), min(yy + 2, H - 1) + 1):
            row = disparity[r]
            for x in range(W):
                v = row[x]
                v = v if v == v else low
                col_max[x + 2] = max(col_max[x + 2], v)
                col_min[x + 2] = min(col_min[x + 2], v)
        fit = sigma_fit[yy]
        dst = out[yy]
        for x in range(W):
            hi = max(max(max(col_max[x], col_max[x + 1]), max(col_max[x + 2], col_max[x + 3])),
                     col_max[x + 4])
            lo = min(min(min(col_min[x], col_min[x + 1]), min(col_min[x + 2], col_min[x + 3])),
                     col_min[x + 4])
            s = fit[x] * scale
            v = np.sqrt(s * s + floor2)
            v = v * edge_factor if hi - lo > one else v
            dst[x] = v if fit[x] == fit[x] else failed
    return out
