"""Operator properties built from the core's parameter schema (``schema.json``).

The build writes ``stereomesh.params.schema()`` beside this file (and the
version it was built from in ``build.json``), so the add-on
knows every parameter (type, default, range, choices, help) without importing
the core. Operator properties keep the last values used in a session, as the
editor does for every operator.
"""

from __future__ import annotations

import json
from functools import cache
from pathlib import Path

import bpy

SCHEMA_FILE = Path(__file__).with_name("schema.json")


@cache
def schema() -> list[dict]:
    """The rows of the bundled schema (one per parameter)."""
    try:
        return json.loads(SCHEMA_FILE.read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise RuntimeError(f"{SCHEMA_FILE} is missing or broken ({exc}); rebuild the add-on "
                           "with 'make plugin'") from None


def build_version() -> str:
    """The stereomesh version the add-on was built from (``build.json`` beside it)."""
    try:
        data = json.loads(SCHEMA_FILE.with_name("build.json").read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return "unknown"
    return str(data.get("version", "unknown"))


def rows(sections: tuple[str, ...]) -> list[dict]:
    """Schema rows of the given sections, in schema order."""
    return [r for r in schema() if r["section"] in sections]


def _label(name: str) -> str:
    return name.replace("_", " ").capitalize()


def prop_for(row: dict):
    """The ``bpy.props`` definition of one schema row."""
    help_text = row["help"]
    kw = {"name": _label(row["name"]), "description": help_text}
    if row["choices"]:
        items = [(str(c), str(c), f"{help_text}: {c}") for c in row["choices"]]
        return bpy.props.EnumProperty(items=items, default=str(row["default"]), **kw)
    if row["type"] == "int":
        for key in ("min", "max"):
            if row[key] is not None:
                kw[key] = int(row[key])
        return bpy.props.IntProperty(default=int(row["default"]), **kw)
    if row["type"] == "float":
        for key in ("min", "max"):
            if row[key] is not None:
                kw[key] = float(row[key])
        default = float(row["default"])
        # Enough digits to show the default (0.001 would read 0.00 at two).
        digits = max(3, len(repr(default).split(".")[-1])) if default else 3
        return bpy.props.FloatProperty(default=default, precision=min(digits, 6), **kw)
    return bpy.props.StringProperty(default=str(row["default"]), **kw)


def annotations(sections: tuple[str, ...]) -> dict:
    """``__annotations__`` entries for an operator over these schema sections."""
    return {r["name"]: prop_for(r) for r in rows(sections)}


def values(operator, sections: tuple[str, ...]) -> dict:
    """The operator's schema values as flat overrides for the worker.

    Only values that differ from the schema's defaults are sent, so the
    worker's defaults (one definition, in the core) apply to the rest.
    """
    out = {}
    for r in rows(sections):
        value = getattr(operator, r["name"])
        if r["choices"] and r["type"] == "int":
            value = int(value)
        if value != r["default"]:
            out[r["name"]] = value
    return out


def draw(layout, operator, sections: tuple[str, ...]) -> None:
    """Draw the properties grouped by section."""
    for section in sections:
        box = layout.box()
        box.label(text=section.replace("_", " ").capitalize())
        col = box.column(align=True)
        for r in rows((section,)):
            col.prop(operator, r["name"])
