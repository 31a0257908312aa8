"""One problem, one finding: the audit of NEW and the comparison rules never report the same
NaN or the same dead units twice, and folding them never loses severity at the gate.

Files are written with the reference ``safetensors`` package; exit codes come from click's
CliRunner. Which units are dead is planted: a unit whose weights and bias are all zero outputs
a constant (the audit's ``constant`` test), and a NaN in a weight propagates to every output
of its unit (IEEE 754 arithmetic propagates NaN through sums and products).
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import safetensors.numpy
from click.testing import CliRunner

from steelyard import api
from steelyard.cli import app
from tests.conftest import mlp_tensors, write_safetensors

runner = CliRunner()


def _pair(tmp_path: Path, rng: np.random.Generator, damage: Any) -> tuple[Path, Path]:
    """A healthy OLD (6 → 16 → 4) and NEW = OLD with ``damage`` applied to a copy."""
    old = mlp_tensors(rng, (6, 16, 4))
    new = {k: v.copy() for k, v in old.items()}
    damage(new)
    return (
        write_safetensors(tmp_path / "old.safetensors", old),
        write_safetensors(tmp_path / "new.safetensors", new),
    )


def _run(old: Path, new: Path, *options: str) -> tuple[int, dict[str, Any]]:
    result = runner.invoke(app, ["compare", str(old), str(new), "-f", "json", *options])
    assert result.exit_code in (0, 1), result.output
    return result.exit_code, json.loads(result.stdout)


def _gated(document: dict[str, Any]) -> list[dict[str, Any]]:
    return [f for f in document["findings"] if not f["present_in_old"]]


def test_a_new_nan_is_one_error_finding(tmp_path: Path, rng: np.random.Generator) -> None:
    def damage(t: dict[str, np.ndarray]) -> None:
        t["fc1.weight"][3, 2] = np.nan
        t["fc1.bias"][3] = np.nan  # same unit, another tensor: still one problem

    old, new = _pair(tmp_path, rng, damage)
    # the reference reader sees exactly the two planted NaN (reference: safetensors.numpy)
    loaded = safetensors.numpy.load_file(str(new))
    assert sum(int(np.isnan(v).sum()) for v in loaded.values()) == 2
    code, document = _run(old, new)
    gated = _gated(document)
    assert [(f["rule"], f["layer"], f["units"], f["severity"]) for f in gated] == [
        ("new-nonfinite", "fc1", [3], "error")
    ]
    folded = gated[0]["evidence"]["audit_findings"]
    assert sorted((a["rule"], a["tensor"]) for a in folded) == [
        ("nonfinite", "fc1.bias"),
        ("nonfinite", "fc1.weight"),
    ]
    assert gated[0]["evidence"]["new_nonfinite"] == 2
    assert code == 1 and document["gate"]["passed"] is False
    assert document["summary"]["error"] == 1


@pytest.mark.parametrize(("fail_on", "code"), [("warning", 1), ("error", 0)])
def test_units_that_died_are_one_warning(
    tmp_path: Path, rng: np.random.Generator, fail_on: str, code: int
) -> None:
    def damage(t: dict[str, np.ndarray]) -> None:
        t["fc1.weight"][[2, 7]] = 0.0
        t["fc1.bias"][[2, 7]] = 0.0

    old, new = _pair(tmp_path, rng, damage)
    exit_code, document = _run(old, new, "--fail-on", fail_on)
    gated = _gated(document)
    assert [(f["rule"], f["layer"], f["units"], f["severity"]) for f in gated] == [
        ("units-died", "fc1", [2, 7], "warning")
    ]
    assert [a["rule"] for a in gated[0]["evidence"]["audit_findings"]] == ["dead-unit"]
    assert "audit of NEW (dead-unit)" in gated[0]["message"]
    assert exit_code == code and document["gate"]["passed"] is (code == 0)


def test_the_kept_finding_takes_the_worse_severity(
    tmp_path: Path, rng: np.random.Generator
) -> None:
    # 10 of 16 units dead: the audit's dead-unit is an error (share ≥ error-share 0.5) while
    # units-died is a warning; the one finding left must still fail an error gate
    def damage(t: dict[str, np.ndarray]) -> None:
        t["fc1.weight"][:10] = 0.0
        t["fc1.bias"][:10] = 0.0

    old, new = _pair(tmp_path, rng, damage)
    code, document = _run(old, new, "--fail-on", "error")
    # zeroing 10 of 16 rows also moves the layer by most of its norm: layer-drift, another
    # problem, stays
    assert {f["rule"] for f in _gated(document)} == {"units-died", "layer-drift"}
    gated = [f for f in _gated(document) if f["rule"] in ("units-died", "dead-unit")]
    assert [(f["rule"], f["units"], f["severity"]) for f in gated] == [
        ("units-died", list(range(10)), "error")
    ]
    assert gated[0]["evidence"]["audit_findings"][0]["severity"] == "error"
    assert code == 1 and document["gate"]["passed"] is False


def test_a_policy_severity_never_lowers_the_folded_finding(
    tmp_path: Path, rng: np.random.Generator
) -> None:
    def damage(t: dict[str, np.ndarray]) -> None:
        t["fc1.weight"][4] = 0.0
        t["fc1.bias"][4] = 0.0

    old, new = _pair(tmp_path, rng, damage)
    policy = tmp_path / "p.toml"
    policy.write_text('[rules.units-died]\nseverity = "info"\n')
    code, document = _run(old, new, "--fail-on", "warning", "--policy", str(policy))
    gated = _gated(document)
    assert [(f["rule"], f["severity"]) for f in gated] == [("units-died", "warning")]
    assert code == 1


def test_the_audit_finding_stays_when_its_comparison_rule_is_off(
    tmp_path: Path, rng: np.random.Generator
) -> None:
    def damage(t: dict[str, np.ndarray]) -> None:
        t["fc1.weight"][4] = 0.0
        t["fc1.bias"][4] = 0.0

    old, new = _pair(tmp_path, rng, damage)
    policy = tmp_path / "p.toml"
    policy.write_text("[rules.units-died]\nenabled = false\n")
    code, document = _run(old, new, "--fail-on", "warning", "--policy", str(policy))
    gated = _gated(document)
    assert [(f["rule"], f["units"], f["origin"]) for f in gated] == [("dead-unit", [4], "audit")]
    assert code == 1


def test_units_already_dead_in_old_do_not_keep_the_audit_duplicate(
    tmp_path: Path, rng: np.random.Generator
) -> None:
    # OLD has unit 4 dead, NEW units 4 and 6: the audit's finding names [4, 6] (new id, so
    # new), the comparison names [6]; 4 was already dead, so the comparison covers it all
    old_tensors = mlp_tensors(rng, (6, 16, 4))
    old_tensors["fc1.weight"][4] = 0.0
    old_tensors["fc1.bias"][4] = 0.0
    new_tensors = {k: v.copy() for k, v in old_tensors.items()}
    new_tensors["fc1.weight"][6] = 0.0
    new_tensors["fc1.bias"][6] = 0.0
    old = write_safetensors(tmp_path / "old.safetensors", old_tensors)
    new = write_safetensors(tmp_path / "new.safetensors", new_tensors)
    code, document = _run(old, new, "--fail-on", "warning")
    gated = _gated(document)
    assert [(f["rule"], f["units"]) for f in gated] == [("units-died", [6])]
    assert gated[0]["evidence"]["audit_findings"][0]["units"] == [4, 6]
    assert code == 1


def test_the_comparison_reports_what_it_covered(tmp_path: Path, rng: np.random.Generator) -> None:
    old_tensors = mlp_tensors(rng, (6, 16, 4))
    # NEW adds a head fc3 (4 → 5): a layer OLD does not have
    added = mlp_tensors(np.random.default_rng(3), (6, 16, 4, 5))
    new_tensors = {**old_tensors, "fc3.weight": added["fc3.weight"], "fc3.bias": added["fc3.bias"]}
    old = write_safetensors(tmp_path / "old.safetensors", old_tensors)
    new = write_safetensors(tmp_path / "new.safetensors", new_tensors)
    report = api.compare(old, new)
    document = report.to_dict()
    # sizes from the reference reader (reference: safetensors.numpy)
    sizes = {k: v.size for k, v in safetensors.numpy.load_file(str(new)).items()}
    total = sum(sizes.values())
    compared = sum(v for k, v in sizes.items() if not k.startswith("fc3"))
    coverage = document["coverage"]
    assert (coverage["layers_new"], coverage["matched_layers"], coverage["compared_layers"]) == (
        3,
        2,
        2,
    )
    assert coverage["parameters_new"] == total
    assert coverage["compared_parameters_new"] == compared
    assert coverage["compared_share_new"] == pytest.approx(compared / total)
    assert coverage["compared_share_old"] == 1.0
    table = " ".join(runner.invoke(app, ["compare", str(old), str(new)]).stdout.split())
    # The terminal's one number format: shares to three significant figures.
    assert (
        f"coverage 2/3 NEW layers matched, 2 compared by value: {100 * compared / total:.3g}% of "
        f"NEW's {total:,} parameters, 100% of OLD's {compared:,}"
    ) in table


def test_units_still_dead_while_others_revived_are_not_new(
    tmp_path: Path, rng: np.random.Generator
) -> None:
    # OLD: units 3 and 4 dead; NEW: unit 4 revived, 3 still dead. The audit of NEW names [3]
    # (another id than OLD's [3, 4]), yet nothing in it is new.
    old_tensors = mlp_tensors(rng, (6, 16, 4))
    new_tensors = {k: v.copy() for k, v in old_tensors.items()}
    old_tensors["fc1.weight"][[3, 4]] = 0.0
    old_tensors["fc1.bias"][[3, 4]] = 0.0
    new_tensors["fc1.weight"][3] = 0.0
    new_tensors["fc1.bias"][3] = 0.0
    old = write_safetensors(tmp_path / "old.safetensors", old_tensors)
    new = write_safetensors(tmp_path / "new.safetensors", new_tensors)
    code, document = _run(old, new, "--fail-on", "warning")
    assert _gated(document) == []
    dead = [f for f in document["findings"] if f["rule"] == "dead-unit"]
    assert [(f["units"], f["present_in_old"]) for f in dead] == [([3], True)]
    fc1 = next(e for e in document["layers"] if e["name"] == "fc1")
    assert fc1["units_revived"] == [4] and fc1["units_died"] == []
    assert code == 0
