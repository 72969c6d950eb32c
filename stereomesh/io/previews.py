"""Preview images of the results, for the report and a quick look."""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np

_BACKGROUND = (255, 255, 255)
# Vertices used to size the field of view; enough for a stable extent estimate.
_FOV_SAMPLE = 200_000


def _camera_view_angle(vertices: np.ndarray, focal: np.ndarray, aspect: float) -> float:
    """Vertical view angle (degrees) from the origin that frames every vertex."""
    forward = focal / np.linalg.norm(focal)
    up = np.array([0.0, -1.0, 0.0])
    up = up - forward * (up @ forward)
    if np.linalg.norm(up) < 1e-9:
        up = np.array([0.0, 0.0, 1.0]) - forward * forward[2]
    up /= np.linalg.norm(up)
    right = np.cross(forward, up)
    v = vertices
    if len(v) > _FOV_SAMPLE:
        v = v[np.random.default_rng(0).choice(len(v), _FOV_SAMPLE, replace=False)]
    depth = v @ forward
    v = v[depth > 1e-9]
    depth = depth[depth > 1e-9]
    if len(v) == 0:
        return 60.0
    half_v = np.abs(v @ up) / depth
    half_h = np.abs(v @ right) / depth / aspect
    half = float(np.max(np.maximum(half_v, half_h)))
    return float(np.clip(2.0 * np.degrees(np.arctan(half)) * 1.05, 5.0, 150.0))


class RendererUnavailable(RuntimeError):
    """No off-screen renderer on this machine (VTK missing or no OpenGL context)."""


_renderer_state: dict = {}


def _vtk():
    """VTK's rendering modules, imported on first use (with the OpenGL back end)."""
    import vtkmodules.vtkRenderingOpenGL2  # noqa: F401  (registers the OpenGL classes)
    from vtkmodules import vtkCommonCore, vtkCommonDataModel, vtkRenderingCore
    from vtkmodules.util import numpy_support

    # VTK warns "bad X server connection" on every run without a display, then
    # renders off-screen all the same (EGL or OSMesa); keep its errors only.
    vtkCommonCore.vtkLogger.SetStderrVerbosity(vtkCommonCore.vtkLogger.VERBOSITY_ERROR)
    return vtkCommonCore, vtkCommonDataModel, vtkRenderingCore, numpy_support


def _snapshot(renderer, width: int, height: int) -> np.ndarray:
    """Render ``renderer`` off-screen into an (H, W, 3) uint8 image, top row first."""
    _, _, rc, ns = _vtk()
    window = rc.vtkRenderWindow()
    try:
        window.SetOffScreenRendering(1)
        window.SetSize(width, height)
        window.AddRenderer(renderer)
        window.Render()
        grab = rc.vtkWindowToImageFilter()
        grab.SetInput(window)
        grab.ReadFrontBufferOff()
        # The window was just rendered; a second render would double the cost.
        grab.ShouldRerenderOff()
        grab.Update()
        pixels = ns.vtk_to_numpy(grab.GetOutput().GetPointData().GetScalars())
    finally:
        window.Finalize()
    # VTK's image origin is the bottom-left corner.
    return np.ascontiguousarray(pixels.reshape(height, width, -1)[::-1, :, :3])


def check_renderer() -> None:
    """Raise :class:`RendererUnavailable` unless VTK can render off-screen here.

    The probe renders an empty scene, independently of the mesh code, so a bug
    in :func:`render_mesh_png` is never mistaken for a missing renderer. The
    answer is kept for the process.
    """
    if "error" not in _renderer_state:
        try:
            _, _, rc, _ = _vtk()
            _snapshot(rc.vtkRenderer(), 8, 8)
            _renderer_state["error"] = None
        except Exception as exc:  # any failure of the bare probe means no renderer here
            _renderer_state["error"] = f"{type(exc).__name__}: {exc}"
    if _renderer_state["error"] is not None:
        raise RendererUnavailable(
            f"no off-screen renderer (VTK with OpenGL, EGL or OSMesa): "
            f"{_renderer_state['error']}"
        )


def _poly_data(vertices: np.ndarray, faces: np.ndarray, colors, normals):
    cc, dm, _, ns = _vtk()
    points = cc.vtkPoints()
    points.SetData(ns.numpy_to_vtk(np.ascontiguousarray(vertices, np.float64), deep=True))
    cells = dm.vtkCellArray()
    offsets = np.arange(0, 3 * len(faces) + 1, 3, dtype=np.int64)
    cells.SetData(ns.numpy_to_vtkIdTypeArray(offsets, deep=True),
                  ns.numpy_to_vtkIdTypeArray(np.ascontiguousarray(faces, np.int64).ravel(),
                                             deep=True))
    poly = dm.vtkPolyData()
    poly.SetPoints(points)
    poly.SetPolys(cells)
    rgb = np.full((len(vertices), 3), 180, np.uint8) if colors is None else colors
    scalars = ns.numpy_to_vtk(np.ascontiguousarray(rgb), deep=True,
                              array_type=cc.VTK_UNSIGNED_CHAR)
    scalars.SetName("rgb")
    poly.GetPointData().SetScalars(scalars)
    vectors = ns.numpy_to_vtk(np.ascontiguousarray(normals, np.float32), deep=True)
    vectors.SetName("Normals")
    poly.GetPointData().SetNormals(vectors)
    return poly


def render_mesh_png(
    path: str | os.PathLike,
    vertices: np.ndarray,
    faces: np.ndarray,
    colors: np.ndarray | None = None,
    size: tuple[int, int] = (800, 600),
    normals: np.ndarray | None = None,
) -> None:
    """Render a triangle mesh as seen from the left camera and save it as PNG.

    The camera sits at the origin looking at the centre of the mesh's bounding
    box with image y down, as the left rectified camera sees the scene; the
    view angle is widened just enough to frame every vertex. Rendering is
    off-screen with VTK, Gouraud-shaded under a light kit, with vertex colours
    when given.

    Parameters
    ----------
    path : str or path-like
        PNG file to write, atomically.
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
    RendererUnavailable
        If VTK cannot render off-screen here (no OpenGL/EGL/OSMesa context).
        Any other error is a bug and propagates as it is.

    Examples
    --------
    >>> import numpy as np, tempfile, pathlib  # doctest: +SKIP
    >>> v = np.array([[-1, -1, 5], [1, -1, 5], [0, 1, 5]], float)  # doctest: +SKIP
    >>> render_mesh_png(pathlib.Path(tempfile.mkdtemp()) / "m.png", v,
    ...                 np.array([[0, 2, 1]]))  # doctest: +SKIP
    """
    vertices = np.asarray(vertices, np.float64)
    faces = np.asarray(faces)
    if vertices.ndim != 2 or vertices.shape[1] != 3 or len(vertices) == 0:
        raise ValueError(f"vertices must have shape (V, 3) with V > 0, got {vertices.shape}")
    if faces.ndim != 2 or faces.shape[1] != 3 or len(faces) == 0:
        raise ValueError(f"faces must have shape (F, 3) with F > 0, got {faces.shape}")
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

    check_renderer()
    from PIL import Image

    from stereomesh.geometry.surface import vertex_normals
    from stereomesh.io.atomic import atomic_path

    _, _, rc, _ = _vtk()
    if normals is None:
        normals = vertex_normals(vertices, faces)
    lo, hi = vertices.min(axis=0), vertices.max(axis=0)
    focal = (lo + hi) / 2.0
    if np.linalg.norm(focal) < 1e-12:
        focal = np.array([0.0, 0.0, 1.0])
    mapper = rc.vtkPolyDataMapper()
    mapper.SetInputData(_poly_data(vertices, faces, colors, normals))
    mapper.SetColorModeToDirectScalars()
    mapper.ScalarVisibilityOn()
    actor = rc.vtkActor()
    actor.SetMapper(mapper)
    actor.GetProperty().SetInterpolationToGouraud()
    renderer = rc.vtkRenderer()
    renderer.SetBackground(*(c / 255.0 for c in _BACKGROUND))
    renderer.AddActor(actor)
    # Several soft lights rather than one head light: per-pixel normals of a
    # depth map are noisy, and a single light turns that noise into speckle.
    renderer.AutomaticLightCreationOff()
    rc.vtkLightKit().AddLightsToRenderer(renderer)
    camera = renderer.GetActiveCamera()
    camera.SetPosition(0.0, 0.0, 0.0)
    camera.SetFocalPoint(*focal)
    camera.SetViewUp(0.0, -1.0, 0.0)
    camera.SetViewAngle(_camera_view_angle(vertices, focal, width / height))
    renderer.ResetCameraClippingRange()
    image = _snapshot(renderer, width, height)
    if image.shape[:2] != (height, width):
        raise RuntimeError(
            f"mesh preview came back with shape {image.shape}, not {(height, width)}"
        )
    with atomic_path(path) as tmp:
        Image.fromarray(image).save(tmp, format="PNG")


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
