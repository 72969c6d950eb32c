"""Sub-pixel refinement by slanted-window alignment, and its per-pixel sigma.

References: synthetic pairs rendered at 4x and area-averaged down (the shift and
slant are known exactly and the images are not made with the aligner's own
interpolation); scikit-image's motorcycle pair with its Middlebury 2014 ground
truth (Scharstein et al., GCPR 2014) against OpenCV's StereoSGBM in the same
run; the demo scene's rendered ground truth for the sigma coverage, judged by
the Gaussian's 68 % / 95 % (closed form) with the issue's bands.
"""

from __future__ import annotations

import numpy as np
import pytest
from conftest import DEMO
from PIL import Image

from stereomesh.matching.refine import align_subpixel, align_subpixel_reference


def _texture(x, y, seed=3):
    """A smooth random texture: 24 sinusoids below 0.25 cycles per pixel."""
    rng = np.random.default_rng(seed)
    out = np.zeros_like(x, dtype=np.float64)
    for _ in range(24):
        fx, fy = rng.uniform(-0.25, 0.25, 2)
        out += np.cos(2 * np.pi * (fx * x + fy * y) + rng.uniform(0, 2 * np.pi))
    return 128 + 90 * out / np.sqrt(24 / 2)


def _slanted_pair(h, w, d0, a, b, gain=0.9, offset=8.0, factor=4, seed=3):
    """Left and right images of a plane with disparity ``d0 + a x + b y``.

    Rendered at ``factor`` x and area-averaged down: each output pixel is the
    mean of ``factor**2`` samples over its square, so the pair is what a camera
    integrating over its pixels would see (not a warp by an interpolant). The
    left pixel ``x`` sees the right image's point ``x - d``.
    """
    sub = (np.arange(factor) + 0.5) / factor - 0.5
    ys, xs = np.mgrid[0:h, 0:w].astype(np.float64)
    left = np.zeros((h, w))
    right = np.zeros((h, w))
    for sy in sub:
        for sx in sub:
            x, y = xs + sx, ys + sy
            right += _texture(x, y, seed)
            left += _texture(x - (d0 + a * x + b * y), y, seed)
    left /= factor**2
    right = gain * right / factor**2 + offset
    truth = d0 + a * xs + b * ys
    return left.astype(np.float32), right.astype(np.float32), truth


@pytest.mark.parametrize(("d0", "a", "b"), [(7.3, 0.0, 0.0), (9.62, 0.06, 0.0),
                                            (8.15, -0.05, 0.04)])
def test_engine_recovers_known_shift_and_slant(d0, a, b):
    # The whole disparity engine: solver, parabola start, then the alignment.
    from stereomesh.matching.disparity import compute_disparity
    from stereomesh.params import DisparityParams

    left, right, truth = _slanted_pair(48, 96, d0, a, b)
    to8 = [np.clip(np.rint(im), 0, 255).astype(np.uint8) for im in (left, right)]
    res = compute_disparity(*to8, DisparityParams(disp_range="0:32", subpixel="alignment",
                                                  speckle_size=0))
    inner = (slice(6, -6), slice(24, -8))
    err = (res.disparity - truth)[inner]
    assert np.isfinite(err).all()
    assert np.abs(err).max() < 0.05, np.abs(err).max()
    assert np.isfinite(res.sigma_d[inner]).all()


def test_alignment_from_whole_pixels_converges_over_passes():
    # From the rounded truth (a staircase, the worst start) each pass takes the
    # slant from the one before: three reach 0.05 px on a slope of 0.06 px/px.
    left, right, truth = _slanted_pair(48, 96, 9.62, 0.06, 0.0)
    start = np.rint(truth).astype(np.float32)
    inner = (slice(6, -6), slice(24, -8))
    errors = [np.abs(align_subpixel(left, right, start, passes=n)[0] - truth)[inner].max()
              for n in (1, 3)]
    assert errors[1] < 0.05 < errors[0], errors


def test_alignment_ignores_exposure_differences():
    left, right, truth = _slanted_pair(32, 80, 6.4, 0.03, 0.0, gain=0.6, offset=40.0)
    d, _, _ = align_subpixel(left, right, np.rint(truth).astype(np.float32), passes=3)
    assert np.abs(d - truth)[4:-4, 20:-6].max() < 0.05


def test_numba_kernel_equals_the_numpy_reference():
    rng = np.random.default_rng(5)
    left, right, truth = _slanted_pair(20, 48, 5.4, 0.04, -0.02, seed=5)
    left += rng.normal(0, 2.0, left.shape).astype(np.float32)  # residuals to estimate
    start = (np.rint(truth) + rng.integers(-1, 2, truth.shape) * 0.3).astype(np.float32)
    start[3, 10] = np.nan  # invalid pixels stay invalid and leave the support
    fast = align_subpixel(left, right, start, window=(7, 5))
    slow = align_subpixel_reference(left, right, start, window=(7, 5))
    np.testing.assert_array_equal(np.isnan(fast[0]), np.isnan(slow[0]))
    np.testing.assert_allclose(fast[0], slow[0], atol=2e-3, equal_nan=True)
    np.testing.assert_array_equal(np.isnan(fast[1]), np.isnan(slow[1]))
    np.testing.assert_allclose(fast[1], slow[1], rtol=2e-2, atol=1e-4, equal_nan=True)
    assert (fast[2] == slow[2]).mean() > 0.97  # the 0.005 px stop may fall either side


def test_numba_kernel_equals_the_numpy_reference_across_pixel_blocks():
    # The kernel fits a row's pixels in blocks (_align_kernels._BLOCK): a row
    # wider than two blocks, with NaN starts across a block edge and the default window.
    from stereomesh.matching._align_kernels import _BLOCK

    rng = np.random.default_rng(7)
    left, right, truth = _slanted_pair(10, 2 * _BLOCK + 44, 12.4, -0.03, 0.05, seed=7)
    left += rng.normal(0, 2.0, left.shape).astype(np.float32)
    start = (np.rint(truth) + rng.integers(-1, 2, truth.shape) * 0.3).astype(np.float32)
    start[4, _BLOCK - 2 : _BLOCK + 2] = np.nan
    # The default two passes (the first on a smaller window), two on one window,
    # and one pass of up to four steps (early stops per pixel).
    for kw in ({}, {"first_window": (9, 7)}, {"iterations": 4, "passes": 1}):
        fast = align_subpixel(left, right, start, **kw)
        slow = align_subpixel_reference(left, right, start, **kw)
        np.testing.assert_array_equal(np.isnan(fast[1]), np.isnan(slow[1]))
        np.testing.assert_allclose(fast[0], slow[0], atol=2e-3, equal_nan=True)
        np.testing.assert_allclose(fast[1], slow[1], rtol=2e-2, atol=1e-4, equal_nan=True)
        assert (fast[2] == slow[2]).mean() > 0.97


def test_alignment_sigma_edges_equal_scipy_filters():
    # The edge test takes the 5 x 5 spread with OpenCV; scipy's maximum and
    # minimum filters are the reference, borders included.
    from scipy import ndimage

    from stereomesh.matching import disparity as engine

    rng = np.random.default_rng(11)
    disp = np.repeat(rng.uniform(5, 9, (6, 1)), 7, axis=1).repeat(6, axis=0)[:, :40]
    disp = (disp + rng.normal(0, 0.2, disp.shape)).astype(np.float32)
    disp[rng.random(disp.shape) < 0.05] = np.nan
    fit = rng.uniform(0.005, 0.05, disp.shape).astype(np.float32)
    fit[rng.random(disp.shape) < 0.05] = np.nan
    filled = np.where(np.isfinite(disp), disp, np.float32(-1e4))
    edge = (ndimage.maximum_filter(filled, 5) - ndimage.minimum_filter(filled, 5)) > 1.0
    expected = np.hypot(engine.ALIGNMENT_SIGMA_SCALE * fit, engine.ALIGNMENT_SIGMA_FLOOR)
    expected = np.where(edge, engine.ALIGNMENT_EDGE_FACTOR * expected, expected)
    expected[np.isnan(fit)] = engine.ALIGNMENT_SIGMA_FAILED
    assert 0.1 < edge.mean() < 0.9
    np.testing.assert_allclose(engine.alignment_sigma(fit, disp), expected, rtol=1e-6)


def test_alignment_sigma_kernel_equals_the_array_version():
    # The one-pass kernel against numpy and OpenCV's dilate / erode, to the bit,
    # on an image with NaN runs, depth steps and the borders' clipped windows.
    from stereomesh.matching import disparity as engine

    rng = np.random.default_rng(12)
    disp = (np.repeat(rng.uniform(5, 9, (9, 8)), 8, axis=1).repeat(5, axis=0)[:, :61]
            + rng.normal(0, 0.3, (45, 61))).astype(np.float32)
    disp[rng.random(disp.shape) < 0.08] = np.nan
    disp[10:14, 20:40] = np.nan
    fit = rng.uniform(0.0, 0.08, disp.shape).astype(np.float32)
    fit[rng.random(disp.shape) < 0.1] = np.nan
    for d in (disp, disp[:3, :4], disp[:1]):
        f = fit[: d.shape[0], : d.shape[1]]
        np.testing.assert_array_equal(engine.alignment_sigma(f, d),
                                      engine._alignment_sigma_reference(f, d))


def test_alignment_refuses_even_windows():
    image = np.zeros((8, 16), np.float32)
    with pytest.raises(ValueError, match="odd"):
        align_subpixel(image, image, image, window=(8, 5))
    with pytest.raises(ValueError, match="odd"):
        align_subpixel(image, image, image, first_window=(6, 5))


def _near_truth_errors(disparity, gt, occluded):
    ok = np.isfinite(disparity) & ~occluded
    err = np.abs(disparity - gt)
    return ok, err[ok & (err < 1)]


def test_motorcycle_alignment_beats_opencv_and_the_parabola(motorcycle):
    import cv2

    from stereomesh.matching.disparity import compute_disparity
    from stereomesh.params import DisparityParams

    left, right, gt = motorcycle["left"], motorcycle["right"], motorcycle["gt"]
    known = np.isfinite(gt)
    means = {}
    for method in ("parabola", "alignment"):
        d = compute_disparity(left, right, DisparityParams(disp_range="0:80",
                                                           subpixel=method)).disparity
        _, near = _near_truth_errors(d, gt, ~known)
        means[method] = near.mean()
    # OpenCV with the disparity benchmark's settings (benchmarks/disparity.py).
    sgbm = cv2.StereoSGBM_create(0, 80, 5, 8 * 3 * 25, 32 * 3 * 25, 1, 0, 10, 100, 2,
                                 cv2.STEREO_SGBM_MODE_SGBM)
    d = sgbm.compute(left[..., ::-1].copy(), right[..., ::-1].copy()).astype(np.float32) / 16
    d[d < 0] = np.nan
    _, near = _near_truth_errors(d, gt, ~known)
    # Measured here: alignment 0.155 px, parabola 0.209 px, OpenCV 0.236 px.
    assert means["alignment"] <= 0.75 * near.mean()
    assert means["alignment"] <= 0.85 * means["parabola"]


@pytest.fixture(scope="module")
def oblique_view(tmp_path_factory):
    from stereomesh.demo_scene import write_demo_scene

    folder = tmp_path_factory.mktemp("oblique")
    write_demo_scene(folder, view="oblique")
    return folder


def _view_result(folder):
    import tomllib

    from stereomesh.io.pfm import read_pfm
    from stereomesh.matching.disparity import compute_disparity
    from stereomesh.params import DisparityParams

    left = np.asarray(Image.open(folder / "left.png"))
    right = np.asarray(Image.open(folder / "right.png"))
    rng = tomllib.loads((folder / "params.toml").read_text())["disparity"]["disp_range"]
    res = compute_disparity(left, right, DisparityParams(disp_range=rng, subpixel="alignment"))
    gt = read_pfm(folder / "gt_disparity.pfm")
    occluded = np.asarray(Image.open(folder / "gt_occlusion.png")) > 0
    return res, gt, occluded


@pytest.mark.parametrize("view", ["frontal", "oblique"])
def test_sigma_coverage_and_accuracy_on_the_demo_views(view, request):
    folder = DEMO if view == "frontal" else request.getfixturevalue("oblique_view")
    res, gt, occluded = _view_result(folder)
    ok, near = _near_truth_errors(res.disparity, gt, occluded)
    err = np.abs(res.disparity - gt)[ok]
    sigma = res.sigma_d[ok]
    assert np.isfinite(sigma).all() and (sigma > 0).all()
    # A Gaussian puts 68.3 % within 1 sigma and 95.4 % within 2 (closed form); the
    # issue's bands: 60-76 % and 90-98 %.
    within1, within2 = (err <= sigma).mean(), (err <= 2 * sigma).mean()
    assert 0.60 <= within1 <= 0.76, within1
    assert 0.90 <= within2 <= 0.98, within2
    assert near.mean() <= 0.075
    assert (near < 0.1).mean() >= 0.75


def test_accuracy_statement_keeps_the_scale_apart_from_sigma_z():
    from stereomesh.geometry.data import PointCloud
    from stereomesh.io.calibration import rig_from_dict
    from stereomesh.report import DEFAULT_SCALE_UNCERTAINTY, accuracy_statement

    calib = {"rectified": True, "image_size": [64, 48], "focal_px": 700.0, "cx": 31.5,
             "cy": 23.5, "baseline": 40.0, "doffs": 0.0, "units": "cm"}
    z = np.array([3.0, 3.5, 4.0])
    sigma_d = 0.05
    cloud = PointCloud(np.column_stack([np.zeros(3), np.zeros(3), z]),
                       np.zeros((3, 3), np.uint8), np.ones(3, np.float32),
                       (z * z * sigma_d / 280.0).astype(np.float32))
    plain = accuracy_statement(rig_from_dict(calib), cloud)
    # Closed form: sigma_Z = Z^2 sigma_d / (f B) at the median depth 3.5 m, f B = 280 m px.
    assert plain["depth_sigma_at_median_depth"] == pytest.approx(3.5**2 * 0.05 / 280, rel=1e-5)
    assert plain["scale_uncertainty_relative"] == DEFAULT_SCALE_UNCERTAINTY
    assert "default" in plain["scale_uncertainty_source"]
    assert "licensed surveyors" in plain["note"]
    # Stated uncertainties: 0.2 cm of 40 cm (0.5 %) and 2.1 px of 700 px (0.3 %) add in
    # quadrature to 0.583 %.
    stated = accuracy_statement(rig_from_dict({**calib, "baseline_std": 0.2,
                                               "focal_std_px": 2.1}), cloud)
    assert stated["scale_uncertainty_relative"] == pytest.approx(np.hypot(0.005, 0.003))
    assert stated["scale_sigma_at_median_depth"] == pytest.approx(3.5 * np.hypot(0.005, 0.003))
    unscaled = accuracy_statement(rig_from_dict({**calib, "units": "unscaled"}), cloud)
    assert unscaled["scale_uncertainty_relative"] is None


def test_calibration_refuses_a_negative_uncertainty():
    from stereomesh.errors import InputError
    from stereomesh.io.calibration import rig_from_dict

    with pytest.raises(InputError, match="baseline_std"):
        rig_from_dict({"rectified": True, "image_size": [64, 48], "focal_px": 700.0,
                       "cx": 31.5, "cy": 23.5, "baseline": 0.4, "baseline_std": -1})
