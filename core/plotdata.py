"""Compact data for the report's charts of one check: residual histogram, Q-Q points, autocorrelations;
and the sizes of a check's errors in plain units (spread against the assumed variance, bias, dates).

Pure numpy; the report (``tasks/report/charts.py``) turns these numbers into SVG and sentences.
"""

from __future__ import annotations

import numpy as np

from .diagnostics import acf, acf_band
from .noise import NoiseLaw, NoiseParams

__all__ = ["plot_data", "error_effects", "iso_date"]


def plot_data(
    e: np.ndarray, law: NoiseLaw, params: NoiseParams, lags: int, *, autocovariances: np.ndarray | None = None
) -> dict:
    """Compact data for the report: histogram of standardised residuals with the noise density,
    Q-Q points and autocorrelations with their band.

    The errors are standardised by the law (:meth:`~fitaudit.core.noise.NoiseLaw.standardise`,
    ``(e - loc) / scale`` for location-scale laws) and binned in 25 cells on [-5, 5] (values
    beyond are counted in the outer cells); the Q-Q plot pairs ``min(n, 80)`` sample quantiles
    at ``p_i = (i - 1/2) / k`` with the law's reference quantiles; the autocorrelations are
    :func:`~fitaudit.core.diagnostics.acf` with the band ``+-1.96 / sqrt(n)``
    (:func:`~fitaudit.core.diagnostics.acf_band`).

    Parameters
    ----------
    e : ndarray, shape (n,)
        The check's errors (finite).
    law : NoiseLaw
    params : NoiseParams
        The noise parameters the check used.
    lags : int
        Autocorrelation lags to report.
    autocovariances : ndarray, optional
        The errors' autocovariances when they were computed already (``given`` of
        :func:`~fitaudit.core.diagnostics.acf`).

    Returns
    -------
    dict
        ``hist_edges``, ``hist_counts``, ``hist_density`` (None for count laws), ``qq_theoretical``,
        ``qq_sample``, ``acf`` (lags 1..``lags``) and ``acf_band``; numbers rounded to 6 decimals.
    """
    z = law.standardise(e, params)
    lo, hi = -5.0, 5.0
    edges = np.linspace(lo, hi, 26)
    counts, _ = np.histogram(np.clip(z, lo, hi - 1e-9), bins=edges)
    centres = 0.5 * (edges[1:] + edges[:-1])
    density = law.reference_density(centres, params)
    k = min(z.size, 80)
    probs = (np.arange(1, k + 1) - 0.5) / k
    # np.quantile's linear rule (Hyndman and Fan 1996, definition 7) read off the sorted sample: one
    # sort instead of np.quantile's partition around 160 indices (a tenth of the time, same values)
    sample_q = np.interp(probs * (z.size - 1), np.arange(z.size), np.sort(z))
    theory_q = law.reference_quantiles(probs, params)
    r = acf(e, lags, given=autocovariances)
    return {
        "hist_edges": edges.round(6).tolist(),
        "hist_counts": counts.astype(int).tolist(),
        "hist_density": None if density is None else np.asarray(density).round(6).tolist(),
        "qq_theoretical": np.asarray(theory_q).round(6).tolist(),
        "qq_sample": np.asarray(sample_q).round(6).tolist(),
        "acf": np.asarray(r[1:]).round(6).tolist(),
        "acf_band": float(acf_band(e.size)),
    }


def iso_date(t) -> str | None:
    """A timestamp (numpy ``datetime64``, ``datetime.date`` or ISO text) as ``YYYY-MM-DD``; None when missing.

    Examples
    --------
    >>> iso_date(np.datetime64("2026-10-14T00:00:00"))
    '2026-10-14'
    """
    if t is None:
        return None
    try:
        value = np.datetime64(t, "D")
    except (TypeError, ValueError):
        return None
    return None if np.isnat(value) else str(value)


def error_effects(errors, y, first: int, sigma2: float | None = None, change: int | None = None, times=None) -> dict:
    """The size of a check's errors in the units a reader knows (docs/method.md §10.2).

    With ``e_t = y_t - yhat_t`` the one-step errors of the window ``t = first .. N - 1`` (``m`` of
    them), ``ebar`` their mean, ``s^2 = sum (e_t - ebar)^2 / (m - 1)`` their variance and
    ``sigma^2`` the variance the model assumes:

    * ``variance_ratio = s^2 / sigma^2``, how many times as variable the errors are as assumed
      (the ratio of variances behind the F test, e.g. Box, Jenkins and Reinsel 2008, §8.2);
    * ``bias_sd = ebar / sigma``, the mean error in assumed standard deviations;
    * ``bias_pct = -100 ebar / ybar``, by how many per cent the forecasts ran high (negative: low),
      only when every observation is positive (a share of the level means nothing otherwise).

    With ``change`` (a position, e.g. :attr:`~fitaudit.core.change.ChangeResult.index`) the same
    sizes of the errors from ``change`` on are given under ``"since"``.  With ``times`` (the
    timestamps of ``y``) the window's first and last dates and the change's date are named.

    Parameters
    ----------
    errors, y : array_like, shape (N,)
        One-step errors and observations, aligned (NaN errors, e.g. a presample, are skipped).
    first : int
        Position of the window's first error.
    sigma2 : float, optional
        The assumed error variance (e.g. the production version's ``sigma2``); without it no
        ratio or standardised bias is given.
    change : int, optional
        Position of the first error after a located break.
    times : array_like, shape (N,), optional
        Timestamps of ``y``.

    Returns
    -------
    dict
        ``n``, ``start``, ``end``, ``variance_ratio``, ``bias_sd``, ``bias_pct`` and ``since``
        (``{"date", "n", "variance_ratio", "bias_sd", "bias_pct"}`` or None); values that cannot
        be computed are None.

    Examples
    --------
    >>> e = np.array([0.0, 2.0, -2.0, 2.0, -2.0])
    >>> error_effects(e, np.full(5, 10.0), 1, sigma2=1.0)["variance_ratio"]
    5.333333
    """
    e_all = np.asarray(errors, dtype=float)
    y_all = np.asarray(y, dtype=float)
    t_all = None if times is None else np.asarray(times)
    sigma = float(np.sqrt(sigma2)) if sigma2 is not None and np.isfinite(sigma2) and sigma2 > 0 else None

    def sizes(lo: int) -> dict:
        keep = ~np.isnan(e_all[lo:])
        e, obs = e_all[lo:][keep], y_all[lo:][keep]
        out = {"n": int(e.size), "variance_ratio": None, "bias_sd": None, "bias_pct": None}
        if e.size < 2:
            return out
        mean = float(e.mean())
        if sigma is not None:
            out["variance_ratio"] = round(float(e.var(ddof=1)) / sigma**2, 6)
            out["bias_sd"] = round(mean / sigma, 6)
        if obs.size and bool(np.all(obs > 0)):
            out["bias_pct"] = round(-100.0 * mean / float(obs.mean()), 6) + 0.0
        return out

    def date(i: int) -> str | None:
        return iso_date(t_all[i]) if t_all is not None and 0 <= i < t_all.size else None

    n_all = e_all.size
    result = {**sizes(first), "start": date(first), "end": date(n_all - 1), "since": None}
    if change is not None and 0 <= int(change) < n_all:
        result["since"] = {"date": date(int(change)), **sizes(int(change))}
    return result
