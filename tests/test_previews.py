"""Previews: the mesh render (CPU rasteriser) and the map previews."""

import numpy as np
import pytest
from PIL import Image

from stereomesh.geometry.surface import depth_grid_mesh
from stereomesh.io.previews import render_mesh, render_mesh_png
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


def test_render_mesh_png_writes_coloured_view_of_left_camera(tmp_path):
    mesh = _scene()
    path = tmp_path / "previews" / "mesh.png"
    render_mesh_png(path, mesh.vertices, mesh.faces, mesh.colors, size=(160, 120))
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
    render_mesh_png(tmp_path / "grey.png", mesh.vertices, mesh.faces, size=(64, 48))
    img = np.asarray(Image.open(tmp_path / "grey.png").convert("RGB"))
    assert img.shape == (48, 64, 3) and np.any(img != 255)
    with pytest.raises(ValueError):
        render_mesh_png(tmp_path / "x.png", mesh.vertices, mesh.faces, mesh.colors[:-1])
    with pytest.raises(ValueError):
        render_mesh_png(tmp_path / "x.png", mesh.vertices, np.zeros((0, 3), int))


def _random_triangles(n, seed):
    rng = np.random.default_rng(seed)
    screen = rng.uniform(-2, 14, (3 * n, 2))
    inv_depth = rng.uniform(0.2, 1.0, 3 * n)
    inv_depth[rng.random(3 * n) < 0.05] = 0.0  # some behind the camera
    shade = rng.uniform(0, 255, (3 * n, 3)).astype(np.float32)
    return screen, inv_depth, shade, np.arange(3 * n).reshape(n, 3)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_rasteriser_matches_brute_force(seed):
    # Brute force: every pixel centre tested against every triangle, nearest kept.
    from stereomesh.io._render_kernels import rasterise, rasterise_reference

    args = (*_random_triangles(12, seed), 12, 10)
    image, zbuf = rasterise(*args)
    image_ref, zbuf_ref = rasterise_reference(*args)
    np.testing.assert_array_equal(zbuf, zbuf_ref)
    np.testing.assert_allclose(image, image_ref, atol=1e-3)
    assert (zbuf > 0).any()


@pytest.mark.parametrize("k", [1, 2, 3])
def test_downsample_matches_its_numpy_reference(k):
    # Reference: the masked assignment and block mean in numpy it replaced.
    from stereomesh.io._render_kernels import downsample
    from stereomesh.io.previews import _BACKGROUND, _downsample_reference

    rng = np.random.default_rng(k)
    image = rng.uniform(-5, 260, (6 * k, 8 * k, 3)).astype(np.float32)
    zbuf = np.where(rng.random((6 * k, 8 * k)) < 0.3, 0.0, rng.random((6 * k, 8 * k)))
    got = downsample(image, zbuf, k, np.asarray(_BACKGROUND, np.float32))
    want = _downsample_reference(image, zbuf, k)
    assert got.dtype == np.uint8 and got.shape == (6, 8, 3)
    assert np.abs(got.astype(int) - want).max() <= (0 if k < 3 else 1)


def test_render_covers_the_projected_area_and_keeps_the_nearest_surface():
    # Closed form: a square of side s at depth Z, centred on the view axis, covers
    # (F s / Z)^2 pixels with F = (H/2) / tan(angle/2) (pinhole projection).
    from stereomesh.io.previews import _camera_view_angle

    s, z = 1.0, 5.0
    square = np.array([[-s / 2, -s / 2, z], [s / 2, -s / 2, z], [s / 2, s / 2, z],
                       [-s / 2, s / 2, z]], float)
    faces = np.array([[0, 3, 2], [0, 2, 1]])
    far = square * np.array([2.0, 2.0, 1.6])  # a larger square behind, in blue
    verts = np.r_[square, far]
    colours = np.r_[np.tile([[255, 0, 0]], (4, 1)), np.tile([[0, 0, 255]], (4, 1))]
    image = render_mesh(verts, np.r_[faces, faces + 4], colours.astype(np.uint8), size=(200, 200))
    angle = _camera_view_angle(verts, (verts.min(0) + verts.max(0)) / 2, 1.0)
    focal_px = 100.0 / np.tan(np.radians(angle) / 2)
    red = (image[..., 0] > 100) & (image[..., 2] < 60)
    expected = (focal_px * s / z) ** 2
    assert abs(red.sum() - expected) < 4 * focal_px * s / z  # within a pixel of the edges
    # The near red square hides the blue one in the middle; blue shows around it.
    assert red[100, 100] and image[100, 100, 2] < 60
    blue = (image[..., 2] > 100) & (image[..., 0] < 60)
    # The far square projects 2 / 1.6 times as wide: (1.25^2 - 1) of the red area shows.
    assert abs(blue.sum() / red.sum() - (1.25 ** 2 - 1)) < 0.03


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


@pytest.mark.parametrize("level", [1, 6])
def test_png_writer_round_trips_through_pillow(tmp_path, level):
    # Written with OpenCV, read back with Pillow (another library): grey and
    # RGB pixels and channel order preserved at both compression settings.
    from stereomesh.io.images import write_png

    rng = np.random.default_rng(level)
    rgb = rng.integers(0, 256, (37, 53, 3), dtype=np.uint8)
    rgb[:10] = (255, 0, 0)  # a red band: a swapped channel order would show
    grey = rng.integers(0, 256, (37, 53), dtype=np.uint8)
    for name, image in (("rgb.png", rgb), ("grey.png", grey)):
        write_png(tmp_path / name, image, compress_level=level)
        np.testing.assert_array_equal(np.asarray(Image.open(tmp_path / name)), image)
    with pytest.raises(ValueError, match="uint8"):
        write_png(tmp_path / "f.png", rgb.astype(np.float32))
    assert sorted(p.name for p in tmp_path.iterdir()) == ["grey.png", "rgb.png"]
