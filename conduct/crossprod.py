"""Two-stage least squares from accumulated cross-products, for data seen in parts.

A part (a group of whole markets) is reduced to :class:`Moments`: the
cross-products of its columns after the market means are removed, their sums
by period, and the period-by-period matrix that the market demeaning leaves on
the period dummies.  Parts are added with :func:`merge`.  :func:`partial` then
removes period effects as explicit dummy columns would (Frisch-Waugh-Lovell:
``A'B - (D'A)' (D'D)^-1 D'B`` with ``D`` the market-demeaned period dummies,
one reference period dropped per connected component of the market-period
graph), which equals the two-way within transformation of the in-memory path;
:func:`tsls` solves 2SLS from the result.  :func:`partial_rows` applies the same
transformation to the rows of one part, for the score pass.

All arrays are small: ``k`` columns, ``T`` periods; nothing has a row dimension
except the inputs of :func:`moments` and :func:`partial_rows`.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import linalg, sparse
from scipy.sparse.csgraph import connected_components

from conduct.absorb import absorb
from conduct.errors import EstimationError
from conduct.iv import group_sums

__all__ = ["Moments", "Partialled", "merge", "moments", "partial", "partial_rows", "tsls"]

NO_VARIATION = 1e-7  # sd left after the effects, relative to the raw sd: below it is rounding
COLLINEAR = 1e7  # condition number seen through a cross-product matrix (its square root)


@dataclass(frozen=True, slots=True)
class Moments:
    """Additive summaries of a set of rows for one design.

    Attributes
    ----------
    n, markets : int
        Rows and markets.
    cross : numpy.ndarray
        (k, k) cross-products of the columns after removing market means (raw
        columns without market effects).
    mean, m2 : numpy.ndarray
        (k,) raw column means and sums of squared deviations from them (for the
        no-variation check; parts are combined as Chan, Golub & LeVeque 1979 do).
    labels : numpy.ndarray
        (T,) period labels, sorted.
    tkey : numpy.ndarray
        (T,) calendar position of each label (for ordering only).
    counts : numpy.ndarray
        (T,) rows per period.
    psums : numpy.ndarray
        (T, k) sums by period of the (market-demeaned) columns: ``D' A``.
    pcross : numpy.ndarray or None
        (T, T) ``C' diag(1/n_m) C`` with ``C`` the market-by-period indicator, so that
        the market-demeaned dummies have ``D'D = diag(counts) - pcross``; None without
        market effects.
    scalars : dict of str to float
        Further totals a pass keeps (counts, sums; keys starting ``min:`` keep the
        smallest value instead).
    """

    n: int
    markets: int
    cross: np.ndarray
    mean: np.ndarray
    m2: np.ndarray
    labels: np.ndarray
    tkey: np.ndarray
    counts: np.ndarray
    psums: np.ndarray
    pcross: np.ndarray | None
    scalars: dict[str, float]


def moments(a: np.ndarray, markets: np.ndarray, periods: np.ndarray, tkey: np.ndarray, *,
            market_fe: bool, period_fe: bool, scalars: dict[str, float] | None = None
            ) -> Moments:
    """Reduce the rows of one part.

    Parameters
    ----------
    a : numpy.ndarray
        (n, k) columns.
    markets : numpy.ndarray
        (n,) integer market codes 0..G-1 (markets lie wholly in the part).
    periods : numpy.ndarray
        (n,) period labels.
    tkey : numpy.ndarray
        (n,) calendar position of each row's period.
    market_fe, period_fe : bool
        Which effects the design has.
    scalars : dict or None
        Totals to carry along.

    Returns
    -------
    Moments
    """
    k = a.shape[1]
    g = int(markets.max()) + 1 if len(markets) else 0
    at = absorb(a, [markets]).values if market_fe and len(a) else a
    codes, labels = pd.factorize(pd.Series(periods, dtype=object), sort=True)
    labels = np.asarray(labels, dtype=object)
    t = len(labels)
    counts = np.bincount(codes, minlength=t).astype(float)
    psums = group_sums(codes, at) if len(a) else np.zeros((0, k))
    keys = np.zeros(t, dtype=np.int64)
    keys[codes] = tkey
    pcross = None
    if market_fe and period_fe:
        c = sparse.csr_matrix((np.ones(len(a)), (markets, codes)), shape=(g, t))
        n_m = np.bincount(markets, minlength=g).astype(float)
        pcross = (c.T @ sparse.diags(1.0 / n_m) @ c).toarray() if g else np.zeros((t, t))
    mean = a.mean(axis=0) if len(a) else np.zeros(k)
    return Moments(n=len(a), markets=g, cross=at.T @ at, mean=mean,
                   m2=((a - mean) ** 2).sum(axis=0), labels=labels, tkey=keys, counts=counts,
                   psums=psums, pcross=pcross, scalars=dict(scalars or {}))


def merge(a: Moments, b: Moments) -> Moments:
    """Add the moments of two disjoint sets of markets."""
    labels = np.asarray(sorted(set(a.labels) | set(b.labels)), dtype=object)
    t = len(labels)
    index = {lab: i for i, lab in enumerate(labels)}
    ia = np.asarray([index[x] for x in a.labels], dtype=np.int64)
    ib = np.asarray([index[x] for x in b.labels], dtype=np.int64)
    k = a.cross.shape[0]
    counts, psums, keys = np.zeros(t), np.zeros((t, k)), np.zeros(t, dtype=np.int64)
    pcross = None if a.pcross is None or b.pcross is None else np.zeros((t, t))
    for m, i in ((a, ia), (b, ib)):
        counts[i] += m.counts
        psums[i] += m.psums
        keys[i] = m.tkey
        if pcross is not None and m.pcross is not None:
            pcross[np.ix_(i, i)] += m.pcross
    scalars = dict(a.scalars)
    for key, v in b.scalars.items():
        if key not in scalars:
            scalars[key] = v
        elif key.startswith("min:"):  # the smallest, e.g. the first file holding something
            scalars[key] = min(scalars[key], v)
        else:
            scalars[key] += v
    n = a.n + b.n
    delta = b.mean - a.mean
    mean = a.mean + delta * (b.n / n) if n else a.mean
    m2 = a.m2 + b.m2 + (delta**2 * (a.n * b.n / n) if n else 0.0)
    return Moments(n=n, markets=a.markets + b.markets, cross=a.cross + b.cross, mean=mean,
                   m2=m2, labels=labels, tkey=keys, counts=counts, psums=psums,
                   pcross=pcross, scalars=scalars)


def merge_all(items: list[Moments]) -> Moments:
    """Add any number of moments (a node of the reduction tree)."""
    return functools.reduce(merge, items)


@dataclass(frozen=True, slots=True)
class Partialled:
    """Cross-products with every fixed effect removed.

    Attributes
    ----------
    gram : numpy.ndarray
        (k, k) cross-products of the columns after the two-way transformation.
    gamma : numpy.ndarray or None
        (T, k) coefficients of the (market-demeaned) period dummies, zero for the
        reference periods; None without period effects.
    components : int
        Connected components of the market-period graph (1 when only one set of
        effects, or none, is absorbed).
    df_absorbed : int
        Fixed-effect parameters absorbed (as :mod:`conduct.absorb` counts them).
    """

    gram: np.ndarray
    gamma: np.ndarray | None
    components: int
    df_absorbed: int


def partial(m: Moments, *, market_fe: bool, period_fe: bool) -> Partialled:
    """Remove the period effects from the cross-products (market means are already out).

    Parameters
    ----------
    m : Moments
    market_fe, period_fe : bool

    Returns
    -------
    Partialled
    """
    t = len(m.labels)
    if not period_fe:
        return Partialled(m.cross, None, 1, m.markets if market_fe else 0)
    if not market_fe:
        gamma = m.psums / m.counts[:, None]
        gram = m.cross - m.psums.T @ gamma
        return Partialled((gram + gram.T) / 2, gamma, 1, t)
    assert m.pcross is not None
    dd = np.diag(m.counts) - m.pcross
    n_comp, comp = connected_components(sparse.csr_matrix(m.pcross != 0), directed=False)
    keep = np.ones(t, dtype=bool)
    keep[[int(np.flatnonzero(comp == c)[0]) for c in range(n_comp)]] = False
    gamma = np.zeros_like(m.psums)
    if keep.any():
        gamma[keep] = linalg.solve(dd[np.ix_(keep, keep)], m.psums[keep], assume_a="pos")
    gram = m.cross - m.psums[keep].T @ gamma[keep]
    return Partialled((gram + gram.T) / 2, gamma, n_comp, m.markets + t - n_comp)


def partial_rows(a: np.ndarray, markets: np.ndarray, periods: np.ndarray,
                 gamma: np.ndarray | None, *, market_fe: bool) -> np.ndarray:
    """The rows of one part after the same transformation as :func:`partial`.

    Parameters
    ----------
    a : numpy.ndarray
        (n, k) columns.
    markets : numpy.ndarray
        (n,) market codes within the part.
    periods : numpy.ndarray
        (n,) positions of the rows' periods in the labels of ``gamma``.
    gamma : numpy.ndarray or None
        (T, k) from :func:`partial`.
    market_fe : bool

    Returns
    -------
    numpy.ndarray
        (n, k): ``M_market (a - gamma[period])``.
    """
    out = a if gamma is None else a - gamma[periods]
    return absorb(out, [markets]).values if market_fe and len(a) else out


def check_design(p: Partialled, m: Moments, names: tuple[str, ...], x: list[int],
                 z: list[int], stage: str) -> None:
    """Refuse columns without variation and collinear regressors or instruments.

    Parameters
    ----------
    p : Partialled
    m : Moments
    names : tuple of str
        Column names of the design.
    x, z : list of int
        Positions of the regressors and of the instruments.
    stage : str
        For messages.

    Raises
    ------
    EstimationError
    """
    n = max(m.n, 1)
    raw = m.m2 / n
    left = np.clip(np.diag(p.gram), 0.0, None) / n
    for what, idx in (("regressors", x), ("instruments", z)):
        for i in idx:
            if names[i] == "const":
                continue
            if raw[i] <= 0 or np.sqrt(left[i] / raw[i]) < NO_VARIATION:
                raise EstimationError(
                    f"The {stage} {what} include '{names[i]}', which has no variation left "
                    "after the fixed effects are removed; drop it or change the effects."
                )
        sub = p.gram[np.ix_(idx, idx)]
        s = np.sqrt(np.diag(sub))
        vals = np.linalg.eigvalsh(sub / np.outer(s, s))
        if vals[0] <= 0 or np.sqrt(vals[-1] / vals[0]) > COLLINEAR:
            cond = np.inf if vals[0] <= 0 else np.sqrt(vals[-1] / vals[0])
            raise EstimationError(
                f"The {stage} {what} are collinear (condition number {cond:.3g} after "
                "scaling, seen through their cross-products on the partitioned path): one of "
                f"{', '.join(names[i] for i in idx)} is a combination of the others. Drop one."
            )


@dataclass(frozen=True, slots=True)
class TSLS:
    """Two-stage least squares solved from cross-products.

    Attributes
    ----------
    b : numpy.ndarray
        (kx, d) estimates, one column per dependent variable.
    bread : numpy.ndarray
        (kx, kx) ``(X_hat' X_hat)^-1``.
    pi : numpy.ndarray
        (kz, kx) first-stage coefficients ``(Z'Z)^-1 Z'X``.
    """

    b: np.ndarray
    bread: np.ndarray
    pi: np.ndarray


def tsls(gram: np.ndarray, y: list[int], x: list[int], z: list[int]) -> TSLS:
    """2SLS of each ``y`` column on ``x`` with instruments ``z``, from a cross-product matrix.

    Parameters
    ----------
    gram : numpy.ndarray
        (k, k) cross-products after the fixed effects are removed.
    y, x, z : list of int
        Positions of the dependent variables, regressors and instruments (``z``
        includes the exogenous regressors).

    Returns
    -------
    TSLS

    Notes
    -----
    Columns are scaled to unit cross-product before solving (Cholesky), then the
    results are scaled back: ``Pi = (Z'Z)^-1 Z'X``, ``X_hat'X_hat = X'Z Pi``,
    ``b = (X_hat'X_hat)^-1 Pi' Z'y``.
    """
    s = np.sqrt(np.diag(gram))
    s = np.where(s > 0, s, 1.0)
    g = gram / np.outer(s, s)
    zz, zx, zy = g[np.ix_(z, z)], g[np.ix_(z, x)], g[np.ix_(z, y)]
    pi = linalg.solve(zz, zx, assume_a="pos")
    xx = zx.T @ pi
    bread = linalg.inv((xx + xx.T) / 2)
    b = bread @ (pi.T @ zy)
    sx, sz, sy = s[x], s[z], s[y]
    return TSLS(b=b * sy[None, :] / sx[:, None], bread=bread / np.outer(sx, sx),
                pi=pi / sz[:, None] * sx[None, :])


def hansen_j(gram: np.ndarray, y: int, x: list[int], z: list[int], meat: np.ndarray,
             n: int) -> float:
    """Hansen's J at two-step GMM with the first-step weight, from cross-products.

    Parameters
    ----------
    gram : numpy.ndarray
        (k, k) cross-products after the fixed effects are removed.
    y : int
        Position of the dependent variable.
    x, z : list of int
        Regressors and instruments.
    meat : numpy.ndarray
        (kz, kz) ``S`` times n: the sum of the 2SLS moment outer products (by cluster
        for cluster weights; ``e'e/n Z'Z`` for the homoskedastic form).
    n : int
        Rows.

    Returns
    -------
    float

    Notes
    -----
    As :func:`conduct.iv.hansen_j`: ``W = S^-1``, ``G = Z'X/n``; the two-step
    estimate solves ``G'W g(b) = 0``; ``J = n g(b)' W g(b)``.
    """
    s = np.sqrt(np.diag(gram))
    s = np.where(s > 0, s, 1.0)
    sz = s[z]
    w = linalg.inv(meat / np.outer(sz, sz) / n)
    g = gram[np.ix_(z, x)] / sz[:, None] / n
    zy = gram[z, y] / sz / n
    b2 = linalg.solve(g.T @ w @ g, g.T @ w @ zy)
    gbar = zy - g @ b2
    return float(n * gbar @ w @ gbar)


def sandwich(lhs: np.ndarray, meat: np.ndarray, *, kind: str, n: int, k: int, penalty: int,
             clusters: int) -> np.ndarray:
    """Covariance of ``mean(psi_i)`` with ``psi_i = lhs u_i`` from ``meat = sum u u'``.

    Parameters
    ----------
    lhs : numpy.ndarray
        (p, m) maps the score ``u`` to the influence function ``psi``.
    meat : numpy.ndarray
        (m, m) sum over clusters (cluster) or rows (otherwise) of ``u u'``.
    kind : str
        ``cluster``, ``robust`` or ``homoskedastic`` (the latter two alike, as in
        :func:`conduct.iv.cluster_cov`).
    n, k, penalty, clusters : int
        Rows, coefficients, absorbed parameters counted, clusters.

    Returns
    -------
    numpy.ndarray
        (p, p) with the small-sample factor ``G/(G-1) (n-1)/(n-k-a)`` (cluster) or
        ``n/(n-k-a)``.
    """
    dof = n - k - penalty
    if dof <= 0:
        raise EstimationError(f"No residual degrees of freedom (n = {n}, parameters {k}).")
    factor = clusters / (clusters - 1) * (n - 1) / dof if kind == "cluster" else n / dof
    return factor * (lhs @ meat @ lhs.T) / n**2
