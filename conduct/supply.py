"""The supply relation and the conduct parameter, with sequential-GMM inference.

Supply relation (homogeneous good)::

    P = c0 + c_q Q + c'W + theta Q* + FE + u,      Q* = Q / |dQ/dP|

``Q*`` is a generated regressor built from the demand estimates.  The standard
error of theta accounts for that: the influence function of the supply
estimates adds, to the supply moments, the demand influence functions times
the derivative of the supply moments in the demand coefficients (the
two-step / stacked-moment variance of Newey & McFadden 1994, section 6),
clustered like the demand stage.  The naive second-stage standard error is
kept only for comparison.

Each candidate model m with markup ``h_i Q*_i`` (h = 0, H, 1 or a user theta)
is tested as a restriction: regress ``P - h Q*`` on the same design and test
that Q* no longer enters (Wald, chi-square with one degree of freedom).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import stats

from conduct.demand import DemandResult
from conduct.design import Prepared, codes, prepare
from conduct.diagnostics import FirstStage, Strength, first_stage_table, stage_strength
from conduct.errors import DataError
from conduct.identify import supply_instruments
from conduct.iv import CovSpec, IVFit, cluster_cov, fit_iv
from conduct.panel import MARKET, Panel
from conduct.study import Candidate, Study

__all__ = ["CandidateTest", "SupplyResult", "benchmark_h", "estimate_supply"]

QSTAR = "Q*"


@dataclass(frozen=True, slots=True)
class CandidateTest:
    """Wald test of one candidate model of conduct.

    Attributes
    ----------
    name : str
    theta : float or None
        The candidate's fixed theta; None for Cournot (theta = H or 1/N per row).
    delta, se : float
        Coefficient on Q* after subtracting the candidate's markup, and its
        sequential standard error.
    stat, p : float
        Wald statistic (chi-square, 1 df) and p-value for ``delta = 0``.
    rejected : bool
        True when ``p < 1 - level``.
    null : str
        The null hypothesis in words.
    """

    name: str
    theta: float | None
    delta: float
    se: float
    stat: float
    p: float
    rejected: bool
    null: str


@dataclass(frozen=True, slots=True)
class SupplyResult:
    """The estimated supply relation and conduct tests.

    Attributes
    ----------
    fit : IVFit
        The supply IV fit with the naive covariance (not the answer).
    cov : numpy.ndarray
        (k, k) sequential covariance accounting for the demand estimation.
    theta, se, se_naive : float
    ci : tuple of float
        Wald interval at the study's level from the sequential standard error.
    tests : tuple of CandidateTest
    verdict : str
        The one candidate not rejected, or ``inconclusive``.
    not_rejected : tuple of str
    cournot_benchmark : float or None
        Q*-weighted mean of H (or 1/N).
    rows : numpy.ndarray
        (n_s,) positions in the panel of the rows used (slope negative).
    qstar : numpy.ndarray
        (n,) markup regressor Q/|dQ/dP| for every panel row (NaN where the slope
        is not negative).
    h : numpy.ndarray or None
        (n,) Herfindahl index (or 1/N) per row when available.
    first_stage : tuple of FirstStage
    strength : Strength or None
        Effective F / Stock-Yogo reading for the supply stage.
    instruments : tuple of str
    prepared : Prepared
    """

    fit: IVFit
    cov: np.ndarray
    theta: float
    se: float
    se_naive: float
    ci: tuple[float, float]
    tests: tuple[CandidateTest, ...]
    verdict: str
    not_rejected: tuple[str, ...]
    cournot_benchmark: float | None
    rows: np.ndarray
    qstar: np.ndarray
    h: np.ndarray | None
    first_stage: tuple[FirstStage, ...]
    strength: Strength | None
    instruments: tuple[str, ...]
    prepared: Prepared

    def coefficients(self) -> pd.DataFrame:
        """Coefficient table with sequential standard errors (and the naive ones)."""
        se = np.sqrt(np.clip(np.diag(self.cov), 0, None))
        z = np.divide(self.fit.params, se, out=np.full_like(se, np.nan), where=se > 0)
        return pd.DataFrame(
            {"estimate": self.fit.params, "se": se, "z": z,
             "p": 2 * stats.norm.sf(np.abs(z)), "se_naive": self.fit.se},
            index=pd.Index(self.fit.names, name="term"),
        )


def benchmark_h(panel: Panel, study: Study) -> np.ndarray | None:
    """Herfindahl index per row (concentration column, else 1/sellers), or None."""
    f = panel.frame
    if study.panel.concentration:
        return f[study.panel.concentration].to_numpy(dtype=float)
    if study.panel.sellers:
        return 1.0 / f[study.panel.sellers].to_numpy(dtype=float)
    return None


def _markup_h(c: Candidate, h: np.ndarray | None, n: int) -> np.ndarray | None:
    if c.theta is not None:
        return np.full(n, c.theta)
    return h


def estimate_supply(panel: Panel, study: Study, demand: DemandResult, *,
                    with_tests: bool = True) -> SupplyResult:
    """Estimate theta and test each candidate model.

    Parameters
    ----------
    panel : Panel
    study : Study
        Must have a ``[supply]`` table; identification already checked.
    demand : DemandResult
    with_tests : bool
        Test each candidate and compute first-stage diagnostics; False skips
        them (bootstrap replicates need only the estimates).

    Returns
    -------
    SupplyResult
    """
    assert study.supply is not None
    s = study.supply
    f = panel.frame
    n_all = len(f)
    rows = np.flatnonzero(demand.slope < 0)
    if len(rows) < 10:
        raise DataError(
            f"The estimated demand slope is negative at only {len(rows)} of {n_all} rows; "
            "the supply relation cannot be estimated. Check the demand specification."
        )
    fs = f.iloc[rows].reset_index(drop=True)
    p = fs[study.panel.price].to_numpy(dtype=float)
    q = fs[study.panel.quantity].to_numpy(dtype=float)
    slope = demand.slope[rows]
    qstar = -q / slope
    dqstar = (q / slope**2)[:, None] * demand.slope_grad[rows]  # (n_s, k_d)
    qstar_all = np.full(n_all, np.nan)
    qstar_all[rows] = qstar
    h_all = benchmark_h(panel, study)
    h = h_all[rows] if h_all is not None else None

    instr_names = supply_instruments(study)
    data: dict[str, np.ndarray] = {"_p": p, QSTAR: qstar, "Q": q}
    for c in s.cost_shifters:
        data[c] = fs[c].to_numpy(dtype=float)
    for name in instr_names:
        if "*" in name and name not in fs.columns:
            a, b = name.split("*", 1)
            data[name] = fs[a].to_numpy(dtype=float) * fs[b].to_numpy(dtype=float)
        else:
            data[name] = fs[name].to_numpy(dtype=float)
    cands = [c for c in study.candidates if _markup_h(c, h, len(rows)) is not None]
    if not with_tests:
        cands = []
    for c in cands:
        hc = _markup_h(c, h, len(rows))
        data[f"_dep:{c.name}"] = p - hc * qstar
    prep = prepare(fs, data, study, stage="supply")
    cols = prep.columns
    n = len(rows)
    exog_names = (["const"] if prep.constant else []) + list(s.cost_shifters)
    exog = np.column_stack(
        ([np.ones(n)] if prep.constant else []) + [cols[c] for c in s.cost_shifters]
    ) if exog_names else np.zeros((n, 0))
    endog_names = [QSTAR] + (["Q"] if s.cost_slope else [])
    endog = np.column_stack([cols[c] for c in endog_names])
    instr = np.column_stack([cols[c] for c in instr_names])
    names = tuple(exog_names + endog_names)
    i_theta = names.index(QSTAR)
    x = np.column_stack([exog, endog])
    z = np.column_stack([exog, instr])
    # demand influence on the demand sample (all panel rows), mean-normalised over n_all
    psi_d = demand.fit.influence
    # supply rows in the demand sample
    cov_full = prep.cov
    clusters_full = codes(f[MARKET].to_numpy()) if cov_full.clusters is not None else None
    level = study.inference.level

    def sequential(fit: IVFit, hvec: np.ndarray) -> np.ndarray:
        delta = fit.params[i_theta]
        g_alpha = -(z.T @ ((hvec + delta)[:, None] * dqstar)) / n  # (m, k_d)
        psi = np.zeros((n_all, fit.k))
        psi[rows] += (n_all / n) * fit.influence
        psi += psi_d @ (a_mat @ g_alpha).T
        spec = CovSpec(kind=cov_full.kind, clusters=clusters_full, hac_lags=cov_full.hac_lags,
                       df_penalty=cov_full.df_penalty)
        return cluster_cov(psi, spec, fit.k)

    main = fit_iv(cols["_p"], exog, endog, instr, names, estimator="2sls", cov=prep.cov,
                  overid=with_tests, instrument_names=instr_names)
    # A = (G'WG)^{-1} G'W for 2SLS, shared by every candidate (after fit_iv's rank checks)
    g = z.T @ x / n
    w = np.linalg.inv(z.T @ z / n)
    a_mat = np.linalg.solve(g.T @ w @ g, g.T @ w)
    cov = sequential(main, np.zeros(n))
    theta = float(main.params[i_theta])
    se = float(np.sqrt(cov[i_theta, i_theta]))
    zc = float(stats.norm.ppf(0.5 + level / 2))
    tests = []
    for c in cands:
        hc = _markup_h(c, h, n)
        assert hc is not None
        fit_c = fit_iv(cols[f"_dep:{c.name}"], exog, endog, instr, names, estimator="2sls",
                       cov=prep.cov)
        cov_c = sequential(fit_c, hc)
        delta = float(fit_c.params[i_theta])
        se_c = float(np.sqrt(cov_c[i_theta, i_theta]))
        stat = (delta / se_c) ** 2
        pval = float(stats.chi2.sf(stat, 1))
        what = "theta = H (Herfindahl, or 1/N)" if c.theta is None else f"theta = {c.theta:g}"
        tests.append(CandidateTest(
            name=c.name, theta=c.theta, delta=delta, se=se_c, stat=float(stat), p=pval,
            rejected=pval < 1 - level, null=f"{c.name}: {what}",
        ))
    kept = tuple(t.name for t in tests if not t.rejected)
    verdict = kept[0] if len(kept) == 1 else "inconclusive"
    bench = float(np.sum(h * qstar) / np.sum(qstar)) if h is not None else None
    first = (first_stage_table(endog, instr, exog, tuple(endog_names), prep.cov)
             if with_tests else ())
    strength = (stage_strength(endog, instr, exog, first, prep.cov, "theta")
                if with_tests else None)
    return SupplyResult(
        fit=main, cov=cov, theta=theta, se=se, se_naive=float(main.se[i_theta]),
        ci=(theta - zc * se, theta + zc * se), tests=tuple(tests), verdict=verdict,
        not_rejected=kept, cournot_benchmark=bench, rows=rows, qstar=qstar_all, h=h_all,
        first_stage=first, strength=strength, instruments=instr_names, prepared=prep,
    )
