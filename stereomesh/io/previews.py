"""Preview images of the results, for the report and a quick look."""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np

_BACKGROUND = (255, 255, 255)
# Vertices used to size the field of view; enough for a stable extent estimate.
_FOV_SAMPLE = 200_000


def _view_axes(focal: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Forward, up and right unit vectors of a camera at the origin looking at ``focal``.

    Up is the camera frame's −y (image rows grow downward), made orthogonal to
    the view direction.
    """
    forward = focal / np.linalg.norm(focal)
    up = np.array([0.0, -1.0, 0.0])
    up = up - forward * (up @ forward)
    if np.linalg.norm(up) < 1e-9:
        up = np.array([0.0, 0.0, 1.0]) - forward * forward[2]
    up /= np.linalg.norm(up)
    return forward, up, np.cross(forward, up)


def _camera_view_angle(vertices: np.ndarray, focal: np.ndarray, aspect: float) -> float:
    """Vertical view angle (degrees) from the origin that frames every vertex."""
    forward, up, right = _view_axes(focal)
    v = vertices
    if len(v) > _FOV_SAMPLE:
        # An even stride, not a random choice without replacement (which
        # permutes every vertex: 25 ms on a megapixel mesh).
        v = v[:: len(v) // _FOV_SAMPLE]
    depth = v @ forward
    v = v[depth > 1e-9]
    depth = depth[depth > 1e-9]
    if len(v) == 0:
        return 60.0
    half_v = np.abs(v @ up) / depth
    half_h = np.abs(v @ right) / depth / aspect
    half = float(np.max(np.maximum(half_v, half_h)))
    return float(np.clip(2.0 * np.degrees(np.arctan(half)) * 1.05, 5.0, 150.0))


# Lights in the camera frame (x right, y down, z forward), each a direction
# toward the light and a weight: a key light above left, a fill below right and
# a head light, over an ambient term. Several soft lights rather than one: the
# per-pixel normals of a depth map are noisy, and a single light turns that
# noise into speckle.
_LIGHTS = ((np.array([-0.45, -0.75, -1.0]), 0.55),
           (np.array([0.6, 0.5, -1.0]), 0.2),
           (np.array([0.0, 0.0, -1.0]), 0.3))
_AMBIENT = 0.12
# Samples per pixel side: the render is made this much larger and averaged down,
# which smooths the edges of the silhouette.
_SUPERSAMPLE = 2


def shading(vertices: np.ndarray, normals: np.ndarray) -> np.ndarray:
    """Lambert shading factor per vertex under the preview's lights, two-sided.

    Parameters
    ----------
    vertices : (V, 3) float array
        Camera frame.
    normals : (V, 3) float array
        Unit normals; those facing away from the camera are turned toward it,
        so both sides of a surface are lit alike.

    Returns
    -------
    (V,) float32 in [0, 1]
    """
    n = np.asarray(normals, np.float32)
    away = np.einsum("ij,ij->i", n, np.asarray(vertices, np.float32)) > 0
    n = np.where(away[:, None], -n, n)
    light = np.full(len(n), _AMBIENT, np.float32)
    for direction, weight in _LIGHTS:
        d = (direction / np.linalg.norm(direction)).astype(np.float32)
        light += np.float32(weight) * np.maximum(n @ d, 0)
    return np.minimum(light, 1.0)


def render_mesh(
    vertices: np.ndarray,
    faces: np.ndarray,
    colors: np.ndarray | None = None,
    size: tuple[int, int] = (800, 600),
    normals: np.ndarray | None = None,
) -> np.ndarray:
    """Render a triangle mesh as seen from the left camera; (H, W, 3) uint8 RGB.

    The camera sits at the origin looking at the centre of the mesh's bounding
    box with image y down, as the left rectified camera sees the scene; the
    view angle is widened just enough to frame every vertex. Surfaces are
    Gouraud-shaded under a few soft lights (both sides lit), in their vertex
    colours or a light grey, on white, z-buffered and supersampled
    :data:`_SUPERSAMPLE` times per side. Pure CPU: no OpenGL is needed.

    Parameters
    ----------
    vertices : (V, 3) float array
        Left camera frame (x right, y down, z forward), any length unit.
    faces : (F, 3) int array
    colors : (V, 3) uint8 array, optional
        RGB vertex colours; a uniform grey surface when omitted.
    size : (int, int)
        ``(width, height)`` of the image, pixels.
    normals : (V, 3) float array, optional
        Unit vertex normals for the shading; area-weighted face normals when
        omitted.

    Raises
    ------
    ValueError
        If the arrays have the wrong shapes or the mesh is empty.

    Examples
    --------
    >>> import numpy as np
    >>> v = np.array([[-1, -1, 5], [1, -1, 5], [0, 1, 5]], float)
    >>> image = render_mesh(v, np.array([[0, 2, 1]]), size=(40, 30))
    >>> image.shape, bool((image[15, 20] < 255).any()), image[0, 0].tolist()
    ((30, 40, 3), True, [255, 255, 255])
    """
    from stereomesh.geometry.surface import vertex_normals
    from stereomesh.io._render_kernels import downsample, rasterise

    vertices = np.asarray(vertices, np.float64)
    faces = np.asarray(faces)
    if vertices.ndim != 2 or vertices.shape[1] != 3 or len(vertices) == 0:
        raise ValueError(f"vertices must have shape (V, 3) with V > 0, got {vertices.shape}")
    if faces.ndim != 2 or faces.shape[1] != 3 or len(faces) == 0:
        raise ValueError(f"faces must have shape (F, 3) with F > 0, got {faces.shape}")
    if faces.min() < 0 or faces.max() >= len(vertices):
        raise ValueError(f"faces index vertices outside 0..{len(vertices) - 1}")
    if colors is not None:
        colors = np.asarray(colors)
        if colors.shape != vertices.shape or colors.dtype != np.uint8:
            raise ValueError(
                f"colors must be {vertices.shape} uint8, got {colors.shape} {colors.dtype}"
            )
    if normals is not None and np.shape(normals) != vertices.shape:
        raise ValueError(f"normals must have shape {vertices.shape}, got {np.shape(normals)}")
    width, height = (int(s) for s in size)
    if width < 1 or height < 1:
        raise ValueError(f"size must be positive, got {size}")

    if normals is None:
        normals = vertex_normals(vertices, faces)
    lo, hi = vertices.min(axis=0), vertices.max(axis=0)
    focal = (lo + hi) / 2.0
    if np.linalg.norm(focal) < 1e-12:
        focal = np.array([0.0, 0.0, 1.0])
    forward, up, right = _view_axes(focal)
    angle = _camera_view_angle(vertices, focal, width / height)
    k = _SUPERSAMPLE
    big_w, big_h = width * k, height * k
    focal_px = (big_h / 2.0) / np.tan(np.radians(angle) / 2.0)
    depth = vertices @ forward
    with np.errstate(divide="ignore", invalid="ignore"):
        inv_depth = np.where(depth > 1e-12, 1.0 / depth, 0.0)
    screen = np.empty((len(vertices), 2), np.float64)
    screen[:, 0] = big_w / 2.0 + focal_px * (vertices @ right) * inv_depth
    screen[:, 1] = big_h / 2.0 - focal_px * (vertices @ up) * inv_depth
    albedo = (np.full((len(vertices), 3), 200, np.float32) if colors is None
              else colors.astype(np.float32))
    shade = albedo * shading(vertices, normals)[:, None]
    image, zbuf = rasterise(screen, inv_depth, shade, np.ascontiguousarray(faces, np.int64),
                            big_w, big_h)
    return downsample(image, zbuf, k, np.asarray(_BACKGROUND, np.float32))


def _downsample_reference(image, zbuf, k):
    """:func:`~stereomesh.io._render_kernels.downsample` in numpy (for the tests)."""
    image = image.copy()
    image[zbuf <= 0] = _BACKGROUND
    h, w = image.shape[0] // k, image.shape[1] // k
    image = image.reshape(h, k, w, k, 3).astype(np.float64).mean(axis=(1, 3))
    return np.clip(np.rint(image), 0, 255).astype(np.uint8)


def render_mesh_png(
    path: str | os.PathLike,
    vertices: np.ndarray,
    faces: np.ndarray,
    colors: np.ndarray | None = None,
    size: tuple[int, int] = (800, 600),
    normals: np.ndarray | None = None,
) -> None:
    """:func:`render_mesh` written atomically to the PNG file ``path`` (same parameters)."""
    from stereomesh.io.images import write_png

    write_png(path, render_mesh(vertices, faces, colors, size, normals), compress_level=1)


# --- image previews -------------------------------------------------------------------

OCCLUSION_PREVIEW_COLOURS = np.array(
    [
        [205, 205, 200],  # 0 valid
        [235, 130, 25],  # 1 occluded
        [190, 40, 150],  # 2 mismatch
        [50, 110, 215],  # 3 rejected by a filter
        [25, 25, 25],  # 4 outside the range or overlap
    ],
    np.uint8,
)
"""RGB colour of each occlusion class in ``previews/occlusion_classes.png``."""


def _turbo(values: np.ndarray) -> np.ndarray:
    """(..., 3) uint8 RGB of ``values`` in [0, 1] through OpenCV's turbo colour map."""
    import cv2

    grey = np.clip(np.asarray(values) * 255, 0, 255).astype(np.uint8)
    shape = grey.shape
    rgb = cv2.cvtColor(cv2.applyColorMap(grey.reshape(-1, 1), cv2.COLORMAP_TURBO),
                       cv2.COLOR_BGR2RGB)
    return rgb.reshape(*shape, 3)


def _scaled(values: np.ndarray) -> tuple[np.ndarray, float, float]:
    valid = np.isfinite(values)
    if not valid.any():
        return np.zeros(values.shape), 0.0, 1.0
    lo, hi = (float(v) for v in np.percentile(values[valid], [1, 99]))
    return np.clip((values - lo) / max(hi - lo, 1e-6), 0, 1), lo, hi


def disparity_preview(disparity: np.ndarray) -> np.ndarray:
    """Colour-mapped disparity (near is warm), black where NaN; (H, W, 3) uint8."""
    disparity = np.asarray(disparity, np.float32)
    valid = np.isfinite(disparity)
    scaled, _, _ = _scaled(disparity)
    out = _turbo(np.where(valid, scaled, 0))
    out[~valid] = 0
    return out


def _font(size: int):
    from PIL import ImageFont

    try:
        return ImageFont.load_default(size=size)
    except TypeError:  # Pillow before 10.1 has one fixed-size default font
        return ImageFont.load_default()


def _strip(image: np.ndarray, height: int):
    from PIL import Image, ImageDraw

    h, w = image.shape[:2]
    canvas = Image.new("RGB", (w, h + height), (255, 255, 255))
    canvas.paste(Image.fromarray(np.ascontiguousarray(image)), (0, 0))
    return canvas, ImageDraw.Draw(canvas), h


def with_colour_bar(image: np.ndarray, lo: float, hi: float, label: str,
                    colours: np.ndarray) -> np.ndarray:
    """``image`` with a colour bar below it: ``colours`` (256, 3) from ``lo`` to ``hi``.

    Parameters
    ----------
    image : (H, W, 3) uint8
    lo, hi : float
        Values at the bar's ends, in the unit named by ``label``.
    label : str
        What the colours mean, with the unit (``"depth, m"``).
    colours : (256, 3) uint8
        The colour map, low to high.

    Returns
    -------
    (H + 44, W, 3) uint8
    """
    canvas, draw, h = _strip(image, 44)
    w = image.shape[1]
    x0, x1 = 8, max(9, w - 8)
    ramp = colours[np.linspace(0, 255, x1 - x0).astype(int)]
    bar = np.repeat(ramp[None], 12, axis=0)
    from PIL import Image

    canvas.paste(Image.fromarray(np.ascontiguousarray(bar)), (x0, h + 4))
    font = _font(12)
    draw.text((x0, h + 18), f"{lo:.3g}", fill=(0, 0, 0), font=font)
    end = f"{hi:.3g}"
    draw.text((x1 - draw.textlength(end, font=font), h + 18), end, fill=(0, 0, 0), font=font)
    draw.text(((x0 + x1 - draw.textlength(label, font=font)) / 2, h + 28), label,
              fill=(0, 0, 0), font=font)
    return np.asarray(canvas)


def with_legend(image: np.ndarray, entries: list[tuple[tuple[int, int, int], str]]
                ) -> np.ndarray:
    """``image`` with a legend below it: a colour swatch and a name per entry."""
    font = _font(12)
    rows = len(entries)
    canvas, draw, h = _strip(image, 8 + 16 * rows)
    for i, (colour, name) in enumerate(entries):
        y = h + 4 + 16 * i
        draw.rectangle([8, y, 20, y + 11], fill=tuple(int(c) for c in colour),
                       outline=(0, 0, 0))
        draw.text((26, y - 1), name, fill=(0, 0, 0), font=font)
    return np.asarray(canvas)


def rectified_pair_preview(left: np.ndarray, right: np.ndarray, lines: int = 16) -> np.ndarray:
    """Left and right side by side with horizontal epipolar lines; (H, 2W, 3) uint8.

    On a well rectified pair, a feature lies on the same line in both halves.
    """
    pair = np.concatenate([left, right], axis=1).copy()
    h = pair.shape[0]
    for i, y in enumerate(np.linspace(h / (lines + 1), h - h / (lines + 1), lines).astype(int)):
        pair[y] = (0, 255, 0) if i % 2 == 0 else (255, 0, 255)
    return pair


OCCLUSION_LEGEND = ("valid", "occluded (seen by the left camera only)",
                    "mismatch (failed the left-right check)",
                    "rejected by a filter (confidence, speckle)",
                    "outside the search range or the image overlap")
"""Legend text of the occlusion classes 0–4 (the codes of ``occlusion.png``)."""


def write_image_previews(
    folder: Path,
    left: np.ndarray,
    right: np.ndarray,
    disparity: np.ndarray,
    confidence: np.ndarray,
    classes: np.ndarray,
    rig=None,
) -> dict[str, Path]:
    """Write the rectified pair and the disparity, depth, confidence and class previews.

    Each map carries a colour bar with its unit (disparity in pixels, depth in
    metres or unscaled units, confidence 0–1) or a legend (occlusion classes).
    The depth preview needs the ``rig``.
    """
    from functools import partial

    from stereomesh.io.images import write_png as write

    # Previews are for a look, not for the archive: fast compression.
    write_png = partial(write, compress_level=1)

    folder = Path(folder)
    paths = {
        "rectified_pair": folder / "rectified_pair.png",
        "disparity": folder / "disparity.png",
        "confidence": folder / "confidence.png",
        "occlusion_classes": folder / "occlusion_classes.png",
    }
    turbo = _turbo(np.linspace(0, 1, 256))
    write_png(paths["rectified_pair"], rectified_pair_preview(left, right))
    _, lo, hi = _scaled(np.asarray(disparity, np.float32))
    write_png(paths["disparity"], with_colour_bar(disparity_preview(disparity), lo, hi,
                                                  "disparity, pixels (near is warm)", turbo))
    grey = (np.clip(confidence, 0, 1) * 255).astype(np.uint8)
    ramp = np.repeat(np.arange(256, dtype=np.uint8)[:, None], 3, axis=1)
    write_png(paths["confidence"], with_colour_bar(np.repeat(grey[..., None], 3, axis=2),
                                                   0.0, 1.0, "confidence (0 where rejected)",
                                                   ramp))
    entries = [(tuple(c), f"{k} {name}") for k, (c, name)
               in enumerate(zip(OCCLUSION_PREVIEW_COLOURS, OCCLUSION_LEGEND, strict=True))]
    write_png(paths["occlusion_classes"],
              with_legend(OCCLUSION_PREVIEW_COLOURS[np.minimum(classes, 4)], entries))
    if rig is not None:
        depth = rig.depth_from_disparity(disparity)
        valid = np.isfinite(depth)
        scaled, dlo, dhi = _scaled(depth)
        # Near is warm, as in the disparity preview.
        image = _turbo(np.where(valid, 1.0 - scaled, 0))
        image[~valid] = 0
        unit = "m" if rig.metric else "unscaled units"
        paths["depth"] = folder / "depth.png"
        write_png(paths["depth"], with_colour_bar(image, dhi, dlo, f"depth, {unit}", turbo))
    return paths
