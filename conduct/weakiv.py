"""Weak-instrument diagnostics as pure functions on arrays.

Every function takes arrays that may already have fixed effects absorbed
(say how many parameters that used with ``df_absorbed``) and partials the
exogenous regressors ``W`` out itself (Frisch-Waugh-Lovell).  Results are
frozen, slotted dataclasses; each carries a ``convention`` string stating its
small-sample conventions.

Shapes: ``n`` observations, ``p`` endogenous regressors ``X`` (n, p),
``k`` excluded instruments ``Z`` (n, k), ``w`` exogenous regressors ``W``
(n, w), possibly (n, 0).  One-dimensional inputs of length n are read as one
column.

Functions
---------
first_stage
    First-stage F, partial and Shea R-squared, Sanderson-Windmeijer
    conditional F.
effective_f
    Montiel Olea-Pflueger effective F with its simplified critical value.
ar_test, anderson_rubin_set
    Anderson-Rubin test and its exact confidence set for one endogenous
    coefficient.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass
from typing import Literal, get_args

import numpy as np
import scipy.linalg as sla
from scipy import optimize, stats

from conduct.errors import EstimationError, IdentificationError
from conduct.iv import cluster_ids, group_sums, ls_coef, orthonormal_basis, r_factor

__all__ = [
    "ARSet",
    "Covariance",
    "EffectiveF",
    "FirstStage",
    "HypothesisTest",
    "anderson_rubin_set",
    "ar_test",
    "effective_f",
    "first_stage",
    "mop_critical_value",
]

Covariance = Literal["homoskedastic", "robust", "cluster"]
SetKind = Literal["bounded", "union", "unbounded", "empty"]

_CONVENTIONS = {
    "homoskedastic": (
        "homoskedastic: error variance = RSS/(n - k - w - df_absorbed); "
        "statistic = Wald/q with F(q, n - k - w - df_absorbed) reference"
    ),
    "robust": (
        "robust (HC1): sandwich scaled by n/(n - k - w - df_absorbed); "
        "statistic = Wald/q with F(q, n - k - w - df_absorbed) reference"
    ),
    "cluster": (
        "cluster (CR1): sandwich of cluster score sums scaled by "
        "G/(G - 1) * (n - 1)/(n - k - w - df_absorbed); "
        "statistic = Wald/q with F(q, G - 1) reference"
    ),
}


@dataclass(frozen=True, slots=True)
class HypothesisTest:
    """Outcome of one test.

    Attributes
    ----------
    stat : float
        The statistic, on the scale of ``distribution``.
    pvalue : float
        Upper-tail probability (``sf``) of ``stat``.
    df : tuple of float
        Degrees of freedom of the reference distribution.
    distribution : str
        Reference distribution, e.g. ``"F(3, 96)"``.
    null : str
        The null hypothesis in words.
    convention : str
        Small-sample convention of the statistic.
    """

    stat: float
    pvalue: float
    df: tuple[float, ...]
    distribution: str
    null: str
    convention: str


@dataclass(frozen=True, slots=True)
class FirstStage:
    """First-stage diagnostics, one entry per endogenous regressor.

    Attributes
    ----------
    f : tuple of HypothesisTest, length p
        F test that the excluded instruments have zero coefficients in the
        first stage of each endogenous regressor (Wald/k under robust or
        cluster covariance).
    partial_r2 : tuple of float, length p
        R-squared of the endogenous regressor on the instruments, both
        partialled on ``W``.
    shea_r2 : tuple of float, length p
        Shea's partial R-squared (equals ``partial_r2`` when p = 1).
    conditional_f : tuple of HypothesisTest or None
        Sanderson-Windmeijer conditional F, length p; None when p = 1.
    cov : str
        Covariance choice.
    nobs, n_endog, n_instruments, n_exog, df_absorbed : int
        n, p, k, rank of W, absorbed fixed-effect parameters.
    n_clusters : int or None
        G under cluster covariance.
    convention : str
        Small-sample conventions.
    """

    f: tuple[HypothesisTest, ...]
    partial_r2: tuple[float, ...]
    shea_r2: tuple[float, ...]
    conditional_f: tuple[HypothesisTest, ...] | None
    cov: str
    nobs: int
    n_endog: int
    n_instruments: int
    n_exog: int
    df_absorbed: int
    n_clusters: int | None
    convention: str

    @property
    def f_values(self) -> np.ndarray:
        """First-stage F statistics, shape (p,)."""
        return np.array([t.stat for t in self.f])


@dataclass(frozen=True, slots=True)
class EffectiveF:
    """Montiel Olea-Pflueger effective F for one endogenous regressor.

    Attributes
    ----------
    f_eff : float
        Effective F statistic.
    k_eff : float
        Effective degrees of freedom of the Patnaik approximation.
    critical_value : float
        Simplified (conservative) TSLS critical value at ``tau`` and ``alpha``.
    tau : float
        Tolerated fraction of the worst-case benchmark bias.
    alpha : float
        Test size.
    cov : str
        Covariance choice.
    nobs, n_instruments : int
        n and k.
    method : str
        How the critical value was computed.
    convention : str
        Small-sample convention.
    """

    f_eff: float
    k_eff: float
    critical_value: float
    tau: float
    alpha: float
    cov: str
    nobs: int
    n_instruments: int
    method: str
    convention: str

    @property
    def weak(self) -> bool:
        """True when the effective F does not exceed the critical value."""
        return self.f_eff <= self.critical_value


@dataclass(frozen=True, slots=True)
class ARSet:
    """Anderson-Rubin confidence set for one coefficient.

    Attributes
    ----------
    intervals : tuple of (float, float)
        Disjoint closed intervals in increasing order, ``±inf`` for open ends.
    kind : {"bounded", "union", "unbounded", "empty"}
        ``bounded``: one finite interval; ``union``: two or more disjoint
        intervals (typically two unbounded rays); ``unbounded``: one interval
        with an infinite end (the whole line, or a half-line in a knife-edge
        case); ``empty``: every value is rejected.
    level : float
        Confidence level.
    cov : str
        Covariance choice.
    critical_value : float
        Cut-off on the statistic's scale.
    distribution : str
        Reference distribution of the statistic.
    first_stage_f : float
        Limit of the AR statistic as the hypothesised value goes to ``±inf``:
        the first-stage F with the same covariance.  The set is unbounded
        exactly when it is below ``critical_value``.
    method : str
        How the set was solved.
    convention : str
        Small-sample convention.
    """

    intervals: tuple[tuple[float, float], ...]
    kind: SetKind
    level: float
    cov: str
    critical_value: float
    distribution: str
    first_stage_f: float
    method: str
    convention: str

    @property
    def bounded(self) -> bool:
        """True when every interval is finite (an empty set counts as bounded)."""
        return all(math.isfinite(a) and math.isfinite(b) for a, b in self.intervals)

    @property
    def length(self) -> float:
        """Total length (``inf`` when unbounded)."""
        return float(sum(b - a for a, b in self.intervals))

    def contains(self, value: float) -> bool:
        """Whether ``value`` lies in the set."""
        return any(a <= value <= b for a, b in self.intervals)

    def describe(self, name: str = "the coefficient") -> str:
        """Plain-language description of the set."""
        pct = f"{self.level:.0%}"
        head = f"The {pct} Anderson-Rubin confidence set for {name}"
        if self.kind == "empty":
            return (
                f"{head} is empty: every value is rejected, which points to "
                "misspecification (the over-identifying restrictions fail), not to precision."
            )
        text = " ∪ ".join(_fmt_interval(a, b) for a, b in self.intervals)
        if self.kind == "bounded":
            return f"{head} is the interval {text}."
        if self.kind == "unbounded":
            if self.intervals == ((-math.inf, math.inf),):
                return (
                    f"{head} is the whole real line: at this level the data say nothing "
                    f"about {name}; the instruments are too weak."
                )
            return f"{head} is the half-line {text}: it is unbounded; the instruments are weak."
        if not self.bounded:
            return (
                f"{head} is the union of disjoint intervals {text}: it is unbounded and "
                "excludes only the gap between them; the instruments are weak."
            )
        return f"{head} is the union of disjoint intervals {text}."


def _fmt_interval(a: float, b: float) -> str:
    lo = "(-inf" if a == -math.inf else f"[{a:.6g}"
    hi = "+inf)" if b == math.inf else f"{b:.6g}]"
    return f"{lo}, {hi}"


# --------------------------------------------------------------------------
# Shared helpers
# --------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class _Design:
    """Inputs partialled on W, with degrees of freedom and cluster codes."""

    Z: np.ndarray  # (n, k), partialled
    n: int
    k: int
    w: int
    df_absorbed: int
    dof: int  # n - k - w - df_absorbed
    cov: str
    codes: np.ndarray | None  # (n,) cluster codes 0..G-1
    n_clusters: int | None


def _check_cov(cov: str) -> None:
    valid = get_args(Covariance)
    if cov not in valid:
        raise EstimationError(f"unknown covariance {cov!r}; valid choices are {', '.join(valid)}")


def _as2d(a: np.ndarray, name: str, n: int | None = None) -> np.ndarray:
    arr = np.asarray(a, dtype=float)
    if arr.ndim == 1:
        arr = arr[:, None]
    if arr.ndim != 2:
        raise EstimationError(f"{name} must be one- or two-dimensional, got shape {arr.shape}")
    if n is not None and arr.shape[0] != n:
        raise EstimationError(f"{name} has {arr.shape[0]} rows, expected {n}")
    if not np.all(np.isfinite(arr)):
        raise EstimationError(f"{name} contains missing or infinite values")
    return arr


def _residualise(W: np.ndarray, *arrays: np.ndarray) -> tuple[int, list[np.ndarray]]:
    """Return rank(W) and each array minus its projection on W."""
    if W.shape[1] == 0:
        return 0, [a.copy() for a in arrays]
    # singular values of W from its R factor (k x k): the same, at O(n k^2)
    r = r_factor(W)
    s = np.linalg.svd(r, compute_uv=False)
    tol = s.max() * max(W.shape) * np.finfo(float).eps if s.size else 0.0
    if np.all(s > tol):
        U = orthonormal_basis(W, r)
    else:  # rank-deficient: the left singular vectors of the non-zero singular values
        q, r = np.linalg.qr(W)
        u_r, s, _ = np.linalg.svd(r)
        U = q @ u_r[:, s > tol]
    return U.shape[1], [a - U @ (U.T @ a) for a in arrays]


def _design(
    Z: np.ndarray,
    W: np.ndarray,
    cov: str,
    clusters: np.ndarray | None,
    df_absorbed: int,
    others: list[tuple[np.ndarray, str]],
) -> tuple[_Design, list[np.ndarray]]:
    _check_cov(cov)
    Z = _as2d(Z, "Z (excluded instruments)")
    n, k = Z.shape
    if k == 0:
        raise IdentificationError("there are no excluded instruments")
    W = (
        _as2d(W, "W (exogenous regressors)", n)
        if W is not None and np.size(W)
        else np.empty((n, 0))
    )
    arrays = [_as2d(a, name, n) for a, name in others]
    if int(df_absorbed) < 0:
        raise EstimationError(f"df_absorbed must be non-negative, got {df_absorbed}")
    w, parts = _residualise(W, Z, *arrays)
    Zt = parts[0]
    sv = np.linalg.svd(r_factor(Zt), compute_uv=False)  # = those of Zt
    if sv.size == 0 or sv.min() <= sv.max() * max(Zt.shape) * np.finfo(float).eps * 10:
        raise EstimationError(
            "the excluded instruments are collinear among themselves or with the "
            "exogenous regressors"
        )
    dof = n - k - w - int(df_absorbed)
    if dof <= 0:
        raise EstimationError(
            f"too few observations: n = {n} leaves {dof} residual degrees of freedom "
            f"after {k} instruments, {w} exogenous regressors and {df_absorbed} absorbed effects"
        )
    codes = None
    n_groups: int | None = None
    if cov == "cluster":
        if clusters is None:
            raise EstimationError("cluster covariance needs a clusters array of length n")
        cl = np.asarray(clusters)
        if cl.shape != (n,):
            raise EstimationError(f"clusters must have shape ({n},), got {cl.shape}")
        codes = cluster_ids(cl)
        n_groups = int(codes.max()) + 1
        if n_groups <= k:
            raise EstimationError(
                f"{n_groups} cluster(s) cannot support a cluster-robust statistic on {k} "
                "instruments: need more clusters than instruments"
            )
    design = _Design(
        Z=Zt,
        n=n,
        k=k,
        w=w,
        df_absorbed=int(df_absorbed),
        dof=dof,
        cov=cov,
        codes=codes,
        n_clusters=n_groups,
    )
    return design, parts[1:]


def _scores(d: _Design, resid: np.ndarray) -> np.ndarray:
    """Score contributions z_i e_i (robust) or their cluster sums, shape (m, k)."""
    s = d.Z * resid[:, None]
    if d.cov == "cluster":
        assert d.codes is not None and d.n_clusters is not None
        return group_sums(d.codes, s)
    return s


def _scale(d: _Design) -> float:
    """Small-sample factor applied to the robust or cluster meat."""
    if d.cov == "robust":
        return d.n / d.dof
    if d.cov == "cluster":
        assert d.n_clusters is not None
        g = d.n_clusters
        return g / (g - 1) * (d.n - 1) / d.dof
    return 1.0


def _ref_df(d: _Design, q: int) -> tuple[int, int]:
    if d.cov == "cluster":
        assert d.n_clusters is not None
        return q, d.n_clusters - 1
    return q, d.dof


def _meat(d: _Design, resid: np.ndarray) -> np.ndarray:
    """Variance of Z'e: sigma^2 Z'Z (homoskedastic) or the scaled sandwich meat, (k, k)."""
    if d.cov == "homoskedastic":
        return float(resid @ resid) / d.dof * (d.Z.T @ d.Z)
    s = _scores(d, resid)
    return _scale(d) * (s.T @ s)


def _wald(d: _Design, target: np.ndarray, q: int, null: str) -> HypothesisTest:
    """F-form test that the coefficients of target on the partialled Z are zero.

    Parameters
    ----------
    target : (n,)
        Partialled dependent variable.
    q : int
        Numerator degrees of freedom (k, or k - p + 1 for the conditional F).
    """
    g = d.Z.T @ target
    coef = ls_coef(d.Z, target)
    resid = target - d.Z @ coef
    meat = _meat(d, resid)
    try:
        wald = float(g @ np.linalg.solve(meat, g))
    except np.linalg.LinAlgError as exc:
        raise EstimationError(
            "the covariance of the instrument coefficients is singular "
            "(too few clusters for the number of instruments?)"
        ) from exc
    stat = wald / q
    df = _ref_df(d, q)
    return HypothesisTest(
        stat=stat,
        pvalue=float(stats.f.sf(stat, *df)),
        df=(float(df[0]), float(df[1])),
        distribution=f"F({df[0]}, {df[1]})",
        null=null,
        convention=_CONVENTIONS[d.cov],
    )


# --------------------------------------------------------------------------
# First stage
# --------------------------------------------------------------------------


def first_stage(
    X: np.ndarray,
    Z: np.ndarray,
    W: np.ndarray,
    cov: Covariance,
    clusters: np.ndarray | None = None,
    df_absorbed: int = 0,
) -> FirstStage:
    """First-stage strength diagnostics for each endogenous regressor.

    Parameters
    ----------
    X : (n, p) array
        Endogenous regressors.
    Z : (n, k) array
        Excluded instruments, k >= p.
    W : (n, w) array
        Exogenous regressors (constant included if wanted); may be (n, 0).
    cov : {"homoskedastic", "robust", "cluster"}
        Covariance of the first-stage coefficients.
    clusters : (n,) array, optional
        Cluster labels, required for ``cov="cluster"``.
    df_absorbed : int, optional
        Fixed-effect parameters already absorbed from all the arrays.

    Returns
    -------
    FirstStage

    Raises
    ------
    IdentificationError
        When k < p.
    EstimationError
        Bad option, shapes, collinear instruments, too few observations or clusters.

    Notes
    -----
    With tildes for residuals on W, :math:`\\hat\\pi_j = (\\tilde Z'\\tilde Z)^{-1}
    \\tilde Z'\\tilde x_j` and :math:`\\hat v_j` the first-stage residuals, the
    F statistic is :math:`\\hat\\pi_j' \\hat V_j^{-1} \\hat\\pi_j / k` where
    :math:`\\hat V_j = (\\tilde Z'\\tilde Z)^{-1} \\hat\\Omega_j (\\tilde Z'\\tilde Z)^{-1}`;
    :math:`\\hat\\Omega_j = s^2 \\tilde Z'\\tilde Z` with
    :math:`s^2 = \\hat v_j'\\hat v_j/(n-k-w-d)` (homoskedastic: the classic F with
    df (k, n-k-w-d)), :math:`\\frac{n}{n-k-w-d}\\sum_i \\tilde z_i\\tilde z_i'\\hat v_{ij}^2`
    (robust, HC1) or :math:`\\frac{G}{G-1}\\frac{n-1}{n-k-w-d}\\sum_g s_g s_g'` with
    :math:`s_g = \\sum_{i\\in g} \\tilde z_i \\hat v_{ij}` (cluster, CR1), d =
    ``df_absorbed``.  Reference distributions: F(k, n-k-w-d), or F(k, G-1) under
    clustering.

    Partial R-squared: :math:`\\tilde x_j' P \\tilde x_j / \\tilde x_j'\\tilde x_j`.
    Shea's R-squared: :math:`[(\\tilde X'\\tilde X)^{-1}]_{jj} / [(\\tilde X' P
    \\tilde X)^{-1}]_{jj}` with P the projection on :math:`\\tilde Z`.

    Sanderson and Windmeijer (2016) conditional F (p > 1): estimate
    :math:`\\tilde x_j = \\tilde X_{-j}\\delta + \\varepsilon_j` by 2SLS with
    instruments :math:`\\tilde Z`, and test that :math:`\\tilde Z` has zero
    coefficients in the regression of :math:`\\hat\\varepsilon_j` on
    :math:`\\tilde Z`, dividing the Wald statistic (same covariance as above)
    by :math:`k - p + 1` instead of k.  Homoskedastic: this is their
    :math:`F_{j|-j}` exactly.  Robust/cluster: the residual-based Wald of the
    same regression divided by :math:`k-p+1`.
    """
    d, (Xt,) = _design(Z, W, cov, clusters, df_absorbed, [(X, "X (endogenous regressors)")])
    p = Xt.shape[1]
    if d.k < p:
        raise IdentificationError(
            f"{d.k} excluded instrument(s) for {p} endogenous regressor(s): not identified"
        )
    coef = ls_coef(d.Z, Xt)
    fitted = d.Z @ coef
    tests = tuple(
        _wald(
            d,
            Xt[:, j],
            d.k,
            f"the excluded instruments have no effect on endogenous regressor {j} (first stage)",
        )
        for j in range(p)
    )
    ssx = np.einsum("ij,ij->j", Xt, Xt)
    ssf = np.einsum("ij,ij->j", fitted, fitted)
    partial = tuple(float(v) for v in ssf / ssx)
    inv_x = np.linalg.inv(Xt.T @ Xt)
    try:
        inv_f = np.linalg.inv(fitted.T @ fitted)
    except np.linalg.LinAlgError as exc:
        raise IdentificationError(
            "the first-stage fitted values are collinear: the instruments cannot "
            "separate the endogenous regressors"
        ) from exc
    shea = tuple(float(v) for v in np.diag(inv_x) / np.diag(inv_f))
    conditional: tuple[HypothesisTest, ...] | None = None
    if p > 1:
        q = d.k - p + 1
        out = []
        for j in range(p):
            others = [i for i in range(p) if i != j]
            delta, *_ = np.linalg.lstsq(fitted[:, others], fitted[:, j], rcond=None)
            eps = Xt[:, j] - Xt[:, others] @ delta
            out.append(
                _wald(
                    d,
                    eps,
                    q,
                    f"endogenous regressor {j} is not identified given the "
                    "others (Sanderson-Windmeijer conditional first stage)",
                )
            )
        conditional = tuple(out)
    return FirstStage(
        f=tests,
        partial_r2=partial,
        shea_r2=shea,
        conditional_f=conditional,
        cov=cov,
        nobs=d.n,
        n_endog=p,
        n_instruments=d.k,
        n_exog=d.w,
        df_absorbed=d.df_absorbed,
        n_clusters=d.n_clusters,
        convention=_CONVENTIONS[cov]
        + (
            "; conditional F = residual-based Wald/(k - p + 1) with "
            "F(k - p + 1, same denominator df) reference"
            if p > 1
            else ""
        ),
    )


# --------------------------------------------------------------------------
# Effective F
# --------------------------------------------------------------------------


def mop_critical_value(k_eff: float, tau: float = 0.10, alpha: float = 0.05) -> float:
    """Simplified Montiel Olea-Pflueger critical value for TSLS.

    Parameters
    ----------
    k_eff : float
        Effective degrees of freedom (positive, need not be an integer).
    tau : float, optional
        Tolerated fraction of the worst-case benchmark bias (default 10%).
    alpha : float, optional
        Test size (default 5%).

    Returns
    -------
    float
        :math:`\\chi'^2_{K_{eff}}(K_{eff}/\\tau)` upper-``alpha`` quantile over
        :math:`K_{eff}`; 23.109 for :math:`K_{eff}=1`, tau = 10%, alpha = 5%.
    """
    if not (0 < tau < 1 and 0 < alpha < 1 and k_eff > 0):
        raise EstimationError("need 0 < tau < 1, 0 < alpha < 1 and k_eff > 0")
    x = 1.0 / tau
    return float(stats.ncx2.isf(alpha, k_eff, x * k_eff) / k_eff)


def effective_f(
    X: np.ndarray,
    Z: np.ndarray,
    W: np.ndarray,
    cov: Covariance,
    clusters: np.ndarray | None = None,
    df_absorbed: int = 0,
    *,
    tau: float = 0.10,
    alpha: float = 0.05,
) -> EffectiveF:
    """Montiel Olea and Pflueger (2013) effective F for one endogenous regressor.

    Parameters
    ----------
    X : (n,) or (n, 1) array
        The endogenous regressor.
    Z : (n, k) array
        Excluded instruments.
    W : (n, w) array
        Exogenous regressors; may be (n, 0).
    cov : {"homoskedastic", "robust", "cluster"}
        Covariance of the first-stage coefficients.
    clusters : (n,) array, optional
        Cluster labels for ``cov="cluster"``.
    df_absorbed : int, optional
        Fixed-effect parameters already absorbed.
    tau : float, optional
        Bias tolerance of the critical value (default 0.10).
    alpha : float, optional
        Size of the weak-instrument test (default 0.05).

    Returns
    -------
    EffectiveF

    Notes
    -----
    With tildes for residuals on W, :math:`Q = \\tilde Z'\\tilde Z` and
    :math:`\\hat\\Omega` the estimated variance of :math:`\\tilde Z'v` (the same
    meat, with the same small-sample factor, as in :func:`first_stage`),

    .. math:: F_{eff} = \\frac{\\tilde x' P_{\\tilde Z} \\tilde x}{\\mathrm{tr}(S)},
              \\qquad S = Q^{-1/2} \\hat\\Omega Q^{-1/2},

    which is the paper's :math:`x'ZZ'x/\\mathrm{tr}(\\hat W_2)` with instruments
    normalised to :math:`Z'Z/n = I`.  With the homoskedastic meat
    :math:`\\hat\\Omega = s^2 Q` it is the classic first-stage F; with k = 1 it
    is the robust (or cluster) first-stage F.

    Critical value: the *simplified* procedure, which bounds the Nagar bias
    ratio of TSLS by 1 (so :math:`x = 1/\\tau`) and uses the Patnaik
    approximation :math:`\\chi'^2_{K_{eff}}(x K_{eff})/K_{eff}` with

    .. math:: K_{eff} = \\frac{\\mathrm{tr}(S)^2 (1 + 2x)}
              {\\mathrm{tr}(S'S) + 2x\\,\\mathrm{tr}(S)\\,\\lambda_{max}(S)}.

    It is conservative: the generalized procedure (which needs the structural
    residuals) gives critical values no larger.  :math:`K_{eff} = k` under
    homoskedasticity.
    """
    d, (Xt,) = _design(Z, W, cov, clusters, df_absorbed, [(X, "X (endogenous regressor)")])
    if Xt.shape[1] != 1:
        raise EstimationError(
            f"the effective F is defined for one endogenous regressor, got {Xt.shape[1]}"
        )
    x = Xt[:, 0]
    coef = ls_coef(d.Z, x)
    fitted = d.Z @ coef
    resid = x - fitted
    omega = _meat(d, resid)
    # the Cholesky factor of Z'Z from a QR of Z: stable when the instruments are nearly
    # collinear, where forming Z'Z first loses half the digits
    L = r_factor(d.Z).T
    S = sla.solve_triangular(L, sla.solve_triangular(L, omega, lower=True).T, lower=True)
    S = (S + S.T) / 2
    eig = np.linalg.eigvalsh(S)
    tr = float(eig.sum())
    xw = 1.0 / tau
    k_eff = tr**2 * (1 + 2 * xw) / (float(np.sum(eig**2)) + 2 * xw * tr * float(eig.max()))
    return EffectiveF(
        f_eff=float(fitted @ fitted) / tr,
        k_eff=float(k_eff),
        critical_value=mop_critical_value(k_eff, tau, alpha),
        tau=tau,
        alpha=alpha,
        cov=cov,
        nobs=d.n,
        n_instruments=d.k,
        method=(
            "simplified Montiel Olea-Pflueger TSLS critical value (Nagar bias ratio "
            "bounded by 1, Patnaik approximation with K_eff); conservative"
        ),
        convention=_CONVENTIONS[cov].split(";")[0],
    )


# --------------------------------------------------------------------------
# Anderson-Rubin
# --------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class _ARParts:
    """Partialled pieces of the AR statistic, with Z orthonormalised."""

    d: _Design
    Q: np.ndarray  # (n, k) orthonormal basis of the partialled Z
    y: np.ndarray  # (n,)
    x: np.ndarray  # (n,)


def _ar_parts(
    y: np.ndarray,
    x: np.ndarray,
    Z: np.ndarray,
    W: np.ndarray,
    cov: str,
    clusters: np.ndarray | None,
    df_absorbed: int,
) -> _ARParts:
    d, (yt, xt) = _design(
        Z, W, cov, clusters, df_absorbed, [(y, "y (dependent variable)"), (x, "x (endogenous)")]
    )
    if yt.shape[1] != 1 or xt.shape[1] != 1:
        raise EstimationError("the Anderson-Rubin functions take one y and one endogenous x")
    Q = orthonormal_basis(d.Z)
    # The AR statistic is invariant to a nonsingular recombination of the instruments.
    d = _Design(
        Z=Q,
        n=d.n,
        k=d.k,
        w=d.w,
        df_absorbed=d.df_absorbed,
        dof=d.dof,
        cov=d.cov,
        codes=d.codes,
        n_clusters=d.n_clusters,
    )
    return _ARParts(d=d, Q=Q, y=yt[:, 0], x=xt[:, 0])


def _ar_null(b0: float) -> str:
    return (
        f"beta = {b0:.6g}: the excluded instruments have no effect on y - {b0:.6g}*x "
        "given the exogenous regressors"
    )


def ar_test(
    y: np.ndarray,
    x: np.ndarray,
    Z: np.ndarray,
    W: np.ndarray,
    b0: float,
    cov: Covariance,
    clusters: np.ndarray | None = None,
    df_absorbed: int = 0,
) -> HypothesisTest:
    """Anderson-Rubin test of beta = b0 for one endogenous coefficient.

    Parameters
    ----------
    y : (n,) array
        Dependent variable.
    x : (n,) array
        The endogenous regressor.
    Z : (n, k) array
        Excluded instruments.
    W : (n, w) array
        Exogenous regressors; may be (n, 0).
    b0 : float
        Hypothesised coefficient.
    cov : {"homoskedastic", "robust", "cluster"}
        Covariance choice.
    clusters : (n,) array, optional
        Cluster labels for ``cov="cluster"``.
    df_absorbed : int, optional
        Fixed-effect parameters already absorbed.

    Returns
    -------
    HypothesisTest
        F-form statistic (Wald/k) and its p-value.

    Notes
    -----
    Regress :math:`y - b_0 x` on Z and W and test that the k coefficients of
    Z are zero, with the covariance and conventions of :func:`first_stage`.
    Homoskedastic: :math:`AR(b_0) = \\frac{e'P e/k}{e'M e/(n-k-w-d)}` with
    :math:`e = \\tilde y - b_0\\tilde x`, exactly F(k, n-k-w-d) under normal
    errors whatever the instruments' strength.
    """
    parts = _ar_parts(y, x, Z, W, cov, clusters, df_absorbed)
    return _wald(parts.d, parts.y - b0 * parts.x, parts.d.k, _ar_null(b0))


def _classify(intervals: list[tuple[float, float]]) -> SetKind:
    if not intervals:
        return "empty"
    if len(intervals) > 1:
        return "union"
    a, b = intervals[0]
    return "bounded" if math.isfinite(a) and math.isfinite(b) else "unbounded"


def _quadratic_set(a2: float, a1: float, a0: float, scale: float) -> list[tuple[float, float]]:
    """Solve a2 b^2 + a1 b + a0 <= 0 exactly; ``scale`` sets the zero tolerance."""
    inf = math.inf
    if abs(a2) <= 1e-14 * scale:
        if abs(a1) <= 1e-14 * scale:
            return [(-inf, inf)] if a0 <= 0 else []
        r = -a0 / a1
        return [(-inf, r)] if a1 > 0 else [(r, inf)]
    disc = a1 * a1 - 4 * a2 * a0
    if disc < 0:
        return [] if a2 > 0 else [(-inf, inf)]
    sq = math.sqrt(disc)
    q = -0.5 * (a1 + math.copysign(sq, a1))
    r1, r2 = (q / a2, a0 / q) if q != 0 else (0.0, 0.0)
    lo, hi = min(r1, r2), max(r1, r2)
    if a2 > 0:
        return [(lo, hi)]
    return [(-inf, lo), (hi, inf)]


def anderson_rubin_set(
    y: np.ndarray,
    x: np.ndarray,
    Z: np.ndarray,
    W: np.ndarray,
    cov: Covariance,
    clusters: np.ndarray | None = None,
    level: float = 0.95,
    df_absorbed: int = 0,
) -> ARSet:
    """Anderson-Rubin confidence set for one endogenous coefficient, solved exactly.

    Parameters
    ----------
    y : (n,) array
        Dependent variable.
    x : (n,) array
        The endogenous regressor.
    Z : (n, k) array
        Excluded instruments.
    W : (n, w) array
        Exogenous regressors; may be (n, 0).
    cov : {"homoskedastic", "robust", "cluster"}
        Covariance choice (as in :func:`ar_test`).
    clusters : (n,) array, optional
        Cluster labels for ``cov="cluster"``.
    level : float, optional
        Confidence level (default 0.95).
    df_absorbed : int, optional
        Fixed-effect parameters already absorbed.

    Returns
    -------
    ARSet
        The set :math:`\\{b: AR(b) \\le c\\}`, c the upper ``1 - level`` quantile
        of the reference distribution; endpoints have p-value ``1 - level``.

    Notes
    -----
    Homoskedastic: with :math:`e(b) = \\tilde y - b\\tilde x`, P the projection on
    :math:`\\tilde Z`, M = I - P and :math:`\\kappa = c\\,k/(n-k-w-d)`, the set is
    :math:`e(b)'(P - \\kappa M)e(b) \\le 0`, the quadratic inequality
    :math:`a_2 b^2 + a_1 b + a_0 \\le 0` with
    :math:`a_2 = \\tilde x'(P-\\kappa M)\\tilde x`,
    :math:`a_1 = -2\\tilde x'(P-\\kappa M)\\tilde y`,
    :math:`a_0 = \\tilde y'(P-\\kappa M)\\tilde y`.
    :math:`a_2 > 0` (first-stage F above c) gives a bounded interval or the
    empty set; :math:`a_2 < 0` gives two rays or the whole line.

    Robust/cluster: with :math:`g(b) = \\tilde Z'e(b)` (linear in b) and
    :math:`\\hat\\Omega(b)` the scaled meat built from the residuals
    :math:`M e(b)` (quadratic in b), :math:`AR(b) = g'\\hat\\Omega^{-1}g/k`.  For
    :math:`\\hat\\Omega \\succ 0`,

    .. math:: \\det\\big(\\hat\\Omega(b) - g(b)g(b)'/(ck)\\big)
              = \\det\\hat\\Omega(b)\\,\\big(1 - AR(b)/c\\big),

    so the endpoints are real roots of the determinant of a matrix quadratic
    in b (degree at most 2k).  They are found exactly as the real eigenvalues
    of its companion linearisation (a quadratic eigenvalue problem), each
    interval between consecutive roots is classified by evaluating AR at its
    midpoint, and each endpoint is polished with ``brentq`` on
    :math:`AR(b) - c`.  The set can be a union of several intervals.

    In both cases :math:`AR(b) \\to` the first-stage F (same covariance) as
    :math:`b \\to \\pm\\infty`: the set is unbounded exactly when that F is below c.
    """
    if not 0 < level < 1:
        raise EstimationError(f"level must be strictly between 0 and 1, got {level}")
    parts = _ar_parts(y, x, Z, W, cov, clusters, df_absorbed)
    d, Q, yt, xt = parts.d, parts.Q, parts.y, parts.x
    k = d.k
    df = _ref_df(d, k)
    c = float(stats.f.isf(1 - level, *df))
    dist = f"F({df[0]}, {df[1]})"
    fs = _wald(d, xt, k, "first stage").stat
    gy, gx = Q.T @ yt, Q.T @ xt
    ry, rx = yt - Q @ gy, xt - Q @ gx
    if d.cov == "homoskedastic":
        kappa = c * k / d.dof
        dxx = gx @ gx - kappa * (rx @ rx)
        dxy = gx @ gy - kappa * (rx @ ry)
        dyy = gy @ gy - kappa * (ry @ ry)
        scale = max(abs(gx @ gx) + kappa * (rx @ rx), abs(gy @ gy) + kappa * (ry @ ry), 1e-300)
        intervals = _quadratic_set(float(dxx), float(-2 * dxy), float(dyy), float(scale))
        method = "exact: closed-form roots of a quadratic inequality"
    else:
        intervals = _robust_set(d, gy, gx, ry, rx, c)
        method = (
            "exact: real roots of det(Omega(b) - g(b)g(b)'/(c k)) from the companion "
            "linearisation of the quadratic eigenvalue problem, intervals classified at "
            "midpoints, endpoints polished with brentq"
        )
    return ARSet(
        intervals=tuple((float(a), float(b)) for a, b in intervals),
        kind=_classify(intervals),
        level=level,
        cov=cov,
        critical_value=c,
        distribution=dist,
        first_stage_f=float(fs),
        method=method,
        convention=_CONVENTIONS[cov],
    )


def _robust_set(
    d: _Design, gy: np.ndarray, gx: np.ndarray, ry: np.ndarray, rx: np.ndarray, c: float
) -> list[tuple[float, float]]:
    """AR set under robust or cluster covariance (Z orthonormal, inputs partialled)."""
    k = d.k
    t = c * k
    # Rescale y and x to unit norm for conditioning; b = b_s * sy / sx.
    sy = float(np.sqrt(gy @ gy + ry @ ry)) or 1.0
    sx = float(np.sqrt(gx @ gx + rx @ rx)) or 1.0
    gy_s, ry_s, gx_s, rx_s = gy / sy, ry / sy, gx / sx, rx / sx
    fac = _scale(d)
    Sy, Sx = _scores(d, ry_s), _scores(d, rx_s)
    Oyy, Oxy, Oxx = fac * Sy.T @ Sy, fac * Sx.T @ Sy, fac * Sx.T @ Sx
    # A(b) = A0 + b A1 + b^2 A2 = Omega(b) - g(b) g(b)'/t, with e = y - b x.
    A0 = Oyy - np.outer(gy_s, gy_s) / t
    A1 = -(Oxy + Oxy.T) + (np.outer(gx_s, gy_s) + np.outer(gy_s, gx_s)) / t
    A2 = Oxx - np.outer(gx_s, gx_s) / t

    def stat(bs: float) -> float:
        g = gy_s - bs * gx_s
        om = Oyy - bs * (Oxy + Oxy.T) + bs * bs * Oxx
        try:
            return float(g @ np.linalg.solve(om, g)) / k
        except np.linalg.LinAlgError:  # singular variance at an isolated b
            return math.inf

    eye, zero = np.eye(k), np.zeros((k, k))
    lhs = np.block([[zero, eye], [-A0, -A1]])
    rhs = np.block([[eye, zero], [zero, A2]])
    vals = sla.eigvals(lhs, rhs)
    fin = vals[np.isfinite(vals)]
    real = np.sort(fin.real[np.abs(fin.imag) <= 1e-8 * (1 + np.abs(fin))])
    roots: list[float] = []
    for r in real:
        if not roots or r - roots[-1] > 1e-12 * (1 + abs(r)):
            roots.append(float(r))
    # Polish each root on AR(b) - c where it changes sign nearby.
    polished = []
    for r in roots:
        h = 1e-6 * (1 + abs(r))
        fa, fb = stat(r - h) - c, stat(r + h) - c
        polished.append(
            optimize.brentq(lambda b: stat(b) - c, r - h, r + h, xtol=1e-14) if fa * fb < 0 else r
        )
    inf = math.inf
    edges = [-inf, *polished, inf]
    pieces: list[tuple[float, float]] = []
    for lo, hi in itertools.pairwise(edges):
        if math.isinf(lo) and math.isinf(hi):
            probe = 0.0
        elif math.isinf(lo):
            probe = hi - 1.0 - abs(hi)
        elif math.isinf(hi):
            probe = lo + 1.0 + abs(lo)
        else:
            probe = 0.5 * (lo + hi)
        if stat(probe) <= c:
            if pieces and pieces[-1][1] == lo:
                pieces[-1] = (pieces[-1][0], hi)
            else:
                pieces.append((lo, hi))
    ratio = sy / sx
    return [(a * ratio, b * ratio) for a, b in pieces]
