"""Instrument diagnostics for one IV stage, in the study's covariance convention.

This module turns the arrays of a stage into the first-stage table reported
for it: per endogenous regressor, the F statistic on the excluded
instruments (Wald / k under robust, cluster or HAC errors; the classic F under
homoskedastic errors) and the partial R-squared.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

from conduct.iv import CovSpec, cluster_cov

__all__ = ["FirstStage", "first_stage_table"]


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
        p-value of F against F(k, n - k_all - a).
    df : tuple of int
        Numerator and denominator degrees of freedom.
    partial_r2 : float
        Partial R-squared of the excluded instruments.
    convention : str
        How F was computed.
    """

    name: str
    f: float
    p: float
    df: tuple[int, int]
    partial_r2: float
    convention: str


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

    Notes
    -----
    With ``X = [W, Z]`` and OLS of each endogenous column on X, the statistic is
    ``F = b_Z' V_Z^{-1} b_Z / k`` where ``V_Z`` is the block of the chosen
    covariance for the excluded instruments, using the same small-sample
    conventions as :mod:`conduct.iv`.
    """
    n, k = instruments.shape
    x = np.column_stack([exog, instruments])
    kx = x.shape[1]
    xtx_inv = np.linalg.inv(x.T @ x)
    coef = xtx_inv @ x.T @ endog
    resid = endog - x @ coef
    # partial out exog for partial R2
    if exog.shape[1]:
        pz = instruments - exog @ np.linalg.lstsq(exog, instruments, rcond=None)[0]
        pe = endog - exog @ np.linalg.lstsq(exog, endog, rcond=None)[0]
    else:
        pz, pe = instruments, endog
    dof = n - kx - cov.df_penalty
    out = []
    for j, name in enumerate(names):
        e = resid[:, j]
        b = coef[-k:, j]
        if cov.kind == "homoskedastic":
            v = (e @ e / dof) * xtx_inv
            conv = "classic F (homoskedastic)"
        else:
            psi = (x * e[:, None]) @ (n * xtx_inv)
            v = cluster_cov(psi, cov, kx)
            conv = f"Wald/k with {cov.kind} covariance"
        vz = v[-k:, -k:]
        f = float(b @ np.linalg.solve(vz, b) / k)
        fitted = pz @ np.linalg.lstsq(pz, pe[:, j], rcond=None)[0]
        r2 = float(fitted @ fitted / (pe[:, j] @ pe[:, j]))
        out.append(FirstStage(name=name, f=f, p=float(stats.f.sf(f, k, dof)), df=(k, dof),
                              partial_r2=r2, convention=conv))
    return tuple(out)
