#!/usr/bin/env bash
# Set up and run the whole job on the sample project (the invented Tarnwick Creek site).
# Outputs go to sample_project/results/ (or the folder given as the first argument). With the
# default folder, sample_project/tarnwick.qgz is rebuilt from these results in Debian's QGIS,
# headless, so the project's legends are those of the data it opens.
set -euo pipefail
source "$(dirname "$0")/setup.sh"
cd "$REPO_ROOT"
OUT=${1:-sample_project/results}

apt_install python3-venv python3-pip
setup_pypi_venv
.venv/bin/rockhead run sample_project/survey.toml --out "$OUT"

if [ "$OUT" = sample_project/results ]; then
    apt_install "${QGIS_DEBS[@]}"
    setup_qgis_venv
    echo "== rebuilding sample_project/tarnwick.qgz from $OUT (QGIS, headless)"
    (
        qgis_env
        link=$(mktemp -d)
        trap 'rm -rf "$link"' EXIT
        ln -s "$REPO_ROOT" "$link/rockhead"
        PYTHONPATH="$link:/usr/share/qgis/python/plugins" .venv-qgis/bin/python -m rockhead.plugin.make_sample_project \
            "$OUT" sample_project/tarnwick.qgz --survey sample_project/survey.toml
    )
fi
echo "Open $OUT/report.html in a browser, and sample_project/tarnwick.qgz (or $OUT/survey.gpkg) in QGIS."
