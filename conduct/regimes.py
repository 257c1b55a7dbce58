"""Conduct by known regime and by group of markets.

Both split the markup regressor by a column of the panel: Q* enters as one
column per regime (or group), the excluded instruments are interacted with
the indicators, demand is shared, and each theta gets the sequential
(stacked-moment) covariance.  Regimes get a Wald test that all thetas are
equal; groups get one-sided tests of competitive conduct (theta = 0 against
theta > 0) with p-values adjusted for multiple testing by Holm (1979) and by
Benjamini & Hochberg (1995), and are ranked by the evidence against
competition.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats
from statsmodels.stats.multitest import multipletests

from conduct.demand import DemandResult
from conduct.design import prepare
from conduct.errors import DataError
from conduct.identify import supply_instruments
from conduct.iv import cluster_cov, fit_iv
from conduct.panel import Panel
from conduct.study import Study
from conduct.supply import build_system

__all__ = [
    "GroupTheta", "RegimeShift", "RegimeShiftResult", "SplitResult", "regime_shift", "theta_by",
]

MIN_ROWS_PER_GROUP = 10  # common practice: fewer rows leave theta unidentified in practice


@dataclass(frozen=True, slots=True)
class GroupTheta:
    """Theta of one regime or group.

    Attributes
    ----------
    label : str
    theta, se : float
        Estimate and sequential standard error.
    ci : tuple of float
        Wald interval at the study's level.
    rows : int
        Rows of the group used.
    p_competitive : float
        One-sided p-value of theta = 0 against theta > 0.
    p_holm, p_bh : float
        The same adjusted by Holm and by Benjamini-Hochberg across groups.
    """

    label: str
    theta: float
    se: float
    ci: tuple[float, float]
    rows: int
    p_competitive: float
    p_holm: float
    p_bh: float


@dataclass(frozen=True, slots=True)
class SplitResult:
    """Theta per regime or per group.

    Attributes
    ----------
    kind : str
        ``regime`` or ``group``.
    column : str
        The panel column that defines the split.
    groups : tuple of GroupTheta
        In label order for regimes; ranked by evidence against competition for groups.
    equality_stat, equality_p : float
        Wald test that all thetas are equal (chi-square, ``equality_df`` df).
    equality_df : int
    """

    kind: str
    column: str
    groups: tuple[GroupTheta, ...]
    equality_stat: float
    equality_df: int
    equality_p: float

    def reading(self) -> str:
        """One sentence in plain language."""
        what = "regimes" if self.kind == "regime" else "groups of markets"
        same = "cannot be rejected" if self.equality_p >= 0.05 else "is rejected"
        return (f"Equal conduct across the {len(self.groups)} {what} of '{self.column}' "
                f"{same} at 5% (Wald {self.equality_stat:.2f}, {self.equality_df} df, "
                f"p = {self.equality_p:.4f}).")


def _codes(panel: Panel, column: str) -> tuple[np.ndarray, tuple[str, ...]]:
    values = panel.frame[column]
    labels_raw = values.astype(str).str.strip().to_numpy()
    labels, inverse = np.unique(labels_raw, return_inverse=True)
    return inverse.astype(np.int64), tuple(str(v) for v in labels)


def theta_by(panel: Panel, study: Study, demand: DemandResult, column: str,
             kind: str) -> SplitResult:
    """Estimate a theta per value of ``column`` with shared demand.

    Parameters
    ----------
    panel, study, demand
        The study and its fitted demand.
    column : str
        Panel column holding the regime or group of each row.
    kind : {'regime', 'group'}

    Returns
    -------
    SplitResult

    Raises
    ------
    DataError
        When the column has one value only, or a value has too few rows.
    """
    codes, labels = _codes(panel, column)
    if len(labels) < 2:
        raise DataError(
            f"Data file {study.panel.file}: {kind} column '{column}' holds a single value "
            f"('{labels[0]}'); a split needs at least two."
        )
    counts = np.bincount(codes, minlength=len(labels))
    small = [f"'{labels[i]}' ({counts[i]} rows)" for i in np.flatnonzero(
        counts < MIN_ROWS_PER_GROUP)]
    if small:
        raise DataError(
            f"Data file {study.panel.file}: {kind} column '{column}' has values with fewer "
            f"than {MIN_ROWS_PER_GROUP} rows: {', '.join(small)}; merge them or drop the "
            "split."
        )
    system = build_system(panel, study, demand, split=(codes, labels))
    fit, cov = system.solve("_p", np.zeros(len(system.rows)))
    idx = list(system.theta_index)
    theta = fit.params[idx]
    v = cov[np.ix_(idx, idx)]
    se = np.sqrt(np.clip(np.diag(v), 0, None))
    level = study.inference.level
    zc = float(stats.norm.ppf(0.5 + level / 2))
    p_comp = stats.norm.sf(theta / se)
    holm = multipletests(p_comp, method="holm")[1]
    bh = multipletests(p_comp, method="fdr_bh")[1]
    g = len(labels)
    r = np.eye(g)[1:] - np.eye(g)[:-1]
    diff = r @ theta
    eq = float(diff @ np.linalg.solve(r @ v @ r.T, diff))
    rows_used = np.bincount(system.group, minlength=g)
    groups = [
        GroupTheta(label=labels[i], theta=float(theta[i]), se=float(se[i]),
                   ci=(float(theta[i] - zc * se[i]), float(theta[i] + zc * se[i])),
                   rows=int(rows_used[i]), p_competitive=float(p_comp[i]),
                   p_holm=float(holm[i]), p_bh=float(bh[i]))
        for i in range(g)
    ]
    if kind == "group":
        groups.sort(key=lambda x: (x.p_competitive, -x.theta))
    return SplitResult(kind=kind, column=column, groups=tuple(groups), equality_stat=eq,
                       equality_df=g - 1, equality_p=float(stats.chi2.sf(eq, g - 1)))


@dataclass(frozen=True, slots=True)
class RegimeShift:
    """Conduct of a regime relative to a base regime, from a log-linear supply relation.

    Attributes
    ----------
    label : str
        The regime.
    price_effect, price_effect_se : float
        Coefficient ``b`` of the regime indicator in the log supply relation.
    theta, se : float
        ``theta = a (exp(-b) - 1)`` with ``a`` the price elasticity of demand, and
        its delta-method standard error (joint influence of ``a`` and ``b``).
    """

    label: str
    price_effect: float
    price_effect_se: float
    theta: float
    se: float


@dataclass(frozen=True, slots=True)
class RegimeShiftResult:
    """Porter-style relative conduct for every non-base regime.

    Attributes
    ----------
    column, base : str
    elasticity : float
        The constant price elasticity ``a`` of the log demand.
    shifts : tuple of RegimeShift
    """

    column: str
    base: str
    elasticity: float
    shifts: tuple[RegimeShift, ...]

    def reading(self) -> str:
        """One sentence per regime."""
        parts = [f"regime '{s.label}' prices {s.price_effect:+.3f} log points above '{self.base}'"
                 f" at equal cost and output: theta = {s.theta:.3f} (se {s.se:.3f})"
                 for s in self.shifts]
        return "Relative to the base regime, " + "; ".join(parts) + " (Porter 1983)."


def regime_shift(panel: Panel, study: Study, demand: DemandResult, column: str
                 ) -> RegimeShiftResult:
    """Conduct by regime from log demand and a log supply relation (Porter 1983).

    Supply in logs: ``ln P = c0 + c_q ln Q + c'W + sum_r b_r 1(regime = r) + FE + u``
    with ``ln Q`` instrumented by the supply instruments.  With constant-elasticity
    demand ``a`` the first-order condition ``P (1 + theta / a) = MC`` gives
    ``b_r = -ln(1 + theta_r / a)``, i.e. ``theta_r = a (exp(-b_r) - 1)`` relative to a
    base regime with theta = 0.

    Parameters
    ----------
    panel, study, demand
        A study with log demand without rotators and a regime column.
    column : str
        The regime column; its first value in sorted order is the base.

    Returns
    -------
    RegimeShiftResult
    """
    assert study.supply is not None
    codes, labels = _codes(panel, column)
    f = panel.frame
    n = len(f)
    data = {"_lp": np.log(f[study.panel.price].to_numpy(float)),
            "_lq": np.log(f[study.panel.quantity].to_numpy(float))}
    for c in study.supply.cost_shifters:
        data[c] = f[c].to_numpy(float)
    reg_names = [f"{column}={lab}" for lab in labels[1:]]
    for g, name in enumerate(reg_names, start=1):
        data[name] = (codes == g).astype(float)
    instr = list(supply_instruments(study))
    for name in instr:
        data[name] = f[name].to_numpy(float)
    prep = prepare(f, data, study, stage="supply")
    cols = prep.columns
    exog_names = (["const"] if prep.constant else []) + list(study.supply.cost_shifters) \
        + reg_names
    exog = np.column_stack(([np.ones(n)] if prep.constant else [])
                           + [cols[c] for c in exog_names if c != "const"])
    fit = fit_iv(cols["_lp"], exog, cols["_lq"][:, None],
                 np.column_stack([cols[c] for c in instr]), (*exog_names, "ln Q"),
                 cov=prep.cov, overid=False, instrument_names=tuple(instr))
    price = demand.price_terms[0]
    i_a = demand.fit.names.index(price)
    a = float(demand.fit.params[i_a])
    psi_a = demand.fit.influence[:, i_a]
    shifts = []
    for name, label in zip(reg_names, labels[1:], strict=True):
        j = fit.names.index(name)
        b = float(fit.params[j])
        theta = a * (np.exp(-b) - 1.0)
        grad = np.array([np.exp(-b) - 1.0, -a * np.exp(-b)])
        psi = np.column_stack([psi_a, fit.influence[:, j]])
        var = float(grad @ cluster_cov(psi, prep.cov, fit.k) @ grad)
        shifts.append(RegimeShift(label=label, price_effect=b,
                                  price_effect_se=float(fit.se[j]), theta=float(theta),
                                  se=float(np.sqrt(max(var, 0.0)))))
    return RegimeShiftResult(column=column, base=labels[0], elasticity=a, shifts=tuple(shifts))
