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
    obs = pd.DataFrame({
        "market": f[MARKET].array,  # the panel's own arrays: no round trip through objects
        "period": f[PERIOD].array,
        "price": p,
        "quantity": q,
        "slope": demand.slope,
        "elasticity": demand.elasticity,
    })
    if supply is None:
        return Derived(obs, None, None, {})
    qstar = supply.qstar
    obs["qstar"] = qstar
    if supply.h is not None:
        obs["herfindahl"] = supply.h
    shares: dict[str, float] = {}
    variants: list[tuple[str, np.ndarray]] = [("estimated", np.full(len(f), supply.theta))]
    for c in study.candidates:
        hv = np.full(len(f), c.theta) if c.theta is not None else supply.h
        if hv is not None:
            variants.append((c.name, hv))
    for name, theta in variants:
        markup = theta * qstar
        mc = p - markup
        obs[f"theta_{name}"] = theta if name != "estimated" else supply.theta
        obs[f"marginal_cost_{name}"] = mc
        obs[f"markup_{name}"] = markup
        obs[f"lerner_{name}"] = markup / p
        valid = np.isfinite(mc)
        shares[name] = float(np.mean(mc[valid] < 0)) if valid.any() else float("nan")
    valid = np.isfinite(qstar)
    tables = {}
    for key, col in (("period", TIME), ("market", MARKET)):
        group_codes = codes(f[col])
        labels = (f.drop_duplicates(col).sort_values(col)[PERIOD if key == "period" else MARKET]
                  .astype(str).tolist())
        tables[key] = _group_means(p, q, demand, supply, variants, group_codes, labels,
                                   study.inference.level)
    return Derived(
        observations=obs,
        marginal_cost_mean=float(np.mean(obs["marginal_cost_estimated"][valid])),
        lerner_mean=float(np.mean(obs["lerner_estimated"][valid])),
        negative_cost_share=shares,
        by_period=tables["period"],
        by_market=tables["market"],
    )


def _group_means(p: np.ndarray, q: np.ndarray, demand: DemandResult, supply: SupplyResult,
                 variants: list[tuple[str, np.ndarray]], group: np.ndarray,
                 labels: list[str], level: float) -> pd.DataFrame:
    """Means by group with delta-method intervals for each model.

    For a group S and multiplier h (theta, or a candidate's fixed value), the mean
    markup is ``m = mean_S(h_i Q*_i)``; its gradient in (alpha, theta) is
    ``(mean_S(h_i dQ*_i/dalpha), mean_S(Q*_i))`` (the theta part for the estimated
    theta only), and its variance is ``g' V g`` with ``V`` the covariance of the
    stacked influence functions of alpha and theta, computed once.  The Lerner
    mean weights by ``1/P``.  Marginal cost is ``mean_S(P) - m``, with the variance of
    ``m``.  Group sums use :func:`conduct.iv.group_sums`: nothing of size rows x groups
    is formed.
    """
    qstar = supply.qstar
    ok = np.isfinite(qstar)
    slope = demand.slope
    dq = np.zeros_like(demand.slope_grad)
    dq[ok] = (q[ok] / slope[ok] ** 2)[:, None] * demand.slope_grad[ok]
    n_groups = len(labels)
    counts = np.bincount(group, weights=ok.astype(float), minlength=n_groups)
    keep = counts > 0
    names = [lab for lab, k in zip(labels, keep, strict=True) if k]

    def gmeans(m: np.ndarray) -> np.ndarray:
        """Group means of each column of ``m`` (rows without Q* hold zeros)."""
        sums = group_sums(group, m)
        return (sums / np.where(keep, counts, 1.0)[:, None])[keep]

    z = float(stats.norm.ppf(0.5 + level / 2))
    qs = np.where(ok, qstar, 0.0)
    stacked = np.column_stack([demand.fit.influence, supply.theta_influence])
    v_all = cluster_cov(stacked, supply.full_cov, 1)  # (k_d + 1, k_d + 1)
    k_d = demand.fit.influence.shape[1]
    price_mean = gmeans(np.where(ok, p, 0.0)[:, None])[:, 0]
    inv_p = 1.0 / p
    # [mean(w Q*), mean(w dQ*/dalpha)] per weight w, shared by every constant-theta model
    unit = {what: gmeans(np.column_stack([qs * w, dq * w[:, None]]))
            for what, w in (("markup", np.ones_like(p)), ("lerner", inv_p))}
    out = []
    for name, h in variants:
        constant = bool(np.all(h[ok] == h[ok][0])) if ok.any() else True
        pieces = {}
        for what, w in (("markup", np.ones_like(p)), ("lerner", inv_p)):
            if constant:
                theta = float(h[ok][0]) if ok.any() else 0.0
                means = theta * unit[what]
            else:
                hv = np.where(ok, h, 0.0) * w
                means = gmeans(np.column_stack([hv * qs, dq * hv[:, None]]))
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
