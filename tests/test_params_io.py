"""Parameter schema, config files, calibration files and atomic writes."""

import json

import numpy as np
import pytest

from stereomesh.errors import InputError
from stereomesh.io.atomic import atomic_path
from stereomesh.io.calibration import read_calibration, write_calibration
from stereomesh.io.pfm import read_pfm, write_pfm
from stereomesh.params import Params, load_config, parse_disp_range, schema


def test_schema_names_are_unique_and_documented():
    rows = schema()
    names = [r["name"] for r in rows]
    assert len(names) == len(set(names))
    assert all(r["help"] for r in rows)


def test_disp_range_parsing():
    assert parse_disp_range("-8:56") == (-8, 56)
    assert parse_disp_range("auto") is None
    for bad in ("12", "a:b", "10:5"):
        with pytest.raises(InputError):
            parse_disp_range(bad)


def test_overrides_are_checked():
    with pytest.raises(InputError, match="p2"):
        Params().with_overrides({"p2": 5000})
    with pytest.raises(InputError, match="method"):
        Params().with_overrides({"method": "magic"})
    with pytest.raises(InputError, match="unknown"):
        Params().with_overrides({"nope": 1})
    with pytest.raises(InputError, match="first alignment pass"):
        Params().with_overrides({"align_first_width": 6})


def test_config_file(tmp_path):
    cfg = tmp_path / "p.toml"
    cfg.write_text('[disparity]\np2 = 120\ndisp_range = "0:64"\n[surface]\nsurface = "poisson"\n')
    p = load_config(cfg)
    assert p.disparity.p2 == 120 and p.surface.surface == "poisson"
    cfg.write_text("[surface]\np2 = 3\n")
    with pytest.raises(InputError, match="surface"):
        load_config(cfg)


def test_calibration_round_trip_and_checks(tmp_path):
    path = tmp_path / "c.json"
    data = {"rectified": True, "image_size": [64, 48], "focal_px": 100.0, "cx": 31.5,
            "cy": 23.5, "baseline": 0.1, "doffs": 0.0, "units": "m"}
    path.write_text(json.dumps(data))
    rig = read_calibration(path)
    write_calibration(tmp_path / "d.json", rig)
    assert json.loads((tmp_path / "d.json").read_text()) == data
    path.write_text(json.dumps({**data, "baseline": -1}))
    with pytest.raises(InputError, match="c.json"):
        read_calibration(path)


def test_pfm_keeps_nan_and_orientation(tmp_path):
    arr = np.arange(12, dtype=np.float32).reshape(3, 4)
    arr[0, 1] = np.nan
    write_pfm(tmp_path / "a.pfm", arr)
    back = read_pfm(tmp_path / "a.pfm")
    np.testing.assert_array_equal(np.isnan(back), np.isnan(arr))
    np.testing.assert_array_equal(back[~np.isnan(back)], arr[~np.isnan(arr)])


def test_atomic_write_leaves_target_on_failure(tmp_path):
    target = tmp_path / "x.txt"
    target.write_text("old")
    with pytest.raises(RuntimeError), atomic_path(target) as tmp:
        tmp.write_text("half")
        raise RuntimeError("boom")
    assert target.read_text() == "old"
    assert list(tmp_path.iterdir()) == [target]


def test_presets_load_and_flags_override_them(tmp_path):
    from stereomesh import cli
    from stereomesh.params import load_preset, preset_names

    assert set(preset_names()) == {"facade", "catalogue", "archive"}
    for name in preset_names():
        load_preset(name)  # every preset passes the schema's checks
    args = cli._build_parser().parse_args(
        ["run", "a.png", "b.png", "--out", str(tmp_path), "--preset", "catalogue",
         "--poisson-depth", "8"])
    from stereomesh.params import SECTIONS

    params = cli._params(args, tuple(SECTIONS))
    assert params.surface.surface == "poisson" and params.surface.poisson_depth == 8
