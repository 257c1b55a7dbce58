"""Which candidate model of conduct fits best: the Rivers-Vuong menu test.

Estimating theta says how much market power; competition cases often ask
which model fits: competitive, Cournot, collusive or a stated alternative.
Each candidate m predicts a markup ``Delta_m`` (0, ``H Q*``, ``Q*`` or
``theta_m Q*``) and so an implied marginal cost ``p - Delta_m``.  With
``MC = w'tau + omega`` and instruments z excluded from cost, a model fits when
its implied cost shock is uncorrelated with z.  The lack of fit of m is the GMM
objective ``Q_m`` of that moment condition; the Rivers-Vuong statistic
compares two models' lack of fit (Rivers & Vuong 2002), here in the form of
Duarte, Magnolfi, Solvsten & Sullivan ("Testing Firm Conduct", Quantitative
Economics 2024).  Unlike a Wald test of ``theta = theta_m`` (which rejects
every model once the specification is slightly wrong), the comparison still
points to the model whose predicted markups are closer to the truth.

The test runs on the rows the supply relation used.  Price, markups and
instruments are residualised on the cost shifters and the study's fixed
effects (:func:`conduct.design.prepare`).  When the study lets marginal cost
rise with output (``cost_slope = true``), quantity is endogenous, so it cannot
be partialled out by least squares: each model's cost slope is fitted by 2SLS
on the same instruments and the lack of fit is the minimised objective.  This
uses one instrument for the slope, so the test needs at least two, and it has
``d - 1`` degrees of freedom for the diagnostic.

Limitation: the variance is first order in the demand estimates.  In our
simulations it matches a cluster bootstrap that re-estimates demand, and the
test keeps its size, when demand is well estimated; with noisy demand (demand
shocks 2.5 times the default, the rotation coefficient estimated to about 20%)
the test rejected equally fitting models in 12-16% of samples at 5%, and the
F-statistic flagged about 60% of those samples.  Read a rejection with a small
``F`` or an imprecise demand stage with care.
"""

from __future__ import annotations

import functools
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from itertools import combinations

import numpy as np
import pandas as pd
from scipy import stats

from conduct.demand import DemandResult
from conduct.design import prepare
from conduct.errors import DataError, EstimationError
from conduct.iv import CovSpec, ls_coef
from conduct.menu_stats import LackOfFit, lack_of_fit, orthonormal, pair_stats, weak_bounds
from conduct.panel import Panel
from conduct.study import Study
from conduct.supply import SupplyResult

__all__ = ["MenuResult", "MenuSet", "PairTest", "menu_test"]

DEFAULT_SET = "supply instruments"


@dataclass(frozen=True, slots=True)
class PairTest:
    """The Rivers-Vuong test of one pair of models.

    Attributes
    ----------
    a, b : str
        Model names, in the order of the study's candidates.
    t_rv : float
        ``T = sqrt(n) (Q_a - Q_b) / sigma``; negative favours ``a``.  NaN when the
        two models predict the same markups (the test is undefined).
    p : float
        Two-sided p-value against the standard normal (1 when undefined).
    f : float
        F-statistic for testing: instrument strength for telling a from b.
    weak : bool
        True when ``f`` is below the critical value for reliable testing
        (:func:`conduct.menu_stats.weak_bounds`), or the pair is degenerate.
    better : str or None
        The model that fits significantly better at the study's level, else None.
    q_a, q_b : float
        Lack of fit of each model.
    rho : float
        Correlation of the two models' moments.
    size_bound, power_bound : float or None
        Worst-case size the diagnostic certifies (None: not even 12.5%) and the
        best-case power it rules out falling below (None: not even 50%), for a
        5% test; see :func:`conduct.menu_stats.weak_bounds`.
    """

    a: str
    b: str
    t_rv: float
    p: float
    f: float
    weak: bool
    better: str | None
    q_a: float
    q_b: float
    rho: float
    size_bound: float | None
    power_bound: float | None


@dataclass(frozen=True, slots=True)
class MenuSet:
    """The menu test with one set of instruments.

    Attributes
    ----------
    name : str
    instruments : tuple of str
    pairs : tuple of PairTest
    best : tuple of str
        Models not beaten: no other model fits significantly better.
    lack_of_fit : dict of str to float
        ``Q_m`` per model.
    df : int
        Instruments available for testing (one fewer with a free cost slope).
    """

    name: str
    instruments: tuple[str, ...]
    pairs: tuple[PairTest, ...]
    best: tuple[str, ...]
    lack_of_fit: dict[str, float]
    df: int

    def reading(self, level: float) -> str:
        """One plain sentence on what this set's tests say."""
        models = list(self.lack_of_fit)
        pct = f"{level:.0%}"
        weak = [f"{p.a} vs {p.b}" for p in self.pairs if p.weak]
        caution = (f"; the instruments are weak for testing {', '.join(weak)}, so the test "
                   "has little power there" if weak else "")
        beaten = [m for m in models if m not in self.best]
        if not self.best:
            return (f"Every candidate model is beaten by another at the {pct} level, so the "
                    f"pairwise results do not rank the models consistently{caution}.")
        if len(self.best) == 1:
            return (f"{self.best[0]} fits the data significantly better than "
                    f"{_join(beaten)} at the {pct} level{caution}.")
        if not beaten:
            return (f"No candidate model fits significantly better than another at the {pct} "
                    f"level{caution}.")
        verb = "fits" if len(beaten) == 1 else "fit"
        return (f"{_join(list(self.best))} are not beaten at the {pct} level, while "
                f"{_join(beaten)} {verb} significantly worse{caution}.")


@dataclass(frozen=True, slots=True)
class MenuResult:
    """Pairwise Rivers-Vuong tests of the candidate models, per instrument set.

    Attributes
    ----------
    pairs : tuple of PairTest
        The pairwise table of the first (main) instrument set.
    best : tuple of str
        Models not beaten with the main set.
    sets : tuple of MenuSet
        Every instrument set, the main one first.
    models : tuple of str
        Models tested, in the study's order.
    level : float
    skipped : tuple of str
        Why a candidate was left out (e.g. Cournot without concentration data).
    observations : int
        Rows used (the supply rows).
    """

    pairs: tuple[PairTest, ...]
    best: tuple[str, ...]
    sets: tuple[MenuSet, ...]
    models: tuple[str, ...]
    level: float
    skipped: tuple[str, ...]
    observations: int

    def reading(self) -> str:
        """One plain sentence: which models fit best (per instrument set when several)."""
        if len(self.sets) == 1:
            return self.sets[0].reading(self.level)
        parts = []
        for s in self.sets:
            text = s.reading(self.level)
            parts.append(f"with {s.name}, {text[0].lower()}{text[1:-1]}")
        first = parts[0][0].upper() + parts[0][1:]
        return "; ".join([first, *parts[1:]]) + "."

    def table(self) -> pd.DataFrame:
        """The pairwise tables of every set as one frame (set, a, b, t_rv, p, f, ...)."""
        rows = [{"set": s.name, "a": p.a, "b": p.b, "t_rv": p.t_rv, "p": p.p, "f": p.f,
                 "weak": p.weak, "better": p.better, "q_a": p.q_a, "q_b": p.q_b,
                 "rho": p.rho, "size_bound": p.size_bound, "power_bound": p.power_bound}
                for s in self.sets for p in s.pairs]
        return pd.DataFrame(rows, columns=["set", "a", "b", "t_rv", "p", "f", "weak", "better",
                                           "q_a", "q_b", "rho", "size_bound", "power_bound"])


def _join(names: list[str]) -> str:
    if len(names) <= 1:
        return "".join(names)
    return ", ".join(names[:-1]) + " and " + names[-1]


def _column(frame: pd.DataFrame, name: str, where: str) -> np.ndarray:
    """A panel column, or the product ``a*b`` of two columns (the supply's naming)."""
    if name in frame.columns:
        return frame[name].to_numpy(dtype=float)
    if "*" in name:
        a, b = name.split("*", 1)
        if a in frame.columns and b in frame.columns:
            return frame[a].to_numpy(dtype=float) * frame[b].to_numpy(dtype=float)
    usable = [c for c in frame.columns if not str(c).startswith("_")]
    raise DataError(
        f"Menu test, {where}: instrument '{name}' is not a column of the panel (products are "
        f"written a*b). Columns available: {', '.join(usable)}."
    )


def _residualise(cols: dict[str, np.ndarray], w: np.ndarray) -> dict[str, np.ndarray]:
    """Each column less its least-squares fit on ``w`` (one cross-product of ``w``)."""
    if w.shape[1] == 0:
        return cols
    keys = list(cols)
    b = np.column_stack([cols[k] for k in keys])
    b -= w @ ls_coef(w, b)
    return {k: b[:, i] for i, k in enumerate(keys)}


def menu_test(
    panel: Panel,
    study: Study,
    demand: DemandResult,
    supply: SupplyResult,
    *,
    instrument_sets: Mapping[str, Sequence[str]] | None = None,
) -> MenuResult:
    """Compare the study's candidate models pairwise with the Rivers-Vuong test.

    Parameters
    ----------
    panel : Panel
    study : Study
        Must have a ``[supply]`` table.
    demand : DemandResult
    supply : SupplyResult
        Gives the rows used, ``Q*`` and the Herfindahl index.
    instrument_sets : mapping of str to sequence of str, optional
        Named sets of excluded instruments (panel columns, or ``a*b`` products).
        Default: one set, the supply relation's excluded instruments.

    Returns
    -------
    MenuResult

    Raises
    ------
    EstimationError
        Fewer than two candidates can be tested, or a set has too few or
        collinear instruments.
    DataError
        An instrument names no column.

    Notes
    -----
    On the supply rows, with tilde for residuals on the cost shifters and
    fixed effects, model m's implied cost is ``e_m = p~ - Delta~_m`` (less
    ``c_m Q~`` with the 2SLS slope ``c_m`` when the cost slope is free), and

        g_m = Z~' e_m / n,  W = (Z~'Z~/n)^{-1},  Q_m = g_m' W g_m,
        T = sqrt(n) (Q_a - Q_b) / sigma.

    ``sigma^2`` is the variance of the difference of the influence functions of
    ``Q_a`` and ``Q_b`` (:func:`conduct.menu_stats.lack_of_fit`), which include
    the estimation of W and of the demand coefficients in ``Q*`` through
    ``dQ*/dalpha = Q / slope^2 * dslope/dalpha``, clustered by market with the
    convention of :func:`conduct.iv.cluster_cov`.  Model a is beaten by b when
    ``T > z`` (a two-sided test at the study's level), and vice versa; ``best``
    lists the models no other model beats.
    """
    if study.supply is None:
        raise EstimationError("The menu test needs a [supply] table in the study file.")
    s = study.supply
    f = panel.frame
    n_all = len(f)
    rows = supply.rows
    n = len(rows)
    p = f[study.panel.price].to_numpy(dtype=float)
    q = f[study.panel.quantity].to_numpy(dtype=float)
    if n < n_all:
        p, q = p[rows], q[rows]
    qstar = supply.qstar[rows]
    slope = demand.slope[rows]
    dqstar = (q / slope**2)[:, None] * demand.slope_grad[rows]

    models: list[str] = []
    skipped: list[str] = []
    markups: dict[str, np.ndarray] = {}
    dmark: dict[str, np.ndarray] = {}
    for c in study.candidates:
        if c.theta is not None:
            h = np.full(n, c.theta)
        elif supply.h is not None:
            h = supply.h[rows]
        else:
            skipped.append(f"{c.name}: no sellers or concentration column, so no Cournot "
                           "markup H x Q*.")
            continue
        models.append(c.name)
        markups[c.name] = h * qstar
        dmark[c.name] = h[:, None] * dqstar
    if len(models) < 2:
        raise EstimationError(
            f"The menu test compares candidate models pairwise but only {len(models)} can be "
            f"tested ({', '.join(models) or 'none'}); list at least two under [models]."
        )

    sets = dict(instrument_sets) if instrument_sets else {DEFAULT_SET: supply.instruments}
    # Columns with the fixed effects absorbed: the supply stage's own (same rows, same
    # effects) where it has them (its ``_dep:<model>`` is ``P - markup``), else absorbed here.
    # Instruments are taken from it only under the supply stage's own instrument names.
    have = supply.prepared.columns
    own = set(supply.instruments)
    cols: dict[str, np.ndarray] = {}
    raw: dict[str, np.ndarray] = {}
    rows_frame = functools.cache(
        lambda: f if n == n_all else f.iloc[rows].reset_index(drop=True))
    wanted = {"_p": "_p", "_q": "Q", **{c: c for c in s.cost_shifters},
              **{f"_e:{m}": f"_dep:{m}" for m in models}}
    for key, src in wanted.items():
        if src in have:
            cols[key] = have[src]
        elif key == "_p":
            raw[key] = p
        elif key == "_q":
            raw[key] = q
        elif key.startswith("_e:"):
            raw[key] = p - markups[key[3:]]
        else:
            raw[key] = rows_frame()[key].to_numpy(dtype=float)
    for name, instr in sets.items():
        if not instr:
            raise EstimationError(f"Menu test: instrument set '{name}' is empty.")
        for col in instr:
            key = f"_z:{col}"
            if key in cols or key in raw:
                continue
            if col in own and col in have:
                cols[key] = have[col]
            else:
                raw[key] = _column(rows_frame(), col, f"instrument set '{name}'")
    prep = supply.prepared
    if raw:
        prep = prepare(rows_frame(), raw, study, stage="supply")
        cols.update(prep.columns)
    w = np.column_stack(([np.ones(n)] if prep.constant else [])
                        + [cols[c] for c in s.cost_shifters]) if (
        prep.constant or s.cost_shifters) else np.zeros((n, 0))
    resid = _residualise({k: v for k, v in cols.items() if k not in s.cost_shifters}, w)
    k_small = w.shape[1] + (1 if s.cost_slope else 0)
    c1, c2 = ((supply.full_cov.clusters, supply.full_cov.clusters2)
              if prep.cov.kind == "cluster" else (None, None))
    cov = CovSpec(kind=prep.cov.kind, clusters=c1, hac_lags=prep.cov.hac_lags,
                  df_penalty=prep.cov.df_penalty, clusters2=c2)
    psi_d = demand.fit.influence
    alpha = 1.0 - study.inference.level

    out: list[MenuSet] = []
    for name, instr in sets.items():
        what = f"instruments of the menu test ('{name}': {', '.join(instr)})"
        z = np.column_stack([resid[f"_z:{col}"] for col in instr])
        errors = {m: resid[f"_e:{m}"] for m in models}
        if s.cost_slope:
            z, errors = _concentrate_slope(z, resid["_q"], errors, name)
        zw = orthonormal(z, what=what)
        fits: dict[str, LackOfFit] = {
            m: lack_of_fit(zw, errors[m], dmark[m], psi_d, rows, n_all) for m in models
        }
        pairs = tuple(_pair(a, b, fits, cov, k_small, alpha) for a, b in combinations(models, 2))
        beaten = {pt.b if pt.better == pt.a else pt.a for pt in pairs if pt.better}
        out.append(MenuSet(
            name=name, instruments=tuple(instr), pairs=pairs,
            best=tuple(m for m in models if m not in beaten),
            lack_of_fit={m: fits[m].q for m in models}, df=zw.shape[1],
        ))
    return MenuResult(pairs=out[0].pairs, best=out[0].best, sets=tuple(out),
                      models=tuple(models), level=study.inference.level,
                      skipped=tuple(skipped), observations=n)


def _concentrate_slope(
    z: np.ndarray, q: np.ndarray, errors: dict[str, np.ndarray], name: str
) -> tuple[np.ndarray, dict[str, np.ndarray]]:
    """Fit each model's cost slope by 2SLS and keep the instruments' remaining directions.

    The minimised objective ``min_c |P_Z (e - c Q)|^2 / n`` equals the objective of
    ``e - c_hat Q`` on the instruments orthogonal to the fitted ``Q^ = P_Z Q``.
    """
    if z.shape[1] < 2:
        raise EstimationError(
            f"Menu test, instrument set '{name}': with a free cost slope, quantity is "
            "endogenous and uses one instrument, so testing needs at least two instruments; "
            "the set has one. Add an instrument or set cost_slope = false under [supply]."
        )
    qhat = z @ ls_coef(z, q)
    denom = float(qhat @ q)
    if abs(denom) <= 1e-12 * float(q @ q):
        raise EstimationError(
            f"Menu test, instrument set '{name}': the instruments do not predict quantity, so "
            "the free cost slope cannot be fitted; choose other instruments."
        )
    out = {m: e - (float(qhat @ e) / denom) * q for m, e in errors.items()}
    u, sv, _ = np.linalg.svd(z - np.outer(qhat, qhat @ z) / float(qhat @ qhat),
                             full_matrices=False)
    keep = sv > 1e-10 * sv[0]
    return u[:, keep] * sv[keep], out


def _pair(a: str, b: str, fits: Mapping[str, LackOfFit], cov: CovSpec, k: int,
          alpha: float) -> PairTest:
    st = pair_stats(fits[a], fits[b], cov, k)
    d = len(fits[a].g)
    if st.degenerate:
        return PairTest(a=a, b=b, t_rv=float("nan"), p=1.0, f=0.0, weak=True, better=None,
                        q_a=fits[a].q, q_b=fits[b].q, rho=st.rho, size_bound=None,
                        power_bound=None)
    pval = float(2.0 * stats.norm.sf(abs(st.t)))
    better = (a if st.t < 0 else b) if pval < alpha else None
    weak, size_b, power_b = weak_bounds(st.f, d)
    return PairTest(a=a, b=b, t_rv=st.t, p=pval, f=st.f, weak=weak, better=better,
                    q_a=fits[a].q, q_b=fits[b].q, rho=st.rho, size_bound=size_b,
                    power_bound=power_b)
