"""The quantization settings a packed checkpoint declares beside itself.

Hugging Face writers put them in ``config.json`` under ``quantization_config`` (GPTQ, AWQ,
FP8, bitsandbytes, compressed-tensors); AutoGPTQ also writes ``quantize_config.json``; MLX
writes ``quantization`` (with per-module overrides keyed by module path). Side files are read
only through :func:`steelyard.safepath.read_beside` (regular files inside the model's folder,
size-capped); a present but malformed file is bad input, an absent one means "infer from the
tensors".
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from steelyard.errors import LoadError
from steelyard.loaders.base import parse_json
from steelyard.safepath import read_beside


@dataclass(frozen=True)
class QuantConfig:
    """What the side files say (empty mappings when nothing is declared)."""

    settings: Mapping[str, Any] = field(default_factory=dict)
    """``quantization_config`` of ``config.json`` or the whole ``quantize_config.json``."""
    mlx: Mapping[str, Any] = field(default_factory=dict)
    """MLX's ``quantization`` section."""
    source: str | None = None
    """File the settings came from (named in errors)."""

    @property
    def method(self) -> str:
        """``quant_method`` in lower case ("" when absent)."""
        return str(self.settings.get("quant_method", "")).lower()

    def integer(self, *keys: str) -> int | None:
        """The first of ``keys`` present, as an int; a non-integer value is bad input."""
        for key in keys:
            if key in self.settings:
                value = self.settings[key]
                if isinstance(value, bool) or not isinstance(value, int):
                    raise LoadError(self.source or "config", f"quantization {key} {value!r} "
                                    "is not an integer")
                return value
        return None

    def mlx_for(self, module: str) -> tuple[int | None, int | None]:
        """MLX ``(bits, group_size)`` for ``module`` (its own entry over the defaults)."""
        entry = self.mlx.get(module)
        scope = entry if isinstance(entry, Mapping) else self.mlx
        bits, group = scope.get("bits", self.mlx.get("bits")), scope.get(
            "group_size", self.mlx.get("group_size"))
        for key, value in (("bits", bits), ("group_size", group)):
            if value is not None and (isinstance(value, bool) or not isinstance(value, int)):
                raise LoadError(self.source or "config", f"MLX quantization {key} {value!r} is "
                                "not an integer")
        return bits, group


def _object(raw: bytes, where: Path) -> dict[str, Any]:
    data = parse_json(raw, where, where.name)
    if not isinstance(data, dict):
        raise LoadError(where, "is not a JSON object")
    return data


def read_quant_config(checkpoint: Path) -> QuantConfig:
    """The quantization settings beside ``checkpoint`` (a file or an index)."""
    folder = checkpoint.parent
    raw = read_beside(checkpoint, "config.json", "model config")
    if raw is not None:
        config = _object(raw, folder / "config.json")
        settings = config.get("quantization_config")
        mlx = config.get("quantization")
        if settings is not None or mlx is not None:
            if settings is not None and not isinstance(settings, dict):
                raise LoadError(folder / "config.json", "quantization_config is not an object")
            if mlx is not None and not isinstance(mlx, dict):
                raise LoadError(folder / "config.json", "quantization is not an object")
            return QuantConfig(settings or {}, mlx or {}, str(folder / "config.json"))
    raw = read_beside(checkpoint, "quantize_config.json", "quantization config")
    if raw is not None:
        return QuantConfig(_object(raw, folder / "quantize_config.json"), {},
                           str(folder / "quantize_config.json"))
    return QuantConfig()
