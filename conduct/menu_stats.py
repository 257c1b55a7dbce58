"""Array maths of the Rivers-Vuong menu test: lack of fit, its influence, the pair statistic.

Everything here works on arrays whose fixed effects and cost shifters were
already partialled out (see :mod:`conduct.menu`, which builds them).  For one
candidate model m with residual implied cost ``e_m = p - Delta_m`` and
instruments ``z`` (n rows), the lack of fit is the GMM objective

    g_m = Z' e_m / n,   W = (Z'Z/n)^{-1},   Q_m = g_m' W g_m,

and the Rivers-Vuong statistic of a pair is ``T = sqrt(n) (Q_1 - Q_2) / sigma``
(Rivers & Vuong 2002; in the form of Duarte, Magnolfi, Solvsten & Sullivan,
"Testing Firm Conduct", Quantitative Economics 2024).  The second half holds the
diagnostic of weak instruments for testing: the limit experiment of both
statistics under weak instruments, and the critical values simulated from it.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from conduct.errors import EstimationError
from conduct.iv import CovSpec, add_rows, cluster_cov

__all__ = [
    "CRITICAL_VALUES",
    "POWER_TARGETS",
    "SIZE_TARGETS",
    "LackOfFit",
    "PairStats",
    "critical_values",
    "lack_of_fit",
    "limit_draws",
    "orthonormal",
    "pair_stats",
    "weak_bounds",
]

# Relative size below which a pair's variance counts as degenerate (identical markups).
_DEGENERATE = 1e-12


@dataclass(frozen=True, slots=True)
class LackOfFit:
    """One model's lack of fit and its influence functions.

    Attributes
    ----------
    q : float
        ``Q_m = g_m' W g_m``.
    g : numpy.ndarray
        (d,) moments in whitened coordinates, ``W^{1/2} g_m`` (so ``q = g'g``).
    psi : numpy.ndarray
        (n_all,) influence of ``Q_m``: ``Q_m - plim ~ mean(psi)`` over the demand sample.
    moment_psi : numpy.ndarray
        (n_all, d) influence of the whitened moments ``g`` (for the diagnostic).
    """

    q: float
    g: np.ndarray
    psi: np.ndarray
    moment_psi: np.ndarray


@dataclass(frozen=True, slots=True)
class PairStats:
    """The Rivers-Vuong statistic and the instrument-strength diagnostic of one pair.

    Attributes
    ----------
    t : float
        ``T = (Q_a - Q_b) / se``; negative favours model a.  NaN when degenerate.
    se : float
        Standard error of ``Q_a - Q_b`` (``sigma / sqrt(n)``).
    f : float
        The F-statistic for testing (see :func:`pair_stats`).
    rho : float
        Correlation of the two models' moments.
    ratio : float
        Ratio of the two models' moment standard deviations, ``s_b / s_a``.
    degenerate : bool
        True when the two models' moments coincide (same predicted markups).
    """

    t: float
    se: float
    f: float
    rho: float
    ratio: float
    degenerate: bool


def orthonormal(z: np.ndarray, *, what: str) -> np.ndarray:
    """Columns spanning ``z`` with ``Z'Z/n = I`` (a whitened instrument basis).

    Parameters
    ----------
    z : numpy.ndarray
        (n, d) instruments after partialling out.
    what : str
        How to name the instruments in errors.

    Returns
    -------
    numpy.ndarray
        (n, d) array spanning the columns of ``z`` with ``Z'Z/n = I`` (columns are
        scaled to unit mean square first, then whitened by the symmetric root).

    Raises
    ------
    EstimationError
        When the instruments are collinear or have no variation left.
    """
    n, d = z.shape
    sd = np.sqrt(np.mean(z**2, axis=0)) if d else np.zeros(0)
    top = float(sd.max()) if d else 0.0
    if d == 0 or np.any(sd <= 1e-12 * max(top, 1e-300)):
        raise EstimationError(
            f"The {what} include one with no variation left once the cost shifters and "
            "fixed effects are removed; drop it or choose other instruments."
        )
    zs = z / sd  # the same span, on a common scale
    vals, vecs = np.linalg.eigh(zs.T @ zs / n)
    if vals[0] <= 1e-10 * vals[-1]:
        raise EstimationError(
            f"The {what} are collinear once the cost shifters and fixed effects are "
            "removed; drop one or choose other instruments."
        )
    return zs @ (vecs / np.sqrt(vals)) @ vecs.T


def lack_of_fit(
    z: np.ndarray,
    e: np.ndarray,
    dmarkup: np.ndarray,
    psi_demand: np.ndarray,
    rows: np.ndarray,
    n_all: int,
) -> LackOfFit:
    """Lack of fit of one model and its influence, demand estimation included.

    Parameters
    ----------
    z : numpy.ndarray
        (n, d) whitened instruments (``Z'Z/n = I``) on the supply rows.
    e : numpy.ndarray
        (n,) partialled implied cost ``p - Delta_m`` (less the fitted cost slope
        when the slope is free).
    dmarkup : numpy.ndarray
        (n, k_d) derivative of the model's markup in the demand coefficients.
    psi_demand : numpy.ndarray
        (n_all, k_d) influence of the demand coefficients on the demand sample.
    rows : numpy.ndarray
        (n,) positions of the supply rows in the demand sample.
    n_all : int
        Rows of the demand sample.

    Returns
    -------
    LackOfFit

    Notes
    -----
    With ``a_i = z_i' W g`` the influence of ``Q = g'Wg`` is

        psi_i = 2 a_i e_i - a_i^2 - Q + 2 g'W G psi^d_i,    G = -Z' dDelta/dalpha / n,

    the first term from the moments, the second and third from estimating
    ``W = (Z'Z/n)^{-1}`` (``d(S^{-1}) = -W dS W``), the last from the demand
    coefficients alpha that enter the markup through ``Q* = Q/|dQ/dP|``.
    Partialling out the cost shifters and fixed effects has no first-order
    effect because instruments and residuals are both residualised (their
    derivatives in the projection coefficients are ``E[w e] = E[w z'] = 0``),
    and a free cost slope fitted by 2SLS has none either (envelope theorem: the
    objective is at its minimum in the slope).  Here ``z`` is whitened, so
    ``W = I`` and ``a_i = z_i' g``.
    """
    n = len(e)
    g = z.T @ e / n
    q = float(g @ g)
    a = z @ g
    big_g = -(z.T @ dmarkup) / n  # (d, k_d)
    psi = 2.0 * (psi_demand @ (big_g.T @ g))
    add_rows(psi, rows, (n_all / n) * (2.0 * a * e - a * a - q))
    mom = add_rows(psi_demand @ big_g.T, rows, (n_all / n) * (z * e[:, None] - g))
    return LackOfFit(q=q, g=g, psi=psi, moment_psi=mom)


def pair_stats(fa: LackOfFit, fb: LackOfFit, cov: CovSpec, k: int) -> PairStats:
    """Rivers-Vuong statistic and F-statistic for testing of models a and b.

    Parameters
    ----------
    fa, fb : LackOfFit
        The two models on the same instruments and rows.
    cov : CovSpec
        Covariance choice on the demand sample (clusters by market for ``cluster``).
    k : int
        Parameters counted in the small-sample factor of :func:`conduct.iv.cluster_cov`.

    Returns
    -------
    PairStats

    Notes
    -----
    ``T = (Q_a - Q_b) / se`` with ``se^2`` the covariance of ``mean(psi_a - psi_b)``
    under ``cov``; this equals ``sqrt(n)(Q_a - Q_b)/sigma`` with
    ``sigma^2 = n se^2``.

    The F-statistic for testing is built from the whitened moments ``g_a, g_b``
    (d each) and the effective scalar moment covariances
    ``s_lm = tr(V_lm) / d`` of their cluster-robust covariance blocks ``V_lm``
    (under homoskedasticity ``V_lm = sigma_lm I / n`` exactly, so ``s_lm`` is
    the usual ``sigma_lm / n``; otherwise the trace averages the dependence as
    in an effective F):

        rho = s_ab / sqrt(s_aa s_bb),
        F = (1 - rho^2) / (2d) * (s_bb Q_a + s_aa Q_b - 2 s_ab g_a'g_b) / (s_aa s_bb - s_ab^2).

    The bracket over the determinant is the Wald statistic of the joint
    hypothesis ``g_a = g_b = 0`` (neither model's implied cost is predicted by
    the instruments); the factor ``(1 - rho^2)`` is the scaling of the paper's
    statistic as recalled from memory (the formula was not checked against the
    published text).  Critical values: :data:`CRITICAL_VALUES`.
    """
    d = len(fa.g)
    diff = fa.psi - fb.psi
    var = float(cluster_cov(diff[:, None], cov, k)[0, 0])
    scale = max(float(np.mean(fa.psi**2 + fb.psi**2)), 1e-300)
    mom = np.column_stack([fa.moment_psi, fb.moment_psi])
    v = cluster_cov(mom, cov, k)
    s_aa = float(np.trace(v[:d, :d])) / d
    s_bb = float(np.trace(v[d:, d:])) / d
    s_ab = float(np.trace(v[:d, d:])) / d
    det = s_aa * s_bb - s_ab**2
    rho = s_ab / np.sqrt(s_aa * s_bb) if s_aa > 0 and s_bb > 0 else float("nan")
    ratio = float(np.sqrt(s_bb / s_aa)) if s_aa > 0 else float("nan")
    same = bool(np.allclose(fa.moment_psi, fb.moment_psi, rtol=1e-12, atol=0.0))
    degenerate = same or var <= _DEGENERATE * scale / len(diff) or det <= 0
    if degenerate:
        return PairStats(t=float("nan"), se=float(np.sqrt(max(var, 0.0))), f=0.0, rho=rho,
                         ratio=ratio, degenerate=True)
    wald = (s_bb * fa.q + s_aa * fb.q - 2.0 * s_ab * float(fa.g @ fb.g)) / det
    f = (1.0 - rho**2) * wald / (2 * d)  # scaling (1 - rho^2) / (2 d): from memory
    se = float(np.sqrt(var))
    return PairStats(t=(fa.q - fb.q) / se, se=se, f=float(f), rho=float(rho), ratio=ratio,
                     degenerate=False)



# ----------------------------------------------------------------------------------------
# Weak instruments for testing: the limit experiment and its critical values
# ----------------------------------------------------------------------------------------

#: Worst-case sizes and best-case powers the critical values refer to (5% test).
SIZE_TARGETS: tuple[float, ...] = (0.075, 0.10, 0.125)
POWER_TARGETS: tuple[float, ...] = (0.50, 0.75, 0.95)
#: Largest number of instruments for testing with its own row; more use this row.
MAX_DF = 10

#: Critical values for a two-sided Rivers-Vuong test at 5%, by instruments for
#: testing d: ``(size, power)``.  ``size`` holds the F-statistic's critical values
#: for worst-case size 0.075, 0.10 and 0.125 (0 where no configuration exceeds that
#: size); ``power`` those of the unscaled form ``F / (1 - rho^2)`` for best-case
#: power 0.50, 0.75 and 0.95 (applied to F itself, see :func:`weak_bounds`).  Produced
#: by :func:`critical_values` with its defaults (10,000 draws, seed 100 + d): our own
#: simulation of the limit experiment, *not* the table printed in the paper.
CRITICAL_VALUES: dict[int, tuple[tuple[float, float, float], tuple[float, float, float]]] = {
    1: ((31.1, 16.8, 11.7), (16.1, 20.2, 27.1)),
    2: ((0.0, 0.0, 0.0), (8.3, 10.2, 13.5)),
    3: ((0.0, 0.0, 0.0), (5.7, 7.0, 9.2)),
    4: ((0.0, 0.0, 0.0), (4.4, 5.4, 7.0)),
    5: ((0.0, 0.0, 0.0), (3.6, 4.3, 5.6)),
    6: ((0.0, 0.0, 0.0), (3.1, 3.7, 4.7)),
    7: ((0.0, 0.0, 0.0), (2.7, 3.2, 4.1)),
    8: ((0.0, 0.0, 0.0), (2.4, 2.9, 3.7)),
    9: ((1.8, 0.0, 0.0), (2.2, 2.6, 3.3)),
    10: ((3.0, 1.9, 0.0), (2.0, 2.4, 3.0)),
}

# Grids of the limit experiment (see critical_values).
_RHOS = (-0.999, -0.99, -0.95, -0.9, -0.8, -0.6, -0.3, 0.0, 0.3, 0.6, 0.8, 0.9, 0.95, 0.99,
         0.999)
_LAMBDAS = (0.25, 0.5, 0.75, 1.0)
_RATIOS = (0.0, 0.25, 0.5, 0.75, 1.0, 1.5, 2.0, 4.0)
_STRENGTHS = (0.0, 0.5, 1, 2, 3, 4, 6, 8, 10, 12, 15, 20, 25, 30, 40, 50, 60, 80, 100, 130,
              160, 200, 260, 330, 420)
_Z05 = 1.959963984540054


def weak_bounds(f: float, d: int) -> tuple[bool, float | None, float | None]:
    """Classify a pair's F-statistic for testing against :data:`CRITICAL_VALUES`.

    Parameters
    ----------
    f : float
        The F-statistic for testing (:func:`pair_stats`).
    d : int
        Instruments for testing (rows above :data:`MAX_DF` use the last row).

    Returns
    -------
    weak : bool
        True when the worst-case size may exceed 0.10 or even the best-case
        power may fall below 0.50.
    size_bound : float or None
        Smallest of :data:`SIZE_TARGETS` the statistic certifies, else None.
    power_bound : float or None
        Largest of :data:`POWER_TARGETS` certified, else None.

    Notes
    -----
    Like Stock & Yogo's (2005) tables, each critical value is the 95% quantile
    of the statistic at the boundary of the weak set, so ``F`` above it rejects,
    at 5%, that the instruments are weak in that sense.  The power critical
    values were computed for the unscaled form ``F / (1 - rho^2)``; comparing
    ``F`` itself with them is conservative (``F <= F / (1 - rho^2)``).  We accept
    that on purpose: when one source of noise moves both models' moments in
    proportion (typically the demand estimates, scaled by each model's conduct)
    ``rho`` nears one while the two noises differ in scale, and the unscaled
    form then reports strong instruments although the lack-of-fit difference is
    dominated by its small-sample bias (a rejection rate of 0.17-0.25 under equal
    fit in our simulations, where ``F`` itself was near zero).  The tables are
    for a 5% test; at other levels they are a guide only.
    """
    size_cv, power_cv = CRITICAL_VALUES[min(max(d, 1), MAX_DF)]
    size_bound = next((r for r, cv in zip(SIZE_TARGETS, size_cv, strict=True) if f >= cv),
                      None)
    ok = [pw for pw, cv in zip(POWER_TARGETS, power_cv, strict=True) if f >= cv]
    power_bound = ok[-1] if ok else None
    weak = size_bound is None or size_bound > 0.10 or power_bound is None
    return weak, size_bound, power_bound


def limit_draws(
    d: int, rho: float, lam: float, mu_a: np.ndarray, mu_b: np.ndarray,
    e_a: np.ndarray, e_b: np.ndarray,
) -> tuple[np.ndarray, np.ndarray]:
    """Draws of the Rivers-Vuong statistic and the F-statistic in the weak-instrument limit.

    Parameters
    ----------
    d : int
        Instruments for testing.
    rho : float
        Correlation of the two models' moments, in (-1, 1).
    lam : float
        Variance ratio ``sigma_b^2 / sigma_a^2``.
    mu_a, mu_b : numpy.ndarray
        (d,) standardised local lack of fit of each model.
    e_a, e_b : numpy.ndarray
        (reps, d) independent standard normal draws.

    Returns
    -------
    T, F : numpy.ndarray
        (reps,) limits of the two statistics.

    Notes
    -----
    With ``E[z e_m] = q_m / sqrt(n)`` (weak instruments for testing) and
    homoskedastic moments, ``sqrt(n) W^{1/2} g_m -> sigma_m u_m`` with
    ``u_m ~ N(mu_m, I_d)`` and ``corr(u_a, u_b) = rho I_d``, so

        T -> (|u_a|^2 - lam |u_b|^2) / (2 sqrt(|u_a|^2 + lam^2 |u_b|^2 - 2 rho lam u_a'u_b)),
        F -> (|u_a|^2 + |u_b|^2 - 2 rho u_a'u_b) / (2d),

    and ``2d F / (1 - rho^2)`` is noncentral chi-square with 2d degrees of freedom
    and noncentrality ``(|mu_a|^2 + |mu_b|^2 - 2 rho mu_a'mu_b) / (1 - rho^2)``.  The
    estimation of W and of demand is of smaller order here and drops out.
    """
    u_a = e_a.copy()
    u_a += mu_a
    u_b = rho * e_a + np.sqrt(1.0 - rho**2) * e_b
    u_b += mu_b
    a = np.einsum("ij,ij->i", u_a, u_a)
    b = np.einsum("ij,ij->i", u_b, u_b)
    c = np.einsum("ij,ij->i", u_a, u_b)
    t = (a - lam * b) / (2.0 * np.sqrt(np.maximum(a + lam**2 * b - 2 * rho * lam * c, 1e-300)))
    return t, (a + b - 2 * rho * c) / (2 * d)


def _crossing(x: np.ndarray, y: np.ndarray, level: float, *, falling: bool) -> float:
    """Where a gridded curve crosses ``level`` (linear interpolation)."""
    if falling:  # last point above level, then where it falls to it
        above = np.flatnonzero(y > level)
        if len(above) == 0:
            return 0.0
        i = int(above.max())
        if i == len(x) - 1:
            return float("inf")
        return float(x[i] + (y[i] - level) * (x[i + 1] - x[i]) / (y[i] - y[i + 1]))
    reach = np.flatnonzero(y >= level)
    if len(reach) == 0:
        return float("inf")
    i = int(reach.min())
    if i == 0:
        return float(x[0])
    return float(x[i - 1] + (level - y[i - 1]) * (x[i] - x[i - 1]) / (y[i] - y[i - 1]))


def critical_values(
    d: int, *, reps: int = 10_000, seed: int | None = None
) -> tuple[tuple[float, float, float], tuple[float, float, float]]:
    """Simulate the critical values of one row of :data:`CRITICAL_VALUES`.

    Parameters
    ----------
    d : int
        Instruments for testing.
    reps : int
        Draws per configuration.
    seed : int, optional
        Default ``100 + d``.

    Returns
    -------
    tuple
        ``(size, power)`` critical values as in :data:`CRITICAL_VALUES`, rounded
        to one decimal (``inf`` where the target is never reached on the grid).

    Notes
    -----
    Configurations: ``rho`` in a grid over (-1, 1) up to 0.999 in absolute value,
    ``lam`` in [1/4, 1] (standard deviations of the two models' implied cost
    within a factor 2; swapping a and b covers [1, 4]), the angle between
    ``mu_a`` and ``mu_b`` (0 or pi when d = 1, seven angles otherwise) and their
    lengths.  *Size*: under equal fit (``|mu_a|^2 = lam |mu_b|^2``) the worst
    rejection rate over configurations with scaled noncentrality
    ``s = |mu_a|^2 + |mu_b|^2 - 2 rho mu_a'mu_b``; ``s_r`` is where it falls to r,
    and the critical value is the 95% quantile of F at ``s_r`` (largest at
    ``rho = 0``, ``chi2_2d(s_r) / 2d``).  *Power*: the best rate of rejecting in
    favour of the better model over configurations with noncentrality
    ``kappa = s / (1 - rho^2)``; ``kappa_p`` is where it reaches p and the
    critical value, for ``F / (1 - rho^2)``, is ``chi2_2d(kappa_p) / 2d`` at 95%.
    """
    from scipy import stats

    rng = np.random.default_rng(100 + d if seed is None else seed)
    e_a = rng.standard_normal((reps, d))
    e_b = rng.standard_normal((reps, d))
    phis = (0.0, np.pi) if d == 1 else tuple(np.linspace(0.0, np.pi, 7))
    strengths = np.asarray(_STRENGTHS, dtype=float)
    worst = np.zeros(len(strengths))
    best = np.zeros(len(strengths))
    for rho in _RHOS:
        for lam in _LAMBDAS:
            for phi in phis:
                direction = np.zeros(d)
                direction[0] = np.cos(phi)
                if d > 1:
                    direction[1] = np.sin(phi)
                for ratio in (None, *_RATIOS):
                    null = ratio is None
                    r = np.sqrt(lam) if ratio is None else ratio
                    if not null and abs(r - np.sqrt(lam)) < 1e-9:
                        continue
                    den = r**2 + 1 - 2 * rho * r * np.cos(phi)
                    for i, s in enumerate(strengths):
                        m_b = np.sqrt(s * (1.0 if null else 1 - rho**2) / den) if den > 0 else 0.0
                        mu_b = np.zeros(d)
                        mu_b[0] = m_b
                        t, _ = limit_draws(d, rho, lam, r * m_b * direction, mu_b, e_a, e_b)
                        if null:
                            worst[i] = max(worst[i], float(np.mean(np.abs(t) > _Z05)))
                        else:
                            sign = -1.0 if (r * m_b) ** 2 < lam * m_b**2 else 1.0
                            best[i] = max(best[i], float(np.mean(sign * t > _Z05)))

    def quantile(ncp: float) -> float:
        if not np.isfinite(ncp):
            return float("inf")
        return round(float(stats.ncx2.ppf(0.95, 2 * d, ncp)) / (2 * d), 1)

    size = tuple(0.0 if (s_r := _crossing(strengths, worst, r, falling=True)) == 0
                 else quantile(s_r) for r in SIZE_TARGETS)
    power = tuple(quantile(_crossing(strengths, best, p, falling=False))
                  for p in POWER_TARGETS)
    return (size[0], size[1], size[2]), (power[0], power[1], power[2])
