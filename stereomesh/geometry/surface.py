"""Surfaces from depth: a grid mesh over the disparity map, or a Poisson surface."""

from __future__ import annotations

import numpy as np

from stereomesh.geometry._grid_kernels import grid_faces, grid_triangles, grid_vertices
from stereomesh.geometry.data import PointCloud, TriMesh
from stereomesh.geometry.triangulate import _check_maps, valid_disparity_mask
from stereomesh.params import CloudParams
from stereomesh.rectify import RectifiedRig

# Faces per chunk when accumulating normals: bounds the temporaries to ~0.5 GB on
# 12 MP maps while keeping numpy's per-call overhead negligible.
_NORMAL_CHUNK = 4_000_000

# Poisson output is cropped to the cloud's box grown by this share of its size on
# each side: enough to keep the surface closing over the cloud's rim, little
# enough to drop the balloon Poisson inflates beyond the data.
_POISSON_BOX_MARGIN = 0.05

# A Poisson vertex farther than this many point spacings from any input point is
# not supported by a measurement, so it is flagged as filled.
_POISSON_FILLED_SPACINGS = 2.0

# A support point's spacing is its distance to this many-th nearest other point:
# on a pixel grid the 4th is an edge neighbour, and where a slanted surface
# stretches the grid one way it is the stretched one, so the trim errs on the
# side of keeping surface.
_SPACING_NEIGHBOUR = 4

# Support points per k-d tree query when measuring their spacing.
_SPACING_CHUNK = 1_000_000


def vertex_normals(vertices: np.ndarray, faces: np.ndarray) -> np.ndarray:
    """Area-weighted vertex normals of a triangle mesh.

    Parameters
    ----------
    vertices : (V, 3) float array
    faces : (F, 3) int array
        Counter-clockwise winding seen from the side the normals should face.

    Returns
    -------
    (V, 3) float32
        Unit normals; vertices used by no face (or only by degenerate ones) get
        the unit vector from the vertex toward the origin, i.e. toward the camera.

    Examples
    --------
    >>> import numpy as np
    >>> v = np.array([[0, 0, 1], [0, 1, 1], [1, 0, 1]], float)
    >>> vertex_normals(v, np.array([[0, 1, 2]]))[0]
    array([ 0.,  0., -1.], dtype=float32)
    """
    vertices = np.asarray(vertices)
    faces = np.asarray(faces)
    if vertices.ndim != 2 or vertices.shape[1] != 3:
        raise ValueError(f"vertices must have shape (V, 3), got {vertices.shape}")
    if faces.ndim != 2 or faces.shape[1] != 3:
        raise ValueError(f"faces must have shape (F, 3), got {faces.shape}")
    nv = len(vertices)
    # float32 is plenty for directions and halves the memory of the gathers.
    v32 = vertices.astype(np.float32)
    acc = np.zeros((nv, 3), np.float64)
    for start in range(0, len(faces), _NORMAL_CHUNK):
        f = faces[start : start + _NORMAL_CHUNK]
        p0 = v32[f[:, 0]]
        fn = np.cross(v32[f[:, 1]] - p0, v32[f[:, 2]] - p0)
        del p0
        flat = f.ravel()
        for j in range(3):
            acc[:, j] += np.bincount(flat, weights=np.repeat(fn[:, j], 3), minlength=nv)
    length = np.linalg.norm(acc, axis=1)
    bad = ~(length > 0)
    acc[~bad] /= length[~bad, None]
    if bad.any():
        p = vertices[bad].astype(np.float64)
        pl = np.linalg.norm(p, axis=1, keepdims=True)
        acc[bad] = np.divide(-p, pl, out=np.tile([0.0, 0.0, -1.0], (len(p), 1)), where=pl > 0)
    return acc.astype(np.float32)


def depth_grid_mesh(
    disparity: np.ndarray,
    rig: RectifiedRig,
    image: np.ndarray,
    confidence: np.ndarray | None = None,
    sigma_d: float | np.ndarray = CloudParams.sigma_d,
    max_depth_jump: float = 0.03,
    grid_step: int = 1,
    filled: np.ndarray | None = None,
) -> TriMesh:
    """Mesh the disparity map as a grid: one vertex per pixel, faces between neighbours.

    Pixels are taken every ``grid_step`` rows and columns. Each 2×2 block of valid
    pixels gives two triangles split along its shorter 3-D diagonal; a block
    with three valid pixels gives the one triangle they span. A triangle is
    kept only if ``max(Z)/min(Z) − 1 <= max_depth_jump`` over its vertices:
    larger jumps are depth discontinuities, and bridging them would invent
    surface between a foreground object and the background.

    Parameters
    ----------
    disparity : (H, W) float32 array
        Left disparity in pixels, NaN where invalid.
    rig : RectifiedRig
    image : (H, W, 3) uint8 array
        Rectified left image, RGB.
    confidence : (H, W) float array, optional
        Matching confidence in [0, 1]; 1 when omitted.
    sigma_d : float or (H, W) float array
        One-sigma disparity uncertainty, pixels.
    max_depth_jump : float
        Largest relative depth difference within a triangle (0.03 = 3 %).
    grid_step : int
        Pixel stride of the grid (1 = every pixel).
    filled : (H, W) bool array, optional
        Pixels whose disparity was filled in rather than measured; their
        vertices get ``filled = 1`` and confidence 0.

    Returns
    -------
    TriMesh
        Vertices in ``rig.units`` (left camera frame); faces wound so that their
        normals face the camera; vertex normals; colours, confidence and
        ``sigma_z = Z²·σ_d/(f·B)`` from the vertex's pixel; ``filled`` from
        ``filled`` (all 0 without it); ``pixels`` the vertex's ``(col, row)``.
        ``uv`` addresses the centre of the vertex's pixel in the left image in
        the OpenGL convention: ``(u + 0.5) / W`` and ``1 − (v + 0.5) / H`` for
        pixel column ``u`` and row ``v``, origin at the image's bottom-left.
        Valid pixels used by no triangle are left out.

    Examples
    --------
    >>> import numpy as np
    >>> from stereomesh.rectify import RectifiedRig
    >>> rig = RectifiedRig(focal_px=100.0, cx=1.0, cy=1.0, baseline=0.1)
    >>> m = depth_grid_mesh(np.full((3, 3), 10.0, np.float32), rig, np.zeros((3, 3, 3), np.uint8))
    >>> m.vertices.shape, m.faces.shape
    ((9, 3), (8, 3))
    """
    disparity, image, confidence, sigma = _check_maps(disparity, image, confidence, sigma_d)
    if filled is not None and np.shape(filled) != disparity.shape:
        raise ValueError(f"filled must have the disparity's shape {disparity.shape}, "
                         f"got {np.shape(filled)}")
    if int(grid_step) != grid_step or grid_step < 1:
        raise ValueError(f"grid_step must be a positive integer, got {grid_step}")
    if not max_depth_jump >= 0:
        raise ValueError(f"max_depth_jump must be >= 0, got {max_depth_jump}")
    step = int(grid_step)
    height, width = disparity.shape
    f, b = float(rig.focal_px), float(rig.baseline)

    d = disparity[::step, ::step]
    valid = valid_disparity_mask(d, rig)
    gh, gw = d.shape
    with np.errstate(invalid="ignore", divide="ignore"):
        z = np.where(valid, (f * b) / (d.astype(np.float64) + rig.doffs), np.nan).astype(np.float32)
    cols = (np.arange(gw, dtype=np.float32) * step - np.float32(rig.cx)) / np.float32(f)
    rows = (np.arange(gh, dtype=np.float32) * step - np.float32(rig.cy)) / np.float32(f)
    limit = np.float32(1.0 + max_depth_jump)
    if int(np.count_nonzero(valid)) >= 2**31 - 1:
        raise ValueError("too many vertices for int32 faces; use a larger grid_step")
    code = grid_triangles(z, valid, cols, rows, limit)
    vid, normals = grid_vertices(code, z, cols, rows)
    n_vert = len(normals)
    faces = grid_faces(code, vid)
    used = vid >= 0
    del code, vid

    # np.take of flat grid positions: several times faster than a boolean mask
    # (which recounts itself for every attribute) or (row, col) fancy indexing.
    index = np.flatnonzero(used)
    del used

    def at_used(arr):
        grid = arr[::step, ::step]
        return np.take(grid.reshape(gh * gw, *grid.shape[2:]), index, axis=0)

    pr = (index // gw * step).astype(np.float64)
    pc = (index % gw * step).astype(np.float64)
    verts = np.empty((n_vert, 3), np.float64)
    # Positions in float64 from the disparity itself: the float32 grid only served
    # the diagonal and jump tests.
    zv = verts[:, 2]
    np.divide(f * b, at_used(disparity).astype(np.float64) + rig.doffs, out=zv)
    verts[:, 0] = (pc - rig.cx) * zv / f
    verts[:, 1] = (pr - rig.cy) * zv / f
    length = np.sqrt(np.einsum("ij,ij->i", normals, normals))
    # Every kept vertex has a face, but only degenerate ones would leave no
    # direction; those look at the camera like the rest of the surface.
    flat = ~(length > 0)
    normals /= np.where(flat, np.float32(1), length)[:, None]
    if flat.any():
        normals[flat] = -verts[flat] / np.linalg.norm(verts[flat], axis=1, keepdims=True)
    sig = sigma if sigma.ndim == 0 else at_used(sigma)
    sigma_z = (zv * zv * (sig / (f * b))).astype(np.float32)
    conf = np.ones(n_vert, np.float32) if confidence is None else at_used(confidence)
    uv = np.empty((n_vert, 2), np.float32)
    uv[:, 0] = (pc + 0.5) / width
    uv[:, 1] = 1.0 - (pr + 0.5) / height
    colors = at_used(image)
    pixels = np.empty((n_vert, 2), np.int32)
    pixels[:, 0], pixels[:, 1] = pc, pr
    del pr, pc
    if filled is None:
        filled_v = np.zeros(n_vert, np.uint8)
    else:
        filled_v = at_used(np.asarray(filled, bool)).astype(np.uint8)
        conf = np.where(filled_v == 1, np.float32(0), conf)
    return TriMesh(
        vertices=verts,
        faces=faces,
        colors=colors,
        confidence=np.asarray(conf, np.float32),
        sigma_z=sigma_z,
        filled=filled_v,
        normals=normals,
        uv=uv,
        pixels=pixels,
    )



def _grid_topology_reference(z, valid, cols, rows, limit):
    """Array version of the grid kernels (for the tests): used pixels, faces, normal sums.

    Returns ``used (H, W) bool``, ``faces (F, 3) int32`` grouped by triangle
    type, and ``normals (V, 3) float32``, the un-normalised sums the kernels
    make, for the same inputs as :func:`~stereomesh.geometry._grid_kernels.grid_triangles`.
    """
    gh, gw = z.shape
    x = z * cols[None, :]
    y = z * rows[:, None]

    # Block corners: a top-left, b top-right, c bottom-left, e bottom-right.
    def corner(arr, dr, dc):
        return arr[dr : gh - 1 + dr, dc : gw - 1 + dc]

    # Fresh 12-megapixel temporaries cost more in page faults than in arithmetic,
    # so the block-grid work below runs in a few reused buffers.
    bshape = (gh - 1, gw - 1)
    e1 = [np.empty(bshape, np.float32) for _ in range(3)]
    e2 = [np.empty(bshape, np.float32) for _ in range(3)]
    tmp = np.empty(bshape, np.float32)
    tmp2 = np.empty(bshape, np.float32)

    xyz = (x, y, z)
    del x, y

    def diff_into(outs, grids, o_to, o_from):
        for out, g in zip(outs, grids, strict=True):
            np.subtract(corner(g, *o_to), corner(g, *o_from), out=out)

    def norm2_into(out, vec, scratch):
        np.multiply(vec[0], vec[0], out=out)
        for comp in vec[1:]:
            out += np.multiply(comp, comp, out=scratch)

    va, vb, vc, ve = (corner(valid, *o) for o in ((0, 0), (0, 1), (1, 0), (1, 1)))
    all4 = va & vb & vc & ve
    with np.errstate(invalid="ignore"):
        diff_into(e1, xyz, (1, 1), (0, 0))
        diff_into(e2, xyz, (1, 0), (0, 1))
        norm2_into(tmp, e1, tmp2)
        norm2_into(e1[0], e2, tmp2)
        use_ae = all4 & (tmp <= e1[0])
    use_bc = all4 & ~use_ae

    # In (col, row) pixel coordinates every triangle below has negative signed
    # area; with y down and z forward that makes its 3-D normal face the camera,
    # and projection preserves this for any surface in front of the camera.
    tri_defs = (
        (((0, 0), (1, 0), (1, 1)), (va & vc & ve) & (~vb | use_ae)),  # a c e
        (((0, 0), (1, 1), (0, 1)), (va & ve & vb) & (~vc | use_ae)),  # a e b
        (((0, 0), (1, 0), (0, 1)), (va & vc & vb) & (~ve | use_bc)),  # a c b
        (((0, 1), (1, 0), (1, 1)), (vb & vc & ve) & (~va | use_bc)),  # b c e
    )
    del va, vb, vc, ve, all4, use_ae, use_bc
    kept = []
    used = np.zeros((gh, gw), bool)
    # Area-weighted normals summed on the pixel grid by shifted slices: a scatter
    # over 20 million faces would take several times longer.
    acc = np.zeros((3, gh, gw), np.float32)
    for offsets, mask in tri_defs:
        z0, z1, z2 = (corner(xyz[2], *o) for o in offsets)
        zmax, zmin = e1[0], e2[0]
        with np.errstate(invalid="ignore"):
            np.fmax(np.fmax(z0, z1, out=zmax), z2, out=zmax)
            np.fmin(np.fmin(z0, z1, out=zmin), z2, out=zmin)
            zmin *= limit
            mask &= zmax <= zmin
        kept.append((offsets, mask))
        for o in offsets:
            corner(used, *o)[...] |= mask
        rejected = ~mask
        with np.errstate(invalid="ignore"):
            diff_into(e1, xyz, offsets[1], offsets[0])
            diff_into(e2, xyz, offsets[2], offsets[0])
            for k in range(3):
                i, j = (k + 1) % 3, (k + 2) % 3
                comp = np.multiply(e1[i], e2[j], out=tmp)
                comp -= np.multiply(e1[j], e2[i], out=tmp2)
                # Rejected triangles may touch NaN pixels: zero them before summing.
                np.copyto(comp, 0, where=rejected)
                for o in offsets:
                    corner(acc[k], *o)[...] += comp
        del rejected
    del xyz, e1, e2, tmp, tmp2

    # Vertex ids only for pixels some triangle uses, numbered in row-major order.
    n_vert = int(used.sum())
    vid = np.full((gh, gw), -1, np.int32)
    vid[used] = np.arange(n_vert, dtype=np.int32)
    n_faces = sum(int(m.sum()) for _, m in kept)
    faces = np.empty((n_faces, 3), np.int32)
    start = 0
    for offsets, mask in kept:
        k = int(mask.sum())
        for j, o in enumerate(offsets):
            faces[start : start + k, j] = corner(vid, *o)[mask]
        start += k
    del kept, vid

    normals = np.empty((n_vert, 3), np.float32)
    for k in range(3):
        normals[:, k] = acc[k][used]
    del acc

    return used, faces, normals


def _median_spacing(points: np.ndarray, sample: int = 100_000, seed: int = 0) -> float:
    from scipy.spatial import cKDTree

    tree = cKDTree(points)
    rng = np.random.default_rng(seed)
    probe = points if len(points) <= sample else points[rng.choice(len(points), sample, False)]
    dist, _ = tree.query(probe, k=2)
    d = dist[:, 1]
    d = d[np.isfinite(d) & (d > 0)]
    return float(np.median(d)) if d.size else 0.0


def support_points(
    cloud: PointCloud,
    rig: RectifiedRig,
    max_hole_edges: int = 30,
    max_depth_jump: float = 0.03,
) -> tuple[np.ndarray, tuple[int, int]]:
    """The cloud's points plus the points that would fill its small holes.

    The points are put back on the left image (their ``pixels``, else their
    projection), and the holes that grid repair would fill
    (:func:`~stereomesh.geometry.grid_repair.find_small_holes`: small, away
    from the border, a flat surround) are filled by the same harmonic
    interpolation of disparity and triangulated. A surface over such a hole is
    as honest as the grid's fill; a surface over any larger gap is not.

    Parameters
    ----------
    cloud : PointCloud
        Points in the left camera frame of ``rig``.
    rig : RectifiedRig
    max_hole_edges : int
        Largest hole filled, in boundary edges of the pixel grid; below 3 no
        hole is.
    max_depth_jump : float
        Largest relative deviation of a hole's surround from a plane.

    Returns
    -------
    points : (N + M, 3) float64
        The cloud's N points, then the M fill points, in the cloud's unit.
    shape : (H, W) tuple of int
        The left image's size (from ``rig.image_size``, else the points' extent).

    Examples
    --------
    >>> import numpy as np
    >>> from stereomesh.rectify import RectifiedRig
    >>> rig = RectifiedRig(focal_px=100.0, cx=4.0, cy=4.0, baseline=0.1, image_size=(9, 9))
    >>> cols, rows = np.meshgrid(np.arange(9), np.arange(9))
    >>> keep = (cols != 4) | (rows != 4)                   # one pixel missing
    >>> pix = np.c_[cols[keep], rows[keep]]
    >>> pts = np.c_[(pix - 4.0) / 100.0, np.ones(len(pix))]
    >>> cloud = PointCloud(pts, np.zeros((80, 3), np.uint8), np.ones(80, np.float32),
    ...                    np.zeros(80, np.float32), pixels=pix.astype(np.int32))
    >>> support, shape = support_points(cloud, rig)
    >>> support[80:].round(6).tolist(), shape
    ([[0.0, 0.0, 1.0]], (9, 9))
    """
    from stereomesh.geometry.grid_repair import fill_small_holes, pixel_maps

    points = cloud.points
    fb = float(rig.focal_px) * float(rig.baseline)
    if cloud.pixels is not None:
        pixels = cloud.pixels.astype(np.int64)
    else:
        with np.errstate(invalid="ignore", divide="ignore"):
            u = rig.focal_px * points[:, 0] / points[:, 2] + rig.cx
            v = rig.focal_px * points[:, 1] / points[:, 2] + rig.cy
        pixels = np.c_[np.rint(u), np.rint(v)]
        pixels = np.where(np.isfinite(pixels), pixels, -1).astype(np.int64)
    w, h = rig.image_size
    if (w, h) == (0, 0):
        w, h = (int(pixels[:, 0].max()) + 1, int(pixels[:, 1].max()) + 1) if len(pixels) \
            else (1, 1)
    on = ((pixels[:, 0] >= 0) & (pixels[:, 0] < w) & (pixels[:, 1] >= 0) & (pixels[:, 1] < h)
          & (points[:, 2] > 0))
    if max_hole_edges < 3 or not on.any():
        return points, (h, w)
    # Where several points share a pixel (a thinned or edited cloud) the nearest
    # one stands for it, as the camera would see it.
    order = np.argsort(-points[on, 2], kind="stable")
    pix, pts = pixels[on][order], points[on][order]
    n = len(pts)
    disparity, _, _ = pixel_maps(pix, pts, np.zeros(n, np.float32), np.zeros(n, np.float32),
                                 rig, (h, w))
    filled_d, filled, _ = fill_small_holes(disparity, max_hole_edges, max_depth_jump)
    rows, cols = np.nonzero(filled)
    z = fb / (filled_d[rows, cols].astype(np.float64) + rig.doffs)
    fill = np.c_[(cols - rig.cx) * z / rig.focal_px, (rows - rig.cy) * z / rig.focal_px, z]
    return np.concatenate([points, fill]), (h, w)


def supported_faces(
    vertices: np.ndarray,
    faces: np.ndarray,
    support: np.ndarray,
    max_spacings: float = 2.0,
    rig: RectifiedRig | None = None,
    shape: tuple[int, int] | None = None,
) -> np.ndarray:
    """Faces of a surface that lie on measured (or small-hole) points and in view.

    A face is kept when its three vertices and its centroid are each within
    ``max_spacings`` local point spacings of a support point (the centroid
    test drops faces whose corners sit on opposite rims of a gap), and, with
    ``rig``, when its vertices are in front of the left camera and project into
    its image: a surface the camera never saw was never measured.

    Parameters
    ----------
    vertices : (V, 3) float array
        Surface vertices, in the unit of ``support``.
    faces : (F, 3) int array
    support : (N, 3) float array, N >= 2
        The points that support the surface (see :func:`support_points`).
    max_spacings : float
        Largest distance from a support point, in units of that point's
        spacing (its distance to its 4th nearest support neighbour).
    rig : RectifiedRig, optional
        Left camera of the frame the points are in.
    shape : (H, W) tuple of int, optional
        Image size for the view test; required with ``rig``.

    Returns
    -------
    (F,) bool array
        True for the faces to keep.

    Examples
    --------
    >>> import numpy as np
    >>> g = np.mgrid[0:10, 0:10].reshape(2, -1).T.astype(float)
    >>> support = np.c_[g, np.zeros(len(g))]
    >>> v = np.array([[1, 1, 0], [2, 1, 0], [1, 2, 0], [30, 30, 0]], float)
    >>> supported_faces(v, np.array([[0, 1, 2], [0, 1, 3]]), support).tolist()
    [True, False]
    """
    from scipy.spatial import cKDTree

    vertices = np.asarray(vertices, np.float64)
    faces = np.asarray(faces)
    support = np.asarray(support, np.float64)
    if len(support) < 2:
        raise ValueError(f"support needs at least 2 points, got {len(support)}")
    if not max_spacings > 0:
        raise ValueError(f"max_spacings must be positive, got {max_spacings}")
    if rig is not None and shape is None:
        raise ValueError("the view test needs the image shape with the rig")
    if len(faces) == 0:
        return np.zeros(0, bool)
    tree = cKDTree(support)
    k = min(_SPACING_NEIGHBOUR + 1, len(support))
    spacing = np.empty(len(support))
    # In chunks: the neighbour table of a 12-megapixel cloud would take 1 GB.
    for start in range(0, len(support), _SPACING_CHUNK):
        dist, _ = tree.query(support[start : start + _SPACING_CHUNK], k=k)
        spacing[start : start + len(dist)] = dist[:, -1]

    def near(points):
        d, i = tree.query(points, k=1)
        return d <= max_spacings * spacing[i]

    keep_v = near(vertices)
    if rig is not None:
        h, w = shape
        z = vertices[:, 2]
        with np.errstate(invalid="ignore", divide="ignore"):
            u = rig.focal_px * vertices[:, 0] / z + rig.cx
            v = rig.focal_px * vertices[:, 1] / z + rig.cy
        # Pixel centres are at integers: the image covers [-0.5, W - 0.5).
        keep_v &= (z > 0) & (u >= -0.5) & (u < w - 0.5) & (v >= -0.5) & (v < h - 0.5)
    keep = keep_v[faces].all(axis=1)
    keep[keep] = near(vertices[faces[keep]].mean(axis=1))
    return keep


def poisson_mesh(
    cloud: PointCloud,
    poisson_depth: int = 9,
    density_quantile: float = 0.02,
    scale: float = 1.1,
    trim_spacings: float = 1.5,
    rig: RectifiedRig | None = None,
    max_hole_edges: int = 30,
    max_depth_jump: float = 0.03,
) -> TriMesh:
    """Watertight-then-trimmed surface by screened Poisson reconstruction (Open3D).

    The surface is cut back, because Poisson closes every gap: vertices whose
    Poisson density (octree support) is below the ``density_quantile``
    quantile are removed with their faces; faces with a vertex outside the
    cloud's bounding box, enlarged on each side by 5 % of its size (at least
    two median point spacings), are removed; then, with ``trim_spacings > 0``,
    every face not supported by the points (:func:`supported_faces`): farther
    than ``trim_spacings`` local point spacings from them, or, with ``rig``,
    out of the left camera's view.
    With ``rig`` the small holes grid repair would fill count as supported
    (:func:`support_points`), so only gaps larger than that stay open: the
    surface Poisson invents across a depth discontinuity, behind a foreground
    object or over an unmatched patch is taken out. The density trim alone
    keeps such surface wherever the octree is deep, that is next to dense
    points.

    Parameters
    ----------
    cloud : PointCloud
        Points with normals (see :func:`~stereomesh.geometry.filters.filter_cloud`).
    poisson_depth : int
        Octree depth; the finest cell is about ``extent / 2**poisson_depth``.
    density_quantile : float
        Share of lowest-density vertices removed, in [0, 1).
    scale : float
        Reconstruction cube diameter over the cloud's bounding-cube diameter.
    trim_spacings : float
        Largest distance of the kept surface from the points, in local point
        spacings (a point's distance to its 4th nearest neighbour); 0 keeps
        every face the first two trims leave.
    rig : RectifiedRig, optional
        The rig of the cloud's left camera frame, for the view test and the
        small holes.
    max_hole_edges : int
        Largest hole that counts as supported, in boundary edges of the pixel
        grid (as for grid repair); used with ``rig``.
    max_depth_jump : float
        Largest relative deviation of a hole's surround from a plane for the
        hole to count as supported; used with ``rig``.

    Returns
    -------
    TriMesh
        Vertices in the cloud's unit, colours interpolated by Open3D, normals
        from the faces, ``confidence`` and ``sigma_z`` from the nearest input
        point. Vertices farther than two median point spacings from every input
        point have ``filled = 1`` and confidence 0. ``uv`` is None.

    Raises
    ------
    ValueError
        If the cloud has no normals or fewer than 4 points.

    Examples
    --------
    >>> import numpy as np
    >>> from stereomesh.geometry.filters import estimate_normals
    >>> g = np.mgrid[0:40, 0:40].reshape(2, -1).T / 40.0
    >>> pts = np.c_[g, np.ones(len(g))]
    >>> pc = PointCloud(pts, np.full((len(g), 3), 200, np.uint8),
    ...                 np.ones(len(g), np.float32), np.zeros(len(g), np.float32))
    >>> m = poisson_mesh(estimate_normals(pc), poisson_depth=6)
    >>> bool(abs(np.median(m.vertices[:, 2]) - 1.0) < 0.01)
    True
    """
    import open3d as o3d
    from scipy.spatial import cKDTree

    if not isinstance(cloud, PointCloud):
        raise TypeError(f"cloud must be a PointCloud, got {type(cloud).__name__}")
    if cloud.normals is None:
        raise ValueError("poisson_mesh needs oriented normals; run filter_cloud first")
    if len(cloud) < 4:
        raise ValueError(f"poisson_mesh needs at least 4 points, got {len(cloud)}")
    if not 0.0 <= density_quantile < 1.0:
        raise ValueError(f"density_quantile must be in [0, 1), got {density_quantile}")
    if not trim_spacings >= 0:
        raise ValueError(f"trim_spacings must be >= 0, got {trim_spacings}")

    pcd = o3d.geometry.PointCloud()
    pcd.points = o3d.utility.Vector3dVector(cloud.points)
    pcd.normals = o3d.utility.Vector3dVector(cloud.normals.astype(np.float64))
    pcd.colors = o3d.utility.Vector3dVector(cloud.colors.astype(np.float64) / 255.0)
    mesh, dens = o3d.geometry.TriangleMesh.create_from_point_cloud_poisson(
        pcd, depth=int(poisson_depth), scale=float(scale)
    )
    verts = np.asarray(mesh.vertices, np.float64)
    faces = np.asarray(mesh.triangles, np.int64)
    colors = np.asarray(mesh.vertex_colors, np.float64)
    dens = np.asarray(dens, np.float64)
    del mesh

    keep_v = np.ones(len(verts), bool)
    if density_quantile > 0 and len(dens):
        keep_v &= dens >= np.quantile(dens, density_quantile)
    lo, hi = cloud.points.min(axis=0), cloud.points.max(axis=0)
    spacing = _median_spacing(cloud.points)
    # Two spacings at least: a flat cloud (a wall seen square-on) has a box of no
    # depth, and Poisson's vertices scatter about the plane by a fraction of a cell.
    margin = np.maximum(_POISSON_BOX_MARGIN * (hi - lo), _POISSON_FILLED_SPACINGS * spacing)
    keep_v &= np.all((verts >= lo - margin) & (verts <= hi + margin), axis=1)
    faces = faces[keep_v[faces].all(axis=1)]
    if trim_spacings > 0 and len(faces):
        if rig is not None:
            support, shape = support_points(cloud, rig, max_hole_edges, max_depth_jump)
        else:
            support, shape = cloud.points, None
        faces = faces[supported_faces(verts, faces, support, trim_spacings, rig, shape)]
    used = np.zeros(len(verts), bool)
    used[faces.ravel()] = True
    remap = np.cumsum(used) - 1
    verts, colors = verts[used], colors[used]
    faces = remap[faces].astype(np.int32)

    dist, nearest = cKDTree(cloud.points).query(verts, k=1)
    conf = cloud.confidence[nearest].copy()
    sigma = cloud.sigma_z[nearest]
    filled = (dist > _POISSON_FILLED_SPACINGS * spacing).astype(np.uint8)
    conf[filled == 1] = 0.0
    if len(colors) != len(verts):
        colors_u8 = cloud.colors[nearest]
    else:
        colors_u8 = np.clip(np.rint(colors * 255.0), 0, 255).astype(np.uint8)
    return TriMesh(
        vertices=verts,
        faces=faces,
        colors=colors_u8,
        confidence=conf,
        sigma_z=sigma,
        filled=filled,
        normals=vertex_normals(verts, faces),
        uv=None,
    )
