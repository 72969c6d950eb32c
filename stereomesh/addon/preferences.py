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
        self._venv = engine_dir() / "venv"
        python = str(_venv_python(self._venv))
        # pip fetches the core's dependencies: minutes, so the interface path polls it.
        self._steps = [("creating the environment", [base, "-m", "venv", str(self._venv)]),
                       ("installing stereomesh and its dependencies",
                        [python, "-m", "pip", "install", "--upgrade", wheel])]
        if bpy.app.background:
            for what, step in self._steps:
                print(f"stereomesh: {what}: {' '.join(step)}", flush=True)
                proc = subprocess.run(step, env=client.clean_environment(),
                                      capture_output=True, text=True)
                if proc.returncode != 0:
                    return self._failed(what, proc.stdout + proc.stderr)
            return self._finished()
        self._proc, self._log = None, None
        self._next_step()
        wm = context.window_manager
        self._timer = wm.event_timer_add(0.5, window=context.window)
        wm.modal_handler_add(self)
        return {"RUNNING_MODAL"}

    def _next_step(self) -> None:
        self._what, step = self._steps.pop(0)
        import tempfile

        self._log = tempfile.TemporaryFile(mode="w+", encoding="utf-8")
        self._proc = subprocess.Popen(step, env=client.clean_environment(), stdout=self._log,
                                      stderr=subprocess.STDOUT, text=True)

    def modal(self, context, event):
        if event.type != "TIMER":
            return {"PASS_THROUGH"}
        if self._proc.poll() is None:
            if context.workspace is not None:
                context.workspace.status_text_set(f"Stereo engine set-up: {self._what}…")
            return {"RUNNING_MODAL"}
        code = self._proc.returncode
        self._log.seek(0)
        output = self._log.read()
        self._log.close()
        if code == 0 and self._steps:
            self._next_step()
            return {"RUNNING_MODAL"}
        context.window_manager.event_timer_remove(self._timer)
        if context.workspace is not None:
            context.workspace.status_text_set(None)
        return self._finished() if code == 0 else self._failed(self._what, output)

    def _failed(self, what: str, output: str):
        tail = [ln for ln in output.strip().splitlines() if ln.strip()][-3:]
        self.report({"ERROR"}, f"{what} failed: {' | '.join(tail)}")
        return {"CANCELLED"}

    def _finished(self):
        python = str(_venv_python(self._venv))
        if not _has_core(python):
            self.report({"ERROR"}, f"{self._venv} was set up but stereomesh's worker does not "
                        "import there; pick the stereomesh wheel built beside the add-on")
            return {"CANCELLED"}
        prefs = get()
        if prefs is not None:
            prefs.python_path = python
        client.shutdown()  # the next action starts the new engine
        self.report({"INFO"}, f"engine installed in {self._venv}")
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
