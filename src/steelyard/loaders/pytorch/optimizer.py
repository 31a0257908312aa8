"""A torch optimizer's state dict, mapped to the model's tensor names.

``optimizer.state_dict()`` keys its state by parameter id, not name: the ids are tied to names
through the param groups' ``param_names`` when the file has them, else through the order of
the state dict's trainable tensors. State that cannot be tied to names without guessing is
left out with a note.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np

from steelyard.dtypes import is_float_name
from steelyard.graph import OptimizerSlots, OptimizerState, Tensor, TensorRole
from steelyard.loaders.pytorch.stand_ins import TensorRef
from steelyard.loaders.pytorch.state_dict import OPTIMIZER_KEYS, Found, brief, strip_prefixes
from steelyard.loaders.pytorch.storages import StorageSource, make_tensor

#: Buffers ``named_parameters()`` leaves out (batch-norm statistics).
_BUFFER_LEAVES = {"running_mean", "running_var", "num_batches_tracked"}


class _Ambiguous(Exception):
    """The optimizer state cannot be tied to tensor names without guessing."""


def optimizer_state(
    path: Path,
    container: Mapping[Any, Any],
    found: Found,
    source: StorageSource,
    order: str,
    notes: list[str],
) -> OptimizerState | None:
    """The optimizer state stored beside the weights in ``container``, by tensor name; None
    (with a note saying why) when there is none or it cannot be mapped without guessing."""
    keys = [k for k in OPTIMIZER_KEYS if k in container]
    if not keys:
        return None
    key = keys[0]
    value = container[key]
    if isinstance(value, list):
        if len(value) != 1:
            notes.append(f"{key!r} holds {len(value)} optimizers; their state was not mapped")
            return None
        value = value[0]
    if not (
        isinstance(value, Mapping)
        and isinstance(value.get("state"), Mapping)
        and isinstance(value.get("param_groups"), list)
    ):
        notes.append(f"{key!r} is not a torch optimizer state dict; it was not read")
        return None
    try:
        return _map_optimizer(path, key, value, found, source, order, notes)
    except _Ambiguous as exc:
        notes.append(
            f"the optimizer state in {key!r} could not be mapped to tensor names "
            f"unambiguously ({exc}); it was not used"
        )
        return None


def _plain(value: object) -> bool:
    """A hyper-parameter value cheap to compare: a scalar or a short flat tuple/list of them.
    Anything else is never compared (two separately built memo-shared lists of depth n take
    2^n steps to compare)."""
    scalar = (int, float, str, bool, type(None))
    if isinstance(value, str):
        return len(value) <= 256
    if isinstance(value, int) and not isinstance(value, bool):
        return value.bit_length() <= 128
    if isinstance(value, scalar):
        return True
    return (
        isinstance(value, (tuple, list))
        and len(value) <= 16
        and all(
            isinstance(v, (float, bool)) or (type(v) is int and v.bit_length() <= 128)
            for v in value
        )
    )


def _group_value(groups: list[Mapping[str, Any]], name: str, notes: list[str]) -> Any:
    values = [g.get(name) for g in groups if name in g]
    if not values:
        return None
    if not all(_plain(v) for v in values):
        notes.append(f"param groups hold a structured {name}; it was not read")
        return None
    first = values[0]
    if any(v != first for v in values[1:]):
        numbers = [v for v in values if isinstance(v, (int, float)) and not isinstance(v, bool)]
        if name == "weight_decay" and numbers:
            notes.append(
                f"param groups use different weight decay ({sorted(set(numbers))}); "
                "the largest is reported"
            )
            return max(numbers)
        notes.append(f"param groups disagree on {name}; the first group's value is reported")
    return first


def _number(value: object) -> float | None:
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        return float(value)
    return None


def _map_optimizer(
    path: Path,
    key: str,
    value: Mapping[Any, Any],
    found: Found,
    source: StorageSource,
    order: str,
    notes: list[str],
) -> OptimizerState:
    state: Mapping[Any, Any] = value["state"]
    groups = value["param_groups"]
    if not groups or not all(isinstance(g, Mapping) for g in groups):
        raise _Ambiguous("its param_groups are malformed")
    ids: list[int] = []
    for group in groups:
        params = group.get("params")
        if not isinstance(params, list) or not all(
            isinstance(p, int) and not isinstance(p, bool) for p in params
        ):
            raise _Ambiguous("a param group does not list integer parameter ids")
        ids.extend(params)
    if len(set(ids)) != len(ids):
        raise _Ambiguous("a parameter id appears twice")
    names = _names_for(ids, groups, found)
    positions = dict(zip(ids, names, strict=True))
    model = found.tensors

    kind_slots: set[str] = set()
    distinct = {id(entry): entry for entry in state.values() if isinstance(entry, Mapping)}
    for entry in distinct.values():  # entries shared through the memo are read once
        kind_slots.update(k for k in entry if isinstance(k, str))
    decoupled_flag = _group_value(groups, "decoupled_weight_decay", notes)
    decoupled: bool | None = decoupled_flag if isinstance(decoupled_flag, bool) else None
    if {"exp_avg", "exp_avg_sq"} <= kind_slots:
        kind = "adamw" if decoupled else "adam"
        first, second = "exp_avg", "exp_avg_sq"
        if decoupled is None:
            notes.append(
                "the optimizer state does not say whether its weight decay was "
                "decoupled (AdamW) or added to the gradient (Adam)"
            )
    elif "square_avg" in kind_slots:
        kind, first, second = "rmsprop", "grad_avg", "square_avg"
        decoupled = False
    elif "momentum_buffer" in kind_slots or (not kind_slots and "momentum" in groups[0]):
        kind, first, second = "sgd", "momentum_buffer", ""
        decoupled = False
    else:
        kind, first, second = "unknown", "", ""

    slots: dict[str, OptimizerSlots] = {}
    steps: list[float] = []
    for pid, entry in state.items():
        name = _state_name(pid, positions)
        if not isinstance(entry, Mapping):
            raise _Ambiguous(f"the state of parameter {brief(pid)} is not a dict")
        moments: list[Tensor | None] = []
        for slot in (first, second):
            ref = entry.get(slot) if slot else None
            if ref is None:
                moments.append(None)
                continue
            if not isinstance(ref, TensorRef) or ref.size != model[name].size:
                raise _Ambiguous(
                    f"the {slot} of parameter {brief(pid)} does not have the "
                    f"shape of {name!r} {list(model[name].size)}"
                )
            moments.append(
                make_tensor(ref, f"{key}.state.{pid}.{slot}", TensorRole.OPTIMIZER, source, order)
            )
        for slot in ("exp_avg", "exp_avg_sq", "momentum_buffer", "square_avg"):
            other = entry.get(slot)
            if isinstance(other, TensorRef) and other.size != model[name].size:
                raise _Ambiguous(
                    f"the {slot} of parameter {brief(pid)} does not have the shape of {name!r}"
                )
        step = _step_value(entry.get("step"), f"{key}.state.{pid}.step", source, order)
        if step is not None:
            steps.append(step)
        slots[name] = OptimizerSlots(first_moment=moments[0], second_moment=moments[1])

    betas = _group_value(groups, "betas", notes)
    beta1 = beta2 = None
    if isinstance(betas, (tuple, list)) and len(betas) == 2:
        beta1, beta2 = _number(betas[0]), _number(betas[1])
    elif kind == "rmsprop":
        beta2 = _number(_group_value(groups, "alpha", notes))
    if kind == "sgd":
        beta1 = _number(_group_value(groups, "momentum", notes))
    where = (
        key
        if found.where is None or "." not in found.where
        else (f"{found.where.rsplit('.', 1)[0]}.{key}")
    )
    return OptimizerState(
        kind=kind,
        slots=slots,
        step=int(max(steps)) if steps else None,
        beta1=beta1,
        beta2=beta2,
        eps=_number(_group_value(groups, "eps", notes)),
        weight_decay=_number(_group_value(groups, "weight_decay", notes)),
        decoupled=decoupled,
        source=f"{where} in {path.name}",
    )


def _names_for(ids: list[int], groups: list[Mapping[str, Any]], found: Found) -> list[str]:
    """Model tensor name of each parameter id, in id order, or raise _Ambiguous."""
    model = found.tensors
    if all("param_names" in g for g in groups):
        names: list[str] = []
        for group in groups:
            listed = group["param_names"]
            if (
                not isinstance(listed, list)
                or len(listed) != len(group["params"])
                or not all(isinstance(n, str) for n in listed)
            ):
                raise _Ambiguous("param_names does not match params")
            names.extend(strip_prefixes(n, found.stripped) for n in listed)
        unknown = [n for n in names if n not in model]
        if unknown:
            raise _Ambiguous(f"param_names lists {unknown[0]!r}, which the state dict lacks")
        return names
    trainable: list[str] = []
    seen: set[tuple[str, int, tuple[int, ...], tuple[int, ...]]] = set()
    for name, ref in model.items():
        leaf = name.rsplit(".", 1)[-1]
        if leaf in _BUFFER_LEAVES or ref.dtype is None or not is_float_name(ref.dtype):
            continue
        if ref.identity in seen:
            continue  # a tied copy: named_parameters() lists it once
        seen.add(ref.identity)
        trainable.append(name)
    if len(trainable) != len(ids):
        raise _Ambiguous(
            f"it lists {len(ids)} parameters but the state dict has "
            f"{len(trainable)} trainable tensors"
        )
    return trainable


def _state_name(pid: object, positions: Mapping[int, str]) -> str:
    if isinstance(pid, int) and not isinstance(pid, bool) and pid in positions:
        return positions[pid]
    raise _Ambiguous(f"it holds state for parameter {brief(pid)}, which no param group lists")


def _step_value(value: object, name: str, source: StorageSource, order: str) -> float | None:
    if isinstance(value, TensorRef):
        if value.size != () or value.dtype is None:
            return None
        array = make_tensor(value, name, TensorRole.OPTIMIZER, source, order).read()
        number = float(np.asarray(array, dtype=np.float64).reshape(()))
        return number if math.isfinite(number) and number >= 0 else None
    scalar = _number(value)
    return scalar if scalar is not None and math.isfinite(scalar) and scalar >= 0 else None
