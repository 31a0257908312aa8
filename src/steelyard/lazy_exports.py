"""Package attributes imported on first use (PEP 562), for packages whose ``__init__`` must
stay light: a command that needs one name of the package should not import every module
the package re-exports (docs/performance.md, Start-up, "Sixteenth session")."""

from __future__ import annotations

import importlib
from collections.abc import Callable, Mapping
from typing import Any


def attribute_loader(package: str, homes: Mapping[str, str]) -> Callable[[str], Any]:
    """The module ``__getattr__`` of ``package``: each public name in ``homes`` (name ->
    submodule) is imported from its submodule when first asked for."""

    def __getattr__(name: str) -> Any:
        home = homes.get(name)
        if home is None:
            raise AttributeError(f"module {package!r} has no attribute {name!r}")
        return getattr(importlib.import_module(f"{package}.{home}"), name)

    return __getattr__
