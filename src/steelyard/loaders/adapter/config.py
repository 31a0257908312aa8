"""``adapter_config.json`` of a LoRA/DoRA adapter, read as hostile data.

Only the keys that change what inference computes are read: ``peft_type``, ``r``,
``lora_alpha``, ``use_rslora``, ``use_dora``, ``fan_in_fan_out``, ``rank_pattern``,
``alpha_pattern``, ``target_modules``, ``exclude_modules``, ``modules_to_save`` and, for the
report, ``base_model_name_or_path``. Every value is type- and range-checked; any other key is
ignored. Pattern keys are matched the way peft 0.21 matches them
(``re.match(rf"(.*\\.)?({key})$", module)``), but a pattern is evaluated as a regular
expression only when it cannot backtrack catastrophically (see :func:`_safe_pattern`), so a
hostile config cannot stall the reader.
"""

from __future__ import annotations

import math
import re
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from steelyard.errors import LoadError

#: Largest rank steelyard reads (peft has no limit; ranks in use are at most a few thousand).
MAX_RANK = 65_536
#: Largest config file read; real ones are about 1 KB.
MAX_CONFIG_BYTES = 4 * 2**20
#: Longest pattern or target name evaluated, and most entries in one pattern table.
MAX_PATTERN_CHARS = 512
MAX_PATTERNS = 100_000

#: Literal names (the common case) need no regular expression at all.
_LITERAL = re.compile(r"[\w.\-/]+")
#: A repeated group (``(a+)+``, ``(x|y)*``) is what makes backtracking exponential.
_REPEATED_GROUP = re.compile(r"\)\s*[*+?{]")
_SUPPORTED_TYPES = ("LORA",)


@dataclass(frozen=True)
class AdapterConfig:
    """The inference-relevant settings of one adapter (defaults are peft's)."""

    present: bool
    """False when the adapter has no config beside it (scale taken as 1)."""
    rank: int | None = None
    alpha: float | None = None
    rslora: bool = False
    dora: bool = False
    fan_in_fan_out: bool = False
    rank_pattern: tuple[tuple[str, int], ...] = ()
    alpha_pattern: tuple[tuple[str, float], ...] = ()
    target_modules: tuple[str, ...] | str | None = None
    """Names (suffix-matched), one regular expression (full match), or None."""
    exclude_modules: tuple[str, ...] | str | None = None
    modules_to_save: tuple[str, ...] = ()
    base_model: str | None = None

    def rank_for(self, module: str, source: Path) -> int | None:
        """The configured rank of ``module`` (``rank_pattern`` first, then ``r``)."""
        for key, value in self.rank_pattern:
            if pattern_matches(key, module, source):
                return value
        return self.rank

    def alpha_for(self, module: str, source: Path) -> float | None:
        """The configured alpha of ``module`` (``alpha_pattern`` first, then ``lora_alpha``)."""
        for key, value in self.alpha_pattern:
            if pattern_matches(key, module, source):
                return value
        return self.alpha

    def scale_for(self, module: str, rank: int, source: Path) -> float:
        """peft's scaling of ``module``'s update: alpha/r, or alpha/√r with rank-stabilised
        LoRA (Kalajdzievski 2023, "A Rank Stabilization Scaling Factor for Fine-Tuning with
        LoRA"); 1 when there is no config."""
        alpha = self.alpha_for(module, source)
        if not self.present or alpha is None:
            return 1.0
        return alpha / (math.sqrt(rank) if self.rslora else rank)

    def targets(self, module: str, source: Path) -> bool | None:
        """Whether the config's ``target_modules`` (minus ``exclude_modules``) names ``module``;
        None when the config cannot say (no config, ``all-linear``, no targets)."""
        if not self.present or self.target_modules is None or self.target_modules == "all-linear":
            return None
        if _names(self.exclude_modules, module, source):
            return False
        return _names(self.target_modules, module, source)


def _names(spec: tuple[str, ...] | str | None, module: str, source: Path) -> bool:
    """peft's target test: a string is one full-match expression, a list names leaves."""
    if spec is None:
        return False
    if isinstance(spec, str):
        return _compiled(spec, source)(module) if not _LITERAL.fullmatch(spec) else spec == module
    return any(module == name or module.endswith("." + name) for name in spec)


def pattern_matches(key: str, module: str, source: Path) -> bool:
    """peft's ``get_pattern_key`` test of one ``rank_pattern``/``alpha_pattern`` key."""
    if _LITERAL.fullmatch(key):
        return module == key or module.endswith("." + key)
    compiled = _compiled(key, source)
    return compiled(module) or any(
        compiled(module[i + 1 :]) for i, ch in enumerate(module) if ch == "."
    )


def _compiled(pattern: str, source: Path) -> Callable[[str], bool]:
    expression = _safe_pattern(pattern, source)
    return lambda text: expression.fullmatch(text) is not None


def _safe_pattern(pattern: str, source: Path) -> re.Pattern[str]:
    """``pattern`` compiled, or a refusal when it could backtrack catastrophically: longer
    than :data:`MAX_PATTERN_CHARS`, a repeated group, or more than two repetitions (with at
    most two, matching a name of n characters costs at most about n³ steps)."""
    repetitions = sum(pattern.count(c) for c in "*+{")
    if len(pattern) > MAX_PATTERN_CHARS or _REPEATED_GROUP.search(pattern) or repetitions > 2:
        raise LoadError(
            source,
            f"adapter_config.json: pattern {pattern[:60]!r} is a regular expression too complex "
            "to evaluate safely (repeated groups, more than two repetitions, or over "
            f"{MAX_PATTERN_CHARS} characters)",
        )
    try:
        return re.compile(pattern)
    except (re.error, RecursionError, OverflowError) as exc:
        raise LoadError(
            source,
            f"adapter_config.json: pattern {pattern[:60]!r} is not a valid expression ({exc})",
        ) from None


def _int(value: Any, what: str, source: Path) -> int:
    if isinstance(value, bool) or not isinstance(value, int):
        raise LoadError(source, f"adapter_config.json: {what} is {_shown(value)}, not an integer")
    if not 1 <= value <= MAX_RANK:
        raise LoadError(source, f"adapter_config.json: {what} is {value}, outside 1 … {MAX_RANK:,}")
    return value


def _number(value: Any, what: str, source: Path) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise LoadError(source, f"adapter_config.json: {what} is {_shown(value)}, not a number")
    number = float(value)
    if not math.isfinite(number):
        raise LoadError(source, f"adapter_config.json: {what} is not finite")
    return number


def _flag(config: dict[str, Any], key: str, source: Path) -> bool:
    value = config.get(key)
    if value is None:
        return False
    if not isinstance(value, bool):
        raise LoadError(source, f"adapter_config.json: {key} is {_shown(value)}, not true/false")
    return value


def _shown(value: Any) -> str:
    text = repr(value)
    return text if len(text) <= 40 else f"a {type(value).__name__}"


def _table(
    config: dict[str, Any], key: str, convert: Callable[[Any, str, Path], Any], source: Path
) -> tuple[tuple[str, Any], ...]:
    value = config.get(key)
    if value is None:
        return ()
    if not isinstance(value, dict):
        raise LoadError(source, f"adapter_config.json: {key} is not an object of name to value")
    if len(value) > MAX_PATTERNS:
        raise LoadError(
            source, f"adapter_config.json: {key} has more than {MAX_PATTERNS:,} entries"
        )
    out = []
    for name, item in value.items():
        if len(name) > MAX_PATTERN_CHARS or not name:
            raise LoadError(source, f"adapter_config.json: a {key} key is empty or too long")
        _safe_pattern(name, source) if not _LITERAL.fullmatch(name) else None
        out.append((name, convert(item, f"{key}[{name[:40]!r}]", source)))
    return tuple(out)


def _name_list(config: dict[str, Any], key: str, source: Path) -> tuple[str, ...] | str | None:
    value = config.get(key)
    if value is None:
        return None
    if isinstance(value, str):
        if not _LITERAL.fullmatch(value) and value != "all-linear":
            _safe_pattern(value, source)
        return value
    if not isinstance(value, list) or not all(isinstance(v, str) for v in value):
        raise LoadError(source, f"adapter_config.json: {key} is not a name, a pattern or a list")
    if len(value) > MAX_PATTERNS or any(len(v) > MAX_PATTERN_CHARS for v in value):
        raise LoadError(source, f"adapter_config.json: {key} is too long")
    return tuple(value)


def parse_config(config: Any, source: Path) -> AdapterConfig:
    """Validate a parsed ``adapter_config.json`` (``source`` names the file in errors)."""
    if not isinstance(config, dict):
        raise LoadError(source, "adapter_config.json is not a JSON object")
    kind = config.get("peft_type", "LORA")
    if not isinstance(kind, str) or kind.upper() not in _SUPPORTED_TYPES:
        raise LoadError(
            source,
            f"adapter_config.json: peft_type {_shown(kind)} is not supported (steelyard reads "
            "LoRA and DoRA adapters)",
        )
    rank = _int(config.get("r", 8), "r", source)
    alpha = _number(config.get("lora_alpha", 8), "lora_alpha", source)
    saved = _name_list(config, "modules_to_save", source)
    base = config.get("base_model_name_or_path")
    return AdapterConfig(
        present=True,
        rank=rank,
        alpha=alpha,
        rslora=_flag(config, "use_rslora", source),
        dora=_flag(config, "use_dora", source),
        fan_in_fan_out=_flag(config, "fan_in_fan_out", source),
        rank_pattern=_table(config, "rank_pattern", _int, source),
        alpha_pattern=_table(config, "alpha_pattern", _number, source),
        target_modules=_name_list(config, "target_modules", source),
        exclude_modules=_name_list(config, "exclude_modules", source),
        modules_to_save=(saved,) if isinstance(saved, str) else (saved or ()),
        base_model=base if isinstance(base, str) and len(base) <= 1024 else None,
    )
