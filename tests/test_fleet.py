"""Run-level helpers (fitaudit.core.fleet) against statsmodels' multipletests and docs/method.md §10."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from fitaudit.core.exceptions import InputError
from fitaudit.core.fleet import adjust_pvalues, escalate_persistent_refit

multitest = pytest.importorskip("statsmodels.stats.multitest")

# source: Benjamini & Hochberg (1995), JRSS B 57:289, section 4 example (15 p-values of a
# myocardial-infarction study; values from memory)
BH_1995 = np.array(
    [
        0.0001,
        0.0004,
        0.0019,
        0.0095,
        0.0201,
        0.0278,
        0.0298,
        0.0344,
        0.0459,
        0.3240,
        0.4262,
        0.5719,
        0.6528,
        0.7590,
        1.000,
    ]
)
STATSMODELS_METHOD = {"bh": "fdr_bh", "by": "fdr_by", "bonferroni": "bonferroni"}


def test_benjamini_hochberg_1995_example():
    adjusted = adjust_pvalues(BH_1995, "bh")
    # source: Benjamini & Hochberg (1995) section 4: 4 hypotheses rejected at q = 0.05 (from memory),
    # confirmed by statsmodels multipletests(method="fdr_bh")
    assert int(np.sum(adjusted <= 0.05)) == 4
    assert int(np.sum(multitest.multipletests(BH_1995, alpha=0.05, method="fdr_bh")[0])) == 4
    # source: Benjamini & Hochberg (1995) section 4: Bonferroni rejects 3 (from memory)
    assert int(np.sum(adjust_pvalues(BH_1995, "bonferroni") <= 0.05)) == 3


@pytest.mark.parametrize("method", ["bh", "by", "bonferroni"])
def test_matches_statsmodels_on_published_example(method):
    ref = multitest.multipletests(BH_1995, alpha=0.05, method=STATSMODELS_METHOD[method])[
        1
    ]  # source: statsmodels multipletests
    np.testing.assert_allclose(adjust_pvalues(BH_1995, method), ref, rtol=1e-14)


@settings(max_examples=60, deadline=None)
@given(
    p=st.lists(st.floats(0.0, 1.0), min_size=1, max_size=40),
    method=st.sampled_from(["bh", "by", "bonferroni"]),
)
def test_matches_statsmodels_random(p, method):
    p = np.array(p)
    ref = multitest.multipletests(p, method=STATSMODELS_METHOD[method])[1]  # source: statsmodels multipletests
    ours = adjust_pvalues(p, method)
    np.testing.assert_allclose(ours, ref, rtol=1e-12, atol=1e-300)
    assert np.all(ours >= p) and np.all(ours <= 1.0)
    order = np.argsort(p, kind="stable")
    assert np.all(np.diff(ours[order]) >= 0)  # common practice: adjustment preserves the order of the raw p-values


def test_nan_passes_through_and_is_not_counted():
    p = np.array([0.01, np.nan, 0.04, 0.03, np.nan])
    out = adjust_pvalues(p, "bh")
    assert np.isnan(out[[1, 4]]).all()
    ref = multitest.multipletests(p[[0, 2, 3]], method="fdr_bh")[
        1
    ]  # source: statsmodels multipletests on the 3 finite values
    np.testing.assert_allclose(out[[0, 2, 3]], ref, rtol=1e-14)
    np.testing.assert_array_equal(adjust_pvalues(p, "none"), p)
    assert np.isnan(adjust_pvalues([np.nan, np.nan])).all()


def test_adjust_pvalues_errors():
    with pytest.raises(InputError, match="valid methods are 'bh', 'by', 'bonferroni', 'none'"):
        adjust_pvalues([0.1], "holm")
    with pytest.raises(InputError, match=r"\[0, 1\]"):
        adjust_pvalues([0.1, 1.2])


@pytest.mark.parametrize(
    "history,current,expected",
    # source: docs/method.md §10.4 (a refit verdict repeated in k of the last N audits, default 2 of 3)
    [
        ([], "refit", False),
        (["refit"], "refit", True),
        (["pass", "refit"], "refit", True),
        (["refit", "pass", "pass"], "refit", False),
        (["refit", "pass"], "refit", True),
        (["refit", "refit"], "pass", False),
        (["refit", "refit"], "respecify", False),
        (["pass", "error", "insufficient"], "refit", False),
    ],
)
def test_escalate_persistent_refit_default(history, current, expected):
    assert escalate_persistent_refit(history, current) is expected


def test_escalate_persistent_refit_custom_window():
    # source: docs/method.md §10.4 ("refit" in at least k of the last n audits INCLUDING the current one)
    assert escalate_persistent_refit(["refit", "pass", "pass", "pass"], "refit", k=2, n=5) is True
    assert escalate_persistent_refit(["refit", "pass", "pass", "pass"], "refit", k=2, n=4) is False
    assert escalate_persistent_refit(["pass"], "refit", k=1, n=1) is True
    assert escalate_persistent_refit(["refit", "refit"], "refit", k=3, n=3) is True


def test_escalate_persistent_refit_errors():
    with pytest.raises(InputError, match="unknown verdict"):
        escalate_persistent_refit(["passed"], "refit")
    with pytest.raises(InputError, match="k must be"):
        escalate_persistent_refit([], "refit", k=4, n=3)
    with pytest.raises(InputError, match="sequence of verdicts"):
        escalate_persistent_refit("refit", "refit")
