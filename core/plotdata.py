"""Compact data for the report's charts of one check: residual histogram, Q-Q points, autocorrelations.

Pure numpy; the report (``tasks/report.py``) turns these numbers into SVG.
"""

from __future__ import annotations

import numpy as np

from .diagnostics import acf, acf_band
from .noise import NoiseLaw, NoiseParams

__all__ = ["plot_data"]


def plot_data(e: np.ndarray, law: NoiseLaw, params: NoiseParams, lags: int) -> dict:
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
    sample_q = np.quantile(z, probs)
    theory_q = law.reference_quantiles(probs, params)
    r = acf(e, lags)
    return {
        "hist_edges": edges.round(6).tolist(),
        "hist_counts": counts.astype(int).tolist(),
        "hist_density": None if density is None else np.asarray(density).round(6).tolist(),
        "qq_theoretical": np.asarray(theory_q).round(6).tolist(),
        "qq_sample": np.asarray(sample_q).round(6).tolist(),
        "acf": np.asarray(r[1:]).round(6).tolist(),
        "acf_band": float(acf_band(e.size)),
    }
