"""The in-memory core, parameter validation at the front doors, and mended defects."""

import dataclasses
import json
from pathlib import Path

import numpy as np
import pytest
from conftest import DEMO

from stereomesh import cli
from stereomesh.errors import InputError
from stereomesh.params import SECTIONS, DisparityParams, Params, schema
from stereomesh.pipeline import STAGES, StageFailed, StereoPair, reconstruct
from stereomesh.rectify import RectifiedRig


@pytest.fixture(scope="module")
def small_scene(tmp_path_factory):
    """The demo scene rendered at 160 x 120 (our own renderer), with its range."""
    from stereomesh.demo_scene import write_demo_scene

    folder = tmp_path_factory.mktemp("small_scene")
    paths = write_demo_scene(folder, 160)
    return folder, paths


def _rig(calib: dict) -> RectifiedRig:
    from stereomesh.io.calibration import rig_from_dict

    return rig_from_dict(calib)


def _pair(folder: Path) -> StereoPair:
    from stereomesh.io.inputs import read_stereo_input

    return read_stereo_input([folder / "left.png", folder / "right.png"], folder / "calib.json")


def _main(*argv, capsys=None):
    code = cli.main([str(a) for a in argv])
    err = capsys.readouterr().err if capsys else ""
    return code, err


def test_core_on_arrays_runs_stage_by_stage(small_scene):
    folder, _ = small_scene
    params = Params().with_overrides(
        {"disp_range": (folder / "params.toml").read_text().split('"')[1]})
    pair = _pair(folder)
    seen = []
    result = reconstruct(pair, params, progress=lambda step, frac: seen.append(frac))
    assert list(result.figures) == list(STAGES)
    assert result.mesh is not None and len(result.mesh.faces) > 1000
    assert result.scale == "metric" and seen == sorted(seen) and seen[-1] == 1.0
    part = reconstruct(pair, params, stop_after="triangulate")
    assert part.mesh is None and len(part.cloud) == result.figures["triangulate"]["points"]


def test_a_failing_stage_keeps_the_stages_before(small_scene):
    folder, _ = small_scene
    params = Params().with_overrides({"disp_range": "0:48", "depth_min": 1000.0})
    with pytest.raises(StageFailed) as info:
        reconstruct(_pair(folder), params)
    failed = info.value
    assert failed.stage == "surface" and isinstance(failed.__cause__, InputError)
    assert failed.partial.cloud is not None and len(failed.partial.cloud) == 0
    assert "depth_min" in str(failed.__cause__)


def test_on_stage_sees_each_stage_and_can_stop_the_run(small_scene):
    folder, _ = small_scene
    params = Params().with_overrides({"disp_range": "0:48"})
    seen = []
    reconstruct(_pair(folder), params, stop_after="filter_cloud",
                on_stage=lambda stage, partial: seen.append((stage, partial.cloud is None)))
    assert seen == [("disparity", True), ("triangulate", False), ("filter_cloud", False)]

    def refuse(stage, partial):
        if stage == "triangulate":
            raise RuntimeError("disk full")

    with pytest.raises(StageFailed) as info:
        reconstruct(_pair(folder), params, on_stage=refuse)
    assert info.value.stage == "triangulate" and info.value.partial.cloud is not None


def test_a_failed_stage_keeps_the_disparity_files_written_early(small_scene, tmp_path):
    # The disparity files are written by a second thread during the geometry
    # stages; a later failure must still leave them, their previews and the report.
    import json

    folder, _ = small_scene
    out = tmp_path / "o"
    code = cli.main(["run", str(folder / "left.png"), str(folder / "right.png"), "--calib",
                     str(folder / "calib.json"), "--out", str(out), "--quiet",
                     "--disp-range", "0:48", "--depth-min", "1000"])
    assert code == 2
    report = json.loads((out / "report.json").read_text())
    assert report["status"] == "failed"
    for name in ("disparity.pfm", "confidence.pfm", "occlusion.png",
                 "previews/disparity.png", "previews/rectified_pair.png"):
        assert (out / name).is_file(), name
    assert "previews" in report["stages"]


def _schema_values(row):
    """The bounds, choices and default of one schema field, as a user could type them."""
    values = {row["default"]}
    if row["choices"]:
        values |= set(row["choices"])
    for key in ("min", "max"):
        if row[key] is not None:
            values.add(row[key])
    return sorted(values, key=str)


def test_every_schema_value_runs_or_is_refused_with_a_reason(small_scene, tmp_path, capsys):
    # Walk every field's bounds and choices through the real command (in-process):
    # each either runs (exit 0) or is refused as bad input (exit 2) with a message;
    # none may end as an internal error (exit 1).
    folder, _ = small_scene
    base = ["run", folder / "left.png", folder / "right.png", "--calib", folder / "calib.json",
            "--quiet", "--disp-range", "0:48"]
    slow = {"poisson_depth": 10}  # the octree's cost grows 8x a level; 10 shows the bound path
    outcomes = {}
    for row in schema():
        if row["name"] == "disp_range":
            continue
        for value in _schema_values(row):
            if row["name"] == "poisson_depth" and value > slow["poisson_depth"]:
                continue
            extra = [row["flag"], value]
            if row["name"] in ("poisson_depth", "density_quantile", "trim_spacings"):
                extra += ["--surface", "poisson"]
            out = tmp_path / f"{row['name']}-{value}"
            code, err = _main(*base, *extra, "--out", out, capsys=capsys)
            outcomes[(row["name"], value)] = code
            assert code in (0, 2), (row["name"], value, err[-2000:])
            if code == 2:
                assert "error:" in err and len(err.strip()) > 20, (row["name"], value, err)
    assert sum(code == 0 for code in outcomes.values()) > 0.7 * len(outcomes)


def test_census_window_beyond_63_comparisons_is_bad_input(small_scene, tmp_path, capsys):
    folder, _ = small_scene
    code, err = _main("disparity", folder / "left.png", folder / "right.png", "--calib",
                      folder / "calib.json", "--out", tmp_path, "--census-width", 9,
                      "--census-height", 9, capsys=capsys)
    assert code == 2 and "census" in err and "63" in err
    # The same window is fine for the box of the other cost.
    assert Params().with_overrides({"census_width": 9, "census_height": 9,
                                    "cost": "ad_gradient"}).disparity.census_width == 9


def test_depth_min_beyond_depth_max_is_bad_input():
    with pytest.raises(InputError, match="depth_min"):
        Params().with_overrides({"depth_min": 3.0, "depth_max": 2.0})
    assert Params().with_overrides({"depth_min": 3.0, "depth_max": 0.0}).cloud.depth_min == 3.0


@pytest.mark.parametrize("units, metres", [("m", 1.0), ("metres", 1.0), ("mm", 0.001),
                                           ("cm", 0.01)])
def test_calibration_units_are_converted_to_metres(units, metres):
    from stereomesh.io.calibration import rig_from_dict

    calib = {"rectified": True, "image_size": [64, 48], "focal_px": 100.0, "cx": 32.0,
             "cy": 24.0, "baseline": 120.0, "units": units}
    rig = rig_from_dict(calib)
    assert rig.metric and rig.units == "m"
    assert rig.baseline == pytest.approx(120.0 * metres)


@pytest.mark.parametrize("field, value, words", [
    ("units", "furlongs", "units"),
    ("units", "", "units"),
    ("image_size", ["a", 48], "image_size"),
    ("image_size", [64.9, 48.2], "whole"),
    ("image_size", [64, 0], "positive"),
    ("focal_px", "700", "focal_px"),
    ("baseline", True, "baseline"),
])
def test_bad_calibration_fields_are_named(field, value, words, tmp_path, capsys):
    calib = {"rectified": True, "image_size": [640, 480], "focal_px": 700.0, "cx": 320.0,
             "cy": 240.0, "baseline": 0.4, "doffs": 0.0, "units": "m", field: value}
    path = tmp_path / "calib.json"
    path.write_text(json.dumps(calib))
    code, err = _main("disparity", DEMO / "left.png", DEMO / "right.png", "--calib", path,
                      "--out", tmp_path / "out", capsys=capsys)
    assert code == 2 and words in err and str(path) in err


def test_unscaled_calibration_says_so_in_the_ply_header(tmp_path):
    from stereomesh.geometry.data import PointCloud
    from stereomesh.io.ply import write_cloud_ply

    cloud = PointCloud(np.ones((2, 3)), np.zeros((2, 3), np.uint8), np.ones(2, np.float32),
                       np.zeros(2, np.float32))
    write_cloud_ply(tmp_path / "u.ply", cloud, scale="unscaled")
    write_cloud_ply(tmp_path / "m.ply", cloud)
    assert b"unscaled" in (tmp_path / "u.ply").read_bytes()[:600]
    header = (tmp_path / "m.ply").read_bytes()[:600]
    assert b"units: metres" in header and b"unscaled" not in header


def test_output_folder_that_cannot_be_created_is_bad_input(tmp_path, capsys):
    blocker = tmp_path / "file"
    blocker.write_text("not a folder")
    code, err = _main("disparity", DEMO / "left.png", DEMO / "right.png", "--calib",
                      DEMO / "calib.json", "--out", blocker / "sub", "--disp-range", "64:192",
                      capsys=capsys)
    assert code == 2 and "--out" in err and str(blocker / "sub") in err


def test_compute_disparity_refuses_unknown_options_and_misread_images():
    from stereomesh.matching.disparity import compute_disparity

    image = np.zeros((20, 40, 3), np.uint8)
    bad_method = dataclasses.replace(DisparityParams(), method="graphcut")
    with pytest.raises(InputError, match="method"):
        compute_disparity(image, image, bad_method)
    bad_subpixel = dataclasses.replace(DisparityParams(), subpixel="cubic")
    with pytest.raises(InputError, match="subpixel"):
        compute_disparity(image, image, bad_subpixel)
    with pytest.raises(ValueError, match=r"\[0, 1\]"):
        compute_disparity(image.astype(np.float32) + 10, image.astype(np.float32))
    with pytest.raises(ValueError, match="uint8"):
        compute_disparity(image.astype(np.int64), image.astype(np.int64))


def test_float_images_in_unit_range_match_their_8_bit_form():
    # Float images in [0, 1] (scikit-image's convention) mean the same as uint8 / 255.
    from skimage import data

    from stereomesh.matching.disparity import compute_disparity

    left, right, _ = data.stereo_motorcycle()
    left, right = left[::2, ::2].copy(), right[::2, ::2].copy()
    params = DisparityParams(disp_range="0:64")
    as_bytes = compute_disparity(left, right, params)
    as_floats = compute_disparity(left / 255.0, right / 255.0, params)
    both = np.isfinite(as_bytes.disparity) & np.isfinite(as_floats.disparity)
    assert both.mean() > 0.8
    assert np.abs(as_bytes.disparity - as_floats.disparity)[both].max() < 0.01
    assert as_floats.confidence.mean() == pytest.approx(as_bytes.confidence.mean(), abs=0.01)


def test_float_tiff_is_read_at_full_range(tmp_path):
    # A float TIFF in [0, 1] written by OpenCV (an outside writer) must not read as black.
    import cv2

    from stereomesh.io.images import read_image

    ramp = np.tile(np.linspace(0, 1, 50, dtype=np.float32), (20, 1))
    path = tmp_path / "ramp.tiff"
    assert cv2.imwrite(str(path), ramp)
    image = read_image(path)
    assert image.dtype == np.uint16 and image.max() == 65535
    np.testing.assert_allclose(image[..., 0] / 65535.0, ramp, atol=1e-4)
    cv2.imwrite(str(path), ramp * 200)
    with pytest.raises(InputError, match=r"\[0, 1\]"):
        read_image(path)


def test_memory_model_covers_16_bit_path_buffers():
    # With p2 > 255 - max cost the path buffers are 16-bit; the model must count them.
    from stereomesh.matching.sgm import Workspace, memory_bytes, semi_global_matching

    rng = np.random.default_rng(3)
    right = (rng.random((60, 120)) * 255).astype(np.float32)
    left = np.roll(right, 4, axis=1)
    for p2 in (96, 300):
        ws = Workspace()
        semi_global_matching(left, right, 0, 64, p2=p2, block_rows=60, workspace=ws)
        assert ws.nbytes <= memory_bytes(60, 120, 64, p2=p2, block_rows=60), p2
    assert memory_bytes(60, 120, 64, p2=300) > memory_bytes(60, 120, 64, p2=96)


def test_voxel_thinning_keeps_the_grid_mesh_within_the_filters(small_scene):
    folder, _ = small_scene
    pair = _pair(folder)
    plain = Params().with_overrides({"disp_range": "0:48"})
    full = reconstruct(pair, plain, stop_after="surface")
    z = full.mesh.vertices[:, 2]
    limit = float(np.percentile(z, 50))
    for voxel in (0.0, 0.02):
        params = plain.with_overrides({"depth_max": limit, "voxel_size": voxel})
        out = reconstruct(pair, params, stop_after="surface")
        assert out.mesh.vertices[:, 2].max() <= limit + 1e-9, voxel
        if voxel:
            assert len(out.cloud) < out.figures["filter_cloud"]["points"]["after_statistical"]
        else:
            reference = out
    assert len(out.mesh.vertices) == len(reference.mesh.vertices)


def test_range_estimation_fallback_is_a_warning():
    from stereomesh.matching.disparity import compute_disparity

    flat = np.full((60, 100, 3), 128, np.uint8)
    result = compute_disparity(flat, flat, DisparityParams(disp_range="auto"))
    assert result.figures["auto_range"]["fallback"]
    assert any("disparity range" in w for w in result.warnings)
    rig = RectifiedRig(focal_px=100.0, cx=50.0, cy=30.0, baseline=0.1)
    out = reconstruct(StereoPair(flat, flat, rig), Params(), stop_after="disparity")
    assert any("disparity range" in w for w in out.warnings)


def test_failed_disparity_stage_is_named_in_the_report(tmp_path, monkeypatch):
    from stereomesh import pipeline
    from stereomesh.jobs import run_job

    def broken(*args, **kwargs):  # stands for any internal failure of the stage
        raise RuntimeError("solver exploded")

    monkeypatch.setattr(pipeline, "disparity_of_pair", broken)
    params = Params().with_overrides({"disp_range": "64:192"})
    with pytest.raises(RuntimeError, match="exploded"):
        run_job([DEMO / "left.png", DEMO / "right.png"], DEMO / "calib.json", tmp_path, params,
                command="disparity", stop_after="disparity")
    report = json.loads((tmp_path / "report.json").read_text())
    assert report["status"] == "failed" and report["failed_stage"] == "disparity"
    assert any("exploded" in w for w in report["warnings"])


def test_solver_defaults_are_the_schema_defaults():
    import inspect

    from stereomesh.geometry.surface import depth_grid_mesh
    from stereomesh.geometry.triangulate import triangulate
    from stereomesh.matching.sgm import aggregate_costs, semi_global_matching
    from stereomesh.params import CloudParams

    d = DisparityParams()
    for function in (aggregate_costs, semi_global_matching):
        sig = inspect.signature(function).parameters
        for name in ("p1", "p2", "p2_gradient_scale", "paths"):
            assert sig[name].default == getattr(d, name), (function.__name__, name)
    for function in (triangulate, depth_grid_mesh):
        assert inspect.signature(function).parameters["sigma_d"].default == CloudParams().sigma_d


def test_stage_functions_take_the_schema_names():
    # Every schema field of the geometry sections reaches a stage function under its
    # own name, so no mapping is written by hand.
    import inspect

    from stereomesh.geometry.filters import filter_cloud
    from stereomesh.geometry.repair import repair_mesh
    from stereomesh.geometry.surface import depth_grid_mesh, poisson_mesh

    takes = set()
    for function in (filter_cloud, repair_mesh, depth_grid_mesh, poisson_mesh):
        takes |= set(inspect.signature(function).parameters)
    for section in ("repair", "surface"):
        for f in dataclasses.fields(SECTIONS[section]):
            assert f.name in takes or f.name == "surface", f.name
    for f in dataclasses.fields(SECTIONS["cloud"]):
        assert f.name in takes or f.name == "sigma_d", f.name


def test_demo_quiet_prints_nothing(tmp_path, capsys):
    code = cli.main(["demo", "--out", str(tmp_path), "--quiet"])
    captured = capsys.readouterr()
    assert code == 0 and captured.out == ""
    assert (tmp_path / "mesh.ply").is_file()


def test_importing_the_package_sets_no_process_setting():
    import os
    import subprocess
    import sys

    env = {k: v for k, v in os.environ.items() if not k.startswith("NUMBA_")}
    code = ("import os, stereomesh, stereomesh.pipeline, stereomesh.io.inputs; "
            "print([k for k in os.environ if k.startswith('NUMBA_')])")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env)
    assert out.stdout.strip() == "[]", out.stdout + out.stderr


def test_confidence_ranks_errors_on_real_photographs(motorcycle):
    # Reference: the Middlebury 2014 ground truth of the motorcycle pair (scikit-image).
    # Judged by the sparsification curve (error of the kept pixels as the least
    # confident are removed): its area must be well below that of a random order
    # (which is the mean error) and bad pixels must go first.
    from stereomesh.evaluation import sparsification_auc
    from stereomesh.matching.disparity import compute_disparity

    res = compute_disparity(motorcycle["left"], motorcycle["right"],
                            DisparityParams(disp_range="0:128"))
    ok = np.isfinite(res.disparity) & np.isfinite(motorcycle["gt"])
    err = np.abs(res.disparity - motorcycle["gt"])[ok]
    conf = res.confidence[ok]
    assert sparsification_auc(err, conf) < 0.6 * err.mean()
    bad = (err > 2.0).astype(float)
    assert sparsification_auc(bad, conf) < 0.4 * bad.mean()


def test_first_run_says_it_compiles(tmp_path, monkeypatch):
    # With an empty numba cache the command says why the first run is slow.
    from stereomesh.matching.disparity import kernels_cached

    monkeypatch.setenv("NUMBA_CACHE_DIR", str(tmp_path / "cache"))
    assert not kernels_cached()
    (tmp_path / "cache" / "x").mkdir(parents=True)
    (tmp_path / "cache" / "x" / "_sgm_kernels.sgm_solve-1.py311.nbi").write_bytes(b"")
    assert kernels_cached()


@pytest.mark.skipif(not __import__("sys").platform.startswith("linux"),
                    reason="per-thread nice values are a Linux feature")
def test_file_writer_thread_yields_the_cores_and_leaves_the_caller_alone():
    # setpriority(2) on Linux: the nice value belongs to the thread, so the
    # writer's change must not reach the thread that started it.
    import os
    import threading

    from stereomesh.jobs import _yield_cores

    seen = {}

    def writer():
        _yield_cores()
        seen["writer"] = os.getpriority(os.PRIO_PROCESS, threading.get_native_id())

    before = os.getpriority(os.PRIO_PROCESS, threading.get_native_id())
    t = threading.Thread(target=writer)
    t.start()
    t.join()
    assert seen["writer"] == 19
    assert os.getpriority(os.PRIO_PROCESS, threading.get_native_id()) == before
