"""Numbers in rule messages follow the terminal reports' one number rule.

``steelyard.numbers`` (which rules may import) and ``steelyard.render.text`` (which they may
not) must agree: counts with thousands separators as Python's format specification writes them
(PEP 378, the ``,`` option), measured values to three significant figures (the ``g`` presentation
type), shares as percentages. The values are drawn at random over many magnitudes, so the check
is not tuned to a few examples.
"""

from __future__ import annotations

import math
import re

import numpy as np
import pytest

from steelyard import numbers
from steelyard.render import text


def test_counts_have_thousands_separators() -> None:
    rng = np.random.default_rng(5)
    for value in [0, 1, 999, 1000, 30522, 2237, *rng.integers(0, 10**12, 200).tolist()]:
        shown = numbers.count(int(value))
        # PEP 378: groups of three digits separated by commas.
        assert re.fullmatch(r"\d{1,3}(,\d{3})*", shown), shown
        assert int(shown.replace(",", "")) == value
        assert shown == text.count(int(value))


def test_measured_values_match_the_terminal_rule() -> None:
    rng = np.random.default_rng(6)
    values = rng.standard_normal(400) * 10.0 ** rng.uniform(-9, 9, 400)
    for value in [*values.tolist(), 0.0, 999.6, 1000.0, -0.0412, 9.286, 7.2e-05]:
        shown = numbers.measured(value)
        assert shown == text.number(value)
        parsed = float(shown.replace(",", ""))
        # Three significant figures: within half a unit of the third digit.
        assert parsed == pytest.approx(value, rel=5e-3, abs=0.0)
    assert numbers.measured(None) == "—"
    assert numbers.measured(math.inf) == "inf" and numbers.measured(-math.inf) == "-inf"
    assert numbers.measured(math.nan) == "NaN"


def test_shares_never_round_to_the_ends() -> None:
    rng = np.random.default_rng(7)
    for share in [*rng.uniform(0, 1, 300).tolist(), 0.0, 1.0, 1e-9, 1 - 1e-9, 0.9996]:
        shown = numbers.percent(share)
        assert shown == text.percent(share)
        if 0 < share < 1:
            assert shown not in ("0%", "100%"), (share, shown)


def test_rule_messages_use_separators() -> None:
    # A message of the dead-unit rule on a layer wider than a thousand units (the audit of a
    # checkpoint written with the safetensors reference library).
    import tempfile
    from pathlib import Path

    from safetensors.numpy import save_file

    import steelyard

    rng = np.random.default_rng(8)
    weights = (rng.standard_normal((2048, 16)) / 4).astype(np.float32)
    weights[:1500] = 0.0  # 1,500 constant-zero units
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / "wide.safetensors"
        save_file({"fc1.weight": weights, "fc2.weight": (rng.standard_normal((4, 2048)) / 40).astype(np.float32)}, str(path))
        report = steelyard.audit(path, policy=steelyard.policy.Policy())
    dead = [f for f in report.audits[0].findings if f.rule == "dead-unit"]
    assert dead and dead[0].message.startswith("1,500 of 2,048 units are dead")
