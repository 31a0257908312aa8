"""Tensor names grouped into modules, with other naming conventions mapped onto PyTorch's.

``a.b.weight`` and ``a.b.bias`` are the module ``a.b``. Besides PyTorch's own leaves, two
families of names are recognised and renamed (the tensors keep their stored names):

* ``torch.nn.utils.parametrizations.weight_norm``: ``<m>.parametrizations.weight.original0``
  (g) and ``original1`` (v) become ``<m>.weight_g`` and ``<m>.weight_v``, as the older
  ``torch.nn.utils.weight_norm`` names them;
* plain suffixes, as hand-written NumPy code saves them: ``fc_w``/``fc_b``,
  ``conv1_weight``/``conv1_bias``, ``lstm_w_ih``/``lstm_w_hh``/``lstm_b_ih``/``lstm_b_hh``
  (optionally ``_l<k>`` and ``_reverse``) mean ``fc.weight`` and so on.
"""

from __future__ import annotations

import re
from collections.abc import Mapping
from dataclasses import dataclass

from steelyard.graph import Tensor

#: ``weight_ih_l0`` (nn.LSTM/GRU/RNN) and ``weight_ih`` (nn.LSTMCell/GRUCell/RNNCell).
RECURRENT = re.compile(r"^(weight|bias)_(ih|hh)(?:_l(\d+))?(_reverse)?$")
#: Plain NumPy suffixes: ``fc_w``, ``conv1_bias``, ``lstm_w_ih_l0_reverse``.
_SUFFIX = re.compile(
    r"^(?P<stem>.*[A-Za-z0-9])_(?P<kind>w|W|b|weight|bias)"
    r"(?:_(?P<part>ih|hh))?(?P<level>_l\d+)?(?P<rev>_reverse)?$"
)
#: Leaves that already follow PyTorch naming (never re-read as a suffix convention).
_TORCH_LEAVES = frozenset(
    {
        "weight",
        "bias",
        "running_mean",
        "running_var",
        "num_batches_tracked",
        "weight_g",
        "weight_v",
        "gamma",
        "beta",
        "LayerNorm",
    }
)


@dataclass
class Module:
    """Tensors sharing one module prefix (``a.b.weight`` and ``a.b.bias`` → ``a.b``)."""

    name: str
    leaves: dict[str, Tensor]

    @property
    def parent(self) -> str:
        return self.name.rsplit(".", 1)[0] if "." in self.name else ""

    @property
    def leaf(self) -> str:
        return self.name.rsplit(".", 1)[-1]


def split_name(name: str) -> tuple[str, str]:
    """(module, leaf) of a tensor name: ``a.b.weight`` → (``a.b``, ``weight``)."""
    if "." in name:
        module, leaf = name.rsplit(".", 1)
        return module, leaf
    return "", name


def group_modules(tensors: Mapping[str, Tensor]) -> dict[str, Module]:
    """Tensors grouped by module, with weight-norm parametrizations and plain NumPy suffixes
    mapped onto PyTorch leaf names (the tensors keep their stored names)."""
    modules: dict[str, Module] = {}

    def put(module: str, leaf: str, tensor: Tensor) -> bool:
        leaves = modules.setdefault(module, Module(module, {})).leaves
        if leaf in leaves:
            return False
        leaves[leaf] = tensor
        return True

    for name, tensor in tensors.items():
        module, leaf = split_name(name)
        if module.endswith("parametrizations.weight") and leaf in ("original0", "original1"):
            # parametrizations.weight_norm: original0 is g, original1 is v (torch docs).
            owner = module[: -len("parametrizations.weight")].rstrip(".")
            if put(owner, "weight_g" if leaf == "original0" else "weight_v", tensor):
                continue
        match = (
            _SUFFIX.match(leaf) if leaf not in _TORCH_LEAVES and not RECURRENT.match(leaf) else None
        )
        if match is not None:
            stem, kind, part, level, rev = match.groups()
            mapped = "weight" if kind in ("w", "W", "weight") else "bias"
            if part:
                mapped += f"_{part}{level or ''}{rev or ''}"
            elif level or rev:
                mapped = ""
            owner = f"{module}.{stem}" if module else stem
            if mapped and put(owner, mapped, tensor):
                continue
        put(module, leaf, tensor)
    return {name: entry for name, entry in modules.items() if entry.leaves}
