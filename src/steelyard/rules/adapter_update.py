"""``adapter-update``: a LoRA/DoRA adapter whose update does nothing, wastes its rank, swamps
the layer it adapts, or does not match its own configuration.

**What it checks.** Only checkpoints read from an adapter (``adapter_model.safetensors`` +
``adapter_config.json``, alone or with ``--base``); on any other checkpoint it does nothing.
For each adapted module the update is ΔW = s·B·A in the layer's canonical orientation
(s = lora_alpha/r, or lora_alpha/√r with rank-stabilised LoRA; Hu et al. 2021, "LoRA:
Low-Rank Adaptation of Large Language Models"; Kalajdzievski 2023, "A Rank Stabilization
Scaling Factor for Fine-Tuning with LoRA"). Its singular values σ₁ ≥ … ≥ σ_k come from the
small factors, never from the ``[out, in]`` product: with the ``r×r`` Gram matrices
G_B = (s·B)ᵀ(s·B) and G_A = A·Aᵀ, ΔWᵀΔW = Aᵀ G_B A has the non-zero eigenvalues of G_B·G_A,
which are those of the symmetric G_A^{1/2} G_B G_A^{1/2}, so σᵢ² are its eigenvalues
(σᵢ² to about machine epsilon times σ₁², so a zero value shows as about 1.5e-8 σ₁,
far inside the unused-rank share);
‖ΔW‖_F = √Σσᵢ².

1. *Zero update.* σ₁ = 0 exactly: B (or A, or the scale) is all zeros. peft initialises B to
   zeros so that training starts from the base model (Hu et al. 2021, §4.1), so an all-zero
   B means the adapter was never trained, or was saved before training wrote its weights.
2. *Unused rank.* Singular values below ``unused-rank-share`` (default 0.01) × σ₁. The
   effective rank k_eff = #{σᵢ ≥ share·σ₁} is what the update really uses; the remaining
   r − k_eff rank-one components cost parameters and memory and add nothing but noise. A
   trained adapter whose update collapsed to one or two directions often had a rank set far
   above what the data supports (common practice, no source for the default share).
3. *Update dwarfs the base* (``--base`` only). ρ = ‖ΔW‖_F / ‖W‖_F above ``max-update-ratio``
   (default 1.0): the fine-tune replaced the layer rather than adapting it, typically a
   learning rate or alpha far too large, or an adapter paired with the wrong base. Typical
   LoRA updates are a small fraction of the base weight (common practice, no source for the
   default). Every adapted layer's ρ is also listed in the report's notes, rounded into
   bands, so the size of the fine-tune is visible when nothing is wrong.
4. *Configuration mismatch.* A name of ``target_modules`` (after ``exclude_modules``) that
   no stored module matches (peft would leave that module's update at zero), or a stored
   module that ``target_modules`` does not name (it would not be loaded onto the model).
   Matching is peft's: a list entry matches a module equal to it or ending in ``.<entry>``; a
   single string is a full-match regular expression; ``all-linear`` is not checked.

Non-finite factors are reported by ``nonfinite`` (the factors are counted tensors), not here.

**Why it matters.** An adapter is shipped to change a base model in a few layers; each of
these defects means it does not do what the fine-tune was meant to do: a zero update ships
the base model unchanged under a new name, an update many times the base weight destroys
what pre-training learned (LoRA is meant to be a small low-rank correction, Hu et al. 2021,
§4), and a config that names other modules than the file holds makes peft silently load
nothing for them (peft 0.21 ``inject_adapter`` and ``set_peft_model_state_dict``). Unused
rank only costs memory and parameters, so it is informational.

**Severity and score.** Zero update: error, score ``scoring.score(1, 1)`` = 100 (the whole
layer is implicated). Update dwarfs the base: warning, ``scoring.score(1, ρ / limit)``.
Configuration mismatch: warning, ``scoring.score(1, 1)``. Unused rank: info,
``scoring.score((r − k_eff)/r, share / max(σ_{k_eff+1}/σ₁, 1e-12))``, the share of the rank
unused and how far below the limit the first unused singular value lies.

**What to do.** Zero update: retrain, or save after training (``save_pretrained`` after the
optimizer steps); check that the right adapter file was shipped. Unused rank: lower ``r``
(or use ``rank_pattern``) for those modules. Dwarfing update: check the base model named in
``adapter_config.json`` is the one paired, and the learning rate and alpha. Configuration
mismatch: fix ``target_modules`` or re-save the adapter with the modules it was trained on.
"""

from __future__ import annotations

import math
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from steelyard.findings import Finding, Severity
from steelyard.graph import Layer, LayerKind
from steelyard.numbers import count, measured
from steelyard.rules._adapters import adapter_of
from steelyard.rules.base import (
    AuditContext,
    RuleSettings,
    RuleSpec,
    fraction,
    layer_finding,
    model_finding,
    threshold,
)
from steelyard.rules.scoring import score

if TYPE_CHECKING:
    from steelyard.loaders.adapter import AdaptedModule

#: Bands of ‖ΔW‖/‖W‖ listed in the notes (upper bounds).
_BANDS = (0.001, 0.01, 0.1, 1.0)


@dataclass(frozen=True)
class AdapterUpdateSettings:
    """Thresholds of ``adapter-update``."""

    unused_rank_share: float = fraction(0.01)
    max_update_ratio: float = threshold(1.0)


@dataclass(frozen=True)
class Spectrum:
    """The update's singular values and effective rank (the rule's public measurement)."""

    singular_values: np.ndarray
    """Descending, float64."""
    rank: int
    """Configured rank r."""
    effective_rank: int
    """#{σᵢ ≥ share·σ₁} (0 for a zero update)."""
    frobenius: float


def update_spectrum(module: AdaptedModule, share: float) -> Spectrum:
    """Singular values and effective rank of ``module``'s ΔW, from its factors alone."""
    # Imported here: only an adapter's audit gets this far (see rules._adapters).
    from steelyard.loaders.adapter.factors import singular_values

    values = singular_values(module.factors())
    top = float(values[0]) if values.size else 0.0
    effective = int(np.count_nonzero(values >= share * top)) if top > 0 else 0
    return Spectrum(values, module.rank, effective, float(np.sqrt(np.sum(values**2))))


def _band(ratio: float) -> str:
    low = 0.0
    for high in _BANDS:
        if ratio < high:
            return f"‖ΔW‖/‖W‖ in [{low:g}, {high:g})"
        low = high
    return f"‖ΔW‖/‖W‖ ≥ {_BANDS[-1]:g}"


def check_layer(
    ctx: AuditContext, settings: RuleSettings[AdapterUpdateSettings], layer: Layer
) -> Iterator[Finding]:
    """Zero update, unused rank and (with a base) an update that dwarfs the base layer."""
    info = adapter_of(ctx.checkpoint)
    module = None if info is None else info.modules.get(layer.name)
    if module is None:
        return
    limits = settings.for_layer(layer)
    spectrum = update_spectrum(module, limits.unused_rank_share)
    values = spectrum.singular_values
    evidence: dict[str, object] = {
        "rank": module.rank,
        "effective_rank": spectrum.effective_rank,
        "scale": module.scale,
        "update_norm": spectrum.frobenius,
    }
    if spectrum.frobenius == 0.0:
        factors = module.factors()
        # B sits in the left factor (scale·B), or transposed in the right for an embedding.
        b_side = factors.right if module.kind is LayerKind.EMBEDDING else factors.left
        zero_b = module.scale != 0.0 and not np.any(b_side)
        cause = (
            "B is all zeros (its initial value)"
            if zero_b
            else "the scale is 0"
            if module.scale == 0.0
            else "B·A is all zeros"
        )
        yield layer_finding(
            RULE.name,
            layer,
            severity=Severity.ERROR,
            score=score(1.0, 1.0),
            message=f"the adapter's update is exactly zero: {cause}; it changes nothing",
            hint="the adapter was never trained or was saved before training; ship the trained "
            "adapter",
            evidence=evidence,
        )
        return
    base_layer = module.base_layer
    if base_layer is not None:
        base_norm = float(np.sqrt(np.sum(ctx.stats.row_norms(base_layer).astype(np.float64) ** 2)))
        ctx.stats.release(base_layer)
        ratio = spectrum.frobenius / base_norm if base_norm > 0 else math.inf
        evidence["base_norm"] = base_norm
        evidence["update_ratio"] = ratio
        ctx.notes.add(RULE.name, _band(ratio), layer.name)
        if ratio > limits.max_update_ratio:
            yield layer_finding(
                RULE.name,
                layer,
                severity=Severity.WARNING,
                score=score(
                    1.0, ratio / limits.max_update_ratio if limits.max_update_ratio else math.inf
                ),
                message=f"the update is {measured(ratio)}× the base weight (‖ΔW‖/‖W‖, limit "
                f"{limits.max_update_ratio:g}): it replaces the layer rather than adapting it",
                hint="check that the base model is the one the adapter was trained on, and check the "
                "learning rate and lora_alpha",
                evidence=evidence,
            )
    unused = module.rank - spectrum.effective_rank
    if unused > 0:
        below = (
            float(values[spectrum.effective_rank] / values[0])
            if values.size > spectrum.effective_rank
            else 0.0
        )
        share = limits.unused_rank_share
        yield layer_finding(
            RULE.name,
            layer,
            severity=Severity.INFO,
            score=score(unused / module.rank, share / max(below, 1e-12)),
            message=f"the update uses {count(spectrum.effective_rank)} of its rank {count(module.rank)}: "
            f"{count(unused)} singular values are below {share:g} of the largest",
            hint="lower this module's LoRA rank (its rank_pattern entry in adapter_config.json) "
            "to save parameters",
            evidence={**evidence, "singular_values": [float(v) for v in values[:64]]},
        )


def finish(ctx: AuditContext, settings: RuleSettings[AdapterUpdateSettings]) -> Iterator[Finding]:
    """Target modules named in the config but absent from the file, and the reverse."""
    info = adapter_of(ctx.checkpoint)
    if info is None or not info.config.present:
        return
    config = info.config
    source = Path(ctx.checkpoint.path)
    stored = {m.name: m for m in info.modules.values()}
    # Module names as peft saw them (before pairing renamed them after the base's layers).
    original = {key: name for name, m in stored.items() for key in (_module_key(m),)}
    for key, layer_name in sorted(original.items()):
        if config.targets(key, source) is False:
            yield model_finding(
                RULE.name,
                severity=Severity.WARNING,
                layer=layer_name,
                tensor=stored[layer_name].a,
                score=score(1.0, 1.0),
                message=f"module {key!r} holds LoRA factors but target_modules does not name it "
                "(peft would not load them)",
                hint="fix target_modules in adapter_config.json or remove the stray factors",
                evidence={"module": key},
            )
    targets = config.target_modules
    if isinstance(targets, tuple):
        for name in targets:
            if not any(key == name or key.endswith("." + name) for key in original):
                yield model_finding(
                    RULE.name,
                    severity=Severity.WARNING,
                    score=score(1.0, 1.0),
                    message=f"target_modules names {name!r} but the file holds no factors for "
                    "it (peft would leave that update at zero)",
                    hint="re-save the adapter with every targeted module, or drop the name",
                    evidence={"target": name},
                )


def _module_key(module: AdaptedModule) -> str:
    """The module's name as peft saved it (from its ``lora_A`` tensor name)."""
    name = module.a
    for marker in (".lora_A", ".lora_embedding_A"):
        if marker in name:
            name = name[: name.index(marker)]
            break
    prefix = "base_model.model."
    return name[len(prefix) :] if name.startswith(prefix) else name


RULE = RuleSpec(
    name="adapter-update",
    severity=Severity.WARNING,
    settings=AdapterUpdateSettings,
    summary="a fine-tuning adapter whose update is zero, wastes rank, swamps its base layer, "
    "or does not match its own target_modules",
    doc=__doc__ or "",
    per_layer=check_layer,
    finish=finish,
)
