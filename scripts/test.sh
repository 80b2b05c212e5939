#!/usr/bin/env bash
# Every test of Rockhead, with all set-up, on a fresh Debian/Ubuntu machine:
#   1. the core on current PyPI releases (.venv);
#   2. the core and the QGIS plugin inside Debian's real QGIS 3.22, headless (.venv-qgis).
# Extra arguments go to both pytest runs (e.g. -x, -k name).
set -euo pipefail
source "$(dirname "$0")/setup.sh"
cd "$REPO_ROOT"

apt_install "${QGIS_DEBS[@]}"
setup_pypi_venv test
setup_qgis_venv

echo "== lint (ruff: rules, docstrings of core/ in the numpy convention), format, types (mypy on core/)"
.venv/bin/ruff check .
.venv/bin/ruff format --check .
PYTHON=.venv/bin/python bash scripts/typecheck.sh

# The two stacks run side by side (one process each; CI has two cores), each into its own log,
# printed when both are done; the exit status fails if either failed.
logs=$(mktemp -d)
echo "== 1/2 core tests on current PyPI releases, and 2/2 core and plugin tests inside Debian's QGIS (headless), side by side"
(
    .venv/bin/python -c "import numpy, scipy, pyproj, shapely; print('numpy', numpy.__version__, 'scipy', scipy.__version__, 'pyproj', pyproj.__version__, 'shapely', shapely.__version__)"
    .venv/bin/python -m pytest -q --basetemp="$logs/tmp-pypi" --ignore=tests/qgis "$@"
) >"$logs/pypi.log" 2>&1 &
pypi=$!
(
    qgis_env
    .venv-qgis/bin/python -c "import numpy, scipy, pyproj, shapely; print('numpy', numpy.__version__, 'scipy', scipy.__version__, 'pyproj', pyproj.__version__, 'shapely', shapely.__version__)"
    .venv-qgis/bin/python -m pytest -q --basetemp="$logs/tmp-qgis" -p pytest_qgis "$@"
) >"$logs/qgis.log" 2>&1 &
qgis=$!
status=0
wait "$pypi" || status=1
echo "== 1/2 core tests on current PyPI releases"
cat "$logs/pypi.log"
wait "$qgis" || status=1
echo "== 2/2 core and plugin tests inside Debian's QGIS (headless)"
cat "$logs/qgis.log"
rm -rf "$logs"
exit "$status"
