"""Shared design helpers: fixed-effect codes, absorption and covariance choice.

Both the demand and the supply stage build their arrays the same way: pick the
observations, absorb the study's fixed effects (or add a constant), and set up
the covariance with the right degrees-of-freedom penalty.  This module holds
that common step so the two stages cannot drift apart.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from conduct.absorb import Absorbed, absorb, dense_codes
from conduct.errors import EstimationError
from conduct.iv import CovSpec
from conduct.panel import MARKET, TIME
from conduct.study import Study

THIN_RATIO = 1e-6  # variation left after absorbing effects, relative: below it is rounding noise

__all__ = ["Prepared", "codes", "prepare"]


@dataclass(frozen=True, slots=True)
class Prepared:
    """Arrays with fixed effects removed, ready for :func:`conduct.iv.fit_iv`.

    Attributes
    ----------
    columns : dict of str to numpy.ndarray
        Each named column after absorption, (n,).
    constant : bool
        True when no effects were absorbed and a constant must be added.
    absorbed : Absorbed
        Details of the absorption (method, sweeps, parameters absorbed).
    cov : CovSpec
        Covariance choice with the small-sample penalty for absorbed effects.
    markets : numpy.ndarray
        (n,) market codes of the rows.
    thin : dict of str to float
        Columns whose variation nearly vanishes with the fixed effects: name -> ratio
        of their standard deviation after absorption to before (below 1e-6).
    """

    columns: dict[str, np.ndarray]
    constant: bool
    absorbed: Absorbed
    cov: CovSpec
    markets: np.ndarray
    thin: dict[str, float] = field(default_factory=dict)


def codes(values: pd.Series | np.ndarray) -> np.ndarray:
    """Integer codes 0..G-1 of the distinct values, in sorted order."""
    return dense_codes(values)


def _nested(groups: np.ndarray, clusters: np.ndarray) -> bool:
    """True when every group lies inside a single cluster."""
    first = np.full(int(groups.max()) + 1, -1, dtype=np.int64)
    first[groups[::-1]] = clusters[::-1]  # some cluster of each group
    return bool(np.all(first[groups] == clusters))


def cluster_codes(frame: pd.DataFrame, study: Study, stage: str = "demand",
                  known: dict[str, np.ndarray] | None = None
                  ) -> tuple[np.ndarray, np.ndarray | None]:
    """Cluster codes of the rows for each cluster dimension of the study.

    Parameters
    ----------
    frame : pandas.DataFrame
        The rows (with ``_market`` and ``_t``).
    study : Study
    stage : str
        For messages.
    known : dict of str to numpy.ndarray or None
        Codes already computed for ``market`` or ``period``, reused as they are.

    Returns
    -------
    (numpy.ndarray, numpy.ndarray or None)
        First and (for two-way clustering) second dimension.

    Raises
    ------
    EstimationError
        When a dimension has a single cluster.
    """
    dims = study.demand.cluster or ("market",)
    out = []
    for name in dims:
        col = {"market": MARKET, "period": TIME}.get(name, name)
        if known is not None and name in known:
            c = known[name]
        else:
            c = codes(frame[col].astype(str) if col not in (MARKET, TIME) else frame[col])
        c.flags.writeable = False  # shared by later stages; lets group sums remember runs
        if int(c.max()) + 1 < 2:
            if name == "market":
                raise EstimationError(
                    f"The {stage} stage asks for cluster-robust errors by market, but the "
                    "panel has a single market. Use errors = \"robust\" or, for one market's "
                    "time series, errors = \"hac\" (Newey-West) under [demand]."
                )
            raise EstimationError(
                f"The {stage} stage clusters by '{name}', which has a single value in the "
                "rows used; choose another cluster dimension or errors = \"robust\"."
            )
        out.append(c)
    return out[0], (out[1] if len(out) > 1 else None)


def prepare(
    frame: pd.DataFrame,
    data: dict[str, np.ndarray],
    study: Study,
    *,
    stage: str,
    markets: np.ndarray | None = None,
) -> Prepared:
    """Absorb the study's fixed effects from named columns and choose the covariance.

    Parameters
    ----------
    frame : pandas.DataFrame
        The rows used (with ``_market`` and ``_t``).
    data : dict of str to numpy.ndarray
        Columns to transform, each (n,).
    study : Study
    stage : str
        ``demand`` or ``supply``, for messages.
    markets : numpy.ndarray or None
        (n,) integer market codes of the rows when known (e.g. ``Panel.market_codes``,
        taken at the rows used), in the sorted order of the labels; else coded from
        ``_market``.

    Returns
    -------
    Prepared
    """
    effects = study.demand.effects
    markets = codes(frame[MARKET]) if markets is None else dense_codes(markets)
    periods = codes(frame[TIME].to_numpy())
    groups = [g for name, g in (("market", markets), ("period", periods)) if name in effects]
    n_m, n_t = int(markets.max()) + 1, int(periods.max()) + 1
    for name, own, other, what in (("market", n_m, n_t, "period"),
                                   ("period", n_t, n_m, "market")):
        if name in effects and other == 1:
            raise EstimationError(
                f"The {stage} stage has a single {what} in the rows used, so {name} effects "
                f"absorb every row ({len(frame)} rows, {own} {name}s): nothing is left to "
                f"estimate. Drop \"{name}\" from [demand] effects or add {what}s."
            )
    if study.demand.errors == "hac" and study.demand.hac_lags is not None \
            and study.demand.hac_lags >= len(frame):
        raise EstimationError(
            f"[demand] hac_lags = {study.demand.hac_lags} is not below the {len(frame)} rows "
            f"of the {stage} stage; choose fewer lags (about 4 (n/100)^(2/9) is common).")
    names = list(data)
    stacked = np.empty((len(frame), len(names)), order="F")  # column-major: absorbed per column
    for i, k in enumerate(names):
        stacked[:, i] = data[k]
    absorbed = absorb(stacked, groups)
    columns = {k: absorbed.values[:, i] for i, k in enumerate(names)}
    if not groups:
        # absorb() with no groups demeans (the intercept); keep raw columns and add a constant
        columns = {k: np.asarray(data[k], dtype=float) for k in names}
    errors = study.demand.errors
    c1, c2 = (cluster_codes(frame, study, stage, {"market": markets, "period": periods})
              if errors == "cluster" else (None, None))
    penalty = absorbed.df_absorbed if groups else 0
    if errors == "cluster":
        # absorbed effects nested in a cluster dimension are not counted
        dims = [c for c in (c1, c2) if c is not None]
        for name, g in (("market", markets), ("period", periods)):
            if name in effects and any(_nested(g, c) for c in dims):
                penalty -= int(g.max()) + 1
        penalty = max(penalty, 0)
    cov = CovSpec(kind=errors, clusters=c1, hac_lags=study.demand.hac_lags,
                  df_penalty=penalty, clusters2=c2)
    thin: dict[str, float] = {}
    if groups:
        for k in names:
            if k.startswith("_"):
                continue
            before = float(np.std(data[k]))
            after = float(np.sqrt(np.dot(columns[k], columns[k]) / len(columns[k])))  # mean 0
            if before > 0 and after / before < THIN_RATIO:
                thin[k] = after / before
    return Prepared(columns=columns, constant=not groups, absorbed=absorbed, cov=cov,
                    markets=markets, thin=thin)
