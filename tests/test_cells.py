"""Cells: the number-of-cells rule and PIT counting."""

from __future__ import annotations

import numpy as np
import pytest

from fitaudit.core.cells import cell_counts, cell_index, count_below_rows, minimum_length, number_of_cells
from fitaudit.core.exceptions import InsufficientDataError


@pytest.mark.parametrize(
    "n,k,expected",
    [
        # source: Moore (1986), docs/method.md §6.3: 2 n^(2/5) = 9.6, 12.6, 16.7, 24.0, 31.7, 60.3 for n = 50..5000
        (50, 0, 10),
        (100, 0, 13),
        (200, 0, 17),
        (500, 0, 24),
        (1000, 0, 32),
        (5000, 0, 60),
        # common practice: at least k + 3 cells and at least five expected counts per cell
        # (Cochran 1952; docs/method.md §6.3)
        (28, 0, 5),
        (20, 0, 4),
        (35, 3, 7),
        (60, 2, 10),
    ],
)
def test_number_of_cells_rule(n, k, expected):
    assert number_of_cells(n, k) == expected


@pytest.mark.parametrize("n,k", [(19, 0), (24, 2), (10, 1), (0, 0)])
def test_too_few_residuals_are_insufficient(n, k):
    with pytest.raises(InsufficientDataError, match=f"at least {minimum_length(k)} residuals are required"):
        number_of_cells(n, k)


def test_cell_counts_match_numpy_histogram(rng):
    u = rng.random(1000)
    s = 13
    # source: numpy.histogram on equal-width bins of [0, 1] (the reference binning)
    ref, _ = np.histogram(u, bins=np.linspace(0, 1, s + 1))
    assert np.array_equal(cell_counts(u, s), ref)
    batch = rng.random((5, 200))
    out = cell_counts(batch, s)
    assert out.shape == (5, s)
    for i in range(5):
        assert np.array_equal(out[i], np.histogram(batch[i], bins=np.linspace(0, 1, s + 1))[0])


def test_cell_index_edges():
    # common practice: cell j is [(j-1)/s, j/s); u = 1 goes to the last cell
    assert cell_index(np.array([0.0, 0.1999, 0.2, 0.9999, 1.0]), 5).tolist() == [0, 0, 1, 4, 4]


@pytest.mark.parametrize("n", [0, 1, 2, 7, 8, 9, 730])
def test_count_below_rows_equals_numpy_searchsorted_row_by_row(n):
    """Counts strictly below each edge, ties included (values rounded to one decimal, so many
    equal an edge), against numpy's own lower bound per row."""
    rng = np.random.default_rng(n)
    X = np.round(rng.standard_t(4, size=(6, n)), 1)
    edges = np.round(rng.normal(size=(6, 5)), 1)  # unsorted edges are allowed
    expected = np.array([np.searchsorted(np.sort(x), e, side="left") for x, e in zip(X, edges)])
    np.testing.assert_array_equal(count_below_rows(X, edges), expected)
