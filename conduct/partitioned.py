"""Estimate a study on a Parquet dataset partitioned by market, one part at a time.

For panels larger than memory (``partitioned = true`` under ``[panel]``).  The
dataset is read as a ``dask.dataframe`` whose partitions hold whole markets
(:mod:`conduct.parquet_dataset`); every partition is reduced to small arrays
(:mod:`conduct.crossprod`) and the reductions are added in a tree, so memory
grows with the columns and periods, never with the rows.  Three reads:

1. **Demand cross-products.**  Market means are removed inside each part;
   period effects enter as explicit dummy columns, partialled out of the summed
   cross-products.  2SLS of demand follows.
2. **Supply cross-products.**  With demand's estimates each part builds the
   slope, keeps the rows where it is negative, and forms ``Q* = Q/|dQ/dP|``, the
   candidates' dependent variables ``P - h Q*`` and ``dQ*/d alpha`` (for the
   sequential variance).  2SLS of the supply relation for price and for each
   candidate follows.
3. **Scores.**  Each part computes the residuals of both stages on its rows and
   sums the scores ``z_i e_i`` by market; the outer products of those sums (or of
   the row scores, for robust errors) give the cluster-robust covariance of
   demand, the naive and the sequential (Newey & McFadden 1994, sec. 6)
   covariance of the supply relation, the candidates' Wald tests and Hansen's J.

The conventions are those of :mod:`conduct.iv` and :mod:`conduct.supply`
(degrees of freedom, the cluster small-sample factor, absorbed effects nested
in clusters not counted), and the numbers equal the in-memory path's
(``tests/test_partitioned.py``).  Computations run on the default Dask
scheduler (an active ``distributed.Client`` if there is one, else local
threads) or on the scheduler at ``scheduler=ADDRESS``.
"""

from __future__ import annotations

import contextlib
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from scipy import stats

from conduct.absorb import dense_codes
from conduct.crossprod import (
    TSLS,
    Moments,
    check_design,
    hansen_j,
    merge_all,
    moments,
    partial,
    partial_rows,
    sandwich,
    tsls,
)
from conduct.demand import demand_columns, price_slope
from conduct.errors import ConductError, DataError, EstimationError, StudyFileError
from conduct.executor import check_workers
from conduct.identify import Identification, check_identification
from conduct.iv import group_sums
from conduct.parquet_dataset import (
    FILE,
    KEEP,
    KIND,
    KINDS,
    PARTITION_ROWS,
    Dataset,
    dask_frame,
    discover,
    meta_frame,
    read_columns,
)
from conduct.partitioned_result import Coefficients, PartitionedResult, coefficients
from conduct.study import Study, load_study
from conduct.supply import QSTAR, CandidateTest, supply_columns
from conduct.tableio import MARKET, PERIOD, TIME

__all__ = ["Coefficients", "PartitionedResult", "check_partitioned", "estimate_partitioned"]

FANIN = 16  # reductions added per node of the tree
NOT_COMPUTED = (
    "first-stage F, effective F and Stock-Yogo readings",
    "endogeneity test",
    "Anderson-Rubin sets (price coefficient and theta) and AR tests of the candidates",
    "Rivers-Vuong menu test",
    "marginal cost, markup and Lerner index per row, by period and by market",
    "median elasticity",
    "report, figures and tables",
)


# ----------------------------------------------------------------------------------------
# Designs and the columns of one part
# ----------------------------------------------------------------------------------------

@dataclass(frozen=True, slots=True)
class _Design:
    """Column names of one stage by role; the stacked order is ``names``."""

    deps: tuple[str, ...]
    exog: tuple[str, ...]
    endog: tuple[str, ...]
    instr: tuple[str, ...]
    extra: tuple[str, ...] = ()

    @property
    def names(self) -> tuple[str, ...]:
        return (*self.deps, *self.exog, *self.endog, *self.instr, *self.extra)

    def at(self, names: tuple[str, ...] | list[str]) -> list[int]:
        return [self.names.index(c) for c in names]

    @property
    def x(self) -> list[int]:
        return self.at([*self.exog, *self.endog])

    @property
    def z(self) -> list[int]:
        return self.at([*self.exog, *self.instr])

    @property
    def coef_names(self) -> tuple[str, ...]:
        return (*self.exog, *self.endog)


def _effects(study: Study) -> tuple[bool, bool]:
    eff = study.demand.effects
    return "market" in eff, "period" in eff


def _demand_data(f: pd.DataFrame, study: Study) -> tuple[dict[str, np.ndarray], _Design]:
    cols = demand_columns(f, study)
    data = dict(cols.data)
    exog = cols.exog
    if not any(_effects(study)):
        data["const"] = np.ones(len(f))
        exog = ("const", *exog)
    return data, _Design(("_y",), exog, cols.endog, cols.instr)


def _slope(f: pd.DataFrame, study: Study, coef: dict[str, float], price_name: str
           ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Slope, its gradient in the price terms (n, 1 + rotators), and the elasticity."""
    p = f[study.panel.price].to_numpy(dtype=float)
    q = f[study.panel.quantity].to_numpy(dtype=float)
    rot = {r: f[r].to_numpy(dtype=float) for r in study.demand.rotators}
    slope, b_price = price_slope(coef, price_name, rot, p, q, study.demand.form)
    grad = np.column_stack([np.ones(len(f)), *rot.values()])
    if study.demand.form == "linear":
        return slope, grad, slope * p / q
    return slope, grad * (q / p)[:, None], b_price


def _h(f: pd.DataFrame, study: Study) -> np.ndarray | None:
    """Herfindahl index per row (concentration column, else 1/sellers), or None."""
    if study.panel.concentration:
        return f[study.panel.concentration].to_numpy(dtype=float)
    if study.panel.sellers:
        return 1.0 / f[study.panel.sellers].to_numpy(dtype=float)
    return None


def _candidates(study: Study) -> tuple[tuple[str, float | None], ...]:
    """Candidates that can be tested: fixed theta, or Cournot when H is known."""
    has_h = bool(study.panel.concentration or study.panel.sellers)
    return tuple((c.name, c.theta) for c in study.candidates if c.theta is not None or has_h)


def _supply_data(fs: pd.DataFrame, study: Study, slope: np.ndarray, grad: np.ndarray,
                 terms: tuple[str, ...]) -> tuple[dict[str, np.ndarray], _Design]:
    assert study.supply is not None
    data, raw = supply_columns(fs, study)
    p, q = data["_p"], data["Q"]
    qstar = -q / slope
    dq = (q / slope**2)[:, None] * grad
    data[QSTAR] = qstar
    data.update(raw)
    h = _h(fs, study)
    deps = ["_p"]
    cournot = False
    for name, theta in _candidates(study):
        hc = np.full(len(fs), theta) if theta is not None else h
        assert hc is not None
        cournot |= theta is None
        deps.append(f"_dep:{name}")
        data[deps[-1]] = p - hc * qstar
    extra = []
    for j, term in enumerate(terms):
        extra.append(f"_dq:{term}")
        data[extra[-1]] = dq[:, j]
    if cournot:
        assert h is not None
        for j, term in enumerate(terms):
            extra.append(f"_hdq:{term}")
            data[extra[-1]] = h * dq[:, j]
    exog = tuple(study.supply.cost_shifters)
    if not any(_effects(study)):
        data["const"] = np.ones(len(fs))
        exog = ("const", *exog)
    endog = (QSTAR, "Q") if study.supply.cost_slope else (QSTAR,)
    return data, _Design(tuple(deps), exog, endog, tuple(raw), tuple(extra))


def _stack(data: dict[str, np.ndarray], design: _Design, n: int) -> np.ndarray:
    names = design.names
    return np.column_stack([data[c] for c in names]) if n else np.zeros((0, len(names)))


# ----------------------------------------------------------------------------------------
# The three passes (run on the workers, one part each)
# ----------------------------------------------------------------------------------------

@dataclass(frozen=True, slots=True)
class _Stage:
    """One stage solved: what the workers need for the next pass, and the fit."""

    design: _Design
    labels: np.ndarray
    gamma: np.ndarray | None
    fit: TSLS
    gram: np.ndarray
    n: int
    markets: int
    penalty: int

    def coef(self, col: int = 0) -> dict[str, float]:
        return dict(zip(self.design.coef_names, self.fit.b[:, col], strict=True))

    def scores(self, f: pd.DataFrame, data: dict[str, np.ndarray], market_fe: bool
               ) -> tuple[np.ndarray, np.ndarray]:
        """Row scores ``z_i e_i`` for each dependent variable (n, d kz) and ``e'e`` (d,)."""
        a = _stack(data, self.design, len(f))
        tpos = pd.Index(self.labels).get_indexer(f[PERIOD].to_numpy())
        rows = partial_rows(a, dense_codes(f[MARKET].to_numpy()), tpos, self.gamma,
                            market_fe=market_fe)
        d = len(self.design.deps)
        e = rows[:, :d] - rows[:, self.design.x] @ self.fit.b
        z = rows[:, self.design.z]
        return (np.column_stack([z * e[:, [j]] for j in range(d)]) if len(f)
                else np.zeros((0, d * len(self.design.z)))), (e * e).sum(axis=0)


def _kept(part: pd.DataFrame) -> pd.DataFrame:
    return part.loc[part[KEEP].to_numpy()]


def _pass_demand(part: pd.DataFrame, study: Study) -> Moments:
    f = _kept(part)
    data, design = _demand_data(f, study)
    market_fe, period_fe = _effects(study)
    dropped = part.loc[~part[KEEP].to_numpy()]
    scalars = {"dropped": float(len(dropped))}
    for c in (*read_columns(study), MARKET, PERIOD):
        if c in dropped.columns:
            scalars[f"missing:{c}"] = float(dropped[c].isna().sum())
    for code in np.unique(f[KIND].to_numpy()):
        scalars[f"min:file_kind:{int(code)}"] = float(f.loc[f[KIND] == code, FILE].min())
    return moments(_stack(data, design, len(f)), dense_codes(f[MARKET].to_numpy()),
                   f[PERIOD].to_numpy(), f[TIME].to_numpy(), market_fe=market_fe,
                   period_fe=period_fe, scalars=scalars)


def _supply_rows(f: pd.DataFrame, study: Study, demand: _Stage
                 ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    slope, grad, elasticity = _slope(f, study, demand.coef(), demand.design.endog[0])
    return slope, grad, elasticity, slope < 0


def _pass_supply(part: pd.DataFrame, study: Study, demand: _Stage) -> Moments:
    f = _kept(part)
    slope, grad, _, neg = _supply_rows(f, study, demand)
    fs = f.loc[neg]
    data, design = _supply_data(fs, study, slope[neg], grad[neg], demand.design.endog)
    h = _h(fs, study)
    scalars = {"qstar": float(data[QSTAR].sum()),
               "h_qstar": float((h * data[QSTAR]).sum()) if h is not None else 0.0}
    market_fe, period_fe = _effects(study)
    return moments(_stack(data, design, len(fs)), dense_codes(fs[MARKET].to_numpy()),
                   fs[PERIOD].to_numpy(), fs[TIME].to_numpy(), market_fe=market_fe,
                   period_fe=period_fe, scalars=scalars)


@dataclass(frozen=True, slots=True)
class _Scores:
    """Sum of score outer products (by market or by row) and of squared residuals."""

    meat: np.ndarray
    ee: np.ndarray
    elasticity: float
    wrong_sign: int


def _pass_scores(part: pd.DataFrame, study: Study, demand: _Stage, supply: _Stage | None
                 ) -> _Scores:
    f = _kept(part)
    market_fe, _ = _effects(study)
    data, _ = _demand_data(f, study)
    u, ee = demand.scores(f, data, market_fe)
    slope, grad, elasticity, neg = _supply_rows(f, study, demand)
    if supply is not None:
        fs = f.loc[neg]
        sdata, _ = _supply_data(fs, study, slope[neg], grad[neg], demand.design.endog)
        us, ees = supply.scores(fs, sdata, market_fe)
        full = np.zeros((len(f), us.shape[1]))
        full[neg] = us
        u = np.column_stack([u, full])
        ee = np.concatenate([ee, ees])
    if study.demand.errors == "cluster" and len(f):
        u = group_sums(dense_codes(f[MARKET].to_numpy()), u)
    return _Scores(u.T @ u, ee, float(elasticity.sum()), int((~neg).sum()))


def _add_scores(items: list[_Scores]) -> _Scores:
    return _Scores(sum(s.meat for s in items), sum(s.ee for s in items),
                   sum(s.elasticity for s in items), sum(s.wrong_sign for s in items))


# ----------------------------------------------------------------------------------------
# Running the passes
# ----------------------------------------------------------------------------------------

def _tree(items: list[Any], combine: Callable[[list[Any]], Any]) -> Any:
    from dask import delayed

    while len(items) > 1:
        items = [delayed(combine)(items[i:i + FANIN]) for i in range(0, len(items), FANIN)]
    return items[0]


@contextlib.contextmanager
def _scheduler(address: str | None) -> Iterator[Callable[[Any], Any]]:
    """``compute(delayed)`` on the default scheduler, or on the cluster at ``address``."""
    try:
        import dask
    except ImportError:
        raise ConductError(
            "A partitioned study is read with dask, which is not installed; install "
            "conduct[dask] (pip install \"conduct[dask]\")."
        ) from None
    if address is None:
        yield lambda obj: dask.compute(obj)[0]
        return
    try:
        import distributed
    except ImportError:
        raise ConductError(
            "--scheduler needs dask.distributed, which is not installed; install "
            "conduct[dask] (pip install \"conduct[dask]\")."
        ) from None
    try:
        client = distributed.Client(address, timeout="10s", set_as_default=False)
    except (OSError, TimeoutError, ValueError) as exc:
        raise ConductError(f"Cannot reach the Dask scheduler at '{address}': {exc}.") from None
    try:
        check_workers(client, address)
        yield lambda obj: client.compute(obj).result()
    finally:
        client.close()


def _unsupported(study: Study, ident: Identification) -> list[str]:
    d = study.demand
    out = []
    if study.panel.market is None:
        out.append("a panel without panel.market (the dataset is split by market)")
    if d.estimator != "2sls":
        out.append(f"estimator = \"{d.estimator}\"")
    if d.errors == "hac":
        out.append("errors = \"hac\"")
    if d.errors == "cluster" and d.cluster not in ((), ("market",)):
        out.append(f"cluster = {list(d.cluster)}")
    if study.sources:
        out.append("[[sources]]")
    if study.firms is not None:
        out.append("[firms]")
    if study.derived:
        out.append("[derive]")
    if ident.mode == "regime-shift":
        out.append("conduct by regime shift (log demand without rotators, with regimes)")
    return out


def _not_computed(study: Study) -> tuple[str, ...]:
    out = list(NOT_COMPUTED)
    s = study.supply
    if study.inference.bootstrap > 0:
        out.append(f"cluster bootstrap ([inference] bootstrap = {study.inference.bootstrap})")
    if s is not None:
        for flag, what in ((s.regimes, "theta by regime"), (s.groups, "theta by group"),
                           (s.break_test, "break test"),
                           (s.rolling_window, "rolling-window theta")):
            if flag:
                out.append(what)
    return tuple(out)


def _solve(m: Moments, design: _Design, study: Study, stage: str) -> _Stage:
    market_fe, period_fe = _effects(study)
    t, g = len(m.labels), m.markets
    for name, own, other, what in (("market", g, t, "period"), ("period", t, g, "market")):
        if _effects(study)[name == "period"] and other == 1:
            raise EstimationError(
                f"The {stage} stage has a single {what} in the rows used, so {name} effects "
                f"absorb every row ({m.n} rows, {own} {name}s): nothing is left to "
                f"estimate. Drop \"{name}\" from [demand] effects or add {what}s."
            )
    ke, kz = len(design.endog), len(design.instr)
    if kz < ke:
        raise EstimationError(
            f"{kz} excluded instrument(s) for {ke} endogenous regressor(s) in the {stage} "
            "stage: the equation is under-identified; add instruments."
        )
    if study.demand.errors == "cluster" and g < 2:
        raise EstimationError(
            f"The {stage} stage asks for cluster-robust errors by market, but the rows used "
            "hold a single market. Use errors = \"robust\" under [demand]."
        )
    p = partial(m, market_fe=market_fe, period_fe=period_fe)
    penalty = p.df_absorbed
    if study.demand.errors == "cluster":
        # absorbed effects nested in the market clusters are not counted
        if market_fe:
            penalty -= g
        if period_fe and np.all(m.counts == 1):
            penalty -= t
        penalty = max(penalty, 0)
    k = len(design.x)
    if m.n - k - penalty <= 0:
        raise EstimationError(f"Too few observations ({m.n}) in the {stage} stage for {k} "
                              f"coefficients plus {penalty} absorbed effects.")
    check_design(p, m, design.names, design.x, design.z, stage)
    fit = tsls(p.gram, design.at(design.deps), design.x, design.z)
    return _Stage(design, m.labels, p.gamma, fit, p.gram, m.n, g, penalty)


# ----------------------------------------------------------------------------------------
# The estimate
# ----------------------------------------------------------------------------------------

def _periods(m: Moments, dataset: Dataset, study: Study) -> tuple[str, str, str]:
    kinds = {int(k.rsplit(":", 1)[1]): int(v) for k, v in m.scalars.items()
             if k.startswith("min:file_kind:")}
    if len(kinds) > 1:
        (a, fa), (b, fb) = sorted(kinds.items())[:2]
        raise DataError(
            f"Data directory {dataset.root}: period column '{study.panel.period}' holds "
            f"{KINDS[a]} periods in {dataset.files[fa].path} but {KINDS[b]} periods in "
            f"{dataset.files[fb].path}; write the periods the same way in every file."
        )
    kind = KINDS[next(iter(kinds))] if kinds else "integer"
    order = (np.argsort(m.labels.astype(str), kind="stable") if kind == "date"
             else np.argsort(m.tkey, kind="stable"))
    return kind, str(m.labels[order[0]]), str(m.labels[order[-1]])


def _j(stage: _Stage, meat: np.ndarray, ee: float, kind: str, col: int
       ) -> tuple[float, int, float] | None:
    design = stage.design
    kx, ke, kz = len(design.exog), len(design.endog), len(design.instr)
    if kz <= ke or (kind == "cluster" and stage.markets <= kx + kz):
        return None
    if kind == "homoskedastic":
        z = design.z
        meat = ee * stage.gram[np.ix_(z, z)] / stage.n
    stat = hansen_j(stage.gram, design.at(design.deps)[col], design.x, design.z, meat,
                    stage.n)
    return stat, kz - ke, float(stats.chi2.sf(stat, kz - ke))


def _naive_cov(stage: _Stage, meat: np.ndarray, ee: float, kind: str) -> np.ndarray:
    k = len(stage.design.x)
    if kind == "homoskedastic":
        return ee / (stage.n - k - stage.penalty) * stage.fit.bread
    lhs = stage.n * stage.fit.bread @ stage.fit.pi.T
    return sandwich(lhs, meat, kind=kind, n=stage.n, k=k, penalty=stage.penalty,
                    clusters=stage.markets)


def _open(study: Study | str | Path, rows_per_partition: int
          ) -> tuple[Study, Identification, Dataset]:
    """Load the study, refuse what this path does not support, list the dataset."""
    st = study if isinstance(study, Study) else load_study(study)
    ident = check_identification(st)
    bad = _unsupported(st, ident)
    if bad:
        raise StudyFileError(
            f"Study file {st.path}: the partitioned path (partitioned = true) does not "
            f"support {'; '.join(bad)}. It estimates linear or log demand with rotators by "
            "2SLS, with market and period effects and errors = \"cluster\" (by market), "
            "\"robust\" or \"homoskedastic\". Load the data as one file for the rest."
        )
    return st, ident, discover(st, rows_per_partition)


def _dropped(m: Moments, study: Study) -> tuple[int, dict[str, int]]:
    """Rows dropped for missing values, and the missing cells by column."""
    names = {MARKET: study.panel.market, PERIOD: study.panel.period}
    detail = {names.get(c, c): int(v) for c, v in (
        (k.split(":", 1)[1], v) for k, v in m.scalars.items() if k.startswith("missing:")) if v}
    return int(m.scalars.get("dropped", 0)), dict(sorted(detail.items()))


def _first_pass(st: Study, dataset: Dataset, compute: Callable[[Any], Any]
                ) -> tuple[list[Any], Moments, tuple[str, str, str]]:
    """Read and validate every part, reduce it to demand's moments; the parts for later."""
    from dask import delayed

    parts = dask_frame(dataset, st).to_delayed()
    mom = compute(_tree([delayed(_pass_demand)(p, st) for p in parts], merge_all))
    if mom.n == 0:
        raise DataError(f"Data directory {dataset.root}: every row has a missing value; "
                        "nothing is left.")
    return parts, mom, _periods(mom, dataset, st)


def check_partitioned(study: Study | str | Path, *, scheduler: str | None = None,
                      rows_per_partition: int = PARTITION_ROWS) -> str:
    """Read and validate every part of the dataset once; estimate nothing.

    Parameters
    ----------
    study : Study, str or Path
    scheduler : str or None
        As for :func:`estimate_partitioned`.
    rows_per_partition : int

    Returns
    -------
    str
        Lines describing the dataset (files, parts, rows, markets, periods).

    Raises
    ------
    conduct.errors.ConductError
        As :func:`estimate_partitioned` for the data.
    """
    st, _, dataset = _open(study, rows_per_partition)
    with _scheduler(scheduler) as compute:
        _, mom, (kind, first, last) = _first_pass(st, dataset, compute)
    dropped, detail = _dropped(mom, st)
    lines = [f"{dataset.root}: Parquet dataset by market ({dataset.layout}), "
             f"{len(dataset.files)} files read in {len(dataset.parts)} parts",
             f"rows {mom.n}, markets {mom.markets}, periods {len(mom.labels)} ({first} to "
             f"{last}, {kind} periods)"]
    if dropped:
        lines.append(f"dropped {dropped} rows with missing values ("
                     + ", ".join(f"{k}: {v}" for k, v in detail.items()) + ")")
    return "\n".join([*lines, *dataset.warnings])


def estimate_partitioned(study: Study | str | Path, *, scheduler: str | None = None,
                         rows_per_partition: int = PARTITION_ROWS) -> PartitionedResult:
    """Estimate demand, theta and the candidate tests on a market-partitioned dataset.

    Parameters
    ----------
    study : Study, str or Path
        A study (or study file) whose ``[panel] file`` is a directory holding a Parquet
        dataset partitioned by market (``partitioned = true``).
    scheduler : str or None
        Address of a Dask scheduler; None uses the default scheduler (an active
        ``distributed.Client``, else local threads).  Workers must see the files.
    rows_per_partition : int
        Markets are grouped into parts of about this many rows.

    Returns
    -------
    PartitionedResult

    Raises
    ------
    conduct.errors.ConductError
        For a study option the partitioned path does not support, and for any
        user error in the data (named by file, column and rows).
    """
    st, ident, dataset = _open(study, rows_per_partition)
    kind = st.demand.errors
    _, ddesign = _demand_data(meta_frame(st), st)
    with _scheduler(scheduler) as compute:
        from dask import delayed

        parts, mom_d, (_, first, last) = _first_pass(st, dataset, compute)
        demand = _solve(mom_d, ddesign, st, "demand")
        supply = None
        mom_s = None
        if st.supply is not None:
            mom_s = compute(_tree([delayed(_pass_supply)(p, st, demand) for p in parts],
                                  merge_all))
            if mom_s.n < 10:
                raise DataError(
                    f"The estimated demand slope is negative at only {mom_s.n} of {mom_d.n} "
                    "rows; the supply relation cannot be estimated. Check the demand "
                    "specification."
                )
            empty = meta_frame(st)
            _, sdesign = _supply_data(empty, st, np.zeros(0), np.zeros((0, len(ddesign.endog))),
                                      ddesign.endog)
            supply = _solve(mom_s, sdesign, st, "supply")
        scores = compute(_tree([delayed(_pass_scores)(p, st, demand, supply) for p in parts],
                               _add_scores))
    kzd = len(ddesign.z)
    dcov = _naive_cov(demand, scores.meat[:kzd, :kzd], float(scores.ee[0]), kind)
    dcoef = coefficients(ddesign.coef_names, demand.fit.b[:, 0], dcov)
    demand_j = _j(demand, scores.meat[:kzd, :kzd], float(scores.ee[0]), kind, 0)
    scal = mom_s.scalars if mom_s is not None else {}
    warnings = [*ident.warnings, *dataset.warnings]
    dropped, detail = _dropped(mom_d, st)
    if dropped:
        warnings.append(f"{dropped} rows with missing values were dropped.")
    wrong = scores.wrong_sign / mom_d.n
    if wrong > 0:
        warnings.append(
            f"The estimated demand slope is not negative at {wrong:.1%} of observations; "
            "those rows get no markup regressor and are left out of the supply relation."
        )
    if st.supply is not None and len(_candidates(st)) < len(st.candidates):
        warnings.append("No sellers or concentration column: the Cournot candidate was not "
                        "tested.")
    if kind == "cluster" and mom_d.markets < 20:
        warnings.append(f"Only {mom_d.markets} market clusters: cluster-robust inference may "
                        "be unreliable.")
    conventions = {"demand": _convention(kind, demand)}
    out: dict[str, Any] = {
        "supply": None, "supply_se_naive": None, "supply_hansen_j": None, "theta": None,
        "se": None, "se_naive": None, "ci": None, "tests": (), "verdict": None,
        "not_rejected": (), "cournot_benchmark": None, "supply_rows": 0,
    }
    if supply is not None and mom_s is not None:
        out = _conduct(st, demand, supply, scores, kind, scal)
        conventions["supply"] = _convention(kind, supply)
        conventions["sequential"] = (
            "supply influence plus demand influence times the derivative of the supply "
            "moments in the demand coefficients (Newey & McFadden 1994, sec. 6); "
            + _convention(kind, supply, n=mom_d.n, clusters=mom_d.markets))
    return PartitionedResult(
        study=st, demand=dcoef, demand_hansen_j=demand_j,
        elasticity_mean=scores.elasticity / mom_d.n,
        wrong_sign_share=wrong, **out, rows=mom_d.n, markets=mom_d.markets,
        periods=len(mom_d.labels), first_period=first, last_period=last,
        dropped_rows=dropped, dropped_detail=detail,
        files=len(dataset.files), partitions=len(dataset.parts), root=dataset.root,
        not_computed=_not_computed(st), warnings=tuple(warnings), conventions=conventions,
    )


def _convention(kind: str, stage: _Stage, n: int | None = None,
                clusters: int | None = None) -> str:
    n = stage.n if n is None else n
    g = stage.markets if clusters is None else clusters
    dof = f"n-k-a = {n}-{len(stage.design.x)}-{stage.penalty}"
    if kind == "homoskedastic":
        return f"homoskedastic, s2 = e'e/({dof})"
    if kind == "robust":
        return f"heteroskedasticity-robust HC1: n/({dof}) x HC0"
    return (f"cluster-robust, {g} clusters: G/(G-1) x (n-1)/({dof}) x sandwich (absorbed "
            "effects nested in clusters not counted)")


def _conduct(st: Study, demand: _Stage, supply: _Stage, scores: _Scores, kind: str,
             scal: dict[str, float]) -> dict[str, Any]:
    """Theta, its sequential standard error and the candidate tests."""
    sd, ss = demand.design, supply.design
    kzd, kzs = len(sd.z), len(ss.z)
    n_all, n_s = demand.n, supply.n
    i_theta = ss.coef_names.index(QSTAR)
    zidx = ss.z
    zdq = supply.gram[np.ix_(zidx, ss.at([f"_dq:{t}" for t in sd.endog]))]
    hdq_names = [f"_hdq:{t}" for t in sd.endog]
    zhdq = (supply.gram[np.ix_(zidx, ss.at(hdq_names))] if hdq_names[0] in ss.extra
            else None)
    a_mat = n_s * supply.fit.bread @ supply.fit.pi.T  # (G'WG)^-1 G'W with G = Z'X/n
    l_demand = n_all * demand.fit.bread @ demand.fit.pi.T
    l_supply = (n_all / n_s) * a_mat
    kxd = len(sd.exog)
    terms = list(range(kxd, kxd + len(sd.endog)))  # demand coefficients entering the slope
    level = st.inference.level

    def sequential(col: int, theta: float | None, cournot: bool) -> np.ndarray:
        delta = supply.fit.b[i_theta, col]
        gsum = delta * zdq
        if cournot:
            assert zhdq is not None
            gsum = gsum + zhdq
        elif theta is not None:
            gsum = gsum + theta * zdq
        g_alpha = np.zeros((kzs, len(sd.x)))
        g_alpha[:, terms] = -gsum / n_s
        lhs = np.hstack([(a_mat @ g_alpha) @ l_demand, l_supply])
        block = list(range(kzd)) + list(range(kzd + col * kzs, kzd + (col + 1) * kzs))
        meat = scores.meat[np.ix_(block, block)]
        return sandwich(lhs, meat, kind=kind, n=n_all, k=len(ss.x), penalty=supply.penalty,
                        clusters=demand.markets)

    main = slice(kzd, kzd + kzs)
    cov = sequential(0, None, False)
    coef = coefficients(ss.coef_names, supply.fit.b[:, 0], cov)
    naive = _naive_cov(supply, scores.meat[main, main], float(scores.ee[1]), kind)
    naive_se = np.sqrt(np.clip(np.diag(naive), 0.0, None))
    theta, se = float(coef.estimate[i_theta]), float(coef.se[i_theta])
    zc = float(stats.norm.ppf(0.5 + level / 2))
    tests = []
    for col, (name, th) in enumerate(_candidates(st), start=1):
        cov_c = sequential(col, th, th is None)
        delta = float(supply.fit.b[i_theta, col])
        se_c = float(np.sqrt(cov_c[i_theta, i_theta]))
        stat = (delta / se_c) ** 2
        pval = float(stats.chi2.sf(stat, 1))
        what = "theta = H (Herfindahl, or 1/N)" if th is None else f"theta = {th:g}"
        tests.append(CandidateTest(name=name, theta=th, delta=delta, se=se_c,
                                   stat=float(stat), p=pval, rejected=pval < 1 - level,
                                   null=f"{name}: {what}"))
    kept = tuple(t.name for t in tests if not t.rejected)
    bench = (scal["h_qstar"] / scal["qstar"]
             if st.panel.concentration or st.panel.sellers else None)
    return {
        "supply": coef, "supply_se_naive": naive_se,
        "supply_hansen_j": _j(supply, scores.meat[main, main], float(scores.ee[1]), kind, 0),
        "theta": theta, "se": se, "se_naive": float(naive_se[i_theta]),
        "ci": (theta - zc * se, theta + zc * se), "tests": tuple(tests),
        "verdict": kept[0] if len(kept) == 1 else "inconclusive", "not_rejected": kept,
        "cournot_benchmark": bench, "supply_rows": n_s,
    }
