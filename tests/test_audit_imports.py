"""What an audit imports: nothing its checkpoint does not need (each import is start-up time
paid by every command, measured by bench/startup.py)."""

from __future__ import annotations

from pathlib import Path

import numpy as np
from safetensors.numpy import save_file

from tests._fresh_process import audited_imports

DEMO = Path(__file__).resolve().parents[1] / "fixtures" / "demo" / "pumpwear-nightly-bad.keras"

def _never_trained(tmp_path: Path) -> Path:
    rng = np.random.default_rng(3)
    path = tmp_path / "model.safetensors"
    save_file({
        "fc1.weight": (rng.standard_normal((96, 64)) / 8).astype(np.float32),
        "fc2.weight": (rng.standard_normal((32, 96)) / 10).astype(np.float32),
    }, str(path))
    return path


def test_an_audit_does_not_import_numpy_ma(tmp_path: Path) -> None:
    """numpy.unique (and numpy.quantile through it) imports numpy.ma on its first call, 16 ms
    here; the rules use stats.numerics.distinct and quantile_of. Two audits in which every
    rule runs: never-trained draws (untrained-layer's KS probes, the twin search) and the
    demo's Keras file, whose optimizer state makes unsupported-weight take its quantiles."""
    for path in (_never_trained(tmp_path), DEMO):
        findings, imported = audited_imports(path, "numpy.ma")
        assert findings > 0  # the rules really ran
        assert not imported["numpy.ma"], path


def test_an_audit_of_a_plain_checkpoint_does_not_import_the_adapter_loader(
    tmp_path: Path,
) -> None:
    """dead-unit and adapter-update ask rules._adapters, which answers without the adapter
    package (about 8 ms of start-up) for a checkpoint that is no adapter."""
    findings, imported = audited_imports(_never_trained(tmp_path), "steelyard.loaders.adapter")
    assert findings > 0
    assert not imported["steelyard.loaders.adapter"]


def test_the_adapter_view_answers_for_an_adapter() -> None:
    """Once the adapter loader is imported (it must be, to make an adapter checkpoint), the
    rules' view gives the loader's own answer: the adapter's information for a LoRA adapter
    written by peft (fixtures/gen_adapters.py), None for its base."""
    from steelyard.api import load
    from steelyard.loaders.adapter import adapter_of as loader_answer
    from steelyard.rules._adapters import adapter_of

    adapters = Path(__file__).resolve().parents[1] / "fixtures" / "adapters"
    adapter = load(adapters / "lora_mlp")
    info = adapter_of(adapter)
    assert info is not None and info is loader_answer(adapter)
    assert len(info.modules) > 0
    assert adapter_of(load(adapters / "base_mlp")) is None
