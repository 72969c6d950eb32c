"""Scene data to and from the worker's files: frames, objects, attributes, the camera.

Frames: the core works in the left camera's OpenCV frame (x right, y down,
z forward, metres). The editor's camera looks down its local −Z with +Y up,
and its world has +Z up. The camera object is placed at the origin turned
90° about X, so it looks along world +Y with world +Z up; a core point
(x, y, z) is then at world (x, z, −y), and looking through the camera matches
the left photograph.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import bpy
import numpy as np

from . import plyio

COLOR_ATTRIBUTE = "Col"
RIG_PROPERTY = "stereomesh_rig"
CAUTION = ("Stereo geometry is an estimate; sigma_z gives each point's depth uncertainty. "
           "For structural, legal or survey use, defer to licensed surveyors.")


def cv_to_world(points: np.ndarray) -> np.ndarray:
    """(N, 3) OpenCV camera frame to the editor's world: (x, y, z) -> (x, z, −y)."""
    p = np.asarray(points, np.float64)
    return np.stack([p[:, 0], p[:, 2], -p[:, 1]], axis=1)


def world_to_cv(points: np.ndarray) -> np.ndarray:
    """Inverse of :func:`cv_to_world`: (X, Y, Z) -> (X, −Z, Y)."""
    p = np.asarray(points, np.float64)
    return np.stack([p[:, 0], -p[:, 2], p[:, 1]], axis=1)


def _link(context, obj) -> None:
    collection = getattr(context, "collection", None) or context.scene.collection
    collection.objects.link(obj)


def new_object(context, name: str, data: dict, rig: dict | None = None):
    """A mesh object from PLY arrays (core frame) with colour and the per-vertex attributes.

    Vertex-only data (a cloud) becomes a mesh without faces, which every
    editing tool of the editor can work on. Attributes: ``Col`` (byte colour,
    point domain), ``confidence`` and ``sigma_z`` (float), ``filled`` (int) and,
    for clouds from a pair, ``pixel_col``/``pixel_row`` (int, the left-image
    pixel, which lets an edited cloud still be meshed as a depth grid).
    """
    n = len(data["x"])
    verts = cv_to_world(np.stack([data["x"], data["y"], data["z"]], axis=1)).astype(np.float32)
    faces = data.get("faces", np.zeros((0, 3), np.int32))
    mesh = bpy.data.meshes.new(name)
    mesh.vertices.add(n)
    mesh.vertices.foreach_set("co", verts.ravel())
    if len(faces):
        mesh.loops.add(faces.size)
        mesh.loops.foreach_set("vertex_index", faces.astype(np.int32).ravel())
        mesh.polygons.add(len(faces))
        mesh.polygons.foreach_set("loop_start", np.arange(0, faces.size, 3, dtype=np.int32))
    mesh.update()
    if all(k in data for k in ("red", "green", "blue")):
        rgba = np.ones((n, 4), np.float32)
        rgba[:, 0], rgba[:, 1], rgba[:, 2] = data["red"], data["green"], data["blue"]
        rgba[:, :3] /= 255.0
        col = mesh.color_attributes.new(COLOR_ATTRIBUTE, "BYTE_COLOR", "POINT")
        col.data.foreach_set("color_srgb", rgba.ravel())  # the photo's sRGB values as they are
        mesh.color_attributes.active_color = col
        mesh.color_attributes.render_color_index = mesh.color_attributes.active_color_index
    for key, kind in (("confidence", "FLOAT"), ("sigma_z", "FLOAT"), ("filled", "INT"),
                      ("col", "INT"), ("row", "INT")):
        if key in data:
            attr_name = f"pixel_{key}" if key in ("col", "row") else key
            attr = mesh.attributes.new(attr_name, kind, "POINT")
            dtype = np.float32 if kind == "FLOAT" else np.int32
            attr.data.foreach_set("value", np.asarray(data[key], dtype))
    obj = bpy.data.objects.new(name, mesh)
    if rig is not None:
        obj[RIG_PROPERTY] = json.dumps(rig)
    obj["stereomesh_note"] = CAUTION
    _link(context, obj)
    return obj


def select_only(context, obj) -> None:
    for other in context.view_layer.objects:
        other.select_set(False)
    obj.select_set(True)
    context.view_layer.objects.active = obj


def import_ply(context, path: str, name: str, rig: dict | None = None):
    """Read a worker's PLY and add it to the scene as :func:`new_object`."""
    return new_object(context, name, plyio.read_ply(path), rig)


def _attribute(mesh, name: str, n: int, dtype):
    attr = mesh.attributes.get(name)
    if attr is None or attr.domain != "POINT" or len(attr.data) != n:
        return None
    out = np.empty(n, dtype)
    attr.data.foreach_get("value", out)
    return out


def _vertex_colors(mesh, n: int) -> np.ndarray | None:
    """Per-vertex sRGB bytes of the active colour attribute (corner colours averaged)."""
    col = mesh.color_attributes.active_color
    if col is None:
        return None
    values = np.empty(len(col.data) * 4, np.float32)
    col.data.foreach_get("color_srgb", values)
    values = values.reshape(-1, 4)[:, :3]
    if col.domain == "CORNER":
        index = np.empty(len(mesh.loops), np.int32)
        mesh.loops.foreach_get("vertex_index", index)
        sums = np.zeros((n, 3))
        np.add.at(sums, index, values)
        counts = np.bincount(index, minlength=n)[:, None]
        values = sums / np.maximum(counts, 1)
    return np.clip(values * 255.0 + 0.5, 0, 255).astype(np.uint8)


def export_selected(obj, path: Path, with_faces: bool) -> dict:
    """Write the object's current vertices (world positions, core frame) and attributes.

    The user may have edited, moved or deleted points in the editor: what is
    written is what the object holds now. Returns ``{"vertices": n, "faces": f}``.
    """
    if obj.mode == "EDIT":
        obj.update_from_editmode()
    mesh = obj.data
    n = len(mesh.vertices)
    co = np.empty(n * 3, np.float32)
    mesh.vertices.foreach_get("co", co)
    co = co.reshape(n, 3).astype(np.float64)
    mw = np.array(obj.matrix_world, np.float64)
    world = co @ mw[:3, :3].T + mw[:3, 3]
    cv = world_to_cv(world).astype(np.float32)
    fields = {"x": cv[:, 0], "y": cv[:, 1], "z": cv[:, 2]}
    colors = _vertex_colors(mesh, n)
    if colors is None:  # an uncoloured object: a neutral grey rather than black
        colors = np.full((n, 3), 200, np.uint8)
    fields["red"], fields["green"], fields["blue"] = colors[:, 0], colors[:, 1], colors[:, 2]
    for name, dtype in (("confidence", np.float32), ("sigma_z", np.float32)):
        values = _attribute(mesh, name, n, dtype)
        if values is None:
            values = np.ones(n, dtype) if name == "confidence" else np.zeros(n, dtype)
        fields[name] = values
    filled = _attribute(mesh, "filled", n, np.int32)
    fields["filled"] = (np.zeros(n, np.uint8) if filled is None
                        else np.clip(filled, 0, 1).astype(np.uint8))
    col, row = _attribute(mesh, "pixel_col", n, np.int32), _attribute(mesh, "pixel_row", n,
                                                                       np.int32)
    if col is not None and row is not None:
        fields["col"], fields["row"] = col, row
    faces = None
    if with_faces:
        mesh.calc_loop_triangles()
        tris = np.empty(len(mesh.loop_triangles) * 3, np.int32)
        mesh.loop_triangles.foreach_get("vertices", tris)
        faces = tris.reshape(-1, 3)
    plyio.write_ply(path, fields, faces)
    return {"vertices": n, "faces": 0 if faces is None else len(faces)}


def rig_of(obj) -> dict | None:
    """The calibration stored on an object made from a pair (None for other objects)."""
    text = obj.get(RIG_PROPERTY)
    if not text:
        return None
    try:
        return json.loads(text)
    except ValueError:
        return None


def place_camera(context, rig: dict, name: str = "Left camera"):
    """A camera object at the left camera with the calibration's focal length and centre.

    The sensor is 36 mm across the larger image side; the focal length in mm
    follows from ``focal_px``; the principal point becomes the lens shift. The
    scene's output size is set to the image size so the camera view frames
    the photograph.
    """
    w, h = (int(v) for v in rig["image_size"])
    side = max(w, h)
    cam = bpy.data.cameras.new(name)
    cam.sensor_fit = "AUTO"
    cam.sensor_width = 36.0
    cam.lens = float(rig["focal_px"]) * cam.sensor_width / side
    # OpenCV pixel centres are integers, so the image spans [-0.5, W - 0.5].
    cam.shift_x = (float(rig["cx"]) + 0.5 - w / 2.0) / side
    cam.shift_y = (h / 2.0 - float(rig["cy"]) - 0.5) / side
    cam.clip_start = 0.01
    cam.clip_end = 1000.0
    obj = bpy.data.objects.new(name, cam)
    obj.rotation_euler = (math.pi / 2.0, 0.0, 0.0)
    obj[RIG_PROPERTY] = json.dumps(rig)
    _link(context, obj)
    scene = context.scene
    scene.render.resolution_x, scene.render.resolution_y = w, h
    scene.render.resolution_percentage = 100
    scene.render.pixel_aspect_x = scene.render.pixel_aspect_y = 1.0
    scene.camera = obj  # the view through it is the photograph's
    return obj


def load_image(path: str, name: str, non_color: bool):
    """An image datablock packed into the file (the worker's temporary folder goes away)."""
    image = bpy.data.images.load(path, check_existing=False)
    image.name = name
    if non_color:  # maps of values, not photographs
        image.colorspace_settings.name = "Non-Color"
    image.pack()
    return image


def find_or_place_camera(context, rig: dict):
    """The camera of this calibration already in the scene, else a new one."""
    text = json.dumps(rig)
    for obj in context.scene.objects:
        if obj.type == "CAMERA" and obj.get(RIG_PROPERTY) == text:
            return obj
    return place_camera(context, rig)


POINTS_GROUP = "stereomesh points"
POINTS_MATERIAL = "stereomesh vertex colour"


def _points_material():
    mat = bpy.data.materials.get(POINTS_MATERIAL)
    if mat is not None:
        return mat
    mat = bpy.data.materials.new(POINTS_MATERIAL)
    mat.use_nodes = True
    nodes = mat.node_tree.nodes
    shader = next(n for n in nodes if n.type == "BSDF_PRINCIPLED")
    colour = nodes.new("ShaderNodeVertexColor")
    colour.layer_name = COLOR_ATTRIBUTE
    mat.node_tree.links.new(colour.outputs["Color"], shader.inputs["Base Color"])
    return mat


def _points_group(radius: float):
    group = bpy.data.node_groups.get(POINTS_GROUP)
    if group is not None:
        return group
    group = bpy.data.node_groups.new(POINTS_GROUP, "GeometryNodeTree")
    group.interface.new_socket("Geometry", in_out="INPUT", socket_type="NodeSocketGeometry")
    group.interface.new_socket("Geometry", in_out="OUTPUT", socket_type="NodeSocketGeometry")
    nodes, links = group.nodes, group.links
    gin, gout = nodes.new("NodeGroupInput"), nodes.new("NodeGroupOutput")
    to_points = nodes.new("GeometryNodeMeshToPoints")
    to_points.inputs["Radius"].default_value = radius
    material = nodes.new("GeometryNodeSetMaterial")
    material.inputs["Material"].default_value = _points_material()
    links.new(gin.outputs[0], to_points.inputs["Mesh"])
    links.new(to_points.outputs["Points"], material.inputs["Geometry"])
    links.new(material.outputs["Geometry"], gout.inputs[0])
    return group


def show_as_points(obj, radius: float = 0.002) -> None:
    """Draw a vertex-only mesh as coloured points (loose vertices are invisible otherwise).

    A geometry-nodes modifier only changes the display: the object's data, which
    the clean and surface actions read, stays the plain vertices.
    """
    try:
        mod = obj.modifiers.new("stereomesh points", "NODES")
        mod.node_group = _points_group(radius)
        obj.data.materials.append(_points_material())
    except (RuntimeError, KeyError, StopIteration, AttributeError, TypeError) as exc:
        print(f"stereomesh: points shown as vertices only ({exc})")
