"""Rows viewed for the twin searches, and the float helpers every search shares: inverse
norms, normalised copies, the float32 pre-filter and the scale guard of raw products."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

EMPTY = np.zeros(0, np.int64)
#: Slack of the float32 pre-filters before the float64 check (float32 dot products of unit
#: vectors are accurate to about 1e-6 at the widths seen here).
SLACK = 1e-4

#: Row norms whose raw float32 products are safe: the dot product of two such rows, and its
#: terms down to a millionth of it, lie within float32's normal range. Rows outside it are
#: normalised before any product.
_PLAIN_SCALE = (1e-15, 1e15)


def off_scale(norms: np.ndarray) -> np.ndarray:
    """Rows whose norm lies outside :data:`_PLAIN_SCALE` (or is not finite)."""
    return np.asarray(~((norms >= _PLAIN_SCALE[0]) & (norms <= _PLAIN_SCALE[1])))


def passing(gram: np.ndarray, threshold: float, negative: bool) -> np.ndarray:
    """Entries within slack of the threshold in float32 (candidates for the float64 check)."""
    loose = threshold - SLACK
    mask = gram >= loose
    if negative:
        mask |= gram <= -loose
    return np.asarray(mask)


@dataclass(frozen=True)
class Rows:
    """Rows r_j = [matrix_j, extra_j] and their float64 norms, viewed without copying."""

    matrix: np.ndarray
    """``[n, d]`` float32 (never written to)."""
    norms: np.ndarray
    """‖r_j‖, float64 (non-finite for a row holding a NaN or an infinity)."""
    extra: np.ndarray | None = None
    """An optional last column ``[n]`` (a bias), part of every row."""
    scale: np.ndarray | None = None
    """Optional float32 factors ``[n]`` of the matrix part (a folded batch norm's a_j): row j
    is then [scale_j·matrix_j (in float32), extra_j], never materialised as a whole."""

    @classmethod
    def of(cls, rows: np.ndarray) -> Rows:
        """A view of plain rows, with their norms computed in float64."""
        matrix = np.asarray(rows, dtype=np.float32)
        return cls(matrix, np.sqrt(np.einsum("ij,ij->i", matrix, matrix, dtype=np.float64)))

    @property
    def count(self) -> int:
        return int(self.matrix.shape[0])

    def take(self, index: np.ndarray | list[int], dtype: type = np.float64) -> np.ndarray:
        """The rows at ``index`` (extra column included), as ``dtype``."""
        index = np.asarray(index, dtype=np.int64)
        part = self.matrix[index]
        if self.scale is not None:  # rounded to float32 as the folded weights are
            with np.errstate(over="ignore", invalid="ignore"):
                part = np.multiply(part, self.scale[index, None], dtype=np.float32)
        if self.extra is None:
            return np.asarray(part, dtype=dtype)
        width = self.matrix.shape[1] + 1
        out = np.empty((index.size, width), dtype=dtype)
        out[:, : self.matrix.shape[1]] = part
        out[:, -1] = self.extra[index]
        return out

    def unit(self, index: np.ndarray) -> np.ndarray:
        """r_j/‖r_j‖ at ``index`` as float32 (rows with a zero or non-finite norm become 0)."""
        return scaled(self.take(index, np.float32), self.norms[index])

    def project_rows(self, index: np.ndarray, planes: np.ndarray) -> np.ndarray:
        """The rows at ``index`` times ``planes``."""
        return np.asarray(self.take(index, np.float32) @ planes)

    def project(self, planes: np.ndarray) -> np.ndarray:
        """Every row times ``planes`` (``[d (+1), k]``), one BLAS product on the stored rows."""
        d = self.matrix.shape[1]
        out = np.asarray(self.matrix @ planes[:d])
        if self.scale is not None:
            with np.errstate(over="ignore", invalid="ignore"):
                out *= self.scale[:, None]
        if self.extra is not None:
            out += self.extra[:, None].astype(np.float32) * planes[d]
        return out


def normalise(rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Unit-norm float32 copies of ``rows`` and their float64 norms (zero rows stay zero)."""
    view = Rows.of(rows)
    return scaled(view.matrix, view.norms), view.norms


def inverse_norms(norms: np.ndarray) -> np.ndarray:
    """1/norms as float32, 0 where a norm is zero or not finite, +Inf where the inverse
    leaves float32 (norms below 2.9e-39, rows of subnormals: see :func:`scaled`)."""
    usable = np.isfinite(norms) & (norms > 0)
    with np.errstate(over="ignore"):
        return np.divide(1.0, norms, out=np.zeros_like(norms), where=usable).astype(np.float32)


def scaled(rows: np.ndarray, norms: np.ndarray) -> np.ndarray:
    """``rows / norms`` as a new float32 array; rows with a zero or non-finite norm become 0."""
    usable = np.isfinite(norms) & (norms > 0)
    scale = inverse_norms(norms)
    out = np.empty(rows.shape, dtype=np.float32)
    with np.errstate(invalid="ignore", over="ignore"):
        np.multiply(rows, scale[:, None], out=out)
    tiny = np.flatnonzero(usable & np.isinf(scale))
    if tiny.size:  # rows of subnormals: divided in float64, where their norms are normal
        out[tiny] = rows[tiny].astype(np.float64) / norms[tiny, None]
    out[~usable] = 0.0
    return out


@dataclass
class Tally:
    """What a search spent, filled in as it goes (read by the tests and the benchmark)."""

    method: str = "exact"
    """``exact`` or ``hashed``: the search that produced the pairs."""
    tables: int = 0
    bits: int = 0
    dots: int = 0
    """Float32 dot products of normalised rows computed to find and confirm pairs."""
    planned: int = 0
    """Dot products the hashed plan needed (counted before any was computed)."""
    largest: int = 0
    """The largest set of rows compared all against all in the hashed search (<= BUCKET_CAP)."""
    split: int = 0
    """Buckets split by raising their key length."""
    banded: int = 0
    """Rows of buckets still above BUCKET_CAP at the longest key (compared within a band)."""
    confirmed: int = 0
    """Pairs the hashed search's bucket screen passed, confirmed from the rows themselves
    (their dot products are not in ``dots``, which counts the screen's)."""
