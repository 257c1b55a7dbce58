"""Panels simulated at a study's estimated structure, for the power analysis.

The power analysis (:mod:`conduct.power`) asks how often the conduct tests
reject each candidate model when another model is true, on panels shaped like
the user's.  This module builds those panels.  It keeps every exogenous column
of the observed panel (markets, periods, demand shifters and rotators, cost
shifters, sellers and concentration) and replaces only price and quantity by
the equilibrium of the *estimated* demand and cost functions under a chosen
conduct, with demand and cost shocks resampled from the fitted residuals.

Notes
-----
**Estimated structure.**  With fitted demand slope ``s_i = dQ/dP`` (linear) or
price coefficient ``eta_i`` (log; both include the rotators), the systematic
demand level of row i is what the fit leaves after price and the residual::

    linear:  A_i = Q_i - s_i P_i - e_i,          Q = A_i + e*_i + s_i P
    log:     A_i = ln Q_i - eta_i ln P_i - e_i,  ln Q = A_i + e*_i + eta_i ln P

where ``e_i`` is the demand IV residual.  It holds the shifter and rotator
terms and the estimated fixed effects (the residual of the absorbed regression
is the level residual minus its projection on the effects).  Likewise the
systematic marginal cost, net of the cost slope ``c_q``, is
``C_i = P_i - theta_hat Q*_i - c_q Q_i - u_i`` with ``u_i`` the supply IV
residual, so ``MC = C_i + u*_i + c_q Q``.  Demand and cost functions are the
same under every candidate model; only conduct changes.

**Equilibrium** ``P = MC + theta_i Q / |dQ/dP|`` with ``Q = D(P)``.  For linear
demand (``b = -s > 0``) it is linear in P::

    P = (C + c_q A + theta A / b) / (1 + theta + c_q b),   Q = (A - b C) / (1 + theta + c_q b)

For log demand ``Q* = P / |eta|`` and ``P (1 - theta/|eta|) = C + c_q Q(P)``:
closed form when ``c_q = 0``, otherwise bisection on ``ln P``.  A row with no
interior solution (demand not sloping down, ``P <= 0``, ``Q <= 0``, or no root)
is refused: it is left out of that simulated panel and counted.

**Shocks.**  Residual pairs ``(e_i, u_i)`` always travel together (keeping the
correlation of demand and cost shocks) and in whole market blocks (keeping
serial correlation within a market).  Two schemes:

* ``"wild"`` (the default): each market keeps its own residual path, multiplied
  by a random sign drawn once per market (the wild cluster bootstrap with
  Rademacher weights; Cameron, Gelbach & Miller 2008).  A market's shocks keep
  their own variance, so heteroskedasticity tied to the market's exogenous
  data survives and the estimator varies across simulated panels about as
  much as its cluster-robust variance says it does on the observed panel.
* ``"blocks"``: each market receives the residual path of a market drawn with
  replacement, period by period (where the drawn market lacks a period, a
  row of that market is drawn instead).  This breaks the link between a
  market's data and the size of its shocks, which can make the simulated
  estimates less variable than the observed cluster-robust errors suggest.

With fewer than :data:`MIN_MARKET_BLOCKS` markets (e.g. one market's time
series) either scheme resamples each market's own path in circular moving
blocks of about ``T^(1/3)`` periods.  Residuals are scaled by
``sqrt(n / (n - k - a))`` to undo the shrinkage of fitting ``k`` coefficients
and ``a`` absorbed effects.
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from typing import Literal, get_args

import numpy as np

from conduct.demand import DemandResult
from conduct.design import Prepared, codes
from conduct.iv import IVFit
from conduct.panel import TIME, Panel
from conduct.study import Candidate, Study
from conduct.supply import SupplyResult

__all__ = [
    "MIN_MARKET_BLOCKS", "SHOCK_SCHEMES", "ShockScheme", "Structure", "draw_shocks",
    "equilibrium", "estimated_structure", "markup_multiplier", "simulated_panel",
]

ShockScheme = Literal["wild", "blocks"]
SHOCK_SCHEMES: tuple[str, ...] = get_args(ShockScheme)
# Fewer markets than this: resample shocks in time blocks instead of market blocks.
MIN_MARKET_BLOCKS = 10
# Bisection steps on ln P: the bracket of width 40 shrinks below 1e-20.
_BISECTIONS = 90
# Half-width of the ln P bracket around the observed price for log demand.
_LOG_BRACKET = 20.0


@dataclass(frozen=True, slots=True)
class Structure:
    """A study's estimated demand and cost functions and their shocks.

    Every array has one entry per panel row, shape (n,).

    Attributes
    ----------
    form : str
        ``linear`` or ``log``.
    demand_level : numpy.ndarray
        ``A_i``: systematic demand at zero (log) price, without the shock.
    price_coef : numpy.ndarray
        ``s_i = dQ/dP`` (linear) or ``eta_i`` (log) at each row.
    cost_level : numpy.ndarray
        ``C_i``: systematic marginal cost net of ``c_q Q``; NaN outside the
        supply rows (where the estimated demand slope is not negative).
    cost_slope : float
        ``c_q`` (0 when the study assumes constant marginal cost).
    theta : float
        Estimated conduct parameter.
    h : numpy.ndarray or None
        Herfindahl index (or 1/N) per row, the Cournot benchmark.
    demand_shock, cost_shock : numpy.ndarray
        Scaled residuals ``e_i`` and ``u_i`` (``u`` NaN outside the supply rows).
    markets, periods : numpy.ndarray
        Integer codes 0..G-1 and 0..T-1 of each row's market and period.
    observed_price : numpy.ndarray
        Observed prices (they centre the bracket of the log-demand solver).
    """

    form: str
    demand_level: np.ndarray
    price_coef: np.ndarray
    cost_level: np.ndarray
    cost_slope: float
    theta: float
    h: np.ndarray | None
    demand_shock: np.ndarray
    cost_shock: np.ndarray
    markets: np.ndarray
    periods: np.ndarray
    observed_price: np.ndarray

    @property
    def complete(self) -> np.ndarray:
        """(n,) bool: rows with both a demand and a cost residual."""
        return np.isfinite(self.cost_shock)


def _dof_scale(fit: IVFit, prep: Prepared) -> float:
    """``sqrt(n / (n - k - a))``: undo the residual shrinkage of the fit."""
    absorbed = 0 if prep.constant else prep.absorbed.df_absorbed
    dof = fit.nobs - fit.k - absorbed
    return float(np.sqrt(fit.nobs / dof)) if dof > 0 else 1.0


def estimated_structure(panel: Panel, study: Study, demand: DemandResult,
                        supply: SupplyResult) -> Structure:
    """Recover demand and cost functions and their shocks from the fitted study.

    Parameters
    ----------
    panel : Panel
    study : Study
        Must have a ``[supply]`` table.
    demand : DemandResult
    supply : SupplyResult

    Returns
    -------
    Structure
    """
    f = panel.frame
    p = f[study.panel.price].to_numpy(dtype=float)
    q = f[study.panel.quantity].to_numpy(dtype=float)
    e = np.asarray(demand.fit.resid, dtype=float)
    if demand.form == "linear":
        coef = np.asarray(demand.slope, dtype=float)
        level = q - coef * p - e
    else:
        coef = np.asarray(demand.elasticity, dtype=float)
        level = np.log(q) - coef * np.log(p) - e
    rows = supply.rows
    fit = supply.fit
    c_q = fit.coef("Q") if "Q" in fit.names else 0.0
    u = np.full(len(f), np.nan)
    u[rows] = fit.resid
    cost = np.full(len(f), np.nan)
    cost[rows] = p[rows] - supply.theta * supply.qstar[rows] - c_q * q[rows] - fit.resid
    return Structure(
        form=demand.form,
        demand_level=level,
        price_coef=coef,
        cost_level=cost,
        cost_slope=float(c_q),
        theta=float(supply.theta),
        h=supply.h,
        demand_shock=e * _dof_scale(demand.fit, demand.prepared),
        cost_shock=u * _dof_scale(fit, supply.prepared),
        markets=panel.market_codes(),
        periods=codes(f[TIME].to_numpy()),
        observed_price=p,
    )


def markup_multiplier(candidate: Candidate, structure: Structure) -> np.ndarray | None:
    """The conduct ``theta_i`` a candidate model sets at each row (None: no H for Cournot)."""
    if candidate.theta is not None:
        return np.full(len(structure.demand_level), float(candidate.theta))
    return None if structure.h is None else np.asarray(structure.h, dtype=float)


def equilibrium(structure: Structure, theta: np.ndarray, demand_shock: np.ndarray,
                cost_shock: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Price and quantity solving ``P = MC + theta Q/|dQ/dP|`` and ``Q = D(P)`` per row.

    Parameters
    ----------
    structure : Structure
    theta : numpy.ndarray
        (n,) conduct at each row.
    demand_shock, cost_shock : numpy.ndarray
        (n,) shocks ``e*`` and ``u*``.

    Returns
    -------
    (numpy.ndarray, numpy.ndarray, numpy.ndarray)
        Price (n,), quantity (n,) and a bool mask (n,) of rows with an interior
        solution; price and quantity are NaN elsewhere.
    """
    a = structure.demand_level + demand_shock
    c = structure.cost_level + cost_shock
    s = structure.price_coef
    cq = structure.cost_slope
    with np.errstate(all="ignore"):
        if structure.form == "linear":
            b = -s
            den = 1.0 + theta + cq * b
            price = (c + cq * a + theta * a / b) / den
            quantity = a - b * price
            ok = (s < 0) & (den > 0)
        else:
            price, ok = _log_price(a, s, c, cq, theta, structure.observed_price)
            quantity = np.exp(a + s * np.log(price))
        ok &= np.isfinite(price) & np.isfinite(quantity) & (price > 0) & (quantity > 0)
    return np.where(ok, price, np.nan), np.where(ok, quantity, np.nan), ok


def _log_price(a: np.ndarray, eta: np.ndarray, c: np.ndarray, cq: float, theta: np.ndarray,
               p_obs: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Solve ``P (1 - theta/|eta|) = C + c_q exp(a) P^eta`` for P, row by row (vectorised)."""
    k = 1.0 - theta / np.abs(eta)
    ok = (eta < 0) & (k > 0) & np.isfinite(c)
    if cq == 0.0:
        return c / k, ok & (c > 0)

    def gap(x: np.ndarray) -> np.ndarray:
        return np.exp(x) * k - c - cq * np.exp(a + eta * x)

    centre = np.log(p_obs)
    lo, hi = centre - _LOG_BRACKET, centre + _LOG_BRACKET
    g_lo, g_hi = gap(lo), gap(hi)
    ok &= np.isfinite(g_lo) & np.isfinite(g_hi) & (np.sign(g_lo) != np.sign(g_hi))
    rising = g_hi > 0
    for _ in range(_BISECTIONS):
        mid = 0.5 * (lo + hi)
        above = (gap(mid) > 0) == rising
        hi = np.where(above, mid, hi)
        lo = np.where(above, lo, mid)
    return np.exp(0.5 * (lo + hi)), ok


def draw_shocks(structure: Structure, rng: np.random.Generator,
                scheme: ShockScheme = "wild") -> tuple[np.ndarray, np.ndarray]:
    """Resample the (demand, cost) residual pairs in market blocks (see the module notes).

    Parameters
    ----------
    structure : Structure
    rng : numpy.random.Generator
    scheme : {'wild', 'blocks'}
        Random signs on each market's own residuals, or residual paths of
        markets drawn with replacement.

    Returns
    -------
    (numpy.ndarray, numpy.ndarray)
        Demand and cost shocks, each (n,); NaN only where the row itself has
        no cost residual under ``wild``, never under ``blocks``.
    """
    if scheme not in SHOCK_SCHEMES:
        raise ValueError(f"scheme must be one of {', '.join(SHOCK_SCHEMES)}, got {scheme!r}")
    done = structure.complete
    if not done.any():
        raise ValueError("no row has both a demand and a cost residual")
    mk, pt = structure.markets, structure.periods
    n_markets = int(mk.max()) + 1
    if n_markets < MIN_MARKET_BLOCKS:
        source = _time_blocks(mk, pt, done, n_markets, rng)
    elif scheme == "blocks":
        source = _market_blocks(mk, pt, done, n_markets, rng)
    else:
        sign = (2 * rng.integers(0, 2, n_markets) - 1).astype(float)[mk]
        return sign * structure.demand_shock, sign * structure.cost_shock
    return structure.demand_shock[source], structure.cost_shock[source]


def _market_blocks(mk: np.ndarray, pt: np.ndarray, done: np.ndarray, n_markets: int,
                   rng: np.random.Generator) -> np.ndarray:
    """Row whose residuals each row receives: same period of a market drawn with replacement."""
    n_periods = int(pt.max()) + 1
    rows = np.flatnonzero(done)
    keys = mk[rows].astype(np.int64) * n_periods + pt[rows]  # rows are sorted by key
    order = np.argsort(keys, kind="stable")
    rows, keys = rows[order], keys[order]
    donors = np.unique(mk[rows])
    start = np.searchsorted(mk[rows], np.arange(n_markets), side="left")
    count = np.searchsorted(mk[rows], np.arange(n_markets), side="right") - start
    pick = donors[rng.integers(0, donors.size, n_markets)]  # donor market of each market
    fallback = rng.random(len(mk))  # always drawn, so the stream never depends on the data
    src = pick[mk]
    want = src.astype(np.int64) * n_periods + pt
    pos = np.clip(np.searchsorted(keys, want), 0, len(keys) - 1)
    hit = keys[pos] == want
    spare = start[src] + np.minimum((fallback * count[src]).astype(np.int64), count[src] - 1)
    return np.where(hit, rows[pos], rows[spare])


def _time_blocks(mk: np.ndarray, pt: np.ndarray, done: np.ndarray, n_markets: int,
                 rng: np.random.Generator) -> np.ndarray:
    """Circular moving blocks of each market's own complete rows, in period order."""
    out = np.empty(len(mk), dtype=np.int64)
    pooled = np.flatnonzero(done)
    for g in range(n_markets):
        target = np.flatnonzero(mk == g)
        target = target[np.argsort(pt[target], kind="stable")]
        own = np.flatnonzero(done & (mk == g))
        own = own[np.argsort(pt[own], kind="stable")] if own.size else pooled
        length = max(1, round(own.size ** (1.0 / 3.0)))
        n_blocks = -(-target.size // length)
        starts = rng.integers(0, own.size, n_blocks)
        idx = (starts[:, None] + np.arange(length)[None, :]).reshape(-1)[: target.size]
        out[target] = own[idx % own.size]
    return out


def simulated_panel(panel: Panel, study: Study, structure: Structure, theta: np.ndarray,
                    rng: np.random.Generator, scheme: ShockScheme = "wild"
                    ) -> tuple[Panel, int]:
    """One panel with the observed exogenous data and equilibrium price and quantity.

    Parameters
    ----------
    panel : Panel
        The observed panel (its exogenous columns are kept).
    study : Study
    structure : Structure
    theta : numpy.ndarray
        (n,) the true conduct at each row.
    rng : numpy.random.Generator
    scheme : {'wild', 'blocks'}
        How shocks are resampled (:func:`draw_shocks`).

    Returns
    -------
    (Panel, int)
        The simulated panel (refused rows left out) and the number of refused rows.
    """
    e, u = draw_shocks(structure, rng, scheme)
    price, quantity, ok = equilibrium(structure, theta, e, u)
    frame = panel.frame.copy()
    frame[study.panel.price] = price
    frame[study.panel.quantity] = quantity
    keep = np.flatnonzero(ok)
    if keep.size < len(frame):
        frame = frame.iloc[keep].reset_index(drop=True)
    return (replace(panel, frame=frame, source_rows=panel.source_rows[keep]),
            int(len(ok) - keep.size))
