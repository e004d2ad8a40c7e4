"""Run-level helpers: multiplicity adjustment across an audit run and the persistence rule.

References
----------
.. [1] Y. Benjamini and Y. Hochberg, "Controlling the false discovery rate: a practical and
       powerful approach to multiple testing", JRSS B 57, 1995, p. 289.
.. [2] Y. Benjamini and D. Yekutieli, "The control of the false discovery rate in multiple
       testing under dependency", Ann. Statist. 29, 2001, p. 1165.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from .exceptions import InputError
from .vocabulary import ADJUSTMENTS, VERDICTS, Adjustment

__all__ = ["adjust_pvalues", "escalate_persistent_refit"]


def adjust_pvalues(p, method: Adjustment = "bh") -> np.ndarray:
    """Multiplicity-adjusted p-values across the models of an audit run.

    With the m non-NaN p-values sorted, ``p_(1) <= ... <= p_(m)``:

    * ``"bh"`` (Benjamini-Hochberg step-up [1]_): ``p~_(i) = min_{j >= i} min(1, m p_(j) / j)``;
      rejecting ``p~ <= q`` controls the false discovery rate at q for independent tests;
    * ``"by"`` (Benjamini-Yekutieli [2]_): as ``"bh"`` with ``m`` replaced by ``m c_m``,
      ``c_m = sum_{i=1..m} 1/i``, valid under any dependence;
    * ``"bonferroni"``: ``min(1, m p)``, family-wise error control;
    * ``"none"``: the p-values unchanged.

    These equal statsmodels' ``multipletests`` with ``fdr_bh``, ``fdr_by`` and ``bonferroni``.

    Parameters
    ----------
    p : array_like
        Raw p-values in [0, 1], any shape; NaN marks a model without a p-value (e.g. an
        ``insufficient`` or ``error`` verdict) and passes through untouched, not counted in m.
    method : {"bh", "by", "bonferroni", "none"}, default "bh"

    Returns
    -------
    ndarray
        Adjusted p-values, shaped like ``p``.

    Examples
    --------
    >>> adjust_pvalues([0.01, 0.04, float("nan"), 0.03]).round(3).tolist()
    [0.03, 0.04, nan, 0.04]
    """
    if method not in ADJUSTMENTS:
        raise InputError(f"Unknown p-value adjustment {method!r}; valid methods are {', '.join(repr(m) for m in ADJUSTMENTS)}.")
    try:
        p = np.array(p, dtype=float)
    except (TypeError, ValueError) as exc:
        raise InputError(f"adjust_pvalues: p-values must be numeric; {exc}.") from None
    flat = p.reshape(-1)
    present = ~np.isnan(flat)
    values = flat[present]
    if ((values < 0) | (values > 1)).any():
        bad = values[(values < 0) | (values > 1)][:3].tolist()
        raise InputError(f"adjust_pvalues: p-values must lie in [0, 1] (NaN for none); got {bad}.")
    m = values.size
    if method == "none" or m == 0:
        return p
    if method == "bonferroni":
        adjusted = np.minimum(1.0, m * values)
    else:
        factor = m * (np.sum(1.0 / np.arange(1, m + 1)) if method == "by" else 1.0)
        order = np.argsort(values, kind="stable")
        stepped = values[order] * (factor / np.arange(1, m + 1))  # factor / j >= 1 keeps p~ >= p exactly
        stepped = np.minimum.accumulate(stepped[::-1])[::-1]
        adjusted = np.empty(m)
        adjusted[order] = np.minimum(1.0, stepped)
    flat[present] = adjusted
    return flat.reshape(p.shape)


def escalate_persistent_refit(history: Sequence[str], current: str, k: int = 2, n: int = 3) -> bool:
    """Whether a ``refit`` verdict has persisted long enough to become ``respecify`` (docs/method.md §10.4).

    True when ``current == "refit"`` and ``"refit"`` occurs in at least ``k`` of the last ``n``
    audits counting the current one, i.e. among ``history[-(n - 1):] + [current]``.

    Parameters
    ----------
    history : sequence of str
        Earlier verdicts of the model entry, oldest first.
    current : str
        This audit's verdict before escalation.
    k, n : int, default 2 and 3
        ``1 <= k <= n``.

    Returns
    -------
    bool

    Examples
    --------
    >>> escalate_persistent_refit(["pass", "refit"], "refit")
    True
    >>> escalate_persistent_refit(["refit", "pass", "pass"], "refit")
    False
    """
    if isinstance(n, bool) or not isinstance(n, (int, np.integer)) or n < 1:
        raise InputError(f"escalate_persistent_refit: n must be an int >= 1; got {n!r}.")
    if isinstance(k, bool) or not isinstance(k, (int, np.integer)) or not 1 <= k <= n:
        raise InputError(f"escalate_persistent_refit: k must be an int in [1, n={n}]; got {k!r}.")
    if isinstance(history, str):
        raise InputError("escalate_persistent_refit: history must be a sequence of verdicts, not one string.")
    verdicts = [*history, current]
    unknown = sorted({v for v in verdicts if v not in VERDICTS}, key=str)
    if unknown:
        raise InputError(
            f"escalate_persistent_refit: unknown verdict(s) {unknown}; valid verdicts are {', '.join(repr(v) for v in VERDICTS)}."
        )
    if current != "refit":
        return False
    return verdicts[-n:].count("refit") >= k
