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
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components

from conduct.errors import EstimationError

__all__ = ["Absorbed", "absorb"]


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
    if len(g1) == n1 * n2 and np.unique(cells).size == len(cells):
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
