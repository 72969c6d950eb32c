"""The pairs of a batch: found in a folder by their names, or listed in a CSV manifest.

Folder naming rules (case-insensitive, any image extension :data:`IMAGE_SUFFIXES`):

- ``NAME_L.ext`` + ``NAME_R.ext``, ``NAME-L`` / ``NAME-R``, ``NAME_left`` / ``NAME_right``
  and ``NAME-left`` / ``NAME-right``: a pair of two files called ``NAME``;
- ``NAME.mpo``: one stereo camera file (first frame left);
- with ``side_by_side=True`` every other image file ``NAME.ext`` is one scanned card.

Files whose extension is not an image's (notes, calibrations, a manifest) are
ignored; hidden files too. A file that looks like one view but has no partner,
or two inputs that make the same name, stop the batch before anything runs.

CSV manifest columns (the design fixes the first five): ``name,left,right,calib,layout``;
``right``, ``calib`` and ``layout`` may be empty or absent (one file of an MPO or a
side-by-side scan; the shared ``--calib``; the layout told from the files); an
optional ``swap`` column (``1``/``true``/``yes``); ``meta.*`` columns are carried
unchanged into the pair's report and the summary; every other column is a
parameter override by its schema name (empty cells keep the batch's value).
Relative paths are taken from the manifest's folder.
"""

from __future__ import annotations

import csv
import re
from dataclasses import dataclass, field
from pathlib import Path

from stereomesh.errors import InputError

IMAGE_SUFFIXES = (".png", ".jpg", ".jpeg", ".tif", ".tiff", ".bmp", ".pgm", ".ppm", ".webp")
"""Extensions taken as images when looking through a folder."""

MANIFEST_COLUMNS = ("name", "left", "right", "calib", "layout")
"""The fixed columns of a batch manifest (design)."""

RESERVED_NAMES = ("_batch",)
"""Names a pair cannot take: the batch keeps its own files there."""

_VIEW = re.compile(r"^(?P<name>.+?)[_-](?P<view>l|r|left|right)$", re.IGNORECASE)
_SAFE_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._ +-]*$")


@dataclass
class PairSpec:
    """One pair of a batch: where its views are and how to read them.

    Attributes
    ----------
    name : str
        The pair's output folder name under the batch's ``--out``.
    inputs : list of Path
        Two image files, or one MPO file or side-by-side scan.
    calib : Path or None
        The pair's calibration (None: the pair rectifies itself).
    layout : str
        A key of :data:`stereomesh.io.inputs.READERS`.
    swap : bool
        The first view is the right one.
    overrides : dict
        Parameter overrides by schema name (strings as the manifest holds them).
    meta : dict
        ``meta.*`` columns, carried unchanged into the report and the summary.

    Examples
    --------
    >>> spec = PairSpec("door", [Path("door_L.png"), Path("door_R.png")])
    >>> spec.layout, spec.calib
    ('pair', None)
    """

    name: str
    inputs: list[Path]
    calib: Path | None = None
    layout: str = "pair"
    swap: bool = False
    overrides: dict = field(default_factory=dict)
    meta: dict = field(default_factory=dict)

    def to_dict(self) -> dict:
        return {"name": self.name, "inputs": [str(p) for p in self.inputs],
                "calib": None if self.calib is None else str(self.calib),
                "layout": self.layout, "swap": self.swap, "overrides": dict(self.overrides),
                "meta": dict(self.meta)}

    @classmethod
    def from_dict(cls, data: dict) -> PairSpec:
        return cls(data["name"], [Path(p) for p in data["inputs"]],
                   None if data["calib"] is None else Path(data["calib"]), data["layout"],
                   data["swap"], dict(data["overrides"]), dict(data["meta"]))


def check_name(name: str, where: str) -> str:
    """``name`` if it can be a folder name of its own, else :class:`InputError`."""
    if not _SAFE_NAME.match(name) or name in RESERVED_NAMES or name.endswith((".", " ")):
        raise InputError(f"{where}: the pair name {name!r} cannot be an output folder name "
                         "(use letters, digits, '.', '_', '-', '+' and spaces, starting with "
                         f"a letter or digit, not {', '.join(RESERVED_NAMES)}); rename it")
    return name


def _check_readable(path: Path, where: str) -> None:
    if not path.is_file():
        raise InputError(f"{where}: {path} is not a file; check the path")
    try:
        with open(path, "rb") as fh:
            fh.read(1)
    except OSError as exc:
        raise InputError(f"{where}: {path} cannot be read ({exc.strerror}); "
                         "check its permissions") from None


def discover_folder(folder: str | Path, *, calib: str | Path | None = None,
                    side_by_side: bool = False, swap: bool = False) -> list[PairSpec]:
    """The pairs of a folder by the naming rules of this module.

    Parameters
    ----------
    folder : str or Path
        Looked through without descending into sub-folders.
    calib : str or Path, optional
        The shared calibration of every pair.
    side_by_side : bool
        Image files that are not named as one view of a pair are side-by-side scans.
    swap : bool
        Every pair's first view is the right one.

    Returns
    -------
    list of PairSpec
        Sorted by name.

    Raises
    ------
    InputError
        An empty folder, a view without its partner, two inputs of one name, an
        unreadable file.

    Examples
    --------
    >>> import tempfile
    >>> d = Path(tempfile.mkdtemp())
    >>> for f in ("a_L.png", "a_R.png", "b-left.jpg", "b-right.jpg", "notes.txt"):
    ...     _ = (d / f).write_bytes(b"x")
    >>> [(s.name, [p.name for p in s.inputs]) for s in discover_folder(d)]
    [('a', ['a_L.png', 'a_R.png']), ('b', ['b-left.jpg', 'b-right.jpg'])]
    """
    folder = Path(folder)
    if not folder.is_dir():
        raise InputError(f"{folder}: not a folder or a .csv manifest; check SOURCE")
    views: dict[str, dict[str, list[Path]]] = {}
    singles: dict[str, list[Path]] = {}
    for path in sorted(folder.iterdir()):
        if path.name.startswith(".") or not path.is_file():
            continue
        suffix = path.suffix.lower()
        if suffix == ".mpo":
            singles.setdefault(path.stem, []).append(path)
            continue
        if suffix not in IMAGE_SUFFIXES:
            continue
        m = _VIEW.match(path.stem)
        if m:
            side = m["view"].lower()[0]
            views.setdefault(m["name"], {"l": [], "r": []})[side].append(path)
        elif side_by_side:
            singles.setdefault(path.stem, []).append(path)
        else:
            raise InputError(f"{path}: not named as one view of a pair (NAME_L/NAME_R, "
                             "NAME-left/NAME-right) nor an .mpo file; rename it, move it "
                             "out of the folder, or give --side-by-side if it is a scanned card")
    specs: list[PairSpec] = []
    for name, sides in views.items():
        for side, other in (("l", "r"), ("r", "l")):
            if not sides[other]:
                lone = sides[side][0]
                raise InputError(f"{lone}: its {'right' if other == 'r' else 'left'} view is "
                                 f"missing (expected e.g. {name}_{other.upper()}"
                                 f"{lone.suffix}); add it or move {lone.name} out of the folder")
            if len(sides[side]) > 1:
                raise InputError(f"{folder}: pair {name!r} has several "
                                 f"{'left' if side == 'l' else 'right'} views "
                                 f"({', '.join(p.name for p in sides[side])}); keep one")
        specs.append(PairSpec(name, [sides["l"][0], sides["r"][0]], swap=swap))
    for name, paths in singles.items():
        layout = "mpo" if paths[0].suffix.lower() == ".mpo" else "side-by-side"
        specs.append(PairSpec(name, paths[:1], layout=layout, swap=swap))
        if len(paths) > 1 or name in views:
            others = [*paths, *(p for s in views.get(name, {}).values() for p in s)]
            raise InputError(f"{folder}: several inputs make the pair name {name!r} "
                             f"({', '.join(sorted(p.name for p in others))}); rename one")
    if not specs:
        raise InputError(f"{folder}: no stereo pairs found (expected NAME_L/NAME_R or "
                         "NAME-left/NAME-right image files, or .mpo files); check SOURCE")
    shared = None if calib is None else Path(calib)
    for spec in specs:
        check_name(spec.name, str(folder))
        spec.calib = shared
        for path in spec.inputs:
            _check_readable(path, str(folder))
    return sorted(specs, key=lambda s: s.name)


def _truthy(text: str, where: str) -> bool:
    value = text.strip().lower()
    if value in ("", "0", "false", "no"):
        return False
    if value in ("1", "true", "yes"):
        return True
    raise InputError(f"{where}: swap must be 1/true/yes or 0/false/no, got {text!r}")


def read_manifest(path: str | Path, *, calib: str | Path | None = None) -> list[PairSpec]:
    """The pairs a CSV manifest lists (columns in the module docstring).

    Parameters
    ----------
    path : str or Path
        The manifest; relative paths in it are taken from its folder.
    calib : str or Path, optional
        The calibration of rows whose ``calib`` cell is empty.

    Returns
    -------
    list of PairSpec
        In the manifest's order.

    Raises
    ------
    InputError
        A missing column, an unknown one, a duplicate or unsafe name, a missing
        or unreadable file, a non-image input, no rows.

    Examples
    --------
    >>> import tempfile
    >>> d = Path(tempfile.mkdtemp())
    >>> for f in ("l.png", "r.png"):
    ...     _ = (d / f).write_bytes(b"x")
    >>> _ = (d / "m.csv").write_text("name,left,right,calib,layout,p2,meta.box\\n"
    ...                              "door,l.png,r.png,,,120,B-17\\n")
    >>> s = read_manifest(d / "m.csv")[0]
    >>> s.name, s.overrides, s.meta
    ('door', {'p2': '120'}, {'meta.box': 'B-17'})
    """
    from stereomesh.params import field_owners

    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8-sig")
    except FileNotFoundError:
        raise InputError(f"{path}: manifest not found; check SOURCE") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"{path}: the manifest cannot be read as UTF-8 text ({exc}); "
                         "save it as CSV (UTF-8)") from None
    rows = list(csv.DictReader(text.splitlines()))
    header = [h.strip() for h in (csv.DictReader(text.splitlines()).fieldnames or [])]
    for column in ("name", "left"):
        if column not in header:
            raise InputError(f"{path}: the manifest has no {column!r} column; its first line "
                             f"must name the columns ({','.join(MANIFEST_COLUMNS)}, ...)")
    owners = field_owners()
    for column in header:
        if column not in (*MANIFEST_COLUMNS, "swap") and not column.startswith("meta.") \
                and column.replace("-", "_") not in owners:
            raise InputError(f"{path}: column {column!r} is neither one of "
                             f"{','.join(MANIFEST_COLUMNS)}, swap, a meta.* column nor a "
                             "parameter name; rename or remove it")
    base = path.parent
    shared = None if calib is None else Path(calib)
    specs: list[PairSpec] = []
    seen: dict[str, int] = {}
    for line, raw in enumerate(rows, start=2):
        row = {(k or "").strip(): (v or "").strip() for k, v in raw.items() if k is not None}
        where = f"{path}, line {line}"
        if not any(row.values()):
            continue
        name = check_name(row.get("name", ""), where)
        if name in seen:
            raise InputError(f"{where}: the pair name {name!r} is also on line {seen[name]}; "
                             "names must be unique (each is an output folder)")
        seen[name] = line
        inputs = [base / row[c] for c in ("left", "right") if row.get(c)]
        if not inputs:
            raise InputError(f"{where}: no 'left' file; give the left image (or the MPO "
                             "file or scan)")
        layout = row.get("layout") or ("mpo" if len(inputs) == 1 and
                                       inputs[0].suffix.lower() == ".mpo" else "pair")
        from stereomesh.io.inputs import READERS

        if layout not in READERS:
            raise InputError(f"{where}: layout {layout!r} is not one of {', '.join(READERS)}")
        for p in inputs:
            _check_readable(p, where)
            if p.suffix.lower() not in (*IMAGE_SUFFIXES, ".mpo"):
                raise InputError(f"{where}: {p} is not an image file (extension "
                                 f"{p.suffix or 'none'}); give an image or MPO file")
        pair_calib = base / row["calib"] if row.get("calib") else shared
        if pair_calib is not None:
            _check_readable(pair_calib, where)
        overrides = {k.replace("-", "_"): v for k, v in row.items()
                     if k in header and k not in (*MANIFEST_COLUMNS, "swap")
                     and not k.startswith("meta.") and v != ""}
        meta = {k: raw.get(k) or "" for k in header if k.startswith("meta.")}
        specs.append(PairSpec(name, inputs, pair_calib, layout,
                              _truthy(row.get("swap", ""), where), overrides, meta))
    if not specs:
        raise InputError(f"{path}: the manifest lists no pairs; add a row per pair")
    return specs


def find_pairs(source: str | Path, *, calib: str | Path | None = None,
               side_by_side: bool = False, swap: bool = False) -> list[PairSpec]:
    """A folder's pairs (:func:`discover_folder`) or a manifest's (:func:`read_manifest`)."""
    source = Path(source)
    if source.suffix.lower() == ".csv" and not source.is_dir():
        specs = read_manifest(source, calib=calib)
        if swap:
            for spec in specs:
                spec.swap = True
        return specs
    if not source.exists():
        raise InputError(f"{source}: no such folder or manifest; check SOURCE")
    return discover_folder(source, calib=calib, side_by_side=side_by_side, swap=swap)
