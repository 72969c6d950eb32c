"""Checks run inside the editor's Python module (bpy), headless; driven by test_plugin.py.

Usage: ``BPY_PYTHON tests/blender_session.py ZIP CORE_PYTHON DEMO_DIR RESULT_JSON``.
Installs the built extension zip, runs every menu action on the demo pair through
a real worker started with CORE_PYTHON, and writes one record per check
(``{"ok": bool, "detail": ...}``) to RESULT_JSON. Nothing of bpy is mocked.
"""

import json
import os
import signal
import sys
import threading
import time
import traceback

import bpy
import numpy as np

# Importing bpy puts the editor's own modules (bmesh, bpy_extras) on the path.
bmesh = __import__("bmesh")
world_to_camera_view = __import__("bpy_extras.object_utils",
                                  fromlist=["world_to_camera_view"]).world_to_camera_view

ZIP, CORE_PYTHON, DEMO, RESULT = sys.argv[1:5]
MODULE = "bl_ext.user_default.stereomesh"
RANGE = "64:192"  # the demo's disparities lie in [72.6, 128.4] px (demo_data/README.md)
checks: dict = {}


def check(name):
    def wrap(fn):
        t = time.perf_counter()
        try:
            detail = fn()
            checks[name] = {"ok": True, "detail": detail}
        except Exception as exc:
            checks[name] = {"ok": False, "detail": f"{type(exc).__name__}: {exc}",
                            "trace": traceback.format_exc()}
        checks[name]["seconds"] = round(time.perf_counter() - t, 2)
        with open(RESULT, "w") as fh:  # written after every check: a crash keeps the rest
            json.dump(checks, fh, indent=1)
        return fn

    return wrap


def mesh_objects():
    return {o.name for o in bpy.data.objects if o.type == "MESH"}


def new_meshes(before):
    return [bpy.data.objects[n] for n in sorted(mesh_objects() - before)]


def attr(obj, name, dtype):
    a = obj.data.attributes[name]
    out = np.empty(len(a.data), dtype)
    a.data.foreach_get("value", out)
    return out


def world_coords(obj):
    n = len(obj.data.vertices)
    co = np.empty(n * 3, np.float32)
    obj.data.vertices.foreach_get("co", co)
    mw = np.array(obj.matrix_world)
    return co.reshape(n, 3) @ mw[:3, :3].T + mw[:3, 3]


def project(cam, points, w, h):
    """Pixel coordinates (OpenCV convention, centres at integers) through the camera."""
    from mathutils import Vector

    scene = bpy.context.scene
    out = np.empty((len(points), 2))
    for i, p in enumerate(points):
        v = world_to_camera_view(scene, cam, Vector(p))
        out[i] = v.x * w - 0.5, (1.0 - v.y) * h - 0.5
    return out


pair = {"left": f"{DEMO}/left.png", "right": f"{DEMO}/right.png", "calib": f"{DEMO}/calib.json"}
state: dict = {}


@check("install")
def _install():
    bpy.ops.extensions.package_install_files(filepath=ZIP, repo="user_default",
                                             enable_on_install=True)
    assert MODULE in bpy.context.preferences.addons, "extension not enabled after install"
    assert MODULE in sys.modules
    ops = sorted(dir(bpy.ops.stereomesh))
    return {"operators": ops}


@check("heavy_imports")
def _imports():
    # The add-on must not load the core (nor anything of it) into the editor.
    loaded = [m for m in sys.modules if m == "stereomesh" or m.startswith("stereomesh.")]
    assert not loaded, loaded
    return "no core module loaded"


@check("menus")
def _menus():
    menus = sys.modules[MODULE + ".menus"]
    found = {}
    for host in ("VIEW3D_MT_object", "VIEW3D_MT_add"):
        funcs = getattr(bpy.types, host).draw._draw_funcs
        found[host] = any(getattr(f, "__module__", "").startswith(MODULE) for f in funcs)
    assert all(found.values()), found

    class Recorder:
        """Collects what a menu's draw puts into its layout."""

        def __init__(self):
            self.entries, self.operator_context = [], None

        def operator(self, idname, text=""):
            self.entries.append((idname, text))

        def separator(self):
            pass

    rec = Recorder()
    menu = type("M", (), {"layout": rec})()
    menus.STEREOMESH_MT_stereo.draw(menu, bpy.context)
    for idname, _ in rec.entries:
        family, name = idname.split(".")
        assert hasattr(getattr(bpy.ops, family), name), idname
        assert getattr(getattr(bpy.ops, family), name).get_rna_type() is not None
    return {"hosts": found, "entries": rec.entries}


@check("schema_properties")
def _schema():
    props = bpy.ops.stereomesh.mesh_from_pair.get_rna_type().properties
    rows = json.load(open(os.path.join(os.path.dirname(sys.modules[MODULE].__file__),
                                       "schema.json")))
    p2 = props["p2"]
    row = next(r for r in rows if r["name"] == "p2")
    assert (p2.default, p2.hard_min, p2.hard_max) == (row["default"], row["min"], row["max"])
    assert p2.description == row["help"]
    method = props["method"]
    choices = [str(c) for c in next(r for r in rows if r["name"] == "method")["choices"]]
    assert [i.identifier for i in method.enum_items] == choices
    names = {r["name"] for r in rows if r["section"] != "export"}
    missing = names - set(props.keys())
    assert not missing, missing
    return {"properties": len(names)}


@check("python_detection")
def _detect():
    prefs = sys.modules[MODULE + ".preferences"]
    p = bpy.context.preferences.addons[MODULE].preferences
    p.python_path = "/nonexistent/python3"
    try:
        bpy.ops.stereomesh.clean_cloud.poll()  # harmless, shows the operator is there
        prefs.find_python()
        raise AssertionError("a missing interpreter was accepted")
    except prefs.client.WorkerError as exc:
        message = str(exc)
    assert "/nonexistent/python3" in message
    p.python_path = ""
    # Nothing to find: no variable, an empty PATH, no engine environment yet.
    os.environ.pop("STEREOMESH_PYTHON", None)
    saved_path, os.environ["PATH"] = os.environ.get("PATH", ""), os.path.dirname(RESULT)
    try:
        prefs.find_python()
        raise AssertionError("an interpreter was found on an empty PATH")
    except prefs.client.WorkerError as exc:
        none_found = str(exc)
    finally:
        os.environ["PATH"] = saved_path
    assert "Set Up Engine" in none_found, none_found
    os.environ["STEREOMESH_PYTHON"] = CORE_PYTHON
    found = prefs.find_python()
    assert os.path.samefile(found, CORE_PYTHON), found
    assert os.path.samefile(p.python_path, CORE_PYTHON)
    return {"missing": message, "none_found": none_found, "found": found}


@check("engine_setup_refuses_a_wrong_wheel")
def _setup():
    try:
        bpy.ops.stereomesh.setup_engine(wheel=pair["calib"])
        raise AssertionError("a JSON file was taken for a wheel")
    except RuntimeError as exc:
        message = str(exc)
    assert ".whl" in message and "calib.json" in message, message
    return message


@check("mesh_from_pair")
def _mesh():
    before = mesh_objects()
    t = time.perf_counter()
    result = bpy.ops.stereomesh.mesh_from_pair(**pair, disp_range=RANGE)
    seconds = time.perf_counter() - t
    assert result == {"FINISHED"}, result
    new = new_meshes(before)
    assert len(new) == 1, [o.name for o in new]
    obj = new[0]
    mesh = obj.data
    assert len(mesh.vertices) > 100_000 and len(mesh.polygons) > 100_000
    assert mesh.color_attributes.active_color is not None
    assert mesh.color_attributes.active_color.name == "Col"
    for name in ("confidence", "sigma_z", "filled"):
        assert name in mesh.attributes, name
    conf = attr(obj, "confidence", np.float32)
    assert 0.0 <= conf.min() and conf.max() <= 1.0
    co = world_coords(obj)
    # Bounds of the demo's true surface (demo_data/gt_mesh.ply, OpenCV frame x, y, z:
    # x [-1.60, 1.60], y [-1.20, 1.31], z [2.18, 3.86]) in the editor's frame (x, z, -y).
    lo, hi = co.min(0), co.max(0)
    assert -1.75 < lo[0] and hi[0] < 1.75, (lo, hi)
    assert 2.0 < lo[1] and hi[1] < 4.1, (lo, hi)
    assert -1.45 < lo[2] and hi[2] < 1.35, (lo, hi)
    cams = [o for o in bpy.data.objects if o.type == "CAMERA" and "stereomesh_rig" in o]
    assert len(cams) == 1
    state["mesh"], state["camera"] = obj.name, cams[0].name
    hello = sys.modules[MODULE + ".client"].current_client().hello
    assert hello["version"] == sys.modules[MODULE + ".properties"].build_version(), hello
    return {"object": obj.name, "vertices": len(mesh.vertices), "faces": len(mesh.polygons),
            "seconds": round(seconds, 2), "bounds": [lo.tolist(), hi.tolist()]}


@check("camera")
def _camera():
    cam = bpy.data.objects[state["camera"]]
    # The rectified calibration in demo_data/calib.json: f = 700 px, 640 x 480.
    assert abs(cam.data.lens - 700.0 * 36.0 / 640.0) < 1e-4, cam.data.lens
    assert bpy.context.scene.camera == cam
    r = bpy.context.scene.render
    assert (r.resolution_x, r.resolution_y) == (640, 480)
    return {"lens_mm": cam.data.lens, "sensor_mm": cam.data.sensor_width}


@check("mesh_projects_onto_its_pixels")
def _mesh_projection():
    # Grid-mesh vertices come from left-image pixels and take their colour: a vertex
    # projected through the camera lands within 1 px of a pixel of its own colour.
    obj, cam = bpy.data.objects[state["mesh"]], bpy.data.objects[state["camera"]]
    left = bpy.data.images.load(pair["left"])
    w, h = left.size
    pixels = np.array(left.pixels[:], np.float32).reshape(h, w, left.channels)[::-1, :, :3]
    image = np.round(pixels * 255).astype(int)  # rows from the top, sRGB bytes
    col = obj.data.color_attributes["Col"]
    rgba = np.empty(len(col.data) * 4, np.float32)
    col.data.foreach_get("color_srgb", rgba)
    colours = np.round(rgba.reshape(-1, 4)[:, :3] * 255).astype(int)
    keep = np.flatnonzero(attr(obj, "filled", np.int32) == 0)
    sample = keep[np.random.default_rng(0).choice(len(keep), 2000, replace=False)]
    uv = project(cam, world_coords(obj)[sample], w, h)
    u, v = np.round(uv[:, 0]).astype(int), np.round(uv[:, 1]).astype(int)
    near_integer = np.abs(uv - np.round(uv)).max()
    best = np.full(len(sample), 999)
    for du in (-1, 0, 1):
        for dv in (-1, 0, 1):
            uu, vv = np.clip(u + du, 0, w - 1), np.clip(v + dv, 0, h - 1)
            best = np.minimum(best, np.abs(image[vv, uu] - colours[sample]).max(1))
    match = float(np.mean(best <= 1))
    assert match > 0.99, match
    return {"sampled": len(sample), "colour_match": match, "offgrid_px": float(near_integer)}


@check("disparity")
def _disparity():
    before = set(bpy.data.images.keys())
    assert bpy.ops.stereomesh.disparity(**pair, disp_range=RANGE) == {"FINISHED"}
    new = sorted(set(bpy.data.images.keys()) - before)
    assert len(new) == 3, new
    for name in new:
        img = bpy.data.images[name]
        assert tuple(img.size) == (640, 480), (name, tuple(img.size))
        assert img.packed_file is not None, name
    disp = next(bpy.data.images[n] for n in new if n.endswith("disparity"))
    values = np.array(disp.pixels[:], np.float32).reshape(480, 640, -1)[:, :, 0]
    valid = float(np.mean(values > 0))
    assert valid > 0.6, valid
    return {"images": new, "matched_share": valid}


@check("cloud_from_pair")
def _cloud():
    before = mesh_objects()
    assert bpy.ops.stereomesh.cloud_from_pair(**pair, disp_range=RANGE,
                                              clean=False) == {"FINISHED"}
    new = new_meshes(before)
    assert len(new) == 1
    obj = new[0]
    assert len(obj.data.polygons) == 0 and len(obj.data.vertices) > 150_000
    assert obj.data.color_attributes.active_color is not None
    for name in ("confidence", "sigma_z", "pixel_col", "pixel_row"):
        assert name in obj.data.attributes, name
    # Drawn as points by a geometry-nodes modifier; the data stays plain vertices.
    assert [m.type for m in obj.modifiers] == ["NODES"], list(obj.modifiers)
    nodes = {n.bl_idname for n in obj.modifiers[0].node_group.nodes}
    assert "GeometryNodeMeshToPoints" in nodes, nodes
    state["cloud"] = obj.name
    return {"object": obj.name, "points": len(obj.data.vertices)}


@check("cloud_projects_onto_its_pixels")
def _cloud_projection():
    obj, cam = bpy.data.objects[state["cloud"]], bpy.data.objects[state["camera"]]
    n = len(obj.data.vertices)
    sample = np.random.default_rng(1).choice(n, 3000, replace=False)
    uv = project(cam, world_coords(obj)[sample], 640, 480)
    pix = np.stack([attr(obj, "pixel_col", np.int32), attr(obj, "pixel_row", np.int32)], 1)
    err = np.abs(uv - pix[sample]).max()
    assert err < 1.0, err
    return {"sampled": len(sample), "max_error_px": float(err)}


@check("edit_then_clean")
def _edit_clean():
    obj = bpy.data.objects[state["cloud"]]
    bpy.context.view_layer.objects.active = obj
    cols = attr(obj, "pixel_col", np.int32)
    bm = bmesh.new()
    bm.from_mesh(obj.data)
    bm.verts.ensure_lookup_table()
    bmesh.ops.delete(bm, geom=[bm.verts[i] for i in np.flatnonzero(cols < 320)],
                     context="VERTS")
    bm.to_mesh(obj.data)
    bm.free()
    left_over = len(obj.data.vertices)
    assert left_over < 0.6 * len(cols)
    before = mesh_objects()
    assert bpy.ops.stereomesh.clean_cloud() == {"FINISHED"}
    new = new_meshes(before)
    assert len(new) == 1
    cleaned = new[0]
    kept = len(cleaned.data.vertices)
    assert 0.5 * left_over < kept <= left_over, (kept, left_over)
    assert attr(cleaned, "pixel_col", np.int32).min() >= 320
    state["cleaned"] = cleaned.name
    return {"points_before_edit": len(cols), "after_edit": left_over, "after_clean": kept}


@check("surface_from_cloud")
def _surface():
    cleaned = bpy.data.objects[state["cleaned"]]
    bpy.context.view_layer.objects.active = cleaned
    before = mesh_objects()
    assert bpy.ops.stereomesh.surface_from_cloud() == {"FINISHED"}
    new = new_meshes(before)
    assert len(new) == 1
    surf = new[0]
    assert len(surf.data.polygons) > 50_000
    assert surf.data.color_attributes.active_color is not None
    # Only the right half of the image was left: x >= (320 - cx) * z / f > 0.
    assert world_coords(surf)[:, 0].min() > -0.01
    state["surface"] = surf.name
    return {"object": surf.name, "faces": len(surf.data.polygons)}


@check("fill_holes")
def _fill():
    surf = bpy.data.objects[state["surface"]]
    # Punch a small hole: remove the faces around one vertex in the middle.
    bpy.context.view_layer.objects.active = surf
    bm = bmesh.new()
    bm.from_mesh(surf.data)
    bm.verts.ensure_lookup_table()
    centre = np.median(world_coords(surf), axis=0)
    idx = int(np.argmin(np.linalg.norm(world_coords(surf) - centre, axis=1)))
    faces = list(bm.verts[idx].link_faces)
    bmesh.ops.delete(bm, geom=faces, context="FACES_ONLY")
    bm.to_mesh(surf.data)
    bm.free()
    flagged_before = int(attr(surf, "filled", np.int32).sum())
    before = mesh_objects()
    assert bpy.ops.stereomesh.fill_holes() == {"FINISHED"}
    new = new_meshes(before)
    assert len(new) == 1
    flagged = int(attr(new[0], "filled", np.int32).sum())
    assert flagged > flagged_before, "the punched hole was not closed"
    return {"faces": len(new[0].data.polygons), "filled_before": flagged_before,
            "filled_after": flagged, "faces_removed": len(faces)}


@check("bad_input")
def _bad_input():
    messages = []
    for kwargs in ({**pair, "left": "/nonexistent/left.png"},
                   {**pair, "disp_range": "wide"}):
        try:
            bpy.ops.stereomesh.mesh_from_pair(**kwargs)
            raise AssertionError(f"accepted {kwargs}")
        except RuntimeError as exc:
            messages.append(str(exc))
    assert "/nonexistent/left.png" in messages[0], messages
    assert "wide" in messages[1] and "MIN:MAX" in messages[1], messages
    return messages


@check("worker_killed")
def _killed():
    client = sys.modules[MODULE + ".client"]
    first = client.current_client()
    pid = first.pid

    def kill_when_busy():
        t_end = time.monotonic() + 60
        while time.monotonic() < t_end:
            if first.busy() is not None:
                # Soon after the request starts: the whole action takes a few
                # seconds, and the faster the pipeline gets the less room a late kill has.
                time.sleep(0.2)
                os.kill(pid, signal.SIGKILL)
                return
            time.sleep(0.05)

    threading.Thread(target=kill_when_busy, daemon=True).start()
    before = mesh_objects()
    try:
        bpy.ops.stereomesh.mesh_from_pair(**pair, disp_range=RANGE)
        raise AssertionError("the action succeeded although its worker was killed")
    except RuntimeError as exc:
        message = str(exc)
    assert "stopped unexpectedly" in message, message
    assert mesh_objects() == before
    obj = bpy.data.objects[state["cleaned"]]
    for o in bpy.context.view_layer.objects:
        o.select_set(False)
    bpy.context.view_layer.objects.active = obj
    before = mesh_objects()
    assert bpy.ops.stereomesh.clean_cloud() == {"FINISHED"}
    assert len(new_meshes(before)) == 1
    second = client.current_client()
    assert second.pid != pid and second.alive()
    return {"message": message, "old_pid": pid, "new_pid": second.pid}


@check("engine_setup")
def _engine_setup():
    p = bpy.context.preferences.addons[MODULE].preferences
    before = p.python_path
    t = time.perf_counter()
    assert bpy.ops.stereomesh.setup_engine(wheel=os.environ["STEREOMESH_TEST_WHEEL"]) \
        == {"FINISHED"}
    python = p.python_path
    assert python != before and os.path.isfile(python), python
    # The environment is the add-on's own, under the extension's user folder.
    assert python.startswith(os.environ["BLENDER_USER_RESOURCES"]), python
    p.python_path = before
    return {"python": python, "seconds": round(time.perf_counter() - t, 1)}


@check("unregister")
def _unregister():
    client = sys.modules[MODULE + ".client"]
    worker = client.get_client(CORE_PYTHON)  # running (the set-up stopped the last one)
    assert worker.alive()
    bpy.ops.preferences.addon_disable(module=MODULE)
    assert not hasattr(bpy.types, "STEREOMESH_MT_stereo")
    assert worker.proc.wait(10) is not None, "the worker outlived the add-on"
    return "disabled; worker stopped"


print(json.dumps({k: v["ok"] for k, v in checks.items()}))
