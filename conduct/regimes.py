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
from conduct.errors import DataError
from conduct.panel import Panel
from conduct.study import Study
from conduct.supply import build_system

__all__ = ["GroupTheta", "SplitResult", "theta_by"]

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
