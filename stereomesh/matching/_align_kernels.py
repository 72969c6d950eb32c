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


@njit(cache=True, inline="always")
def _slant(init, y, x, rx, ry, tol):
    """Least-squares plane ``d = d_p + c + a i + b j`` of the similar neighbours of ``(y, x)``.

    Neighbours within ``tol`` pixels of the centre's disparity are taken as the
    same surface. Returns the slopes ``(a, b)``, zero when too few support them.
    """
    H, W = init.shape
    d0 = init[y, x]
    n = 0.0
    si = 0.0
    sj = 0.0
    sii = 0.0
    sij = 0.0
    sjj = 0.0
    sd = 0.0
    sid = 0.0
    sjd = 0.0
    for j in range(-ry, ry + 1):
        yy = y + j
        if yy < 0 or yy >= H:
            continue
        for i in range(-rx, rx + 1):
            xx = x + i
            if xx < 0 or xx >= W:
                continue
            dq = init[yy, xx] - d0
            if not abs(dq) <= tol:  # also false for NaN
                continue
            n += 1.0
            si += i
            sj += j
            sii += i * i
            sij += i * j
            sjj += j * j
            sd += dq
            sid += i * dq
            sjd += j * dq
    if n < 6.0:
        return 0.0, 0.0
    ok, c, a, b, _ = _solve3(n, si, sj, sii, sij, sjj, sd, sid, sjd)
    if not ok:
        return 0.0, 0.0
    # Steeper than one pixel of disparity per pixel is no surface a window can follow.
    return min(max(a, -1.0), 1.0), min(max(b, -1.0), 1.0)


@njit(cache=True, inline="always")
def _align_pixel(left, table, init, y, x, rx, ry, tol, iterations, max_shift):
    """Gauss-Newton fit of the disparity of ``(y, x)``; see ``align_subpixel_kernel``."""
    H, W = left.shape
    d0 = init[y, x]
    a, b = _slant(init, y, x, rx, ry, tol)
    delta = 0.0
    var = np.nan
    converged = False
    for _ in range(iterations):
        n = np.float32(0.0)
        s_rr = np.float32(0.0)
        s_r = np.float32(0.0)
        s_rg = np.float32(0.0)
        s_g = np.float32(0.0)
        s_gg = np.float32(0.0)
        s_lr = np.float32(0.0)
        s_l = np.float32(0.0)
        s_lg = np.float32(0.0)
        s_ll = np.float32(0.0)
        for j in range(max(-ry, -y), min(ry, H - 1 - y) + 1):
            yy = y + j
            base = x - (d0 + delta + b * j)
            for i in range(max(-rx, -x), min(rx, W - 1 - x) + 1):
                xx = x + i
                # Weights 0 or 1 instead of branches keep the loop free of jumps.
                xr = base + i * (1.0 - a)
                inside = (abs(init[yy, xx] - d0) <= tol) & (xr >= 1.0) & (xr < W - 2.0)
                w = np.float32(1.0) if inside else np.float32(0.0)
                k = min(max(int(xr), 1), W - 3)
                t = np.float32(xr - k)
                c0 = table[yy, k, 0]
                c1 = table[yy, k, 1]
                c2 = table[yy, k, 2]
                c3 = table[yy, k, 3]
                r = (((c3 * t + c2) * t + c1) * t + c0) * w
                g = ((np.float32(3.0) * c3 * t + np.float32(2.0) * c2) * t + c1) * w
                lv = (left[yy, xx] - _CENTRE) * w
                n += w
                s_rr += r * r
                s_r += r
                s_rg += r * g
                s_g += g
                s_gg += g * g
                s_lr += lv * r
                s_l += lv
                s_lg += lv * g
                s_ll += lv * lv
        if n < 8.0:
            return d0, np.nan, False
        # The solve in float64: the normal matrix is poorly conditioned where the
        # intensities and their slopes correlate.
        # Left = gain * right + offset + c * slope, linear in (gain, offset, c):
        # gain and offset remove the exposure difference of the two cameras.
        ok, gain, offset, c, inv_cc = _solve3(
            np.float64(s_rr), np.float64(s_r), np.float64(s_rg), np.float64(n), np.float64(s_g),
            np.float64(s_gg), np.float64(s_lr), np.float64(s_l), np.float64(s_lg))
        if not ok or gain <= 0.05:
            return d0, np.nan, False
        step = -c / gain
        ssr = np.float64(s_ll) - (gain * s_lr + offset * s_l + c * s_lg)
        var = max(ssr, 0.0) / max(np.float64(n) - 3.0, 1.0) * inv_cc / (gain * gain)
        delta += step
        if not abs(delta) <= max_shift:
            return d0, np.nan, False
        if abs(step) < _STOP:
            converged = True
            break
    return d0 + delta, np.sqrt(var), converged


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
    for y in prange(H):
        # prange's index is unsigned: ``-y`` in the window bounds would wrap.
        _align_row(left, table, init, np.int64(y), rx, ry, tol, iterations, max_shift, out,
                   sigma, converged)
    return out, sigma, converged


@njit(cache=True, fastmath={"reassoc", "contract", "nsz", "arcp"})
def _align_row(left, table, init, y, rx, ry, tol, iterations, max_shift, out, sigma, converged):
    """One row of ``align_subpixel_kernel`` (array-taking helpers are called once per row)."""
    W = init.shape[1]
    for x in range(W):
        if not init[y, x] == init[y, x]:
            out[y, x] = np.nan
            sigma[y, x] = np.nan
            continue
        d, s, ok = _align_pixel(left, table, init, y, x, rx, ry, tol, iterations, max_shift)
        out[y, x] = d
        sigma[y, x] = s
        converged[y, x] = ok
