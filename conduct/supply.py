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
from conduct.design import Prepared, prepare
from conduct.diagnostics import FirstStage, Strength, first_stage_table, stage_strength
from conduct.errors import DataError
from conduct.identify import supply_instruments
from conduct.iv import CovSpec, IVFit, Projection, add_rows, check_design, cluster_cov, fit_iv
from conduct.panel import Panel
from conduct.study import Candidate, Study

__all__ = ["CandidateTest", "SupplyResult", "benchmark_h", "estimate_supply", "supply_columns"]

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
    theta_influence : numpy.ndarray
        (n,) sequential influence function of theta on every panel row.
    full_cov : CovSpec
        Covariance choice on the full panel (clusters by market), for derived statistics.
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
    theta_influence: np.ndarray
    full_cov: CovSpec

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


@dataclass(frozen=True)
class SupplySystem:
    """The supply relation's arrays, ready to be solved for any dependent variable.

    Built once per specification; :meth:`solve` fits ``dependent`` on the
    design by 2SLS and returns the fit with its sequential covariance.  With a
    ``split``, Q* enters as one column per group (``Q*[label]``) and the
    excluded instruments are interacted with the group indicators, so each
    group gets its own theta.

    Attributes
    ----------
    rows : numpy.ndarray
        (n_s,) panel positions used (negative demand slope, inside ``subset``).
    names : tuple of str
        Regressor names (exogenous, then Q* columns, then Q when the cost slope is free).
    theta_index : tuple of int
        Positions of the Q* columns in ``names``.
    labels : tuple of str
        Group labels of the Q* columns (``("all",)`` without a split).
    group : numpy.ndarray
        (n_s,) group position of each row used.
    """

    rows: np.ndarray
    names: tuple[str, ...]
    theta_index: tuple[int, ...]
    labels: tuple[str, ...]
    group: np.ndarray
    qstar: np.ndarray
    dqstar: np.ndarray
    h: np.ndarray | None
    prepared: Prepared
    exog: np.ndarray
    endog: np.ndarray
    instr: np.ndarray
    endog_names: tuple[str, ...]
    instr_names: tuple[str, ...]
    a_mat: np.ndarray
    z: np.ndarray
    psi_demand: np.ndarray
    n_all: int
    full_cov: CovSpec
    projection: Projection

    def solve(self, dependent: str, hvec: np.ndarray, *, overid: bool = False
              ) -> tuple[IVFit, np.ndarray]:
        """Fit ``dependent`` (a prepared column) and its sequential covariance.

        Parameters
        ----------
        dependent : str
            ``_p`` for price, or ``_dep:<model>`` for price minus a candidate's markup.
        hvec : numpy.ndarray
            (n_s,) the markup multiplier subtracted from price in ``dependent``.
        overid : bool
            Compute Hansen's J.

        Returns
        -------
        (IVFit, numpy.ndarray)
            The fit (naive covariance inside) and the (k, k) sequential covariance.
        """
        cols = self.prepared.columns
        fit = fit_iv(cols[dependent], self.exog, self.endog, self.instr, self.names,
                     estimator="2sls", cov=self.prepared.cov, overid=overid,
                     instrument_names=self.instr_names, checked=True,
                     projection=self.projection)
        return fit, cluster_cov(self.influence(fit, hvec), self.full_cov, fit.k)

    def solve_coefficient(self, dependent: str, hvec: np.ndarray, index: int
                          ) -> tuple[float, float]:
        """One coefficient of :meth:`solve` and its sequential standard error, alone.

        The same numbers as ``solve`` (to rounding) without forming the fit's
        (n, k) influence or covariance: only column ``index`` of the sequential
        influence is built and summed by cluster.  Under two-way clustering,
        whose covariance is clipped as a whole, it is ``solve`` itself.

        Parameters
        ----------
        dependent : str
            As for :meth:`solve`.
        hvec : numpy.ndarray
            As for :meth:`solve`.
        index : int
            Position of the coefficient in ``names`` (one of ``theta_index``).

        Returns
        -------
        (float, float)
            The coefficient and its standard error.
        """
        if self.full_cov.clusters2 is not None:
            # two-way clustering clips the whole (k, k) covariance (conduct.iv.cluster_cov):
            # one coefficient alone would miss that
            fit, cov = self.solve(dependent, hvec)
            return float(fit.params[index]), float(np.sqrt(cov[index, index]))
        proj = self.projection
        y = self.prepared.columns[dependent]
        b = proj.bread @ (proj.xhat.T @ y)
        e = y - proj.x @ b
        n = len(self.rows)
        own = n * e * (proj.xhat @ proj.bread[:, index])  # column index of the fit's influence
        psi = self.psi_demand @ self._demand_term(b, hvec)[index]
        add_rows(psi, self.rows, (self.n_all / n) * own)
        var = cluster_cov(psi[:, None], self.full_cov, len(b))[0, 0]
        return float(b[index]), float(np.sqrt(var))

    def influence(self, fit: IVFit, hvec: np.ndarray) -> np.ndarray:
        """Sequential influence functions of a fit on the full panel.

        Parameters
        ----------
        fit : IVFit
            A fit returned by :meth:`solve`.
        hvec : numpy.ndarray
            (n_s,) markup multiplier subtracted from price in its dependent variable.

        Returns
        -------
        numpy.ndarray
            (n, k) with ``b - beta ~ mean(psi_i)`` over all panel rows: the supply
            influence plus the demand influence times ``A G_alpha``.
        """
        psi = self.psi_demand @ self._demand_term(fit.params, hvec).T
        return add_rows(psi, self.rows, (self.n_all / len(self.rows)) * fit.influence)

    def _demand_term(self, params: np.ndarray, hvec: np.ndarray) -> np.ndarray:
        """(k, k_d) derivative of the coefficients in the demand coefficients, ``A G_alpha``."""
        deltas = params[list(self.theta_index)][self.group]
        g_alpha = -(self.z.T @ ((hvec + deltas)[:, None] * self.dqstar)) / len(self.rows)
        return self.a_mat @ g_alpha


def supply_columns(frame: pd.DataFrame, study: Study
                   ) -> tuple[dict[str, np.ndarray], dict[str, np.ndarray]]:
    """The supply relation's raw columns that do not depend on demand.

    Parameters
    ----------
    frame : pandas.DataFrame
        Panel rows.
    study : Study
        With a ``[supply]`` table.

    Returns
    -------
    (dict, dict)
        ``_p``, ``Q`` and the cost shifters; and the excluded instruments
        (interactions ``a*b`` multiplied out), each (n,).
    """
    assert study.supply is not None
    for role, names in (("cost shifter", study.supply.cost_shifters),
                        ("instrument", supply_instruments(study))):
        clash = [c for c in names if c in ("Q", QSTAR)]
        if clash:
            raise DataError(
                f"Column '{clash[0]}' is a supply-relation {role}, but the supply relation "
                f"names quantity 'Q' and the markup regressor '{QSTAR}' in its equations and "
                "tables, so the two would be confused. Rename that column in the data file "
                "and in the study file (e.g. 'q_index')."
            )
    data: dict[str, np.ndarray] = {"_p": frame[study.panel.price].to_numpy(dtype=float),
                                   "Q": frame[study.panel.quantity].to_numpy(dtype=float)}
    for c in study.supply.cost_shifters:
        data[c] = frame[c].to_numpy(dtype=float)
    raw: dict[str, np.ndarray] = {}
    for name in supply_instruments(study):
        if "*" in name and name not in frame.columns:
            a, b = name.split("*", 1)
            raw[name] = frame[a].to_numpy(dtype=float) * frame[b].to_numpy(dtype=float)
        else:
            raw[name] = frame[name].to_numpy(dtype=float)
    return data, raw


def build_system(
    panel: Panel,
    study: Study,
    demand: DemandResult,
    *,
    subset: np.ndarray | None = None,
    split: tuple[np.ndarray, tuple[str, ...]] | None = None,
    candidates: tuple[Candidate, ...] = (),
) -> SupplySystem:
    """Assemble the supply relation's design.

    Parameters
    ----------
    panel, study, demand
        The study and its fitted demand.
    subset : numpy.ndarray or None
        (n,) boolean mask of panel rows to use (e.g. a rolling window).
    split : (numpy.ndarray, tuple of str) or None
        Group code per panel row (0..G-1) and the group labels: theta per group.
    candidates : tuple of Candidate
        Candidates whose dependent variable ``P - h Q*`` is prepared as ``_dep:<name>``.

    Returns
    -------
    SupplySystem
    """
    assert study.supply is not None
    s = study.supply
    f = panel.frame
    n_all = len(f)
    keep = demand.slope < 0
    if subset is not None:
        keep &= subset
    rows = np.flatnonzero(keep)
    if len(rows) < 10:
        raise DataError(
            f"The estimated demand slope is negative at only {len(rows)} of {n_all} rows"
            + (" in the selected rows" if subset is not None else "")
            + "; the supply relation cannot be estimated. Check the demand specification."
        )
    fs = f if len(rows) == len(f) else f.iloc[rows].reset_index(drop=True)
    data, raw = supply_columns(fs, study)
    p, q = data["_p"], data["Q"]
    slope = demand.slope[rows]
    qstar = -q / slope
    dqstar = (q / slope**2)[:, None] * demand.slope_grad[rows]  # (n_s, k_d)
    h_all = benchmark_h(panel, study)
    h = h_all[rows] if h_all is not None else None
    if split is None:
        group = np.zeros(len(rows), dtype=np.int64)
        labels: tuple[str, ...] = ("all",)
    else:
        group = split[0][rows].astype(np.int64)
        labels = split[1]
    n_groups = len(labels)

    base_instr = supply_instruments(study)
    if n_groups == 1:
        qnames = [QSTAR]
        data[QSTAR] = qstar
        instr_names = tuple(base_instr)
        data.update(raw)
    else:
        qnames, inames = [], []
        for g, label in enumerate(labels):
            ind = (group == g).astype(float)
            qnames.append(f"{QSTAR}[{label}]")
            data[qnames[-1]] = qstar * ind
            for name in base_instr:
                inames.append(f"{name}[{label}]")
                data[inames[-1]] = raw[name] * ind
        instr_names = tuple(inames)
    for c in candidates:
        hc = _markup_h(c, h, len(rows))
        if hc is not None:
            data[f"_dep:{c.name}"] = p - hc * qstar
    mk = panel.market_codes()
    prep = prepare(fs, data, study, stage="supply",
                   markets=mk if len(rows) == n_all else mk[rows])
    cols = prep.columns
    n = len(rows)
    exog_names = (["const"] if prep.constant else []) + list(s.cost_shifters)
    exog = np.column_stack(
        ([np.ones(n)] if prep.constant else []) + [cols[c] for c in s.cost_shifters]
    ) if exog_names else np.zeros((n, 0))
    endog_names = tuple(qnames) + (("Q",) if s.cost_slope else ())
    endog = np.column_stack([cols[c] for c in endog_names])
    instr = np.column_stack([cols[c] for c in instr_names])
    names = tuple(exog_names) + endog_names
    x, z = check_design(exog, endog, instr, names, instr_names)
    gmat = z.T @ x / n
    w = np.linalg.inv(z.T @ z / n)
    a_mat = np.linalg.solve(gmat.T @ w @ gmat, gmat.T @ w)
    cov_full = prep.cov
    # demand used every panel row: its cluster codes are the full panel's
    c1, c2 = ((demand.prepared.cov.clusters, demand.prepared.cov.clusters2)
              if cov_full.kind == "cluster" else (None, None))
    full_cov = CovSpec(kind=cov_full.kind, clusters=c1, hac_lags=cov_full.hac_lags,
                       df_penalty=cov_full.df_penalty, clusters2=c2)
    return SupplySystem(
        rows=rows, names=names, theta_index=tuple(names.index(c) for c in qnames),
        labels=labels, group=group, qstar=qstar, dqstar=dqstar, h=h, prepared=prep,
        exog=exog, endog=endog, instr=instr, endog_names=endog_names,
        instr_names=instr_names, a_mat=a_mat, z=z, psi_demand=demand.fit.influence,
        n_all=n_all, full_cov=full_cov, projection=Projection(x, z),
    )


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
    cands = study.candidates if with_tests else ()
    sys_ = build_system(panel, study, demand, candidates=cands)
    n = len(sys_.rows)
    level = study.inference.level
    main, cov = sys_.solve("_p", np.zeros(n), overid=with_tests)
    psi_theta = sys_.influence(main, np.zeros(n))[:, sys_.theta_index[0]]
    i_theta = sys_.theta_index[0]
    theta = float(main.params[i_theta])
    se = float(np.sqrt(cov[i_theta, i_theta]))
    zc = float(stats.norm.ppf(0.5 + level / 2))
    tests = []
    h = sys_.h
    for c in cands:
        hc = _markup_h(c, h, n)
        if hc is None:
            continue
        delta, se_c = sys_.solve_coefficient(f"_dep:{c.name}", hc, i_theta)
        stat = (delta / se_c) ** 2
        pval = float(stats.chi2.sf(stat, 1))
        what = "theta = H (Herfindahl, or 1/N)" if c.theta is None else f"theta = {c.theta:g}"
        tests.append(CandidateTest(
            name=c.name, theta=c.theta, delta=delta, se=se_c, stat=float(stat), p=pval,
            rejected=pval < 1 - level, null=f"{c.name}: {what}",
        ))
    kept = tuple(t.name for t in tests if not t.rejected)
    verdict = kept[0] if len(kept) == 1 else "inconclusive"
    bench = float(np.sum(h * sys_.qstar) / np.sum(sys_.qstar)) if h is not None else None
    first = (first_stage_table(sys_.endog, sys_.instr, sys_.exog, sys_.endog_names,
                               sys_.prepared.cov) if with_tests else ())
    strength = (stage_strength(sys_.endog, sys_.instr, sys_.exog, first, sys_.prepared.cov,
                               "theta") if with_tests else None)
    qstar_all = np.full(sys_.n_all, np.nan)
    qstar_all[sys_.rows] = sys_.qstar
    return SupplyResult(
        fit=main, cov=cov, theta=theta, se=se, se_naive=float(main.se[i_theta]),
        ci=(theta - zc * se, theta + zc * se), tests=tuple(tests), verdict=verdict,
        not_rejected=kept, cournot_benchmark=bench, rows=sys_.rows, qstar=qstar_all,
        h=benchmark_h(panel, study), first_stage=first, strength=strength,
        instruments=sys_.instr_names, prepared=sys_.prepared, theta_influence=psi_theta,
        full_cov=sys_.full_cov,
    )
