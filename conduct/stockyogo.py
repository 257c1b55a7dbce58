"""Stock & Yogo (2005) critical values for the weak-instrument test.

Two things live here:

* the published critical values, embedded cell by cell with their source and
  provenance (:func:`stock_yogo`, :func:`stock_yogo_cell`);
* an exact numerical reproduction of the two TSLS tables for one endogenous
  regressor (:func:`computed_critical_value`), used to check the embedded cells
  and to fill cells that are not embedded.

Stock and Yogo computed their tables by simulation, so the published cells
carry Monte Carlo error: the worst-case size (or relative bias) implied by a
published cell differs from its nominal level by a few tenths of a percentage
point, and the critical values by up to about 3%.  The exact values computed
here are the limit those simulations estimate.

The plain-language reading of a first-stage F statistic is
:func:`strength_reading`.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache
from typing import Literal, get_args

import numpy as np
from scipy import integrate, optimize, stats

from conduct.errors import EstimationError

__all__ = [
    "LEVELS",
    "SOURCE",
    "StockYogoCell",
    "Table",
    "computed_critical_value",
    "stock_yogo",
    "stock_yogo_cell",
    "strength_reading",
    "tsls_relative_bias",
    "tsls_worst_case_size",
]

Table = Literal["tsls_bias", "tsls_size", "liml_size"]

SOURCE = (
    "Stock, J.H. and Yogo, M. (2005), Testing for Weak Instruments in Linear IV "
    "Regression, in Andrews & Stock (eds.), Identification and Inference for "
    "Econometric Models, Tables 5.1 and 5.2"
)
SOURCE_LIML = (
    "Stock, J.H. and Yogo, M. (2005), Testing for Weak Instruments in Linear IV "
    "Regression, in Andrews & Stock (eds.), Identification and Inference for "
    "Econometric Models, table of LIML maximal-size critical values"
)

#: The levels of each table: maximal relative bias (bias tables) or maximal
#: size of a nominal 5% Wald test (size tables), as fractions.
LEVELS: dict[str, tuple[float, ...]] = {
    "tsls_bias": (0.05, 0.10, 0.20, 0.30),
    "tsls_size": (0.10, 0.15, 0.20, 0.25),
    "liml_size": (0.10, 0.15, 0.20, 0.25),
}

_ISSUE = "published; quoted in the project's issue 4"
_CHECKED = (
    "published; recalled from memory; agrees with this module's exact computation "
    "within the published tables' simulation error"
)
_UNCHECKED = "published; recalled from memory; not recomputed (no exact method here for n > 1)"
_UNCHECKED_LIML = "published; recalled from memory; not recomputed (no LIML method here)"

# Each row: (table, n_endog, K2) -> values at LEVELS[table], in that order.
# Source of every row: Stock & Yogo (2005); see SOURCE / SOURCE_LIML.
_TABLES: dict[tuple[str, int, int], tuple[float, float, float, float]] = {
    # TSLS maximal size (Table 5.2), one endogenous regressor.
    ("tsls_size", 1, 1): (16.38, 8.96, 6.66, 5.53),  # 10%, 15% given by the issue; rest from memory
    ("tsls_size", 1, 2): (19.93, 11.59, 8.75, 7.25),  # 10% given by the issue; rest from memory
    ("tsls_size", 1, 3): (22.30, 12.83, 9.54, 7.80),  # 10% given by the issue; rest from memory
    ("tsls_size", 1, 4): (24.58, 13.96, 10.26, 8.31),  # from memory
    ("tsls_size", 1, 5): (26.87, 15.09, 10.98, 8.84),  # from memory
    ("tsls_size", 1, 6): (29.18, 16.23, 11.72, 9.38),  # from memory
    ("tsls_size", 1, 7): (31.50, 17.38, 12.48, 9.93),  # from memory
    ("tsls_size", 1, 8): (33.84, 18.54, 13.24, 10.50),  # from memory
    ("tsls_size", 1, 9): (36.19, 19.71, 14.01, 11.07),  # from memory
    ("tsls_size", 1, 10): (38.54, 20.88, 14.78, 11.65),  # from memory
    # TSLS maximal size (Table 5.2), two endogenous regressors.
    ("tsls_size", 2, 2): (7.03, 4.58, 3.95, 3.63),  # from memory
    ("tsls_size", 2, 3): (13.43, 8.18, 6.40, 5.45),  # from memory
    ("tsls_size", 2, 4): (16.87, 9.93, 7.54, 6.28),  # from memory
    ("tsls_size", 2, 5): (19.45, 11.22, 8.38, 6.89),  # from memory
    # TSLS relative bias (Table 5.1), one endogenous regressor.
    ("tsls_bias", 1, 3): (13.91, 9.08, 6.46, 5.39),  # from memory
    ("tsls_bias", 1, 4): (16.85, 10.27, 6.71, 5.34),  # from memory
    ("tsls_bias", 1, 5): (18.37, 10.83, 6.77, 5.25),  # from memory
    ("tsls_bias", 1, 6): (19.28, 11.12, 6.76, 5.15),  # from memory
    ("tsls_bias", 1, 7): (19.86, 11.29, 6.73, 5.07),  # from memory
    ("tsls_bias", 1, 8): (20.25, 11.39, 6.69, 4.99),  # from memory
    ("tsls_bias", 1, 9): (20.53, 11.46, 6.65, 4.92),  # from memory
    ("tsls_bias", 1, 10): (20.74, 11.49, 6.61, 4.86),  # from memory
    # TSLS relative bias (Table 5.1), two and three endogenous regressors.
    ("tsls_bias", 2, 4): (11.04, 7.56, 5.57, 4.73),  # from memory
    ("tsls_bias", 2, 5): (13.97, 8.78, 5.91, 4.79),  # from memory
    ("tsls_bias", 3, 5): (9.53, 6.61, 4.99, 4.30),  # from memory
    ("tsls_bias", 3, 6): (12.20, 7.77, 5.35, 4.40),  # from memory
    # LIML maximal size, one endogenous regressor (K2 = 1 equals TSLS: exactly identified).
    ("liml_size", 1, 1): (16.38, 8.96, 6.66, 5.53),  # from memory
    ("liml_size", 1, 2): (8.68, 5.33, 4.42, 3.92),  # from memory
    ("liml_size", 1, 3): (6.46, 4.36, 3.69, 3.32),  # from memory
    ("liml_size", 1, 4): (5.44, 3.87, 3.30, 2.98),  # from memory
    ("liml_size", 1, 5): (4.84, 3.56, 3.05, 2.77),  # from memory
}

# Cells quoted by the project's issue (the rest of the embedded cells are from memory).
_FROM_ISSUE: frozenset[tuple[str, int, int, float]] = frozenset(
    {
        ("tsls_size", 1, 1, 0.10),
        ("tsls_size", 1, 2, 0.10),
        ("tsls_size", 1, 3, 0.10),
        ("tsls_size", 1, 1, 0.15),
    }
)

#: Largest number of excluded instruments for which the published tables exist.
MAX_K2 = 30


@dataclass(frozen=True, slots=True)
class StockYogoCell:
    """One embedded critical value with its provenance.

    Attributes
    ----------
    table : str
        ``"tsls_bias"``, ``"tsls_size"`` or ``"liml_size"``.
    n_endog : int
        Number of endogenous regressors (n in Stock & Yogo).
    k_instruments : int
        Number of excluded instruments (K2).
    level : float
        Maximal relative bias or maximal size, as a fraction.
    value : float
        Critical value for the Cragg-Donald statistic (the first-stage F when
        ``n_endog == 1``).
    source : str
        The publication.
    provenance : str
        How the number entered this module and how it was checked.
    """

    table: str
    n_endog: int
    k_instruments: int
    level: float
    value: float
    source: str
    provenance: str


def _check_table(table: str) -> None:
    valid = get_args(Table)
    if table not in valid:
        raise EstimationError(
            f"unknown Stock-Yogo table {table!r}; valid tables are {', '.join(valid)}"
        )


def _level_index(table: str, level: float) -> int:
    for i, lv in enumerate(LEVELS[table]):
        if abs(level - lv) < 1e-9:
            return i
    allowed = ", ".join(f"{lv:g}" for lv in LEVELS[table])
    raise EstimationError(
        f"level {level!r} is not tabulated for {table}; valid levels are {allowed} (fractions)"
    )


def stock_yogo_cell(
    table: Table, n_endog: int, k_instruments: int, level: float
) -> StockYogoCell | None:
    """Return an embedded Stock-Yogo cell with its provenance, or None.

    Parameters
    ----------
    table : {"tsls_bias", "tsls_size", "liml_size"}
        Which table.
    n_endog : int
        Number of endogenous regressors.
    k_instruments : int
        Number of excluded instruments (K2).
    level : float
        Maximal relative bias (0.05, 0.10, 0.20, 0.30) or maximal size
        (0.10, 0.15, 0.20, 0.25), as a fraction.

    Returns
    -------
    StockYogoCell or None
        None when the cell is not embedded (not tabulated, or not recalled
        reliably enough to embed).

    Raises
    ------
    EstimationError
        For an unknown table or level.
    """
    _check_table(table)
    idx = _level_index(table, level)
    row = _TABLES.get((table, n_endog, k_instruments))
    if row is None:
        return None
    lv = LEVELS[table][idx]
    if (table, n_endog, k_instruments, lv) in _FROM_ISSUE:
        prov = _ISSUE
    elif table == "liml_size":
        prov = _UNCHECKED_LIML
    elif n_endog == 1:
        prov = _CHECKED
    else:
        prov = _UNCHECKED
    return StockYogoCell(
        table=table,
        n_endog=n_endog,
        k_instruments=k_instruments,
        level=lv,
        value=row[idx],
        source=SOURCE_LIML if table == "liml_size" else SOURCE,
        provenance=prov,
    )


def stock_yogo(table: Table, n_endog: int, k_instruments: int, level: float) -> float | None:
    """Published Stock-Yogo critical value, or None when not embedded.

    Parameters
    ----------
    table : {"tsls_bias", "tsls_size", "liml_size"}
        Which table.
    n_endog : int
        Number of endogenous regressors.
    k_instruments : int
        Number of excluded instruments (K2).
    level : float
        Maximal relative bias or maximal size, as a fraction (e.g. 0.10).

    Returns
    -------
    float or None
        The critical value for the first-stage F (Cragg-Donald statistic when
        ``n_endog > 1``); reject weak instruments when the statistic exceeds it.

    Notes
    -----
    Source: Stock and Yogo (2005), Tables 5.1 (TSLS relative bias) and 5.2
    (TSLS maximal size), and their LIML maximal-size table.  See
    :func:`stock_yogo_cell` for the provenance of each number and
    :func:`computed_critical_value` for an exact reproduction (one endogenous
    regressor).
    """
    cell = stock_yogo_cell(table, n_endog, k_instruments, level)
    return None if cell is None else cell.value


# --------------------------------------------------------------------------
# Exact computation for one endogenous regressor (weak-instrument asymptotics)
# --------------------------------------------------------------------------

_WALD_CRIT = float(stats.chi2.isf(0.05, 1))  # nominal 5% two-sided Wald test
_N_NODES = 2000  # midpoint nodes in the chi-square quantile scale; converged to ~1e-3 in the cv


def tsls_worst_case_size(mu2: float, k_instruments: int, *, n_nodes: int = _N_NODES) -> float:
    """Worst-case (over endogeneity) rejection rate of the nominal 5% TSLS Wald test.

    Parameters
    ----------
    mu2 : float
        Concentration parameter (``K2`` times the ``mu^2/K2`` of Stock & Yogo).
    k_instruments : int
        Number of excluded instruments K2 (one endogenous regressor).
    n_nodes : int, optional
        Quadrature nodes over the chi-square component (K2 >= 2).

    Returns
    -------
    float
        The limit as ``|rho| -> 1`` of the rejection rate, which is the supremum
        over ``rho``.

    Notes
    -----
    Under weak-instrument asymptotics with one endogenous regressor, write
    :math:`z_v \\sim N(0, I_{K_2})`, :math:`\\lambda = \\mu e_1`,
    :math:`\\nu_1 = (\\lambda+z_v)'(\\lambda+z_v)` and
    :math:`\\nu_2 = (\\lambda+z_v)'z_u` with :math:`\\mathrm{corr}(z_u, z_v) = \\rho I`.
    The TSLS Wald statistic converges to

    .. math:: t^2 = \\frac{\\nu_2^2/\\nu_1}{1 - 2\\rho\\nu_2/\\nu_1 + \\nu_2^2/\\nu_1^2}.

    Its rejection rate increases with :math:`|\\rho|` (checked numerically for
    K2 = 1, 3, 10), so the worst case is :math:`\\rho = 1`, where
    :math:`z_u = z_v`.  With :math:`u = \\mu + a` (:math:`a` the first element
    of :math:`z_v`) and :math:`b` the squared norm of the other elements
    (:math:`\\chi^2_{K_2-1}`), :math:`t^2 > c` is the sextic inequality

    .. math:: (u^2 - \\mu u + b)^2 (u^2 + b) - c \\mu^2 u^2 > 0,

    solved exactly in :math:`u \\sim N(\\mu, 1)` through its real roots for each
    :math:`b`; the integral over :math:`b` is a midpoint rule on the
    chi-square quantile scale.
    """
    c = _WALD_CRIT
    mu = float(np.sqrt(mu2))
    if k_instruments == 1:
        b = np.zeros(1)
        w = np.ones(1)
    else:
        t = (np.arange(n_nodes) + 0.5) / n_nodes
        b = stats.chi2.ppf(t, k_instruments - 1)
        w = np.full(n_nodes, 1.0 / n_nodes)
    coef = np.stack(
        [
            np.ones_like(b),
            np.full_like(b, -2.0 * mu),
            mu2 + 3.0 * b,
            -4.0 * mu * b,
            3.0 * b**2 + b * mu2 - c * mu2,
            -2.0 * mu * b**2,
            b**3,
        ],
        axis=1,
    )
    comp = np.zeros((b.size, 6, 6))
    comp[:, 0, :] = -coef[:, 1:]
    comp[:, np.arange(1, 6), np.arange(0, 5)] = 1.0
    roots = np.linalg.eigvals(comp)
    real = np.where(np.abs(roots.imag) <= 1e-7 * (1.0 + np.abs(roots)), roots.real, np.inf)
    real.sort(axis=1)
    lo = np.concatenate([np.full((b.size, 1), -np.inf), real], axis=1)
    hi = np.concatenate([real, np.full((b.size, 1), np.inf)], axis=1)
    finite = np.isfinite(lo) & np.isfinite(hi)
    mid = np.where(finite, (np.where(finite, lo, 0.0) + np.where(finite, hi, 0.0)) / 2, 0.0)
    val = np.zeros_like(mid)
    for j in range(7):
        val = val * mid + coef[:, j : j + 1]
    reject = np.where(finite, val > 0, True)  # positive leading coefficient: P > 0 at +-inf
    with np.errstate(invalid="ignore"):
        prob = stats.norm.cdf(hi - mu) - stats.norm.cdf(lo - mu)
    prob = np.where(np.isnan(prob), 0.0, prob)
    return float(np.sum(w * np.sum(np.where(reject, prob, 0.0), axis=1)))


def tsls_relative_bias(mu2: float, k_instruments: int) -> float:
    """Bias of TSLS relative to OLS under weak-instrument asymptotics (one regressor).

    Parameters
    ----------
    mu2 : float
        Concentration parameter.
    k_instruments : int
        Number of excluded instruments, at least 3 (the mean exists then).

    Returns
    -------
    float
        :math:`|E(\\hat\\beta_{TSLS}) - \\beta| / |E(\\hat\\beta_{OLS}) - \\beta|`.

    Notes
    -----
    With the notation of :func:`tsls_worst_case_size`, the ratio is
    :math:`E[z_v'(\\lambda+z_v)/\\|\\lambda+z_v\\|^2]`, free of :math:`\\rho`.
    Stein's identity turns it into :math:`(K_2-2)\\,E[1/X]` with
    :math:`X \\sim \\chi'^2_{K_2}(\\mu^2)`, and

    .. math:: E[1/X] = \\tfrac12 \\int_0^1 t^{K_2/2-2} e^{-\\mu^2 (1-t)/2}\\,dt,

    evaluated by adaptive quadrature with an algebraic end-point weight.
    """
    k = k_instruments
    if k < 3:
        raise EstimationError("the TSLS relative bias needs at least 3 excluded instruments")
    val, _ = integrate.quad(
        lambda t: np.exp(-mu2 * (1.0 - t) / 2.0), 0.0, 1.0, weight="alg", wvar=(k / 2 - 2, 0)
    )
    return (k - 2) * 0.5 * val


@lru_cache(maxsize=256)
def computed_critical_value(
    table: Literal["tsls_size", "tsls_bias"], k_instruments: int, level: float
) -> float:
    """Exact Stock-Yogo critical value for one endogenous regressor.

    Parameters
    ----------
    table : {"tsls_size", "tsls_bias"}
        Maximal-size or relative-bias criterion.
    k_instruments : int
        Number of excluded instruments (1..30 for size, 3..30 for bias).
    level : float
        Maximal size (0.10, 0.15, 0.20, 0.25) or relative bias
        (0.05, 0.10, 0.20, 0.30).

    Returns
    -------
    float
        Critical value for the first-stage F statistic.

    Notes
    -----
    The Stock-Yogo method: find the concentration parameter :math:`\\mu^2_*`
    at which the worst-case size (:func:`tsls_worst_case_size`) or the relative
    bias (:func:`tsls_relative_bias`) equals ``level``; weak instruments are
    rejected at 5% when :math:`F > \\chi'^2_{K_2,0.95}(\\mu^2_*)/K_2`, because
    :math:`K_2 F` is asymptotically noncentral chi-square with noncentrality
    :math:`\\mu^2`.  About 0.1 s per cell (cached).
    """
    if table not in ("tsls_size", "tsls_bias"):
        raise EstimationError(
            f"no exact computation for table {table!r}; valid tables are tsls_size, tsls_bias"
        )
    idx = _level_index(table, level)
    level = LEVELS[table][idx]
    k = int(k_instruments)
    if k < (1 if table == "tsls_size" else 3):
        raise EstimationError(f"{table} needs more excluded instruments (got {k})")
    f = (
        (lambda m: tsls_worst_case_size(m, k) - level)
        if table == "tsls_size"
        else (lambda m: tsls_relative_bias(m, k) - level)
    )
    hi = 10.0 * k + 10.0
    while f(hi) > 0:
        hi *= 2.0
    mu2 = optimize.brentq(f, 1e-6, hi, xtol=1e-10)
    return float(stats.ncx2.isf(0.05, k, mu2) / k)


# --------------------------------------------------------------------------
# Plain-language reading
# --------------------------------------------------------------------------


def _table_values(table: Table, n_endog: int, k: int, min_k: int
                  ) -> tuple[list[float], str] | None:
    """Critical values of one table at every level: embedded, else computed (one regressor)."""
    vals = [stock_yogo(table, n_endog, k, lv) for lv in LEVELS[table]]
    if all(v is not None for v in vals):
        return [float(v) for v in vals if v is not None], "Stock-Yogo"
    if n_endog == 1 and min_k <= k <= MAX_K2:
        return [computed_critical_value(table, k, lv) for lv in LEVELS[table]], \
            "computed Stock-Yogo"
    return None


def _size_values(n_endog: int, k: int) -> tuple[list[float], str] | None:
    return _table_values("tsls_size", n_endog, k, 1)


def _bias_values(n_endog: int, k: int) -> tuple[list[float], str] | None:
    return _table_values("tsls_bias", n_endog, k, 3)


def strength_reading(
    F: float,
    n_endog: int,
    k: int,
    *,
    coefficient: str = "the price coefficient",
    robust: bool = False,
) -> str:
    """Plain-language reading of a first-stage F against Stock-Yogo values.

    Parameters
    ----------
    F : float
        First-stage F (one endogenous regressor) or Cragg-Donald statistic.
    n_endog : int
        Number of endogenous regressors.
    k : int
        Number of excluded instruments.
    coefficient : str, optional
        How to name the coefficient in the sentence.
    robust : bool, optional
        True when ``F`` comes from a robust or cluster covariance; adds the
        caveat that the tables assume homoskedastic errors.

    Returns
    -------
    str
        One or two sentences.

    Notes
    -----
    Uses the TSLS maximal-size table and, when ``k >= n_endog + 2``, the
    relative-bias table.  For one endogenous regressor, cells not embedded
    are computed exactly (:func:`computed_critical_value`) and the sentence
    says so.
    """
    if k < n_endog:
        return (
            f"{k} excluded instrument(s) for {n_endog} endogenous regressor(s): "
            "the equation is not identified."
        )
    parts: list[str] = []
    size = _size_values(n_endog, k)
    if size is None:
        parts.append(
            f"F = {F:.1f}; no Stock-Yogo maximal-size critical value is available for "
            f"{n_endog} endogenous regressors and {k} instruments."
        )
    else:
        cvs, label = size
        levels = LEVELS["tsls_size"]
        passed = [i for i, cv in enumerate(cvs) if cv < F]
        if passed and passed[0] == 0:
            parts.append(
                f"F = {F:.1f} exceeds the {label} 10% maximal-size critical value "
                f"{cvs[0]:.2f}: a nominal 5% Wald test on {coefficient} rejects at most "
                "10% of the time."
            )
        elif passed:
            i = passed[0]
            parts.append(
                f"F = {F:.1f} is below the {label} 10% maximal-size critical value "
                f"{cvs[0]:.2f} but exceeds the {levels[i]:.0%} value {cvs[i]:.2f}: a nominal "
                f"5% Wald test on {coefficient} may reject up to {levels[i]:.0%} of the time; "
                "report the Anderson-Rubin set beside the Wald interval."
            )
        else:
            parts.append(
                f"F = {F:.1f} is below the {label} 25% maximal-size critical value "
                f"{cvs[-1]:.2f}: weak instruments; rely on the Anderson-Rubin set, "
                "not the Wald interval."
            )
    if k >= n_endog + 2:
        bias = _bias_values(n_endog, k)
        if bias is not None:
            cvs, label = bias
            levels = LEVELS["tsls_bias"]
            passed = [i for i, cv in enumerate(cvs) if cv < F]
            if passed:
                i = passed[0]
                parts.append(
                    f"It exceeds the {label} {levels[i]:.0%} relative-bias value "
                    f"{cvs[i]:.2f}: the TSLS bias is at most {levels[i]:.0%} of the OLS bias."
                )
            else:
                parts.append(
                    f"It is below the {label} 30% relative-bias value {cvs[-1]:.2f}: "
                    "the TSLS bias may exceed 30% of the OLS bias."
                )
    if robust:
        parts.append(
            "(The Stock-Yogo values assume homoskedastic errors; with robust or cluster "
            "errors compare the effective F with its own critical value.)"
        )
    return " ".join(parts)
