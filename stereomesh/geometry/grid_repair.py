"""Repair of meshes built on the image grid, done in pixel space.

A grid mesh (:func:`~stereomesh.geometry.surface.depth_grid_mesh`) has one
vertex per pixel, so its holes are the connected components of the pixels
without a vertex, and its parts are found on the face graph. No k-d tree, no
general mesh topology and no non-manifold edges are involved: each edge of the
grid is shared by at most the two blocks on either side of it.

A hole is filled only if it is small (``max_hole_edges``), surrounded by
measured pixels on every side (it does not reach the image border) and its
surround lies on one plane to within ``max_depth_jump`` of relative depth, so a
gap between a foreground object and the background behind it is never bridged.
The fill is the harmonic interpolation of the surrounding disparities, which
reproduces any plane exactly (disparity is affine in the pixel coordinates on
a 3-D plane, and affine functions are harmonic).

General meshes (screened Poisson output, a mesh the editor sends) are repaired
by :func:`stereomesh.geometry.repair.repair_mesh`, the reference these
functions are tested against.
"""

from __future__ import annotations

import numpy as np

from stereomesh.geometry.data import TriMesh, take_rows

__all__ = ["coarser_grid_mesh", "fill_small_holes", "find_small_holes", "grid_maps",
           "pixel_maps", "repair_grid_mesh"]

# The four edge neighbours (row, col).
_EDGE_NEIGHBOURS = ((-1, 0), (1, 0), (0, -1), (0, 1))


def _hole_labels(valid: np.ndarray) -> tuple[np.ndarray, int]:
    """Label the 8-connected components of invalid pixels.

    Diagonal contact joins holes because the 2×2 block the two pixels share has
    at most two valid corners and so no triangle: in the mesh they are one gap.
    """
    from stereomesh.geometry._grid_kernels import invalid_components

    labels, n = invalid_components(np.ascontiguousarray(valid, np.bool_))
    return labels, int(n)


def _hole_labels_reference(valid: np.ndarray) -> tuple[np.ndarray, int]:
    """:func:`_hole_labels` by SciPy's ``ndimage.label`` (for the tests)."""
    from scipy import ndimage

    labels, n = ndimage.label(~valid, structure=np.ones((3, 3), bool))
    return labels, int(n)


def _surround(labels: np.ndarray, valid: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(label, flat pixel index) of every valid pixel edge-adjacent to a hole, once each."""
    h, w = labels.shape
    keys = []
    for dr, dc in _EDGE_NEIGHBOURS:
        # Pixel p (valid) at [r, c]; its neighbour q at [r + dr, c + dc].
        p_rows = slice(max(0, -dr), h - max(0, dr))
        p_cols = slice(max(0, -dc), w - max(0, dc))
        q_rows = slice(max(0, dr), h + min(0, dr))
        q_cols = slice(max(0, dc), w + min(0, dc))
        lab = labels[q_rows, q_cols]
        hit = valid[p_rows, p_cols] & (lab > 0)
        rr, cc = np.nonzero(hit)
        flat = (rr + p_rows.start) * w + (cc + p_cols.start)
        keys.append(lab[hit].astype(np.int64) * (h * w) + flat)
    key = np.unique(np.concatenate(keys))
    return key // (h * w), key % (h * w)


def find_small_holes(
    disparity: np.ndarray,
    max_hole_edges: int = 30,
    max_depth_jump: float = 0.03,
) -> tuple[np.ndarray, np.ndarray]:
    """Holes of a disparity map small and flat enough to be filled.

    Parameters
    ----------
    disparity : (H, W) float array
        Disparity in pixels, NaN (or <= 0) where there is no measurement.
    max_hole_edges : int
        Largest hole, counted as the measured pixels edge-adjacent to it: the
        length of the boundary loop the hole leaves in a grid mesh (a missing
        k × k square leaves a loop of 4k edges).
    max_depth_jump : float
        Largest relative deviation of a surrounding disparity from the plane
        fitted to all of them; beyond it the hole is a depth discontinuity.

    Returns
    -------
    labels : (H, W) int32 array
        Hole number of every invalid pixel (8-connected components), 0 on
        measured pixels.
    fillable : (n_holes + 1,) bool array
        ``fillable[k]`` says whether hole ``k`` may be filled (index 0 is unused).

    Examples
    --------
    >>> import numpy as np
    >>> d = np.full((7, 7), 10.0)
    >>> d[3, 3] = np.nan
    >>> labels, ok = find_small_holes(d)
    >>> int(labels[3, 3]), bool(ok[1])
    (1, True)
    """
    d = np.asarray(disparity, np.float64)
    if d.ndim != 2:
        raise ValueError(f"disparity must be 2-D, got shape {d.shape}")
    valid = np.isfinite(d) & (d > 0)
    labels, n = _hole_labels(valid)
    fillable = np.zeros(n + 1, bool)
    if n == 0 or max_hole_edges < 3:
        return labels.astype(np.int32), fillable
    h, w = d.shape
    border = np.unique(np.concatenate([labels[0], labels[-1], labels[:, 0], labels[:, -1]]))
    lab, flat = _surround(labels, valid)
    count = np.bincount(lab, minlength=n + 1)
    rows, cols = (flat // w).astype(np.float64), (flat % w).astype(np.float64)
    vals = d.ravel()[flat]
    # Plane d = a·col + b·row + c per hole, in coordinates centred on its
    # surround (well conditioned at any image size).
    safe = np.maximum(count, 1)
    mr = np.bincount(lab, rows, n + 1) / safe
    mc = np.bincount(lab, cols, n + 1) / safe
    u, v = cols - mc[lab], rows - mr[lab]

    def total(x):
        return np.bincount(lab, x, n + 1)

    normal = np.empty((n + 1, 3, 3))
    normal[:, 0, 0], normal[:, 0, 1], normal[:, 0, 2] = total(u * u), total(u * v), total(u)
    normal[:, 1, 1], normal[:, 1, 2], normal[:, 2, 2] = total(v * v), total(v), count
    normal[:, 1, 0], normal[:, 2, 0], normal[:, 2, 1] = normal[:, 0, 1], normal[:, 0, 2], \
        normal[:, 1, 2]
    rhs = np.stack([total(u * vals), total(v * vals), total(vals)], axis=1)
    # A hole away from the border is enclosed by its surround, so the surround
    # spans the plane; the determinant test only guards degenerate cases.
    det = np.linalg.det(normal)
    solvable = det > 1e-9 * np.maximum(count, 1.0) ** 3
    normal[~solvable] = np.eye(3)
    coef = np.linalg.solve(normal, rhs[..., None])[..., 0]
    plane = coef[lab, 0] * u + coef[lab, 1] * v + coef[lab, 2]
    deviation = np.abs(vals - plane) / np.maximum(np.abs(plane), 1e-12)
    worst = np.zeros(n + 1)
    np.maximum.at(worst, lab, deviation)
    fillable = (count >= 3) & (count <= max_hole_edges) & solvable & (worst <= max_depth_jump)
    fillable[border] = False
    fillable[0] = False
    return labels.astype(np.int32), fillable


def _harmonic_fill(values: np.ndarray, hole: np.ndarray) -> np.ndarray:
    """Solve the 5-point Laplace equation on ``hole`` with ``values`` fixed around it.

    Every pixel of ``hole`` must have its four edge neighbours inside the image,
    each either in ``hole`` or with a finite value.
    """
    h, w = values.shape
    idx = np.flatnonzero(hole.ravel())
    n = len(idx)
    out = values.astype(np.float64, copy=True)
    if n == 0:
        return out
    unknown = np.full(h * w, -1, np.int64)
    unknown[idx] = np.arange(n)
    flat_vals = out.ravel()
    # Each unknown's four neighbours as unknown numbers; n stands for a known
    # neighbour, whose value goes to the right-hand side instead.
    neighbours = np.empty((4, n), np.int64)
    rhs = np.zeros(n)
    for k, (dr, dc) in enumerate(_EDGE_NEIGHBOURS):
        nb = idx + dr * w + dc
        j = unknown[nb]
        inside = j >= 0
        neighbours[k] = np.where(inside, j, n)
        rhs[~inside] += flat_vals[nb[~inside]]
    solution = _laplace_cg(neighbours, rhs)
    if solution is None:  # not converged (a long, thin hole): the direct solver
        solution = _laplace_direct(neighbours, rhs)
    flat_vals[idx] = solution
    return out


def _laplace_cg(neighbours: np.ndarray, rhs: np.ndarray, tol: float = 1e-12):
    """Conjugate gradients on ``4 x_i - sum of x over i's unknown neighbours = rhs_i``.

    The matrix is the Dirichlet Laplacian of the holes: symmetric, positive
    definite (each hole touches known pixels) and block diagonal, one small
    block a hole, so CG converges in a few dozen matrix-free steps. In numpy:
    the sparse direct solver would import ``scipy.sparse`` (0.2-0.3 s of every
    command) for a millisecond's solve. Returns None if the relative residual
    has not reached ``tol`` within the step budget.
    """
    n = len(rhs)
    padded = np.zeros(n + 1)  # the last entry stays 0: the known neighbours

    def laplacian(v):
        padded[:n] = v
        gathered = padded[neighbours]
        return 4.0 * v - (gathered[0] + gathered[1] + gathered[2] + gathered[3])

    x = rhs / 4.0
    r = rhs - laplacian(x)
    p = r.copy()
    rr = float(r @ r)
    stop = tol * tol * max(float(rhs @ rhs), 1e-300)
    for _ in range(min(n, 40 * int(np.sqrt(n)) + 200)):
        if rr <= stop:
            return x
        q = laplacian(p)
        alpha = rr / float(p @ q)
        x += alpha * p
        r -= alpha * q
        rr, rr_old = float(r @ r), rr
        p = r + (rr / rr_old) * p
    return x if rr <= stop else None


def _laplace_direct(neighbours: np.ndarray, rhs: np.ndarray) -> np.ndarray:
    """The same system by scipy's sparse direct solver."""
    from scipy.sparse import coo_matrix
    from scipy.sparse.linalg import spsolve

    n = len(rhs)
    rows = [np.arange(n)] + [np.flatnonzero(nb < n) for nb in neighbours]
    cols = [np.arange(n)] + [nb[nb < n] for nb in neighbours]
    data = [np.full(n, 4.0)] + [np.full(len(c), -1.0) for c in cols[1:]]
    a = coo_matrix((np.concatenate(data), (np.concatenate(rows), np.concatenate(cols))),
                   shape=(n, n)).tocsc()
    return spsolve(a, rhs)


def fill_small_holes(
    disparity: np.ndarray,
    max_hole_edges: int = 30,
    max_depth_jump: float = 0.03,
) -> tuple[np.ndarray, np.ndarray, int]:
    """Fill the small, flat-surrounded holes of a disparity map.

    Parameters
    ----------
    disparity : (H, W) float array
        Disparity in pixels, NaN where there is no measurement.
    max_hole_edges, max_depth_jump
        As in :func:`find_small_holes`.

    Returns
    -------
    filled_disparity : (H, W) float32 array
        The input with the accepted holes filled by harmonic interpolation of
        the disparities around them; other invalid pixels stay NaN.
    filled : (H, W) bool array
        The pixels filled.
    n_holes : int
        The number of holes filled.

    Examples
    --------
    >>> import numpy as np
    >>> cols = np.arange(9.0)
    >>> d = np.tile(20.0 + 0.5 * cols, (9, 1))    # a slanted plane
    >>> d[3:6, 3:6] = np.nan
    >>> out, filled, n = fill_small_holes(d)
    >>> n, int(filled.sum()), round(float(out[4, 4]), 4)
    (1, 9, 22.0)
    """
    labels, fillable = find_small_holes(disparity, max_hole_edges, max_depth_jump)
    out, filled = _fill_holes(disparity, fillable[labels])
    return out, filled, int(fillable.sum())


def _fill_holes(disparity: np.ndarray, hole: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Harmonic fill of ``hole``; a fill that is not a positive disparity stays NaN."""
    out = _harmonic_fill(np.asarray(disparity, np.float64), hole)
    bad = hole & ~(out > 0)
    out[bad] = np.nan
    return out.astype(np.float32), hole & ~bad


def fill_small_holes_reference(
    disparity: np.ndarray,
    max_hole_edges: int = 30,
    max_depth_jump: float = 0.03,
) -> tuple[np.ndarray, np.ndarray, int]:
    """Slow reference of :func:`fill_small_holes`: one hole at a time, dense algebra.

    Flood fill by breadth-first search, surround by scanning, plane by
    least squares, fill by a dense solve of the Laplace equation. For the tests.
    """
    from collections import deque

    d = np.asarray(disparity, np.float64)
    h, w = d.shape
    valid = np.isfinite(d) & (d > 0)
    seen = np.zeros((h, w), bool)
    out = d.copy()
    filled = np.zeros((h, w), bool)
    n_holes = 0
    for r0 in range(h):
        for c0 in range(w):
            if valid[r0, c0] or seen[r0, c0]:
                continue
            comp = []
            queue = deque([(r0, c0)])
            seen[r0, c0] = True
            while queue:
                r, c = queue.popleft()
                comp.append((r, c))
                for dr in (-1, 0, 1):
                    for dc in (-1, 0, 1):
                        rr, cc = r + dr, c + dc
                        if 0 <= rr < h and 0 <= cc < w and not valid[rr, cc] \
                                and not seen[rr, cc]:
                            seen[rr, cc] = True
                            queue.append((rr, cc))
            if any(r in (0, h - 1) or c in (0, w - 1) for r, c in comp):
                continue
            ring = sorted({(r + dr, c + dc) for r, c in comp for dr, dc in _EDGE_NEIGHBOURS
                           if valid[r + dr, c + dc]})
            if not 3 <= len(ring) <= max_hole_edges:
                continue
            rr = np.array([p[0] for p in ring], float)
            cc = np.array([p[1] for p in ring], float)
            vals = d[rr.astype(int), cc.astype(int)]
            design = np.stack([cc, rr, np.ones_like(cc)], axis=1)
            coef, *_ = np.linalg.lstsq(design, vals, rcond=None)
            plane = design @ coef
            if np.max(np.abs(vals - plane) / np.abs(plane)) > max_depth_jump:
                continue
            index = {p: k for k, p in enumerate(comp)}
            a = np.zeros((len(comp), len(comp)))
            b = np.zeros(len(comp))
            for k, (r, c) in enumerate(comp):
                a[k, k] = 4.0
                for dr, dc in _EDGE_NEIGHBOURS:
                    q = (r + dr, c + dc)
                    if q in index:
                        a[k, index[q]] = -1.0
                    else:
                        b[k] += d[q]
            x = np.linalg.solve(a, b)
            for k, (r, c) in enumerate(comp):
                out[r, c] = x[k]
                filled[r, c] = True
            n_holes += 1
    return out.astype(np.float32), filled, n_holes


def _keep_faces(mesh: TriMesh, keep: np.ndarray) -> TriMesh:
    """The mesh with only the faces ``keep`` selects and the vertices they use."""
    from stereomesh.geometry._mesh_kernels import kept_faces

    faces, used = kept_faces(np.ascontiguousarray(mesh.faces), np.ascontiguousarray(keep, bool),
                             len(mesh.vertices))

    index = np.flatnonzero(used)

    def pick(a):
        return take_rows(a, index)

    return TriMesh(
        vertices=pick(mesh.vertices),
        faces=faces,
        colors=pick(mesh.colors),
        confidence=pick(mesh.confidence),
        sigma_z=pick(mesh.sigma_z),
        filled=pick(mesh.filled),
        normals=pick(mesh.normals),
        uv=pick(mesh.uv),
        pixels=pick(mesh.pixels),
    )


def _keep_faces_reference(faces: np.ndarray, keep: np.ndarray, n_vertices: int):
    """Array version of :func:`~stereomesh.geometry._mesh_kernels.kept_faces` (for the tests)."""
    faces = np.asarray(faces)[keep]
    used = np.zeros(n_vertices, bool)
    used[faces.ravel()] = True
    new_id = np.cumsum(used) - 1
    return new_id[faces].astype(np.int32), used


def pixel_maps(pixels, points, confidence, sigma_z, rig, shape: tuple[int, int]):
    """Disparity, confidence and sigma_d maps of points that stand on image pixels.

    The inverse of triangulation for clouds and grid meshes: ``d = f·B/Z − doffs``
    and ``σ_d = σ_Z·f·B/Z²`` at each point's ``(col, row)``.

    Returns
    -------
    disparity, confidence, sigma_d : (H, W) float32 arrays
        NaN, 0 and 0 where no point stands.
    """
    cols, rows = pixels[:, 0], pixels[:, 1]
    fb = float(rig.focal_px) * float(rig.baseline)
    z = points[:, 2]
    disparity = np.full(shape, np.nan, np.float32)
    disparity[rows, cols] = fb / z - rig.doffs
    conf = np.zeros(shape, np.float32)
    conf[rows, cols] = confidence
    sigma_d = np.zeros(shape, np.float32)
    sigma_d[rows, cols] = sigma_z * fb / (z * z)
    return disparity, conf, sigma_d


def grid_maps(mesh: TriMesh, rig, shape: tuple[int, int]):
    """The disparity, confidence, sigma_d and filled maps a grid mesh was built from.

    Parameters
    ----------
    mesh : TriMesh
        With ``pixels`` set.
    rig : RectifiedRig
    shape : (int, int)
        ``(H, W)`` of the left image.

    Returns
    -------
    disparity, confidence, sigma_d : (H, W) float32 arrays
        NaN, 0 and 0 where no vertex stands (see :func:`pixel_maps`).
    filled : (H, W) bool array
    """
    maps = pixel_maps(mesh.pixels, mesh.vertices, mesh.confidence, mesh.sigma_z, rig, shape)
    filled = np.zeros(shape, bool)
    filled[mesh.pixels[:, 1], mesh.pixels[:, 0]] = mesh.filled.astype(bool)
    return (*maps, filled)


def coarser_grid_mesh(mesh: TriMesh, rig, image: np.ndarray, step: int,
                      max_depth_jump: float = 0.03) -> TriMesh:
    """The grid mesh rebuilt on every ``step``-th pixel of its rows and columns.

    For previews: a 2-million-face mesh shown 800 pixels wide looks the same
    with a quarter of its faces, and renders in a fraction of the time.

    Examples
    --------
    >>> import numpy as np
    >>> from stereomesh.geometry.surface import depth_grid_mesh
    >>> from stereomesh.rectify import RectifiedRig
    >>> rig = RectifiedRig(focal_px=100.0, cx=4.0, cy=4.0, baseline=0.1)
    >>> image = np.zeros((9, 9, 3), np.uint8)
    >>> m = depth_grid_mesh(np.full((9, 9), 10.0, np.float32), rig, image)
    >>> len(coarser_grid_mesh(m, rig, image, 2).faces)
    32
    """
    from stereomesh.geometry.surface import depth_grid_mesh

    disparity, confidence, sigma_d, filled = grid_maps(mesh, rig, np.shape(image)[:2])
    return depth_grid_mesh(disparity, rig, image, confidence, sigma_d=sigma_d,
                           max_depth_jump=max_depth_jump, grid_step=step, filled=filled)


def repair_grid_mesh(
    mesh: TriMesh,
    rig,
    image: np.ndarray,
    *,
    max_hole_edges: int = 30,
    min_component_fraction: float = 0.01,
    max_depth_jump: float = 0.03,
    grid_step: int = 1,
) -> tuple[TriMesh, dict]:
    """Close the small holes of a grid mesh and drop its small parts, in pixel space.

    Parameters
    ----------
    mesh : TriMesh
        A mesh from :func:`~stereomesh.geometry.surface.depth_grid_mesh`
        (``mesh.pixels`` set), in the frame of ``rig``.
    rig : RectifiedRig
    image : (H, W, 3) uint8 array
        The rectified left image; filled vertices take their pixel's colour.
    max_hole_edges, max_depth_jump
        As in :func:`find_small_holes`; ``max_depth_jump`` is also the grid
        mesh's discontinuity test for the rebuilt triangles.
    min_component_fraction : float
        Parts with fewer faces, or a smaller bounding-box diagonal, than this
        share of the largest part's are removed (as in
        :func:`~stereomesh.geometry.repair.repair_mesh`).
    grid_step : int
        The pixel step the mesh was built with.

    Returns
    -------
    mesh : TriMesh
        Measured vertices keep their position and attributes; vertices of
        filled pixels have ``filled = 1``, confidence 0, their pixel's colour
        and the largest ``sigma_z`` implied by the disparity uncertainty around
        their hole.
    figures : dict
        The keys of :func:`~stereomesh.geometry.repair.repair_mesh`'s figures,
        and ``method = "pixel grid"``.

    Examples
    --------
    >>> import numpy as np
    >>> from stereomesh.geometry.surface import depth_grid_mesh
    >>> from stereomesh.rectify import RectifiedRig
    >>> rig = RectifiedRig(focal_px=100.0, cx=4.0, cy=4.0, baseline=0.1)
    >>> d = np.full((9, 9), 10.0, np.float32)
    >>> d[4, 4] = np.nan
    >>> image = np.zeros((9, 9, 3), np.uint8)
    >>> out, fig = repair_grid_mesh(depth_grid_mesh(d, rig, image), rig, image)
    >>> fig["holes_filled"], fig["filled_vertices"], fig["boundary_loops_after"]
    (1, 1, 1)
    """
    from stereomesh.geometry.repair import (
        _small_components,
        count_boundary_loops,
        figures_before,
    )
    from stereomesh.geometry.surface import depth_grid_mesh

    if mesh.pixels is None:
        raise ValueError("repair_grid_mesh needs a grid mesh (mesh.pixels); "
                         "use repair_mesh for other meshes")
    image = np.asarray(image)
    h, w = image.shape[:2]
    step = int(grid_step)
    cols, rows = mesh.pixels[:, 0], mesh.pixels[:, 1]
    if cols.min(initial=0) < 0 or rows.min(initial=0) < 0 or cols.max(initial=0) >= w \
            or rows.max(initial=0) >= h:
        raise ValueError(f"the mesh's pixels fall outside the {w}x{h} image")
    figures = {"method": "pixel grid", **figures_before(mesh)}
    disparity, confidence, sigma_d, filled = grid_maps(mesh, rig, (h, w))

    grid = disparity[::step, ::step]
    if max_hole_edges >= 3:
        labels, fillable = find_small_holes(grid, max_hole_edges, max_depth_jump)
        hole = fillable[labels]
        if hole.any():
            grid_filled, new = _fill_holes(grid, hole)
            n_holes = int(fillable.sum())
            # Each hole's fill is as uncertain as the least certain disparity around it.
            lab, flat = _surround(np.where(hole, labels, 0), np.isfinite(grid))
            worst = np.zeros(len(fillable))
            np.maximum.at(worst, lab, sigma_d[::step, ::step].ravel()[flat])
            disparity[::step, ::step] = grid_filled
            sigma_d[::step, ::step][new] = worst[labels[new]]
            filled[::step, ::step] |= new
            figures["holes_filled"] = n_holes
            mesh = depth_grid_mesh(disparity, rig, image, confidence, sigma_d=sigma_d,
                                   max_depth_jump=max_depth_jump, grid_step=step, filled=filled)
            figures["filled_vertices"] = int(new.sum())

    if min_component_fraction > 0 and len(mesh.faces):
        small, n_small = _small_components(mesh.vertices, mesh.faces, min_component_fraction)
        if len(small):
            keep = np.ones(len(mesh.faces), bool)
            keep[small] = False
            mesh = _keep_faces(mesh, keep)
            figures["components_removed"] = n_small
    figures.update(
        faces_after=int(len(mesh.faces)),
        vertices_after=int(len(mesh.vertices)),
        boundary_loops_after=count_boundary_loops(mesh.faces, len(mesh.vertices)),
    )
    return mesh, figures
