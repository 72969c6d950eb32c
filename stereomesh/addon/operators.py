"""The menu actions: each sends one request to the worker and brings the result in.

In the interface an action runs without blocking (a modal operator polled by
a timer; Esc cancels it) and shows the worker's progress, including the
one-time compilation of the kernels. In background mode timers never fire,
so ``execute`` blocks until the worker answers.
"""

# No ``from __future__ import annotations``: the editor reads property
# definitions from the class annotations' values.

import shutil
import tempfile
from pathlib import Path

import bpy

from . import client, preferences, properties

PAIR_SECTIONS = ("disparity", "cloud", "surface", "repair")


class InputProblem(Exception):
    """Something the user must fix before the request can be sent."""


def _file(path: str, what: str) -> str:
    path = bpy.path.abspath(path) if path else ""
    if not path:
        raise InputProblem(f"choose the {what}")
    if not Path(path).is_file():
        raise InputProblem(f"{path}: {what} not found")
    return str(Path(path).resolve())


class _WorkerAction:
    """Shared body of the actions; subclasses set ``action``, ``sections``, ``prepare``."""

    bl_options = {"REGISTER", "UNDO"}
    action = ""
    sections: tuple = ()

    # subclasses -----------------------------------------------------------------------
    def prepare(self, context, folder: Path) -> dict:
        """The request's ``args`` (``out_dir`` is added)."""
        raise NotImplementedError

    def finish(self, context, result: dict) -> str:
        """Bring the result into the scene; returns the summary shown to the user."""
        raise NotImplementedError

    # running --------------------------------------------------------------------------
    def draw(self, context):
        layout = self.layout
        for name in self.inputs():
            layout.prop(self, name)
        properties.draw(layout, self, self.sections)

    def inputs(self) -> tuple:
        return ()

    def invoke(self, context, event):
        return context.window_manager.invoke_props_dialog(self, width=520)

    def execute(self, context):
        self._folder = Path(tempfile.mkdtemp(prefix="stereomesh-"))
        try:
            args = self.prepare(context, self._folder)
            args["out_dir"] = str(self._folder / "out")
            worker = client.get_client(preferences.find_python())
            engine = worker.hello.get("version")
            if engine != properties.build_version():
                self.report({"WARNING"}, f"engine stereomesh {engine}, add-on "
                            f"{properties.build_version()}: options may differ; install "
                            "matching versions")
            if worker.busy() is not None:
                raise InputProblem(f"the engine is busy with {worker.busy().action}; wait for "
                                   "it or cancel it (Esc)")
            self._job = worker.submit(self.action, args, properties.values(self, self.sections))
        except (InputProblem, client.WorkerError) as exc:
            return self._fail(str(exc))
        if bpy.app.background:
            return self._blocking(context)
        wm = context.window_manager
        self._timer = wm.event_timer_add(0.1, window=context.window)
        wm.modal_handler_add(self)
        wm.progress_begin(0, 100)
        self._status(context)
        return {"RUNNING_MODAL"}

    def _blocking(self, context):
        wm = context.window_manager
        wm.progress_begin(0, 100)

        def show(fraction, message):
            wm.progress_update(int(100 * fraction))
            print(f"stereomesh: {self.action}: {100 * fraction:3.0f}% {message}", flush=True)

        try:
            result = self._job.wait(on_progress=show)
        except client.WorkerError as exc:
            return self._fail(str(exc), cancelled=exc.kind == "cancelled")
        finally:
            wm.progress_end()
        return self._complete(context, result)

    def modal(self, context, event):
        if event.type == "ESC" and event.value == "PRESS":
            self._job.cancel()  # ends the worker if it does not stop within a few seconds
            self._job.message = "cancelling"
            return {"RUNNING_MODAL"}  # the Esc is ours, not the editor's
        if event.type != "TIMER":
            return {"PASS_THROUGH"}
        if not self._job.poll():
            self._status(context)
            return {"RUNNING_MODAL"}
        wm = context.window_manager
        wm.event_timer_remove(self._timer)
        wm.progress_end()
        if context.workspace is not None:
            context.workspace.status_text_set(None)
        if self._job.error is not None:
            return self._fail(str(self._job.error), cancelled=self._job.error.kind == "cancelled")
        return self._complete(context, self._job.result)

    def _status(self, context):
        context.window_manager.progress_update(int(100 * self._job.fraction))
        if context.workspace is not None:
            context.workspace.status_text_set(
                f"Stereo ({self.bl_label}): {self._job.message} "
                f"{100 * self._job.fraction:.0f}%  —  Esc cancels")

    def _complete(self, context, result):
        try:
            summary = self.finish(context, result)
        except (InputProblem, ValueError, OSError) as exc:
            return self._fail(f"could not bring the result in: {exc}")
        finally:
            self._cleanup()
        for warning in result.get("warnings", []):
            self.report({"WARNING"}, warning)
        self.report({"INFO"}, summary)
        return {"FINISHED"}

    def _fail(self, message: str, cancelled: bool = False):
        self._cleanup()
        if cancelled:
            self.report({"WARNING"}, f"{self.bl_label}: cancelled")
        else:
            self.report({"ERROR"}, f"{self.bl_label}: {message}")
        return {"CANCELLED"}

    def _cleanup(self):
        folder = getattr(self, "_folder", None)
        if folder is not None:
            shutil.rmtree(folder, ignore_errors=True)
            self._folder = None


# ----------------------------------------------------------------------------------------
# pair actions
# ----------------------------------------------------------------------------------------


def _pair_annotations() -> dict:
    return {
        "left": bpy.props.StringProperty(name="Left Image", subtype="FILE_PATH",
                                         description="left image of the rectified pair"),
        "right": bpy.props.StringProperty(
            name="Right Image", subtype="FILE_PATH",
            description="right image; empty for a single file holding both views"),
        "calib": bpy.props.StringProperty(name="Calibration", subtype="FILE_PATH",
                                          description="calibration JSON of the pair"),
        "layout": bpy.props.EnumProperty(
            name="Layout", default="pair",
            items=[("pair", "Two Files or MPO", "left and right image files, or one MPO file "
                    "from a stereo camera"),
                   ("side-by-side", "Side by Side", "one scan holding both views next to each "
                    "other (a stereograph card)")]),
        "swap": bpy.props.BoolProperty(
            name="Swap Views", default=False,
            description="the left view is on the right (cross-eyed order)"),
    }


class _PairAction(_WorkerAction):
    def inputs(self):
        return ("left", "right", "calib", "layout", "swap")

    def pair_args(self) -> dict:
        inputs = [_file(self.left, "left image")]
        if self.right:
            inputs.append(_file(self.right, "right image"))
        calib = _file(self.calib, "calibration file") if self.calib else None
        return {"inputs": inputs, "calib": calib, "layout": self.layout,
                "swap": bool(self.swap)}

    def camera(self, context, rig: dict):
        from . import scene

        return scene.find_or_place_camera(context, rig)


class STEREOMESH_OT_mesh_from_pair(_PairAction, bpy.types.Operator):
    """Run the whole pipeline on a stereo pair: a coloured, repaired mesh in metres"""

    bl_idname = "stereomesh.mesh_from_pair"
    bl_label = "Mesh from Stereo Pair"
    action = "mesh_from_pair"
    sections = PAIR_SECTIONS

    def prepare(self, context, folder):
        return self.pair_args()

    def finish(self, context, result):
        from . import scene

        name = f"{Path(self.left).stem} mesh"
        obj = scene.import_ply(context, result["files"]["mesh"], name, result.get("rig"))
        self.camera(context, result["rig"])
        scene.select_only(context, obj)
        faces = len(obj.data.polygons)
        return (f"{obj.name}: {len(obj.data.vertices)} vertices, {faces} faces, "
                f"{result.get('scale')} ({result['seconds']:.1f} s). {scene.CAUTION}")


class STEREOMESH_OT_disparity(_PairAction, bpy.types.Operator):
    """Disparity and confidence maps of a stereo pair, as images"""

    bl_idname = "stereomesh.disparity"
    bl_label = "Disparity and Confidence Maps"
    action = "disparity"
    sections = ("disparity",)

    def prepare(self, context, folder):
        return self.pair_args()

    def finish(self, context, result):
        from . import scene

        stem = Path(self.left).stem
        files = result["files"]
        disp = scene.load_image(files["disparity_view"], f"{stem} disparity", True)
        scene.load_image(files["confidence_view"], f"{stem} confidence", True)
        scene.load_image(files["occlusion"], f"{stem} occlusion classes", True)
        disp["stereomesh_range"] = [result["d_min"], result["d_min"] + result["n_disp"]]
        figs = result["figures"].get("disparity", {})
        return (f"{disp.name}: {figs.get('density', 0):.1%} of pixels matched, "
                f"{figs.get('occluded_fraction', 0):.1%} occluded; disparity "
                f"{result['d_min']}..{result['d_min'] + result['n_disp'] - 1} px shown dark to "
                "bright (black: rejected)")


class STEREOMESH_OT_cloud_from_pair(_PairAction, bpy.types.Operator):
    """Coloured point cloud of a stereo pair, with confidence and depth uncertainty"""

    bl_idname = "stereomesh.cloud_from_pair"
    bl_label = "Coloured Point Cloud from Stereo Pair"
    action = "cloud_from_pair"
    sections = ("disparity", "cloud")

    def inputs(self):
        return ("left", "right", "calib", "layout", "swap", "clean")

    def prepare(self, context, folder):
        args = self.pair_args()
        args["clean"] = bool(self.clean)
        return args

    def finish(self, context, result):
        from . import scene

        name = f"{Path(self.left).stem} cloud"
        obj = scene.import_ply(context, result["files"]["cloud"], name, result.get("rig"))
        scene.show_as_points(obj)
        self.camera(context, result["rig"])
        scene.select_only(context, obj)
        return (f"{obj.name}: {len(obj.data.vertices)} points, {result.get('scale')} "
                f"({result['seconds']:.1f} s). {scene.CAUTION}")


# ----------------------------------------------------------------------------------------
# actions on the selected object
# ----------------------------------------------------------------------------------------


class _SelectedAction(_WorkerAction):
    needs_faces = False
    suffix = ""

    @classmethod
    def poll(cls, context):
        obj = context.active_object
        if obj is None or obj.type != "MESH":
            cls.poll_message_set("select a mesh object (a point cloud is a mesh without faces)")
            return False
        if cls.needs_faces and len(obj.data.polygons) == 0:
            cls.poll_message_set("the selected object has no faces")
            return False
        return True

    def invoke(self, context, event):
        return context.window_manager.invoke_props_dialog(self, width=420)

    def source(self, context, folder: Path, key: str) -> dict:
        from . import scene

        obj = context.active_object
        if obj is None or obj.type != "MESH":
            raise InputProblem("select a mesh object first")
        if len(obj.data.vertices) == 0:
            raise InputProblem(f"{obj.name} has no vertices")
        self._source = obj.name
        path = folder / f"{key}.ply"
        scene.export_selected(obj, path, with_faces=self.needs_faces)
        return {key: str(path), "calib": scene.rig_of(obj)}

    def bring_in(self, context, path: str, points: bool):
        from . import scene

        src = bpy.data.objects.get(self._source)
        rig = scene.rig_of(src) if src is not None else None
        obj = scene.import_ply(context, path, f"{self._source} {self.suffix}", rig)
        if points:
            scene.show_as_points(obj)
        if src is not None:
            src.hide_set(True)  # the result takes its place in view; the source stays
        scene.select_only(context, obj)
        return obj


class STEREOMESH_OT_clean_cloud(_SelectedAction, bpy.types.Operator):
    """Remove outliers and low-confidence points from the selected point cloud"""

    bl_idname = "stereomesh.clean_cloud"
    bl_label = "Clean Selected Point Cloud"
    action = "clean_cloud"
    sections = ("cloud",)
    suffix = "cleaned"

    def prepare(self, context, folder):
        return self.source(context, folder, "cloud")

    def finish(self, context, result):
        obj = self.bring_in(context, result["files"]["cloud"], points=True)
        counts = result["figures"].get("filter_cloud", {}).get("points", {})
        steps, last = [], counts.get("input")
        for key, value in counts.items():
            if key != "input" and last is not None and value < last:
                steps.append(f"{last - value} by {key.removeprefix('after_').replace('_', ' ')}")
            last = value
        removed = ", ".join(steps) or "none"
        return (f"{obj.name}: {len(obj.data.vertices)} of {counts.get('input', '?')} points "
                f"kept; removed: {removed}")


class STEREOMESH_OT_surface_from_cloud(_SelectedAction, bpy.types.Operator):
    """Surface from the selected point cloud: a depth grid where the points keep their
    pixels, else screened Poisson"""

    bl_idname = "stereomesh.surface_from_cloud"
    bl_label = "Surface from Selected Point Cloud"
    action = "surface_from_cloud"
    sections = ("surface", "repair")
    suffix = "surface"

    def inputs(self):
        return ("repair",)

    def prepare(self, context, folder):
        args = self.source(context, folder, "cloud")
        args["repair"] = bool(self.repair)
        return args

    def finish(self, context, result):
        obj = self.bring_in(context, result["files"]["mesh"], points=False)
        method = result["figures"].get("surface", {}).get("method", "")
        return f"{obj.name}: {method} surface, {len(obj.data.polygons)} faces"


class STEREOMESH_OT_fill_holes(_SelectedAction, bpy.types.Operator):
    """Close the small holes of the selected mesh (never larger gaps) and tidy it"""

    bl_idname = "stereomesh.fill_holes"
    bl_label = "Fill Small Holes in Selected Mesh"
    action = "fill_holes"
    sections = ("repair",)
    needs_faces = True
    suffix = "holes filled"

    def prepare(self, context, folder):
        return self.source(context, folder, "mesh")

    def finish(self, context, result):
        obj = self.bring_in(context, result["files"]["mesh"], points=False)
        figs = result["figures"].get("repair", {})
        return (f"{obj.name}: {len(obj.data.polygons)} faces, {figs.get('holes_filled', 0)} "
                f"holes filled ({figs.get('filled_vertices', 0)} vertices flagged 'filled')")


def _with_schema(cls, extra: dict | None = None):
    """Give an operator class the schema properties of its sections (and its own)."""
    ann = dict(extra or {})
    ann.update(properties.annotations(cls.sections))
    cls.__annotations__ = {**cls.__dict__.get("__annotations__", {}), **ann}
    return cls


_with_schema(STEREOMESH_OT_mesh_from_pair, _pair_annotations())
_with_schema(STEREOMESH_OT_disparity, _pair_annotations())
_with_schema(STEREOMESH_OT_cloud_from_pair, {
    **_pair_annotations(),
    "clean": bpy.props.BoolProperty(name="Clean", default=True,
                                    description="apply the cloud filters (outliers, confidence, "
                                    "depth range) before bringing the cloud in"),
})
_with_schema(STEREOMESH_OT_clean_cloud)
_with_schema(STEREOMESH_OT_surface_from_cloud, {
    "repair": bpy.props.BoolProperty(name="Repair", default=True,
                                     description="remove small pieces and close small holes"),
})
_with_schema(STEREOMESH_OT_fill_holes)

PAIR_ACTIONS = (STEREOMESH_OT_mesh_from_pair, STEREOMESH_OT_disparity,
                STEREOMESH_OT_cloud_from_pair)
SELECTED_ACTIONS = (STEREOMESH_OT_clean_cloud, STEREOMESH_OT_surface_from_cloud,
                    STEREOMESH_OT_fill_holes)
classes = PAIR_ACTIONS + SELECTED_ACTIONS
