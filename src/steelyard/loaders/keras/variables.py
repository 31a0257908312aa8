"""Which variables each Keras layer class stores, in Keras' own order, and the role (``kernel``,
``gamma``, ``moving_mean``…) a stored variable plays, by name or by position."""

from __future__ import annotations

import re
from collections.abc import Mapping
from typing import Any

from steelyard.loaders.keras import attention
from steelyard.loaders.keras.config_values import flag
from steelyard.loaders.keras.layer_classes import (
    ATTENTION,
    BATCH_NORM,
    CONV,
    CONV_T,
    DENSE,
    DEPTHWISE,
    EMBEDDING,
    GROUP_NORM,
    LAYER_NORM,
    MERGE,
    PASS,
    RNN_GATES,
    SEPARABLE,
)


def expected_roles(cls: str, config: Mapping[str, Any] | None) -> list[str] | None:
    """The variables a layer of this class stores, in Keras' own order (None: unknown class).

    With ``config`` None (no model config) optional variables are assumed present; callers
    then only use this list to match names, never positions.
    """
    if cls in ATTENTION:
        return attention.roles(config)
    conf = config or {}
    bias = ["bias"] if flag(conf, "use_bias", True) else []
    if cls in DENSE or cls in CONV or cls in CONV_T or cls in DEPTHWISE:
        return ["kernel", *bias]
    if cls in SEPARABLE:
        return ["depthwise_kernel", "pointwise_kernel", *bias]
    if cls in EMBEDDING:
        return ["embeddings"]
    if cls in RNN_GATES:
        return ["kernel", "recurrent_kernel", *bias]
    if cls in BATCH_NORM:
        affine = _affine(conf)
        return [*affine, "moving_mean", "moving_variance"]
    if cls in LAYER_NORM or cls in GROUP_NORM:
        return _affine(conf)
    if cls == "PReLU":
        return ["alpha"]
    if cls in PASS or cls in MERGE or cls == "InputLayer":
        return []
    return None


def _affine(conf: Mapping[str, Any]) -> list[str]:
    roles = []
    if flag(conf, "scale", True):
        roles.append("gamma")
    if flag(conf, "center", True):
        roles.append("beta")
    return roles


def non_trainable_roles(cls: str) -> frozenset[str]:
    """Variables Keras creates with ``trainable=False`` (no optimizer slots)."""
    if cls in BATCH_NORM:
        return frozenset({"moving_mean", "moving_variance"})
    return frozenset()


def role_of_name(cls: str, weight_name: str) -> str:
    """The variable role a stored weight name carries (``dense/kernel:0`` → ``kernel``)."""
    if cls in ATTENTION:
        return attention.role_of_name(weight_name)
    leaf = weight_name.rsplit("/", 1)[-1]
    leaf = re.sub(r":\d+$", "", leaf)
    if cls in DEPTHWISE and leaf == "depthwise_kernel":
        return "kernel"
    return leaf


def roles_by_count(cls: str, config: Mapping[str, Any] | None, count: int) -> list[str] | None:
    """Roles of ``count`` positional variables, or None when that is not determined."""
    if config is not None:
        roles = expected_roles(cls, config)
        return roles if roles is not None and len(roles) == count else None
    full = expected_roles(cls, {})
    if full is None:
        return None
    if len(full) == count:
        return full
    # Without a config only a missing bias is unambiguous (it is always last).
    if full[-1:] == ["bias"] and len(full) - 1 == count:
        return full[:-1]
    return None
