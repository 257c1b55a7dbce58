"""Synthetic homogeneous-good markets with known conduct.

The generator draws exogenous data for markets x periods, solves the
equilibrium of every market-period exactly, and returns the panel an analyst
would see together with the truth behind it.  Everything here is pure numpy;
:mod:`conduct.presets` holds the named scenarios, the option parsing used by
``conduct simulate`` and the files a simulation writes.

Notes
-----
**Demand** in market m, period t, with rotator R (one, optional), shifters X:

* linear: ``Q = A_mt + (a_p + a_r*R) * P``, so ``dQ/dP = a_p + a_r*R`` (must be < 0);
* log: ``ln Q = A_mt + (h + h_r*R) * ln P``, so ``dQ/dP = (h + h_r*R) * Q / P``;

with ``A_mt = a0 + b'X + g*R + alpha_m + delta_t + e_mt`` (market and period
effects and the demand shock are normal draws).

**Costs.**  Firm i's marginal cost is ``mc_i = c_i + c_q*q_i`` (``cost_slope_scope
= "firm"``) or ``mc_i = c_i + c_q*Q`` (``"industry"``: an input price rising with
industry output), with ``c_i = c0 + c'W_mt + f_mi + u_mt``: a persistent firm
deviation ``f_mi`` and a market-period cost shock ``u_mt``.

**Conduct** at the firm level and its industry counterpart.  Let
``Q* = Q / |dQ/dP|`` and let the industry marginal cost be the share-weighted
``MC = sum_i s_i * mc_i``.

* ``"cournot"``: every active firm solves ``P + q_i * dP/dQ = mc_i`` (Nash in
  quantities, asymmetric firms).  Summing the conditions with weights ``s_i``
  gives ``P = MC + H * Q*`` exactly, so the industry ``theta = H``, the
  Herfindahl index of the equilibrium shares.
* ``"competitive"``: price-taking, ``P = mc_i`` for every active firm, so
  ``MC = P`` and ``theta = 0``.  With constant firm costs the lowest-cost firm
  serves the market (exact ties share equally).
* ``"collusive"`` and any ``theta`` in [0, 1]: industry conduct with equal
  quotas.  Each active firm produces ``Q / N``, so ``H = 1/N`` and ``MC`` is the
  average marginal cost at the quota, and the industry sets
  ``P = MC + theta * Q*``.  For ``theta = 1`` this is exactly joint-profit
  maximisation subject to equal quotas (``d/dQ [P(Q) Q - sum_i C_i(Q/N)] = 0``).

Firms with non-positive output drop out: incumbents are sorted by cost and the
highest-cost active firm leaves while its output is not positive (Cournot,
competitive) or its marginal cost at the quota exceeds the price (quotas); the
equilibrium is recomputed each time.  Linear demand has closed forms; log
demand is solved by bisection on ``ln P`` to machine precision, and every
solution's first-order and market-clearing residuals are checked.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass, field
from typing import Literal, get_args

import numpy as np

from conduct.errors import StudyFileError, suggest

__all__ = [
    "CONDUCTS",
    "Episode",
    "MarketEquilibrium",
    "SimulatedPanel",
    "SimulationSpec",
    "conduct_theta",
    "period_labels",
    "simulate",
    "solve_market",
    "validate_spec",
]

Form = Literal["linear", "log"]
Scope = Literal["firm", "industry"]
ConductName = Literal["competitive", "cournot", "collusive"]
CONDUCTS: tuple[str, ...] = get_args(ConductName)
Conduct = ConductName | float

# Relative tolerance of the solver's own residual check (the tests demand 1e-8).
_CHECK_TOL = 1e-9
# Seasonal mean of the rotator by quarter of the year (Q1..Q4): winters are severe.
_SEASON = np.array([1.6, 0.4, 0.1, 1.0])
_QUARTER = re.compile(r"^(\d{4})Q([1-4])$")


@dataclass(frozen=True, slots=True)
class Episode:
    """A different conduct in a subset of markets within a period window.

    Attributes
    ----------
    conduct : str or float
        ``"competitive"``, ``"cournot"``, ``"collusive"`` or a theta in [0, 1].
    markets : tuple of int
        1-based market numbers.
    first_period, last_period : int
        1-based period numbers, inclusive.
    """

    conduct: Conduct
    markets: tuple[int, ...]
    first_period: int
    last_period: int


@dataclass(frozen=True, slots=True)
class SimulationSpec:
    """Every knob of a simulated panel (see the module notes for the model).

    Attributes
    ----------
    markets, periods : int
        Panel size.
    first_quarter : str or None
        Label of the first period (``"2013Q1"``); None gives integer periods 1..T.
    market_names : tuple of str
        Market labels; empty gives ``M01``, ``M02``, ...
    market_column, period_column, quantity_column : str
        Column names of the panel (price, ``sellers`` and ``hhi`` are fixed).
    form : {"linear", "log"}
        Demand form.
    intercept, price_slope : float
        ``a0`` and ``a_p`` (linear) or ``h`` (log); ``price_slope`` must be negative.
    rotator : str or None
        Name of the rotator column (positive, seasonal); None for no rotator.
    rotator_level, rotator_strength : float
        ``g`` (level effect) and ``a_r`` / ``h_r`` (price x rotator coefficient).
    demand_shifters : tuple of (str, float)
        Shifter names and coefficients ``b``.
    market_effect_sd, period_effect_sd, demand_shock_sd : float
        Standard deviations of ``alpha_m``, ``delta_t`` and ``e_mt``.
    sellers : (int, int)
        Range of incumbent sellers; the count moves by one step at random.
    entry_exit_rate : float
        Chance per period that a market's incumbent count moves (up or down).
    cost_constant : float
        ``c0``.
    cost_shifters : tuple of (str, float)
        Cost-index names (base 100) and coefficients ``c``.
    cost_slope : float
        ``c_q >= 0``; 0 gives constant marginal cost.
    cost_slope_scope : {"firm", "industry"}
        Whether marginal cost rises with the firm's own or the industry's output.
    firm_cost_sd, cost_shock_sd : float
        Persistent firm cost deviation and market-period cost shock.
    conduct : str or float
        Conduct outside episodes.
    episodes : tuple of Episode
        Later episodes override earlier ones where they overlap.
    instrument_interactions : bool
        Also write cost shifter x rotator columns (instruments for price x rotator).
    title : str
        Title of the study file.
    break_test, rolling_window : bool, int
        Written into the study file's [supply] table (break search, rolling theta).
    seed : int
        Seed of every random draw.
    """

    markets: int = 40
    periods: int = 40
    first_quarter: str | None = "2013Q1"
    market_names: tuple[str, ...] = ()
    market_column: str = "region"
    period_column: str = "quarter"
    quantity_column: str = "tonnes"
    form: Form = "linear"
    intercept: float = 62000.0
    price_slope: float = -600.0
    rotator: str | None = "winter_severity"
    rotator_level: float = 10000.0
    rotator_strength: float = 150.0
    demand_shifters: tuple[tuple[str, float], ...] = (("highway_km", 8000.0),)
    market_effect_sd: float = 4000.0
    period_effect_sd: float = 1500.0
    demand_shock_sd: float = 1200.0
    sellers: tuple[int, int] = (2, 6)
    entry_exit_rate: float = 0.05
    cost_constant: float = 2.0
    cost_shifters: tuple[tuple[str, float], ...] = (
        ("diesel", 0.30),
        ("energy", 0.15),
        ("wage", 0.20),
    )
    cost_slope: float = 0.0
    cost_slope_scope: Scope = "firm"
    firm_cost_sd: float = 2.0
    cost_shock_sd: float = 1.5
    conduct: Conduct = "cournot"
    episodes: tuple[Episode, ...] = ()
    instrument_interactions: bool = False
    title: str = "Synthetic homogeneous-good markets (invented data)"
    break_test: bool = False
    rolling_window: int = 0
    seed: int = 1


@dataclass(frozen=True, slots=True)
class MarketEquilibrium:
    """The equilibrium of one market-period.

    Attributes
    ----------
    price, quantity : float
        Equilibrium price and industry output (the sum of firm outputs).
    outputs, marginal_costs : numpy.ndarray
        Shape (n,) for the n incumbents in the order given: output (0 if inactive)
        and marginal cost at that output.
    active : numpy.ndarray
        Shape (n,), bool: the firm produces.
    dq_dp : float
        Demand slope at the equilibrium.
    theta : float
        Industry conduct: ``P = marginal_cost + theta * quantity / |dq_dp|``.
    marginal_cost : float
        Share-weighted marginal cost of the active firms.
    hhi : float
        Herfindahl index of output shares, in (0, 1].
    sellers : int
        Active firms.
    residual : float
        Largest first-order/market-clearing residual, relative to the price or quantity.
    """

    price: float
    quantity: float
    outputs: np.ndarray
    marginal_costs: np.ndarray
    active: np.ndarray
    dq_dp: float
    theta: float
    marginal_cost: float
    hhi: float
    sellers: int
    residual: float

    @property
    def markup(self) -> float:
        """``P - MC``."""
        return self.price - self.marginal_cost

    @property
    def elasticity(self) -> float:
        """Price elasticity of demand ``dQ/dP * P / Q``."""
        return self.dq_dp * self.price / self.quantity


@dataclass(frozen=True, slots=True)
class SimulatedPanel:
    """A simulated panel, the truth per observation and the firm-level detail.

    Observations are ordered by market, then period (``n = markets * periods``).

    Attributes
    ----------
    spec : SimulationSpec
    panel : dict of str to numpy.ndarray
        The columns an analyst sees, each shape (n,), in file order.
    truth : dict of str to numpy.ndarray
        Per observation: ``market``, ``period``, ``episode`` (0/1), ``conduct``,
        ``theta_true``, ``price``, ``quantity``, ``marginal_cost``, ``markup``,
        ``lerner``, ``hhi``, ``sellers``, ``elasticity``, ``dq_dp``, ``q_star``,
        ``demand_intercept``; each shape (n,).
    firms : dict of str to numpy.ndarray
        Shape (n, max sellers): ``present`` (incumbent), ``active``, ``cost``
        (``c_i``), ``output`` and ``marginal_cost``.
    """

    spec: SimulationSpec
    panel: dict[str, np.ndarray] = field(repr=False)
    truth: dict[str, np.ndarray] = field(repr=False)
    firms: dict[str, np.ndarray] = field(repr=False)


def conduct_theta(conduct: Conduct) -> tuple[str, float | None]:
    """Normalise a conduct to ``(kind, theta)``.

    Parameters
    ----------
    conduct : str or float
        A name in :data:`CONDUCTS` or a theta in [0, 1].

    Returns
    -------
    (str, float or None)
        ``("cournot", None)``, ``("competitive", None)`` or ``("quota", theta)``;
        ``"collusive"`` is ``("quota", 1.0)``.

    Raises
    ------
    StudyFileError
        For an unknown name or a theta outside [0, 1].
    """
    if isinstance(conduct, str):
        if conduct not in CONDUCTS:
            raise StudyFileError(
                f"Unknown conduct '{conduct}'{suggest(conduct, CONDUCTS)}; use one of "
                f"{', '.join(CONDUCTS)} or a number theta in [0, 1]."
            )
        return ("quota", 1.0) if conduct == "collusive" else (conduct, None)
    theta = float(conduct)
    if isinstance(conduct, bool) or not 0.0 <= theta <= 1.0:
        raise StudyFileError(f"Conduct theta must lie in [0, 1], got {conduct!r}.")
    return "quota", theta


# ----------------------------------------------------------------------------------------
# One market-period
# ----------------------------------------------------------------------------------------


def _demand(form: str, intercept: float, slope: float, price: float) -> float:
    if form == "linear":
        return intercept + slope * price
    return math.exp(intercept + slope * math.log(price))


def _solve_linear(
    a: float, slope: float, c: np.ndarray, kind: str, theta: float | None, cq: float, cqi: float
) -> tuple[float, np.ndarray]:
    """Closed forms for linear demand ``Q = a + slope*P`` given the active firms."""
    b, n = -slope, len(c)
    if kind == "quota":
        assert theta is not None
        total = (a / b - c.mean()) / ((1.0 + theta) / b + cq / n + cqi)
        return (a - total) / b, np.full(n, total / n)
    k = (1.0 if kind == "cournot" else 0.0) / b + cq  # own-output slope of each FOC
    if k > 0:
        total = (n * a / b - c.sum()) / (k + n / b + n * cqi)
        price = (a - total) / b
        return price, (price - c - cqi * total) / k
    cmin = c.min()  # price-taking with constant firm cost: the lowest cost serves
    price = (cmin + cqi * a) / (1.0 + cqi * b)
    tie = c <= cmin + 1e-12 * max(1.0, abs(cmin))
    return price, np.where(tie, (a - b * price) / tie.sum(), 0.0)


def _solve_log(
    a: float, eta: float, c: np.ndarray, kind: str, theta: float | None, cq: float, cqi: float,
    where: str,
) -> tuple[float, np.ndarray]:
    """Bisection on ``ln P`` for log demand ``ln Q = a + eta*ln P`` given the active firms."""
    n, ae = len(c), -eta
    tf = 1.0 if kind == "cournot" else 0.0

    def outputs(p: float) -> np.ndarray:
        q = _demand("log", a, eta, p)
        if kind == "quota":
            return np.full(n, q / n)
        k = tf * p / (ae * q) + cq
        if k > 0:
            return (p - c - cqi * q) / k
        tie = c <= c.min() + 1e-12 * max(1.0, abs(c.min()))
        return np.where(tie, q / tie.sum(), 0.0)

    def excess(p: float) -> float:
        q = _demand("log", a, eta, p)
        if kind == "quota":
            assert theta is not None
            return p * (1.0 - theta / ae) - c.mean() - (cq / n + cqi) * q
        if tf == 0.0 and cq == 0.0:
            return p - c.min() - cqi * q
        return float(outputs(p).sum()) - q

    lo = float(c.mean() if kind == "quota" else c.min())
    hi = 2.0 * lo
    for _ in range(200):
        if excess(hi) > 0:
            break
        lo, hi = hi, 2.0 * hi
    else:
        raise StudyFileError(
            f"No interior equilibrium at {where}: demand is too inelastic (elasticity "
            f"{eta:.4g} with {n} seller(s)); make price_slope more negative or "
            "rotator_strength smaller."
        )
    for _ in range(400):
        mid = math.sqrt(lo * hi)
        if excess(mid) > 0:
            hi = mid
        else:
            lo = mid
        if hi - lo <= 4 * np.finfo(float).eps * hi:
            break
    price = 0.5 * (lo + hi)
    return price, outputs(price)


def solve_market(
    *,
    form: Form,
    intercept: float,
    slope: float,
    costs: np.ndarray,
    conduct: Conduct,
    cost_slope: float = 0.0,
    cost_slope_scope: Scope = "firm",
    where: str = "this market",
) -> MarketEquilibrium:
    """Solve one market-period exactly.

    Parameters
    ----------
    form : {"linear", "log"}
        ``Q = intercept + slope*P`` or ``ln Q = intercept + slope*ln P``.
    intercept, slope : float
        Demand at this observation (rotator already applied); ``slope < 0``.
    costs : numpy.ndarray
        Shape (n,): cost intercepts ``c_i`` of the incumbents, all positive.
    conduct : str or float
        ``"competitive"``, ``"cournot"``, ``"collusive"`` or a theta in [0, 1].
    cost_slope : float
        ``c_q >= 0``.
    cost_slope_scope : {"firm", "industry"}
        ``mc_i = c_i + c_q*q_i`` or ``mc_i = c_i + c_q*Q``.
    where : str
        How to name the observation in errors.

    Returns
    -------
    MarketEquilibrium

    Raises
    ------
    StudyFileError
        When demand slopes upward, a cost is not positive, or no interior
        equilibrium exists (the message names the knob to change).
    """
    c_all = np.asarray(costs, dtype=float)
    kind, theta = conduct_theta(conduct)
    if c_all.ndim != 1 or len(c_all) == 0:
        raise StudyFileError(f"No sellers at {where}: give at least one firm cost.")
    if not slope < 0:
        raise StudyFileError(
            f"Demand does not slope downward at {where} (price coefficient {slope:.4g}); "
            "price_slope + rotator_strength * rotator must stay negative: make price_slope "
            "more negative or rotator_strength smaller."
        )
    if not np.all(c_all > 0):
        raise StudyFileError(
            f"A marginal cost is not positive at {where} (lowest {c_all.min():.4g}); raise "
            "cost_constant or lower firm_cost_sd / cost_shock_sd."
        )
    cq, cqi = (cost_slope, 0.0) if cost_slope_scope == "firm" else (0.0, cost_slope)
    order = np.argsort(c_all, kind="stable")
    n = len(c_all)
    while True:
        c = c_all[order[:n]]
        if form == "linear":
            price, q = _solve_linear(intercept, slope, c, kind, theta, cq, cqi)
        else:
            price, q = _solve_log(intercept, slope, c, kind, theta, cq, cqi, where)
        total = float(q.sum())
        viable = total > 0 and price > 0
        if viable:
            mc = c + cq * q + cqi * total
            last_out = q[-1] <= 0 if kind != "quota" else mc[-1] > price
            if not last_out:
                break
        elif n == 1:
            knob = "intercept" if form == "linear" else "intercept (log scale)"
            raise StudyFileError(
                f"No interior equilibrium at {where}: quantity {total:.4g} at price "
                f"{price:.4g}; demand is too small for these costs: raise {knob} or lower "
                "cost_constant."
            )
        n -= 1
    outputs = np.zeros(len(c_all))
    outputs[order[:n]] = np.maximum(q, 0.0)
    total = float(outputs.sum())
    active = outputs > 0
    mcs = c_all + cq * outputs + cqi * total
    dq_dp = slope if form == "linear" else slope * total / price
    shares = outputs / total
    hhi = float(shares @ shares)
    industry_theta = hhi if kind == "cournot" else (0.0 if kind == "competitive" else theta)
    assert industry_theta is not None
    mc_ind = float(shares @ mcs)
    residual = _residual(form, intercept, slope, price, outputs, mcs, dq_dp, kind, theta)
    if residual > _CHECK_TOL:
        raise StudyFileError(
            f"The equilibrium solver did not converge at {where} (relative residual "
            f"{residual:.2e}); the parameters are too extreme: bring price_slope, intercept "
            "and cost_constant closer to the defaults."
        )
    return MarketEquilibrium(
        price=float(price), quantity=total, outputs=outputs, marginal_costs=mcs,
        active=active, dq_dp=float(dq_dp), theta=float(industry_theta),
        marginal_cost=mc_ind, hhi=hhi, sellers=int(active.sum()), residual=residual,
    )


def _residual(
    form: str, a: float, slope: float, price: float, q: np.ndarray, mc: np.ndarray,
    dq_dp: float, kind: str, theta: float | None,
) -> float:
    """Largest relative violation of market clearing and the conduct's conditions."""
    total = q.sum()
    act = q > 0
    clearing = abs(total - _demand(form, a, slope, price)) / total
    if kind == "quota":
        foc = price + (theta or 0.0) * total / dq_dp - mc[act].mean()
        bad = 0.0
    else:
        tf = 1.0 if kind == "cournot" else 0.0
        foc = np.abs(price + tf * q[act] / dq_dp - mc[act]).max()
        bad = max(0.0, float((price - mc[~act]).max(initial=-np.inf)))
    return float(max(clearing, abs(foc) / price, bad / price))


# ----------------------------------------------------------------------------------------
# The panel
# ----------------------------------------------------------------------------------------


def period_labels(spec: SimulationSpec) -> list[str]:
    """Period labels: quarters from ``first_quarter`` or ``"1"``, ``"2"``, ...

    Parameters
    ----------
    spec : SimulationSpec

    Returns
    -------
    list of str
        One label per period.
    """
    if spec.first_quarter is None:
        return [str(t + 1) for t in range(spec.periods)]
    m = _QUARTER.match(spec.first_quarter)
    assert m is not None  # checked by validate_spec
    start = int(m.group(1)) * 4 + int(m.group(2)) - 1
    return [f"{(start + t) // 4}Q{(start + t) % 4 + 1}" for t in range(spec.periods)]


def market_labels(spec: SimulationSpec) -> list[str]:
    """Market labels: ``market_names`` or ``M01``, ``M02``, ...

    Parameters
    ----------
    spec : SimulationSpec

    Returns
    -------
    list of str
    """
    if spec.market_names:
        return list(spec.market_names[: spec.markets])
    width = max(2, len(str(spec.markets)))
    return [f"M{m + 1:0{width}d}" for m in range(spec.markets)]


def validate_spec(spec: SimulationSpec) -> None:
    """Check every knob once, naming the bad one and the valid values.

    Parameters
    ----------
    spec : SimulationSpec

    Raises
    ------
    StudyFileError
        On the first invalid knob.
    """

    def bad(knob: str, msg: str) -> StudyFileError:
        return StudyFileError(f"Simulation setting '{knob}' {msg}")

    for knob in ("markets", "periods"):
        v = getattr(spec, knob)
        if isinstance(v, bool) or not isinstance(v, int) or v < 1:
            raise bad(knob, f"must be a positive integer, got {v!r}.")
    if spec.form not in get_args(Form):
        raise bad("form", f"is {spec.form!r}{suggest(str(spec.form), get_args(Form))}; "
                          f"allowed values: {', '.join(get_args(Form))}.")
    if spec.cost_slope_scope not in get_args(Scope):
        raise bad("cost_slope_scope", f"is {spec.cost_slope_scope!r}; allowed values: "
                                      f"{', '.join(get_args(Scope))}.")
    if spec.first_quarter is not None and not _QUARTER.match(spec.first_quarter):
        raise bad("first_quarter", f"must look like 2013Q1, got {spec.first_quarter!r}.")
    if spec.market_names and len(spec.market_names) < spec.markets:
        raise bad("market_names", f"lists {len(spec.market_names)} names for "
                                  f"{spec.markets} markets.")
    if len(set(market_labels(spec))) != spec.markets:
        raise bad("market_names", "repeats a name.")
    if not spec.price_slope < 0:
        raise bad("price_slope", f"must be negative (demand slopes down), got {spec.price_slope}.")
    lo, hi = spec.sellers
    if not 1 <= lo <= hi <= 100:
        raise bad("sellers", f"must be a range (min, max) with 1 <= min <= max <= 100, got "
                             f"{spec.sellers}.")
    for knob in ("market_effect_sd", "period_effect_sd", "demand_shock_sd", "firm_cost_sd",
                 "cost_shock_sd", "cost_slope"):
        v = getattr(spec, knob)
        if not (math.isfinite(v) and v >= 0):
            raise bad(knob, f"must be zero or positive, got {v}.")
    if not 0 <= spec.entry_exit_rate <= 1:
        raise bad("entry_exit_rate", f"must lie in [0, 1], got {spec.entry_exit_rate}.")
    names = [spec.market_column, spec.period_column, spec.quantity_column, "price", "sellers",
             "hhi", *([spec.rotator] if spec.rotator else []),
             *(n for n, _ in spec.demand_shifters), *(n for n, _ in spec.cost_shifters)]
    dupes = sorted({x for x in names if names.count(x) > 1})
    if dupes:
        raise bad("columns", f"repeat the column name(s) {', '.join(dupes)}.")
    if spec.instrument_interactions and not (spec.rotator and spec.cost_shifters):
        raise bad("instrument_interactions", "needs a rotator and at least one cost shifter.")
    conduct_theta(spec.conduct)
    for i, ep in enumerate(spec.episodes, 1):
        conduct_theta(ep.conduct)
        if not ep.markets or not all(1 <= m <= spec.markets for m in ep.markets):
            raise bad("episodes", f"episode {i} names markets {list(ep.markets)}, but the "
                                  f"markets are numbered 1 to {spec.markets}.")
        if not 1 <= ep.first_period <= ep.last_period <= spec.periods:
            raise bad("episodes", f"episode {i} covers periods {ep.first_period} to "
                                  f"{ep.last_period}, outside 1 to {spec.periods}.")


def _index_paths(rng: np.random.Generator, m: int, t: int) -> np.ndarray:
    """A cost index (base 100): national random walk x regional level x regional AR(1)."""
    national = np.cumsum(rng.normal(0.004, 0.03, t))
    national -= national[0]
    regional = rng.uniform(-0.06, 0.06, m)
    local = np.zeros((m, t))
    shocks = rng.normal(0.0, 0.10, (m, t))
    local[:, 0] = shocks[:, 0] / math.sqrt(1 - 0.7**2)
    for s in range(1, t):
        local[:, s] = 0.7 * local[:, s - 1] + shocks[:, s]
    return 100.0 * np.exp(national[None, :] + regional[:, None] + local)


def _conduct_grid(spec: SimulationSpec) -> np.ndarray:
    """Shape (markets, periods): index of the regime (0 = base, k = episode k)."""
    grid = np.zeros((spec.markets, spec.periods), dtype=int)
    for k, ep in enumerate(spec.episodes, 1):
        rows = np.array(ep.markets) - 1
        grid[rows, ep.first_period - 1 : ep.last_period] = k
    return grid


def simulate(spec: SimulationSpec) -> SimulatedPanel:
    """Draw the exogenous data and solve every market-period's equilibrium.

    Parameters
    ----------
    spec : SimulationSpec

    Returns
    -------
    SimulatedPanel

    Raises
    ------
    StudyFileError
        For an invalid knob or an observation without an interior equilibrium
        (the message names the market, the period and the knob to change).

    Notes
    -----
    Independent random streams (``numpy.random.SeedSequence(seed).spawn``) feed
    demand shifters, the rotator, cost indexes, demand shocks, firm costs and
    entry, so changing one knob's scale leaves the other draws unchanged.
    Demand shifters follow a market level times slow growth; the rotator is a
    quarter-of-year mean times a regional climate factor times a bounded draw.
    """
    validate_spec(spec)
    M, T = spec.markets, spec.periods
    g_x, g_r, g_w, g_d, g_c, g_n = (
        np.random.default_rng(s) for s in np.random.SeedSequence(spec.seed).spawn(6)
    )
    years = np.arange(T) / 4.0
    X = {}
    for name, _ in spec.demand_shifters:
        base = g_x.uniform(1.0, 3.0, M)
        growth = g_x.uniform(0.0, 0.02, M)
        X[name] = base[:, None] * (1 + growth[:, None] * years) * g_x.lognormal(0, 0.01, (M, T))
    start = 0
    if spec.first_quarter is not None:
        start = int(spec.first_quarter[-1]) - 1
    season = _SEASON[(start + np.arange(T)) % 4]
    climate = g_r.uniform(0.6, 1.4, M)
    R = season[None, :] * climate[:, None] * (0.75 + 0.5 * g_r.beta(2.0, 2.0, (M, T)))
    W = {name: _index_paths(g_w, M, T) for name, _ in spec.cost_shifters}

    A = spec.intercept + spec.market_effect_sd * g_d.normal(size=M)[:, None]
    A = A + spec.period_effect_sd * g_d.normal(size=T)[None, :]
    A = A + spec.demand_shock_sd * g_d.normal(size=(M, T))
    for name, coef in spec.demand_shifters:
        A = A + coef * X[name]
    slope = np.full((M, T), spec.price_slope)
    if spec.rotator:
        A = A + spec.rotator_level * R
        slope = slope + spec.rotator_strength * R

    lo, hi = spec.sellers
    firm_dev = spec.firm_cost_sd * g_c.normal(size=(M, hi))
    cost = spec.cost_constant + spec.cost_shock_sd * g_c.normal(size=(M, T))
    for name, coef in spec.cost_shifters:
        cost = cost + coef * W[name]
    N = np.empty((M, T), dtype=int)
    N[:, 0] = g_n.integers(lo, hi + 1, M)
    moves = g_n.random((M, T))
    for t in range(1, T):
        step = np.where(moves[:, t] < spec.entry_exit_rate / 2, -1,
                        np.where(moves[:, t] < spec.entry_exit_rate, 1, 0))
        N[:, t] = np.clip(N[:, t - 1] + step, lo, hi)

    regimes = (spec.conduct, *(ep.conduct for ep in spec.episodes))
    grid = _conduct_grid(spec)
    mlab, plab = market_labels(spec), period_labels(spec)
    n_obs = M * T
    keys = ("price", "quantity", "marginal_cost", "hhi", "theta", "dq_dp")
    out = {k: np.empty(n_obs) for k in keys}
    sellers = np.empty(n_obs, dtype=int)
    present = np.zeros((n_obs, hi), dtype=bool)
    fcost, fout, fmc = (np.zeros((n_obs, hi)) for _ in range(3))
    for m in range(M):
        for t in range(T):
            i = m * T + t
            n = N[m, t]
            c = cost[m, t] + firm_dev[m, :n]
            eq = solve_market(
                form=spec.form, intercept=float(A[m, t]), slope=float(slope[m, t]), costs=c,
                conduct=regimes[grid[m, t]], cost_slope=spec.cost_slope,
                cost_slope_scope=spec.cost_slope_scope,
                where=f"market '{mlab[m]}' (number {m + 1}), period {plab[t]}",
            )
            out["price"][i], out["quantity"][i] = eq.price, eq.quantity
            out["marginal_cost"][i], out["hhi"][i] = eq.marginal_cost, eq.hhi
            out["theta"][i], out["dq_dp"][i] = eq.theta, eq.dq_dp
            sellers[i] = eq.sellers
            present[i, :n] = True
            fcost[i, :n], fout[i, :n], fmc[i, :n] = c, eq.outputs, eq.marginal_costs

    def flat(a: np.ndarray) -> np.ndarray:
        return a.reshape(-1)

    markets = np.repeat(np.array(mlab, dtype=object), T)
    periods = np.tile(np.array(plab, dtype=object), M)
    panel: dict[str, np.ndarray] = {
        spec.market_column: markets,
        spec.period_column: periods,
        "price": out["price"],
        spec.quantity_column: out["quantity"],
        "sellers": sellers,
        "hhi": out["hhi"],
    }
    if spec.rotator:
        panel[spec.rotator] = flat(R)
    for name, _ in spec.demand_shifters:
        panel[name] = flat(X[name])
    for name, _ in spec.cost_shifters:
        panel[name] = flat(W[name])
    if spec.instrument_interactions and spec.rotator:
        for name, _ in spec.cost_shifters:
            panel[f"{name}_x_{spec.rotator}"] = flat(W[name] * R)
    q_star = out["quantity"] / np.abs(out["dq_dp"])
    names = np.array([_conduct_label(c) for c in regimes], dtype=object)
    truth = {
        "market": markets,
        "period": periods,
        "episode": (flat(grid) > 0).astype(int),
        "conduct": names[flat(grid)],
        "theta_true": out["theta"],
        "price": out["price"],
        "quantity": out["quantity"],
        "marginal_cost": out["marginal_cost"],
        "markup": out["price"] - out["marginal_cost"],
        "lerner": (out["price"] - out["marginal_cost"]) / out["price"],
        "hhi": out["hhi"],
        "sellers": sellers,
        "elasticity": out["dq_dp"] * out["price"] / out["quantity"],
        "dq_dp": out["dq_dp"],
        "q_star": q_star,
        "demand_intercept": flat(A),
    }
    firms = {"present": present, "active": fout > 0, "cost": fcost, "output": fout,
             "marginal_cost": fmc}
    return SimulatedPanel(spec=spec, panel=panel, truth=truth, firms=firms)


def _conduct_label(conduct: Conduct) -> str:
    return conduct if isinstance(conduct, str) else f"theta={float(conduct):g}"
