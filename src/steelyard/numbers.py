"""Numbers in the words people read: rule messages and hints.

The same rule as the terminal reports' (:mod:`steelyard.render.text`), kept here because rules
and comparison checks are engine modules and may not import a renderer: counts are exact with
thousands separators; measured values have three significant figures, with separators from a
thousand up and powers of ten below a ten-thousandth; shares are percentages to three
significant figures that never round a partial share to 0 % or 100 %. Unit, head and token
indices are names, not counts, and stay bare. Limits from the policy are shown as written
(``{limit:g}``).
"""

from __future__ import annotations

import math


def count(value: int) -> str:
    """An exact count: 1234567 → ``1,234,567``."""
    return f"{int(value):,}"


def measured(value: float | None) -> str:
    """A measured value to three significant figures: 0.457, 9.29, 12,300, 7.2e-05; ``—``
    when not measured, ``NaN``, ``inf`` and ``-inf`` as such."""
    if value is None:
        return "—"
    value = float(value)
    if math.isnan(value):
        return "NaN"
    if math.isinf(value):
        return "inf" if value > 0 else "-inf"
    if value == 0:
        return "0"
    rounded = float(f"{value:.3g}")  # 999.6 → 1000.0 before the magnitude is read
    if abs(rounded) >= 1000:
        return f"{rounded:,.0f}"
    return f"{rounded:.3g}"


def percent(share: float) -> str:
    """A share in [0, 1] as a percentage to three significant figures: ``12.3%``, ``<0.001%``,
    ``>99.9%``."""
    if share <= 0:
        return "0%"
    if share >= 1:
        return "100%"
    text = f"{100 * share:.3g}"
    if float(text) >= 100:
        return ">99.9%"
    if float(text) < 0.001:
        return "<0.001%"
    return f"{text}%"


def plural(value: int, word: str, many: str | None = None) -> str:
    """``1 unit``, ``2 units``, ``1,024 tokens`` (``many`` for irregular plurals)."""
    return f"{int(value):,} {word if value == 1 else (many or word + 's')}"
