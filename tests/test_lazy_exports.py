"""Packages that re-export lazily (steelyard.lazy_exports): every listed name resolves to its
submodule's object, ``__all__`` lists exactly those names, and importing the package imports
none of the submodules (checked in a fresh process)."""

from __future__ import annotations

import importlib
import subprocess
import sys

import pytest

PACKAGES = ["steelyard.loaders.packed", "steelyard.run_timeline"]


@pytest.mark.parametrize("name", PACKAGES)
def test_every_listed_name_resolves_to_its_home(name: str) -> None:
    package = importlib.import_module(name)
    homes = package._HOMES
    assert sorted(package.__all__) == sorted(homes)
    for attribute, home in homes.items():
        module = importlib.import_module(f"{name}.{home}")
        assert getattr(package, attribute) is getattr(module, attribute)
    with pytest.raises(AttributeError, match="no attribute 'missing'"):
        package.missing  # noqa: B018 - the lookup is the test


@pytest.mark.parametrize("name", PACKAGES)
def test_importing_the_package_imports_no_home(name: str) -> None:
    probe = (
        f"import sys, {name} as p\n"
        "print(','.join(sorted(m for m in sys.modules"
        f" if any(m == '{name}.' + h for h in set(p._HOMES.values())))))"
    )
    done = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True)
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip() == ""
