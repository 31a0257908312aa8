"""Regenerate docs/rules.md from the rule modules' docstrings (their doc pages).

Run ``python docs/gen_rules.py``; a test fails when the committed file is out of date.
"""

from __future__ import annotations

import sys
from pathlib import Path

from steelyard.rules import registry
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


def render() -> str:
    """The whole Markdown page."""
    parts = [HEADER, (SCORING_DOC or "").strip(), "\n"]
    for spec in registry().values():
        thresholds = ", ".join(
            f"`{k}` = {'unset' if v is None else v}" for k, v in spec.thresholds.items()
        ) or "none"
        parts += [
            f"\n## {spec.name}\n",
            f"*Default severity:* {spec.severity.value}. *Thresholds:* {thresholds}.\n",
            f"*Why, in one line:* {spec.summary}.\n",
            spec.doc.strip().replace("\n**", "\n\n**").replace("\n\n\n", "\n\n") + "\n",
        ]
    return "\n".join(parts).replace("\n\n\n", "\n\n")


def main() -> int:
    """Write docs/rules.md next to this script."""
    target = Path(__file__).with_name("rules.md")
    target.write_text(render(), encoding="utf-8")
    print(f"wrote {target}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
