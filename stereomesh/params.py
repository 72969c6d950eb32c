"""The one parameter schema: typed dataclasses with defaults, ranges and help.

The CLI flags, the TOML config file (one table per section) and the editor
plugin's properties are all generated from these classes, so no parameter is
defined twice. Field names are unique across sections; a flag is the field
name with ``-`` for ``_``.
"""

from __future__ import annotations

import dataclasses
import math
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from stereomesh.errors import InputError

MAX_P2 = 1000
"""Largest SGM penalty: 8 paths of (cost + P2) must fit the solver's 16-bit sums."""

MAX_CENSUS_BITS = 63
"""Comparisons a census string holds (the centre pixel is not compared)."""


def param(default, help: str, *, min=None, max=None, choices=None):  # noqa: A002
    """A schema field: default, help text and optional range or choices."""
    return field(
        default=default, metadata={"help": help, "min": min, "max": max, "choices": choices}
    )


def parse_disp_range(text: str) -> tuple[int, int] | None:
    """Parse ``MIN:MAX`` (MIN inclusive, MAX exclusive; MIN may be negative) or ``auto``.

    Examples
    --------
    >>> parse_disp_range("-16:112")
    (-16, 112)
    >>> parse_disp_range("auto") is None
    True
    """
    text = str(text).strip()
    if text == "auto":
        return None
    try:
        lo, hi = (int(v) for v in text.split(":"))
    except ValueError:
        raise InputError(
            f"--disp-range {text!r}: expected MIN:MAX with integers, e.g. 0:128, or 'auto'"
        ) from None
    if hi <= lo + 2:
        raise InputError(f"--disp-range {text!r}: MAX must exceed MIN by at least 3")
    return lo, hi


class _Section:
    """Checks shared by the schema sections: ranges and choices, then cross-field rules."""

    def validate(self, source: str = "parameter") -> None:
        """Raise :class:`InputError` naming the first parameter out of its range."""
        for f in dataclasses.fields(self):
            value = getattr(self, f.name)
            meta = f.metadata
            where = f"{source}: {f.name}={value!r}"
            if meta["choices"] is not None and value not in meta["choices"]:
                raise InputError(f"{where} is not one of {list(meta['choices'])}")
            if isinstance(value, float) and math.isnan(value):
                raise InputError(f"{where} is not a number")
            if meta["min"] is not None and value < meta["min"]:
                raise InputError(f"{where} is below the minimum {meta['min']}")
            if meta["max"] is not None and value > meta["max"]:
                raise InputError(f"{where} is above the maximum {meta['max']}")
        self._cross_check(source)

    def _cross_check(self, source: str) -> None:
        """Rules between fields of one section (none by default)."""


@dataclass
class DisparityParams(_Section):
    """Matching cost, solver and refinement."""

    method: str = param("sgm", "solver: semi-global matching, loopy belief propagation or "
                        "winner-takes-all", choices=("sgm", "bp", "wta"))
    cost: str = param("census", "matching cost: census + Hamming, or absolute difference of "
                      "intensity and gradient", choices=("census", "ad_gradient"))
    census_width: int = param(7, "matching window width (census window, or the box of "
                              "ad_gradient), odd, pixels; a census window holds at most "
                              f"{MAX_CENSUS_BITS + 1} pixels", min=1, max=9)
    census_height: int = param(5, "matching window height, odd, pixels", min=1, max=9)
    disp_range: str = param(
        "auto", "disparity search range MIN:MAX (MAX exclusive) or 'auto' from sparse matches"
    )
    p1: int = param(8, "SGM penalty for a disparity step of one (cost units)", min=0, max=500)
    p2: int = param(96, "SGM penalty for larger steps (cost units)", min=1, max=MAX_P2)
    p2_gradient_scale: float = param(
        8.0, "intensity difference (grey levels) that halves P2; 0 keeps P2 fixed", min=0.0
    )
    paths: int = param(8, "number of SGM path directions", choices=(4, 8))
    bp_potential: str = param("truncated_linear", "pairwise term of belief propagation",
                              choices=("truncated_linear", "potts"))
    bp_weight: float = param(6.0, "belief propagation: cost per unit of disparity step "
                             "(or per label change for Potts), matching-cost units", min=0.0)
    bp_truncation: float = param(2.0, "belief propagation: truncation of the linear term, "
                                 "disparity steps (2: a step of one costs the weight, any "
                                 "larger jump twice it)", min=1.0)
    bp_iterations: int = param(5, "belief propagation iterations per pyramid level (the "
                               "finest level always runs them all)", min=1, max=200)
    bp_levels: int = param(4, "belief propagation coarse-to-fine levels", min=1, max=8)
    bp_tolerance: float = param(0.001, "belief propagation: a coarse level stops when fewer "
                                "than this share of labels change in an iteration",
                                min=0.0, max=1.0)
    memory_budget_mb: int = param(640, "memory the disparity solver may allocate, MB; semi-"
                                  "global matching recomputes more to stay within it, and "
                                  "images still too large are solved in overlapping strips",
                                  min=16)
    tile_overlap: int = param(32, "rows solved above and below each strip and dropped",
                              min=0, max=1024)
    subpixel: str = param("alignment", "sub-pixel refinement: a parabola or equiangular fit "
                          "of the three costs around the winner (fast), none, or alignment: "
                          "Gauss-Newton fit of a slanted window on the intensities (most "
                          "accurate on slanted surfaces, and gives a per-pixel sigma_d)",
                          choices=("parabola", "equiangular", "none", "alignment"))
    align_width: int = param(9, "alignment refinement: window width, odd, pixels",
                             min=3, max=31)
    align_height: int = param(7, "alignment refinement: window height, odd, pixels",
                              min=1, max=31)
    align_iterations: int = param(1, "alignment refinement: most Gauss-Newton steps of the "
                                  "first pass", min=1, max=20)
    align_passes: int = param(2, "alignment refinement: passes; each later one re-estimates "
                              "the window's slant from the one before and makes one step",
                              min=1, max=4)
    align_first_width: int = param(7, "alignment refinement: window width of the first "
                                   "pass when later passes follow, odd, pixels (a wider one "
                                   "is cut to align_width)", min=3, max=31)
    align_first_height: int = param(5, "alignment refinement: window height of the first "
                                    "pass when later passes follow, odd, pixels (a taller "
                                    "one is cut to align_height)", min=1, max=31)
    lr_max_diff: int = param(1, "left-right check tolerance, pixels", min=0, max=16)
    speckle_size: int = param(100, "largest blob removed as speckle, pixels; 0 disables",
                              min=0)
    speckle_range: float = param(2.0, "disparity step that separates speckle blobs, pixels",
                                 min=0.0)
    min_confidence: float = param(0.0, "reject disparities below this confidence",
                                  min=0.0, max=1.0)

    def _cross_check(self, source: str) -> None:
        parse_disp_range(self.disp_range)
        w, h = self.census_width, self.census_height
        if w % 2 == 0 or h % 2 == 0:
            raise InputError(f"{source}: census window sides must be odd, got {w}x{h}")
        if self.cost == "census" and w * h - 1 > MAX_CENSUS_BITS:
            raise InputError(
                f"{source}: a {w}x{h} census window makes {w * h - 1} comparisons, more than "
                f"the {MAX_CENSUS_BITS} a census string holds; use e.g. 9x7 or 7x9"
            )
        if self.align_width % 2 == 0 or self.align_height % 2 == 0:
            raise InputError(f"{source}: alignment window sides must be odd, got "
                             f"{self.align_width}x{self.align_height}")
        if self.align_first_width % 2 == 0 or self.align_first_height % 2 == 0:
            raise InputError(f"{source}: the first alignment pass's window sides must be odd, "
                             f"got {self.align_first_width}x{self.align_first_height}")
        if self.p1 >= self.p2:
            raise InputError(f"{source}: p1 ({self.p1}) must be below p2 ({self.p2})")


@dataclass
class CloudParams(_Section):
    """Triangulation and point-cloud filtering."""

    sigma_d: float = param(0.25, "disparity standard deviation for sigma_z, pixels, where "
                           "the sub-pixel refinement gives none per pixel (parabola, "
                           "equiangular or none)", min=0.0)
    depth_min: float = param(0.0, "nearest depth kept, metres", min=0.0)
    depth_max: float = param(0.0, "farthest depth kept, metres; 0 means no limit", min=0.0)
    cloud_min_confidence: float = param(0.05, "points below this confidence are dropped",
                                        min=0.0, max=1.0)
    outlier_neighbors: int = param(20, "neighbours for statistical outlier removal; 0 disables",
                                   min=0)
    outlier_std_ratio: float = param(2.0, "statistical outlier threshold, standard deviations",
                                     min=0.1)
    voxel_size: float = param(0.0, "voxel downsampling size, metres; 0 disables", min=0.0)

    def _cross_check(self, source: str) -> None:
        if self.depth_max > 0 and self.depth_min > self.depth_max:
            raise InputError(f"{source}: depth_min ({self.depth_min}) is beyond depth_max "
                             f"({self.depth_max}); 0 as depth_max means no far limit")


@dataclass
class SurfaceParams(_Section):
    """Surface reconstruction."""

    surface: str = param("grid", "depth-map grid mesh (open surfaces) or screened Poisson",
                         choices=("grid", "poisson"))
    max_depth_jump: float = param(0.03, "relative depth step treated as a discontinuity",
                                  min=0.0, max=1.0)
    grid_step: int = param(1, "pixel step of the grid mesh", min=1, max=16)
    poisson_depth: int = param(9, "octree depth of screened Poisson", min=5, max=12)
    density_quantile: float = param(0.02, "Poisson vertices below this density quantile are "
                                    "trimmed", min=0.0, max=0.5)
    trim_spacings: float = param(1.5, "Poisson faces farther than this many local point "
                                 "spacings from the points (small holes, as repair would "
                                 "fill them, count as points) or out of the left camera's "
                                 "view are trimmed; 0 keeps them", min=0.0, max=100.0)


@dataclass
class RepairParams(_Section):
    """Mesh repair and hole filling."""

    max_hole_edges: int = param(30, "fill holes with at most this many boundary edges; "
                                "0 disables", min=0)
    min_component_fraction: float = param(0.01, "drop components smaller than this share of "
                                          "the largest", min=0.0, max=1.0)
    smooth_iterations: int = param(0, "Taubin smoothing iterations", min=0, max=100)
    target_faces: int = param(0, "decimate to this many faces; 0 keeps all", min=0)


@dataclass
class ExportParams(_Section):
    """Outputs."""

    format: str = param("ply", "comma list of exports: meshes ply, obj, glb; clouds las, e57 "
                        "(mesh.ply and cloud.ply are always written)")

    @property
    def formats(self) -> list[str]:
        """The export names of ``format``, in order, without repeats."""
        names = [v.strip() for v in self.format.split(",") if v.strip()]
        return list(dict.fromkeys(names))

    def _cross_check(self, source: str) -> None:
        known = export_names()
        for fmt in self.formats:
            if fmt not in known:
                raise InputError(f"{source}: format {fmt!r} is not one of {', '.join(known)}")


SECTIONS: dict[str, type] = {
    "disparity": DisparityParams,
    "cloud": CloudParams,
    "surface": SurfaceParams,
    "repair": RepairParams,
    "export": ExportParams,
}


@dataclass
class Params:
    """All parameters of a run, one attribute per schema section.

    Examples
    --------
    >>> p = Params().with_overrides({"p2": 120})
    >>> p.disparity.p2
    120
    """

    disparity: DisparityParams = field(default_factory=DisparityParams)
    cloud: CloudParams = field(default_factory=CloudParams)
    surface: SurfaceParams = field(default_factory=SurfaceParams)
    repair: RepairParams = field(default_factory=RepairParams)
    export: ExportParams = field(default_factory=ExportParams)

    def to_dict(self) -> dict[str, dict[str, Any]]:
        return dataclasses.asdict(self)

    def with_overrides(self, overrides: dict[str, Any], source: str = "parameter") -> Params:
        """A copy with flat ``{field_name: value}`` overrides applied and checked."""
        sections = {name: dataclasses.replace(getattr(self, name)) for name in SECTIONS}
        owners = field_owners()
        for key, value in overrides.items():
            key = key.replace("-", "_")
            if key not in owners:
                raise InputError(f"{source}: unknown parameter {key!r}")
            setattr(sections[owners[key]], key, _coerce(owners[key], key, value, source))
        out = Params(**sections)
        out.validate(source)
        return out

    def validate(self, source: str = "parameter") -> None:
        """Raise :class:`InputError` naming the first parameter out of its range."""
        for section in SECTIONS:
            getattr(self, section).validate(source)


def export_names() -> tuple[str, ...]:
    """The ``format`` choices: the exporters' module names (without importing them)."""
    try:
        from stereomesh.io.exporters import names
    except ImportError:  # the exporter registry has not landed in this tree
        return ("ply",)
    return names()


def field_owners() -> dict[str, str]:
    """Map each field name to its section."""
    return {f.name: s for s, cls in SECTIONS.items() for f in dataclasses.fields(cls)}


def _field(section: str, name: str) -> dataclasses.Field:
    return next(f for f in dataclasses.fields(SECTIONS[section]) if f.name == name)


def _coerce(section: str, name: str, value: Any, source: str) -> Any:
    kind = _field(section, name).type
    try:
        if kind == "int":
            if isinstance(value, float) and not value.is_integer():
                raise ValueError
            return int(value)
        if kind == "float":
            return float(value)
        return str(value)
    except (TypeError, ValueError):
        raise InputError(f"{source}: {name}={value!r} is not a valid {kind}") from None


def load_config(path: str | Path, base: Params | None = None) -> Params:
    """Read a TOML config whose tables are the schema sections.

    Examples
    --------
    A config file such as::

        [disparity]
        p2 = 120
        disp_range = "0:128"

        [surface]
        surface = "poisson"
    """
    path = Path(path)
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise InputError(f"{path}: config file not found") from None
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise InputError(f"{path}: not valid TOML ({exc}); fix the file or drop --config") from None
    overrides: dict[str, Any] = {}
    for section, table in data.items():
        if section not in SECTIONS or not isinstance(table, dict):
            raise InputError(f"{path}: unknown table [{section}]; known: {', '.join(SECTIONS)}")
        owners = field_owners()
        for key, value in table.items():
            if owners.get(key) != section:
                raise InputError(f"{path}: [{section}] has no parameter {key!r}")
            overrides[key] = value
    return (base or Params()).with_overrides(overrides, source=str(path))


def preset_names() -> tuple[str, ...]:
    """The presets shipped in ``stereomesh/presets/`` (one TOML config each)."""
    folder = Path(__file__).resolve().parent / "presets"
    return tuple(sorted(p.stem for p in folder.glob("*.toml")))


def load_preset(name: str, base: Params | None = None) -> Params:
    """Parameters of a shipped preset (``facade``, ``catalogue``, ``archive``...).

    Examples
    --------
    >>> load_preset("catalogue").surface.surface
    'poisson'
    """
    if name not in preset_names():
        raise InputError(f"--preset {name!r} is not one of {', '.join(preset_names())}")
    return load_config(Path(__file__).resolve().parent / "presets" / f"{name}.toml", base)


def schema() -> list[dict[str, Any]]:
    """The schema as plain data (for the plugin's properties and the docs)."""
    rows = []
    for section, cls in SECTIONS.items():
        for f in dataclasses.fields(cls):
            rows.append(
                {
                    "section": section,
                    "name": f.name,
                    "flag": "--" + f.name.replace("_", "-"),
                    "type": f.type,
                    "default": f.default,
                    "min": f.metadata["min"],
                    "max": f.metadata["max"],
                    "choices": list(f.metadata["choices"]) if f.metadata["choices"] else None,
                    "help": f.metadata["help"],
                }
            )
    return rows


def add_cli_arguments(parser, sections: tuple[str, ...] = tuple(SECTIONS)) -> None:
    """Add one flag per schema field of ``sections`` to an argparse parser.

    Flags default to ``None`` so that only what the user typed overrides the
    config file and the schema defaults.
    """
    types = {"int": int, "float": float, "str": str}
    for row in schema():
        if row["section"] not in sections:
            continue
        parser.add_argument(
            row["flag"],
            dest=row["name"],
            type=types[row["type"]],
            default=None,
            choices=row["choices"],
            metavar=None if row["choices"] else row["name"].split("_")[-1].upper(),
            help=f"{row['help']} (default: {row['default']})",
        )


def cli_overrides(namespace, sections: tuple[str, ...] = tuple(SECTIONS)) -> dict[str, Any]:
    """The schema fields the user set on the command line."""
    owners = field_owners()
    return {
        k: v
        for k, v in vars(namespace).items()
        if k in owners and owners[k] in sections and v is not None
    }
