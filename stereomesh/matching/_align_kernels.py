"""numba kernels of the sub-pixel alignment stage (see :mod:`stereomesh.matching.refine`).

Kept apart from ``_kernels.py`` so that numba's per-file cache of the other
kernels stays valid when these change. Inputs are C-contiguous float32 and
unchecked; :func:`stereomesh.matching.refine.align_subpixel` validates them.
"""

from __future__ import annotations

import numpy as np
from numba import njit, prange


@njit(cache=True, inline="always")
def _cubic(row, xr):
    """Value and derivative at ``xr`` of the Keys (a = -1/2) cubic interpolant of ``row``.

    The caller guarantees ``1 <= xr < len(row) - 2``. Cubic rather than linear
    interpolation because a linear interpolant's smoothing varies with the
    fractional position, which pulls the fit toward whole pixels.
    """
    i = int(xr)
    t = xr - i
    t2 = t * t
    t3 = t2 * t
    a = row[i - 1]
    b = row[i]
    c = row[i + 1]
    d = row[i + 2]
    value = (a * (-0.5 * t3 + t2 - 0.5 * t) + b * (1.5 * t3 - 2.5 * t2 + 1.0)
             + c * (-1.5 * t3 + 2.0 * t2 + 0.5 * t) + d * (0.5 * t3 - 0.5 * t2))
    slope = (a * (-1.5 * t2 + 2.0 * t - 0.5) + b * (4.5 * t2 - 5.0 * t)
             + c * (-4.5 * t2 + 4.0 * t + 0.5) + d * (1.5 * t2 - t))
    return value, slope


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
def _align_pixel(left, right, init, y, x, rx, ry, tol, iterations, max_shift):
    """Gauss-Newton fit of the disparity of ``(y, x)``; see ``align_subpixel_kernel``."""
    H, W = left.shape
    d0 = init[y, x]
    a, b = _slant(init, y, x, rx, ry, tol)
    delta = 0.0
    var = np.nan
    converged = False
    for _ in range(iterations):
        n = 0.0
        s_rr = 0.0
        s_r = 0.0
        s_rg = 0.0
        s_g = 0.0
        s_gg = 0.0
        s_lr = 0.0
        s_l = 0.0
        s_lg = 0.0
        s_ll = 0.0
        for j in range(-ry, ry + 1):
            yy = y + j
            if yy < 0 or yy >= H:
                continue
            for i in range(-rx, rx + 1):
                xx = x + i
                if xx < 0 or xx >= W:
                    continue
                if not abs(init[yy, xx] - d0) <= tol:
                    continue
                xr = xx - (d0 + delta + a * i + b * j)
                if xr < 1.0 or xr >= W - 2.0:
                    continue
                r, g = _cubic(right[yy], xr)
                lv = left[yy, xx]
                n += 1.0
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
        # Left = gain * right + offset + c * slope, linear in (gain, offset, c):
        # gain and offset remove the exposure difference of the two cameras.
        ok, gain, offset, c, inv_cc = _solve3(s_rr, s_r, s_rg, n, s_g, s_gg, s_lr, s_l, s_lg)
        if not ok or gain <= 0.05:
            return d0, np.nan, False
        step = -c / gain
        ssr = s_ll - (gain * s_lr + offset * s_l + c * s_lg)
        var = max(ssr, 0.0) / max(n - 3.0, 1.0) * inv_cc / (gain * gain)
        delta += step
        if not abs(delta) <= max_shift:
            return d0, np.nan, False
        if abs(step) < 1e-3:
            converged = True
            break
    return d0 + delta, np.sqrt(var), converged


@njit(cache=True, parallel=True)
def align_subpixel_kernel(left, right, init, rx, ry, tol, iterations, max_shift):
    """Disparity, its Gauss-Newton standard deviation and a converged flag per pixel.

    For every finite ``init`` pixel: the slopes of the disparity plane from
    its similar neighbours, then ``iterations`` Gauss-Newton steps on the
    offset, matching the left window against the right image sampled (cubic
    interpolation along the row) at ``x - d(i, j)`` with gain and offset. NaN
    pixels stay NaN; pixels whose fit fails keep ``init`` with a NaN sigma.
    """
    H, W = init.shape
    out = np.empty((H, W), np.float32)
    sigma = np.empty((H, W), np.float32)
    converged = np.zeros((H, W), np.bool_)
    for y in prange(H):
        for x in range(W):
            if not init[y, x] == init[y, x]:
                out[y, x] = np.nan
                sigma[y, x] = np.nan
                continue
            d, s, ok = _align_pixel(left, right, init, y, x, rx, ry, tol, iterations, max_shift)
            out[y, x] = d
            sigma[y, x] = s
            converged[y, x] = ok
    return out, sigma, converged
