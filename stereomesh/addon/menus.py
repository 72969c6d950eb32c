"""Menus: one "Stereo Survey" submenu in the 3D view's Object and Add menus."""

import bpy

from . import operators


class STEREOMESH_MT_stereo(bpy.types.Menu):
    bl_idname = "STEREOMESH_MT_stereo"
    bl_label = "Stereo Survey"

    def draw(self, context):
        layout = self.layout
        layout.operator_context = "INVOKE_DEFAULT"
        for op in operators.PAIR_ACTIONS:
            layout.operator(op.bl_idname, text=op.bl_label + "…")
        layout.separator()
        for op in operators.SELECTED_ACTIONS:
            layout.operator(op.bl_idname, text=op.bl_label + "…")


def draw_entry(self, context):
    """The submenu's entry, appended to the host menus below."""
    self.layout.separator()
    self.layout.menu(STEREOMESH_MT_stereo.bl_idname)


HOST_MENUS = ("VIEW3D_MT_object", "VIEW3D_MT_add")


def register_entries() -> None:
    for name in HOST_MENUS:
        getattr(bpy.types, name).append(draw_entry)


def unregister_entries() -> None:
    for name in HOST_MENUS:
        getattr(bpy.types, name).remove(draw_entry)


classes = (STEREOMESH_MT_stereo,)
