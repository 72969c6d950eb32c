"""Numba kernels for mesh topology: connected parts, edge use, boundary loops.

Sorting six million edge keys or building a sparse graph per question costs
about a second on a megapixel grid mesh; these single passes cost tens of
milliseconds. Their slow references are the NumPy/SciPy versions in
:mod:`stereomesh.geometry.repair` (``_edge_use_reference``,
``_components_reference``), which the tests compare them with.
"""

from __future__ import annotations

import numba as nb
import numpy as np


@nb.njit(cache=True)
def _root(parent, i):
    root = i
    while parent[root] != root:
        root = parent[root]
    while parent[i] != root:  # path compression
        nxt = parent[i]
        parent[i] = root
        i = nxt
    return root


@nb.njit(cache=True)
def _join(parent, a, b):
    ra, rb = _root(parent, a), _root(parent, b)
    if ra < rb:
        parent[rb] = ra
    elif rb < ra:
        parent[ra] = rb


@nb.njit(cache=True)
def _compact(parent, member):
    """Labels 0..n-1 in order of each set's lowest member; -1 outside ``member``."""
    n_vertices = len(parent)
    label_of_root = np.full(n_vertices, -1, np.int64)
    labels = np.full(n_vertices, -1, np.int64)
    n = 0
    for i in range(n_vertices):
        if not member[i]:
            continue
        r = _root(parent, i)
        if label_of_root[r] < 0:
            label_of_root[r] = n
            n += 1
        labels[i] = label_of_root[r]
    return labels, n


@nb.njit(cache=True)
def vertex_components(faces, n_vertices):
    """Component label of every vertex (vertices joined through faces) and the count.

    Unreferenced vertices are components of their own, as in SciPy's
    ``connected_components`` on the face graph; labels follow the lowest
    vertex index of each component.
    """
    parent = np.arange(n_vertices)
    for f in range(faces.shape[0]):
        # int64 as everywhere else: the helpers are compiled once per argument type.
        a, b, c = np.int64(faces[f, 0]), np.int64(faces[f, 1]), np.int64(faces[f, 2])
        _join(parent, a, b)
        _join(parent, a, c)
    return _compact(parent, np.ones(n_vertices, np.bool_))


@nb.njit(cache=True)
def edge_use(faces, n_vertices):
    """Edges used by one face (with that face) and the count of edges used by more than two.

    Returns ``(boundary (B, 2), owner (B,), n_nonmanifold)`` with each boundary
    edge as ``(low, high)`` vertex ids, in increasing order of ``low`` (the
    caller sorts ties).
    """
    n_faces = faces.shape[0]
    start = np.zeros(n_vertices + 1, np.int64)
    for f in range(n_faces):
        for k in range(3):
            a, b = faces[f, k], faces[f, (k + 1) % 3]
            start[min(a, b) + 1] += 1
    for v in range(n_vertices):
        start[v + 1] += start[v]
    # int32 and a flag array instead of wide outputs: on this size of mesh the
    # first touch of fresh memory costs more than the arithmetic.
    partner = np.empty(3 * n_faces, np.int32)
    owner = np.empty(3 * n_faces, np.int32)
    cursor = start[:-1].copy()
    for f in range(n_faces):
        for k in range(3):
            a, b = faces[f, k], faces[f, (k + 1) % 3]
            lo, hi = min(a, b), max(a, b)
            partner[cursor[lo]] = hi
            owner[cursor[lo]] = f
            cursor[lo] += 1
    once = np.zeros(3 * n_faces, np.bool_)
    n_out = 0
    n_nonmanifold = 0
    for v in range(n_vertices):
        s, e = start[v], start[v + 1]
        # A vertex starts only a few edges: count repeats pairwise, no sorting.
        for i in range(s, e):
            hi = partner[i]
            first = True
            for j in range(s, i):
                if partner[j] == hi:
                    first = False
                    break
            if not first:
                continue
            uses = 1
            for j in range(i + 1, e):
                if partner[j] == hi:
                    uses += 1
            if uses == 1:
                once[i] = True
                n_out += 1
            elif uses > 2:
                n_nonmanifold += 1
    boundary = np.empty((n_out, 2), np.int64)
    boundary_owner = np.empty(n_out, np.int64)
    k = 0
    for v in range(n_vertices):
        for i in range(start[v], start[v + 1]):
            if once[i]:
                boundary[k, 0] = v
                boundary[k, 1] = partner[i]
                boundary_owner[k] = owner[i]
                k += 1
    return boundary, boundary_owner, n_nonmanifold


@nb.njit(cache=True)
def edge_loops(boundary, n_vertices):
    """Loop label of each boundary edge (edges sharing a vertex share a loop) and the count.

    Labels follow the lowest vertex of each loop, as SciPy's components of the
    boundary graph do.
    """
    parent = np.arange(n_vertices)
    member = np.zeros(n_vertices, np.bool_)
    for i in range(boundary.shape[0]):
        member[boundary[i, 0]] = True
        member[boundary[i, 1]] = True
        _join(parent, boundary[i, 0], boundary[i, 1])
    labels, n = _compact(parent, member)
    out = np.empty(boundary.shape[0], np.int64)
    for i in range(boundary.shape[0]):
        out[i] = labels[boundary[i, 0]]
    return out, n


@nb.njit(cache=True)
def component_sizes(faces, vertices, labels, n):
    """Faces per component and the diagonal of each component's bounding box."""
    n_faces = np.zeros(n, np.int64)
    lo = np.full((n, 3), np.inf)
    hi = np.full((n, 3), -np.inf)
    for f in range(faces.shape[0]):
        n_faces[labels[faces[f, 0]]] += 1
        for k in range(3):
            v = faces[f, k]
            c = labels[v]
            for j in range(3):
                x = vertices[v, j]
                if x < lo[c, j]:
                    lo[c, j] = x
                if x > hi[c, j]:
                    hi[c, j] = x
    diag = np.zeros(n)
    for c in range(n):
        if n_faces[c] > 0:
            s = 0.0
            for j in range(3):
                s += (hi[c, j] - lo[c, j]) ** 2
            diag[c] = np.sqrt(s)
    return n_faces, diag


@nb.njit(cache=True)
def kept_faces(faces, keep, n_vertices):
    """The faces ``keep`` selects, renumbered onto the vertices they use.

    Returns ``(faces (K, 3) int32, used (V,) bool)``: vertex ``i`` of the
    result is the ``i``-th used vertex of the input, in order.
    """
    used = np.zeros(n_vertices, np.bool_)
    n_kept = 0
    for f in range(faces.shape[0]):
        if keep[f]:
            n_kept += 1
            for k in range(3):
                used[faces[f, k]] = True
    new_id = np.empty(n_vertices, np.int32)
    n = 0
    for v in range(n_vertices):
        new_id[v] = n
        n += used[v]
    out = np.empty((n_kept, 3), np.int32)
    i = 0
    for f in range(faces.shape[0]):
        if keep[f]:
            for k in range(3):
                out[i, k] = new_id[faces[f, k]]
            i += 1
    return out, used
