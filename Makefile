# Rockhead: developer shortcuts.
#   make install-plugin   link this checkout into the QGIS user profile (QGIS loads it from there)
#   make package          build dist/rockhead-<version>.zip for the plugin repository

PLUGIN_NAME := rockhead
PYTHON ?= python3
QGIS_PROFILE_DIR ?= $(HOME)/.local/share/QGIS/QGIS3/profiles/default
PLUGINS_DIR := $(QGIS_PROFILE_DIR)/python/plugins

.PHONY: install-plugin uninstall-plugin package

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
