"""numba kernels of the organised-cloud operations (see ``organised.py``).

Points of one disparity map sit on the image grid: ``index[row, col]`` holds
the point index of a pixel or -1, so neighbourhoods come from the grid instead
of a k-d tree. Inputs are assumed valid (the public functions check them).
"""

from __future__ import annotations

import numpy as np
from numba import njit, prange

from stereomesh._parallel import prange_only


@njit(cache=True, parallel=prange_only())
def mean_neighbour_distance(points, pixels, index, k, radius):
    """Mean distance from each point to its ``k`` nearest points within the window.

    The window is ``(2 radius + 1)²`` pixels around the point's pixel; fewer
    than ``k`` candidates give the mean over what is there; none gives inf.
    """
    n = points.shape[0]
    h, w = index.shape
    side = 2 * radius + 1
    # Candidates are visited nearest pixel first: on a surface the first k are
    # nearly always the k nearest in space, so each later one is turned away by
    # a single comparison with the largest kept (a raster order replaced most of
    # them).
    n_off = side * side - 1
    ring = np.empty(n_off, np.int64)
    off_row = np.empty(n_off, np.int64)
    off_col = np.empty(n_off, np.int64)
    q = 0
    for dy in range(-radius, radius + 1):
        for dx in range(-radius, radius + 1):
            if dx != 0 or dy != 0:
                # Insertion by ring, ties in raster order (a stable sort of a few
                # dozen offsets; numba's argsort took 1.8 s to compile).
                d2 = dx * dx + dy * dy
                j = q
                while j > 0 and ring[j - 1] > d2:
                    ring[j], off_row[j], off_col[j] = ring[j - 1], off_row[j - 1], off_col[j - 1]
                    j -= 1
                ring[j], off_row[j], off_col[j] = d2, dy, dx
                q += 1
    out = np.empty(n, np.float64)
    # One buffer per chunk of points, not one per point: the allocation cost
    # more than the distances.
    n_chunks = min(n, 256)
    for chunk in prange(n_chunks):
        nearest = np.empty(max(k, 1), np.float64)  # squared distances of the k kept
        for i in range(chunk * n // n_chunks, (chunk + 1) * n // n_chunks):
            col, row = pixels[i, 0], pixels[i, 1]
            px, py, pz = points[i, 0], points[i, 1], points[i, 2]
            inside = radius <= row < h - radius and radius <= col < w - radius
            m = 0
            worst = 0.0
            at = 0
            for q in range(n_off):
                r = row + off_row[q]
                c = col + off_col[q]
                if not inside and (r < 0 or r >= h or c < 0 or c >= w):
                    continue
                j = index[r, c]
                if j < 0:
                    continue
                ex = points[j, 0] - px
                ey = points[j, 1] - py
                ez = points[j, 2] - pz
                d = ex * ex + ey * ey + ez * ez
                if m < k:
                    nearest[m] = d
                    m += 1
                    if m < k:
                        continue
                elif d < worst:
                    nearest[at] = d
                else:
                    continue
                # The k kept are unordered: only the largest, which a nearer
                # candidate replaces, is tracked (no sorted insertion's shifts
                # and unpredictable branches; 0.29 -> 0.16 s on the demo cloud).
                worst = nearest[0]
                at = 0
                for p in range(1, k):
                    if nearest[p] > worst:
                        worst = nearest[p]
                        at = p
            if m == 0:
                out[i] = np.inf
                continue
            s = 0.0
            for q in range(m):
                s += np.sqrt(nearest[q])
            out[i] = s / m
    return out


@njit(cache=True, parallel=prange_only())
def gradient_normals(points, pixels, index, radius):
    """Unit normals from the mean image-space gradients of position, toward the camera.

    Over the window, the mean of ``P(c+1) − P(c−1)`` along rows and of
    ``P(r+1) − P(r−1)`` along columns span the tangent plane; their cross
    product is the normal. Points without both gradients get ``(0, 0, −1)``.

    The window sums are box sums of the two gradient fields: per image row,
    the sums over the window's rows are formed once per column, then each
    point adds ``2 radius + 1`` of them, instead of visiting its whole window
    (``organised._grid_normals_reference`` does that, for the tests).
    """
    n = points.shape[0]
    h, w = index.shape
    out = np.zeros((n, 3), np.float32)
    for r_ in prange(h):
        r = np.int64(r_)  # prange's index is unsigned
        # Per column: sums of the row gradient (0-2), its count (3), of the column
        # gradient (4-6) and its count (7), over the window's rows.
        col = np.zeros((w, 8))
        for rr in range(max(r - radius, 0), min(r + radius, h - 1) + 1):
            for c in range(1, w - 1):
                a, b = index[rr, c - 1], index[rr, c + 1]
                if a >= 0 and b >= 0:
                    col[c, 0] += points[b, 0] - points[a, 0]
                    col[c, 1] += points[b, 1] - points[a, 1]
                    col[c, 2] += points[b, 2] - points[a, 2]
                    col[c, 3] += 1.0
            if 1 <= rr < h - 1:
                for c in range(w):
                    a, b = index[rr - 1, c], index[rr + 1, c]
                    if a >= 0 and b >= 0:
                        col[c, 4] += points[b, 0] - points[a, 0]
                        col[c, 5] += points[b, 1] - points[a, 1]
                        col[c, 6] += points[b, 2] - points[a, 2]
                        col[c, 7] += 1.0
        for c in range(w):
            i = index[r, c]
            if i < 0:
                continue
            ux = uy = uz = nu = 0.0
            vx = vy = vz = nv = 0.0
            for cc in range(max(c - radius, 0), min(c + radius, w - 1) + 1):
                ux += col[cc, 0]
                uy += col[cc, 1]
                uz += col[cc, 2]
                nu += col[cc, 3]
                vx += col[cc, 4]
                vy += col[cc, 5]
                vz += col[cc, 6]
                nv += col[cc, 7]
            nx = uy * vz - uz * vy
            ny = uz * vx - ux * vz
            nz = ux * vy - uy * vx
            length = np.sqrt(nx * nx + ny * ny + nz * nz)
            if nu == 0.0 or nv == 0.0 or length == 0.0:
                out[i, 2] = -1.0
                continue
            # Toward the camera at the origin: n · (−p) >= 0.
            if nx * points[i, 0] + ny * points[i, 1] + nz * points[i, 2] > 0:
                length = -length
            out[i, 0] = nx / length
            out[i, 1] = ny / length
            out[i, 2] = nz / length
    return out


# --- the grid mesh ---------------------------------------------------------------
# A block is the 2x2 pixels (r, c), (r, c+1), (r+1, c), (r+1, c+1): corners a, b,
# c, e. Its triangles, by bit of the block code: 0 = a c e, 1 = a e b, 2 = a c b,
# 3 = b c e. Corner offsets (row, col) of each triangle, in winding order. In
# (col, row) pixel coordinates every one has negative signed area; with y down
# and z forward that makes its 3-D normal face the camera, and projection keeps
# this for any surface in front of the camera.
_TRIANGLE_CORNERS = np.array(
    [[[0, 0], [1, 0], [1, 1]],
     [[0, 0], [1, 1], [0, 1]],
     [[0, 0], [1, 0], [0, 1]],
     [[0, 1], [1, 0], [1, 1]]], np.int64)


@njit(cache=True)
def _corner_xyz(z, cols, rows, r, c):
    zz = z[r, c]
    return zz * cols[c], zz * rows[r], zz


@njit(cache=True)
def _triangle_normal(z, cols, rows, r, c, t):
    """Un-normalised normal (twice the area) of triangle ``t`` of block ``(r, c)``, float32."""
    k = _TRIANGLE_CORNERS
    x0, y0, z0 = _corner_xyz(z, cols, rows, r + k[t, 0, 0], c + k[t, 0, 1])
    x1, y1, z1 = _corner_xyz(z, cols, rows, r + k[t, 1, 0], c + k[t, 1, 1])
    x2, y2, z2 = _corner_xyz(z, cols, rows, r + k[t, 2, 0], c + k[t, 2, 1])
    ax, ay, az = x1 - x0, y1 - y0, z1 - z0
    bx, by, bz = x2 - x0, y2 - y0, z2 - z0
    return ay * bz - az * by, az * bx - ax * bz, ax * by - ay * bx


@njit(cache=True, parallel=prange_only())
def grid_triangles(z, valid, cols, rows, limit):
    """Triangles kept in each 2x2 block of the grid, as a bit code per block.

    ``z`` (H, W) float32 depth (any value where not ``valid``), ``cols`` (W,)
    and ``rows`` (H,) float32 the ray slopes ``(u - cx)/f`` and ``(v - cy)/f``;
    a triangle is kept when ``max(Z) <= min(Z) * limit`` over its corners.
    Four valid corners are split along the shorter 3-D diagonal (``a e`` on a
    tie), three give their one triangle. Returns ``(H-1, W-1)`` uint8.
    """
    h, w = z.shape
    code = np.zeros((max(h - 1, 0), max(w - 1, 0)), np.uint8)
    for r_ in prange(h - 1):
        # prange's index is unsigned: the helpers would be compiled again for it.
        r = np.int64(r_)
        for c in range(w - 1):
            va, vb = valid[r, c], valid[r, c + 1]
            vc, ve = valid[r + 1, c], valid[r + 1, c + 1]
            n = np.int64(va) + np.int64(vb) + np.int64(vc) + np.int64(ve)
            if n < 3:
                continue
            if n == 4:
                xa, ya, za = _corner_xyz(z, cols, rows, r, c)
                xb, yb, zb = _corner_xyz(z, cols, rows, r, c + 1)
                xc, yc, zc = _corner_xyz(z, cols, rows, r + 1, c)
                xe, ye, ze = _corner_xyz(z, cols, rows, r + 1, c + 1)
                dx, dy, dz = xe - xa, ye - ya, ze - za
                ae = dx * dx
                ae += dy * dy
                ae += dz * dz
                dx, dy, dz = xc - xb, yc - yb, zc - zb
                bc = dx * dx
                bc += dy * dy
                bc += dz * dz
                candidates = 0b0011 if ae <= bc else 0b1100
            elif not vb:
                candidates = 0b0001
            elif not vc:
                candidates = 0b0010
            elif not ve:
                candidates = 0b0100
            else:
                candidates = 0b1000
            kept = 0
            for t in range(4):
                if not (candidates >> t) & 1:
                    continue
                z0 = z[r + _TRIANGLE_CORNERS[t, 0, 0], c + _TRIANGLE_CORNERS[t, 0, 1]]
                z1 = z[r + _TRIANGLE_CORNERS[t, 1, 0], c + _TRIANGLE_CORNERS[t, 1, 1]]
                z2 = z[r + _TRIANGLE_CORNERS[t, 2, 0], c + _TRIANGLE_CORNERS[t, 2, 1]]
                if max(max(z0, z1), z2) <= min(min(z0, z1), z2) * limit:
                    kept |= 1 << t
            code[r, c] = kept
    return code


@njit(cache=True)
def _kept_at_corner(code, r, c, t, k):
    """Whether pixel ``(r, c)`` is corner ``k`` of a kept triangle ``t``, and that block.

    Corner ``k`` of block ``(br, bc)`` sits at offset ``(dr, dc)``, so pixel
    ``(r, c)`` is that corner of block ``(r - dr, c - dc)``.
    """
    br = r - _TRIANGLE_CORNERS[t, k, 0]
    bc = c - _TRIANGLE_CORNERS[t, k, 1]
    if br < 0 or bc < 0 or br >= code.shape[0] or bc >= code.shape[1]:
        return False, br, bc
    return (code[br, bc] >> t) & 1 != 0, br, bc


@njit(cache=True, parallel=prange_only())
def grid_vertices(code, z, cols, rows):
    """Vertex ids (-1 where no kept triangle uses the pixel) and summed face normals.

    The ids number used pixels in row-major order. Each vertex's normal is the
    float32 sum of its triangles' un-normalised normals, added triangle type by
    type and corner by corner, the order of the array version it is checked
    against, so the two agree to the last bit.
    """
    h, w = z.shape
    used = np.zeros((h, w), np.bool_)
    for r_ in prange(h):
        r = np.int64(r_)  # unsigned prange index: see grid_triangles
        for c in range(w):
            hit = False
            for t in range(4):
                for k in range(3):
                    if _kept_at_corner(code, r, c, t, k)[0]:
                        hit = True
            used[r, c] = hit
    row_start = np.zeros(h + 1, np.int64)
    for r in range(h):
        row_start[r + 1] = row_start[r] + used[r].sum()
    vid = np.full((h, w), -1, np.int32)
    normals = np.zeros((row_start[h], 3), np.float32)
    for r_ in prange(h):
        r = np.int64(r_)
        i = row_start[r]
        for c in range(w):
            if not used[r, c]:
                continue
            vid[r, c] = i
            nx, ny, nz = np.float32(0), np.float32(0), np.float32(0)
            for t in range(4):
                for k in range(3):
                    kept, br, bc = _kept_at_corner(code, r, c, t, k)
                    if kept:
                        ax, ay, az = _triangle_normal(z, cols, rows, br, bc, t)
                        nx += ax
                        ny += ay
                        nz += az
            normals[i, 0], normals[i, 1], normals[i, 2] = nx, ny, nz
            i += 1
    return vid, normals


@njit(cache=True, parallel=prange_only())
def grid_faces(code, vid):
    """Faces ``(F, 3)`` int32 of the block codes: blocks in row-major order, types 0-3 in each."""
    hb, wb = code.shape
    row_start = np.zeros(hb + 1, np.int64)
    for r in range(hb):
        count = 0
        for c in range(wb):
            bits = code[r, c]
            while bits:
                count += bits & 1
                bits >>= 1
        row_start[r + 1] = row_start[r] + count
    faces = np.empty((row_start[hb], 3), np.int32)
    for r in prange(hb):
        i = row_start[r]
        for c in range(wb):
            bits = code[r, c]
            for t in range(4):
                if (bits >> t) & 1:
                    for k in range(3):
                        faces[i, k] = vid[r + _TRIANGLE_CORNERS[t, k, 0],
                                          c + _TRIANGLE_CORNERS[t, k, 1]]
                    i += 1
    return faces


@njit(cache=True)
def _find(parent, i):
    while parent[i] != i:
        parent[i] = parent[parent[i]]  # path halving
        i = parent[i]
    return i


@njit(cache=True)
def invalid_components(valid):
    """8-connected components of the pixels where ``valid`` is False.

    Returns ``(labels (H, W) int32, n)``: 0 on valid pixels, components
    numbered 1..n in the raster order of their first pixel (as SciPy's
    ``ndimage.label`` numbers them). Two raster passes with union-find; serial,
    since each pixel joins the ones above and to its left.
    """
    h, w = valid.shape
    provisional = np.zeros((h, w), np.int32)
    parent = np.zeros(h * w // 2 + 2, np.int32)
    n_prov = 0
    for r in range(h):
        for c in range(w):
            if valid[r, c]:
                continue
            label = 0
            # Already-visited neighbours: left, and the three above.
            for dr, dc in ((0, -1), (-1, -1), (-1, 0), (-1, 1)):
                rr, cc = r + dr, c + dc
                if rr < 0 or cc < 0 or cc >= w:
                    continue
                other = provisional[rr, cc]
                if other == 0:
                    continue
                if label == 0:
                    label = _find(parent, np.int64(other))
                else:
                    a, b = _find(parent, np.int64(label)), _find(parent, np.int64(other))
                    if a != b:
                        parent[max(a, b)] = min(a, b)
                        label = min(a, b)
            if label == 0:
                n_prov += 1
                if n_prov >= parent.shape[0]:
                    grown = np.zeros(2 * parent.shape[0], np.int32)
                    for i in range(parent.shape[0]):  # a slice copy compiles seconds of error text
                        grown[i] = parent[i]
                    parent = grown
                parent[n_prov] = n_prov
                label = n_prov
            provisional[r, c] = label
    final = np.zeros(n_prov + 1, np.int32)
    n = 0
    labels = np.zeros((h, w), np.int32)
    for r in range(h):
        for c in range(w):
            p = provisional[r, c]
            if p == 0:
                continue
            root = _find(parent, np.int64(p))
            if final[root] == 0:
                n += 1
                final[root] = n
            labels[r, c] = final[root]
    return labels, n
