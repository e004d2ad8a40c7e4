"""Cells: from residuals to counts in equiprobable cells of the probability-integral scale.

Residuals go through the probability integral transform (PIT) of the noise law, ``u = F(e)``,
and are counted in ``s`` equiprobable cells ``[(j-1)/s, j/s)`` of [0, 1] (docs/method.md §6.1).  The
number of cells follows docs/method.md §6.3:

    s = clamp(round(2 n^(2/5)), max(k + 3, 4), floor(n / 5)),

``k`` the number of noise parameters estimated from the residuals.  When the lower bound exceeds
``floor(n/5)`` (fewer than five expected counts per cell) the check is ``insufficient``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .exceptions import InputError, InsufficientDataError

__all__ = [
    "number_of_cells",
    "minimum_length",
    "cell_counts",
    "cell_index",
    "CountsBelow",
    "boundary_union",
    "Partition",
    "make_partition",
    "make_partitions",
    "tail_boundaries",
]


def number_of_cells(n: int, k: int = 0) -> int:
    """Number of equiprobable cells for ``n`` residuals and ``k`` estimated noise parameters.

    ``s = clamp(round(2 n^(2/5)), max(k + 3, 4), floor(n/5))`` (docs/method.md §6.3; Moore's
    ``2 n^(2/5)`` rule with Cochran's minimum expected count of five).

    Raises
    ------
    InsufficientDataError
        When ``floor(n/5) < max(k + 3, 4)``; the message gives the smallest workable n.

    Examples
    --------
    >>> number_of_cells(100, 2), number_of_cells(730, 2), number_of_cells(28, 0)
    (13, 28, 5)
    """
    if n < 0 or k < 0:
        raise InputError(f"number_of_cells: n and k must be non-negative; got n={n}, k={k}.")
    lower = max(k + 3, 4)
    upper = n // 5
    if upper < lower:
        raise InsufficientDataError(
            f"{n} residuals give at most {upper} cells with five expected counts each, but {lower} cells "
            f"are needed ({k} estimated noise parameter(s) + 3); at least {minimum_length(k)} residuals are required."
        )
    target = int(math.floor(2.0 * n**0.4 + 0.5))
    return min(max(target, lower), upper)


def minimum_length(k: int = 0) -> int:
    """Smallest number of residuals for which :func:`number_of_cells` succeeds: ``5 max(k + 3, 4)``."""
    return 5 * max(k + 3, 4)


def cell_index(u: np.ndarray, s: int) -> np.ndarray:
    """Cell of each PIT value: ``min(floor(s u), s - 1)`` (values are clipped to [0, 1])."""
    u = np.asarray(u, dtype=float)
    if np.isnan(u).any():
        raise InputError("cell_index: PIT values contain NaN; the residuals or the noise law are invalid.")
    return np.minimum((np.clip(u, 0.0, 1.0) * s).astype(np.int64), s - 1)


@dataclass(frozen=True)
class CountsBelow:
    """Rows of PIT values known only through their counts below fixed boundaries.

    ``below[r, j]`` is the number of values of row ``r`` (of ``n``) whose PIT is below
    ``boundaries[j]`` (interior, increasing).  A simulated null table needs only cell counts, and
    for a continuous law they follow from one quantile per row and boundary
    (``counts_below_batch`` of the continuous laws in :mod:`fitaudit.core.noise`) instead of one distribution-function
    value per observation.  :func:`cell_counts` and :meth:`Partition.counts` accept it in place of
    the PIT values, for any cells whose boundaries are among ``boundaries`` (to 12 decimals).

    >>> pit = CountsBelow(np.array([0.25, 0.5, 0.75]), np.array([[1, 2, 4]]), 4)
    >>> cell_counts(pit, 4), cell_counts(np.array([[0.1, 0.3, 0.6, 0.7]]), 4)
    (array([[1., 1., 2., 0.]]), array([[1., 1., 2., 0.]]))
    """

    boundaries: np.ndarray
    below: np.ndarray
    n: int

    def counts(self, boundaries) -> np.ndarray:
        """Counts in the cells with these boundaries (0, ..., 1), shape (R, s)."""
        inner = np.asarray(boundaries, dtype=float)[1:-1]
        cols = np.searchsorted(self.boundaries, inner - 1e-12)
        known = cols < self.boundaries.size
        if not (known.all() and np.allclose(self.boundaries[cols], inner, rtol=0.0, atol=1e-12)):
            raise InputError("CountsBelow.counts: a cell boundary was not among those counted; count it too.")
        rows = len(self.below)
        edges = np.concatenate([np.zeros((rows, 1)), self.below[:, cols], np.full((rows, 1), self.n)], axis=1)
        return np.diff(edges, axis=1).astype(float)


def count_below_rows(X: np.ndarray, edges: np.ndarray) -> np.ndarray:
    """Row-wise counts of values strictly below each edge: ``out[r, j] = #{t : X[r, t] < edges[r, j]}``.

    Each row is sorted once; then every (row, edge) pair finds its count by the same
    branch-free binary search (a lower bound, Knuth 1998, *The Art of Computer Programming*
    vol. 3, §6.2.1), all pairs at once: ``log2(n)`` vectorised steps instead of one merge sort
    of each row with its edges (2,000 rows of 723 values and 27 edges: 81 to 35 ms, nearly
    all of it the sort).  The comparisons are exactly ``X < edge``, so the counts equal
    the definition's.

    >>> count_below_rows(np.array([[3.0, 1.0, 2.0, 2.0]]), np.array([[0.5, 2.0, 2.5, 9.0]]))
    array([[0, 1, 3, 4]])
    """
    X = np.sort(np.asarray(X, dtype=float), axis=1)
    edges = np.asarray(edges, dtype=float)
    R, n = X.shape
    rows = np.arange(R)[:, None]
    count = np.zeros(edges.shape, dtype=np.intp)
    step = 1 << max(n.bit_length() - 1, 0)
    while step and n:
        # invariant: the first `count` values of the row are below the edge
        trial = count + step
        fits = (trial <= n) & (X[rows, np.minimum(trial, n) - 1] < edges)
        count = np.where(fits, trial, count)
        step >>= 1
    return count


def boundary_union(*boundary_sets) -> np.ndarray:
    """The distinct interior boundaries (to 1e-12) of several cell sets, increasing; an int ``s``
    stands for ``s`` equiprobable cells.

    >>> boundary_union(4, (0.0, 0.5, 0.9, 1.0))
    array([0.25, 0.5 , 0.75, 0.9 ])
    """
    values = []
    for b in boundary_sets:
        values.extend((np.arange(1, b) / b) if isinstance(b, (int, np.integer)) else np.asarray(b, dtype=float)[1:-1])
    values = np.sort(np.asarray(values, dtype=float))
    return values[np.r_[True, np.diff(values) > 1e-12]] if values.size else values


def cell_counts(u: np.ndarray | CountsBelow, s: int) -> np.ndarray:
    """Counts of PIT values in ``s`` equiprobable cells, along the last axis.

    Parameters
    ----------
    u : ndarray, shape (n,) or (R, n), or CountsBelow
        PIT values in [0, 1] (or rows known by their counts below boundaries that include
        ``j / s``).
    s : int
        Number of cells.

    Returns
    -------
    ndarray of float, shape (s,) or (R, s)
    """
    if isinstance(u, CountsBelow):
        return u.counts(np.arange(s + 1) / s)
    idx = cell_index(u, s)
    if idx.ndim == 1:
        return np.bincount(idx, minlength=s).astype(float)
    rows = idx.shape[0]
    flat = (idx + s * np.arange(rows)[:, None]).ravel()
    return np.bincount(flat, minlength=rows * s).reshape(rows, s).astype(float)


# --------------------------------------------------------------------------------------------
# Partitions: the cells as a recorded dimension of the divergence family
# --------------------------------------------------------------------------------------------
#: Expected count of each outermost cell of the tail-refined partition.
TAIL_EXPECTED = 1.0
#: Smallest outermost cell probability of the tail-refined partition (reached at n >= 200).
TAIL_FLOOR = 0.005
#: Most cells on each side of the median in the tail-refined partition.
TAIL_STEPS = 5


@dataclass(frozen=True)
class Partition:
    """A partition of the probability-integral scale [0, 1] into cells.

    Attributes
    ----------
    kind : str
        One of :data:`fitaudit.core.vocabulary.PARTITION_KINDS`.
    boundaries : tuple of float
        ``0 = b_0 < b_1 < ... < b_s = 1``; cell ``j`` is ``[b_{j-1}, b_j)`` (the last is closed).

    Notes
    -----
    The model probability of cell ``j`` is ``b_j - b_{j-1}`` whatever the noise law, because
    residuals enter through their PIT values (docs/method.md, "Cells and partitions").
    """

    kind: str
    boundaries: tuple

    @property
    def s(self) -> int:
        """Number of cells."""
        return len(self.boundaries) - 1

    @property
    def probs(self) -> np.ndarray:
        """Model cell probabilities ``b_j - b_{j-1}``."""
        return np.diff(np.asarray(self.boundaries, dtype=float))

    @property
    def equiprobable(self) -> bool:
        """True when every cell has probability ``1/s`` (counted as :func:`cell_counts` does)."""
        return self.kind in ("equiprobable", "terciles", "quartiles")

    def counts(self, u: np.ndarray | CountsBelow) -> np.ndarray:
        """Counts of PIT values in the cells, along the last axis: shape (s,) or (R, s)."""
        if isinstance(u, CountsBelow):
            return u.counts(self.boundaries)
        if self.equiprobable:
            return cell_counts(u, self.s)
        u = np.asarray(u, dtype=float)
        if np.isnan(u).any():
            raise InputError("Partition.counts: PIT values contain NaN; the residuals or the noise law are invalid.")
        idx = np.searchsorted(np.asarray(self.boundaries[1:-1]), np.clip(u, 0.0, 1.0), side="right")
        if idx.ndim == 1:
            return np.bincount(idx, minlength=self.s).astype(float)
        rows = idx.shape[0]
        flat = (idx + self.s * np.arange(rows)[:, None]).ravel()
        return np.bincount(flat, minlength=rows * self.s).reshape(rows, self.s).astype(float)

    def describe_cell(self, j: int) -> str:
        """Plain words for cell ``j`` on the scale of the assumed law, e.g. ``the lowest 0.5 %``.

        >>> p = Partition("tails", (0.0, 0.01, 0.5, 0.99, 1.0))
        >>> p.describe_cell(0), p.describe_cell(3), p.describe_cell(1)
        ('the lowest 1 %', 'the highest 1 %', 'between the 1 and 50 % points')
        """
        lo, hi = float(self.boundaries[j]), float(self.boundaries[j + 1])
        if lo == 0.0:
            return f"the lowest {_percent(hi)}"
        if hi == 1.0:
            return f"the highest {_percent(1.0 - lo)}"
        return f"between the {_percent(lo, unit=False)} and {_percent(hi)} points"

    def key(self) -> tuple:
        """Hashable identity (kind and boundaries rounded to 12 decimals)."""
        return (self.kind,) + tuple(round(float(b), 12) for b in self.boundaries)

    def to_dict(self) -> dict:
        """Plain-Python view."""
        return {"kind": self.kind, "cells": self.s, "boundaries": [round(float(b), 6) for b in self.boundaries]}


def _percent(x: float, unit: bool = True) -> str:
    text = f"{100 * x:.1f}".rstrip("0").rstrip(".")
    return f"{text} %" if unit else text


def tail_boundaries(n: int) -> tuple:
    """Boundaries of the tail-refined partition for ``n`` PIT values.

    The outermost cells have probability ``p0 = max(TAIL_FLOOR, TAIL_EXPECTED / n)`` (one
    expected observation each, never finer than 0.5 %); on each side the boundaries are
    log-spaced from ``p0`` to 1/2 in ``K = clamp(floor(log2(1 / (2 p0))), 2, TAIL_STEPS)`` steps,
    so every cell is at least as probable as the one outside it, and mirrored about the median.
    Heavy tails and a misstated scale move mass into or out of these outer cells, which
    equiprobable cells merge with the shoulders (Moore 1986; Kallenberg, Oosterhoff and
    Schriever 1985 on unequal cells against tail alternatives).

    >>> [round(b, 4) for b in tail_boundaries(200)]
    [0.0, 0.005, 0.0126, 0.0315, 0.0792, 0.1991, 0.5, 0.8009, 0.9208, 0.9685, 0.9874, 0.995, 1.0]
    """
    if n < 1:
        raise InputError(f"tail_boundaries: n must be positive; got {n}.")
    p0 = max(TAIL_FLOOR, TAIL_EXPECTED / n)
    steps = int(min(max(math.floor(math.log2(0.5 / p0)), 2), TAIL_STEPS))
    lower = [p0 * (0.5 / p0) ** (i / steps) for i in range(steps)]
    return tuple([0.0] + lower + [0.5] + [1.0 - b for b in reversed(lower)] + [1.0])


def make_partition(kind: str, n: int, k: int = 0) -> Partition:
    """The partition of ``kind`` for ``n`` PIT values and ``k`` estimated noise parameters.

    ``equiprobable``: :func:`number_of_cells` cells (raises :class:`InsufficientDataError` as it
    does); ``terciles`` and ``quartiles``: 3 and 4 equiprobable cells; ``tails``:
    :func:`tail_boundaries`.
    """
    if kind == "equiprobable":
        s = number_of_cells(n, k)
    elif kind in ("terciles", "quartiles"):
        s = 3 if kind == "terciles" else 4
    elif kind == "tails":
        return Partition(kind, tail_boundaries(n))
    else:
        from .vocabulary import PARTITION_KINDS

        raise InputError(f"make_partition: unknown partition kind {kind!r}; use one of {', '.join(PARTITION_KINDS)}.")
    return Partition(kind, tuple(j / s for j in range(s + 1)))


def make_partitions(kinds, n: int, k: int = 0) -> tuple:
    """The partitions of ``kinds`` (in that order) for ``n`` PIT values; see :func:`make_partition`."""
    return tuple(make_partition(kind, n, k) for kind in kinds)
