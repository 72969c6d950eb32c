"""The demo scene's layout, textures and ray-caster (see :mod:`stereomesh.demo_scene`)."""

from __future__ import annotations

from dataclasses import dataclass

import cv2
import numpy as np
from scipy import sparse

BASE_WIDTH = 640
BASE_FOCAL = 700.0
BASELINE = 0.40
MIN_WIDTH = 64
MAX_WIDTH = 4000

# Layout (metres).  The door, its surround and the plaque are axis-aligned so that
# the steps of the height field lie on a few lines X = c or Y = c.
Z_WALL = 3.50
Z_FRAME = Z_WALL - 0.04
Z_DOOR = Z_WALL + 0.35
Z_PLAQUE = Z_WALL - 0.008
DOOR_HALF = 0.42
DOOR_TOP = -0.50
JAMB_OUTER = 0.58
LINTEL_HALF = 0.66
LINTEL_TOP = -0.86
JOINT_PITCH = 0.36
PLAQUE_BOX = (-1.16, -0.80, -0.42, 0.04)
PILLAR_X, PILLAR_Z, PILLAR_R = 0.75, 2.30, 0.12

WALL, FRAME, DOOR, PLAQUE, PILLAR = 0, 1, 2, 3, 4
_PIECES = (WALL, FRAME, DOOR, PLAQUE)
_X_LINES = (
    -LINTEL_HALF,
    -JAMB_OUTER,
    -DOOR_HALF,
    DOOR_HALF,
    JAMB_OUTER,
    LINTEL_HALF,
    PLAQUE_BOX[0],
    PLAQUE_BOX[1],
)
_Y_LINES = (LINTEL_TOP, DOOR_TOP, PLAQUE_BOX[2], PLAQUE_BOX[3])

# World window any ray of either camera can reach: the field of view is fixed
# (focal length scales with width) and no surface lies beyond Z = 3.95.
_WINDOW = (-1.90, 2.32, -1.42, 1.42)
_PIECE_BOX = {
    WALL: _WINDOW,
    FRAME: (-LINTEL_HALF, LINTEL_HALF, LINTEL_TOP, _WINDOW[3]),
    DOOR: (-DOOR_HALF, DOOR_HALF, DOOR_TOP, _WINDOW[3]),
    PLAQUE: PLAQUE_BOX,
}
_MARGIN = 0.06
_PILLAR_BOX = (-0.40, 0.40, -0.95, 0.95)  # arc length around the axis, Y

# Shading and camera response.
_LIGHT = np.array([-0.45, -0.55, -0.70], np.float32)
_LIGHT /= np.linalg.norm(_LIGHT)
_AMBIENT, _DIFFUSE = 0.30, 0.85
_EXPOSURE = 0.92
_RIGHT_GAIN, _RIGHT_OFFSET = 0.90, 8.0
_NOISE_SIGMA = 1.2
_SEED_LEFT, _SEED_RIGHT = 1101, 2202
_SUBSAMPLES = ((-0.25, -0.25), (0.25, -0.25), (-0.25, 0.25), (0.25, 0.25))

_NEWTON_STEPS = 6
_FOLD = 0.4  # compresses a vertical face's depth onto the face of the piece it bounds
_EDGE_SLACK = 2e-4
_OCCLUSION_TOL = 0.003  # relative depth: below this a nearer hit is the same surface
_MESH_JUMP = 0.03
_RAYS_PER_STRIP = 1 << 20
_LANE = 4096  # cv2.remap refuses maps wider than SHRT_MAX


# --------------------------------------------------------------------------- noise


def _bspline_weights(t: np.ndarray) -> np.ndarray:
    """Cubic B-spline weights of the four lattice points around fractional offset ``t``."""
    t2 = t * t
    t3 = t2 * t
    s = 1.0 - t
    return np.stack([s * s * s, 3 * t3 - 6 * t2 + 4, -3 * t3 + 3 * t2 + 3 * t + 1, t3], -1) / 6.0


# B-spline smoothing lowers the variance of the lattice values; this undoes it on
# average so that octave amplitudes mean what they say.
_tt = (np.arange(4096) + 0.5) / 4096
_OCTAVE_GAIN = 1.0 / (np.sqrt(1.0 / 3.0) * float(np.mean(np.sum(_bspline_weights(_tt) ** 2, -1))))
del _tt


def _hash_uniform(ix: np.ndarray, iy: np.ndarray, seed: int) -> np.ndarray:
    """Values in [-1, 1) at integer lattice points, a pure function of (ix, iy, seed).

    Hashing rather than drawing from a generator makes the noise the same world
    function whatever grid it is baked on, so separately baked pieces agree.
    """
    x = np.ascontiguousarray(ix, np.int64).view(np.uint64)[None, :]
    y = np.ascontiguousarray(iy, np.int64).view(np.uint64)[:, None]
    salt = np.uint64((seed * 0x165667B19E3779F9) % 2**64)
    h = x * np.uint64(0x9E3779B97F4A7C15) + y * np.uint64(0xC2B2AE3D27D4EB4F) + salt
    for mult in (0xFF51AFD7ED558CCD, 0xC4CEB9FE1A85EC53):
        h ^= h >> np.uint64(33)
        h *= np.uint64(mult)
    h ^= h >> np.uint64(33)
    return (h >> np.uint64(11)).astype(np.float64) * 2.0**-52 - 1.0


def _axis_matrix(coords: np.ndarray, spacing: float) -> tuple[sparse.csr_matrix, np.ndarray]:
    """Sparse B-spline interpolation from a 1-D lattice of ``spacing`` to ``coords``."""
    g = coords / spacing
    base = np.floor(g)
    w = _bspline_weights(g - base)
    base = base.astype(np.int64)
    lo = int(base.min()) - 1
    n_lat = int(base.max()) + 3 - lo
    cols = (base - 1 - lo)[:, None] + np.arange(4)
    rows = np.repeat(np.arange(coords.size), 4)
    m = sparse.csr_matrix((w.ravel(), (rows, cols.ravel())), shape=(coords.size, n_lat))
    return m, np.arange(lo, lo + n_lat)


def _fbm(xs: np.ndarray, ys: np.ndarray, seed: int, octaves) -> np.ndarray:
    """Multi-octave value noise on the grid ``ys`` x ``xs``, unit standard deviation.

    Parameters
    ----------
    xs, ys : ndarray
        World coordinates of the grid columns and rows.
    seed : int
        Selects the noise function.
    octaves : sequence of (float, float, float)
        Lattice spacing along x and y and amplitude of each octave.

    Returns
    -------
    ndarray
        float32, shape ``(ys.size, xs.size)``.
    """
    out = np.zeros((ys.size, xs.size), np.float32)
    total = 0.0
    for k, (sx, sy, amp) in enumerate(octaves):
        mx, ix = _axis_matrix(xs, sx)
        my, iy = _axis_matrix(ys, sy)
        lattice = _hash_uniform(ix, iy, seed * 131 + k)
        out += (amp * _OCTAVE_GAIN * (mx @ (my @ lattice).T).T).astype(np.float32)
        total += amp * amp
    out /= np.float32(np.sqrt(total))
    return out


def _octaves(spacing: float, count: int, persistence: float = 0.5, aspect: float = 1.0):
    """Octaves halving in spacing from ``spacing`` (x) and ``spacing * aspect`` (y)."""
    return [(spacing / 2**k, spacing * aspect / 2**k, persistence**k) for k in range(count)]


def _smoothstep(e0: float, e1: float, x):
    t = np.clip((x - e0) / (e1 - e0), 0.0, 1.0)
    return t * t * (3.0 - 2.0 * t)


def _mix(a, b, t):
    return a + (b - a) * t[..., None]


# ---------------------------------------------------------------------- the pieces


def _piece_of(X, Y) -> np.ndarray:
    """Which piece of the height field lies over world point (X, Y)."""
    ax = np.abs(X)
    piece = np.zeros(np.broadcast(X, Y).shape, np.int8)
    lintel = (ax <= LINTEL_HALF) & (Y >= LINTEL_TOP) & (Y < DOOR_TOP)
    jambs = (ax <= JAMB_OUTER) & (Y >= DOOR_TOP)
    piece[lintel | jambs] = FRAME
    piece[(ax <= DOOR_HALF) & (Y >= DOOR_TOP)] = DOOR
    x0, x1, y0, y1 = PLAQUE_BOX
    piece[(X >= x0) & (X <= x1) & (Y >= y0) & (Y <= y1)] = PLAQUE
    return piece


def _inner_distance(xs, ys, piece: int, texel: float) -> np.ndarray:
    """Distance (m) from each grid point inside ``piece`` to the piece's edge; 0 outside."""
    mask = (_piece_of(xs[None, :], ys[:, None]) == piece).astype(np.uint8)
    return cv2.distanceTransform(mask, cv2.DIST_L2, cv2.DIST_MASK_PRECISE) * np.float32(texel)


def _undulation(xs, ys):
    # Shared by the wall and the plaque so the plaque sits on the wall everywhere.
    return 0.006 * _fbm(xs, ys, 7, [(1.6, 1.6, 1.0), (0.8, 0.8, 0.5)])


def _bake_wall(xs, ys, texel):
    Y = ys[:, None]
    rough = _fbm(xs, ys, 11, _octaves(0.06, 5, 0.6))
    flake = _smoothstep(0.9, 1.3, _fbm(xs, ys, 12, _octaves(0.22, 3, 0.5)))
    gate = _smoothstep(0.2, 0.8, _fbm(xs, ys, 14, _octaves(0.7, 2, 0.5)))
    crack = gate * np.exp(-((_fbm(xs, ys, 13, _octaves(0.3, 3, 0.45)) / 0.025) ** 2))
    relief = _undulation(xs, ys) + 0.0012 * rough + 0.003 * flake + 0.0015 * crack

    mottle = _fbm(xs, ys, 21, _octaves(0.6, 3, 0.55))
    grain = _fbm(xs, ys, 22, _octaves(0.032, 4, 0.75))
    stain = _smoothstep(0.5, 1.6, _fbm(xs, ys, 23, _octaves(0.4, 4, 0.5)))
    damp = _smoothstep(0.55, 1.25, Y + 0.12 * mottle)
    lum = (1 + 0.07 * mottle + 0.11 * grain) * (1 - 0.28 * damp) * (1 - 0.45 * crack)
    colour = np.float32([0.80, 0.74, 0.62]) * lum[..., None]
    under = np.float32([0.60, 0.50, 0.41]) * (1 + 0.16 * grain)[..., None]
    colour = _mix(colour, under, flake)
    colour *= 1 - 0.25 * stain[..., None] * np.float32([0.8, 0.95, 1.2])
    return relief, colour


def _rosette(X, Y, cx, cy, r, petals, height):
    """Height of a carved rosette: a central boss ringed by rounded petals."""
    dx, dy = X - cx, Y - cy
    q = np.hypot(dx, dy) / r
    petal = (0.5 + 0.5 * np.cos(petals * np.arctan2(dy, dx))) ** 1.5
    envelope = np.clip(1 - q * q, 0, None) ** 2
    ring = _smoothstep(0.18, 0.42, q)
    return height * (
        0.7 * envelope * (0.35 + 0.65 * petal * ring) + 0.3 * np.exp(-((q / 0.22) ** 2))
    )


def _lintel_relief(xs, ys):
    """Depth offset of the lintel: a sunken panel (positive) with rosettes (negative)."""
    X, Y = xs[None, :], ys[:, None]
    # Ramps of 24 mm keep the slope seen along any ray below 1 (see _solve_piece).
    panel = (
        _smoothstep(-0.624, -0.600, X)
        * (1 - _smoothstep(0.600, 0.624, X))
        * _smoothstep(-0.834, -0.810, Y)
        * (1 - _smoothstep(-0.562, -0.538, Y))
    )
    depth = 0.025 * panel
    for cx, r, petals in (
        (0.0, 0.11, 8),
        (-0.27, 0.09, 6),
        (0.27, 0.09, 6),
        (-0.48, 0.075, 5),
        (0.48, 0.075, 5),
    ):
        depth = depth - _rosette(X, Y, cx, -0.68, r, petals, 0.07 * r / 0.11)
    return depth.astype(np.float32)


def _bake_frame(xs, ys, texel):
    X, Y = xs[None, :], ys[:, None]
    edge = _inner_distance(xs, ys, FRAME, texel)
    wear = np.maximum(_fbm(xs, ys, 31, _octaves(0.12, 3, 0.5)), 0)
    bevel = (0.010 + 0.008 * wear) * (1 - _smoothstep(0.0, 0.025, edge))
    k = np.clip(np.rint((Y - DOOR_TOP) / JOINT_PITCH), 0, None)
    joint_d = np.where(Y > DOOR_TOP - 0.02, np.abs(Y - DOOR_TOP - k * JOINT_PITCH), 1.0)
    joint = np.exp(-((joint_d / 0.005) ** 2))
    fine = _fbm(xs, ys, 33, _octaves(0.012, 2, 0.6))
    pits = np.maximum(fine - 1.3, 0)
    relief = _lintel_relief(xs, ys)
    rough = _fbm(xs, ys, 32, _octaves(0.08, 5, 0.55))
    offset = bevel + 0.004 * joint + relief + 0.0012 * rough + 0.004 * pits

    # Blocks from different beds of stone differ a little in colour; the lintel is a
    # single block.
    block = np.floor((Y - DOOR_TOP) / JOINT_PITCH).clip(-1) + 1 + 20 * (X > 0)
    block = np.where(Y < DOOR_TOP, 0, block).astype(np.int64)
    tint = 1 + 0.06 * _hash_uniform(np.arange(64), np.zeros(1, np.int64), 35)[0]
    mottle = _fbm(xs, ys, 36, _octaves(0.15, 3, 0.5))
    grain = _fbm(xs, ys, 37, _octaves(0.02, 4, 0.7))
    speck = _smoothstep(1.0, 1.6, _fbm(xs, ys, 38, _octaves(0.006, 2, 0.5)))
    streak = _smoothstep(0.3, 1.3, _fbm(xs, ys, 39, _octaves(0.03, 3, 0.5, aspect=12.0)))
    lichen = 0.7 * _smoothstep(1.1, 1.7, _fbm(xs, ys, 40, _octaves(0.12, 3, 0.55)))
    lum = (
        tint[block]
        * (1 + 0.08 * mottle + 0.14 * grain)
        * (1 - 0.30 * speck)
        * (1 - 0.22 * streak)
        * (1 - 3.0 * np.maximum(relief, 0))
        * (1 - 0.3 * pits)
    )
    colour = np.float32([0.64, 0.60, 0.53]) * lum[..., None].astype(np.float32)
    colour = _mix(colour, np.float32([0.55, 0.56, 0.40]) * (1 + 0.1 * grain)[..., None], lichen)
    colour = _mix(colour, np.float32([0.46, 0.44, 0.40]), 0.8 * joint)
    return offset, colour


def _bake_door(xs, ys, texel):
    X, Y = xs[None, :], ys[:, None]
    pitch = 2 * DOOR_HALF / 6
    plank_pos = (X + DOOR_HALF) / pitch
    plank = np.clip(np.floor(plank_pos), 0, 5).astype(np.int64)
    gap = np.abs(plank_pos - np.rint(plank_pos)) * pitch
    groove = np.exp(-((gap / 0.004) ** 2)) * np.ones_like(Y)
    studs = np.zeros(np.broadcast(X, Y).shape, np.float32)
    for row in (-0.30, 0.25, 0.80):
        for col in range(6):
            q2 = ((X - (-DOOR_HALF + (col + 0.5) * pitch)) ** 2 + (Y - row) ** 2) / 0.016**2
            studs += np.clip(1 - q2, 0, None) ** 1.5
    rough = _fbm(xs, ys, 41, _octaves(0.05, 4, 0.6))
    offset = 0.005 * groove - 0.010 * studs + 0.0005 * rough

    grain = _fbm(xs, ys, 42, _octaves(0.02, 4, 0.6, aspect=15.0))
    rings = 0.5 + 0.5 * np.sin(9.0 * grain + 2.1 * plank)
    fleck = _fbm(xs, ys, 43, _octaves(0.01, 2, 0.6))
    tint = 1 + 0.08 * _hash_uniform(np.arange(6), np.zeros(1, np.int64), 44)[0]
    shade = 0.55 + 0.45 * _smoothstep(0.0, 0.25, _inner_distance(xs, ys, DOOR, texel))
    lum = tint[plank] * (0.82 + 0.3 * rings + 0.06 * fleck) * (1 - 0.55 * groove) * shade
    colour = np.float32([0.42, 0.28, 0.17]) * lum[..., None].astype(np.float32)
    colour = _mix(
        colour, np.float32([0.20, 0.20, 0.22]) * shade[..., None], _smoothstep(0, 0.05, studs)
    )
    return offset, colour


def _bake_plaque(xs, ys, texel):
    # Deliberately almost featureless: the matcher's low-texture case.
    offset = _undulation(xs, ys) + (Z_PLAQUE - Z_WALL)
    faint = _fbm(xs, ys, 51, _octaves(0.5, 1))
    colour = np.float32([0.42, 0.52, 0.58]) * (1 + 0.008 * faint)[..., None]
    return offset, colour


def _bake_pillar(ss, ys):
    """Granite albedo on (arc length around the axis, Y)."""
    mottle = _fbm(ss, ys, 61, _octaves(0.1, 3, 0.5))
    grain = _fbm(ss, ys, 62, _octaves(0.016, 3, 0.7))
    dark = _smoothstep(0.8, 1.5, _fbm(ss, ys, 63, _octaves(0.008, 2, 0.5)))
    pink = _smoothstep(0.6, 1.3, _fbm(ss, ys, 64, _octaves(0.012, 2, 0.5)))
    lum = (1 + 0.08 * mottle + 0.12 * grain) * (1 - 0.55 * dark)
    colour = np.float32([0.46, 0.44, 0.46]) * lum[..., None]
    return _mix(colour, np.float32([0.66, 0.48, 0.44]) * lum[..., None], 0.8 * pink)


_BAKERS = {WALL: _bake_wall, FRAME: _bake_frame, DOOR: _bake_door, PLAQUE: _bake_plaque}
_BASE_DEPTH = {WALL: Z_WALL, FRAME: Z_FRAME, DOOR: Z_DOOR, PLAQUE: Z_WALL}


# ----------------------------------------------------------------- ray casting


@dataclass
class _Texture:
    """A baked world-space map: height and its gradient (``geo``) and albedo."""

    x0: float
    y0: float
    texel: float
    geo: np.ndarray | None
    albedo: np.ndarray

    def _sample(self, image, X, Y) -> np.ndarray:
        n = X.size
        rows = max(1, -(-n // _LANE))
        mx = np.zeros(rows * _LANE, np.float32)
        my = np.zeros(rows * _LANE, np.float32)
        inv = 1.0 / self.texel
        mx[:n] = (X - self.x0) * inv
        my[:n] = (Y - self.y0) * inv
        out = cv2.remap(
            image,
            mx.reshape(rows, _LANE),
            my.reshape(rows, _LANE),
            cv2.INTER_LINEAR,
            borderMode=cv2.BORDER_REPLICATE,
        )
        return out.reshape(rows * _LANE, -1)[:n]

    def geo_at(self, X, Y) -> np.ndarray:
        """(n, 3): height Z, dZ/dX, dZ/dY."""
        return self._sample(self.geo, X, Y)

    def albedo_at(self, X, Y) -> np.ndarray:
        return self._sample(self.albedo, X, Y)


def _at(origin, idx):
    """``origin`` at the rays ``idx``: a number stays, an array is indexed."""
    return origin[idx] if np.ndim(origin) else origin


def _grid(box, texel):
    x0, x1, y0, y1 = box
    x0, x1, y0, y1 = x0 - _MARGIN, x1 + _MARGIN, y0 - _MARGIN, y1 + _MARGIN
    xs = x0 + texel * np.arange(int(np.ceil((x1 - x0) / texel)) + 1)
    ys = y0 + texel * np.arange(int(np.ceil((y1 - y0) / texel)) + 1)
    return xs, ys


@dataclass
class _Hits:
    z: np.ndarray
    kind: np.ndarray  # piece id, or PILLAR
    face: np.ndarray  # 0 on a piece's top or the pillar, 1 a face X = c, 2 a face Y = c
    sign: np.ndarray  # direction the ray crosses a face
    ax: np.ndarray  # albedo coordinates of face hits
    ay: np.ndarray


class _Scene:
    """The baked scene and its ray-caster.

    A ray is ``(ox + u Z, oy + v Z, Z)`` for ``Z`` from 0: it crosses the plane
    ``Z = 0`` at ``(ox, oy)`` with direction ``(u, v, 1)``; ``ox``, ``oy`` are
    numbers or one per ray (rays of a turned camera). ``window`` is the world
    box ``(x0, x1, y0, y1)`` the textures cover; the frontal view needs only
    the default.
    """

    def __init__(self, texel: float, window: tuple | None = None):
        self.boxes = dict(_PIECE_BOX)
        # Frontal rays never need marching; leaving it off keeps that render as it was.
        self.march = window is not None
        if window is not None:
            self.boxes[WALL] = tuple(window)
            self.boxes[FRAME] = (*_PIECE_BOX[FRAME][:3], window[3])
            self.boxes[DOOR] = (*_PIECE_BOX[DOOR][:3], window[3])
        self.tex: dict[int, _Texture] = {}
        self.depth_range: dict[int, tuple[float, float]] = {}
        for piece, bake in _BAKERS.items():
            xs, ys = _grid(self.boxes[piece], texel)
            offset, colour = bake(xs, ys, texel)
            offset = np.broadcast_to(offset, (ys.size, xs.size)).astype(np.float32)
            gy, gx = np.gradient(offset, texel)
            geo = np.dstack([offset + np.float32(_BASE_DEPTH[piece]), gx, gy]).astype(np.float32)
            self.tex[piece] = _Texture(
                xs[0], ys[0], texel, geo, np.ascontiguousarray(colour, np.float32)
            )
            self.depth_range[piece] = (float(geo[..., 0].min()), float(geo[..., 0].max()))
        ss, ys = _grid(_PILLAR_BOX, texel)
        self.pillar = _Texture(
            ss[0], ys[0], texel, None, np.ascontiguousarray(_bake_pillar(ss, ys), np.float32)
        )
        self.zmin = min(lo for lo, _ in self.depth_range.values()) - 0.002
        self.zmax = max(hi for _, hi in self.depth_range.values()) + 0.002

    def _height(self, piece, X, Y) -> np.ndarray:
        h = np.empty(X.size, np.float32)
        for p in _PIECES:
            idx = np.flatnonzero(piece == p)
            if idx.size:
                h[idx] = self.tex[p].geo_at(X[idx], Y[idx])[:, 0]
        return h

    def _solve_piece(self, piece, ox, oy, u, v):
        """Newton along the ray on one piece's smooth surface, extended past its edges.

        Along any ray the surface slope ``u dZ/dX + v dZ/dY`` stays below 1 (at most
        about 0.8, on the lintel), so each piece is crossed once and Newton's method
        finds that crossing.
        """
        tex = self.tex[piece]
        lo, hi = self.depth_range[piece]
        z = np.full(u.size, 0.5 * (lo + hi), np.float32)
        step = np.zeros_like(z)
        for _ in range(_NEWTON_STEPS):
            g = tex.geo_at(ox + u * z, oy + v * z)
            slope = u * g[:, 1] + v * g[:, 2]
            step = (z - g[:, 0]) / np.maximum(1 - slope, 0.3)
            z = np.clip(z - step, lo, hi)
        ok = np.abs(step) < 1e-4
        if self.march and not ok.all():
            # Rays of a turned camera can meet the carved relief at slopes above 1,
            # where Newton's method may cycle: march to the first crossing instead.
            bad = np.flatnonzero(~ok)
            z[bad], ok[bad] = self._march(tex, lo, hi, _at(ox, bad), _at(oy, bad), u[bad],
                                          v[bad])
        return z, ok

    @staticmethod
    def _march(tex, lo, hi, ox, oy, u, v):
        """First crossing of ``Z = height`` along rays: 64 samples, then bisection."""
        zs = np.linspace(lo, hi, 64, dtype=np.float32)
        above = np.empty((zs.size, u.size), bool)
        for k, zk in enumerate(zs):
            above[k] = zk >= tex.geo_at(ox + u * zk, oy + v * zk)[:, 0]
        first = np.argmax(above, axis=0)
        found = above[first, np.arange(u.size)]
        a = zs[np.maximum(first - 1, 0)].copy()
        b = zs[first].copy()
        for _ in range(24):
            m = 0.5 * (a + b)
            up = m >= tex.geo_at(ox + u * m, oy + v * m)[:, 0]
            b = np.where(up, m, b)
            a = np.where(up, a, m)
        return b.astype(np.float32), found

    def cast(self, ox, u: np.ndarray, v: np.ndarray, oy=0.0) -> _Hits:
        """First hit of each ray: depth Z and what was hit."""
        n = u.size
        z = np.full(n, np.inf, np.float32)
        kind = np.zeros(n, np.int8)
        face = np.zeros(n, np.int8)
        sign = np.zeros(n, np.int8)
        ax = np.zeros(n, np.float32)
        ay = np.zeros(n, np.float32)

        def take(idx, cand, k, f=0, s=None, fx=None, fy=None):
            better = cand < z[idx]
            sel = idx[better]
            z[sel] = cand[better]
            kind[sel] = k[better] if isinstance(k, np.ndarray) else k
            face[sel] = f
            if f:
                sign[sel] = s[better]
                ax[sel] = fx[better]
                ay[sel] = fy[better]

        for piece in _PIECES:
            bx0, bx1, by0, by1 = self.boxes[piece]
            lo, hi = self.depth_range[piece]
            if piece == WALL:
                idx = np.arange(n)
            else:
                xa, xb = ox + u * lo, ox + u * hi
                ya, yb = oy + v * lo, oy + v * hi
                idx = np.flatnonzero(
                    (np.maximum(xa, xb) >= bx0)
                    & (np.minimum(xa, xb) <= bx1)
                    & (np.maximum(ya, yb) >= by0)
                    & (np.minimum(ya, yb) <= by1)
                )
            if not idx.size:
                continue
            oxi, oyi = _at(ox, idx), _at(oy, idx)
            zc, ok = self._solve_piece(piece, oxi, oyi, u[idx], v[idx])
            ok &= _piece_of(oxi + u[idx] * zc, oyi + v[idx] * zc) == piece
            take(idx[ok], zc[ok], piece)

        # Vertical faces: where the ray passes over an edge while in front of the
        # piece it leaves and behind the piece it enters.
        eps = np.float32(1e-5)
        for axis, lines, d in ((1, _X_LINES, u), (2, _Y_LINES, v)):
            for c in lines:
                with np.errstate(divide="ignore", invalid="ignore"):
                    zb = ((c - ox) if axis == 1 else (c - oy)) / d
                idx = np.flatnonzero((zb > self.zmin) & (zb < self.zmax))
                if not idx.size:
                    continue
                zb = zb[idx].astype(np.float32)
                s = np.sign(d[idx]).astype(np.float32)
                other = ((_at(ox, idx) + u[idx] * zb) if axis == 2
                         else (_at(oy, idx) + v[idx] * zb))
                cx = np.full(idx.size, c, np.float32)
                px, py = (cx, other) if axis == 1 else (other, cx)
                if axis == 1:
                    before, after = _piece_of(px - s * eps, py), _piece_of(px + s * eps, py)
                else:
                    before, after = _piece_of(px, py - s * eps), _piece_of(px, py + s * eps)
                m = before != after
                if not m.any():
                    continue
                idx, zb, s, px, py = idx[m], zb[m], s[m], px[m], py[m]
                before, after = before[m], after[m]
                h_before = self._height(before, px, py)
                h_after = self._height(after, px, py)
                # The slack admits rays grazing an edge, whose top-surface solution
                # can land a hair beyond the edge while the face test misses by as much.
                hit = (zb <= h_before + _EDGE_SLACK) & (zb >= h_after - _EDGE_SLACK)
                fold = s * _FOLD * (zb - h_after)
                fx, fy = (px + fold, py) if axis == 1 else (px, py + fold)
                take(idx[hit], zb[hit], after[hit], axis, s[hit].astype(np.int8), fx[hit], fy[hit])

        px = PILLAR_X - ox
        a = 1 + u * u
        b = u * px + PILLAR_Z
        disc = b * b - a * (px * px + PILLAR_Z**2 - PILLAR_R**2)
        idx = np.flatnonzero(disc >= 0)
        zc = ((b[idx] - np.sqrt(disc[idx])) / a[idx]).astype(np.float32)
        take(idx, zc, PILLAR)
        if not np.isfinite(z).all():
            raise RuntimeError("demo scene: a ray missed every surface")
        return _Hits(z, kind, face, sign, ax, ay)

    def radiance(self, ox, u: np.ndarray, v: np.ndarray, oy=0.0) -> np.ndarray:
        """Lambertian radiance (n, 3), 1.0 = white lit head-on at full strength."""
        hit = self.cast(ox, u, v, oy)
        z = hit.z
        X, Y = ox + u * z, oy + v * z
        normal = np.zeros((z.size, 3), np.float32)
        albedo = np.empty((z.size, 3), np.float32)
        for piece in _PIECES:
            tex = self.tex[piece]
            idx = np.flatnonzero((hit.kind == piece) & (hit.face == 0))
            if idx.size:
                g = tex.geo_at(X[idx], Y[idx])
                nrm = np.column_stack([g[:, 1], g[:, 2], -np.ones(idx.size, np.float32)])
                normal[idx] = nrm / np.linalg.norm(nrm, axis=1, keepdims=True)
                albedo[idx] = tex.albedo_at(X[idx], Y[idx])
            idx = np.flatnonzero((hit.kind == piece) & (hit.face > 0))
            if idx.size:
                albedo[idx] = tex.albedo_at(hit.ax[idx], hit.ay[idx])
                normal[idx, hit.face[idx] - 1] = -hit.sign[idx]
        idx = np.flatnonzero(hit.kind == PILLAR)
        if idx.size:
            dx = X[idx] - PILLAR_X
            dz = z[idx] - PILLAR_Z
            normal[idx, 0] = dx / PILLAR_R
            normal[idx, 2] = dz / PILLAR_R
            albedo[idx] = self.pillar.albedo_at(PILLAR_R * np.arctan2(dx, -dz), Y[idx])
        lit = _AMBIENT + _DIFFUSE * np.maximum(normal @ _LIGHT, 0)
        return albedo * lit[:, None]
