"""numba kernels of the organised-cloud operations (see ``organised.py``).

Points of one disparity map sit on the image grid: ``index[row, col]`` holds
the point index of a pixel or -1, so neighbourhoods come from the grid instead
of a k-d tree. Inputs are assumed valid (the public functions check them).
"""

from __future__ import annotations

import numpy as np
from numba import njit, prange


@njit(cache=True, parallel=True)
def mean_neighbour_distance(points, pixels, index, k, radius):
    """Mean distance from each point to its ``k`` nearest points within the window.

    The window is ``(2 radius + 1)²`` pixels around the point's pixel; fewer
    than ``k`` candidates give the mean over what is there; none gives inf.
    """
    n = points.shape[0]
    h, w = index.shape
    out = np.empty(n, np.float64)
    # One buffer of the k nearest per chunk of points, not one per point: the
    # allocation cost more than the distances.
    n_chunks = min(n, 256)
    for chunk in prange(n_chunks):
        best = np.empty(max(k, 1), np.float64)
        for i in range(chunk * n // n_chunks, (chunk + 1) * n // n_chunks):
            m = 0
            col, row = pixels[i, 0], pixels[i, 1]
            px, py, pz = points[i, 0], points[i, 1], points[i, 2]
            for dy in range(-radius, radius + 1):
                r = row + dy
                if r < 0 or r >= h:
                    continue
                for dx in range(-radius, radius + 1):
                    c = col + dx
                    if c < 0 or c >= w or (dx == 0 and dy == 0):
                        continue
                    j = index[r, c]
                    if j < 0:
                        continue
                    ex = points[j, 0] - px
                    ey = points[j, 1] - py
                    ez = points[j, 2] - pz
                    # Squared distances rank the same; roots only for the k kept.
                    d = ex * ex + ey * ey + ez * ez
                    if m == k and best[k - 1] <= d:
                        continue
                    # Insertion into the sorted list of the k nearest so far.
                    p = m if m < k else k - 1
                    while p > 0 and best[p - 1] > d:
                        best[p] = best[p - 1]
                        p -= 1
                    best[p] = d
                    if m < k:
                        m += 1
            if m == 0:
                out[i] = np.inf
            else:
                s = 0.0
                for q in range(m):
                    s += np.sqrt(best[q])
                out[i] = s / m
    return out


@njit(cache=True, parallel=True)
def gradient_normals(points, pixels, index, radius):
    """Unit normals from the mean image-space gradients of position, toward the camera.

    Over the window, the mean of ``P(c+1) − P(c−1)`` along rows and of
    ``P(r+1) − P(r−1)`` along columns span the tangent plane; their cross
    product is the normal. Points without both gradients get ``(0, 0, −1)``.
    """
    n = points.shape[0]
    h, w = index.shape
    out = np.zeros((n, 3), np.float32)
    for i in prange(n):
        col, row = pixels[i, 0], pixels[i, 1]
        ux = uy = uz = 0.0
        vx = vy = vz = 0.0
        nu = 0
        nv = 0
        for dy in range(-radius, radius + 1):
            r = row + dy
            if r < 0 or r >= h:
                continue
            for dx in range(-radius, radius + 1):
                c = col + dx
                if c < 0 or c >= w:
                    continue
                if c - 1 >= 0 and c + 1 < w:
                    a, b = index[r, c - 1], index[r, c + 1]
                    if a >= 0 and b >= 0:
                        ux += points[b, 0] - points[a, 0]
                        uy += points[b, 1] - points[a, 1]
                        uz += points[b, 2] - points[a, 2]
                        nu += 1
                if r - 1 >= 0 and r + 1 < h:
                    a, b = index[r - 1, c], index[r + 1, c]
                    if a >= 0 and b >= 0:
                        vx += points[b, 0] - points[a, 0]
                        vy += points[b, 1] - points[a, 1]
                        vz += points[b, 2] - points[a, 2]
                        nv += 1
        nx = uy * vz - uz * vy
        ny = uz * vx - ux * vz
        nz = ux * vy - uy * vx
        length = np.sqrt(nx * nx + ny * ny + nz * nz)
        if nu == 0 or nv == 0 or length == 0.0:
            out[i, 2] = -1.0
            continue
        # Toward the camera at the origin: n · (−p) >= 0.
        if nx * points[i, 0] + ny * points[i, 1] + nz * points[i, 2] > 0:
            length = -length
        out[i, 0] = nx / length
        out[i, 1] = ny / length
        out[i, 2] = nz / length
    return out
