"""Every model_store module's ``__all__`` is sorted, free of duplicates and names real objects.

Reference: the project's code-style rule ("each package/module has a sorted __all__") and
the Python language reference on ``__all__`` (the names a star-import must find). "Sorted"
is isort's order_by_type convention, which the whole package follows (and ruff's RUF022
"isort-style"): CONSTANTS first, then Classes, then functions, each group compared
case-insensitively. ``__main__`` modules are skipped: importing one runs the CLI.
"""

from __future__ import annotations

import importlib
import pkgutil

import pytest

import model_store

MODULES = ["model_store"] + sorted(
    info.name
    for info in pkgutil.walk_packages(model_store.__path__, prefix="model_store.")
    if not info.name.endswith("__main__")
)


def isort_order(name: str) -> tuple[int, str]:
    """isort order_by_type: SCREAMING_SNAKE_CASE (0), CamelCase (1), anything else (2)."""
    if name.isupper() and len(name) > 1:
        group = 0
    elif name[:1].isupper():
        group = 1
    else:
        group = 2
    return group, name.lower()


def test_isort_order_puts_constants_then_classes_then_functions():
    assert sorted(["load_bundle", "Bundle", "FORMAT", "Scores", "GOLDEN_TOLERANCE"], key=isort_order) == [
        "FORMAT", "GOLDEN_TOLERANCE", "Bundle", "Scores", "load_bundle"]


@pytest.mark.parametrize("module_name", MODULES)
def test_public_names_are_sorted_unique_and_exist(module_name):
    module = importlib.import_module(module_name)
    names = getattr(module, "__all__", None)
    assert names is not None, f"{module_name} defines no __all__"
    assert list(names) == sorted(names, key=isort_order), f"{module_name}.__all__ is not sorted"
    assert len(set(names)) == len(names), f"{module_name}.__all__ repeats a name"
    missing = [name for name in names if not hasattr(module, name)]
    assert missing == [], f"{module_name}.__all__ names missing objects: {missing}"


def test_package_exports_the_pinned_api():
    # README, Python API: from model_store import load_bundle; bundle.score(X) -> Scores.
    for name in ("load_bundle", "Bundle", "Scores", "GOLDEN_TOLERANCE", "UnsafeArchiveError", "BundleFormatError"):
        assert name in model_store.__all__
    assert model_store.GOLDEN_TOLERANCE == 1e-9
