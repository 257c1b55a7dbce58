"""Instrument diagnostics for one IV stage, in the study's covariance convention.

This module turns the arrays of a stage into what is reported for it: per
endogenous regressor the first-stage F on the excluded instruments, the
partial R-squared and, with several endogenous regressors, the conditional F
of Sanderson & Windmeijer (2016); for the stage as a whole the effective F of
Montiel Olea & Pflueger (2013) when there is one endogenous regressor, and a
plain-language reading against the Stock & Yogo (2005) critical values.  The
statistics come from :mod:`conduct.weakiv`; Newey-West (HAC) studies get the
first-stage Wald/k with the HAC covariance of :mod:`conduct.iv`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

from conduct.errors import EstimationError
from conduct.iv import CovSpec, Projection, cluster_cov, condition_number, ls_coef
from conduct.stockyogo import strength_reading
from conduct.weakiv import effective_f, first_stage

__all__ = [
    "EndogeneityTest", "FirstStage", "Strength", "endogeneity_test", "first_stage_table",
    "stage_strength",
]


@dataclass(frozen=True, slots=True)
class FirstStage:
    """First-stage diagnostics of one endogenous regressor.

    Attributes
    ----------
    name : str
        The endogenous regressor.
    f : float
        F statistic on the excluded instruments (Wald / k for non-homoskedastic errors).
    p : float
        p-value of F.
    df : tuple of int
        Reference degrees of freedom of F.
    partial_r2 : float
        Partial R-squared of the excluded instruments.
    convention : str
        How F was computed.
    conditional_f : float or None
        Sanderson-Windmeijer conditional F (several endogenous regressors only).
    """

    name: str
    f: float
    p: float
    df: tuple[int, int]
    partial_r2: float
    convention: str
    conditional_f: float | None = None


@dataclass(frozen=True, slots=True)
class Strength:
    """Instrument strength of a stage as a whole.

    Attributes
    ----------
    effective_f : float or None
        Montiel Olea-Pflueger effective F (one endogenous regressor only).
    effective_critical : float or None
        Its simplified critical value for a 10% worst-case bias at 5% size.
    weakest_f : float
        The smallest (conditional, when several) first-stage F.
    reading : str
        Plain-language reading against the Stock-Yogo critical values.
    """

    effective_f: float | None
    effective_critical: float | None
    weakest_f: float
    reading: str


def _weakiv_cov(cov: CovSpec) -> str | None:
    if cov.clusters2 is not None:
        return None  # two-way clustering: computed here with the covariance of conduct.iv
    return cov.kind if cov.kind in ("homoskedastic", "robust", "cluster") else None


def first_stage_table(
    endog: np.ndarray,
    instruments: np.ndarray,
    exog: np.ndarray,
    names: tuple[str, ...],
    cov: CovSpec,
) -> tuple[FirstStage, ...]:
    """First-stage F and partial R-squared for each endogenous regressor.

    Parameters
    ----------
    endog : numpy.ndarray
        (n, p) endogenous regressors.
    instruments : numpy.ndarray
        (n, k) excluded instruments.
    exog : numpy.ndarray
        (n, w) included exogenous regressors (may have zero columns).
    names : tuple of str
        Names of the p endogenous regressors.
    cov : CovSpec
        Covariance choice of the stage.

    Returns
    -------
    tuple of FirstStage
    """
    kind = _weakiv_cov(cov)
    if kind is None:
        return _hac_table(endog, instruments, exog, names, cov)
    try:
        fs = first_stage(endog, instruments, exog, kind, clusters=cov.clusters,
                         df_absorbed=cov.df_penalty)
    except EstimationError as exc:
        cond = condition_number(np.column_stack([exog, instruments]))
        raise EstimationError(
            f"{str(exc).rstrip('.')}. The instruments have condition number {cond:.3g} "
            "after scaling: some are nearly collinear; drop one or combine them."
        ) from None
    out = []
    for j, name in enumerate(names):
        test = fs.f[j]
        cond = fs.conditional_f[j].stat if fs.conditional_f is not None else None
        out.append(FirstStage(
            name=name, f=float(test.stat), p=float(test.pvalue),
            df=(int(test.df[0]), int(test.df[1])), partial_r2=float(fs.partial_r2[j]),
            convention=fs.convention, conditional_f=None if cond is None else float(cond),
        ))
    return tuple(out)


def stage_strength(
    endog: np.ndarray,
    instruments: np.ndarray,
    exog: np.ndarray,
    table: tuple[FirstStage, ...],
    cov: CovSpec,
    coefficient: str,
) -> Strength:
    """Effective F (one endogenous regressor) and a Stock-Yogo reading for a stage.

    Parameters
    ----------
    endog, instruments, exog : numpy.ndarray
        As for :func:`first_stage_table`.
    table : tuple of FirstStage
        The stage's first-stage table.
    cov : CovSpec
    coefficient : str
        How to name the coefficient in the reading.

    Returns
    -------
    Strength
    """
    p, k = endog.shape[1], instruments.shape[1]
    kind = _weakiv_cov(cov)
    eff = crit = None
    if p == 1 and kind is not None:
        e = effective_f(endog, instruments, exog, kind, clusters=cov.clusters,
                        df_absorbed=cov.df_penalty)
        eff, crit = float(e.f_eff), float(e.critical_value)
    if p == 1:
        weakest = eff if eff is not None else table[0].f
        reading = strength_reading(weakest, 1, k, coefficient=coefficient,
                                   robust=cov.kind != "homoskedastic")
    else:
        conds = [t.conditional_f if t.conditional_f is not None else t.f for t in table]
        weakest = float(min(conds))
        # Sanderson & Windmeijer (2016): compare the conditional F with the
        # one-regressor tables at k - p + 1 instruments.
        reading = strength_reading(weakest, 1, k - p + 1, coefficient=coefficient,
                                   robust=cov.kind != "homoskedastic")
        reading = (f"Weakest conditional first-stage F {weakest:.1f} (Sanderson-Windmeijer), "
                   f"read against the one-regressor tables with {k - p + 1} instruments: "
                   + reading)
    if eff is not None and crit is not None:
        verdict = "above" if eff >= crit else "below"
        reading += (f" Effective F (Montiel Olea-Pflueger) {eff:.1f} is {verdict} its "
                    f"conservative 10%-bias critical value {crit:.1f}.")
    return Strength(effective_f=eff, effective_critical=crit, weakest_f=float(weakest),
                    reading=reading)


def _cov_words(cov: CovSpec, n: int) -> str:
    if cov.kind == "hac":
        return f"Newey-West ({cov.lags(n)} lags)"
    return "two-way cluster-robust (Cameron, Gelbach & Miller 2011)"


def _hac_table(endog: np.ndarray, instruments: np.ndarray, exog: np.ndarray,
               names: tuple[str, ...], cov: CovSpec) -> tuple[FirstStage, ...]:
    """First-stage Wald/k with the HAC or two-way cluster covariance of :mod:`conduct.iv`."""
    n, k = instruments.shape
    x = np.column_stack([exog, instruments])
    kx = x.shape[1]
    xtx_inv = np.linalg.inv(x.T @ x)
    coef = xtx_inv @ (x.T @ endog)
    resid = endog - x @ coef
    if exog.shape[1]:
        pz = instruments - exog @ ls_coef(exog, instruments)
        pe = endog - exog @ ls_coef(exog, endog)
    else:
        pz, pe = instruments, endog
    dof = n - kx - cov.df_penalty
    out = []
    for j, name in enumerate(names):
        psi = (x * resid[:, j][:, None]) @ (n * xtx_inv)
        v = cluster_cov(psi, cov, kx)[-k:, -k:]
        b = coef[-k:, j]
        f = float(b @ np.linalg.solve(v, b) / k)
        fitted = pz @ ls_coef(pz, pe[:, j])
        r2 = float(fitted @ fitted / (pe[:, j] @ pe[:, j]))
        out.append(FirstStage(name=name, f=f, p=float(stats.f.sf(f, k, dof)), df=(k, dof),
                              partial_r2=r2,
                              convention=f"Wald/k with {_cov_words(cov, n)} covariance, "
                                         f"{dof} residual degrees of freedom"))
    return tuple(out)


@dataclass(frozen=True, slots=True)
class EndogeneityTest:
    """Regression-based test that the endogenous regressors are in fact exogenous.

    Attributes
    ----------
    stat : float
        Wald statistic on the first-stage residuals in the control-function regression.
    df : int
        Number of endogenous regressors.
    p : float
        Chi-square p-value.
    null : str
    convention : str
    """

    stat: float
    df: int
    p: float
    null: str
    convention: str


def endogeneity_test(y: np.ndarray, exog: np.ndarray, endog: np.ndarray,
                     instruments: np.ndarray, cov: CovSpec,
                     projection: Projection | None = None) -> EndogeneityTest:
    """Control-function (Durbin-Wu-Hausman, regression form) test of exogeneity.

    Parameters
    ----------
    y : numpy.ndarray
        (n,) dependent variable.
    exog, endog, instruments : numpy.ndarray
        (n, w), (n, p), (n, k) blocks of the stage.
    cov : CovSpec
        Covariance choice; the Wald statistic uses it (robust to heteroskedasticity
        and clustering when chosen, as in Wooldridge 2010, sec. 6.3.1).
    projection : Projection or None
        The stage's 2SLS first stage on ``[exog, endog]`` and ``[exog, instruments]``,
        when already computed: its fitted endogenous columns give ``V``.

    Returns
    -------
    EndogeneityTest

    Notes
    -----
    Regress each endogenous column on ``[W, Z]``, keep the residuals ``V``, then
    regress ``y`` by OLS on ``[W, X, V]`` and test that the coefficients on ``V``
    are zero.
    """
    if projection is not None:
        v = endog - projection.xhat[:, exog.shape[1]:]
    else:
        z = np.column_stack([exog, instruments])
        v = endog - z @ ls_coef(z, endog)
    x = np.column_stack([exog, endog, v])
    n, k = x.shape
    xtx_inv = np.linalg.inv(x.T @ x)
    b = xtx_inv @ (x.T @ y)
    e = y - x @ b
    p = endog.shape[1]
    if cov.kind == "homoskedastic":
        vcov = (e @ e / (n - k - cov.df_penalty)) * xtx_inv
    else:
        vcov = cluster_cov((x * e[:, None]) @ (n * xtx_inv), cov, k)
    bv = b[-p:]
    stat = float(bv @ np.linalg.solve(vcov[-p:, -p:], bv))
    return EndogeneityTest(
        stat=stat, df=p, p=float(stats.chi2.sf(stat, p)),
        null="the regressors treated as endogenous are exogenous (OLS would be consistent)",
        convention=f"control-function Wald, {cov.kind} covariance, chi-square({p})",
    )
