"""Run the doctests of every core module (worked examples checkable by hand)."""

import doctest
import importlib
import pkgutil

import pytest
import rockhead.core as core

MODULES = sorted(
    m.name.removeprefix("rockhead.core.")
    for m in pkgutil.walk_packages(core.__path__, prefix="rockhead.core.")
    if not m.name.rsplit(".", 1)[-1].startswith("_")
)


@pytest.mark.parametrize("name", MODULES, ids=MODULES)
def test_module_doctests(name):
    try:
        module = importlib.import_module(f"rockhead.core.{name}")
    except ImportError as exc:  # an optional dependency of that module is missing
        pytest.fail(f"core module {name} does not import: {exc}")
    result = doctest.testmod(module, optionflags=doctest.NORMALIZE_WHITESPACE | doctest.ELLIPSIS)
    assert result.failed == 0
