"""The CLI offers exactly the formats the render tables draw, for every command (one source
of truth each way: a format added to a table and not to the CLI, or the reverse, fails here)."""

from __future__ import annotations

import pytest

from steelyard.cli_options import AuditFormat, CompareFormat, TimelineFormat
from steelyard.render.compare_formats import COMPARE_FORMATS
from steelyard.render.report_formats import AUDIT_FORMATS


def test_cli_formats_equal_the_render_tables() -> None:
    assert {f.value for f in AuditFormat} == set(AUDIT_FORMATS)
    assert {f.value for f in CompareFormat} == set(COMPARE_FORMATS)


@pytest.mark.parametrize("fmt", sorted({f.value for f in TimelineFormat}))
def test_timeline_renders_every_format_it_offers(fmt: str) -> None:
    from pathlib import Path

    import steelyard

    text = steelyard.timeline([Path("fixtures/timeline_run")]).render(fmt)
    assert text.strip()
    with pytest.raises(ValueError):
        steelyard.timeline([Path("fixtures/timeline_run")]).render("sarif")
