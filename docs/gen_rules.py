"""Regenerate docs/rules.md from the rule modules' docstrings (their doc pages).

Run ``python docs/gen_rules.py``; a test fails when the committed file is out of date.
"""

from __future__ import annotations

import inspect
import sys
from pathlib import Path
from typing import Any

from steelyard.rules import Command, registry
from steelyard.rules.scoring import __doc__ as SCORING_DOC

HEADER = """# Rules

Every rule steelyard runs, generated from the rule modules (`python docs/gen_rules.py`).
Each rule's name is its ID in reports and policy files; every threshold is a default that a
policy can change (see `docs/policy.md`). Rules work on each layer's canonical weights
`W[out, fan_in]` (kernels flattened) and bias `b`.

The audit checks weight health only. Passing it does not show that a model is accurate, fair
or safe: validate on held-out data and follow your organisation's model-risk process and
applicable rules before deployment.

## Ranking

Findings are ordered by severity, then score (higher first), then rule, then location.

"""


def _section(spec: Any, heading: str, body: str) -> list[str]:
    """One rule's part of the page: heading, defaults, one-line why, doc page."""
    thresholds = ", ".join(
        f"`{k}` = {'unset' if v is None else v}" for k, v in spec.thresholds.items()
    ) or "none"
    return [
        f"\n{heading} {spec.name}\n",
        f"*Default severity:* {spec.severity.value}. *Thresholds:* {thresholds}.\n",
        f"*Why, in one line:* {spec.summary}.\n",
        body + "\n",
    ]


def render() -> str:
    """The whole Markdown page."""
    parts = [HEADER, (SCORING_DOC or "").strip(), "\n"]
    for spec in registry(Command.AUDIT).values():
        body = spec.doc.strip().replace("\n**", "\n\n**").replace("\n\n\n", "\n\n")
        parts += _section(spec, "##", body)
    parts.append(
        "\n## Comparison rules (`steelyard compare`)\n\n"
        "These run on two checkpoints; see `compare.md`. The same policy file configures them.\n"
    )
    for compare_spec in registry(Command.COMPARE).values():
        parts += _section(compare_spec, "###", inspect.cleandoc(compare_spec.doc))
    return "\n".join(parts).replace("\n\n\n", "\n\n")


POLICY_HEADER = """# Policy

A policy holds the thresholds that gate the audit, in the repository next to the model code.
steelyard reads, in order: the file given with `--policy FILE`; else the nearest
`steelyard.toml`; else `[tool.steelyard]` in the nearest `pyproject.toml`, both found by
walking up from the working directory. The report header says which one was used;
`steelyard policy --show` prints the effective policy and `steelyard policy --init` writes the
starter file below. An unknown key, a wrong type or an out-of-range value exits 2 with a line
naming the key and the file (and a "did you mean" suggestion for near misses); so does a
policy file that is not a regular file of at most 4 MB, nests too deeply, or holds an integer
too large to use.

A `pyproject.toml` found in a parent folder that cannot be read or parsed is passed over when
its text does not mention `tool.steelyard` (someone else's broken project file must not break
every run below it); one that mentions it is read, and its error exits 2.

## Keys

| key | type | meaning |
| --- | --- | --- |
| `fail-on` | `"error"`, `"warning"`, `"info"`, `"never"` | lowest severity that fails the gate (the CLI's `--fail-on` wins) |
| `input-range` | `[low, high]` | range of every model input; enables interval bound propagation in `dead-unit` |
| `weight-decay` | number >= 0 | L2 coefficient in the PyTorch convention (wd·w added to the gradient), for `unsupported-weight`'s equilibrium ratio |
| `frozen` | list of globs | layers that must not change between two checkpoints (`steelyard compare`) |
| `[budget]` | table | resource budgets for reading checkpoints: `expansion-bytes`, `checkpoint-expansion-bytes`, `tensor-elements`, `layer-units`, `load-seconds` (sizes accept `512M`, `2G`); each within a fixed range (see `safety.md`); the CLI's `--budget KEY=VALUE` wins |
| `[rules.<rule>]` | table | per rule: `enabled` (bool), `severity` (`"error"`, `"warning"`, `"info"`: replaces the rule's own choice), and each of the rule's thresholds (see `rules.md`) |
| `[[override]]` | array of tables | `layers = "<glob over layer names>"` plus `<rule> = { key = value, ... }` tables; applied in order after `[rules.*]`, so later overrides win |
| `[[ignore]]` | array of tables | `rule`, `layers` (glob, default `*`) and a required `reason`: findings silenced, counted in the report |

In `pyproject.toml` the same keys go under `[tool.steelyard]`, e.g. `[tool.steelyard.rules.fan-in-norm]`
and `[[tool.steelyard.override]]`.

## Example

```toml
fail-on = "warning"
input-range = [0.0, 1.0]

[rules.twin-units]
include-embeddings = false

[[override]]
layers = "classifier*"
fan-in-norm = { ratio = 4.0, max-norm = 3.0 }

[[ignore]]
rule = "untrained-layer"
layers = "pooler*"
reason = "the pooler is unused downstream and was never trained"
```

## The starter file (every default)

"""


def render_policy() -> str:
    """docs/policy.md: the keys, an example, and the generated starter file."""
    from steelyard.policy_file import starter_text

    return POLICY_HEADER + "```toml\n" + starter_text() + "```\n"


def main() -> int:
    """Write docs/rules.md and docs/policy.md next to this script."""
    for name, text in (("rules.md", render()), ("policy.md", render_policy())):
        target = Path(__file__).with_name(name)
        target.write_text(text, encoding="utf-8")
        print(f"wrote {target}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
