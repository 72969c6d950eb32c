"""Mesh repair with PyMeshLab: clean-up, small-hole closing, optional smoothing and decimation.

Hole closing is deliberately conservative: a stereo mesh is an open surface seen
from one side, so only small gaps (a few missing pixels) are closed; larger
gaps are unobserved and stay open. Vertices invented by closing are flagged in
``TriMesh.filled`` and get confidence 0.
"""

from __future__ import annotations

import numpy as np

from stereomesh.geometry.data import TriMesh

# Inverse-distance colour for a filled vertex from this many nearest measured vertices.
_FILL_NEIGHBOURS = 4


def _edge_use(faces: np.ndarray, n_vertices: int):
    """Undirected edges used by exactly one face, and the count of edges used by more than two.

    Returns
    -------
    boundary : (B, 2) int64
        Boundary edges ``(low, high)``, in increasing order.
    owner : (B,) int64
        The face using each boundary edge.
    n_nonmanifold : int
        Edges shared by three or more faces.
    """
    from stereomesh.geometry._mesh_kernels import edge_use

    faces = np.ascontiguousarray(faces, np.int32)
    if len(faces) == 0:
        return np.zeros((0, 2), np.int64), np.zeros(0, np.int64), 0
    boundary, owner, n_nonmanifold = edge_use(faces, int(n_vertices))
    order = np.lexsort((boundary[:, 1], boundary[:, 0]))
    return boundary[order], owner[order], int(n_nonmanifold)


def _edge_use_reference(faces: np.ndarray, n_vertices: int):
    """Slow reference of :func:`_edge_use` (same returns), by sorting every edge key."""
    faces = np.asarray(faces, np.int64)
    if len(faces) == 0:
        return np.zeros((0, 2), np.int64), np.zeros(0, np.int64), 0
    a = faces.ravel()
    b = faces[:, [1, 2, 0]].ravel()
    key = np.minimum(a, b) * n_vertices + np.maximum(a, b)
    del a, b
    order = np.argsort(key)
    key = key[order]
    starts = np.flatnonzero(np.r_[True, key[1:] != key[:-1]])
    counts = np.diff(np.r_[starts, len(key)])
    once = starts[counts == 1]
    uniq = key[once]
    boundary = np.stack([uniq // n_vertices, uniq % n_vertices], axis=1)
    return boundary, order[once] // 3, int((counts > 2).sum())


def _loops(boundary: np.ndarray, n_vertices: int | None = None) -> tuple[np.ndarray, int]:
    """Loop label of each boundary edge; edges sharing a vertex share a loop."""
    from stereomesh.geometry._mesh_kernels import edge_loops

    if len(boundary) == 0:
        return np.zeros(0, np.int64), 0
    nv = int(boundary.max()) + 1 if n_vertices is None else int(n_vertices)
    labels, n = edge_loops(np.ascontiguousarray(boundary, np.int64), nv)
    return labels, int(n)


def _loops_reference(boundary: np.ndarray) -> tuple[np.ndarray, int]:
    """Slow reference of :func:`_loops` with SciPy's connected components (for the tests)."""
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components

    if len(boundary) == 0:
        return np.zeros(0, np.int64), 0
    nodes, inv = np.unique(boundary.ravel(), return_inverse=True)
    inv = inv.reshape(-1, 2)
    graph = coo_matrix(
        (np.ones(len(inv), np.int8), (inv[:, 0], inv[:, 1])), shape=(len(nodes),) * 2
    )
    n, labels = connected_components(graph, directed=False)
    return labels[inv[:, 0]], int(n)


def count_boundary_loops(faces: np.ndarray, n_vertices: int | None = None) -> int:
    """Number of boundary loops of a triangle mesh.

    A boundary edge is used by exactly one face; boundary edges sharing a vertex
    belong to the same loop, so loops that touch at a vertex count once.

    Parameters
    ----------
    faces : (F, 3) int array
    n_vertices : int, optional
        Number of vertices; by default ``faces.max() + 1``.

    Returns
    -------
    int

    Examples
    --------
    >>> import numpy as np
    >>> count_boundary_loops(np.array([[0, 1, 2], [0, 2, 3]]))
    1
    """
    faces = np.asarray(faces)
    if faces.ndim != 2 or faces.shape[1] != 3:
        raise ValueError(f"faces must have shape (F, 3), got {faces.shape}")
    if len(faces) == 0:
        return 0
    nv = int(faces.max()) + 1 if n_vertices is None else int(n_vertices)
    boundary, _, _ = _edge_use(faces, nv)
    return _loops(boundary, nv)[1]


def _closable_hole_faces(faces: np.ndarray, n_vertices: int, max_edges: int):
    """Faces bordering the holes that may be closed, and the number of loops.

    A loop qualifies if it has at most ``max_edges`` edges and is not the
    longest loop of its connected component: that one is the component's rim,
    and capping it would glue a lid onto an open surface.
    """
    boundary, owner, _ = _edge_use(faces, n_vertices)
    loop, n_loops = _loops(boundary, n_vertices)
    if n_loops == 0:
        return np.zeros(0, np.int64), 0
    size = np.bincount(loop, minlength=n_loops)
    labels, n_comp = _components(faces, n_vertices)
    comp_of_loop = np.zeros(n_loops, np.int64)
    comp_of_loop[loop] = labels[boundary[:, 0]]
    # Rim = longest loop per component (ties: the first found).
    by = np.lexsort((-size, comp_of_loop))
    first = np.r_[True, comp_of_loop[by][1:] != comp_of_loop[by][:-1]]
    rim = np.zeros(n_loops, bool)
    rim[by[first]] = True
    ok = (size <= max_edges) & ~rim
    return np.unique(owner[ok[loop]]), n_loops


def _components(faces: np.ndarray, n_vertices: int) -> tuple[np.ndarray, int]:
    """Component label per vertex (vertices joined by faces) and the count."""
    from stereomesh.geometry._mesh_kernels import vertex_components

    labels, n = vertex_components(np.ascontiguousarray(faces, np.int32), int(n_vertices))
    return labels, int(n)


def _components_reference(faces: np.ndarray, n_vertices: int) -> tuple[np.ndarray, int]:
    """Slow reference of :func:`_components` with SciPy's connected components (for the tests)."""
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components

    f = np.asarray(faces, np.int64)
    rows = np.r_[f[:, 0], f[:, 1]]
    cols = np.r_[f[:, 1], f[:, 2]]
    graph = coo_matrix((np.ones(len(rows), np.int8), (rows, cols)), shape=(n_vertices, n_vertices))
    n, labels = connected_components(graph, directed=False)
    return labels, n


def _count_components(faces: np.ndarray, n_vertices: int) -> int:
    if len(faces) == 0:
        return 0
    labels, _ = _components(faces, n_vertices)
    return int(len(np.unique(labels[np.asarray(faces)[:, 0]])))


def _small_component_faces(vertices, faces, fraction: float) -> np.ndarray:
    """Faces of the small components (see :func:`_small_components`)."""
    return _small_components(vertices, faces, fraction)[0]


def _small_components(vertices, faces, fraction: float) -> tuple[np.ndarray, int]:
    """Faces of components with fewer faces, or a smaller bounding-box diagonal, than
    ``fraction`` of the largest component's (by faces; it is always kept).

    Components are sets of faces joined through shared vertices. PyMeshLab's own
    component filters join faces through edges instead, so at ``fraction`` 1 they
    would remove the largest component in pieces; the selection is made here.
    Also returns how many components those faces form.
    """
    from stereomesh.geometry._mesh_kernels import component_sizes

    labels, n = _components(faces, len(vertices))
    flab = labels[faces[:, 0]]
    nfaces, diag = component_sizes(np.ascontiguousarray(faces, np.int32),
                                   np.ascontiguousarray(vertices, np.float64), labels, n)
    largest = int(np.argmax(nfaces))
    small = (nfaces < fraction * nfaces[largest]) | (diag < fraction * diag[largest])
    small[largest] = False
    return np.flatnonzero(small[flab]), int((small & (nfaces > 0)).sum())


def _current(ms) -> tuple[np.ndarray, np.ndarray]:
    m = ms.current_mesh()
    return np.asarray(m.vertex_matrix(), np.float64), np.asarray(m.face_matrix(), np.int64)


def _with_selected_faces(ms, verts: np.ndarray, faces: np.ndarray, selected: np.ndarray):
    """A MeshSet holding the current mesh with exactly ``selected`` faces selected."""
    import pymeshlab

    cur = ms.current_mesh()
    flag = np.zeros(len(faces), np.float64)
    flag[selected] = 1.0
    # Face quality is the only per-face channel PyMeshLab takes from numpy, so the
    # selection travels as quality and is turned into a selection by condition.
    out = pymeshlab.MeshSet()
    out.add_mesh(
        pymeshlab.Mesh(
            vertex_matrix=verts,
            face_matrix=np.ascontiguousarray(faces, np.int32),
            v_color_matrix=cur.vertex_color_matrix(),
            v_scalar_array=cur.vertex_scalar_array(),
            f_scalar_array=flag,
        )
    )
    out.compute_selection_by_condition_per_face(condselect="(fq > 0.5)")
    return out


def _nonmanifold_count(ms, faces: np.ndarray, n_vertices: int) -> int:
    """Non-manifold edges (our count) plus non-manifold vertices (PyMeshLab's selection)."""
    _, _, n_edges = _edge_use(faces, n_vertices)
    ms.compute_selection_by_non_manifold_per_vertex()
    n_verts = int(ms.current_mesh().selected_vertex_number())
    ms.set_selection_none()
    return n_edges + n_verts


def split_at_centroids(
    vertices: np.ndarray, faces: np.ndarray, which: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Split the chosen triangles into three at their centroids.

    Parameters
    ----------
    vertices : (V, 3) float array
    faces : (F, 3) int array
    which : (K,) int array
        Indices of the faces to split.

    Returns
    -------
    vertices : (V + K, 3) float64
        The input vertices followed by one centroid per split face.
    faces : (F + 2K, 3) int32
        Split face ``i`` becomes ``(a, b, m)`` in place plus ``(b, c, m)`` and
        ``(c, a, m)`` appended, keeping its orientation; the edges it shares
        with neighbours are untouched, so no T-junctions arise.

    Examples
    --------
    >>> import numpy as np
    >>> v, f = split_at_centroids(np.eye(3), np.array([[0, 1, 2]]), np.array([0]))
    >>> v[3], f.tolist()
    (array([0.33333333, 0.33333333, 0.33333333]), [[0, 1, 3], [1, 2, 3], [2, 0, 3]])
    """
    vertices = np.asarray(vertices, np.float64)
    faces = np.asarray(faces)
    which = np.asarray(which, np.int64)
    tri = faces[which].astype(np.int64)
    mid = np.arange(len(vertices), len(vertices) + len(which))
    out_v = np.concatenate([vertices, vertices[tri].mean(axis=1)])
    out_f = faces.astype(np.int32, copy=True)
    out_f[which, 2] = mid
    extra = np.concatenate(
        [np.stack([tri[:, 1], tri[:, 2], mid], 1), np.stack([tri[:, 2], tri[:, 0], mid], 1)]
    )
    return out_v, np.concatenate([out_f, extra.astype(np.int32)])


def _input_index(quality: np.ndarray, verts: np.ndarray, original: np.ndarray) -> np.ndarray:
    """Input vertex index of each current vertex, or -1 for a vertex PyMeshLab created.

    The index rides in the vertex quality; a vertex counts as measured only if
    it also still sits exactly on that input vertex. Vertices that fail the
    check (a filter that copied a vertex without its quality) are matched by
    an exact position look-up instead; quality -1 marks a vertex known to be new.
    """
    from scipy.spatial import cKDTree

    q = np.asarray(quality, np.float64)
    idx = np.rint(q).astype(np.int64)
    ok = (idx >= 0) & (idx < len(original)) & (np.abs(q - idx) < 1e-6)
    ok[ok] = np.all(original[idx[ok]] == verts[ok], axis=1)
    idx[~ok] = -1
    unknown = ~ok & (q != -1.0)
    if unknown.any():
        dist, near = cKDTree(original).query(verts[unknown], k=1)
        idx[unknown] = np.where(dist == 0.0, near, -1)
    return idx


def figures_before(mesh: TriMesh) -> dict:
    """The repair figures of ``mesh`` before any repair (counts of what is done at 0).

    Both repair paths (:func:`repair_mesh` and
    :func:`~stereomesh.geometry.grid_repair.repair_grid_mesh`) start from these,
    so their reports carry the same keys.
    """
    nv = len(mesh.vertices)
    return {
        "faces_before": int(len(mesh.faces)),
        "vertices_before": int(nv),
        "boundary_loops_before": count_boundary_loops(mesh.faces, nv),
        "holes_filled": 0,
        "filled_vertices": 0,
        "components_removed": 0,
        "nonmanifold_fixed": 0,
    }


def repair_mesh(
    mesh: TriMesh,
    *,
    max_hole_edges: int = 30,
    min_component_fraction: float = 0.01,
    smooth_iterations: int = 0,
    target_faces: int = 0,
) -> tuple[TriMesh, dict]:
    """Clean a triangle mesh and close its small holes, keeping per-vertex attributes.

    Steps, in order (all PyMeshLab filters): merge duplicate vertices, remove
    duplicate faces and unreferenced vertices; remove connected components
    with fewer faces, or a smaller bounding-box diagonal, than
    ``min_component_fraction`` of the largest component's; repair non-manifold
    edges (by removing faces) and vertices (by splitting them); close holes
    whose boundary has at most ``max_hole_edges`` edges (never a component's
    longest loop, its rim) and split each patch triangle at its centroid, so
    every closed hole carries flagged vertices; optionally Taubin smoothing; optionally
    quadric edge-collapse decimation to ``target_faces``.

    Parameters
    ----------
    mesh : TriMesh
    max_hole_edges : int
        Largest hole closed, counted in boundary edges; larger gaps stay open.
        0 closes nothing.
    min_component_fraction : float
        Components below this share of the largest (faces or diagonal) are removed.
    smooth_iterations : int
        Taubin smoothing steps; 0 skips smoothing.
    target_faces : int
        Face count to decimate to; 0 (or a count above the current one) skips it.

    Returns
    -------
    mesh : TriMesh
        Repaired mesh. Original vertices keep their colour, confidence,
        ``sigma_z``, ``filled`` and ``uv`` exactly (until smoothing moves them
        or decimation merges them; then attributes come from the nearest
        vertex before decimation). Vertices created by hole closing have
        ``filled = 1``, confidence 0, a colour (and uv) interpolated by inverse
        distance from the nearest measured vertices and their nearest measured
        vertex's ``sigma_z``. Normals are recomputed from the faces.
    figures : dict
        ``faces_before``, ``faces_after``, ``vertices_before``, ``vertices_after``,
        ``boundary_loops_before``, ``boundary_loops_after`` (counted here, see
        :func:`count_boundary_loops`), ``holes_filled``, ``filled_vertices``,
        ``components_removed`` and ``nonmanifold_fixed`` (edges plus vertices).

    Examples
    --------
    >>> import numpy as np
    >>> v = np.array([[0, 0, 1], [1, 0, 1], [0, 1, 1], [1, 1, 1]], float)
    >>> f = np.array([[0, 2, 1], [1, 2, 3], [1, 2, 3]])
    >>> m = TriMesh(v, f, np.zeros((4, 3), np.uint8), np.ones(4, np.float32),
    ...             np.zeros(4, np.float32), np.zeros(4, np.uint8))
    >>> out, fig = repair_mesh(m)
    >>> fig["faces_before"], fig["faces_after"], fig["boundary_loops_after"]
    (3, 2, 1)
    """
    import pymeshlab
    from scipy.spatial import cKDTree

    if not isinstance(mesh, TriMesh):
        raise TypeError(f"mesh must be a TriMesh, got {type(mesh).__name__}")
    if max_hole_edges < 0:
        raise ValueError(f"max_hole_edges must be >= 0, got {max_hole_edges}")
    if not 0.0 <= min_component_fraction <= 1.0:
        raise ValueError(f"min_component_fraction must be in [0, 1], got {min_component_fraction}")
    if smooth_iterations < 0:
        raise ValueError(f"smooth_iterations must be >= 0, got {smooth_iterations}")
    if target_faces is None:
        target_faces = 0
    if target_faces < 0:
        raise ValueError(f"target_faces must be >= 0 (0 keeps every face), got {target_faces}")

    nv0 = len(mesh.vertices)
    figures = figures_before(mesh)
    if len(mesh.faces) == 0:
        empty = TriMesh(
            np.zeros((0, 3)),
            np.zeros((0, 3), np.int32),
            np.zeros((0, 3), np.uint8),
            np.zeros(0, np.float32),
            np.zeros(0, np.float32),
            np.zeros(0, np.uint8),
            np.zeros((0, 3), np.float32),
            None if mesh.uv is None else np.zeros((0, 2), np.float32),
        )
        figures.update(faces_after=0, vertices_after=0, boundary_loops_after=0)
        return empty, figures

    rgba = np.ones((nv0, 4))
    rgba[:, :3] = mesh.colors / 255.0
    ms = pymeshlab.MeshSet()
    # The vertex quality carries each vertex's input index through PyMeshLab's
    # compactions; no step before hole closing interpolates it.
    ms.add_mesh(
        pymeshlab.Mesh(
            vertex_matrix=mesh.vertices,
            face_matrix=mesh.faces,
            v_color_matrix=rgba,
            v_scalar_array=np.arange(nv0, dtype=np.float64),
        )
    )
    ms.meshing_remove_duplicate_vertices()
    ms.meshing_remove_duplicate_faces()
    ms.meshing_remove_unreferenced_vertices()

    verts, faces = _current(ms)
    n_comp = _count_components(faces, len(verts))
    if min_component_fraction > 0 and n_comp > 1:
        small = _small_component_faces(verts, faces, min_component_fraction)
        if len(small):
            ms = _with_selected_faces(ms, verts, faces, small)
            ms.meshing_remove_selected_faces()
            ms.meshing_remove_unreferenced_vertices()
        verts, faces = _current(ms)
        figures["components_removed"] = n_comp - _count_components(faces, len(verts))

    nm_before = _nonmanifold_count(ms, faces, len(verts))
    if nm_before:
        ms.meshing_repair_non_manifold_edges(method="Remove Faces")
        ms.meshing_repair_non_manifold_vertices(vertdispratio=0.0)
        ms.meshing_remove_unreferenced_vertices()
        verts, faces = _current(ms)
        figures["nonmanifold_fixed"] = nm_before - _nonmanifold_count(ms, faces, len(verts))

    loops = count_boundary_loops(faces, len(verts))
    quality = ms.current_mesh().vertex_scalar_array()
    if max_hole_edges >= 3 and loops:
        hole_faces, _ = _closable_hole_faces(faces, len(verts), max_hole_edges)
        if len(hole_faces):
            ms = _with_selected_faces(ms, verts, faces, hole_faces)
            # PyMeshLab's own patch refinement does whole-mesh work per hole (minutes
            # on a megapixel mesh), so patches are closed plainly and split below.
            ms.meshing_close_holes(
                maxholesize=int(max_hole_edges),
                selected=True,
                newfaceselected=True,
                selfintersection=True,
                refinehole=False,
            )
            cur = ms.current_mesh()
            patch = np.flatnonzero(cur.face_selection_array())
            verts, faces = _current(ms)
            quality = cur.vertex_scalar_array()
            verts, faces = split_at_centroids(verts, faces, patch)
            quality = np.r_[quality, np.full(len(patch), -1.0)]
            loops_after = count_boundary_loops(faces, len(verts))
            figures["holes_filled"] = loops - loops_after
            loops = loops_after
            if smooth_iterations > 0 or target_faces > 0:
                ms = pymeshlab.MeshSet()
                ms.add_mesh(pymeshlab.Mesh(vertex_matrix=verts, face_matrix=faces))

    source = _input_index(quality, verts, mesh.vertices)
    measured = source >= 0
    new = ~measured
    n_all = len(verts)
    colors = np.empty((n_all, 3), np.uint8)
    conf = np.zeros(n_all, np.float32)
    sigma = np.empty(n_all, np.float32)
    filled = np.ones(n_all, np.uint8)
    uv = None if mesh.uv is None else np.empty((n_all, 2), np.float32)
    src = source[measured]
    colors[measured] = mesh.colors[src]
    conf[measured] = mesh.confidence[src]
    sigma[measured] = mesh.sigma_z[src]
    filled[measured] = mesh.filled[src]
    if uv is not None:
        uv[measured] = mesh.uv[src]
    if new.any():
        k = min(_FILL_NEIGHBOURS, int(measured.sum()))
        dist, idx = cKDTree(verts[measured]).query(verts[new], k=k)
        dist, idx = dist.reshape(len(dist), k), src[idx.reshape(len(idx), k)]
        w = 1.0 / np.maximum(dist, 1e-12)
        w /= w.sum(axis=1, keepdims=True)
        mix = np.einsum("nk,nkc->nc", w, mesh.colors[idx].astype(np.float64))
        colors[new] = np.clip(np.rint(mix), 0, 255).astype(np.uint8)
        sigma[new] = mesh.sigma_z[idx[:, 0]]
        if uv is not None:
            uv[new] = np.einsum("nk,nkc->nc", w, mesh.uv[idx])
    figures["filled_vertices"] = int(new.sum())

    if smooth_iterations > 0:
        # Smoothing moves vertices but keeps their number and order.
        ms.apply_coord_taubin_smoothing(stepsmoothnum=int(smooth_iterations))
        verts, faces = _current(ms)

    if 0 < target_faces < len(faces):
        before = verts
        ms.meshing_decimation_quadric_edge_collapse(
            targetfacenum=int(target_faces),
            preserveboundary=True,
            preservenormal=True,
            optimalplacement=True,
            autoclean=True,
        )
        ms.meshing_remove_unreferenced_vertices()
        verts, faces = _current(ms)
        _, near = cKDTree(before).query(verts, k=1)
        colors, conf, sigma, filled = colors[near], conf[near], sigma[near], filled[near]
        if uv is not None:
            uv = uv[near]
        loops = count_boundary_loops(faces, len(verts))

    from stereomesh.geometry.surface import vertex_normals

    faces = faces.astype(np.int32)
    out = TriMesh(
        vertices=verts,
        faces=faces,
        colors=colors,
        confidence=conf,
        sigma_z=sigma,
        filled=filled,
        normals=vertex_normals(verts, faces),
        uv=uv,
    )
    figures.update(
        faces_after=int(len(faces)), vertices_after=int(len(verts)), boundary_loops_after=loops
    )
    return out, figures
