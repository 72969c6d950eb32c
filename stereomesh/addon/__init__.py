"""stereomesh for the editor: stereo pairs to coloured, metric meshes through a worker.

The add-on is a thin client. It never imports the stereomesh core: it starts
``PYTHON -m stereomesh worker`` in the interpreter chosen in its preferences
and exchanges JSON lines and PLY/PFM/PNG files with it (see ``client.py``).
Importing it loads only the editor's modules, the standard library and the
bundled parameter schema; numpy is loaded when an action first runs.
"""

import bpy

from . import client, menus, operators, preferences

classes = (*preferences.classes, *operators.classes, *menus.classes)


def register():
    for cls in classes:
        bpy.utils.register_class(cls)
    menus.register_entries()


def unregister():
    menus.unregister_entries()
    client.shutdown()
    for cls in reversed(classes):
        bpy.utils.unregister_class(cls)
