"""Derived quantities: implied marginal cost, markup and Lerner index per observation.

Under a conduct parameter theta (estimated, or fixed by a candidate model) the
supply relation gives, at each observation::

    markup = theta * Q*,   MC = P - markup,   Lerner = markup / P = theta / |elasticity|

(Cowling & Waterson 1976 give the Cournot case, Lerner = H / |elasticity|.)

Means of marginal cost, markup and Lerner index by period and by market get
delta-method intervals: each mean is a smooth function of theta and of the
demand coefficients (through Q*), so its influence function is the gradient
times the stacked influence functions of theta (sequential) and of demand,
clustered like the study.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
from scipy import stats

from conduct.demand import DemandResult
from conduct.design import codes
from conduct.iv import cluster_cov, group_sums
from conduct.panel import MARKET, PERIOD, TIME, Panel
from conduct.study import Study
from conduct.supply import SupplyResult

__all__ = ["Derived", "derive"]


@dataclass(frozen=True, slots=True)
class Derived:
    """Per-observation table and headline means.

    Attributes
    ----------
    observations : pandas.DataFrame
        One row per market-period: market, period, price, quantity, slope,
        elasticity, and when a supply relation was estimated Q*, marginal cost,
        markup and Lerner under the estimated theta and under each candidate.
    marginal_cost_mean, lerner_mean : float or None
        Means under the estimated theta over rows with a negative demand slope.
    negative_cost_share : dict of str to float
        Share of negative implied marginal costs under the estimated theta
        (key ``estimated``) and under each candidate.
    by_period, by_market : pandas.DataFrame or None
        Per model and group: mean marginal cost, markup and Lerner index with
        delta-method intervals at the study's level (columns ``model``, ``group``,
        ``rows``, ``mc``, ``mc_lo``, ``mc_hi``, ``markup``, ``markup_lo``,
        ``markup_hi``, ``lerner``, ``lerner_lo``, ``lerner_hi``).
    """

    observations: pd.DataFrame
    marginal_cost_mean: float | None
    lerner_mean: float | None
    negative_cost_share: dict[str, float]
    by_period: pd.DataFrame | None = None
    by_market: pd.DataFrame | None = None


def derive(panel: Panel, study: Study, demand: DemandResult,
           supply: SupplyResult | None) -> Derived:
    """Compute costs, markups and Lerner indexes at every observation.

    Parameters
    ----------
    panel : Panel
    study : Study
    demand : DemandResult
    supply : SupplyResult or None

    Returns
    -------
    Derived
    """
    f = panel.frame
    p = f[study.panel.price].to_numpy(dtype=float)
    q = f[study.panel.quantity].to_numpy(dtype=float)
    if supply is None:
        obs = pd.DataFrame({
            "market": f[MARKET].array,  # the panel's own arrays: no round trip through objects
            "period": f[PERIOD].array,
            "price": p,
            "quantity": q,
            "slope": demand.slope,
            "elasticity": demand.elasticity,
        })
        return Derived(obs, None, None, {})
    qstar = supply.qstar
    # the table's columns: copies of arrays it shares with others, the new ones as they are
    columns: dict[str, Any] = {
        "market": f[MARKET].array.copy(),
        "period": f[PERIOD].array.copy(),
        "price": p.copy(),
        "quantity": q.copy(),
        "slope": demand.slope.copy(),
        "elasticity": demand.elasticity.copy(),
        "qstar": qstar.copy(),
    }
    if supply.h is not None:
        columns["herfindahl"] = supply.h.copy()
    shares: dict[str, float] = {}
    variants: list[tuple[str, np.ndarray]] = [("estimated", np.full(len(f), supply.theta))]
    for c in study.candidates:
        hv = np.full(len(f), c.theta) if c.theta is not None else supply.h
        if hv is not None:
            variants.append((c.name, hv))
    for name, theta in variants:
        markup = theta * qstar
        mc = p - markup
        columns[f"theta_{name}"] = theta.copy() if theta is supply.h else theta
        columns[f"marginal_cost_{name}"] = mc
        columns[f"markup_{name}"] = markup
        columns[f"lerner_{name}"] = markup / p
        valid = np.isfinite(mc)
        if valid.all():
            shares[name] = float(np.mean(mc < 0))
        else:
            shares[name] = float(np.mean(mc[valid] < 0)) if valid.any() else float("nan")
    obs = pd.DataFrame(columns, copy=False)
    valid = np.isfinite(qstar)
    groupings = []
    for key, col in (("period", TIME), ("market", MARKET)):
        group_codes = codes(f[col])
        labels = _group_labels(f[PERIOD if key == "period" else MARKET], group_codes)
        groupings.append((key, group_codes, labels))
    sums, thetas, k_d = _term_sums(p, q, demand, supply, variants,
                                   [(g, len(labels)) for _, g, labels in groupings])
    v_all = cluster_cov(np.column_stack([demand.fit.influence, supply.theta_influence]),
                        supply.full_cov, 1)  # (k_d + 1, k_d + 1)
    models = [(name, theta) for (name, _), theta in zip(variants, thetas, strict=True)]
    tables = {key: _group_means(terms, models, k_d, v_all, labels, study.inference.level)
              for (key, _, labels), terms in zip(groupings, sums, strict=True)}
    return Derived(
        observations=obs,
        marginal_cost_mean=float(np.mean(obs["marginal_cost_estimated"][valid])),
        lerner_mean=float(np.mean(obs["lerner_estimated"][valid])),
        negative_cost_share=shares,
        by_period=tables["period"],
        by_market=tables["market"],
    )


def _group_labels(labels: pd.Series, group: np.ndarray) -> list[str]:
    """Each group's label: ``labels`` at the group's first row, as text, in code order.

    ``group`` holds codes in the sorted order of the grouping column, so this is
    ``frame.drop_duplicates(column).sort_values(column)[labels.name]`` as text.
    Rows sorted by group (markets in panel order) give the first rows without
    hashing.
    """
    if len(group) > 1 and np.all(group[1:] >= group[:-1]):
        first = np.flatnonzero(np.r_[True, group[1:] != group[:-1]])
    else:
        first = np.flatnonzero(~pd.Series(group).duplicated().to_numpy())
        first = first[np.argsort(group[first], kind="stable")]
    return labels.iloc[first].astype(str).tolist()


@dataclass(frozen=True, slots=True)
class _GroupSums:
    """Sums by group of the per-row terms of :func:`_term_sums`, for one grouping.

    Attributes
    ----------
    counts : numpy.ndarray
        (G,) rows with Q* in each group.
    shared : numpy.ndarray
        (G, 1 + 2 (1 + k_d)) sums of ``[P, Q*, dQ*/dalpha, Q*/P, dQ*/dalpha / P]``.
    own : dict of int to numpy.ndarray
        For each model (by its position in the list of models) whose multiplier h
        varies across rows, (G, 2 (1 + k_d)) sums of ``[h Q*, h dQ*/dalpha, h Q*/P,
        h dQ*/dalpha / P]``.
    """

    counts: np.ndarray
    shared: np.ndarray
    own: dict[int, np.ndarray]


def _term_sums(p: np.ndarray, q: np.ndarray, demand: DemandResult, supply: SupplyResult,
               variants: list[tuple[str, np.ndarray]], groupings: list[tuple[np.ndarray, int]]
               ) -> tuple[list[_GroupSums], list[float | None], int]:
    """Group sums of every per-row term the group means need, for each grouping.

    Each term is computed once per row into the columns of one Fortran-order
    buffer (rows without Q* hold zeros) and summed by every grouping with one
    :func:`conduct.iv.group_sums` call; the columns are the products the
    plain computation forms, one matrix per model and weight, and group sums
    are taken column by column, so the sums are the same numbers.

    Parameters
    ----------
    p, q : numpy.ndarray
        (n,) price and quantity.
    demand : DemandResult
    supply : SupplyResult
    variants : list of (str, numpy.ndarray)
        Each model's name and multiplier h at every row.
    groupings : list of (numpy.ndarray, int)
        Group codes of the rows and number of groups.

    Returns
    -------
    (list of _GroupSums, list, int)
        Sums per grouping; each model's constant multiplier (None when it varies
        across the rows with Q*), in the order of ``variants``; the number of
        demand coefficients k_d.
    """
    qstar = supply.qstar
    ok = np.isfinite(qstar)
    slope, slope_grad = demand.slope, demand.slope_grad
    if ok.all():
        dq = (q / slope ** 2)[:, None] * slope_grad
    else:
        dq = np.zeros_like(slope_grad)
        dq[ok] = (q[ok] / slope[ok] ** 2)[:, None] * slope_grad[ok]
    k_d = demand.fit.influence.shape[1]
    width = 1 + k_d
    qs = np.where(ok, qstar, 0.0)
    weights = (np.ones_like(p), 1.0 / p)  # markup, Lerner
    buffer = np.empty((len(p), 1 + 2 * width), order="F")
    buffer[:, 0] = np.where(ok, p, 0.0)
    for j, w in enumerate(weights):
        lo = 1 + j * width
        np.multiply(qs, w, out=buffer[:, lo])
        np.multiply(dq, w[:, None], out=buffer[:, lo + 1:lo + width])
    okf = ok.astype(float)
    counts = [np.bincount(g, weights=okf, minlength=n) for g, n in groupings]
    shared = [group_sums(g, buffer) for g, _ in groupings]
    thetas: list[float | None] = []
    own: list[dict[int, np.ndarray]] = [{} for _ in groupings]
    terms = buffer[:, 1:]  # reused for each model whose multiplier varies
    for i, (_, h) in enumerate(variants):
        if ok.all():
            constant, theta = bool(np.all(h == h[0])), float(h[0])
        elif ok.any():
            constant, theta = bool(np.all(h[ok] == h[ok][0])), float(h[ok][0])
        else:
            constant, theta = True, 0.0
        thetas.append(theta if constant else None)
        if constant:
            continue
        for j, w in enumerate(weights):
            hv = np.where(ok, h, 0.0) * w
            np.multiply(hv, qs, out=terms[:, j * width])
            np.multiply(dq, hv[:, None], out=terms[:, j * width + 1:(j + 1) * width])
        for out, (g, _) in zip(own, groupings, strict=True):
            out[i] = group_sums(g, terms)
    return ([_GroupSums(c, s, o) for c, s, o in zip(counts, shared, own, strict=True)],
            thetas, k_d)


def _group_means(sums: _GroupSums, names_thetas: list[tuple[str, float | None]], k_d: int,
                 v_all: np.ndarray, labels: list[str], level: float) -> pd.DataFrame:
    """Means by group with delta-method intervals for each model.

    For a group S and multiplier h (theta, or a candidate's fixed value), the mean
    markup is ``m = mean_S(h_i Q*_i)``; its gradient in (alpha, theta) is
    ``(mean_S(h_i dQ*_i/dalpha), mean_S(Q*_i))`` (the theta part for the estimated
    theta only), and its variance is ``g' V g`` with ``V`` (``v_all``) the covariance
    of the stacked influence functions of alpha and theta.  The Lerner mean weights
    by ``1/P``.  Marginal cost is ``mean_S(P) - m``, with the variance of ``m``.
    The group sums come from :func:`_term_sums`: nothing of size rows x groups
    is formed.
    """
    counts = sums.counts
    keep = counts > 0
    names = [lab for lab, k in zip(labels, keep, strict=True) if k]

    def gmeans(m: np.ndarray) -> np.ndarray:
        """Group means from group sums (rows without Q* hold zeros)."""
        return (m / np.where(keep, counts, 1.0)[:, None])[keep]

    z = float(stats.norm.ppf(0.5 + level / 2))
    width = 1 + k_d
    shared = gmeans(sums.shared)
    price_mean = shared[:, 0]
    # [mean(w Q*), mean(w dQ*/dalpha)] per weight w, shared by every constant-theta model
    unit = {what: shared[:, 1 + j * width:1 + (j + 1) * width]
            for j, what in enumerate(("markup", "lerner"))}
    out = []
    for i, (name, theta) in enumerate(names_thetas):
        own = gmeans(sums.own[i]) if theta is None else None
        pieces = {}
        for j, what in enumerate(("markup", "lerner")):
            means = theta * unit[what] if own is None else own[:, j * width:(j + 1) * width]
            value = means[:, 0]
            grad = np.zeros((len(value), k_d + 1))
            grad[:, :k_d] = means[:, 1:]
            if name == "estimated":
                grad[:, k_d] = unit[what][:, 0]
            var = np.einsum("gi,ij,gj->g", grad, v_all, grad)
            pieces[what] = (value, np.sqrt(np.clip(var, 0, None)))
        (markup, markup_se), (lerner, lerner_se) = pieces["markup"], pieces["lerner"]
        mc = price_mean - markup
        out.append(pd.DataFrame({
            "model": name, "group": names, "rows": counts[keep].astype(int),
            "mc": mc, "mc_lo": mc - z * markup_se, "mc_hi": mc + z * markup_se,
            "markup": markup, "markup_lo": markup - z * markup_se,
            "markup_hi": markup + z * markup_se,
            "lerner": lerner, "lerner_lo": lerner - z * lerner_se,
            "lerner_hi": lerner + z * lerner_se,
        }))
    return pd.concat(out, ignore_index=True)
