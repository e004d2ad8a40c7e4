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

import numpy as np

from .exceptions import InputError, InsufficientDataError

__all__ = ["number_of_cells", "minimum_length", "cell_counts", "cell_index"]


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


def cell_counts(u: np.ndarray, s: int) -> np.ndarray:
    """Counts of PIT values in ``s`` equiprobable cells, along the last axis.

    Parameters
    ----------
    u : ndarray, shape (n,) or (R, n)
        PIT values in [0, 1].
    s : int
        Number of cells.

    Returns
    -------
    ndarray of float, shape (s,) or (R, s)
    """
    idx = cell_index(u, s)
    if idx.ndim == 1:
        return np.bincount(idx, minlength=s).astype(float)
    rows = idx.shape[0]
    flat = (idx + s * np.arange(rows)[:, None]).ravel()
    return np.bincount(flat, minlength=rows * s).reshape(rows, s).astype(float)
