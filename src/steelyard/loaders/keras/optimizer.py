"""Keras optimizer state mapped onto model tensors, per the layouts in FORMATS.md.

Keras 3 ``.weights.h5``: ``iteration``, ``learning_rate``, then per trainable variable in
model order its slots. Legacy HDF5: Keras 3 names (ambiguous, so mapped by order), Keras 2 /
tf_keras names that spell the model variable, and the Keras 2.0 ``Variable_N`` layout. Every
slot is shape-checked against its tensor; when anything does not fit we map nothing and say
why, rather than guess.
"""

from __future__ import annotations

import re
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from typing import Any, TypedDict

import numpy as np

from steelyard.graph import OptimizerSlots, OptimizerState, Tensor
from steelyard.loaders.keras.config_values import as_dict, class_name, flag, number
from steelyard.loaders.keras.model_config import Atom
from steelyard.loaders.keras.variables import non_trainable_roles


@dataclass(frozen=True)
class OptimizerConfig:
    """What a compile/training config says about the optimizer."""

    class_name: str
    config: Mapping[str, Any]

    @property
    def kind(self) -> str:
        """``adam``, ``adamw``, ``sgd``, ``rmsprop`` or the lowercase class name."""
        return self.class_name.lower()

    def number(self, key: str) -> float | None:
        """A numeric hyperparameter, or None."""
        return number(self.config.get(key))

    def flag(self, key: str) -> bool:
        """A boolean hyperparameter (False when absent)."""
        return flag(self.config, key, False)


def optimizer_config(value: Any) -> OptimizerConfig | None:
    """The optimizer of a ``training_config`` (``optimizer_config``) or ``compile_config``."""
    if isinstance(value, str):
        return OptimizerConfig(value.rsplit(">", 1)[-1], {})
    if not isinstance(value, dict):
        return None
    cls = class_name(value)
    if not cls:
        return None
    return OptimizerConfig(cls, as_dict(value.get("config")))


def iter_trainable(atoms: Iterable[Atom]) -> list[Tensor]:
    """Trainable model tensors in Keras' variable order (model order, then each layer's own).

    Classes we do not know keep all their stored variables: the optimizer mapping checks
    counts and shapes exactly, so a wrong assumption shows up as a mismatch, never a guess.
    """
    out: list[Tensor] = []
    for atom in atoms:
        if not atom.trainable:
            continue
        frozen = non_trainable_roles(atom.cls)
        for role in atom.order:
            if role not in frozen:
                out.append(atom.weights[role])
    return out


# --------------------------------------------------------------------------------------------
# Optimizer state → model tensors

#: Keras 3 slot layouts we know from FORMATS.md, per variable in model order:
#: which moment each slot is (None: kept but not a moment).
_FIRST, _SECOND = "first", "second"


def _keras3_layout(opt: OptimizerConfig) -> tuple[str, ...] | str:
    """Per-variable slots of a Keras 3 optimizer, or a reason why it is not known."""
    kind = opt.kind
    if kind in ("adam", "adamw"):
        if opt.flag("amsgrad"):
            return "amsgrad adds velocity_hat slots whose position is not documented"
        return (_FIRST, _SECOND)
    if kind == "sgd":
        momentum = opt.number("momentum")
        if momentum is None:
            return "SGD momentum is not in the config"
        return (_FIRST,) if momentum > 0 else ()
    if kind == "rmsprop":
        if (opt.number("momentum") or 0.0) > 0 or opt.flag("centered"):
            return "RMSprop with momentum or centered keeps slots in an undocumented order"
        return (_SECOND,)
    return f"the slot layout of {opt.class_name} is not documented"


_ADAM_SLOTS: dict[str, str | None] = {
    "velocity_hat": None,
    "momentum": _FIRST,
    "velocity": _SECOND,
    "vhat": None,
    "m": _FIRST,
    "v": _SECOND,
}
#: Named slots (legacy HDF5 files name them) → moment, per optimizer kind.
_NAMED_SLOTS: dict[str, dict[str, str | None]] = {
    "adam": _ADAM_SLOTS,
    "adamw": _ADAM_SLOTS,  # AdamW names its slots as Adam does
    "sgd": {"momentum": _FIRST, "m": _FIRST},
    "rmsprop": {
        "average_gradient": _FIRST,
        "velocity": _SECOND,
        "momentum": None,
        "mg": _FIRST,
        "rms": _SECOND,
    },
}
_KNOWN_KINDS = {
    "adam": "adam",
    "adamw": "adamw",
    "sgd": "sgd",
    "rmsprop": "rmsprop",
    "adam_w": "adamw",
    "rm_sprop": "rmsprop",
}


@dataclass
class OptimizerResult:
    """A mapped optimizer state, or the note that says why there is none."""

    state: OptimizerState | None = None
    note: str | None = None


def unmapped(source: str, why: str) -> OptimizerResult:
    """No state, and a note saying why the optimizer state in ``source`` was not mapped.

    Every mapper refuses the same way, so the notes read alike whatever the layout.
    """
    return OptimizerResult(note=f"optimizer state in {source} not mapped: {why}")


class _Settings(TypedDict):
    """What :class:`OptimizerState` reports of the optimizer's config."""

    beta1: float | None
    beta2: float | None
    eps: float | None
    weight_decay: float | None
    decoupled: bool | None


def _settings(opt: OptimizerConfig | None, kind: str, keras3: bool) -> _Settings:
    beta1 = beta2 = eps = decay = None
    decoupled: bool | None = None
    if opt is not None:
        if kind in ("adam", "adamw"):
            beta1, beta2 = opt.number("beta_1"), opt.number("beta_2")
        eps = opt.number("epsilon") if kind != "sgd" else None
        decay = opt.number("weight_decay")
        if kind == "adamw" or (keras3 and decay):
            decoupled = True
    elif kind == "adamw":
        decoupled = True
    return _Settings(beta1=beta1, beta2=beta2, eps=eps, weight_decay=decay, decoupled=decoupled)


def _state(
    opt: OptimizerConfig | None,
    kind: str,
    slots: Mapping[str, dict[str, Tensor]],
    step: int | None,
    source: str,
    keras3: bool,
) -> OptimizerState:
    mapped = {
        name: OptimizerSlots(first_moment=s.get(_FIRST), second_moment=s.get(_SECOND))
        for name, s in slots.items()
        if s.get(_FIRST) is not None or s.get(_SECOND) is not None
    }
    settings = _settings(opt, kind, keras3)
    return OptimizerState(kind=kind, slots=mapped, step=step, source=source, **settings)


def read_step(tensor: Tensor) -> int | None:
    """The optimizer's iteration counter, when it is an integer scalar."""
    if tensor.shape not in ((), (1,)) or tensor.dtype[:1] not in ("i", "u"):
        return None
    value = np.asarray(tensor.read()).reshape(-1)
    return int(value[0]) if value.size == 1 else None


def _check(slot: Tensor, model: Tensor, where: str) -> str | None:
    if slot.shape != model.shape:
        return (
            f"{where} has shape {slot.shape} but the model tensor it would belong to "
            f"({model.name}) has {model.shape}"
        )
    return None


def map_keras3_ordered(
    variables: list[Tensor],
    trainable: list[Tensor],
    opt: OptimizerConfig | None,
    group_name: str | None,
    source: str,
) -> OptimizerResult:
    """Keras 3 ``optimizer/vars/<i>``: ``iteration``, ``learning_rate``, then per trainable
    variable in model order its slots (FORMATS.md). Every position is shape-checked."""
    if opt is None:
        base = re.sub(r"_\d+$", "", group_name or "")
        kind = _KNOWN_KINDS.get(base)
        if kind is None:
            return unmapped(source, "no config names the optimizer")
        opt = OptimizerConfig(kind, {})
        layouts: list[tuple[str, ...]] = (
            [(_FIRST, _SECOND)]
            if kind in ("adam", "adamw")
            else [(_FIRST,), ()]
            if kind == "sgd"
            else [(_SECOND,)]
        )
        known_config = False
    else:
        layout = _keras3_layout(opt)
        if isinstance(layout, str):
            return unmapped(source, layout)
        layouts = [layout]
        known_config = True
    n = len(trainable)
    if len(variables) <= 2 and all(v.shape == () for v in variables):
        # Built but never stepped: only the counters exist, so there are no moments at all.
        kind = opt.kind
        counters = _state(
            opt if known_config else None, kind, {}, read_step(variables[0]), source, True
        )
        return OptimizerResult(counters)
    fits = [lay for lay in layouts if len(variables) - len(lay) * n in (1, 2)]
    if len(fits) != 1:
        return unmapped(
            source,
            f"{len(variables)} variables do not match {n} trainable model variables "
            f"with a known {opt.kind} layout",
        )
    layout = fits[0]
    prefix = len(variables) - len(layout) * n
    head = variables[:prefix]
    if (
        head[0].shape != ()
        or head[0].dtype[:1] not in ("i", "u")
        or any(v.shape != () for v in head[1:])
    ):
        return unmapped(source, "it does not start with the iteration counter and learning rate")
    slots: dict[str, dict[str, Tensor]] = {}
    for i, model in enumerate(trainable):
        for j, which in enumerate(layout):
            slot = variables[prefix + i * len(layout) + j]
            problem = _check(slot, model, f"optimizer variable {slot.name}")
            if problem:
                return unmapped(source, problem)
            slots.setdefault(model.name, {})[which] = slot
    kind = opt.kind
    return OptimizerResult(
        _state(opt if known_config else None, kind, slots, read_step(head[0]), source, True)
    )


def map_keras3_named(
    names: list[str],
    variables: list[Tensor],
    trainable: list[Tensor],
    opt: OptimizerConfig | None,
    source: str,
) -> OptimizerResult:
    """Keras 3 legacy ``optimizer_weights``: ``<opt>/iteration``, ``<opt>/learning_rate``, then
    ``<opt>/<var path with _>_<slot>``. The names are ambiguous, so each slot kind is mapped by
    order onto the trainable variables; the suffix only says which slot it is."""
    if opt is None:
        return unmapped(source, "no training config")
    kind = opt.kind
    table = _NAMED_SLOTS.get(kind)
    if table is None:
        return unmapped(source, f"{opt.class_name} slots are not documented")
    step: int | None = None
    groups: dict[str, list[Tensor]] = {}
    for name, tensor in zip(names, variables, strict=True):
        leaf = name.rsplit("/", 1)[-1]
        if leaf == "iteration":
            step = read_step(tensor)
            continue
        if leaf == "learning_rate":
            continue
        suffix = next(
            (s for s in sorted(table, key=len, reverse=True) if leaf.endswith(f"_{s}")), None
        )
        if suffix is None:
            return unmapped(source, f"{name!r} is no known {kind} slot")
        groups.setdefault(suffix, []).append(tensor)
    slots: dict[str, dict[str, Tensor]] = {}
    for suffix, tensors in groups.items():
        if len(tensors) != len(trainable):
            return unmapped(
                source,
                f"{len(tensors)} {suffix} slots for {len(trainable)} trainable model variables",
            )
        for slot, model in zip(tensors, trainable, strict=True):
            problem = _check(slot, model, f"optimizer variable {slot.name}")
            if problem:
                return unmapped(source, problem)
            which = table[suffix]
            if which is not None:
                slots.setdefault(model.name, {})[which] = slot
    return OptimizerResult(_state(opt, kind, slots, step, source, True))


def map_tf_keras_named(
    names: list[str],
    variables: list[Tensor],
    by_variable: Mapping[str, Tensor | None],
    opt: OptimizerConfig | None,
    source: str,
) -> OptimizerResult:
    """Keras 2 / tf_keras ``optimizer_weights`` named after the model variable:
    ``Adam/m/<var>:0`` (tf_keras optimizers) or ``Adam/<var>/m:0`` (legacy optimizers).

    ``by_variable`` maps a model variable name (``dense/kernel``) to its tensor, or None when
    two tensors share the name (then the slot cannot be placed)."""
    scope = names[0].split("/", 1)[0] if names and "/" in names[0] else ""
    if opt is None:
        base = scope.lower()
        if base not in _NAMED_SLOTS:
            return unmapped(source, "no training config")
        opt = OptimizerConfig(base, {})
    kind = opt.kind
    table = _NAMED_SLOTS.get(kind)
    if table is None:
        return unmapped(source, f"{opt.class_name} slots are not documented")
    step: int | None = None
    slots: dict[str, dict[str, Tensor]] = {}
    for name, tensor in zip(names, variables, strict=True):
        bare = re.sub(r":\d+$", "", name)
        parts = bare.split("/")
        if parts[-1] in ("iter", "iteration", "iterations"):
            step = read_step(tensor)
            continue
        if len(parts) < 3:
            if parts[-1] in ("learning_rate", "lr", "beta_1", "beta_2", "decay", "momentum", "rho"):
                continue
            return unmapped(source, f"{name!r} names no variable")
        if parts[1] in table and "/".join(parts[2:]) in by_variable:
            slot_name, variable = parts[1], "/".join(parts[2:])
        elif parts[-1] in table and "/".join(parts[1:-1]) in by_variable:
            slot_name, variable = parts[-1], "/".join(parts[1:-1])
        else:
            return unmapped(source, f"{name!r} matches no model variable")
        model = by_variable[variable]
        if model is None:
            return unmapped(source, f"two model tensors are named {variable!r}")
        problem = _check(tensor, model, f"optimizer variable {name!r}")
        if problem:
            return unmapped(source, problem)
        which = table[slot_name]
        if which is not None:
            if which in slots.get(model.name, {}):
                return unmapped(source, f"two {slot_name} slots for {variable!r}")
            slots.setdefault(model.name, {})[which] = tensor
    return OptimizerResult(_state(opt, kind, slots, step, source, keras3=False))


def map_keras20(
    names: list[str],
    variables: list[Tensor],
    trainable: list[tuple[str, Tensor]],
    opt: OptimizerConfig | None,
    source: str,
) -> OptimizerResult:
    """Keras 2.0.x ``iterations`` + ``Variable_N:0``: all first moments, then all second
    moments, each over the trainable weights **sorted by variable name** (FORMATS.md)."""
    if opt is None or opt.kind not in ("adam", "sgd"):
        what = opt.class_name if opt is not None else "an unnamed optimizer"
        return unmapped(source, f"Keras 2.0 layout of {what} is not documented")
    layout = (_FIRST, _SECOND) if opt.kind == "adam" else (_FIRST,)
    ordered = [tensor for _, tensor in sorted(trainable, key=lambda item: item[0])]
    n = len(ordered)
    if len(variables) != 1 + len(layout) * n:
        return unmapped(source, f"{len(variables)} variables for {n} trainable model variables")
    slots: dict[str, dict[str, Tensor]] = {}
    for j, which in enumerate(layout):
        for i, model in enumerate(ordered):
            slot = variables[1 + j * n + i]
            problem = _check(slot, model, f"optimizer variable {names[1 + j * n + i]!r}")
            if problem:
                return unmapped(source, problem)
            slots.setdefault(model.name, {})[which] = slot
    return OptimizerResult(
        _state(opt, opt.kind, slots, read_step(variables[0]), source, keras3=False)
    )
