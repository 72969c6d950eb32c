"""Containers for point clouds and triangle meshes with per-vertex attributes.

Both carry, besides position and colour, the matcher's ``confidence`` in [0, 1]
and ``sigma_z``, the one-sigma depth uncertainty in the rig's length unit, so
downstream users can tell measured geometry from guesswork.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


def _float_array(name: str, value, dtype, shape_tail: tuple[int, ...], n: int | None) -> np.ndarray:
    arr = np.asarray(value)
    if not (np.issubdtype(arr.dtype, np.floating) or np.issubdtype(arr.dtype, np.integer)):
        raise TypeError(f"{name} must be numeric, got dtype {arr.dtype}")
    arr = np.ascontiguousarray(arr, dtype=dtype)
    _check_shape(name, arr, shape_tail, n)
    return arr


def _check_shape(name: str, arr: np.ndarray, shape_tail: tuple[int, ...], n: int | None) -> None:
    want_ndim = 1 + len(shape_tail)
    if arr.ndim != want_ndim or arr.shape[1:] != shape_tail or (n is not None and len(arr) != n):
        want = ("N" if n is None else str(n),) + tuple(str(s) for s in shape_tail)
        raise ValueError(f"{name} must have shape ({', '.join(want)}), got {arr.shape}")


def _uint8_array(name: str, value, shape_tail: tuple[int, ...], n: int) -> np.ndarray:
    arr = np.asarray(value)
    # A float colour in [0, 1] silently cast to uint8 would turn black, so refuse it.
    if arr.dtype != np.uint8:
        raise TypeError(f"{name} must be uint8, got dtype {arr.dtype}")
    arr = np.ascontiguousarray(arr)
    _check_shape(name, arr, shape_tail, n)
    return arr


def _index(mask_or_index, n: int) -> np.ndarray:
    sel = np.asarray(mask_or_index)
    if sel.dtype == bool:
        if sel.shape != (n,):
            raise ValueError(f"boolean mask must have shape ({n},), got {sel.shape}")
        return np.flatnonzero(sel)
    if not np.issubdtype(sel.dtype, np.integer):
        raise TypeError(f"selection must be a boolean mask or integer indices, got {sel.dtype}")
    sel = sel.ravel()
    if sel.size and (sel.min() < -n or sel.max() >= n):
        raise IndexError(f"index out of range for {n} elements")
    return sel


def take_rows(a: np.ndarray | None, index: np.ndarray) -> np.ndarray | None:
    """Rows ``index`` of an attribute array (None stays None).

    ``np.take`` of indices: about 3 x faster than fancy indexing on the rows of
    a megapixel cloud, and a boolean mask would recount itself per attribute.
    """
    return None if a is None else np.take(a, index, axis=0)


@dataclass
class PointCloud:
    """Coloured points in the left rectified camera frame.

    The frame is x right, y down, z forward (into the scene), origin at the left
    camera centre.

    Parameters
    ----------
    points : (N, 3) float64
        Positions in the rig's length unit (metres for a metric rig).
    colors : (N, 3) uint8
        RGB colour of each point.
    confidence : (N,) float32
        Matching confidence in [0, 1]; 1 when the matcher gave none.
    sigma_z : (N,) float32
        One-sigma depth uncertainty, same unit as ``points``.
    normals : (N, 3) float32 or None
        Unit normals pointing toward the camera, once estimated.
    pixels : (N, 2) int32 or None
        ``(col, row)`` of the left-image pixel each point came from.

    Examples
    --------
    >>> import numpy as np
    >>> pc = PointCloud(np.zeros((2, 3)), np.zeros((2, 3), np.uint8),
    ...                 np.ones(2, np.float32), np.zeros(2, np.float32))
    >>> len(pc.subset(np.array([True, False])))
    1
    """

    points: np.ndarray
    colors: np.ndarray
    confidence: np.ndarray
    sigma_z: np.ndarray
    normals: np.ndarray | None = None
    pixels: np.ndarray | None = None

    def __post_init__(self) -> None:
        self.points = _float_array("points", self.points, np.float64, (3,), None)
        n = len(self.points)
        self.colors = _uint8_array("colors", self.colors, (3,), n)
        self.confidence = _float_array("confidence", self.confidence, np.float32, (), n)
        self.sigma_z = _float_array("sigma_z", self.sigma_z, np.float32, (), n)
        if self.normals is not None:
            self.normals = _float_array("normals", self.normals, np.float32, (3,), n)
        if self.pixels is not None:
            pix = np.asarray(self.pixels)
            if not np.issubdtype(pix.dtype, np.integer):
                raise TypeError(f"pixels must be integer, got dtype {pix.dtype}")
            self.pixels = np.ascontiguousarray(pix, np.int32)
            _check_shape("pixels", self.pixels, (2,), n)

    def __len__(self) -> int:
        return len(self.points)

    def subset(self, mask_or_index) -> PointCloud:
        """Points selected by a boolean mask of length N or by integer indices.

        Parameters
        ----------
        mask_or_index : (N,) bool or (M,) int array

        Returns
        -------
        PointCloud
            A new cloud with every attribute selected the same way (copies).
        """
        idx = _index(mask_or_index, len(self))

        def pick(a):
            return take_rows(a, idx)

        return PointCloud(
            points=pick(self.points),
            colors=pick(self.colors),
            confidence=pick(self.confidence),
            sigma_z=pick(self.sigma_z),
            normals=pick(self.normals),
            pixels=pick(self.pixels),
        )


@dataclass
class TriMesh:
    """Triangle mesh with per-vertex colour, confidence and depth uncertainty.

    Parameters
    ----------
    vertices : (V, 3) float64
        Positions in the rig's length unit, left camera frame (x right, y down,
        z forward).
    faces : (F, 3) int32
        Vertex indices; counter-clockwise seen from the side the normal points to.
    colors : (V, 3) uint8
        RGB vertex colours.
    confidence : (V,) float32
        Matching confidence in [0, 1]; 0 for vertices invented by hole filling.
    sigma_z : (V,) float32
        One-sigma depth uncertainty, same unit as ``vertices``.
    filled : (V,) uint8
        1 for vertices created by hole filling or surface extrapolation, else 0.
    normals : (V, 3) float32 or None
        Unit vertex normals.
    uv : (V, 2) float32 or None
        Texture coordinates into the left rectified image, OpenGL convention
        (origin at the bottom-left corner, v up).
    pixels : (V, 2) int32 or None
        ``(col, row)`` of the left-image pixel each vertex stands on, for meshes
        built on the image grid (:func:`~stereomesh.geometry.surface.depth_grid_mesh`);
        such meshes can be repaired in pixel space.

    Examples
    --------
    >>> import numpy as np
    >>> m = TriMesh(np.eye(3), np.array([[0, 1, 2]]), np.zeros((3, 3), np.uint8),
    ...             np.ones(3, np.float32), np.zeros(3, np.float32), np.zeros(3, np.uint8))
    >>> m.faces.dtype
    dtype('int32')
    """

    vertices: np.ndarray
    faces: np.ndarray
    colors: np.ndarray
    confidence: np.ndarray
    sigma_z: np.ndarray
    filled: np.ndarray
    normals: np.ndarray | None = None
    uv: np.ndarray | None = None
    pixels: np.ndarray | None = None

    def __post_init__(self) -> None:
        self.vertices = _float_array("vertices", self.vertices, np.float64, (3,), None)
        v = len(self.vertices)
        faces = np.asarray(self.faces)
        if faces.size == 0:
            faces = faces.reshape(0, 3).astype(np.int32)
        if not np.issubdtype(faces.dtype, np.integer):
            raise TypeError(f"faces must be integer, got dtype {faces.dtype}")
        _check_shape("faces", faces, (3,), None)
        if faces.size and (faces.min() < 0 or faces.max() >= v):
            raise ValueError(f"faces index vertices outside 0..{v - 1}")
        self.faces = np.ascontiguousarray(faces, np.int32)
        self.colors = _uint8_array("colors", self.colors, (3,), v)
        self.confidence = _float_array("confidence", self.confidence, np.float32, (), v)
        self.sigma_z = _float_array("sigma_z", self.sigma_z, np.float32, (), v)
        self.filled = _uint8_array("filled", self.filled, (), v)
        if self.normals is not None:
            self.normals = _float_array("normals", self.normals, np.float32, (3,), v)
        if self.uv is not None:
            self.uv = _float_array("uv", self.uv, np.float32, (2,), v)
        if self.pixels is not None:
            pix = np.asarray(self.pixels)
            if not np.issubdtype(pix.dtype, np.integer):
                raise TypeError(f"pixels must be integer, got dtype {pix.dtype}")
            self.pixels = np.ascontiguousarray(pix, np.int32)
            _check_shape("pixels", self.pixels, (2,), v)
