# Rockhead: developer shortcuts.
#   make check            quick tier: lint and format check, then tests/core without the slow tests (PyPI stack, < 60 s)
#   make style            the style checks CI runs: ruff (with the docstring rules on core/), ruff format, mypy on core/
#   make install-plugin   link this checkout into the QGIS user profile (QGIS loads it from there)
#   make package          build dist/rockhead-<version>.zip for the plugin repository
# The full tier (every test, both stacks, what CI runs) is `bash scripts/test.sh`.

PLUGIN_NAME := rockhead
PYTHON ?= python3
VENV ?= .venv
QGIS_PROFILE_DIR ?= $(HOME)/.local/share/QGIS/QGIS3/profiles/default
PLUGINS_DIR := $(QGIS_PROFILE_DIR)/python/plugins

.PHONY: check style install-plugin uninstall-plugin package

check:
	$(VENV)/bin/ruff check .
	$(VENV)/bin/ruff format --check .
	$(VENV)/bin/python -m pytest -q -m "not slow" tests/core

style:
	$(VENV)/bin/ruff check .
	$(VENV)/bin/ruff format --check .
	PYTHON=$(VENV)/bin/python bash scripts/typecheck.sh

install-plugin:
	@mkdir -p "$(PLUGINS_DIR)"
	@if [ -e "$(PLUGINS_DIR)/$(PLUGIN_NAME)" ] && [ ! -L "$(PLUGINS_DIR)/$(PLUGIN_NAME)" ]; then \
		echo "$(PLUGINS_DIR)/$(PLUGIN_NAME) exists and is not a link; remove it first" >&2; exit 1; fi
	ln -sfn "$(CURDIR)" "$(PLUGINS_DIR)/$(PLUGIN_NAME)"
	@echo "Linked; restart QGIS and enable 'Rockhead' in Plugins > Manage and Install Plugins."

uninstall-plugin:
	@if [ -L "$(PLUGINS_DIR)/$(PLUGIN_NAME)" ]; then rm "$(PLUGINS_DIR)/$(PLUGIN_NAME)"; fi

package:
	$(PYTHON) scripts/package_plugin.py --out dist
