"""Property: a baseline never silences a finding of a checkpoint it was not written for.

Random runs of checkpoints (several folders, stems and formats, the same tensor names and
defects in many of them) and random baselines written from random subsets of them, through the
real file round trip (``baseline_text`` → ``read_baseline`` → ``apply_baseline``).
"""

from __future__ import annotations

from pathlib import Path

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from steelyard.baseline import apply_baseline, baseline_text, checkpoint_key, read_baseline
from steelyard.findings import Finding, Severity
from steelyard.report import CheckpointAudit, Report

_FOLDERS = ("models", "models/v2", "other")
_STEMS = ("cls", "head", "encoder")
_ENDINGS = (".safetensors", ".onnx", ".weights.h5", ".npz", ".safetensors.index.json")


def _finding(rule: str, tensor: str, units: tuple[int, ...], checkpoint: str) -> Finding:
    return Finding(
        rule=rule,
        severity=Severity.ERROR,
        layer=tensor.split(".")[0],
        tensor=tensor,
        units=units,
        score=1.0,
        message="m",
        hint="h",
        checkpoint=checkpoint,
    )


findings = st.lists(
    st.tuples(
        st.sampled_from(("dead-unit", "nonfinite", "twin-units")),
        st.sampled_from(("fc1.weight", "fc2.weight")),
        st.tuples(st.integers(0, 3)),
    ),
    max_size=4,
    unique=True,
)
checkpoints = st.dictionaries(
    st.tuples(st.sampled_from(_FOLDERS), st.sampled_from(_STEMS), st.sampled_from(_ENDINGS)).map(
        lambda t: f"{t[0]}/{t[1]}{t[2]}"
    ),
    findings,
    min_size=1,
    max_size=6,
)


def _report(run: dict[str, list[tuple[str, str, tuple[int, ...]]]]) -> Report:
    audits = tuple(
        CheckpointAudit(
            checkpoint={"path": path, "format": "safetensors", "tensors": 2, "parameters": 10},
            layers=(),
            findings=tuple(_finding(*f, checkpoint=path) for f in found),
            gradient_source=None,
        )
        for path, found in run.items()
    )
    return Report(
        tool_version="t", created="c", fail_on="error", policy_source="p", audits=audits
    )


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(accepted=checkpoints, run=checkpoints)
def test_a_baseline_matches_only_findings_of_its_own_checkpoints(
    tmp_path: Path,
    accepted: dict[str, list[tuple[str, str, tuple[int, ...]]]],
    run: dict[str, list[tuple[str, str, tuple[int, ...]]]],
) -> None:
    file = tmp_path / "baseline.json"
    file.write_text(baseline_text(_report(accepted).audits, "t"), encoding="utf-8")
    result = apply_baseline(_report(run), read_baseline(file))
    accepted_pairs = {
        (checkpoint_key(path), _finding(*f, checkpoint=path).id)
        for path, found in accepted.items()
        for f in found
    }
    for audit in result.audits:
        key = checkpoint_key(str(audit.checkpoint["path"]))
        for finding in audit.baselined:
            # never silenced unless accepted for this very checkpoint
            assert (key, finding.id) in accepted_pairs
        for finding in audit.findings:
            # and everything accepted for it is silenced (the match is not simply "never")
            assert (key, finding.id) not in accepted_pairs
    assert result.baseline is not None
    assert result.baseline["matched"] == sum(len(a.baselined) for a in result.audits)


def test_reexports_beside_each_other_are_one_checkpoint() -> None:
    # The identity documented in docs/ci.md: the path without the format's ending.
    assert checkpoint_key("models/cls.safetensors") == checkpoint_key("models/cls.onnx")
    assert checkpoint_key("models/cls.weights.h5") == "models/cls"
    assert checkpoint_key("models/cls.safetensors.index.json") == "models/cls"
    assert checkpoint_key("models/cls.onnx") != checkpoint_key("other/cls.onnx")
    assert checkpoint_key("models/cls.onnx") != checkpoint_key("models/head.onnx")
