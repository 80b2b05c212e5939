#!/usr/bin/env python3
"""Build the QGIS plugin zip: dist/rockhead-<version>.zip, and check it.

The zip holds one top folder, ``rockhead``, with metadata.txt, LICENSE,
README.md, the root ``__init__.py`` (classFactory), ``core/`` and ``plugin/``:
no tests, benchmarks, sample results, caches or compiled files. Entries are
written in sorted order with a fixed timestamp, so the same sources give the
same zip.

Usage: ``python3 scripts/package_plugin.py [--out DIR] [--check ZIP]``
"""

from __future__ import annotations

import argparse
import configparser
import re
import sys
import zipfile
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
TOP = "rockhead"
ROOT_FILES = ("metadata.txt", "LICENSE", "README.md", "__init__.py")
PACKAGE_DIRS = ("core", "plugin")
SUFFIXES = {".py", ".svg", ".png", ".qml", ".yaml", ".txt", ".md", ".json"}
SKIP_DIRS = {"__pycache__", ".pytest_cache", ".ruff_cache", ".hypothesis", ".qgis-settings"}
SKIP_FILES = {"make_sample_project.py"}  # development tool, needs the repository's sample data
FIXED_TIME = (1980, 1, 1, 0, 0, 0)
MAX_BYTES = 25 * 1024 * 1024
REQUIRED_METADATA = ("name", "qgisMinimumVersion", "description", "about", "version", "author", "email", "repository")
EXPECTED_METADATA = ("tracker", "homepage")
BINARY_SUFFIXES = {".so", ".pyd", ".dll", ".dylib", ".exe", ".pyc", ".pyo", ".o", ".a"}


def read_metadata(path: Path) -> dict:
    parser = configparser.ConfigParser(interpolation=None)
    parser.optionxform = str  # keys are case-sensitive (qgisMinimumVersion)
    parser.read_string(path.read_text(encoding="utf-8"))
    return dict(parser["general"]) if parser.has_section("general") else {}


def plugin_files(repo: Path = REPO) -> list:
    """(path on disk, name in the zip) of every file that goes into the package."""
    files = []
    for name in ROOT_FILES:
        p = repo / name
        if p.is_file():
            files.append((p, f"{TOP}/{name}"))
    for d in PACKAGE_DIRS:
        for p in sorted((repo / d).rglob("*")):
            rel = p.relative_to(repo)
            if not p.is_file() or set(rel.parts) & SKIP_DIRS or p.name in SKIP_FILES:
                continue
            if p.suffix.lower() not in SUFFIXES:
                continue
            files.append((p, f"{TOP}/{rel.as_posix()}"))
    return files


def build(out_dir: Path, repo: Path = REPO) -> Path:
    """Write the zip; return its path."""
    meta = read_metadata(repo / "metadata.txt")
    version = meta.get("version", "").strip()
    if not version:
        raise SystemExit("metadata.txt has no version")
    out_dir.mkdir(parents=True, exist_ok=True)
    target = out_dir / f"{TOP}-{version}.zip"
    tmp = target.with_suffix(".zip.part")
    with zipfile.ZipFile(tmp, "w", compression=zipfile.ZIP_DEFLATED) as zf:
        for src, arc in sorted(plugin_files(repo), key=lambda t: t[1]):
            info = zipfile.ZipInfo(arc, date_time=FIXED_TIME)
            info.compress_type = zipfile.ZIP_DEFLATED
            info.external_attr = 0o644 << 16
            zf.writestr(info, src.read_bytes())
    tmp.replace(target)
    return target


def _check_top(zf, names, top) -> list:
    """Problems of one top-level folder of a plugin zip."""
    problems = []
    if not re.fullmatch(r"[A-Za-z_][A-Za-z0-9_-]*", top):
        problems.append(f"top folder name {top!r} must be ASCII letters, digits, '_' or '-', not starting with a digit")
    for req in ("metadata.txt", "__init__.py"):
        if f"{top}/{req}" not in names:
            problems.append(f"{top}/{req} missing")
    if f"{top}/__init__.py" in names and "def classFactory" not in zf.read(f"{top}/__init__.py").decode():
        problems.append(f"{top}/__init__.py has no classFactory")
    if f"{top}/metadata.txt" in names:
        parser = configparser.ConfigParser(interpolation=None)
        parser.optionxform = str
        parser.read_string(zf.read(f"{top}/metadata.txt").decode("utf-8"))
        meta = dict(parser["general"]) if parser.has_section("general") else {}
        for key in REQUIRED_METADATA + EXPECTED_METADATA:
            if not meta.get(key, "").strip():
                problems.append(f"{top}/metadata.txt lacks '{key}'")
    return problems


def check(zip_path: Path) -> list:
    """Problems of a plugin zip against the plugin repository's rules (empty list: fine)."""
    problems = []
    if zip_path.stat().st_size > MAX_BYTES:
        problems.append(f"zip is {zip_path.stat().st_size} bytes, more than 25 MB")
    with zipfile.ZipFile(zip_path) as zf:
        names = zf.namelist()
        tops = {n.split("/", 1)[0] for n in names}
        if len(tops) != 1:
            problems.append(f"expected one top-level folder, found {sorted(tops)}")
        for top in sorted(tops) or [""]:  # every top folder is checked, so problems are all listed
            problems.extend(_check_top(zf, names, top))
        licence = [
            n
            for n in names
            if n.split("/")[-1].upper().startswith(("LICENSE", "LICENCE", "COPYING")) and n.count("/") == 1
        ]
        if not licence:
            problems.append("no LICENSE file at the top of the plugin folder")
        else:
            text = zf.read(licence[0]).decode("utf-8", "replace")
            if "GNU GENERAL PUBLIC LICENSE" not in text.upper():
                problems.append("LICENSE is not the GNU GPL (GPLv2-or-later compatible licence expected)")
        for n in names:
            parts = n.split("/")
            if Path(n).suffix.lower() in BINARY_SUFFIXES:
                problems.append(f"binary file {n}")
            if set(parts) & (SKIP_DIRS | {"tests", "benchmarks", "sample_project", ".git", "dist"}):
                problems.append(f"development file {n}")
    return problems


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", default=str(REPO / "dist"), help="output folder (default: dist)")
    ap.add_argument("--check", metavar="ZIP", help="only check an existing zip")
    args = ap.parse_args(argv)
    path = Path(args.check) if args.check else build(Path(args.out))
    problems = check(path)
    for p in problems:
        print(f"{path}: {p}", file=sys.stderr)
    if not problems:
        print(path)
    return 1 if problems else 0


if __name__ == "__main__":
    sys.exit(main())
