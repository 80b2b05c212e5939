# Shared set-up steps for scripts/demo.sh and scripts/test.sh (sourced, not run).
# Idempotent: a second run installs nothing and takes seconds.

REPO_ROOT=$(cd "$(dirname "${BASH_SOURCE[0]}")/.." && pwd)
SUDO=""
if [ "$(id -u)" -ne 0 ]; then SUDO="sudo"; fi

apt_install() {  # apt_install PKG... : install the Debian packages that are missing
    local missing=()
    for p in "$@"; do
        dpkg-query -W -f='${Status}' "$p" 2>/dev/null | grep -q "install ok installed" || missing+=("$p")
    done
    if [ ${#missing[@]} -gt 0 ]; then
        echo "== installing Debian packages: ${missing[*]}"
        export DEBIAN_FRONTEND=noninteractive
        $SUDO apt-get update -qq
        $SUDO apt-get install -y -qq --no-install-recommends "${missing[@]}" >/dev/null
    fi
}

quiet() {  # quiet CMD...: run CMD, show its output only if it fails
    local log
    log=$(mktemp)
    if ! "$@" >"$log" 2>&1; then
        cat "$log" >&2
        rm -f "$log"
        return 1
    fi
    rm -f "$log"
}

# Current PyPI releases, in .venv: the command line and the core tests.
setup_pypi_venv() {  # setup_pypi_venv [EXTRAS]: the package and what it requires (+ extras, e.g. test)
    local extras=${1:-}
    local py=${PYTHON:-python3}
    if [ ! -x "$REPO_ROOT/.venv/bin/python" ]; then
        echo "== creating .venv (current PyPI releases)"
        "$py" -m venv "$REPO_ROOT/.venv"
    fi
    quiet "$REPO_ROOT/.venv/bin/python" -m pip install -q --disable-pip-version-check --upgrade pip
    quiet "$REPO_ROOT/.venv/bin/python" -m pip install -q --disable-pip-version-check -e "$REPO_ROOT${extras:+[$extras]}"
}

# Debian's QGIS Python (numpy 1.24, scipy 1.10, shapely 1.8, pyproj 3.4) in .venv-qgis,
# following shared QGIS_TESTING.md: system site packages, Debian's versions pinned.
setup_qgis_venv() {
    local venv="$REPO_ROOT/.venv-qgis"
    if [ ! -x "$venv/bin/python" ]; then
        echo "== creating .venv-qgis (Debian's QGIS Python stack)"
        /usr/bin/python3 -m venv --system-site-packages "$venv"
    fi
    /usr/bin/python3 - > "$venv/debian-constraints.txt" <<'PY'
from importlib.metadata import version, PackageNotFoundError
for d in ("numpy", "scipy", "shapely", "pyproj", "geopandas", "pandas", "GDAL", "PyQt5",
          "matplotlib", "fiona", "ezdxf", "contourpy"):
    try:
        print(f"{d}=={version(d)}")
    except PackageNotFoundError:
        pass
PY
    quiet "$venv/bin/python" -m pip install -q --disable-pip-version-check -c "$venv/debian-constraints.txt" \
        pytest 'pytest-qgis==5.0.2' hypothesis pykrige gstools
}

# QGIS's Python needs numpy, scipy, pyproj, shapely, contourpy, matplotlib and GDAL's bindings
# (python3-gdal, also GDAL's validators used by the tests); ezdxf and pandas are test references.
QGIS_DEBS=(qgis python3-qgis qgis-providers gdal-bin python3-gdal python3-venv python3-pip python3-numpy
           python3-scipy python3-pyproj python3-shapely python3-contourpy python3-matplotlib python3-geopandas
           python3-ezdxf python3-pil)

qgis_env() {  # environment for headless QGIS (shared QGIS_TESTING.md)
    export QT_QPA_PLATFORM=offscreen PROJ_DATA=/usr/share/proj
    XDG_RUNTIME_DIR=$(mktemp -d)
    export XDG_RUNTIME_DIR
    chmod 700 "$XDG_RUNTIME_DIR"
    unset DISPLAY
}
