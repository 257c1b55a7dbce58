"""Anderson-Rubin confidence set for theta, robust to weak instruments.

For a trial value theta0, the supply relation implies that
``P - theta0 Q* (- c_q Q) - W'c`` is uncorrelated with the excluded
instruments Z.  The test (Anderson & Rubin 1949) regresses
``P - theta0 Q*`` on W and Z and asks whether the Z coefficients are zero.
Its size does not depend on instrument strength.  The set collects every
theta0 the test does not reject.

Two refinements make it honest here:

* ``Q*`` is built from estimated demand: the covariance of the reduced-form
  coefficients adds the demand influence functions times their derivative in
  the demand coefficients (as for theta itself), clustered like the study.
* When marginal cost may rise with output, ``c_q`` is a nuisance parameter
  on an endogenous regressor: the statistic is minimised over ``c_q`` and
  compared with chi-square critical values with ``k - 1`` degrees of freedom
  (the subvector approach of Guggenberger, Kleibergen, Mavroeidis & Chen
  2012, shown valid there under homoskedasticity; with robust or cluster
  covariance it is used here as an approximation).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import optimize, stats

from conduct.demand import DemandResult
from conduct.iv import CovSpec, add_rows, group_sums
from conduct.panel import Panel
from conduct.study import Study
from conduct.supply import QSTAR, SupplyResult, benchmark_h

__all__ = ["ThetaSet", "ar_inference", "candidate_ar_tests", "theta_ar_set"]


@dataclass(frozen=True, slots=True)
class ThetaSet:
    """Anderson-Rubin confidence set for theta.

    Attributes
    ----------
    intervals : tuple of (float, float)
        Disjoint intervals; -inf/inf when the set reaches the searched range's end.
    kind : str
        ``bounded``, ``unbounded``, ``union`` (several pieces) or ``empty``.
    level : float
    df : int
        Degrees of freedom of the chi-square reference distribution.
    searched : tuple of float
        The range of theta searched.
    stat_at_estimate : float
        AR statistic at the point estimate of theta.
    """

    intervals: tuple[tuple[float, float], ...]
    kind: str
    level: float
    df: int
    searched: tuple[float, float]
    stat_at_estimate: float

    def describe(self) -> str:
        """Plain-language description of the set."""
        if self.kind == "empty":
            return ("The Anderson-Rubin set is empty: no value of theta is compatible with the "
                    "instruments; the supply specification is rejected.")
        parts = " and ".join(f"[{lo:.4g}, {hi:.4g}]" for lo, hi in self.intervals)
        if self.kind == "unbounded":
            return (f"The Anderson-Rubin set {parts} runs to the edge of the searched range "
                    f"[{self.searched[0]:g}, {self.searched[1]:g}]: the instruments cannot bound "
                    "theta.")
        if self.kind == "union":
            return f"The Anderson-Rubin set is a union of intervals: {parts}."
        return f"The Anderson-Rubin set is {parts}."


class _Shared:
    """The parts of :class:`_Linear` that do not depend on the candidate's markup."""

    def __init__(self, panel: Panel, study: Study, demand: DemandResult,
                 supply: SupplyResult) -> None:
        assert study.supply is not None
        prep = supply.prepared
        cols = prep.columns
        rows = supply.rows
        n = len(rows)
        n_all = len(panel.frame)
        exog = ([np.ones(n)] if prep.constant else []) + [cols[c]
                                                         for c in study.supply.cost_shifters]
        z = np.column_stack([cols[c] for c in supply.instruments])
        self.r = np.column_stack([*exog, z])
        self.kz = z.shape[1]
        self.kr = self.r.shape[1]
        self.rtr_inv = np.linalg.inv(self.r.T @ self.r / n)
        q = panel.frame[study.panel.quantity].to_numpy(dtype=float)[rows]
        slope = demand.slope[rows]
        self.dqstar = (q / slope**2)[:, None] * demand.slope_grad[rows]
        c1, c2 = ((supply.full_cov.clusters, supply.full_cov.clusters2)
                  if prep.cov.kind == "cluster" else (None, None))
        self.cov = CovSpec(kind=prep.cov.kind, clusters=c1, hac_lags=prep.cov.hac_lags,
                           df_penalty=prep.cov.df_penalty, clusters2=c2)
        self.n_all, self.rows, self.n = n_all, rows, n
        self.psi_d = demand.fit.influence
        dof = n_all - self.kr - self.cov.df_penalty
        # each clustering (or the observations themselves) with its signed factor
        if self.cov.kind == "cluster":
            self.terms = [(c, sign * (int(c.max()) + 1) / int(c.max()) * (n_all - 1) / dof)
                          for c, sign in self.cov.cluster_terms()]
        else:  # robust and homoskedastic treated as robust; HAC treated as robust
            self.terms = [(np.arange(n_all), n_all / dof)]
        every_row = n == n_all
        # per term: codes of the rows used, number of groups, demand influence summed by group
        self.groups: list[tuple[np.ndarray, int, np.ndarray] | None] = []
        for c, _ in self.terms:
            g = int(c.max()) + 1
            if g == n_all:  # each observation its own cluster: keep the rows
                self.groups.append(None)
            else:
                self.groups.append((c if every_row else c[rows], g,
                                    group_sums(c, self.psi_d)))
        # price and -Q enter every candidate's statistic the same way
        self.common = {key: self.reduced(y) for key, y in (("p", cols["_p"]),
                                                           ("q", -cols["Q"]))}
        self.qstar_column, self.common_p_column = cols[QSTAR], cols["_p"]
        self.nuisance = bool(study.supply.cost_slope)

    def reduced(self, y: np.ndarray, g_alpha: np.ndarray | None = None
                ) -> tuple[np.ndarray, list[np.ndarray]]:
        """Reduced-form coefficients of ``y`` and their cluster sums per term.

        ``g_alpha`` (kr, k_d) is the derivative of the coefficients in the demand
        coefficients: the influence gains ``psi_d g_alpha'`` (the generated-regressor
        part).  Sums by cluster are linear, so they are taken of ``r e`` and of
        ``psi_d`` before the (kr, kr) and (k_d, kr) products.
        """
        pi = self.rtr_inv @ (self.r.T @ y) / self.n
        e = y - self.r @ pi
        re = self.r * e[:, None]
        out = []
        for grp in self.groups:
            if grp is None:
                a = (self.psi_d @ g_alpha.T if g_alpha is not None
                     else np.zeros((self.n_all, self.kr)))
                add_rows(a, self.rows, (self.n_all / self.n) * re @ self.rtr_inv)
                out.append(a)
                continue
            codes, g, psi_sums = grp
            sums = group_sums(codes, re)
            if len(sums) < g:  # clusters without supply rows at the end
                sums = np.vstack([sums, np.zeros((g - len(sums), self.kr))])
            s = (self.n_all / self.n) * sums @ self.rtr_inv
            if g_alpha is not None:
                s += psi_sums @ g_alpha.T
            out.append(s)
        return pi, out


class _Linear:
    """Reduced-form coefficients and cluster sums, linear in (theta0, c)."""

    def __init__(self, shared: _Shared, markup: tuple[np.ndarray, np.ndarray] | None = None
                 ) -> None:
        sh = shared
        cols_qstar = sh.qstar_column
        if markup is None:
            y1, dqstar = -cols_qstar, sh.dqstar  # y = P + theta0 (-Q*) + c (-Q)
        else:
            # a candidate's markup h Q* (absorbed as P - h Q*); theta0 = 1 is the candidate
            dep, h = markup
            y1, dqstar = dep - sh.common_p_column, h[sh.rows][:, None] * sh.dqstar
        g_alpha = -(sh.rtr_inv @ (sh.r.T @ dqstar) / sh.n)  # d pi / d alpha per unit theta0
        pi1, sums1 = sh.reduced(y1, g_alpha)
        (pi0, sums0), (pi2, sums2) = sh.common["p"], sh.common["q"]
        self.pi = [pi0, pi1, pi2]
        self.shared = sh
        self.kz, self.kr, self.nuisance = sh.kz, sh.kr, sh.nuisance
        self.terms = [(factor / sh.n_all**2, [s0, s1, s2]) for (_, factor), s0, s1, s2
                      in zip(sh.terms, sums0, sums1, sums2, strict=True)]
        # two-way clustering: V1 + V2 - V12 need not be positive semi-definite
        self.clip = any(factor < 0 for factor, _ in self.terms)

    def stat(self, theta0: float, c: float) -> float:
        pi = self.pi[0] + theta0 * self.pi[1] + c * self.pi[2]
        v = np.zeros((self.kr, self.kr))
        for factor, sums in self.terms:
            s = sums[0] + theta0 * sums[1] + c * sums[2]
            v += factor * (s.T @ s)
        pz = pi[-self.kz:]
        vz = v[-self.kz:, -self.kz:]
        if self.clip:  # as conduct.iv.cluster_cov: negative eigenvalues clipped (floored)
            vals, vecs = np.linalg.eigh((vz + vz.T) / 2)
            vals = np.maximum(vals, 1e-12 * max(float(vals.max()), 1e-300))
            return float(np.sum((vecs.T @ pz) ** 2 / vals))
        return float(pz @ np.linalg.solve(vz, pz))

    def profile(self, theta0: float) -> float:
        if not self.nuisance:
            return self.stat(theta0, 0.0)
        res = optimize.minimize_scalar(lambda c: self.stat(theta0, c), bracket=(-1.0, 1.0))
        return float(min(res.fun, self.stat(theta0, 0.0)))


def theta_ar_set(panel: Panel, study: Study, demand: DemandResult, supply: SupplyResult,
                 *, grid_points: int = 401) -> ThetaSet:
    """Invert the Anderson-Rubin test for theta over a range of values.

    Parameters
    ----------
    panel, study, demand, supply
        The fitted stages.
    grid_points : int
        Grid size before the edges are refined by root finding.

    Returns
    -------
    ThetaSet
    """
    return _invert(_Linear(_Shared(panel, study, demand, supply)), study, supply, grid_points)


def _invert(lin: _Linear, study: Study, supply: SupplyResult, grid_points: int) -> ThetaSet:
    level = study.inference.level
    df = lin.kz - (1 if lin.nuisance else 0)
    crit = float(stats.chi2.ppf(level, df))
    lo = min(-1.0, supply.theta - 10 * supply.se)
    hi = max(2.0, supply.theta + 10 * supply.se)
    grid = np.linspace(lo, hi, grid_points)
    vals = np.array([lin.profile(t) for t in grid])
    inside = vals <= crit

    def edge(a: float, b: float) -> float:
        return float(optimize.brentq(lambda t: lin.profile(t) - crit, a, b, xtol=1e-10))

    intervals: list[tuple[float, float]] = []
    i = 0
    while i < grid.size:
        if not inside[i]:
            i += 1
            continue
        j = i
        while j + 1 < grid.size and inside[j + 1]:
            j += 1
        left = -np.inf if i == 0 else edge(grid[i - 1], grid[i])
        right = np.inf if j == grid.size - 1 else edge(grid[j], grid[j + 1])
        intervals.append((left, right))
        i = j + 1
    if not intervals:
        kind = "empty"
    elif any(not np.isfinite(v) for iv in intervals for v in iv):
        kind = "unbounded"
    elif len(intervals) > 1:
        kind = "union"
    else:
        kind = "bounded"
    return ThetaSet(intervals=tuple(intervals), kind=kind, level=level, df=df,
                    searched=(float(lo), float(hi)),
                    stat_at_estimate=lin.profile(supply.theta))


def candidate_ar_tests(panel: Panel, study: Study, demand: DemandResult,
                       supply: SupplyResult) -> dict[str, tuple[float, int, float]]:
    """Anderson-Rubin test of each candidate model, robust to weak instruments.

    For candidate m with markup ``h_i Q*_i`` the statistic tests that
    ``P - h Q* (- c_q Q)`` is unrelated to the excluded instruments, with the
    same generated-regressor correction and nuisance treatment as the set.

    Returns
    -------
    dict
        Candidate name -> (statistic, degrees of freedom, p-value).
    """
    return _candidates(_Linear(_Shared(panel, study, demand, supply)), panel, study, supply)


def _candidates(lin: _Linear, panel: Panel, study: Study, supply: SupplyResult
                ) -> dict[str, tuple[float, int, float]]:
    """Candidate AR tests; a fixed-theta candidate is the theta-set statistic at its theta.

    With markup ``theta_m Q*`` the candidate's linear pieces are ``theta_m`` times those
    of the set's ``-Q*`` term, so its statistic is ``lin.profile(theta_m)``; only a
    markup varying across rows (Cournot's ``H Q*``) needs its own reduced form.
    """
    h_all = benchmark_h(panel, study)
    out: dict[str, tuple[float, int, float]] = {}
    n = len(panel.frame)
    for c in study.candidates:
        h = np.full(n, c.theta) if c.theta is not None else h_all
        if h is None or f"_dep:{c.name}" not in supply.prepared.columns:
            continue
        if c.theta is not None:
            lin_c, at = lin, float(c.theta)
        else:
            lin_c = _Linear(lin.shared, markup=(supply.prepared.columns[f"_dep:{c.name}"], h))
            at = 1.0
        df = lin_c.kz - (1 if lin_c.nuisance else 0)
        stat = lin_c.profile(at)
        out[c.name] = (stat, df, float(stats.chi2.sf(stat, df)))
    return out


def ar_inference(panel: Panel, study: Study, demand: DemandResult, supply: SupplyResult,
                 *, grid_points: int = 401
                 ) -> tuple[ThetaSet, dict[str, tuple[float, int, float]]]:
    """The Anderson-Rubin set for theta and the candidates' AR tests, sharing their parts.

    Equals ``(theta_ar_set(...), candidate_ar_tests(...))``.

    Parameters
    ----------
    panel, study, demand, supply
        The fitted stages.
    grid_points : int
        Grid size of the set's search.

    Returns
    -------
    (ThetaSet, dict)
    """
    lin = _Linear(_Shared(panel, study, demand, supply))
    return (_invert(lin, study, supply, grid_points), _candidates(lin, panel, study, supply))
