"""numba kernels of the sub-pixel alignment stage (see :mod:`stereomesh.matching.refine`).

Kept apart from ``_kernels.py`` so that numba's per-file cache of the other
kernels stays valid when these change. Inputs are C-contiguous float32 and
unchecked; :func:`stereomesh.matching.refine.align_subpixel` validates them.
"""

from __future__ import annotations

import numpy as np
from numba import njit, prange

_STOP = 0.005  # pixels: a Gauss-Newton step below this ends the fit
_CENTRE = np.float32(128.0)  # intensities are centred so float32 sums keep their digits


@njit(cache=True, parallel=True)
def cubic_table(image):
    """Polynomial coefficients ``(c0, c1, c2, c3)`` of each row interval ``[i, i + 1)``.

    The Keys (a = -1/2) cubic interpolant on ``[i, i + 1)`` is
    ``((c3 t + c2) t + c1) t + c0`` with ``t`` the fraction past ``i``, from the
    samples ``i - 1 .. i + 2``; intervals without four samples are zero (never
    read). Cubic rather than linear interpolation because a linear
    interpolant's smoothing varies with the fractional position, which pulls
    the fit toward whole pixels. Intensities are centred on 128.
    """
    H, W = image.shape
    table = np.zeros((H, W, 4), np.float32)
    for y in prange(H):
        for i in range(1, W - 2):
            a = image[y, i - 1] - _CENTRE
            b = image[y, i] - _CENTRE
            c = image[y, i + 1] - _CENTRE
            d = image[y, i + 2] - _CENTRE
            table[y, i, 0] = b
            table[y, i, 1] = 0.5 * (c - a)
            table[y, i, 2] = a - 2.5 * b + 2.0 * c - 0.5 * d
            table[y, i, 3] = -0.5 * a + 1.5 * b - 1.5 * c + 0.5 * d
    return table


@njit(cache=True, inline="always")
def _solve3(m00, m01, m02, m11, m12, m22, r0, r1, r2):
    """Solution of a symmetric 3x3 system and the (2, 2) entry of its inverse (Cramer)."""
    c00 = m11 * m22 - m12 * m12
    c01 = m02 * m12 - m01 * m22
    c02 = m01 * m12 - m02 * m11
    det = m00 * c00 + m01 * c01 + m02 * c02
    if not abs(det) > 1e-9:
        return False, 0.0, 0.0, 0.0, 0.0
    c11 = m00 * m22 - m02 * m02
    c12 = m01 * m02 - m00 * m12
    c22 = m00 * m11 - m01 * m01
    x0 = (c00 * r0 + c01 * r1 + c02 * r2) / det
    x1 = (c01 * r0 + c11 * r1 + c12 * r2) / det
    x2 = (c02 * r0 + c12 * r1 + c22 * r2) / det
    return True, x0, x1, x2, c22 / det


_FAST = {"reassoc", "contract", "nsz", "arcp"}  # not "nnan": the support test relies on NaN
_BLOCK = 128  # pixels of a row fitted together; their work rows (16 x 512 bytes) stay in L1
# Rows of a block's float32 work array, ``_BLOCK`` values each: the ten window sums, then
# the per-pixel inputs of the step and its per-sample temporaries. One array, so that the
# vectoriser sees constant distances between them instead of pointers that might overlap.
_D0, _SHIFT, _SLOPE_A, _SLOPE_B, _T, _W = (r * _BLOCK for r in (10, 11, 12, 13, 14, 15))
_WORK_ROWS = 16
_U = np.uint64  # unsigned indices: numba's wraparound of negative ones defeats vectorising


@njit(cache=True, parallel=True)
def align_subpixel_kernel(left, table, init, rx, ry, tol, iterations, max_shift):
    """Disparity, its Gauss-Newton standard deviation and a converged flag per pixel.

    For every finite ``init`` pixel: the slopes of the disparity plane from
    its similar neighbours, then ``iterations`` Gauss-Newton steps on the
    offset, matching the left window against the right image sampled (cubic
    interpolation along the row) at ``x - d(i, j)`` with gain and offset. NaN
    pixels stay NaN; pixels whose fit fails keep ``init`` with a NaN sigma.
    ``table`` is :func:`cubic_table` of the right image.
    """
    H, W = init.shape
    out = np.empty((H, W), np.float32)
    sigma = np.empty((H, W), np.float32)
    converged = np.zeros((H, W), np.bool_)
    # One complex128 per pixel: a sample's four coefficients move as one 16-byte copy.
    packed = table.reshape(H * W * 4).view(np.complex128).reshape(H, W)
    for y in prange(H):
        # prange's index is unsigned: ``-y`` in the window bounds would wrap.
        _align_row(left, packed, init, np.int64(y), rx, ry, tol, iterations, max_shift,
                   out, sigma, converged)
    return out, sigma, converged


@njit(cache=True, fastmath=_FAST)
def _align_row(left, table, init, y, rx, ry, tol, iterations, max_shift, out, sigma, converged):
    """One row of ``align_subpixel_kernel``, in blocks of ``_BLOCK`` pixels.

    The window sums of a block's pixels are accumulated one window sample at a
    time with the innermost loop over the pixels: their left and support reads
    are then neighbours in memory and the loop vectorises, which a loop over
    one pixel's 9-sample window row does not. ``table`` is flat per row.
    """
    H, W = init.shape
    tol32 = np.float32(tol)
    j0, j1 = max(-ry, -y), min(ry, H - 1 - y)
    work = np.zeros(_WORK_ROWS * _BLOCK, np.float32)
    taps = np.zeros(_BLOCK, np.int64)
    coef = np.zeros(_BLOCK, np.complex128)
    delta = np.empty(_BLOCK, np.float64)
    var = np.empty(_BLOCK, np.float64)
    state = np.empty(_BLOCK, np.int8)  # 0 fitting, 1 converged, 2 out of steps, -1 failed
    for x0 in range(0, W, _BLOCK):
        nb = min(_BLOCK, W - x0)
        fitting = 0
        for q in range(nb):
            v = init[y, x0 + q]
            finite = v == v
            # NaN centres take part with a harmless 0 (the float-to-int of NaN is undefined).
            work[_D0 + q] = v if finite else np.float32(0.0)
            work[_SHIFT + q] = 0.0
            state[q] = 0 if finite else -1
            fitting += finite
            delta[q] = 0.0
            var[q] = np.nan
        if fitting:
            _plane_sums(init, y, x0, nb, rx, j0, j1, tol32, work)
            for q in range(nb):
                work[_SLOPE_A + q], work[_SLOPE_B + q] = _plane_slopes(work, q)
            for _ in range(iterations):
                _step_sums(left, table, init, y, x0, nb, rx, j0, j1, tol32, work, taps, coef)
                fitting = 0
                for q in range(nb):
                    if state[q] != 0:
                        continue
                    ok, step, v = _step(work, q)
                    delta[q] += step
                    var[q] = v
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


@njit(cache=True, fastmath=_FAST)
def _plane_sums(init, y, x0, nb, rx, j0, j1, tol, work):
    """Least-squares sums of the plane fit of pixels ``x0 .. x0 + nb`` into work rows 0-8.

    Neighbours within ``tol`` of the centre's disparity are taken as the same
    surface. The integer sums are exact in float32 and the disparity
    differences are at most ``tol``, so float32 loses nothing the solve keeps.
    """
    W = init.shape[1]
    work[: 9 * _BLOCK] = 0.0
    for j in range(j0, j1 + 1):
        row = init[y + j]
        fj = np.float32(j)
        for i in range(-rx, rx + 1):
            fi = np.float32(i)
            # Pixels whose sample ``x + i`` lies outside the row skip it.
            for q in range(max(0, -i - x0), min(nb, W - i - x0)):
                dq = row[_U(x0 + q + i)] - work[_U(_D0 + q)]
                same = abs(dq) <= tol  # also false for NaN
                w = np.float32(1.0) if same else np.float32(0.0)
                dq = dq if same else np.float32(0.0)
                work[_U(q)] += w
                work[_U(_BLOCK + q)] += w * fi
                work[_U(2 * _BLOCK + q)] += w * fj
                work[_U(3 * _BLOCK + q)] += w * (fi * fi)
                work[_U(4 * _BLOCK + q)] += w * (fi * fj)
                work[_U(5 * _BLOCK + q)] += w * (fj * fj)
                work[_U(6 * _BLOCK + q)] += dq
                work[_U(7 * _BLOCK + q)] += dq * fi
                work[_U(8 * _BLOCK + q)] += dq * fj


@njit(cache=True, inline="always")
def _plane_slopes(work, q):
    """Slopes ``(a, b)`` of the plane ``d = d_p + c + a i + b j``, 0 where unsupported."""
    n = np.float64(work[q])
    if n < 6.0:
        return np.float32(0.0), np.float32(0.0)
    ok, c, a, b, _ = _solve3(
        n, np.float64(work[_BLOCK + q]), np.float64(work[2 * _BLOCK + q]),
        np.float64(work[3 * _BLOCK + q]), np.float64(work[4 * _BLOCK + q]),
        np.float64(work[5 * _BLOCK + q]), np.float64(work[6 * _BLOCK + q]),
        np.float64(work[7 * _BLOCK + q]), np.float64(work[8 * _BLOCK + q]))
    if not ok:
        return np.float32(0.0), np.float32(0.0)
    # Steeper than one pixel of disparity per pixel is no surface a window can follow.
    return np.float32(min(max(a, -1.0), 1.0)), np.float32(min(max(b, -1.0), 1.0))


@njit(cache=True, fastmath=_FAST)
def _step_sums(left, table, init, y, x0, nb, rx, j0, j1, tol, work, taps, coef):
    """Normal-equation sums of one Gauss-Newton step of pixels ``x0 .. x0 + nb`` (rows 0-9).

    Three loops per window sample: sample positions (vectorised), the table
    reads at them (a gather, which stops the vectoriser, so it is kept apart and
    only copies), then the interpolation and the sums (vectorised).
    """
    W = init.shape[1]
    last = np.float32(W - 2.0)
    work[: 10 * _BLOCK] = 0.0
    fcoef = coef.view(np.float32)
    for j in range(j0, j1 + 1):
        yy = y + j
        srow = init[yy]
        lrow = left[yy]
        trow = table[yy]
        fj = np.float32(j)
        for i in range(-rx, rx + 1):
            fi = np.float32(i)
            qa, qb = max(0, -i - x0), min(nb, W - i - x0)
            for q in range(qa, qb):
                xx = x0 + q + i
                d0 = work[_U(_D0 + q)]
                xr = np.float32(xx) - (d0 + work[_U(_SHIFT + q)] + work[_U(_SLOPE_B + q)] * fj
                                       + work[_U(_SLOPE_A + q)] * fi)
                # Weights 0 or 1 instead of branches keep the loop free of jumps.
                inside = ((abs(srow[_U(xx)] - d0) <= tol) & (xr >= np.float32(1.0))
                          & (xr < last))
                k = min(max(int(xr), 1), W - 3)
                taps[_U(q)] = k
                work[_U(_T + q)] = xr - np.float32(k)
                work[_U(_W + q)] = np.float32(1.0) if inside else np.float32(0.0)
            for q in range(qa, qb):
                coef[_U(q)] = trow[_U(taps[_U(q)])]
            for q in range(qa, qb):
                t = work[_U(_T + q)]
                w = work[_U(_W + q)]
                c0 = fcoef[_U(4 * q)]
                c1 = fcoef[_U(4 * q + 1)]
                c2 = fcoef[_U(4 * q + 2)]
                c3 = fcoef[_U(4 * q + 3)]
                r = (((c3 * t + c2) * t + c1) * t + c0) * w
                g = ((np.float32(3.0) * c3 * t + np.float32(2.0) * c2) * t + c1) * w
                lv = (lrow[_U(x0 + q + i)] - _CENTRE) * w
                work[_U(q)] += w
                work[_U(_BLOCK + q)] += r * r
                work[_U(2 * _BLOCK + q)] += r
                work[_U(3 * _BLOCK + q)] += r * g
                work[_U(4 * _BLOCK + q)] += g
                work[_U(5 * _BLOCK + q)] += g * g
                work[_U(6 * _BLOCK + q)] += lv * r
                work[_U(7 * _BLOCK + q)] += lv
                work[_U(8 * _BLOCK + q)] += lv * g
                work[_U(9 * _BLOCK + q)] += lv * lv


@njit(cache=True, inline="always")
def _step(work, q):
    """Gauss-Newton step and offset variance from the sums of ``_step_sums``; ok False if none."""
    n = np.float64(work[q])
    if n < 8.0:
        return False, 0.0, np.nan
    # The solve in float64: the normal matrix is poorly conditioned where the
    # intensities and their slopes correlate.
    # Left = gain * right + offset + c * slope, linear in (gain, offset, c):
    # gain and offset remove the exposure difference of the two cameras.
    s_lr = np.float64(work[6 * _BLOCK + q])
    s_l = np.float64(work[7 * _BLOCK + q])
    s_lg = np.float64(work[8 * _BLOCK + q])
    ok, gain, offset, c, inv_cc = _solve3(
        np.float64(work[_BLOCK + q]), np.float64(work[2 * _BLOCK + q]),
        np.float64(work[3 * _BLOCK + q]), n, np.float64(work[4 * _BLOCK + q]),
        np.float64(work[5 * _BLOCK + q]), s_lr, s_l, s_lg)
    if not ok or gain <= 0.05:
        return False, 0.0, np.nan
    ssr = np.float64(work[9 * _BLOCK + q]) - (gain * s_lr + offset * s_l + c * s_lg)
    var = max(ssr, 0.0) / max(n - 3.0, 1.0) * inv_cc / (gain * gain)
    return True, -c / gain, var
