"""Mesh preview rendering (off-screen VTK)."""

import numpy as np
import pytest
from PIL import Image

from stereomesh.geometry.surface import depth_grid_mesh
from stereomesh.io.previews import RendererUnavailable, render_mesh_png
from stereomesh.rectify import RectifiedRig


def _scene():
    h, w = 60, 80
    rows, cols = np.mgrid[0:h, 0:w]
    disp = np.full((h, w), 20.0, np.float32)
    disp[15:45, 20:60] = 40.0
    img = np.zeros((h, w, 3), np.uint8)
    img[..., 0] = (cols * 255 / w).astype(np.uint8)
    img[..., 2] = 200
    rig = RectifiedRig(focal_px=60.0, cx=w / 2, cy=h / 2, baseline=0.1, image_size=(w, h))
    return depth_grid_mesh(disp, rig, img)


def _render_or_skip(path, *args, **kwargs):
    try:
        render_mesh_png(path, *args, **kwargs)
    except RendererUnavailable as exc:  # only a missing renderer skips; bugs fail
        pytest.skip(f"VTK cannot render off-screen on this machine: {exc}")


def test_render_mesh_png_writes_coloured_view_of_left_camera(tmp_path):
    mesh = _scene()
    path = tmp_path / "previews" / "mesh.png"
    _render_or_skip(path, mesh.vertices, mesh.faces, mesh.colors, size=(160, 120))
    img = np.asarray(Image.open(path).convert("RGB"))
    assert img.shape == (120, 160, 3)
    drawn = np.any(img != 255, axis=2)
    assert drawn.mean() > 0.5
    # Red grows with the image column, so the left camera's view keeps left on the left.
    red = img[..., 0].astype(float)
    left = red[:, 10:40][drawn[:, 10:40]].mean()
    right = red[:, 120:150][drawn[:, 120:150]].mean()
    assert right > left + 40
    assert sorted(p.name for p in path.parent.iterdir()) == ["mesh.png"]


def test_render_mesh_png_without_colours_and_bad_input(tmp_path):
    mesh = _scene()
    _render_or_skip(tmp_path / "grey.png", mesh.vertices, mesh.faces, size=(64, 48))
    img = np.asarray(Image.open(tmp_path / "grey.png").convert("RGB"))
    assert img.shape == (48, 64, 3) and np.any(img != 255)
    with pytest.raises(ValueError):
        render_mesh_png(tmp_path / "x.png", mesh.vertices, mesh.faces, mesh.colors[:-1])
    with pytest.raises(ValueError):
        render_mesh_png(tmp_path / "x.png", mesh.vertices, np.zeros((0, 3), int))


def test_map_previews_carry_colour_bars_and_a_legend(tmp_path):
    from stereomesh.io.previews import write_image_previews

    h, w = 40, 64
    disp = np.tile(np.linspace(10, 30, w, dtype=np.float32), (h, 1))
    disp[:5] = np.nan
    conf = np.where(np.isfinite(disp), 0.8, 0.0).astype(np.float32)
    classes = np.where(np.isfinite(disp), 0, 4).astype(np.uint8)
    img = np.zeros((h, w, 3), np.uint8)
    rig = RectifiedRig(focal_px=60.0, cx=w / 2, cy=h / 2, baseline=0.1, image_size=(w, h))
    paths = write_image_previews(tmp_path, img, img, disp, conf, classes, rig=rig)
    for name in ("disparity", "confidence", "depth", "occlusion_classes"):
        shown = np.asarray(Image.open(paths[name]).convert("RGB"))
        assert shown.shape[1] == w and shown.shape[0] > h, name  # a strip below the map
        assert (shown[h:] == 0).any(), name  # text or swatches drawn in the strip
    # Near is warm in both maps: the right side has the larger disparity.
    depth = np.asarray(Image.open(paths["depth"]).convert("RGB")).astype(int)
    assert depth[20, -2, 0] > depth[20, 1, 0]
