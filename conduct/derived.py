"""Derived quantities: implied marginal cost, markup and Lerner index per observation.

Under a conduct parameter theta (estimated, or fixed by a candidate model) the
supply relation gives, at each observation::

    markup = theta * Q*,   MC = P - markup,   Lerner = markup / P = theta / |elasticity|

(Cowling & Waterson 1976 give the Cournot case, Lerner = H / |elasticity|.)
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from conduct.demand import DemandResult
from conduct.panel import MARKET, PERIOD, Panel
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
    """

    observations: pd.DataFrame
    marginal_cost_mean: float | None
    lerner_mean: float | None
    negative_cost_share: dict[str, float]


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
        "market": f[MARKET].to_numpy(),
        "period": f[PERIOD].to_numpy(),
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
    return Derived(
        observations=obs,
        marginal_cost_mean=float(np.mean(obs["marginal_cost_estimated"][valid])),
        lerner_mean=float(np.mean(obs["lerner_estimated"][valid])),
        negative_cost_share=shares,
    )
