"""Reading and validating policy files (``steelyard.toml`` or ``[tool.steelyard]``).

Every mistake is a :class:`~steelyard.errors.PolicyError` naming the key and the file, with a
"did you mean" suggestion for near misses, because a policy typo that silently does nothing
is worse than no policy. A policy file is a side file: read only when it is a regular file
under :data:`MAX_POLICY_BYTES` (:func:`steelyard.safepath.read_side_file`), and every way
TOML can be hostile (deep nesting, huge integers, wrong types) is one line, exit 2.
"""

from __future__ import annotations

import difflib
import json
import math
import os
import re
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from steelyard._toml import tomllib
from steelyard.budget import Budget
from steelyard.errors import PolicyError, SteelyardError
from steelyard.findings import FailOn, Severity
from steelyard.policy import Ignore, LayerOverride, Policy
from steelyard.rules import registry

POLICY_FILE = "steelyard.toml"
_TOP_KEYS = (
    "fail-on", "input-range", "weight-decay", "frozen", "rules", "override", "ignore", "budget"
)
#: Largest policy or pyproject.toml read (policies are a few KB).
MAX_POLICY_BYTES = 4 * 2**20
#: A ``pyproject.toml`` that mentions steelyard's table (``[tool.steelyard]``,
#: ``[tool.steelyard.rules.x]``, ``[[tool.steelyard.override]]`` or a dotted
#: ``tool.steelyard.… =`` key): one we must read, so that a broken one is an error.
_MENTIONS_STEELYARD = re.compile(
    rb"^[ \t]*(\[\[?[ \t]*tool[ \t]*\.[ \t]*[\"']?steelyard\b|tool[ \t]*\.[ \t]*[\"']?steelyard\b)",
    re.MULTILINE,
)
_FAIL_ON = tuple(f.value for f in FailOn)
_SEVERITIES = tuple(s.value for s in Severity)
#: Thresholds that are fractions or cosines (must lie in [0, 1]).
_UNIT_INTERVAL = (
    "cosine",
    "quantile",
    "share",
    "support-quantile",
    "weight-quantile",
    "error-share",
)


def _suggest(word: str, choices: list[str] | tuple[str, ...]) -> str:
    close = difflib.get_close_matches(word, list(choices), n=1, cutoff=0.6)
    return f" (did you mean {close[0]!r}?)" if close else ""


def _fail(source: str, key: str, problem: str) -> PolicyError:
    return PolicyError(f"{source}: policy key {key!r} {problem}")


def _read(path: Path, what: str) -> bytes:
    from steelyard.safepath import read_side_file

    return read_side_file(path, what, MAX_POLICY_BYTES, error=PolicyError)


def _parse_toml(raw: bytes, file: Path) -> dict[str, Any]:
    """Parse TOML text; every failure (syntax, encoding, nesting too deep for the parser, an
    integer too long to convert, memory) is one :class:`PolicyError` naming the file."""
    try:
        return tomllib.loads(raw.decode("utf-8"))
    except tomllib.TOMLDecodeError as exc:
        raise PolicyError(f"{file}: is not valid TOML ({exc})") from None
    except UnicodeDecodeError as exc:
        raise PolicyError(f"{file}: is not UTF-8 text ({exc.reason} at byte {exc.start})") from None
    except (RecursionError, MemoryError):
        raise PolicyError(f"{file}: is nested too deeply (or too large) to be a policy") from None
    except ValueError as exc:  # e.g. an integer past Python's digit limit
        raise PolicyError(f"{file}: is not valid TOML ({exc})") from None


def _pyproject_table(data: dict[str, Any], file: Path) -> Any:
    """``[tool.steelyard]`` of a parsed pyproject.toml (None when absent); a ``tool`` key
    that is not a table is an error only when we must read the file."""
    tool = data.get("tool")
    if tool is None:
        return None
    if not isinstance(tool, dict):
        raise PolicyError(f"{file}: 'tool' must be a table, not {type(tool).__name__}")
    return tool.get("steelyard")


def discover(start: Path | None = None) -> tuple[Path, str] | None:
    """The nearest ``steelyard.toml``, else ``pyproject.toml`` with ``[tool.steelyard]``,
    walking up from ``start``; returns the file and ``file`` or ``pyproject``.

    A ``pyproject.toml`` that cannot be read or parsed (a FIFO, too large, broken TOML, a
    ``tool`` key that is not a table) is passed over when its text does not mention
    ``tool.steelyard``: someone else's broken project file must not break every run below
    it. One that mentions it is ours to read, and its error stops the run."""
    folder = (start or Path.cwd()).resolve()
    for candidate in (folder, *folder.parents):
        own = candidate / POLICY_FILE
        if os.path.lexists(own) and not (own.is_dir() and not own.is_symlink()):
            return own, "file"
        project = candidate / "pyproject.toml"
        if not os.path.lexists(project):
            continue
        try:
            raw = _read(project, "pyproject.toml")
        except SteelyardError:
            continue
        mentions = _MENTIONS_STEELYARD.search(raw) is not None
        try:
            table = _pyproject_table(_parse_toml(raw, project), project)
        except PolicyError:
            if mentions:
                return project, "pyproject"  # load_policy reports the error
            continue
        if table is not None:
            return project, "pyproject"
    return None


def load_policy(path: Path | None = None, start: Path | None = None) -> Policy:
    """The policy from ``path``, or discovered from ``start``; built-in defaults when none."""
    if path is not None:
        found: tuple[Path, str] | None = (
            path,
            "pyproject" if path.name == "pyproject.toml" else "file",
        )
    else:
        found = discover(start)
    if found is None:
        return Policy()
    file, kind = found
    data: Any = _parse_toml(_read(file, "policy file"), file)
    if kind == "pyproject":
        data = _pyproject_table(data, file)
        if data is None:
            raise PolicyError(f"{file}: has no [tool.steelyard] table")
        source = f"{file} [tool.steelyard]"
    else:
        source = str(file)
    if not isinstance(data, dict):
        raise PolicyError(f"{source}: the policy must be a table")
    return parse_policy(data, source)


def _number(source: str, key: str, value: Any, *, allow_none: bool = False) -> float | None:
    if value is None and allow_none:
        return None
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise _fail(source, key, f"must be a number, not {type(value).__name__}")
    try:
        number = float(value)
    except OverflowError:  # a 400-digit integer is valid TOML
        raise _fail(source, key, "is too large to be a number steelyard can use") from None
    if not math.isfinite(number):
        raise _fail(source, key, "must be finite")
    return number


def _known_rules() -> dict[str, Any]:
    """Audit rules and ``steelyard compare``'s rules: one policy file configures both."""
    return registry(None)


def _rule_settings(source: str, where: str, rule: str, table: Any) -> dict[str, Any]:
    specs = _known_rules()
    if rule not in specs:
        raise _fail(source, where, f"names no rule{_suggest(rule, tuple(specs))}")
    if not isinstance(table, dict):
        raise _fail(source, where, "must be a table")
    spec = specs[rule]
    allowed = ("enabled", "severity", *spec.thresholds)
    out: dict[str, Any] = {}
    for key, value in table.items():
        full = f"{where}.{key}"
        if key not in allowed:
            raise _fail(source, full, f"is not a setting of {rule}{_suggest(key, allowed)}")
        if key == "enabled":
            if not isinstance(value, bool):
                raise _fail(source, full, "must be true or false")
        elif key == "severity":
            if value not in _SEVERITIES:
                raise _fail(source, full, f"must be one of {', '.join(_SEVERITIES)}")
        else:
            default = spec.thresholds[key]
            if isinstance(default, bool):
                if not isinstance(value, bool):
                    raise _fail(source, full, "must be true or false")
            elif default is None or isinstance(default, (int, float)):
                number = _number(source, full, value)
                assert number is not None
                if number < 0:
                    raise _fail(source, full, f"must be >= 0, not {value}")
                if any(key.endswith(k) for k in _UNIT_INTERVAL) and number > 1:
                    raise _fail(source, full, f"must lie in [0, 1], not {value}")
                value = (
                    int(value)
                    if isinstance(default, int)
                    and not isinstance(default, bool)
                    and float(value).is_integer()
                    else value
                )
            elif isinstance(default, str) and not isinstance(value, str):
                raise _fail(source, full, "must be a string")
        out[key] = value
    return out


def parse_policy(data: Mapping[str, Any], source: str) -> Policy:
    """Validate a parsed policy table."""
    for key in data:
        if key not in _TOP_KEYS:
            raise _fail(source, key, f"is unknown{_suggest(key, _TOP_KEYS)}")
    fail_on = data.get("fail-on", "error")
    if fail_on not in _FAIL_ON:
        raise _fail(
            source,
            "fail-on",
            f"must be one of {', '.join(_FAIL_ON)}{_suggest(str(fail_on), _FAIL_ON)}",
        )
    input_range = None
    if "input-range" in data:
        value = data["input-range"]
        if not isinstance(value, list) or len(value) != 2:
            raise _fail(source, "input-range", "must be a pair [low, high]")
        low, high = (_number(source, "input-range", v) for v in value)
        assert low is not None and high is not None
        if low > high:
            raise _fail(source, "input-range", f"has low {low} above high {high}")
        input_range = (low, high)
    weight_decay = None
    if "weight-decay" in data:
        weight_decay = _number(source, "weight-decay", data["weight-decay"])
        if weight_decay is not None and weight_decay < 0:
            raise _fail(source, "weight-decay", "must be >= 0")
    frozen = data.get("frozen", [])
    if not isinstance(frozen, list) or not all(isinstance(g, str) for g in frozen):
        raise _fail(source, "frozen", "must be a list of layer-name globs")
    rules_table = data.get("rules", {})
    if not isinstance(rules_table, dict):
        raise _fail(source, "rules", "must be a table of rule tables")
    rules = {
        name: _rule_settings(source, f"rules.{name}", name, table)
        for name, table in rules_table.items()
    }
    overrides: list[LayerOverride] = []
    for index, entry in enumerate(_table_list(source, "override", data.get("override", []))):
        where = f"override[{index}]"
        glob = entry.get("layers")
        if not isinstance(glob, str) or not glob:
            raise _fail(source, f"{where}.layers", "is required: a glob over layer names")
        settings = {
            rule: _rule_settings(source, f"{where}.{rule}", rule, table)
            for rule, table in entry.items()
            if rule != "layers"
        }
        overrides.append(LayerOverride(layers=glob, rules=settings))
    ignores: list[Ignore] = []
    specs = _known_rules()
    for index, entry in enumerate(_table_list(source, "ignore", data.get("ignore", []))):
        where = f"ignore[{index}]"
        for key in entry:
            if key not in ("rule", "layers", "reason"):
                raise _fail(
                    source,
                    f"{where}.{key}",
                    f"is unknown{_suggest(key, ('rule', 'layers', 'reason'))}",
                )
        rule = entry.get("rule")
        if not isinstance(rule, str) or rule not in specs:
            raise _fail(
                source, f"{where}.rule", f"names no rule{_suggest(str(rule), tuple(specs))}"
            )
        reason = entry.get("reason")
        if not isinstance(reason, str) or not reason.strip():
            raise _fail(source, f"{where}.reason", "is required: say why the finding is accepted")
        layers = entry.get("layers", "*")
        if not isinstance(layers, str):
            raise _fail(source, f"{where}.layers", "must be a glob string")
        ignores.append(Ignore(rule=str(rule), layers=layers, reason=reason))
    budget = None
    if "budget" in data:
        table = data["budget"]
        if not isinstance(table, dict):
            raise _fail(source, "budget", "must be a table of budget keys")
        try:
            budget = Budget().with_overrides(table)
        except PolicyError as exc:
            raise PolicyError(f"{source}: {exc}") from None
    return Policy(
        fail_on=str(fail_on),
        rules=rules,
        overrides=tuple(overrides),
        ignore=tuple(ignores),
        input_range=input_range,
        weight_decay=weight_decay,
        frozen=tuple(frozen),
        source=source,
        budget=budget,
    )


def _table_list(source: str, key: str, value: Any) -> list[dict[str, Any]]:
    if not isinstance(value, list) or not all(isinstance(v, dict) for v in value):
        raise _fail(source, key, f"must be an array of tables ([[{key}]])")
    return value


def starter_text() -> str:
    """A commented ``steelyard.toml`` holding every default."""
    lines = [
        "# steelyard policy: thresholds that gate the weight audit in CI.",
        "# Every value below is the built-in default; delete what you do not change.",
        "",
        '# Lowest severity that fails the gate: "error", "warning", "info" or "never".',
        'fail-on = "error"',
        "",
        "# Range of every model input, for interval bound propagation in dead-unit.",
        "# input-range = [0.0, 1.0]",
        "",
        "# L2 coefficient in the PyTorch convention (wd·w added to the gradient).",
        "# weight-decay = 1e-4",
        "",
        "# Layers that must not change between two checkpoints (steelyard compare).",
        '# frozen = ["encoder.*"]',
        "",
        "# Resource budgets for reading checkpoints (docs/safety.md); --budget KEY=VALUE wins.",
        "# [budget]",
        '# expansion-bytes = "512M"',
        '# checkpoint-expansion-bytes = "2G"',
        "# tensor-elements = 17179869184",
        "# layer-units = 33554432",
        "# load-seconds = 60",
        "",
    ]
    for spec in _known_rules().values():
        lines.append(f"# {spec.name}: {spec.summary}")
        lines.append(f"[rules.{spec.name}]")
        lines.append("enabled = true")
        lines.append(f'# severity = "{spec.severity.value}"')
        for key, value in spec.thresholds.items():
            if value is None:
                lines.append(f"# {key} = <unset>")
            elif isinstance(value, bool):
                lines.append(f"{key} = {'true' if value else 'false'}")
            elif isinstance(value, str):
                lines.append(f'{key} = "{value}"')
            else:
                lines.append(f"{key} = {value!r}")
        lines.append("")
    lines += [
        "# Per-layer settings, applied in order after the rule tables:",
        "# [[override]]",
        '# layers = "classifier*"',
        "# fan-in-norm = { ratio = 4.0 }",
        "",
        "# Accepted findings; a reason is required:",
        "# [[ignore]]",
        '# rule = "twin-units"',
        '# layers = "embed*"',
        '# reason = "tied embeddings duplicate rows by design"',
        "",
    ]
    return "\n".join(lines)


def _toml(value: Any) -> str:
    """A TOML 1.0 value: JSON's string escapes are TOML basic-string escapes, and repr of a
    float (inf, nan and exponents included) is a TOML float."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return json.dumps(value)
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_toml(v) for v in value) + "]"
    return repr(value)


def policy_text(policy: Policy) -> str:
    """The effective policy as TOML for ``steelyard policy --show``: ``--policy`` reads it
    back to the same policy (an unset threshold is a comment, as TOML has no null)."""
    lines = [f"# effective policy from {policy.source}", f"fail-on = {_toml(str(policy.fail_on))}"]
    if policy.input_range is not None:
        lines.append(f"input-range = {_toml(list(policy.input_range))}")
    if policy.weight_decay is not None:
        lines.append(f"weight-decay = {_toml(policy.weight_decay)}")
    if policy.frozen:
        lines.append(f"frozen = {_toml(list(policy.frozen))}")
    if policy.budget is not None:
        lines += ["", "[budget]"]
        for name, value in vars(policy.budget).items():
            lines.append(f"{name.replace('_', '-')} = {_toml(value)}")
    for spec in _known_rules().values():
        merged = policy.settings(spec.name, {"enabled": True, **spec.thresholds}, None)
        lines.append("")
        lines.append(f"[rules.{spec.name}]")
        for key, value in merged.items():
            lines.append(f"# {key} is unset" if value is None else f"{key} = {_toml(value)}")
    for override in policy.overrides:
        lines += ["", "[[override]]", f"layers = {_toml(override.layers)}"]
        for rule, settings in override.rules.items():
            inner = ", ".join(f"{k} = {_toml(v)}" for k, v in settings.items() if v is not None)
            lines.append(f"{rule} = {{ {inner} }}")
    for entry in policy.ignore:
        lines += [
            "",
            "[[ignore]]",
            f"rule = {_toml(entry.rule)}",
            f"layers = {_toml(entry.layers)}",
            f"reason = {_toml(entry.reason)}",
        ]
    return "\n".join(lines) + "\n"
