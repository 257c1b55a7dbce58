"""Fast paths of loading a panel and of the derived tables give what the plain way gives.

``tableio.period_codes`` and ``tableio.market_codes`` parse a key column on its
distinct values; the plain way parses every row (``tableio._parse_rows``,
``tableio.market_labels``) and codes the labels with ``pandas.factorize``.
``assemble._refuse_duplicates`` compares integer codes; the plain way is
``DataFrame.duplicated`` on the labels.  ``load_panel`` describes the panel
from those codes; the plain way groups the frame by market with pandas.
``derived.derive`` sums every per-row term of every model in one buffer per
grouping; the plain way (kept below as it was written before) stacks one matrix
per model and weight and sums each.  Every comparison here is exact: a fast
path that changes a single bit of a result fails.
"""

from __future__ import annotations

import types
from dataclasses import replace
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from conftest import BASE_SPEC, cournot_frame, to_toml
from scipy import stats

from conduct.assemble import _Keys, _refuse_duplicates
from conduct.derived import derive
from conduct.design import codes
from conduct.errors import DataError
from conduct.iv import CovSpec, cluster_cov, group_sums
from conduct.panel import MARKET, PERIOD, TIME, load_panel
from conduct.study import load_study
from conduct.tableio import (
    _parse_rows,
    market_codes,
    market_labels,
    period_codes,
    take_labels,
)

PATH = Path("panel.csv")


def _period_columns() -> dict[str, pd.Series]:
    rng = np.random.default_rng(5)
    t = rng.integers(0, 14, 300)
    stamps = pd.Timestamp("2020-01-01") + pd.to_timedelta(7 * t, unit="D")
    return {
        "integers": pd.Series(2000 + t),
        "negative integers": pd.Series(t - 7),
        "whole floats": pd.Series((2000 + t).astype(float)),
        "integer text, padded": pd.Series([(" " if v % 3 == 0 else "") + f"{2000 + v}"
                                           for v in t], dtype=object),
        "integer text, leading zeros": pd.Series([f"{v:03d}" if v % 2 else str(v) for v in t],
                                                 dtype="str"),
        "quarters, two spellings": pd.Series([f"{2019 + v // 4}Q{v % 4 + 1}" if v % 2 else
                                              f"{2019 + v // 4}-q{v % 4 + 1}" for v in t],
                                             dtype="str"),
        "quarters first": pd.Series([f"Q{v % 4 + 1} {2019 + v // 4}" for v in t], dtype=object),
        "months": pd.Series([f"{2019 + v // 12}/{v % 12 + 1}" for v in t], dtype="str"),
        "ISO dates as text": pd.Series([str(s.date()) for s in stamps], dtype="str"),
        "timestamps": pd.Series(stamps),
        "timestamps with hours": pd.Series(stamps + pd.to_timedelta(t % 2, unit="h")),
        "timestamps with a time zone": pd.Series(stamps.tz_localize("Europe/Paris")),
        "mixed Python objects": pd.Series([int(2000 + v) if v % 2 else f"{2000 + v}"
                                           for v in t], dtype=object),
        "categories": pd.Series([f"{2019 + v // 4}Q{v % 4 + 1}" for v in t],
                                dtype="category"),
    }


@pytest.mark.parametrize("kind", list(_period_columns()))
def test_period_codes_equal_parsing_every_row(kind: str) -> None:
    values = _period_columns()[kind]
    rows = np.arange(len(values)) + 2
    labels, t, period_kind = _parse_rows(values, "quarter", PATH, rows, "Data file")
    coded = period_codes(values, "quarter", PATH, rows)
    assert coded.kind == period_kind
    assert coded.codes.dtype == np.int64 and coded.t.dtype == np.int64
    assert np.all(np.diff(coded.t) > 0)  # codes in calendar order
    np.testing.assert_array_equal(coded.t[coded.codes], t)
    assert list(coded.labels[coded.codes]) == list(labels)


@pytest.mark.parametrize("values", [
    pd.Series(["2019Q1", "2019Q2", "2019-05-01", "2019Q2"], dtype="str"),
    pd.Series(["1", "2", "x", "2", "x"], dtype=object),
    pd.Series([2000.0, 2000.5, 2001.0, 2000.5]),
    pd.Series(["2019-01", "2019-13", "2019-13"], dtype="str"),
    pd.Series([True, False, True]),
])
def test_period_errors_name_every_row_as_before(values: pd.Series) -> None:
    rows = np.arange(len(values)) + 2
    with pytest.raises(DataError) as plain:
        _parse_rows(values, "quarter", PATH, rows, "Data file")
    with pytest.raises(DataError) as fast:
        period_codes(values, "quarter", PATH, rows)
    assert str(fast.value) == str(plain.value)


@pytest.mark.parametrize("values", [
    pd.Series(np.repeat(np.arange(40, 0, -1), 3)),
    pd.Series([f" M{v} " if v % 2 else f"M{v}" for v in np.repeat(np.arange(30), 4)],
              dtype="str"),
    pd.Series(["Zürich", "zebra", "Ärhus", "apple", "b", "Zürich"], dtype=object),
    pd.Series(np.repeat([3.0, 1.0, 2.0], 2)),
    pd.Series([0.5, -0.0, 0.0, 1.5]),  # -0.0 and 0.0 print differently: row by row
    pd.Series([1, "1", 2.0], dtype=object),
])
def test_market_codes_equal_labels_then_factorize(values: pd.Series) -> None:
    plain = market_labels(values)
    expected, uniq = pd.factorize(pd.DataFrame({MARKET: plain})[MARKET], sort=True)
    got, labels = market_codes(values)
    np.testing.assert_array_equal(got, expected)
    assert list(labels) == list(uniq)
    assert list(labels[got]) == list(plain)


def test_take_labels_makes_the_column_pandas_makes() -> None:
    labels = np.asarray(["b", "a", "c"], dtype=object)
    where = np.array([2, 0, 0, 1, 2])
    plain = pd.DataFrame({"x": labels[where]})["x"]
    got = pd.DataFrame({"x": take_labels(labels, where)})["x"]
    pd.testing.assert_series_equal(got, plain)


@pytest.mark.parametrize("layout", ["dense", "sparse"])
def test_duplicate_keys_found_as_dataframe_duplicated(layout: str) -> None:
    rng = np.random.default_rng(11)
    n = 400
    size = 25 if layout == "dense" else 300  # sparse: more cells than 4n + 1024 (hashing)
    markets = rng.integers(0, size, n)
    t = rng.integers(0, size, n)
    markets[-1], t[-1] = markets[n // 2], t[n // 2]  # at least one repeat
    study = types.SimpleNamespace(panel=types.SimpleNamespace(market="region", file=PATH))
    frame = pd.DataFrame({MARKET: [f"m{v}" for v in markets], TIME: t})
    m_codes, m_labels = market_codes(frame[MARKET])
    p = period_codes(pd.Series(t), "quarter", PATH, np.arange(n))
    keys = _Keys(market=m_codes, market_labels=m_labels, periods=p)
    dup = frame.duplicated([MARKET, TIME], keep=False).to_numpy()
    assert dup.any()
    i = int(np.flatnonzero(dup)[0])
    same = np.flatnonzero(((frame[MARKET] == frame[MARKET].iloc[i])
                           & (frame[TIME] == frame[TIME].iloc[i])).to_numpy())
    with pytest.raises(DataError) as err:
        _refuse_duplicates(keys, np.arange(n) + 2, study)  # type: ignore[arg-type]
    assert f"market '{frame[MARKET].iloc[i]}', period '{t[i]}' repeats" in str(err.value)
    assert f"rows {', '.join(str(r + 2) for r in same[:5])}" in str(err.value)
    unique = ~frame.duplicated([MARKET, TIME]).to_numpy()  # first of each pair only
    keys = _Keys(market=m_codes[unique], market_labels=m_labels,
                 periods=replace(p, codes=p.codes[unique]))
    _refuse_duplicates(keys, np.arange(int(unique.sum())), study)  # type: ignore[arg-type]


def _plain_gaps(frame: pd.DataFrame, kind: str) -> int:
    """The gap count as pandas groups it."""
    if kind in ("quarter", "month", "integer"):
        span = frame.groupby(MARKET)[TIME].agg(["min", "max", "count"])
        return int(((span["max"] - span["min"] + 1) - span["count"]).sum())
    all_t = np.sort(frame[TIME].unique())
    pos = {v: i for i, v in enumerate(all_t)}
    gaps = 0
    for _, g in frame.groupby(MARKET):
        idx = [pos[v] for v in g[TIME]]
        gaps += (max(idx) - min(idx) + 1) - len(idx)
    return gaps


@pytest.mark.parametrize("period", ["integer", "date"])
def test_panel_description_equals_pandas_grouping(tmp_path: Path, period: str) -> None:
    rng = np.random.default_rng(3)
    frame = cournot_frame(9, 11, seed=4)
    frame = frame[rng.random(len(frame)) > 0.3].sample(frac=1.0, random_state=2)
    if period == "date":
        frame["quarter"] = [str((pd.Timestamp("2020-01-06") + pd.Timedelta(weeks=int(v) - 2000))
                                .date()) for v in frame["quarter"]]
    frame.loc[frame.index[:4], "income"] = np.nan  # dropped rows under drop_missing
    frame.to_csv(tmp_path / "panel.csv", index=False)
    spec = {**BASE_SPEC, "panel": {**BASE_SPEC["panel"], "drop_missing": True}}
    (tmp_path / "study.toml").write_text(to_toml(spec), encoding="utf-8")
    panel = load_panel(load_study(tmp_path / "study.toml"))
    f, d = panel.frame, panel.description
    periods = f.drop_duplicates(TIME).sort_values(TIME)
    assert d.period_kind == period
    assert d.markets == f[MARKET].nunique()
    assert d.periods == len(periods)
    assert (d.first_period, d.last_period) == (periods[PERIOD].iloc[0], periods[PERIOD].iloc[-1])
    assert d.gaps == _plain_gaps(f, period) > 0
    assert d.dropped_rows == 4
    assert list(f[MARKET]) == sorted(f[MARKET], key=lambda m: (m,))  # markets sorted
    assert (f.groupby(MARKET)[TIME].diff().dropna() > 0).all()  # periods sorted in markets


# ----------------------------------------------------------------------------------------
# derive: one buffer of terms per grouping against one matrix per model (as first written)
# ----------------------------------------------------------------------------------------

def _plain_group_means(p, q, demand, supply, variants, group, labels, level):  # type: ignore[no-untyped-def]
    qstar = supply.qstar
    ok = np.isfinite(qstar)
    slope = demand.slope
    dq = np.zeros_like(demand.slope_grad)
    dq[ok] = (q[ok] / slope[ok] ** 2)[:, None] * demand.slope_grad[ok]
    counts = np.bincount(group, weights=ok.astype(float), minlength=len(labels))
    keep = counts > 0
    names = [lab for lab, k in zip(labels, keep, strict=True) if k]

    def gmeans(m):  # type: ignore[no-untyped-def]
        return (group_sums(group, m) / np.where(keep, counts, 1.0)[:, None])[keep]

    z = float(stats.norm.ppf(0.5 + level / 2))
    qs = np.where(ok, qstar, 0.0)
    v_all = cluster_cov(np.column_stack([demand.fit.influence, supply.theta_influence]),
                        supply.full_cov, 1)
    k_d = demand.fit.influence.shape[1]
    price_mean = gmeans(np.where(ok, p, 0.0)[:, None])[:, 0]
    inv_p = 1.0 / p
    unit = {what: gmeans(np.column_stack([qs * w, dq * w[:, None]]))
            for what, w in (("markup", np.ones_like(p)), ("lerner", inv_p))}
    out = []
    for name, h in variants:
        constant = bool(np.all(h[ok] == h[ok][0])) if ok.any() else True
        pieces = {}
        for what, w in (("markup", np.ones_like(p)), ("lerner", inv_p)):
            if constant:
                means = (float(h[ok][0]) if ok.any() else 0.0) * unit[what]
            else:
                hv = np.where(ok, h, 0.0) * w
                means = gmeans(np.column_stack([hv * qs, dq * hv[:, None]]))
            value = means[:, 0]
            grad = np.zeros((len(value), k_d + 1))
            grad[:, :k_d] = means[:, 1:]
            if name == "estimated":
                grad[:, k_d] = unit[what][:, 0]
            var = np.einsum("gi,ij,gj->g", grad, v_all, grad)
            pieces[what] = (value, np.sqrt(np.clip(var, 0, None)))
        (markup, markup_se), (lerner, lerner_se) = pieces["markup"], pieces["lerner"]
        mc = price_mean - markup
        out.append(pd.DataFrame({
            "model": name, "group": names, "rows": counts[keep].astype(int),
            "mc": mc, "mc_lo": mc - z * markup_se, "mc_hi": mc + z * markup_se,
            "markup": markup, "markup_lo": markup - z * markup_se,
            "markup_hi": markup + z * markup_se,
            "lerner": lerner, "lerner_lo": lerner - z * lerner_se,
            "lerner_hi": lerner + z * lerner_se,
        }))
    return pd.concat(out, ignore_index=True)


def _plain_derive(panel, study, demand, supply):  # type: ignore[no-untyped-def]
    f = panel.frame
    p = f[study.panel.price].to_numpy(dtype=float)
    q = f[study.panel.quantity].to_numpy(dtype=float)
    obs = pd.DataFrame({"market": f[MARKET].array, "period": f[PERIOD].array, "price": p,
                        "quantity": q, "slope": demand.slope,
                        "elasticity": demand.elasticity})
    obs["qstar"] = supply.qstar
    if supply.h is not None:
        obs["herfindahl"] = supply.h
    shares = {}
    variants = [("estimated", np.full(len(f), supply.theta))]
    for c in study.candidates:
        hv = np.full(len(f), c.theta) if c.theta is not None else supply.h
        if hv is not None:
            variants.append((c.name, hv))
    for name, theta in variants:
        markup = theta * supply.qstar
        mc = p - markup
        obs[f"theta_{name}"] = theta if name != "estimated" else supply.theta
        obs[f"marginal_cost_{name}"] = mc
        obs[f"markup_{name}"] = markup
        obs[f"lerner_{name}"] = markup / p
        valid = np.isfinite(mc)
        shares[name] = float(np.mean(mc[valid] < 0)) if valid.any() else float("nan")
    tables = {}
    for key, col in (("period", TIME), ("market", MARKET)):
        labels = (f.drop_duplicates(col).sort_values(col)[PERIOD if key == "period" else MARKET]
                  .astype(str).tolist())
        tables[key] = _plain_group_means(p, q, demand, supply, variants, codes(f[col]), labels,
                                         study.inference.level)
    return obs, shares, tables


def _same_bits(a: pd.DataFrame, b: pd.DataFrame) -> None:
    pd.testing.assert_frame_equal(a, b, check_exact=True)
    for col in a.columns:
        if a[col].dtype.kind == "f":
            assert np.array_equal(a[col].to_numpy().view(np.int64),
                                  b[col].to_numpy().view(np.int64)), col


@pytest.mark.parametrize("case", ["plain", "rows without Q*", "a market without Q*",
                                  "rows shuffled"])
def test_derived_tables_equal_one_matrix_per_model(tmp_path: Path, case: str) -> None:
    frame = cournot_frame(10, 9, seed=8)
    frame.to_csv(tmp_path / "panel.csv", index=False)
    spec = {**BASE_SPEC, "models": {"candidates": ["competitive", "cournot", "collusive",
                                                   {"name": "half", "theta": 0.5}]}}
    (tmp_path / "study.toml").write_text(to_toml(spec), encoding="utf-8")
    study = load_study(tmp_path / "study.toml")
    panel = load_panel(study)
    n = len(panel.frame)
    rng = np.random.default_rng(2)
    if case == "rows shuffled":  # markets not in panel order: group sums by bincount
        order = rng.permutation(n)
        panel = replace(panel, frame=panel.frame.iloc[order].reset_index(drop=True))
    f = panel.frame
    slope = -rng.uniform(0.5, 2.0, n)
    qstar = f["tonnes"].to_numpy() / -slope
    if case == "rows without Q*":
        qstar[rng.random(n) < 0.2] = np.nan
    elif case == "a market without Q*":
        qstar[(f[MARKET] == f[MARKET].iloc[0]).to_numpy()] = np.nan
    k_d = 3
    demand = types.SimpleNamespace(
        slope=slope, elasticity=slope * f["price"].to_numpy() / f["tonnes"].to_numpy(),
        slope_grad=rng.normal(size=(n, k_d)),
        fit=types.SimpleNamespace(influence=rng.normal(size=(n, k_d))))
    supply = types.SimpleNamespace(
        qstar=qstar, h=1.0 / f["sellers"].to_numpy(), theta=0.37,
        theta_influence=rng.normal(size=n),
        full_cov=CovSpec("cluster", clusters=codes(f[MARKET])))
    got = derive(panel, study, demand, supply)  # type: ignore[arg-type]
    obs, shares, tables = _plain_derive(panel, study, demand, supply)
    _same_bits(got.observations, obs)
    assert got.negative_cost_share == shares
    _same_bits(got.by_period, tables["period"])
    _same_bits(got.by_market, tables["market"])


@pytest.mark.parametrize("ids", ["integers", "text"])
def test_market_codes_kept_from_loading_equal_numpy_unique(tmp_path: Path, ids: str) -> None:
    # 12 markets: integer ids 1..12 sort differently as numbers and as text ("10" < "2");
    # every row of market 5 is dropped, so the kept codes must be made dense again
    frame = cournot_frame(12, 6, seed=8)
    if ids == "text":
        frame["region"] = ["Zone " + chr(0x3b1 + (int(v) * 7) % 12) + str(v)
                           for v in frame["region"]]
    frame.loc[frame.index[24:30], "income"] = np.nan
    frame.sample(frac=1.0, random_state=1).to_csv(tmp_path / "panel.csv", index=False)
    spec = {**BASE_SPEC, "panel": {**BASE_SPEC["panel"], "drop_missing": True}}
    (tmp_path / "study.toml").write_text(to_toml(spec), encoding="utf-8")
    panel = load_panel(load_study(tmp_path / "study.toml"))
    expected = np.unique(panel.frame[MARKET].to_numpy(dtype=object), return_inverse=True)[1]
    kept = panel.market_codes()
    assert panel.coded is not None and panel.coded[1] is kept  # served from loading
    np.testing.assert_array_equal(kept, expected)
    assert kept.max() == 10 and not kept.flags.writeable
    # a panel given another frame (as the bootstrap makes) codes its own markets
    other = panel.frame.iloc[::-1].reset_index(drop=True)
    np.testing.assert_array_equal(replace(panel, frame=other).market_codes(), expected[::-1])


def test_row_fingerprints_equal_hashing_each_row_text(tmp_path: Path) -> None:
    # earlier runs' fingerprints must stay comparable: the same text per row (floats to 12
    # significant digits, fields joined by the unit separator) and the same SHA-1 prefix
    import hashlib

    from conduct.panel import row_fingerprints
    frame = cournot_frame(7, 9, seed=12)
    frame["region"] = [f"Zone, {v}" for v in frame["region"]]  # text with a comma
    frame.to_csv(tmp_path / "panel.csv", index=False)
    (tmp_path / "study.toml").write_text(to_toml(BASE_SPEC), encoding="utf-8")
    study = load_study(tmp_path / "study.toml")
    panel = load_panel(study)
    got = row_fingerprints(panel, study.columns())
    f = panel.frame
    parts = [f[c].map(lambda x: f"{x:.12g}") if pd.api.types.is_float_dtype(f[c])
             else f[c].astype(str) for c in study.columns()]
    joined = pd.concat(parts, axis=1).agg("\x1f".join, axis=1)  # row by row, as first written
    expected = [hashlib.sha1(s.encode("utf-8")).hexdigest()[:16] for s in joined]
    assert list(got["hash"]) == expected
    assert list(got["market"]) == list(f[MARKET]) and list(got["period"]) == list(f[PERIOD])
    row = "\x1f".join(f"{v:.12g}" if isinstance(v, float) else str(v)
                      for v in f.loc[3, list(study.columns())])
    assert got["hash"][3] == hashlib.sha1(row.encode("utf-8")).hexdigest()[:16]


@pytest.mark.parametrize("case", ["plain", "text-with-missing", "mixed-object"])
def test_write_csv_equals_pandas_to_csv(tmp_path: Path, case: str) -> None:
    from conduct.tables import spreadsheet_safe, write_csv
    rng = np.random.default_rng(4)
    n = 300
    floats = rng.normal(size=n) * 10.0 ** rng.integers(-12, 15, n)
    floats[:8] = [np.nan, np.inf, -np.inf, -0.0, 5e-324, 1e22, 0.1, 123456789012.0]
    frame = pd.DataFrame({
        "market": pd.array([f'M{i % 7}, "north"\n€' if i % 5 == 0 else f"M{i % 7}"
                            for i in range(n)], dtype="string[pyarrow]"),
        "period": [f"20{10 + i % 9}Q{1 + i % 4}" for i in range(n)],
        "x": floats,
        "count": rng.integers(-5, 5, n),
        "flag": rng.integers(0, 2, n).astype(bool),
        "formula": ["=1+1" if i % 3 == 0 else "plain" for i in range(n)],
    })
    if case == "text-with-missing":
        frame.loc[3, "period"] = None
    elif case == "mixed-object":
        frame["mixed"] = pd.Series([1.5, "a", 2] * (n // 3), dtype=object)
    frame = spreadsheet_safe(frame)
    frame.to_csv(tmp_path / "pandas.csv", index=False, float_format="%.10g")
    if case == "plain":  # the fast path itself, not the fallback to pandas
        with pytest.MonkeyPatch.context() as mp:
            mp.setattr(pd.DataFrame, "to_csv", lambda *a, **k: pytest.fail("fell back"))
            write_csv(frame, tmp_path / "ours.csv", float_format="%.10g")
    else:
        write_csv(frame, tmp_path / "ours.csv", float_format="%.10g")
    assert (tmp_path / "ours.csv").read_bytes() == (tmp_path / "pandas.csv").read_bytes()
