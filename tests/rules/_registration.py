"""Register a rule for one test only: the registry reads ``steelyard.rules._MODULES``, so a
test puts its rule in a module of its own and restores the real registry afterwards."""

from __future__ import annotations

import sys
import types
from collections.abc import Iterator

import pytest

import steelyard.rules as rules_package
from steelyard.rules.base import RuleSpec


def registered_for_the_test(
    monkeypatch: pytest.MonkeyPatch, module_name: str, spec: RuleSpec
) -> Iterator[None]:
    """Body of a fixture: ``spec`` is registered until the fixture is torn down."""
    module = types.ModuleType(module_name)
    module.RULE = spec  # type: ignore[attr-defined]
    monkeypatch.setitem(sys.modules, module.__name__, module)
    monkeypatch.setattr(rules_package, "_MODULES", (*rules_package._MODULES, module.__name__))
    rules_package._all.cache_clear()
    yield
    rules_package._all.cache_clear()  # the next test sees the real registry again
