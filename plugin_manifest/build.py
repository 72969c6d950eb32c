"""Build the editor extension zip and the core wheel beside it.

Usage: ``python plugin_manifest/build.py [--out dist]`` with an interpreter that
has stereomesh installed (the schema comes from ``stereomesh.params.schema()``).
Writes ``dist/stereomesh-<version>.zip`` (the add-on, its manifest,
``schema.json`` and ``build.json`` with the version; no core inside) and
``dist/stereomesh-<version>-py3-none-any.whl`` (``pip wheel --no-deps``), which the
add-on's "Set Up Engine" installs.
"""

from __future__ import annotations

import argparse
import json
import re
import subprocess
import sys
import zipfile
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent
ADDON = REPO / "stereomesh" / "addon"
MANIFEST = Path(__file__).resolve().parent / "blender_manifest.toml"

# A fixed time stamp keeps the zip identical between builds of the same sources.
_STAMP = (2024, 1, 1, 0, 0, 0)


def _version() -> str:
    text = (REPO / "pyproject.toml").read_text(encoding="utf-8")
    return re.search(r'^version\s*=\s*"([^"]+)"', text, re.M).group(1)


def _entry(zf: zipfile.ZipFile, name: str, data: bytes) -> None:
    info = zipfile.ZipInfo(name, _STAMP)
    info.compress_type = zipfile.ZIP_DEFLATED
    info.external_attr = 0o644 << 16
    zf.writestr(info, data)


def build_zip(out_dir: Path) -> Path:
    """Write the extension zip; returns its path."""
    sys.path.insert(0, str(REPO))
    from stereomesh.params import schema

    version = _version()
    manifest = MANIFEST.read_text(encoding="utf-8")
    manifest = re.sub(r'^version = "[^"]*"', f'version = "{version}"', manifest, flags=re.M)
    out_dir.mkdir(parents=True, exist_ok=True)
    target = out_dir / f"stereomesh-{version}.zip"
    with zipfile.ZipFile(target, "w") as zf:
        _entry(zf, "blender_manifest.toml", manifest.encode("utf-8"))
        _entry(zf, "schema.json", (json.dumps(schema(), indent=1) + "\n").encode("utf-8"))
        _entry(zf, "build.json", (json.dumps({"version": version}) + "\n").encode("utf-8"))
        for path in sorted(ADDON.glob("*.py")):
            _entry(zf, path.name, path.read_bytes())
        _entry(zf, "LICENSE", (REPO / "LICENSE").read_bytes())
    return target


def build_wheel(out_dir: Path) -> Path:
    """``pip wheel --no-deps`` of the core into ``out_dir``; returns the wheel's path."""
    subprocess.run([sys.executable, "-m", "pip", "wheel", "--no-deps", "--quiet",
                    "--wheel-dir", str(out_dir), str(REPO)], check=True)
    return out_dir / f"stereomesh-{_version()}-py3-none-any.whl"


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", type=Path, default=REPO / "dist")
    parser.add_argument("--no-wheel", action="store_true", help="only the extension zip")
    args = parser.parse_args(argv)
    print(build_zip(args.out))
    if not args.no_wheel:
        print(build_wheel(args.out))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
