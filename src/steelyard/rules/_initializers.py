"""The standard initializers ``untrained-layer`` compares a layer with: their names, laws and
scales for a layer's shape (the list and its sources are in the rule's documentation,
:mod:`steelyard.rules.untrained_layer`), and their CDFs, one at a time or all at once.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from steelyard.graph import Layer, LayerKind

_SQRT2 = math.sqrt(2.0)
#: Abramowitz & Stegun (1964), Handbook of Mathematical Functions, formula 7.1.26:
#: erf(x) = 1 − (a1·t + … + a5·t⁵)·exp(−x²) with t = 1/(1 + p·x), x >= 0, |error| <= 1.5e-7,
#: far below the resolution of any KS limit used here (>= 1/√sample).
_AS_P = 0.3275911
_AS_A = (1.061405429, -1.453152027, 1.421413741, -0.284496736, 0.254829592)


def erf(x: np.ndarray) -> np.ndarray:
    """Vectorised erf by Abramowitz & Stegun 7.1.26 (absolute error <= 1.5e-7)."""
    x = np.asarray(x, dtype=np.float64)
    a = np.abs(x)
    t = 1.0 / (1.0 + _AS_P * a)
    # Horner, ((((a5 t + a4) t + a3) t + a2) t + a1) t, in place (the operations, and so the
    # values, of the plain expression, without its temporaries).
    poly = _AS_A[0] * t
    for coefficient in _AS_A[1:]:
        poly += coefficient
        poly *= t
    np.multiply(a, a, out=a)
    np.negative(a, out=a)
    poly *= np.exp(a, out=a)
    np.subtract(1.0, poly, out=poly)
    return np.copysign(poly, x, out=poly)


def _phi(z: np.ndarray) -> np.ndarray:
    """Standard normal CDF, Φ(z) = (1 + erf(z/√2)) / 2."""
    return 0.5 * (1.0 + erf(np.asarray(z, dtype=np.float64) / _SQRT2))


#: Standard deviation of a unit normal truncated to (−2, 2): sqrt(1 − 2·2φ(2)/(Φ(2) − Φ(−2))).
_MASS = math.erf(2.0 / _SQRT2)
_TAIL = 2.0 * math.exp(-2.0) / math.sqrt(2.0 * math.pi)  # 2φ(2)
TRUNCATED_STD = math.sqrt(1.0 - 2.0 * _TAIL / _MASS)
#: Kurtosis μ₄/μ₂² of that truncated normal: E[z⁴] = 3 − (a³ + 3a)·2φ(a)/mass at a = 2.
TRUNCATED_KURTOSIS = (3.0 - 14.0 * _TAIL / _MASS) / TRUNCATED_STD**4


@dataclass(frozen=True)
class Candidate:
    """One initializer for one layer shape."""

    name: str
    family: str
    """``uniform`` (bound ``scale``), ``normal`` (std ``scale``) or ``truncated`` (a normal of
    std ``scale`` truncated at ±2·``scale``)."""
    scale: float

    @property
    def std(self) -> float:
        """Standard deviation of one drawn element."""
        if self.family == "uniform":
            return self.scale / math.sqrt(3.0)
        if self.family == "truncated":
            return self.scale * TRUNCATED_STD
        return self.scale

    @property
    def kurtosis(self) -> float:
        """μ₄/μ₂² of one drawn element."""
        if self.family == "uniform":
            return 9.0 / 5.0
        if self.family == "truncated":
            return TRUNCATED_KURTOSIS
        return 3.0

    def cdf(self, x: np.ndarray) -> np.ndarray:
        """The candidate's CDF at ``x``."""
        return _unit_cdf(self.family, np.asarray(x, dtype=np.float64) / self.scale)


def _variance_scaling(prefix: str, fan_in: int, fan_out: int) -> list[Candidate]:
    """Glorot, He and LeCun candidates for one pair of fans."""
    avg = (fan_in + fan_out) / 2.0
    out: list[Candidate] = []
    for name, variance in (
        (f"glorot{prefix}", 1.0 / avg),
        (f"he{prefix}", 2.0 / fan_in),
        (f"lecun{prefix}", 1.0 / fan_in),
    ):
        std = math.sqrt(variance)
        out.append(Candidate(f"{name}-uniform", "uniform", math.sqrt(3.0) * std))
        out.append(Candidate(f"{name}-normal", "normal", std))
        out.append(Candidate(f"{name}-truncated-normal", "truncated", std / TRUNCATED_STD))
    return out


def _fans(layer: Layer) -> tuple[int, int]:
    receptive = math.prod(layer.kernel)
    if layer.kind is LayerKind.CONV_TRANSPOSE:
        return (
            layer.units // max(1, layer.groups)
        ) * receptive, layer.in_per_group * layer.groups * receptive
    return layer.fan_in, layer.units * receptive


def candidates(layer: Layer, gates: int = 1) -> list[Candidate]:
    """The initializers a layer of this kind and shape could have been drawn from."""
    small = [
        Candidate("normal-0.02", "normal", 0.02),
        Candidate("truncated-normal-0.02", "truncated", 0.02),
    ]
    if layer.kind is LayerKind.EMBEDDING:
        return [
            Candidate("normal-1", "normal", 1.0),
            Candidate("keras-embedding-uniform", "uniform", 0.05),
            *small,
        ]
    fan_in, fan_out = _fans(layer)
    found = [Candidate("pytorch-default", "uniform", 1.0 / math.sqrt(fan_in))]
    found += _variance_scaling("", fan_in, fan_out)
    receptive = math.prod(layer.kernel)
    if layer.groups > 1 and layer.kind is LayerKind.CONV:
        depth_in = layer.in_per_group * layer.groups * receptive
        depth_out = max(1, layer.units // layer.groups) * receptive
        found += _variance_scaling("-depthwise", depth_in, depth_out)
    if layer.kind is LayerKind.RECURRENT:
        found.append(Candidate("pytorch-recurrent", "uniform", 1.0 / math.sqrt(layer.units)))
        found += _variance_scaling("-all-gates", layer.fan_in, gates * layer.units)
    return found + small


def _unit_cdf(family: str, z: np.ndarray) -> np.ndarray:
    """CDF of the family's unit law (bound, or standard deviation before truncation, 1)."""
    if family == "uniform":
        return np.asarray(np.clip((z + 1.0) / 2.0, 0.0, 1.0), dtype=np.float64)
    if family == "normal":
        return _phi(z)
    inner = (_phi(np.clip(z, -2.0, 2.0)) - (1.0 - _MASS) / 2.0) / _MASS
    return np.asarray(np.clip(inner, 0.0, 1.0), dtype=np.float64)


def cdf_table(found: Sequence[Candidate], x: np.ndarray) -> np.ndarray:
    """Every candidate's CDF at ``x``, ``[candidates, x.size]``: the same values as each
    candidate's :meth:`Candidate.cdf`, in one vectorised step per family."""
    scales = np.array([c.scale for c in found], dtype=np.float64)
    z = np.asarray(x, dtype=np.float64)[None, :] / scales[:, None]
    out = np.empty_like(z)
    families = np.array([c.family for c in found])
    for family in ("uniform", "normal", "truncated"):
        rows = families == family
        if rows.any():
            out[rows] = _unit_cdf(family, z[rows])
    return out
