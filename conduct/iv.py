"""Linear IV estimation: the one place that calls linearmodels.

:func:`fit_iv` runs 2SLS, LIML or efficient two-step GMM through linearmodels
on data whose fixed effects were already absorbed, corrects the small-sample
factor for the absorbed parameters, and returns an :class:`IVFit` with the
per-observation influence function that the sequential (stacked-moment)
variance of the supply stage needs.

Small-sample conventions (stated in every fit's ``convention``):

* homoskedastic: ``s2 = e'e / (n - k - a)``;
* robust (HC1): ``n / (n - k - a)`` times the HC0 sandwich;
* cluster: ``G/(G-1) * (n-1)/(n-k-a)`` times the cluster sandwich, where ``a``
  counts only absorbed effects *not* nested in the clusters (market effects
  are nested in market clusters and are not counted);
* hac: Bartlett kernel (Newey-West) with ``n / (n - k - a)``.

``k`` counts the estimated coefficients and ``a`` the absorbed fixed-effect
parameters (including the intercept they absorb).
"""

from __future__ import annotations

import threading
import warnings
import weakref
from dataclasses import dataclass, replace
from typing import Any, Literal

import numpy as np
from linearmodels.iv import IV2SLS, IVGMM, IVLIML
from scipy import stats

from conduct.absorb import dense_codes
from conduct.errors import EstimationError

__all__ = [
    "CovSpec", "IVFit", "Projection", "check_design", "checked_design", "cluster_cov",
    "fit_2sls_arrays", "fit_iv", "hansen_j", "influence_2sls",
]

CovType = Literal["homoskedastic", "robust", "cluster", "hac"]
_LM_COV = {"homoskedastic": "unadjusted", "robust": "robust", "cluster": "clustered",
           "hac": "kernel"}


@dataclass(frozen=True, slots=True)
class CovSpec:
    """How to compute a covariance.

    Attributes
    ----------
    kind : {'homoskedastic', 'robust', 'cluster', 'hac'}
    clusters : numpy.ndarray or None
        (n,) integer cluster codes, required for ``cluster``.
    hac_lags : int or None
        Bartlett bandwidth for ``hac``; None picks ``floor(4 (n/100)^(2/9))``.
    df_penalty : int
        Absorbed parameters counted in the small-sample factor.
    clusters2 : numpy.ndarray or None
        (n,) second cluster dimension for two-way clustering (Cameron, Gelbach &
        Miller 2011): ``V = V_1 + V_2 - V_12``, each with its own G/(G-1) factor.
    """

    kind: CovType
    clusters: np.ndarray | None = None
    hac_lags: int | None = None
    df_penalty: int = 0
    clusters2: np.ndarray | None = None

    def cluster_terms(self) -> list[tuple[np.ndarray, float]]:
        """(codes, sign) of each clustering whose sandwich enters the covariance."""
        if self.clusters is None:
            raise ValueError("cluster covariance needs clusters")
        c1 = cluster_ids(self.clusters)
        if self.clusters2 is None:
            return [(c1, 1.0)]
        c2 = cluster_ids(self.clusters2)
        both = dense_codes(c1 * (int(c2.max()) + 1) + c2)
        return [(c1, 1.0), (c2, 1.0), (both, -1.0)]

    def n_clusters(self) -> int:
        """Smallest number of clusters over the cluster dimensions."""
        return min(int(c.max()) + 1 for c, sign in self.cluster_terms() if sign > 0)

    def lags(self, n: int) -> int:
        """Bartlett bandwidth used for ``n`` observations."""
        if self.hac_lags is not None:
            return self.hac_lags
        return int(np.floor(4 * (n / 100.0) ** (2.0 / 9.0)))


@dataclass(frozen=True, slots=True)
class IVFit:
    """A fitted linear IV regression.

    Attributes
    ----------
    names : tuple of str
        Regressor names, exogenous first then endogenous (length k).
    params : numpy.ndarray
        (k,) estimates.
    cov : numpy.ndarray
        (k, k) covariance under ``cov_spec`` with the stated convention.
    resid : numpy.ndarray
        (n,) structural residuals.
    influence : numpy.ndarray
        (n, k) per-observation influence ``psi_i`` with ``b - beta ~ mean(psi_i)``:
        ``psi_i = (G'WG)^{-1} G'W z_i e_i`` with ``G = Z'X/n``.
    nobs : int
    k : int
        Number of estimated coefficients.
    estimator : str
    cov_spec : CovSpec
    convention : str
        Plain statement of the small-sample convention.
    j_stat, j_p : float or None
        Hansen's J statistic (from two-step efficient GMM with the same covariance
        choice) and its p-value, when over-identified.
    j_df : int
        Degrees of freedom of J (instruments minus endogenous regressors).
    j_convention : str
        Which form of the over-identification statistic ``j_stat`` is.
    z_condition : float
        Condition number of the (column-scaled) instrument matrix ``[exog, excluded]``.
    kappa : float
        k-class parameter (1 for 2SLS, the LIML eigenvalue for LIML).
    """

    names: tuple[str, ...]
    params: np.ndarray
    cov: np.ndarray
    resid: np.ndarray
    influence: np.ndarray
    nobs: int
    k: int
    estimator: str
    cov_spec: CovSpec
    convention: str
    j_stat: float | None
    j_p: float | None
    j_df: int
    kappa: float
    j_convention: str = ""
    z_condition: float = 1.0

    @property
    def se(self) -> np.ndarray:
        """Standard errors, (k,)."""
        return np.sqrt(np.clip(np.diag(self.cov), 0.0, None))

    def coef(self, name: str) -> float:
        """Estimate of one named coefficient."""
        return float(self.params[self.names.index(name)])


_ESTIMATOR_NOTE = {
    "2sls": "",
    "liml": "; LIML bread (X'(I - kappa M_Z)X)^-1 with the meat from the 2SLS-form "
            "fitted values",
    "gmm": "; two-step efficient GMM, moment covariance at the second-step residuals",
}


def _j_convention(cov: CovSpec) -> str:
    if cov.kind == "homoskedastic":
        return "Sargan n R^2 form (homoskedastic weight), chi-square"
    return ("Hansen J at two-step GMM with the first-step (2SLS-residual) "
            f"{cov.kind} weight, chi-square")


def convention_text(cov: CovSpec, n: int, k: int, estimator: str = "2sls") -> str:
    """Describe the small-sample convention of a covariance choice."""
    return _convention_core(cov, n, k) + _ESTIMATOR_NOTE.get(estimator, "")


def _convention_core(cov: CovSpec, n: int, k: int) -> str:
    a = cov.df_penalty
    dof = f"n-k-a = {n}-{k}-{a}"
    if cov.kind == "homoskedastic":
        return f"homoskedastic, s2 = e'e/({dof})"
    if cov.kind == "robust":
        return f"heteroskedasticity-robust HC1: n/({dof}) x HC0"
    if cov.kind == "cluster":
        if cov.clusters2 is not None:
            gs = [int(c.max()) + 1 for c, _ in cov.cluster_terms()]
            return (f"two-way cluster-robust ({gs[0]} x {gs[1]} clusters; Cameron, Gelbach & "
                    f"Miller 2011): V1 + V2 - V12, each G/(G-1) x (n-1)/({dof}) x sandwich "
                    "(absorbed effects nested in clusters not counted)")
        g = int(cluster_ids(cov.clusters).max()) + 1 if cov.clusters is not None else 0
        return (f"cluster-robust, {g} clusters: G/(G-1) x (n-1)/({dof}) x sandwich "
                "(absorbed effects nested in clusters not counted)")
    return f"Newey-West (Bartlett, {cov.lags(n)} lags): n/({dof}) x HAC"


GRAM_COND = 1e6  # scaled cross-product condition up to which normal equations are used


def ls_coef(a: np.ndarray, b: np.ndarray, max_cond: float = GRAM_COND) -> np.ndarray:
    """Least-squares coefficients of ``b`` on the columns of ``a``.

    Solved from the normal equations of the column-scaled design (one pass over
    the rows) when that is well conditioned, else by :func:`numpy.linalg.lstsq`
    (the minimum-norm solution; fitted values and residuals are the projection
    either way).  Tests keep both routes equal to ``lstsq``.

    Parameters
    ----------
    a : numpy.ndarray
        (n, k) regressors.
    b : numpy.ndarray
        (n,) or (n, m) left-hand sides.
    max_cond : float
        Largest condition number of the scaled cross-product matrix solved
        directly (its rounding error in the coefficients is about
        ``max_cond * 1e-16`` relative).

    Returns
    -------
    numpy.ndarray
        (k,) or (k, m) coefficients.
    """
    if a.shape[1] == 0:
        return np.zeros((0, *b.shape[1:]))
    scaled = _scaled_gram(a, max_cond)
    if scaled is not None:
        gram, scale = scaled
        s = scale[:, None] if b.ndim == 2 else scale
        return np.linalg.solve(gram, (a.T @ b) / s) / s
    return np.linalg.lstsq(a, b, rcond=None)[0]


def _scaled_gram(a: np.ndarray, max_cond: float) -> tuple[np.ndarray, np.ndarray] | None:
    """``(a'a / outer(s, s), s)`` with ``s`` the column norms, when its condition is below
    ``max_cond``; None when it is not (or a column is zero or not finite)."""
    raw = a.T @ a
    scale = np.sqrt(np.diag(raw))
    if not (np.all(scale > 0) and np.all(np.isfinite(scale))):
        return None
    gram = raw / np.outer(scale, scale)
    vals = np.linalg.eigvalsh(gram)
    return (gram, scale) if vals[0] > 0 and vals[-1] / vals[0] < max_cond else None


R_GRAM_COND = 1e8  # scaled cross-product condition up to which R comes from its Cholesky factor


def r_factor(a: np.ndarray) -> np.ndarray:
    """The R factor of a thin QR of ``a``, with a non-negative diagonal.

    For a well-conditioned ``a`` (scaled cross-product condition below
    ``R_GRAM_COND``, i.e. condition of ``a`` below 1e4 after scaling) R is the
    Cholesky factor of ``a'a``, which is the QR's R with a positive diagonal
    (one pass over the rows instead of Householder reflections); otherwise it
    comes from :func:`numpy.linalg.qr`, with the signs of its rows made to
    agree.  Tests keep both routes equal.

    Parameters
    ----------
    a : numpy.ndarray
        (n, k) with n >= k.

    Returns
    -------
    numpy.ndarray
        (k, k) upper triangular.
    """
    if a.shape[1] == 0:
        return np.zeros((0, 0))
    scaled = _scaled_gram(a, R_GRAM_COND)
    if scaled is not None:
        gram, scale = scaled
        return np.linalg.cholesky(gram).T * scale
    r = np.linalg.qr(a, mode="r")
    return r * np.where(np.diag(r) < 0, -1.0, 1.0)[:, None]


def orthonormal_basis(a: np.ndarray, r: np.ndarray | None = None) -> np.ndarray:
    """An (n, k) matrix with orthonormal columns spanning the full-rank ``a``.

    ``a R^-1`` with R from :func:`r_factor` when ``a`` has condition below 1e3
    after scaling its columns (loss of orthogonality about ``1e-16 cond^2``), else
    the Q of :func:`numpy.linalg.qr` (the same basis up to column signs).  ``r``
    may pass ``r_factor(a)`` when already computed.
    """
    if a.shape[1] == 0:
        return np.zeros((a.shape[0], 0))
    if r is None:
        r = r_factor(a)
    if _r_condition(r) < 1e3:
        return a @ np.linalg.inv(r)
    return np.linalg.qr(a)[0]


def add_rows(target: np.ndarray, rows: np.ndarray, values: np.ndarray) -> np.ndarray:
    """``target[rows] += values`` in place, without fancy indexing when ``rows`` is every row.

    ``rows`` are increasing positions (from ``np.flatnonzero``), so as many rows as
    ``target`` has means ``0..n-1`` in order.  Returns ``target``.
    """
    if len(rows) == len(target):
        target += values
    else:
        target[rows] += values
    return target


_RUNS: dict[int, tuple[weakref.ref[np.ndarray], int, np.ndarray | None]] = {}
_DENSE: dict[int, tuple[weakref.ref[np.ndarray]]] = {}
_CACHE_LOCK = threading.Lock()  # replicates may run on threads (e.g. Dask workers)


def _remember(cache: dict[int, Any], key: int, value: tuple[Any, ...]) -> None:
    """Store ``value`` (a tuple led by a weak reference) and forget entries whose array died."""
    with _CACHE_LOCK:
        for k in [k for k, v in cache.items() if v[0]() is None]:
            del cache[k]
        cache[key] = value


def cluster_ids(values: np.ndarray) -> np.ndarray:
    """``dense_codes(values)``, or ``values`` itself when already coded 0..G-1 and read-only.

    Stage cluster codes are read-only dense codes (:func:`conduct.design.cluster_codes`);
    recognising them (remembered per array) keeps them the same object, so that
    :func:`group_sums` can remember their runs too.
    """
    if isinstance(values, np.ndarray) and not values.flags.writeable and values.base is None \
            and values.dtype == np.int64:
        hit = _DENSE.get(id(values))
        if hit is not None and hit[0]() is values:
            return values
        coded = dense_codes(values)
        if np.array_equal(coded, values):
            _remember(_DENSE, id(values), (weakref.ref(values),))
            return values
        return coded
    return dense_codes(values)


def _runs(codes: np.ndarray) -> tuple[int, np.ndarray | None]:
    """Number of groups and, when rows are sorted by group, where each group's run starts.

    Remembered for read-only arrays (the cluster codes of a stage, made read-only
    when built), which cannot change under the cache.
    """
    key = id(codes)
    hit = _RUNS.get(key)
    if hit is not None and hit[0]() is codes:
        return hit[1], hit[2]
    g = int(codes.max()) + 1
    starts = None
    if len(codes) > 1 and np.all(codes[1:] >= codes[:-1]):  # rows sorted by group (panel order)
        starts = np.flatnonzero(np.r_[True, codes[1:] != codes[:-1]])
        if len(starts) != g:
            starts = None
    if not codes.flags.writeable and codes.base is None:
        _remember(_RUNS, key, (weakref.ref(codes), g, starts))
    return g, starts


def group_sums(codes: np.ndarray, a: np.ndarray) -> np.ndarray:
    """Column sums of ``a`` (n, p) within each code 0..G-1, as a (G, p) array."""
    g, starts = _runs(codes)
    if not a.shape[1]:
        return np.zeros((g, 0))
    if starts is not None:
        return np.add.reduceat(a, starts, axis=0)
    return np.column_stack([np.bincount(codes, weights=a[:, j], minlength=g)
                            for j in range(a.shape[1])])


def cluster_cov(psi: np.ndarray, cov: CovSpec, k: int) -> np.ndarray:
    """Covariance of ``mean(psi_i)`` under a covariance choice.

    Parameters
    ----------
    psi : numpy.ndarray
        (n, p) influence functions.
    cov : CovSpec
    k : int
        Number of estimated coefficients for the small-sample factor.

    Returns
    -------
    numpy.ndarray
        (p, p) covariance with the module's small-sample convention.
    """
    n = psi.shape[0]
    dof = n - k - cov.df_penalty
    if dof <= 0:
        raise EstimationError(f"No residual degrees of freedom (n = {n}, parameters {k}).")
    if cov.kind == "cluster":
        out = np.zeros((psi.shape[1], psi.shape[1]))
        for codes, sign in cov.cluster_terms():
            g = int(codes.max()) + 1
            sums = group_sums(codes, psi)
            out += sign * (g / (g - 1) * (n - 1) / dof) * (sums.T @ sums)
        if cov.clusters2 is not None:
            # V1 + V2 - V12 need not be positive semi-definite; clip negative eigenvalues
            # to zero (Cameron, Gelbach & Miller 2011, sec. 2.3)
            vals, vecs = np.linalg.eigh((out + out.T) / 2)
            out = (vecs * np.clip(vals, 0.0, None)) @ vecs.T
        return out / n**2
    elif cov.kind == "hac":
        meat = psi.T @ psi
        for lag in range(1, cov.lags(n) + 1):
            w = 1.0 - lag / (cov.lags(n) + 1.0)
            g = psi[lag:].T @ psi[:-lag]
            meat += w * (g + g.T)
        factor = n / dof
    else:
        meat = psi.T @ psi
        factor = n / dof
    return factor * meat / n**2


def influence_2sls(x: np.ndarray, z: np.ndarray, e: np.ndarray,
                   weight: np.ndarray | None = None) -> np.ndarray:
    """Per-observation influence of a linear GMM/2SLS estimator.

    Parameters
    ----------
    x : numpy.ndarray
        (n, k) regressors.
    z : numpy.ndarray
        (n, m) instruments (all exogenous columns included).
    e : numpy.ndarray
        (n,) residuals.
    weight : numpy.ndarray or None
        (m, m) GMM weight; None means ``(Z'Z/n)^{-1}`` (2SLS).

    Returns
    -------
    numpy.ndarray
        (n, k) array ``psi_i = (G'WG)^{-1} G'W z_i e_i`` with ``G = Z'X/n``.
    """
    n = x.shape[0]
    g = z.T @ x / n
    w = np.linalg.inv(z.T @ z / n) if weight is None else weight
    a = np.linalg.solve(g.T @ w @ g, g.T @ w)
    return (z * e[:, None]) @ a.T


def _lm_kwargs(cov: CovSpec, n: int) -> dict[str, object]:
    if cov.kind == "cluster":
        if cov.clusters2 is not None:
            return {"clusters": np.column_stack([cov.clusters, cov.clusters2])}
        return {"clusters": cov.clusters}
    if cov.kind == "hac":
        return {"kernel": "bartlett", "bandwidth": cov.lags(n)}
    return {}


def fit_iv(
    y: np.ndarray,
    exog: np.ndarray,
    endog: np.ndarray,
    instruments: np.ndarray,
    names: tuple[str, ...],
    *,
    estimator: Literal["2sls", "liml", "gmm"] = "2sls",
    cov: CovSpec,
    overid: bool = True,
    instrument_names: tuple[str, ...] | None = None,
    checked: bool = False,
    projection: Projection | None = None,
) -> IVFit:
    """Fit a linear IV regression through linearmodels (or the equal array path).

    2SLS without Hansen's J under homoskedastic, robust or cluster covariance
    runs on arrays (:func:`fit_2sls_arrays`), which tests keep equal to
    linearmodels to rounding; everything else goes through linearmodels.

    Parameters
    ----------
    y : numpy.ndarray
        (n,) dependent variable (already demeaned if effects were absorbed).
    exog : numpy.ndarray
        (n, kx) included exogenous regressors (a constant column if no effects).
    endog : numpy.ndarray
        (n, ke) endogenous regressors.
    instruments : numpy.ndarray
        (n, kz) excluded instruments, kz >= ke.
    names : tuple of str
        Names of the exog then endog columns.
    estimator : {'2sls', 'liml', 'gmm'}
    cov : CovSpec
    overid : bool
        Compute Hansen's J when over-identified (False skips it, e.g. in bootstrap
        replicates).
    instrument_names : tuple of str or None
        Names of the excluded instruments, for messages.
    checked : bool
        The design was already checked by :func:`check_design` (skip the check).
    projection : Projection or None
        The design's first stage when already computed (2SLS without HAC only).

    Returns
    -------
    IVFit

    Raises
    ------
    EstimationError
        Under-identification, collinear designs or too few observations.
    """
    n = len(y)
    kx, ke, kz = exog.shape[1], endog.shape[1], instruments.shape[1]
    k = kx + ke
    if kz < ke:
        raise EstimationError(
            f"{kz} excluded instrument(s) for {ke} endogenous regressor(s): the equation "
            "is under-identified; add instruments."
        )
    if n - k - cov.df_penalty <= 0:
        raise EstimationError(f"Too few observations ({n}) for {k} coefficients plus "
                              f"{cov.df_penalty} absorbed effects.")
    if projection is not None:
        x, z, z_cond = projection.x, projection.z, projection.z_condition
    elif checked:
        x, z, z_cond = np.column_stack([exog, endog]), np.column_stack([exog, instruments]), 1.0
    else:
        x, z, z_cond = checked_design(exog, endog, instruments, names, instrument_names)
    if estimator == "2sls" and cov.kind != "hac":
        proj = projection if projection is not None else Projection(x, z)
        fit = replace(proj.fit(y, names, cov, j_df=kz - ke), z_condition=z_cond)
        if overid and kz > ke and _enough_clusters(cov, kx + kz) and cov.clusters2 is None:
            j = hansen_j(y, x, z, cov, resid=fit.resid)
            fit = replace(fit, j_stat=j, j_p=float(stats.chi2.sf(j, kz - ke)),
                          j_convention=_j_convention(cov))
        return fit
    lm_cov = _LM_COV[cov.kind]
    kwargs = _lm_kwargs(cov, n)
    model_cls = {"2sls": IV2SLS, "liml": IVLIML}.get(estimator)
    ex = exog if kx else None
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        if model_cls is not None:
            res = model_cls(y, ex, endog, instruments).fit(cov_type=lm_cov, debiased=True,
                                                           **kwargs)
            weight = None
        else:
            res = _fit_gmm(y, ex, endog, instruments, cov, lm_cov, kwargs)
            weight = np.asarray(res.weight_matrix)
        params = np.asarray(res.params, dtype=float)
        lm_cov_mat = np.asarray(res.cov, dtype=float)
        kappa = float(getattr(res, "kappa", 1.0) or 1.0)
        j_stat = j_p = None
        if kz > ke and overid and _enough_clusters(cov, kx + kz) and cov.clusters2 is None:
            gmm = res if estimator == "gmm" else _fit_gmm(y, ex, endog, instruments, cov,
                                                          lm_cov, kwargs)
            j_stat, j_p = float(gmm.j_stat.stat), float(gmm.j_stat.pval)
    resid = y - x @ params
    factor = 1.0
    base = n - k
    if cov.df_penalty:
        factor = base / (base - cov.df_penalty)
    covm = lm_cov_mat * factor
    psi = influence_2sls(x, z, resid, weight)
    if cov.clusters2 is not None and estimator == "2sls":
        covm = cluster_cov(psi, cov, k)  # same sandwich, with negative eigenvalues clipped
    return IVFit(
        names=tuple(names),
        params=params,
        cov=covm,
        resid=resid,
        influence=psi,
        nobs=n,
        k=k,
        estimator=estimator,
        cov_spec=cov,
        convention=convention_text(cov, n, k, estimator),
        j_stat=j_stat,
        j_p=j_p,
        j_df=kz - ke,
        kappa=kappa,
        j_convention=_j_convention(cov) if j_stat is not None else "",
        z_condition=z_cond,
    )


def hansen_j(y: np.ndarray, x: np.ndarray, z: np.ndarray, cov: CovSpec,
             resid: np.ndarray | None = None) -> float:
    """Hansen's J at two-step efficient GMM, as linearmodels ``IVGMM`` computes it.

    Parameters
    ----------
    y, x, z : numpy.ndarray
        (n,), (n, k) regressors and (n, m) instruments (exogenous columns in both).
    cov : CovSpec
        Homoskedastic (Sargan form), robust or one-way cluster weight.
    resid : numpy.ndarray or None
        The 2SLS residuals of ``y`` on ``x`` with instruments ``z`` when already
        known (they are recomputed otherwise).

    Returns
    -------
    float

    Notes
    -----
    With 2SLS residuals ``e1``, ``S`` is ``(e1'e1/n) Z'Z/n`` (homoskedastic),
    ``sum z_i z_i' e1_i^2 / n`` (robust) or ``sum_g s_g s_g' / n`` with cluster sums
    ``s_g`` (cluster); ``W = S^-1``; the two-step estimate solves
    ``G'W g(b) = 0`` with ``G = Z'X/n``; ``J = n g(b)' W g(b)``.  Tests keep it equal to
    linearmodels 7.1 ``IVGMM(...).j_stat``.
    """
    n = len(y)
    if resid is None:
        q, _ = np.linalg.qr(z)
        xhat = q @ (q.T @ x)
        resid = y - x @ np.linalg.solve(xhat.T @ x, xhat.T @ y)
    e1 = resid
    ze = z * e1[:, None]
    if cov.kind == "homoskedastic":
        s_mat = (e1 @ e1 / n) * (z.T @ z / n)
    elif cov.kind == "cluster":
        assert cov.clusters is not None
        sums = group_sums(cluster_ids(cov.clusters), ze)
        s_mat = sums.T @ sums / n
    else:
        s_mat = ze.T @ ze / n
    w = np.linalg.inv(s_mat)
    g = z.T @ x / n
    b2 = np.linalg.solve(g.T @ w @ g, g.T @ w @ (z.T @ y / n))
    gbar = z.T @ (y - x @ b2) / n
    return float(n * gbar @ w @ gbar)


class Projection:
    """The first stage of 2SLS for fixed regressors and instruments, computed once.

    ``X_hat = P_Z X`` (see :func:`ls_coef`) and ``(X_hat'X_hat)^-1`` are
    shared by every dependent variable fitted on the same design (the supply
    relation and each candidate's restricted relation).

    Parameters
    ----------
    x : numpy.ndarray
        (n, k) regressors ``[exog, endog]``.
    z : numpy.ndarray
        (n, m) instruments ``[exog, excluded]``.
    z_condition : float
        Scaled condition number of ``z`` (from :func:`checked_design`), passed on
        to the fits.
    """

    def __init__(self, x: np.ndarray, z: np.ndarray, z_condition: float = 1.0) -> None:
        self.x, self.z, self.z_condition = x, z, z_condition
        # X_hat = Z (Z'Z)^-1 Z'X; from the cross-products when Z is well conditioned
        # (rounding about 1e-10 relative), else by lstsq
        self.xhat = z @ ls_coef(z, x, max_cond=1e6)
        self.bread = np.linalg.inv(self.xhat.T @ self.xhat)

    def fit(self, y: np.ndarray, names: tuple[str, ...], cov: CovSpec, j_df: int = 0
            ) -> IVFit:
        """2SLS of ``y`` on the design; see :func:`fit_2sls_arrays`."""
        x, xhat, bread = self.x, self.xhat, self.bread
        n, k = x.shape
        b = bread @ (xhat.T @ y)
        e = y - x @ b
        psi = n * (xhat * e[:, None]) @ bread
        if cov.kind == "homoskedastic":
            dof = n - k - cov.df_penalty
            covm = (e @ e / dof) * bread
        else:
            covm = cluster_cov(psi, cov, k)
        return IVFit(
            names=tuple(names), params=b, cov=covm, resid=e, influence=psi, nobs=n, k=k,
            estimator="2sls", cov_spec=cov, convention=convention_text(cov, n, k, "2sls"),
            j_stat=None, j_p=None, j_df=j_df, kappa=1.0,
        )


def fit_2sls_arrays(y: np.ndarray, x: np.ndarray, z: np.ndarray, names: tuple[str, ...],
                    cov: CovSpec, j_df: int = 0) -> IVFit:
    """Two-stage least squares on arrays, in the conventions of :func:`fit_iv`.

    Parameters
    ----------
    y : numpy.ndarray
        (n,) dependent variable.
    x : numpy.ndarray
        (n, k) regressors ``[exog, endog]``.
    z : numpy.ndarray
        (n, m) instruments ``[exog, excluded]``.
    names : tuple of str
    cov : CovSpec
        Homoskedastic, robust or cluster.
    j_df : int
        Over-identification degrees of freedom (J itself is not computed).

    Returns
    -------
    IVFit

    Notes
    -----
    With ``X_hat = P_Z X`` (see :class:`Projection`), ``b = (X_hat'X)^-1 X_hat'y``
    and the influence is ``psi_i = n (X_hat'X_hat)^-1 X_hat_i e_i``; the covariance is
    ``s2 (X_hat'X_hat)^-1`` (homoskedastic) or :func:`cluster_cov` of ``psi``.
    """
    return Projection(x, z).fit(y, names, cov, j_df)


def _enough_clusters(cov: CovSpec, moments: int) -> bool:
    if cov.kind != "cluster" or cov.clusters is None:
        return True
    return cov.n_clusters() > moments


def _fit_gmm(y: np.ndarray, ex: np.ndarray | None, endog: np.ndarray, instr: np.ndarray,
             cov: CovSpec, lm_cov: str, kwargs: dict[str, object]) -> Any:
    moments = (0 if ex is None else ex.shape[1]) + instr.shape[1]
    if cov.clusters2 is not None:
        raise EstimationError(
            "Efficient GMM with a two-way clustered weight matrix is not available; use "
            "estimator = \"2sls\" or \"liml\" with two-way clustered errors."
        )
    if not _enough_clusters(cov, moments):
        g = cov.n_clusters() if cov.clusters is not None else 0
        raise EstimationError(
            f"Efficient GMM with cluster-robust weights needs more clusters ({g}) than "
            f"moment conditions ({moments}); use estimator = \"2sls\" or fewer instruments."
        )
    return _gmm(y, ex, endog, instr, cov).fit(cov_type=lm_cov, debiased=True, **kwargs)


def _gmm(y: np.ndarray, ex: np.ndarray | None, endog: np.ndarray, instr: np.ndarray,
         cov: CovSpec) -> IVGMM:
    if cov.kind == "cluster":
        return IVGMM(y, ex, endog, instr, weight_type="clustered", clusters=cov.clusters)
    if cov.kind == "hac":
        return IVGMM(y, ex, endog, instr, weight_type="kernel", kernel="bartlett",
                     bandwidth=cov.lags(len(y)))
    if cov.kind == "homoskedastic":
        return IVGMM(y, ex, endog, instr, weight_type="unadjusted")
    return IVGMM(y, ex, endog, instr, weight_type="robust")


def check_design(exog: np.ndarray, endog: np.ndarray, instruments: np.ndarray,
                 names: tuple[str, ...], instrument_names: tuple[str, ...] | None = None
                 ) -> tuple[np.ndarray, np.ndarray]:
    """Refuse regressors or instruments without variation or with collinear columns.

    Parameters
    ----------
    exog, endog, instruments : numpy.ndarray
        (n, kx), (n, ke), (n, kz) design blocks.
    names : tuple of str
        Names of the exog then endog columns.
    instrument_names : tuple of str or None
        Names of the excluded instruments.

    Returns
    -------
    (numpy.ndarray, numpy.ndarray)
        The regressor matrix ``[exog, endog]`` and instrument matrix ``[exog, instruments]``.

    Raises
    ------
    EstimationError
        Naming the column that has no variation, or the set that is collinear.
    """
    x, z, _ = checked_design(exog, endog, instruments, names, instrument_names)
    return x, z


def checked_design(exog: np.ndarray, endog: np.ndarray, instruments: np.ndarray,
                    names: tuple[str, ...], instrument_names: tuple[str, ...] | None
                    ) -> tuple[np.ndarray, np.ndarray, float]:
    """:func:`check_design` that also returns the scaled condition number of ``z``.

    Parameters and errors as for :func:`check_design`.

    Returns
    -------
    (numpy.ndarray, numpy.ndarray, float)
    """
    kx, kz = exog.shape[1], instruments.shape[1]
    x = np.column_stack([exog, endog])
    z = np.column_stack([exog, instruments])
    _check_rank(x, names, "regressors")
    inames = instrument_names or tuple(f"instrument {i + 1}" for i in range(kz))
    z_cond = _check_rank(z, names[:kx] + tuple(inames), "instruments")
    return x, z, z_cond


def condition_number(a: np.ndarray) -> float:
    """Condition number of ``a`` after scaling each column to unit root-mean-square.

    The singular values come from the QR factor R (those of the (n, k) matrix, at
    O(n k^2) cost; see :func:`r_factor`); scaling the columns of ``a`` scales those
    of R (a D^-1 = Q R D^-1), and R's column norms are those of ``a``.
    """
    if a.shape[1] == 0:
        return 1.0
    return _r_condition(r_factor(a))


def _r_condition(r: np.ndarray) -> float:
    scale = np.sqrt(np.sum(r * r, axis=0))
    sv = np.linalg.svd(r / np.where(scale > 0, scale, 1.0), compute_uv=False)
    return float(sv[0] / sv[-1]) if sv[-1] > 0 else float("inf")


def _check_rank(a: np.ndarray, names: tuple[str, ...], what: str) -> float:
    """Refuse a column without variation or collinear columns; return the condition number."""
    if a.shape[1] == 0:
        return 1.0
    r = r_factor(a)
    scale = np.sqrt(np.sum(r * r, axis=0) / a.shape[0])  # root-mean-square of each column
    zero = np.flatnonzero(scale < 1e-12 * max(1.0, float(scale.max())))
    if len(zero):
        label = names[zero[0]] if zero[0] < len(names) else f"column {zero[0] + 1}"
        raise EstimationError(
            f"The {what} include '{label}', which has no variation left after the fixed "
            "effects are removed; drop it or change the effects."
        )
    cond = _r_condition(r)
    if cond > 1e10:
        raise EstimationError(
            f"The {what} are collinear (condition number {cond:.3g} after scaling): "
            f"one of {', '.join(names)} is a combination of the others. Drop one."
        )
    return cond
