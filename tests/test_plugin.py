"""The editor plugin for real: the built zip installed into the bpy module, headless.

One editor process (``tests/blender_session.py``, run by the bpy venv's Python)
installs ``dist``-style zip with ``extensions.package_install_files``, runs every
menu action on the demo pair through a real worker started from this venv's
Python, and records each check; the tests below read those records. Nothing of
bpy, Open3D or PyMeshLab is mocked.

The bpy venv is ``.venv-blender`` (made by ``make test``) or ``$STEREOMESH_BPY_PYTHON``;
where bpy cannot be installed the tests skip and say why.
"""

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest
from conftest import DEMO, REPO

BPY_PYTHON = Path(os.environ.get("STEREOMESH_BPY_PYTHON",
                                 REPO / ".venv-blender" / "bin" / "python"))
BUILD = REPO / "plugin_manifest" / "build.py"


def _bpy_problem() -> str | None:
    if not BPY_PYTHON.is_file():
        return (f"no bpy interpreter at {BPY_PYTHON}: run 'make blender-venv' (needs python3.11 "
                "and the bpy wheel from PyPI) or set STEREOMESH_BPY_PYTHON")
    proc = subprocess.run([str(BPY_PYTHON), "-c", "import bpy"], capture_output=True, text=True,
                          timeout=300)
    if proc.returncode != 0:
        return f"{BPY_PYTHON} cannot import bpy: {proc.stderr.strip().splitlines()[-1:]}"
    return None


def _editor_scripts() -> Path:
    """The ``scripts`` folder the bpy module ships (``bpy/5.0/scripts``)."""
    out = subprocess.run([str(BPY_PYTHON), "-c", "import bpy; print(bpy.utils.system_resource("
                          "'SCRIPTS'))"], capture_output=True, text=True, check=True)
    return Path(out.stdout.strip().splitlines()[-1])


@pytest.fixture(scope="module")
def bpy_python():
    problem = _bpy_problem()
    if problem:
        pytest.skip(problem)
    return BPY_PYTHON


@pytest.fixture(scope="module")
def plugin_zip(tmp_path_factory):
    """The extension zip, built by the same script as ``make plugin``."""
    out = tmp_path_factory.mktemp("dist")
    subprocess.run([sys.executable, str(BUILD), "--out", str(out), "--no-wheel"], check=True,
                   capture_output=True)
    (zip_path,) = out.glob("stereomesh-*.zip")
    return zip_path


@pytest.fixture(scope="module")
def stand_in_wheel(tmp_path_factory):
    """A dependency-free wheel named stereomesh with an importable ``stereomesh.worker``.

    It lets the engine set-up run for real (venv, pip, the import check, the
    preference) offline and in seconds; the real wheel would make pip fetch the
    core's dependencies (gigabytes). It stands in for nothing the test checks.
    """
    import base64
    import hashlib
    import zipfile

    files = {
        "stereomesh/__init__.py": b"",
        "stereomesh/worker.py": b"",
        "stereomesh-0.0.0.dist-info/METADATA":
            b"Metadata-Version: 2.1\nName: stereomesh\nVersion: 0.0.0\n",
        "stereomesh-0.0.0.dist-info/WHEEL":
            b"Wheel-Version: 1.0\nGenerator: test\nRoot-Is-Purelib: true\nTag: py3-none-any\n",
    }
    # The wheel format (PEP 427): RECORD lists every file with its urlsafe-base64 sha256.
    record = []
    for name, data in files.items():
        digest = base64.urlsafe_b64encode(hashlib.sha256(data).digest()).rstrip(b"=")
        record.append(f"{name},sha256={digest.decode()},{len(data)}")
    record.append("stereomesh-0.0.0.dist-info/RECORD,,")
    files["stereomesh-0.0.0.dist-info/RECORD"] = ("\n".join(record) + "\n").encode()
    wheel = tmp_path_factory.mktemp("stand_in") / "stereomesh-0.0.0-py3-none-any.whl"
    with zipfile.ZipFile(wheel, "w") as zf:
        for name, data in files.items():
            zf.writestr(name, data)
    return wheel


@pytest.fixture(scope="module")
def session(bpy_python, plugin_zip, stand_in_wheel, tmp_path_factory):
    """Run the editor session once; returns its check records."""
    home = tmp_path_factory.mktemp("blender_user")
    result = home / "result.json"
    # Without BLENDER_USER_RESOURCES the install would write into the user's own config.
    env = {k: v for k, v in os.environ.items() if not k.startswith("PYTHON")}
    env["BLENDER_USER_RESOURCES"] = str(home / "resources")
    env["STEREOMESH_TEST_WHEEL"] = str(stand_in_wheel)
    proc = subprocess.run(
        [str(bpy_python), str(REPO / "tests" / "blender_session.py"), str(plugin_zip),
         sys.executable, str(DEMO), str(result)],
        capture_output=True, text=True, timeout=900, cwd=home, env=env)
    if not result.is_file():
        pytest.fail(f"the editor session wrote no results (exit {proc.returncode}):\n"
                    f"{proc.stdout[-3000:]}\n{proc.stderr[-3000:]}")
    return json.loads(result.read_text()), proc


def _assert(session, name):
    records, proc = session
    assert name in records, (f"check {name!r} did not run (exit {proc.returncode}):\n"
                             f"{proc.stderr[-2000:]}")
    rec = records[name]
    assert rec["ok"], f"{name}: {rec['detail']}\n{rec.get('trace', '')}"
    return rec["detail"]


def test_manifest_validates_with_the_editors_tool(bpy_python, plugin_zip):
    # The validator shipped inside bpy (bl_pkg/cli/blender_ext.py) is the editor's own.
    tool = _editor_scripts() / "addons_core" / "bl_pkg" / "cli" / "blender_ext.py"
    proc = subprocess.run([str(bpy_python), str(tool), "validate", str(plugin_zip)],
                          capture_output=True, text=True)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    import zipfile

    names = zipfile.ZipFile(plugin_zip).namelist()
    assert {"blender_manifest.toml", "schema.json", "build.json", "__init__.py"} <= set(names)
    assert not any(n.startswith("stereomesh/") or "matching" in n for n in names), names


@pytest.mark.parametrize("name", [
    "install", "heavy_imports", "menus", "schema_properties", "python_detection",
    "engine_setup_refuses_a_wrong_wheel",
])
def test_extension_installs_and_registers(session, name):
    _assert(session, name)


def test_mesh_from_pair_leaves_one_coloured_mesh(session):
    detail = _assert(session, "mesh_from_pair")
    assert detail["vertices"] > 100_000
    _assert(session, "camera")


def test_vertices_project_onto_their_pixels(session):
    assert _assert(session, "cloud_projects_onto_its_pixels")["max_error_px"] < 1.0
    assert _assert(session, "mesh_projects_onto_its_pixels")["colour_match"] > 0.99


def test_disparity_maps_become_images(session):
    _assert(session, "disparity")


@pytest.mark.parametrize("name", [
    "cloud_from_pair", "edit_then_clean", "surface_from_cloud", "fill_holes",
])
def test_actions_on_edited_scene_data(session, name):
    _assert(session, name)


def test_failures_become_messages_and_the_next_action_works(session):
    _assert(session, "bad_input")
    detail = _assert(session, "worker_killed")
    assert detail["old_pid"] != detail["new_pid"]


def test_engine_set_up_creates_an_environment_and_points_at_it(session):
    detail = _assert(session, "engine_setup")
    assert detail["python"].endswith("python") and "engine" in detail["python"]


def test_disabling_stops_the_worker(session):
    _assert(session, "unregister")
