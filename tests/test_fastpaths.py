"""Fast paths used for large panels give what the plain library calls give (issue 9).

Each fast path here replaces a sort-based or wrapper-based library call with a
linear-time equivalent; the reference is the library call itself (numpy
``np.unique(..., return_inverse=True)``), so a fast path that drifts fails.
"""

from __future__ import annotations

import numpy as np
import pytest

from conduct.absorb import absorb, dense_codes
from conduct.design import _nested


@pytest.mark.parametrize("kind", ["small-ints", "sparse-ints", "negative-ints", "floats",
                                  "strings", "bools"])
def test_dense_codes_equal_numpy_unique(kind: str) -> None:
    rng = np.random.default_rng(7)
    values = {
        "small-ints": rng.integers(0, 50, 2_000),
        "sparse-ints": rng.integers(0, 50, 2_000) * 10**12,  # range far beyond 4n: hashed
        "negative-ints": rng.integers(-30, 30, 2_000),
        "floats": rng.integers(0, 40, 2_000) / 7.0,
        "strings": np.asarray([f"market {v}" for v in rng.integers(0, 120, 2_000)],
                              dtype=object),
        "bools": rng.integers(0, 2, 2_000).astype(bool),
    }[kind]
    expected = np.unique(values, return_inverse=True)[1]
    got = dense_codes(values)
    assert got.dtype == np.int64
    np.testing.assert_array_equal(got, expected)


def test_dense_codes_with_gaps_in_a_subset() -> None:
    codes = np.repeat(np.arange(10), 5)
    subset = codes[codes % 3 != 0]  # rows used by a stage: codes 1, 2, 4, 5, 7, 8
    np.testing.assert_array_equal(dense_codes(subset),
                                  np.unique(subset, return_inverse=True)[1])


def test_nested_groups_in_clusters() -> None:
    markets = np.repeat(np.arange(6), 4)
    regions = markets // 2  # each market inside one region
    periods = np.tile(np.arange(4), 6)
    assert _nested(markets, regions)
    assert _nested(markets, markets)
    assert not _nested(periods, regions)  # a period spans all regions
    pairs = np.unique(np.column_stack([periods, markets]), axis=0)  # the sort-based check
    assert _nested(periods, markets) == (len(pairs) == periods.max() + 1)


def test_balanced_exact_absorption_detected_without_sorting() -> None:
    rng = np.random.default_rng(3)
    g1, g2 = np.repeat(np.arange(8), 5), np.tile(np.arange(5), 8)
    x = rng.normal(size=(40, 2))
    exact = absorb(x, [g1, g2])
    assert exact.method == "two-way exact"
    # one duplicated cell makes the panel unbalanced even with n = G1 x G2 rows
    g2b = g2.copy()
    g2b[1] = 0
    assert absorb(x, [g1, g2b]).method == "alternating projections"
    # reference: least squares on explicit dummies (numpy lstsq)
    d = np.column_stack([np.eye(8)[g1], np.eye(5)[g2][:, 1:]])
    resid = x - d @ np.linalg.lstsq(d, x, rcond=None)[0]
    np.testing.assert_allclose(exact.values, resid, atol=1e-12)
