#!/usr/bin/env bash
# mypy on core/ at the strictness of pyproject.toml ([tool.mypy]).
# The checkout folder may have any name, so mypy reaches the package through a link named
# `rockhead` in a temporary folder (as the tests and QGIS do). PYTHON defaults to .venv's.
set -euo pipefail
REPO_ROOT=$(cd "$(dirname "$0")/.." && pwd)
PY=${PYTHON:-$REPO_ROOT/.venv/bin/python}
case "$PY" in /*) ;; */*) PY="$PWD/$PY" ;; esac  # a relative path stays valid after the cd below
tmp=$(mktemp -d)
trap 'rm -rf "$tmp"' EXIT
ln -s "$REPO_ROOT" "$tmp/rockhead"
cd "$tmp"
"$PY" -m mypy --config-file "$REPO_ROOT/pyproject.toml" --cache-dir "$REPO_ROOT/.mypy_cache" -p rockhead.core
