"""Absorb market and period fixed effects by within transformation.

One-way effects are removed exactly by subtracting group means.  Two-way
effects on a balanced panel are removed exactly in one pass
(``x - mean_m - mean_t + mean``); on an unbalanced panel by alternating
projections, iterated until the largest change is below a tolerance relative
to the data's scale.  The number of absorbed parameters is counted for the
degrees of freedom: ``G`` for one way, ``G_1 + G_2 - c`` for two ways, where
``c`` is the number of connected components of the market-period graph.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components

from conduct.errors import EstimationError

__all__ = ["Absorbed", "absorb", "dense_codes"]


def dense_codes(values: np.ndarray) -> np.ndarray:
    """Integer codes 0..G-1 of the distinct values, in sorted order of the values.

    Integers in a compact range are coded with a counting pass (no sort), other
    values by hashing (:func:`pandas.factorize`); both are linear in the rows.

    Parameters
    ----------
    values : numpy.ndarray or pandas.Series
        (n,) labels of any sortable type.  A Series of text (e.g. Arrow-backed
        strings) is coded by hashing its own array, without a copy to Python objects.

    Returns
    -------
    numpy.ndarray
        (n,) int64 codes; equal to ``np.unique(values, return_inverse=True)[1]``.
    """
    if isinstance(values, pd.Series) and not pd.api.types.is_numeric_dtype(values.dtype) \
            and not pd.api.types.is_bool_dtype(values.dtype):
        coded = pd.factorize(values, sort=True)[0]
        if coded.size and int(coded.min()) >= 0:
            return coded.astype(np.int64, copy=False)
    values = np.asarray(values)
    if values.size == 0:
        return np.zeros(0, dtype=np.int64)
    if values.dtype.kind == "u" and int(values.max()) > np.iinfo(np.int64).max:
        return np.unique(values, return_inverse=True)[1].astype(np.int64)
    if values.dtype.kind in "iub":
        v = values.astype(np.int64, copy=False)
        lo, hi = int(v.min()), int(v.max())
        if hi - lo <= 4 * v.size + 1024:
            shifted = v - lo
            present = np.bincount(shifted, minlength=hi - lo + 1) > 0
            return (np.cumsum(present) - 1)[shifted].astype(np.int64, copy=False)
    if values.dtype.kind == "f" and np.isnan(values).any():
        return np.unique(values, return_inverse=True)[1].astype(np.int64)
    coded = pd.factorize(values, sort=True)[0]
    if coded.size and int(coded.min()) < 0:  # missing values (None, NaT): as np.unique does
        return np.unique(values, return_inverse=True)[1].astype(np.int64)
    return coded.astype(np.int64, copy=False)


@dataclass(frozen=True, slots=True)
class Absorbed:
    """Data with fixed effects removed.

    Attributes
    ----------
    values : numpy.ndarray
        (n, k) demeaned columns.
    df_absorbed : int
        Number of fixed-effect parameters absorbed (including the intercept).
    iterations : int
        Alternating-projection sweeps used (0 when exact).
    method : str
        ``none``, ``one-way``, ``two-way exact`` or ``alternating projections``.
    """

    values: np.ndarray
    df_absorbed: int
    iterations: int
    method: str


def _demean(x: np.ndarray, codes: np.ndarray, counts: np.ndarray) -> np.ndarray:
    out = np.empty_like(x)
    for j in range(x.shape[1]):
        means = np.bincount(codes, weights=x[:, j], minlength=counts.shape[0]) / counts
        out[:, j] = x[:, j] - means[codes]
    return out


def absorb(
    x: np.ndarray,
    groups: list[np.ndarray],
    *,
    tol: float = 1e-13,
    max_iter: int = 100_000,
) -> Absorbed:
    """Remove one or two sets of fixed effects from the columns of ``x``.

    Parameters
    ----------
    x : numpy.ndarray
        (n, k) data.
    groups : list of numpy.ndarray
        Zero, one or two integer code arrays of shape (n,), codes 0..G-1.
    tol : float
        Convergence tolerance for alternating projections, relative to the
        largest absolute value of each column.
    max_iter : int
        Sweep limit for alternating projections.

    Returns
    -------
    Absorbed

    Notes
    -----
    Alternating projections (the method of Guimaraes & Portugal 2010 and
    Gaure 2013) converge to the projection on the orthogonal complement of the
    span of both sets of dummies.
    """
    x = np.asarray(x, dtype=float)
    if x.ndim == 1:
        x = x[:, None]
    x = np.asfortranarray(x)  # columns contiguous: each is summed and gathered on its own
    if not groups:
        return Absorbed(x - x.mean(axis=0), 1, 0, "none")
    counts = [np.bincount(g) for g in groups]
    if len(groups) == 1:
        return Absorbed(_demean(x, groups[0], counts[0]), int(counts[0].size), 0, "one-way")
    if len(groups) != 2:
        raise ValueError("at most two sets of fixed effects")
    g1, g2 = groups
    n1, n2 = counts[0].size, counts[1].size
    graph = coo_matrix((np.ones(len(g1)), (g1, g2 + n1)), shape=(n1 + n2, n1 + n2))
    n_comp, _ = connected_components(graph, directed=False)
    df = int(n1 + n2 - n_comp)
    cells = g1.astype(np.int64) * n2 + g2
    if len(g1) == n1 * n2 and np.array_equal(cells, np.arange(len(cells))):
        # rows in grid order (first effect outer, as panels are sorted): exact by reshaping;
        # x is column-major, so grid[b, a, j] = x[a * n2 + b, j] is a view, not a copy
        grid = x.reshape((n2, n1, x.shape[1]), order="F")
        first = grid.mean(axis=0, keepdims=True)  # means of the first effect's groups
        out = grid - first
        second = out.mean(axis=1, keepdims=True)  # then of the second's (balanced: exact)
        out -= second
        return Absorbed(out.reshape(x.shape, order="F"), df, 0, "two-way exact")
    if len(g1) == n1 * n2 and int(np.bincount(cells, minlength=n1 * n2).max()) == 1:
        out = _demean(_demean(x, g1, counts[0]), g2, counts[1])
        return Absorbed(out, df, 0, "two-way exact")
    scale = np.maximum(np.abs(x).max(axis=0), 1e-300)
    cur = x.copy()
    for it in range(1, max_iter + 1):
        new = _demean(_demean(cur, g1, counts[0]), g2, counts[1])
        change = np.abs(new - cur).max(axis=0) / scale
        cur = new
        if np.all(change < tol):
            return Absorbed(cur, df, it, "alternating projections")
    raise EstimationError(
        f"Two-way fixed effects did not converge after {max_iter} sweeps; the market-period "
        "pattern is nearly disconnected. Try one-way effects."
    )
