"""Add-on preferences: which interpreter runs the engine, and setting one up."""

import os
import shutil
import subprocess
import sys
from pathlib import Path

import bpy

from . import client

ADDON = __package__


def _venv_python(venv: Path) -> Path:
    return venv / ("Scripts/python.exe" if sys.platform == "win32" else "bin/python")


def engine_dir() -> Path:
    """Folder of the engine environment the add-on creates (the extension's user data)."""
    try:
        return Path(bpy.utils.extension_path_user(ADDON, path="engine", create=True))
    except (ValueError, AttributeError):  # loaded as a legacy add-on, not an extension
        return Path(bpy.utils.user_resource("SCRIPTS", path="stereomesh_engine", create=True))


def _has_core(python: str) -> bool:
    try:
        proc = subprocess.run([python, "-c", "import stereomesh.worker"],
                              env=client.clean_environment(), capture_output=True, timeout=60)
    except (OSError, subprocess.TimeoutExpired):
        return False
    return proc.returncode == 0


def candidates() -> list[str]:
    """Interpreters that may have stereomesh, most specific first."""
    out = []
    env = os.environ.get("STEREOMESH_PYTHON")
    if env:
        out.append(env)
    out.append(str(_venv_python(engine_dir() / "venv")))
    command = shutil.which("stereomesh")
    if command:  # the console script's own interpreter is on its first line
        try:
            with open(command, encoding="utf-8", errors="replace") as fh:
                first = fh.readline()
            if first.startswith("#!"):
                out.append(first[2:].strip().split()[0])
        except OSError:
            pass
    for name in ("python3.11", "python3.12", "python3.13", "python3", "python"):
        found = shutil.which(name)
        if found:
            out.append(found)
    seen, unique = set(), []
    for p in out:
        if p not in seen and os.path.isfile(p):
            seen.add(p)
            unique.append(p)
    return unique


def find_python(prefs=None) -> str:
    """The interpreter to run the engine with: the preference, else the first that works.

    Raises
    ------
    client.WorkerError
        With a message saying how to fix it when none is found.
    """
    prefs = prefs or get()
    if prefs is not None and prefs.python_path:
        path = bpy.path.abspath(prefs.python_path)
        if not os.path.isfile(path):
            raise client.WorkerError("input", f"the engine interpreter {path} does not exist; "
                                     "fix it in Preferences > Add-ons > stereomesh")
        return path
    for python in candidates():
        if _has_core(python):
            if prefs is not None:
                prefs.python_path = python
            return python
    raise client.WorkerError(
        "input", "no Python with stereomesh installed was found: in Preferences > Add-ons > "
        "stereomesh press 'Set Up Engine' (needs the stereomesh wheel built beside the add-on) "
        "or enter the interpreter of an environment where stereomesh is installed")


def get():
    """This add-on's preferences, or None when it is not registered as an add-on."""
    addon = bpy.context.preferences.addons.get(ADDON)
    return addon.preferences if addon else None


class STEREOMESH_OT_setup_engine(bpy.types.Operator):
    """Create a Python environment for the engine and install stereomesh from its wheel"""

    bl_idname = "stereomesh.setup_engine"
    bl_label = "Set Up Engine"
    bl_options = {"REGISTER", "INTERNAL"}

    wheel: bpy.props.StringProperty(name="Wheel", subtype="FILE_PATH",
                                    description="stereomesh-*.whl, built beside the add-on zip")
    base_python: bpy.props.StringProperty(
        name="Base Python", subtype="FILE_PATH",
        description="Python 3.11 or newer to create the environment with; empty uses the "
        "editor's own when its version fits")

    def invoke(self, context, event):
        prefs = get()
        if prefs is not None:
            self.wheel = self.wheel or prefs.wheel_path
        return context.window_manager.invoke_props_dialog(self, width=500)

    def execute(self, context):
        wheel = bpy.path.abspath(self.wheel)
        if not wheel.endswith(".whl") or not os.path.isfile(wheel):
            self.report({"ERROR"}, f"pick the stereomesh wheel (.whl); {wheel!r} is not one")
            return {"CANCELLED"}
        base = bpy.path.abspath(self.base_python) if self.base_python else sys.executable
        if not self.base_python and sys.version_info < (3, 11):
            self.report({"ERROR"}, "the editor's Python is older than 3.11: pick a Base Python")
            return {"CANCELLED"}
        venv = engine_dir() / "venv"
        env = client.clean_environment()
        steps = [[base, "-m", "venv", str(venv)],
                 [str(_venv_python(venv)), "-m", "pip", "install", "--upgrade", wheel]]
        for step in steps:
            self.report({"INFO"}, "running: " + " ".join(step))
            proc = subprocess.run(step, env=env, capture_output=True, text=True)
            if proc.returncode != 0:
                tail = (proc.stderr or proc.stdout).strip().splitlines()[-3:]
                self.report({"ERROR"}, f"{step[2]} failed: {' | '.join(tail)}")
                return {"CANCELLED"}
        prefs = get()
        if prefs is not None:
            prefs.python_path = str(_venv_python(venv))
        client.shutdown()  # the next action starts the new engine
        self.report({"INFO"}, f"engine installed in {venv}")
        return {"FINISHED"}


class STEREOMESH_OT_detect_python(bpy.types.Operator):
    """Look for an interpreter that has stereomesh installed"""

    bl_idname = "stereomesh.detect_python"
    bl_label = "Detect"
    bl_options = {"REGISTER", "INTERNAL"}

    def execute(self, context):
        prefs = get()
        if prefs is not None:
            prefs.python_path = ""
        try:
            python = find_python(prefs)
        except client.WorkerError as exc:
            self.report({"ERROR"}, str(exc))
            return {"CANCELLED"}
        self.report({"INFO"}, f"engine interpreter: {python}")
        return {"FINISHED"}


class STEREOMESH_AP_preferences(bpy.types.AddonPreferences):
    bl_idname = ADDON

    python_path: bpy.props.StringProperty(
        name="Engine Python", subtype="FILE_PATH",
        description="Interpreter of the environment where stereomesh is installed; empty "
        "looks for one")
    wheel_path: bpy.props.StringProperty(
        name="Engine Wheel", subtype="FILE_PATH",
        description="The stereomesh wheel built beside the add-on zip, for 'Set Up Engine'")

    def draw(self, context):
        layout = self.layout
        row = layout.row(align=True)
        row.prop(self, "python_path")
        row.operator(STEREOMESH_OT_detect_python.bl_idname, text="", icon="VIEWZOOM")
        layout.prop(self, "wheel_path")
        layout.operator(STEREOMESH_OT_setup_engine.bl_idname).wheel = self.wheel_path
        running = client.current_client()
        if running is not None and running.alive():
            layout.label(text=f"Engine running: stereomesh {running.hello.get('version')} "
                         f"(process {running.pid})")


classes = (STEREOMESH_OT_setup_engine, STEREOMESH_OT_detect_python, STEREOMESH_AP_preferences)
