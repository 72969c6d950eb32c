"""Rendering the demo views and their ground truth (see :mod:`stereomesh.demo_scene`)."""

from __future__ import annotations

import numpy as np

from stereomesh.demo_scene.scene import (
    _EXPOSURE,
    _MESH_JUMP,
    _NOISE_SIGMA,
    _OCCLUSION_TOL,
    _RAYS_PER_STRIP,
    _RIGHT_GAIN,
    _RIGHT_OFFSET,
    _SEED_LEFT,
    _SEED_RIGHT,
    _SUBSAMPLES,
    BASE_FOCAL,
    BASE_WIDTH,
    BASELINE,
    MAX_WIDTH,
    MIN_WIDTH,
    Z_WALL,
    _Scene,
)

# ------------------------------------------------------------------- rendering


def _rig(width: int) -> dict:
    if not isinstance(width, int | np.integer) or width % 4:
        raise ValueError(f"width must be a multiple of 4, got {width!r}")
    if not MIN_WIDTH <= width <= MAX_WIDTH:
        raise ValueError(f"width must be in [{MIN_WIDTH}, {MAX_WIDTH}], got {width}")
    width = int(width)
    height = width * 3 // 4
    return {
        "rectified": True,
        "image_size": [width, height],
        "focal_px": BASE_FOCAL * width / BASE_WIDTH,
        "cx": (width - 1) / 2,
        "cy": (height - 1) / 2,
        "baseline": BASELINE,
        "doffs": 0.0,
        "units": "m",
    }


def _strips(height: int, rays_per_row: int):
    step = max(1, _RAYS_PER_STRIP // rays_per_row)
    for r0 in range(0, height, step):
        yield r0, min(height, r0 + step)


def _render_view(
    scene: _Scene, calib: dict, ox: float, gain: float, offset: float, seed: int
) -> np.ndarray:
    width, height = calib["image_size"]
    f, cx, cy = calib["focal_px"], calib["cx"], calib["cy"]
    sub = np.array(_SUBSAMPLES, np.float32)
    image = np.empty((height, width, 3), np.uint8)
    cols = np.arange(width, dtype=np.float32)
    scale = np.float32(255.0 * _EXPOSURE * gain)
    for r0, r1 in _strips(height, width * len(sub)):
        rows = np.arange(r0, r1, dtype=np.float32)
        u = np.broadcast_to(
            (cols[None, :, None] + sub[:, 0] - cx) / f, (r1 - r0, width, len(sub))
        ).ravel()
        v = np.broadcast_to(
            (rows[:, None, None] + sub[:, 1] - cy) / f, (r1 - r0, width, len(sub))
        ).ravel()
        rgb = scene.radiance(ox, u.astype(np.float32), v.astype(np.float32))
        value = rgb.reshape(r1 - r0, width, len(sub), 3).mean(axis=2) * scale + np.float32(offset)
        for i, row in enumerate(range(r0, r1)):
            # Seeded per row, so the noise does not depend on how rows are grouped.
            rng = np.random.default_rng([seed, row])
            value[i] += rng.normal(0.0, _NOISE_SIGMA, (width, 3)).astype(np.float32)
        image[r0:r1] = np.clip(np.rint(value), 0, 255).astype(np.uint8)
    return image


def _ground_truth(scene: _Scene, calib: dict) -> tuple[np.ndarray, np.ndarray]:
    """Depth at the left pixel centres and the mask of pixels the right camera cannot see."""
    width, height = calib["image_size"]
    f, cx, cy, baseline = calib["focal_px"], calib["cx"], calib["cy"], calib["baseline"]
    depth = np.empty((height, width), np.float32)
    occluded = np.empty((height, width), np.uint8)
    cols = np.arange(width, dtype=np.float32)
    for r0, r1 in _strips(height, width):
        rows = np.arange(r0, r1, dtype=np.float32)
        u = np.broadcast_to((cols[None, :] - cx) / f, (r1 - r0, width)).ravel().astype(np.float32)
        v = np.broadcast_to((rows[:, None] - cy) / f, (r1 - r0, width)).ravel().astype(np.float32)
        z = scene.cast(0.0, u, v).z
        # The ray from the right camera through the same 3-D point.
        u_r = (u * z - baseline) / z
        x_r = u_r * f + cx
        inside = np.flatnonzero((x_r >= -0.5) & (x_r <= width - 0.5))
        # Codes as in the pipeline's occlusion.png: 1 hidden by a nearer surface,
        # 4 outside the right image.
        occ = np.full(z.size, 4, np.uint8)
        z_r = scene.cast(baseline, u_r[inside], v[inside]).z
        occ[inside] = z_r < z[inside] * (1 - _OCCLUSION_TOL)
        depth[r0:r1] = z.reshape(r1 - r0, width)
        occluded[r0:r1] = occ.reshape(r1 - r0, width)
    return depth, occluded


def _grid_mesh(depth: np.ndarray, calib: dict, step: int) -> tuple[np.ndarray, np.ndarray]:
    """Triangulate the depth map every ``step`` pixels, cutting at depth discontinuities."""
    f, cx, cy = calib["focal_px"], calib["cx"], calib["cy"]
    rows = np.arange(0, depth.shape[0], step)
    cols = np.arange(0, depth.shape[1], step)
    z = depth[np.ix_(rows, cols)].astype(np.float64)
    x = (cols[None, :] - cx) / f * z
    y = (rows[:, None] - cy) / f * z
    vertices = np.stack([x, y, z], -1).reshape(-1, 3).astype(np.float32)
    nr, nc = z.shape
    ids = np.arange(nr * nc).reshape(nr, nc)
    # Corner order makes each triangle face the camera (normal towards -z).
    tris = [(ids[:-1, :-1], ids[1:, :-1], ids[:-1, 1:]), (ids[:-1, 1:], ids[1:, :-1], ids[1:, 1:])]
    zf = z.ravel()
    faces = []
    for a, b, c in tris:
        t = np.stack([a.ravel(), b.ravel(), c.ravel()], 1)
        zt = zf[t]
        keep = zt.max(1) <= zt.min(1) * (1 + _MESH_JUMP)
        faces.append(t[keep])
    faces = np.concatenate(faces).astype(np.int32)
    return vertices, faces


def _default_mesh_step(width: int) -> int:
    # About 34 000 vertices at any width: a grid of about 15 mm on the wall keeps the
    # centimetre-scale relief and steps, and stays small enough to commit at 640 px.
    return max(1, round(width / 213))


def _texel_for(focal: float) -> float:
    # A texel of about 1.5 pixel footprints on the wall keeps the baked maps to a few
    # hundred MB at 12 MP.  Below 1.2 mm the finest noise octaves (a few mm) gain
    # nothing; above 2.5 mm the 640-pixel image would see the texels.
    return float(np.clip(1.5 * Z_WALL / focal, 0.0012, 0.0025))


def _scene_record(left, right, depth, occluded, calib: dict, mesh_step: int | None) -> dict:
    """The rendered views and their ground truth (disparity, mesh) as one record."""
    disparity = (np.float32(calib["focal_px"] * BASELINE) / depth).astype(np.float32)
    step = mesh_step or _default_mesh_step(calib["image_size"][0])
    vertices, faces = _grid_mesh(depth, calib, step)
    return {
        "left": left,
        "right": right,
        "gt_disparity": disparity,
        "gt_occlusion": occluded,
        "gt_depth": depth,
        "calib": calib,
        "gt_mesh_vertices": vertices,
        "gt_mesh_faces": faces,
    }


def render_demo_scene(width: int = BASE_WIDTH, mesh_step: int | None = None,
                      view: str = "frontal") -> dict:
    """Render the demo stereo pair and its ground truth.

    Parameters
    ----------
    width : int
        Image width in pixels, a multiple of 4 in [64, 4000]; the height is
        ``3 * width / 4`` and the focal length ``700 * width / 640`` pixels, so
        the field of view and the scene stay the same.
    mesh_step : int, optional
        Pixel spacing of the ground-truth mesh grid; default about ``width / 213``,
        which keeps the mesh at about 34 000 vertices at any width.
    view : {'frontal', 'oblique'}
        ``frontal``: the rig faces the wall (the committed demo). ``oblique``:
        the rig turned :data:`OBLIQUE_ANGLE` degrees about the vertical, from
        the left, so the wall recedes to the right and disparities vary across
        the whole image (see :func:`oblique_pose`); the pillar's curved face is
        seen from the side. The rig is still rectified (both cameras turn
        together) and every output means the same, in the left camera's frame.

    Returns
    -------
    dict
        ``left``, ``right``: uint8 (H, W, 3) RGB; ``gt_disparity``, ``gt_depth``:
        float32 (H, W), disparity in pixels and depth in metres at the left pixel
        centres; ``gt_occlusion``: uint8 (H, W), 1 where the left pixel's surface
        point is hidden from the right camera by a nearer surface, 4 where it falls
        outside the right image, else 0; ``calib``: the rectified
        calibration dict; ``gt_mesh_vertices`` float32 (N, 3), metres, left camera
        frame, and ``gt_mesh_faces`` int32 (M, 3).

    Examples
    --------
    >>> scene = render_demo_scene(128)
    >>> scene["left"].shape, scene["calib"]["focal_px"]
    ((96, 128, 3), 140.0)
    """
    if view not in VIEWS:
        raise ValueError(f"view must be one of {VIEWS}, got {view!r}")
    calib = _rig(width)
    if view == "oblique":
        return _render_oblique(calib, mesh_step)
    scene = _Scene(_texel_for(calib["focal_px"]))
    left = _render_view(scene, calib, 0.0, 1.0, 0.0, _SEED_LEFT)
    right = _render_view(scene, calib, BASELINE, _RIGHT_GAIN, _RIGHT_OFFSET, _SEED_RIGHT)
    depth, occluded = _ground_truth(scene, calib)
    return _scene_record(left, right, depth, occluded, calib, mesh_step)


VIEWS = ("frontal", "oblique")
"""The views :func:`render_demo_scene` renders."""

OBLIQUE_ANGLE = 25.0
"""Degrees the oblique rig is turned about the vertical axis."""

_OBLIQUE_TARGET = np.array([0.35, 0.0, Z_WALL])  # the point the turned rig looks at
_OBLIQUE_DISTANCE = 3.3  # metres from the left camera to that point


def oblique_pose() -> tuple[np.ndarray, np.ndarray]:
    """Rotation (camera to world) and left camera centre of the oblique view.

    The frontal left camera's frame is the world frame. The turned rig looks
    along ``(sin a, 0, cos a)`` at a point 0.35 m right of the door's centre
    on the wall plane, from 3.3 m; its baseline turns with it, so the pair
    stays rectified.

    Examples
    --------
    >>> rot, centre = oblique_pose()
    >>> bool(np.allclose(rot @ [0, 0, 1], [np.sin(np.radians(25)), 0, np.cos(np.radians(25))]))
    True
    """
    a = np.radians(OBLIQUE_ANGLE)
    rot = np.array([[np.cos(a), 0.0, np.sin(a)], [0.0, 1.0, 0.0], [-np.sin(a), 0.0, np.cos(a)]])
    centre = _OBLIQUE_TARGET - rot @ np.array([0.0, 0.0, _OBLIQUE_DISTANCE])
    return rot, centre


def _world_rays(rot, centre, xn, yn):
    """The scene's ray form ``(ox, oy, u, v)`` of camera rays with normalised coordinates.

    ``xn, yn``: ``(x - cx) / f`` and ``(y - cy) / f`` of the camera. Every ray of
    the turned rig runs toward +Z (the half field of view plus the turn stay
    below 90 degrees), so it can be written as ``(ox + u Z, oy + v Z, Z)``.
    """
    d = rot @ np.stack([xn, yn, np.ones_like(xn)]).reshape(3, -1).astype(np.float64)
    u, v = d[0] / d[2], d[1] / d[2]
    ox, oy = centre[0] - centre[2] * u, centre[1] - centre[2] * v
    return (ox.astype(np.float32), oy.astype(np.float32), u.astype(np.float32),
            v.astype(np.float32))


def _oblique_window(calib, rot, centres):
    """World box ``(x0, x1, y0, y1)`` that the rays of both turned cameras can reach."""
    width, height = calib["image_size"]
    f, cx, cy = calib["focal_px"], calib["cx"], calib["cy"]
    xn = (np.array([-1.0, width, -1.0, width]) - cx) / f
    yn = (np.array([-1.0, -1.0, height, height]) - cy) / f
    xs, ys = [], []
    for centre in centres:
        ox, oy, u, v = _world_rays(rot, centre, xn, yn)
        for z in (Z_WALL - 0.15, Z_WALL + 0.50):  # the nearest and farthest wall pieces
            xs.append(ox + u * z)
            ys.append(oy + v * z)
    xs, ys = np.concatenate(xs), np.concatenate(ys)
    return (float(xs.min()) - 0.05, float(xs.max()) + 0.05, float(ys.min()) - 0.05,
            float(ys.max()) + 0.05)


def _render_posed(scene, calib, rot, centre, gain, offset, seed) -> np.ndarray:
    """:func:`_render_view` for a camera at ``centre`` turned by ``rot``."""
    width, height = calib["image_size"]
    f, cx, cy = calib["focal_px"], calib["cx"], calib["cy"]
    sub = np.array(_SUBSAMPLES, np.float32)
    image = np.empty((height, width, 3), np.uint8)
    cols = np.arange(width, dtype=np.float32)
    scale = np.float32(255.0 * _EXPOSURE * gain)
    for r0, r1 in _strips(height, width * len(sub)):
        rows = np.arange(r0, r1, dtype=np.float32)
        xn = np.broadcast_to((cols[None, :, None] + sub[:, 0] - cx) / f, (r1 - r0, width, len(sub)))
        yn = np.broadcast_to((rows[:, None, None] + sub[:, 1] - cy) / f, (r1 - r0, width, len(sub)))
        ox, oy, u, v = _world_rays(rot, centre, xn, yn)
        rgb = scene.radiance(ox, u, v, oy)
        value = rgb.reshape(r1 - r0, width, len(sub), 3).mean(axis=2) * scale + np.float32(offset)
        for i, row in enumerate(range(r0, r1)):
            rng = np.random.default_rng([seed, row])
            value[i] += rng.normal(0.0, _NOISE_SIGMA, (width, 3)).astype(np.float32)
        image[r0:r1] = np.clip(np.rint(value), 0, 255).astype(np.uint8)
    return image


def _hit_points(scene, rot, centre, xn, yn):
    """World points where camera rays first meet the scene, (n, 3) float64."""
    ox, oy, u, v = _world_rays(rot, centre, xn, yn)
    z = scene.cast(ox, u, v, oy).z.astype(np.float64)
    return np.column_stack([ox + u * z, oy + v * z, z])


def _oblique_ground_truth(scene, calib, rot, centre_left, centre_right):
    """Camera depth at the left pixel centres and the occlusion codes, turned rig."""
    width, height = calib["image_size"]
    f, cx, cy = calib["focal_px"], calib["cx"], calib["cy"]
    depth = np.empty((height, width), np.float32)
    occluded = np.empty((height, width), np.uint8)
    cols = np.arange(width, dtype=np.float64)
    for r0, r1 in _strips(height, width):
        rows = np.arange(r0, r1, dtype=np.float64)
        xn = np.broadcast_to((cols[None, :] - cx) / f, (r1 - r0, width))
        yn = np.broadcast_to((rows[:, None] - cy) / f, (r1 - r0, width))
        world = _hit_points(scene, rot, centre_left, xn, yn)
        cam_l = (world - centre_left) @ rot  # rows of rot.T @ (p - c)
        cam_r = (world - centre_right) @ rot
        x_r = cam_r[:, 0] / cam_r[:, 2] * f + cx
        inside = np.flatnonzero((x_r >= -0.5) & (x_r <= width - 0.5))
        occ = np.full(world.shape[0], 4, np.uint8)
        # The right camera's ray through the same point: hidden if it meets a
        # surface nearer than the point.
        seen = _hit_points(scene, rot, centre_right, cam_r[inside, 0] / cam_r[inside, 2],
                           cam_r[inside, 1] / cam_r[inside, 2])
        seen_depth = ((seen - centre_right) @ rot)[:, 2]
        occ[inside] = seen_depth < cam_r[inside, 2] * (1 - _OCCLUSION_TOL)
        depth[r0:r1] = cam_l[:, 2].reshape(r1 - r0, width)
        occluded[r0:r1] = occ.reshape(r1 - r0, width)
    return depth, occluded


def _render_oblique(calib: dict, mesh_step: int | None) -> dict:
    rot, centre_left = oblique_pose()
    centre_right = centre_left + rot @ np.array([BASELINE, 0.0, 0.0])
    window = _oblique_window(calib, rot, (centre_left, centre_right))
    scene = _Scene(_texel_for(calib["focal_px"]), window=window)
    left = _render_posed(scene, calib, rot, centre_left, 1.0, 0.0, _SEED_LEFT)
    right = _render_posed(scene, calib, rot, centre_right, _RIGHT_GAIN, _RIGHT_OFFSET,
                          _SEED_RIGHT)
    depth, occluded = _oblique_ground_truth(scene, calib, rot, centre_left, centre_right)
    return _scene_record(left, right, depth, occluded, calib, mesh_step)
