#!/usr/bin/env bash
# Set up and run the whole job on the sample project (the invented Tarnwick Creek site).
# Outputs go to out/sample/ (or the folder given as the first argument).
set -euo pipefail
source "$(dirname "$0")/setup.sh"
cd "$REPO_ROOT"
OUT=${1:-sample_project/results}

apt_install python3-venv python3-pip
setup_pypi_venv
.venv/bin/rockhead run sample_project/survey.toml --out "$OUT"
echo "Open $OUT/report.html in a browser, and sample_project/tarnwick.qgz (or $OUT/survey.gpkg) in QGIS."
