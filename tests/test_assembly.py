"""Assembling the panel: joined sources, firm-level input and derived variables.

Every expected value here is computed by hand in the test (the small panels are
written out in full), never by the code under test.
"""

from __future__ import annotations

import hashlib
import textwrap
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from conftest import Project, assert_user_error, rows_named

from conduct.coverage import source_changes, source_changes_line
from conduct.errors import ConductError, DataError
from conduct.layouts import SourceLayout, layout_files
from conduct.panel import MARKET, PERIOD, describe_assembly, load_panel, write_panel
from conduct.presets import PRESET_LAYOUTS, PRESETS, preset_files, write_study
from conduct.study import load_study

# Hand computations are exact up to float rounding of a handful of operations.
EXACT = 1e-12
ROOT = Path(__file__).resolve().parents[1]

# A small quarterly panel: market A has 2019Q1-Q4, market B has 2019Q1, Q2 and Q4
# (a gap at Q3), so shifts cross both series ends and a gap.
CELLS = [("A", "2019Q1"), ("A", "2019Q2"), ("A", "2019Q3"), ("A", "2019Q4"),
         ("B", "2019Q1"), ("B", "2019Q2"), ("B", "2019Q4")]
X = [1.0, 2.0, 4.0, 8.0, 3.0, 5.0, 7.0]
Y = [2.0, 4.0, 5.0, 10.0, 6.0, 1.0, 0.5]
STUDY = """\
[panel]
file = "panel.csv"
market = "region"
period = "quarter"
price = "price"
quantity = "q"
{panel_extra}
[demand]
instruments = [{instruments}]
{extra}
"""


def _small(root: Path, extra: str = "", *, instruments: str = '"w"', panel_extra: str = "",
           frame: pd.DataFrame | None = None) -> Path:
    if frame is None:
        frame = pd.DataFrame({
            "region": [m for m, _ in CELLS], "quarter": [p for _, p in CELLS],
            "price": [10.0] * 7, "q": [100.0 + i for i in range(7)], "w": [1.0] * 7,
            "x": X, "y": Y,
        })
    frame.to_csv(root / "panel.csv", index=False)
    path = root / "study.toml"
    path.write_text(STUDY.format(extra=textwrap.dedent(extra), instruments=instruments,
                                 panel_extra=panel_extra), encoding="utf-8")
    return path


def _table(root: Path) -> pd.DataFrame:
    """The assembled table in file order (A's quarters, then B's)."""
    panel = load_panel(load_study(root / "study.toml"))
    assert panel.assembly is not None and panel.assembly.table is not None
    return panel.assembly.table


def _col(table: pd.DataFrame, name: str) -> list[float]:
    return table[name].astype(float).tolist()


def _same(a: list[float], b: list[float]) -> None:
    np.testing.assert_allclose(np.asarray(a), np.asarray(b), rtol=EXACT, atol=EXACT,
                               equal_nan=True)


NAN = float("nan")

# ---------------------------------------------------------------------------- derived variables


def test_each_operation_against_a_hand_computation(tmp_path: Path) -> None:
    _small(tmp_path, """
        [derive]
        r = {op = "ratio", of = ["x", "y"], times = 100}
        lx = {op = "log", of = "x"}
        lag1 = {op = "lag", of = "x"}
        lag2 = {op = "lag", of = "x", k = 2}
        lead1 = {op = "lead", of = "x", k = 1}
        d1 = {op = "diff", of = "x"}
        p = {op = "product", of = ["x", "y", "w"]}
        half = {op = "scale", of = "x", times = 0.5}
        q1 = {op = "season", at = 1}
        q4 = {op = "season", at = 4, unit = "quarter"}
        lr = {op = "lag", of = "r"}
    """)
    t = _table(tmp_path)
    _same(_col(t, "r"), [50.0, 50.0, 80.0, 80.0, 50.0, 500.0, 1400.0])
    _same(_col(t, "lx"), [0.0, np.log(2), np.log(4), np.log(8), np.log(3), np.log(5),
                          np.log(7)])
    # A: 1 2 4 8 over Q1-Q4; B: 3 5 _ 7 (no Q3 row)
    _same(_col(t, "lag1"), [NAN, 1.0, 2.0, 4.0, NAN, 3.0, NAN])
    _same(_col(t, "lag2"), [NAN, NAN, 1.0, 2.0, NAN, NAN, 5.0])
    _same(_col(t, "lead1"), [2.0, 4.0, 8.0, NAN, 5.0, NAN, NAN])
    _same(_col(t, "d1"), [NAN, 1.0, 2.0, 4.0, NAN, 2.0, NAN])
    _same(_col(t, "p"), [2.0, 8.0, 20.0, 80.0, 18.0, 5.0, 3.5])
    _same(_col(t, "half"), [0.5, 1.0, 2.0, 4.0, 1.5, 2.5, 3.5])
    _same(_col(t, "q1"), [1.0, 0.0, 0.0, 0.0, 1.0, 0.0, 0.0])
    _same(_col(t, "q4"), [0.0, 0.0, 0.0, 1.0, 0.0, 0.0, 1.0])
    _same(_col(t, "lr"), [NAN, 50.0, 50.0, 80.0, NAN, 50.0, NAN])  # a derived input


def test_lags_cross_year_ends_and_follow_the_calendar(tmp_path: Path) -> None:
    frame = pd.DataFrame({"region": ["A"] * 3, "quarter": ["2019Q4", "2020Q1", "2020Q3"],
                          "price": [1.0] * 3, "q": [1.0] * 3, "w": [1.0] * 3,
                          "x": [1.0, 2.0, 3.0]})
    _small(tmp_path, '[derive]\nl = {op = "lag", of = "x"}\n', frame=frame)
    _same(_col(_table(tmp_path), "l"), [NAN, 1.0, NAN])  # 2020Q2 is absent


def test_season_on_months_dates_and_integers(tmp_path: Path) -> None:
    months = pd.DataFrame({"region": ["A"] * 4, "quarter": ["2019-11", "2019-12", "2020-01",
                                                            "2020-04"],
                           "price": [1.0] * 4, "q": [1.0] * 4, "w": [1.0] * 4})
    _small(tmp_path, """
        [derive]
        jan = {op = "season", at = 1}
        q2 = {op = "season", at = 2, unit = "quarter"}
        l = {op = "lag", of = "w"}
    """, frame=months)
    t = _table(tmp_path)
    _same(_col(t, "jan"), [0.0, 0.0, 1.0, 0.0])
    _same(_col(t, "q2"), [0.0, 0.0, 0.0, 1.0])
    _same(_col(t, "l"), [NAN, 1.0, 1.0, NAN])  # consecutive months; 2020-03 is absent
    dates = months.assign(quarter=["2019-11-30", "2019-12-31", "2020-01-31", "2020-04-30"])
    _small(tmp_path, '[derive]\nq1 = {op = "season", at = 1, unit = "quarter"}\n', frame=dates)
    _same(_col(_table(tmp_path), "q1"), [0.0, 0.0, 1.0, 0.0])
    _small(tmp_path, '[derive]\nq1 = {op = "season", at = 1}\n', frame=dates)
    with pytest.raises(DataError, match='unit = "quarter"'):
        load_panel(load_study(tmp_path / "study.toml"))
    _small(tmp_path, '[derive]\nq1 = {op = "season", at = 1}\n',
           frame=months.assign(quarter=[1, 2, 3, 4]))
    with pytest.raises(DataError, match="plain integers"):
        load_panel(load_study(tmp_path / "study.toml"))


def test_a_lag_used_in_the_model_follows_the_missing_value_rule(tmp_path: Path) -> None:
    _small(tmp_path, '[derive]\nw_lag = {op = "lag", of = "x"}\n', instruments='"w_lag"')
    with pytest.raises(DataError) as err:
        load_panel(load_study(tmp_path / "study.toml"))
    msg = " ".join(str(err.value).split())
    assert "column 'w_lag'" in msg and "derive.w_lag = lag(x, 1)" in msg
    assert rows_named(msg) == [2, 6, 8]  # A's first quarter, B's first and after the gap
    _small(tmp_path, '[derive]\nw_lag = {op = "lag", of = "x"}\n', instruments='"w_lag"',
           panel_extra="drop_missing = true")
    panel = load_panel(load_study(tmp_path / "study.toml"))
    assert panel.description.dropped_rows == 3
    assert panel.description.dropped_detail == {"w_lag": 3}
    _same(panel.frame["w_lag"].tolist(), [1.0, 2.0, 4.0, 3.0])
    assert panel.assembly is not None
    assert [(d.name, d.missing) for d in panel.assembly.derived] == [("w_lag", 3)]


def test_derived_variables_work_in_every_role(project: Project) -> None:
    """A deflated price, a log shifter, a lagged instrument and a seasonal regime."""
    f = project.frame.copy()
    f["cpi"] = 1.0 + 0.01 * (f["quarter"] - 2000)
    f["price_cur"] = f["price"] * f["cpi"]
    project.write_csv(f.drop(columns="price"))
    project.spec["derive"] = {
        "price": {"op": "ratio", "of": ["price_cur", "cpi"]},
        "log_income": {"op": "log", "of": "income"},
        "diesel_l1": {"op": "lag", "of": "diesel", "k": 1},
    }
    project.spec["panel"]["drop_missing"] = True
    project.spec["demand"]["shifters"] = ["log_income"]
    project.spec["demand"]["instruments"] = ["diesel", "diesel_l1"]
    project.write_study()
    res = project.check()
    assert res.code == 0, res.err
    panel = load_panel(load_study(project.study))
    assert panel.description.dropped_rows == 12  # the first period of each of 12 markets
    by_key = f.set_index(["region", "quarter"])["price"]
    keys = zip(panel.frame[MARKET].astype(int), panel.frame[PERIOD].astype(int), strict=True)
    np.testing.assert_allclose(panel.frame["price"], [by_key[k] for k in keys], rtol=1e-12)


def test_unknown_operation_suggests(project: Project) -> None:
    project.spec["derive"] = {"l": {"op": "lagg", "of": "diesel"}}
    project.write_study()
    assert_user_error(project.check(), "derive.l.op", "did you mean 'lag'?", "ratio")


@pytest.mark.parametrize(("entry", "needles"), [
    ({"op": "ratio", "of": ["diesel"]}, ["derive.d.of", "gives 1 column", "exactly 2"]),
    ({"op": "product", "of": "diesel"}, ["derive.d.of", "at least 2"]),
    ({"op": "log", "of": ["diesel", "income"]}, ["derive.d.of", "exactly 1"]),
    ({"op": "ratio", "of": ["diesel", "income"], "k": 2}, ["derive.d.k",
                                                           "does not apply to op 'ratio'"]),
    ({"op": "lag", "of": "diesel", "k": 0}, ["derive.d.k", ">= 1"]),
    ({"op": "scale", "of": "diesel"}, ["derive.d.times", "missing"]),
    ({"op": "season", "at": 5, "unit": "quarter"}, ["derive.d.at", "1-4"]),
    ({"op": "lag", "of": "diesel", "lag": 1}, ["derive.d.lag", "unknown key"]),
    ({"op": "log", "of": "region"}, ["panel.market", "season"]),
])
def test_bad_derive_entries(project: Project, entry: dict, needles: list[str]) -> None:
    project.spec["derive"] = {"d": entry}
    project.write_study()
    assert_user_error(project.check(), str(project.study), *needles)


def test_derive_cycle_and_name_clashes(project: Project) -> None:
    project.spec["derive"] = {"a": {"op": "log", "of": "b"}, "b": {"op": "log", "of": "a"}}
    project.write_study()
    assert_user_error(project.check(), "cycle", "a -> b")
    project.spec["derive"] = {"region": {"op": "log", "of": "diesel"}}
    project.write_study()
    assert_user_error(project.check(), "derive.region", "panel.market")
    project.spec["derive"] = {"income": {"op": "log", "of": "diesel"}}
    project.write_study()
    assert_user_error(project.check(), "makes a column 'income'", "panel.csv already has")


def test_log_of_non_positive_and_zero_denominator_name_rows(tmp_path: Path) -> None:
    frame = pd.DataFrame({"region": ["A"] * 3, "quarter": [1, 2, 3], "price": [1.0] * 3,
                          "q": [1.0] * 3, "w": [1.0] * 3, "x": [1.0, 0.0, -2.0]})
    _small(tmp_path, '[derive]\nlx = {op = "log", of = "x"}\n', frame=frame)
    with pytest.raises(DataError, match=r"positive values.*rows 3, 4") as err:
        load_panel(load_study(tmp_path / "study.toml"))
    assert "derive.lx" in str(err.value)
    _small(tmp_path, '[derive]\nr = {op = "ratio", of = ["w", "x"]}\n', frame=frame)
    with pytest.raises(DataError, match=r"denominator 'x' is zero at row 3"):
        load_panel(load_study(tmp_path / "study.toml"))


# ---------------------------------------------------------------------------- joins


def _split_costs(project: Project, costs: pd.DataFrame | None = None) -> None:
    """Move the diesel column of the fixture's panel into costs.csv (by region, quarter)."""
    project.write_csv(project.frame.drop(columns="diesel"))
    table = project.frame[["region", "quarter", "diesel"]] if costs is None else costs
    table.to_csv(project.root / "costs.csv", index=False)
    project.spec["sources"] = [{"file": "costs.csv", "on": ["market", "period"]}]
    project.write_study()


def test_full_match_gives_the_one_file_panel(project: Project) -> None:
    one = load_panel(load_study(project.study))
    _split_costs(project, project.frame[["region", "quarter", "diesel"]].iloc[::-1])
    two = load_panel(load_study(project.study))
    pd.testing.assert_frame_equal(one.frame, two.frame)
    costs = two.sources[1]
    assert (costs.name, costs.on, costs.columns) == ("costs", ("market", "period"), ("diesel",))
    assert (costs.matched, costs.unmatched, costs.unused) == (144, 0, 0)
    assert costs.sha256 == hashlib.sha256((project.root / "costs.csv").read_bytes()).hexdigest()
    assert two.description.sha256 not in (one.description.sha256, costs.sha256)
    res = project.check()
    assert res.code == 0, res.err


def test_partial_match_is_counted_and_follows_the_missing_value_rule(project: Project) -> None:
    costs = project.frame[["region", "quarter", "diesel"]]
    extra = pd.DataFrame({"region": [99, 99], "quarter": [2000, 2001], "diesel": [1.0, 1.0]})
    # drop region 1's first two quarters (file rows 2 and 3 of panel.csv)
    _split_costs(project, pd.concat([costs.iloc[2:], extra], ignore_index=True))
    msg = assert_user_error(project.check(), "column 'diesel'", "source 'costs' (costs.csv)",
                            "2 main row(s) found no match", "drop_missing = true")
    assert rows_named(msg) == [2, 3]
    project.spec["panel"]["drop_missing"] = True
    project.write_study()
    panel = load_panel(load_study(project.study))
    rec = panel.sources[1]
    assert (rec.matched, rec.unmatched, rec.unused) == (142, 2, 2)
    assert panel.description.rows == 142
    assert panel.description.dropped_detail == {"diesel": 2}
    assert "142 of 144 main rows matched, 2 rows unused" in describe_assembly(panel)


def test_duplicated_lookup_keys_are_refused(project: Project) -> None:
    costs = project.frame[["region", "quarter", "diesel"]]
    _split_costs(project, pd.concat([costs, costs.iloc[[5]]], ignore_index=True))
    msg = assert_user_error(project.check(), "Source 'costs' file", "costs.csv",
                            "market '1'", "period '2005'", "repeats", "refused")
    assert rows_named(msg) == [7, 146]


def test_period_only_join(project: Project) -> None:
    """A national index by period reaches every market's row of that period."""
    index = pd.DataFrame({"year": range(2000, 2012), "cpi": [100.0 + 3 * k for k in range(12)]})
    index.to_csv(project.root / "national.csv", index=False)
    project.spec["sources"] = [{"name": "national", "file": "national.csv", "on": ["period"],
                                "period": "year"}]
    project.spec["derive"] = {"real_diesel": {"op": "ratio", "of": ["diesel", "cpi"],
                                              "times": 100}}
    project.spec["supply"]["cost_shifters"] = ["real_diesel"]
    project.write_study()
    panel = load_panel(load_study(project.study))
    f = panel.frame
    by_hand = f["diesel"] / (100.0 + 3 * (f[PERIOD].astype(int) - 2000)) * 100
    np.testing.assert_allclose(f["real_diesel"], by_hand, rtol=EXACT)
    rec = panel.sources[1]
    assert (rec.on, rec.matched, rec.unmatched, rec.unused) == (("period",), 144, 0, 0)


def test_market_only_join(project: Project) -> None:
    """A market attribute (here a road length) is the same in every period of the market."""
    area = pd.DataFrame({"region": range(1, 13), "km": [10.0 * m for m in range(1, 13)]})
    area.iloc[:11].to_csv(project.root / "area.csv", index=False)  # region 12 is missing
    project.spec["sources"] = [{"file": "area.csv", "on": ["market"]}]
    project.spec["demand"]["shifters"] = ["income", "km"]
    project.spec["panel"]["drop_missing"] = True
    project.write_study()
    panel = load_panel(load_study(project.study))
    f = panel.frame
    np.testing.assert_allclose(f["km"], 10.0 * f[MARKET].astype(int), rtol=EXACT)
    rec = panel.sources[1]
    assert (rec.on, rec.matched, rec.unmatched, rec.unused) == (("market",), 132, 12, 0)
    assert panel.description.markets == 11


def test_join_errors_name_file_key_and_rows(project: Project) -> None:
    _split_costs(project, project.frame[["region", "quarter", "diesel"]].rename(
        columns={"quarter": "qtr"}))
    assert_user_error(project.check(), "key column 'quarter'", "sources[1].period",
                      "did you mean 'qtr'?")
    costs = project.frame[["region", "quarter", "diesel"]].astype({"quarter": object})
    costs["quarter"] = [f"{q}Q1" for q in project.frame["quarter"]]
    _split_costs(project, costs)
    assert_user_error(project.check(), "quarter periods", "integers")
    costs = project.frame[["region", "quarter", "diesel"]].astype({"region": float})
    costs.loc[3, "region"] = np.nan
    _split_costs(project, costs)
    msg = assert_user_error(project.check(), "key column 'region'", "missing values")
    assert rows_named(msg) == [5]


def test_a_column_must_come_from_exactly_one_table(project: Project) -> None:
    project.frame[["region", "quarter", "diesel"]].to_csv(project.root / "costs.csv",
                                                           index=False)
    project.spec["sources"] = [{"file": "costs.csv"}]
    project.write_study()
    assert_user_error(project.check(), "Column 'diesel' is in panel.csv and source 'costs'",
                      "columns = [...]")
    project.write_csv(project.frame.drop(columns="diesel"))
    project.spec["demand"]["instruments"] = ["deisel"]
    project.spec["supply"]["cost_shifters"] = ["deisel"]
    project.write_study()
    assert_user_error(project.check(), "Column 'deisel'", "none of the data files",
                      "did you mean 'diesel'?", "costs.csv: diesel")


@pytest.mark.parametrize(("source", "needles"), [
    ({"file": "costs.csv", "on": ["market"], "name": "panel"}, ["sources[1].name", "reserved"]),
    ({"file": "costs.csv", "on": []}, ["sources[1].on", "is empty"]),
    ({"file": "costs.csv", "by": ["period"]}, ["sources[1].by", "unknown key"]),
    ({"file": "costs.txt"}, ["sources[1].file", ".csv"]),
    ({"file": "costs.csv", "on": ["region"]}, ["sources[1].on", "allowed values"]),
])
def test_bad_source_entries(project: Project, source: dict, needles: list[str]) -> None:
    project.spec["sources"] = [source]
    project.write_study()
    assert_user_error(project.check(), str(project.study), *needles)


def test_excel_source_with_a_named_sheet(project: Project) -> None:
    project.write_csv(project.frame.drop(columns="diesel"))
    with pd.ExcelWriter(project.root / "costs.xlsx") as book:
        pd.DataFrame({"note": ["invented"]}).to_excel(book, sheet_name="About", index=False)
        project.frame[["region", "quarter", "diesel"]].to_excel(book, sheet_name="Costs",
                                                                 index=False)
    project.spec["sources"] = [{"file": "costs.xlsx"}]
    project.write_study()
    assert_user_error(project.check(), "costs.xlsx", "2 sheets", "sources[1].sheet")
    project.spec["sources"] = [{"file": "costs.xlsx", "sheet": "Costs"}]
    project.write_study()
    assert project.check().code == 0


# ---------------------------------------------------------------------------- firms


FIRMS = pd.DataFrame({
    # A 2019Q1: 30, 10 and an inactive firm; A 2019Q2: 20, 20; B 2019Q1: one seller of 50
    "region": ["A", "A", "A", "A", "A", "B"],
    "quarter": ["2019Q1", "2019Q1", "2019Q1", "2019Q2", "2019Q2", "2019Q1"],
    "firm": ["f1", "f2", "f3", "f1", "f2", "f9"],
    "output": [30.0, 10.0, 0.0, 20.0, 20.0, 50.0],
    "fuel": [10.0, 20.0, 99.0, 12.0, 14.0, 8.0],
})
FIRM_STUDY = """
    [firms]
    file = "firms.csv"
    firm = "firm"
    quantity = "output"
    total = "q_firms"
    sellers = "n"
    concentration = "h"
    share_weighted = ["fuel"]
    check_total = "q"
"""


def _firm_panel(root: Path, firms: pd.DataFrame = FIRMS, extra: str = FIRM_STUDY) -> Path:
    frame = pd.DataFrame({"region": ["A", "A", "B"], "quarter": ["2019Q1", "2019Q2", "2019Q1"],
                          "price": [1.0] * 3, "q": [40.0, 40.0, 50.0], "w": [1.0] * 3})
    firms.to_csv(root / "firms.csv", index=False)
    return _small(root, extra, frame=frame)


def test_firm_aggregation_against_a_hand_herfindahl(tmp_path: Path) -> None:
    _firm_panel(tmp_path)
    panel = load_panel(load_study(tmp_path / "study.toml"))
    t = panel.assembly.table if panel.assembly is not None else None
    assert t is not None
    # A 2019Q1: shares 0.75, 0.25 (f3 sold nothing): H = 0.5625 + 0.0625 = 0.625, N = 2,
    #           fuel = 0.75 * 10 + 0.25 * 20 = 12.5
    # A 2019Q2: shares 0.5, 0.5: H = 0.5 = 1/N, fuel = 13;  B 2019Q1: H = 1, fuel = 8
    _same(_col(t, "q_firms"), [40.0, 40.0, 50.0])
    _same(_col(t, "n"), [2.0, 2.0, 1.0])
    _same(_col(t, "h"), [0.625, 0.5, 1.0])
    _same(_col(t, "fuel"), [12.5, 13.0, 8.0])
    rec = panel.sources[-1]
    assert (rec.name, rec.role, rec.rows, rec.matched, rec.unmatched) == ("firms", "firms", 6,
                                                                         3, 0)
    assert panel.assembly is not None and panel.assembly.firms_note is not None
    assert "4 firms" in panel.assembly.firms_note  # f1, f2, f3, f9


def test_firm_outputs_feed_the_cournot_benchmark(tmp_path: Path) -> None:
    _firm_panel(tmp_path)
    text = (tmp_path / "study.toml").read_text()
    text = text.replace('quantity = "q"\n', 'quantity = "q"\nsellers = "n"\nconcentration = "h"\n')
    (tmp_path / "study.toml").write_text(text)
    panel = load_panel(load_study(tmp_path / "study.toml"))
    _same(panel.frame["h"].tolist(), [0.625, 0.5, 1.0])


def test_firm_totals_must_match_the_industry_quantity(tmp_path: Path) -> None:
    firms = FIRMS.copy()
    firms.loc[1, "output"] = 9.0  # A 2019Q1 now sums to 39, the panel says 40
    _firm_panel(tmp_path, firms)
    with pytest.raises(DataError) as err:
        load_panel(load_study(tmp_path / "study.toml"))
    msg = str(err.value)
    assert "A 2019Q1" in msg and "firms sum to 39" in msg and "'q' is 40" in msg
    assert "firms.tolerance = 0.001" in msg
    _firm_panel(tmp_path, firms, FIRM_STUDY + "tolerance = 0.05\n")
    assert load_panel(load_study(tmp_path / "study.toml")).description.rows == 3


@pytest.mark.parametrize(("change", "needle"), [
    (lambda f: f.assign(output=f["output"].where(f.index != 2)), "Write 0 for a firm"),
    (lambda f: f.assign(output=f["output"].where(f.index != 2, -1.0)), "zero or positive"),
    (lambda f: pd.concat([f, f.iloc[[3]]], ignore_index=True), "firm 'f1' appears more"),
    (lambda f: f.rename(columns={"firm": "firms"}), "did you mean 'firms'?"),
])
def test_bad_firm_tables(tmp_path: Path, change, needle: str) -> None:
    _firm_panel(tmp_path, change(FIRMS))
    with pytest.raises(DataError, match="Firm table") as err:
        load_panel(load_study(tmp_path / "study.toml"))
    assert needle in str(err.value)


def test_main_rows_without_firm_rows_are_missing(tmp_path: Path) -> None:
    _firm_panel(tmp_path, FIRMS.iloc[:5])  # B 2019Q1 has no firm rows
    text = (tmp_path / "study.toml").read_text().replace('quantity = "q"\n',
                                                          'quantity = "q"\nsellers = "n"\n')
    (tmp_path / "study.toml").write_text(text)
    with pytest.raises(DataError, match=r"column 'n' \(made by \[firms\].*1 main row"):
        load_panel(load_study(tmp_path / "study.toml"))


def test_firms_table_needs_an_output(project: Project) -> None:
    project.spec["firms"] = {"file": "firms.csv", "firm": "firm", "quantity": "q"}
    project.write_study()
    assert_user_error(project.check(), "[firms] makes no column")


# ---------------------------------------------------------------------------- records


def test_hashes_say_which_source_changed(project: Project) -> None:
    _split_costs(project)
    first = load_panel(load_study(project.study))
    costs = pd.read_csv(project.root / "costs.csv")
    costs.loc[0, "diesel"] += 0.5
    costs.to_csv(project.root / "costs.csv", index=False)
    second = load_panel(load_study(project.study))
    assert first.assembly is not None and second.assembly is not None
    a, b = first.assembly.sources_document(), second.assembly.sources_document()
    assert a["panel"]["sha256"] == b["panel"]["sha256"]
    changes = source_changes(b, a)
    assert changes == {"changed": ["costs"], "added": [], "removed": []}
    assert source_changes_line(changes) == "sources changed: costs"
    assert source_changes_line({"changed": [], "added": [], "removed": []}) == "no source changed"
    assert source_changes(b, None) is None
    assert first.description.sha256 != second.description.sha256


def test_one_file_study_keeps_its_file_hash(project: Project) -> None:
    panel = load_panel(load_study(project.study))
    digest = hashlib.sha256((project.root / "panel.csv").read_bytes()).hexdigest()
    assert panel.description.sha256 == digest
    assert [s.name for s in panel.sources] == ["panel"]


def test_write_panel_and_describe(project: Project) -> None:
    _split_costs(project)
    panel = load_panel(load_study(project.study))
    out = write_panel(panel, project.root / "assembled.csv")
    back = pd.read_csv(out)
    assert list(back.columns[:2]) == ["region", "quarter"]
    assert len(back) == 144 and "diesel" in back.columns
    with pytest.raises(ConductError, match="already exists"):
        write_panel(panel, out)
    with pytest.raises(ConductError, match=r"\.parquet"):
        write_panel(panel, project.root / "assembled.txt")
    text = describe_assembly(panel)
    assert text.startswith("sources   panel")
    assert "joined by market and period: 144 of 144 main rows matched" in text
    assert "first rows of the assembled panel (144 rows):" in text


# ---------------------------------------------------------------------------- demo


def test_demo_study_is_assembled_from_several_sources() -> None:
    study = load_study(ROOT / "sample_panel" / "study.toml")
    panel = load_panel(study)
    names = [s.name for s in panel.sources]
    assert names == ["panel", "costs", "national", "firms"]
    assert all(s.unmatched == 0 for s in panel.sources)
    truth = pd.read_csv(ROOT / "sample_panel" / "truth_observations.csv")
    merged = panel.frame.merge(truth, left_on=[MARKET, PERIOD], right_on=["market", "period"],
                               suffixes=("", "_true"))
    assert len(merged) == len(truth)
    # the files round prices to 4 decimals and the index to 4: relative error ~1e-6
    np.testing.assert_allclose(merged["price"], merged["price_true"], rtol=1e-5)
    np.testing.assert_allclose(merged["hhi"], merged["hhi_true"], atol=1e-6)
    assert (merged["sellers"] == merged["sellers_true"]).all()


def test_demo_source_files_are_up_to_date(tmp_path: Path) -> None:
    write_study(tmp_path, PRESETS["road-salt"], fmt="csv")
    for name in layout_files(PRESET_LAYOUTS["road-salt"], "csv"):
        assert (ROOT / "sample_panel" / name).read_bytes() == (tmp_path / name).read_bytes(), (
            f"sample_panel/{name} is stale: run scripts/make_sample.py")


def test_simulate_lists_every_file_it_writes(tmp_path: Path) -> None:
    assert preset_files("road-salt") == ("panel.csv", "costs.csv", "national.csv", "firms.csv",
                                         "study.toml", "truth.json", "truth_observations.csv")
    assert preset_files(None, "parquet")[0] == "panel.parquet"
    study = write_study(tmp_path, PRESETS["road-salt"], fmt="parquet",
                        layout=SourceLayout(costs="costs", prices=None, firms=None))
    assert sorted(p.name for p in tmp_path.iterdir()) == sorted(
        ["panel.parquet", "costs.parquet", "study.toml", "truth.json",
         "truth_observations.csv"])
    assert load_panel(load_study(study)).description.rows == 36 * 48


def test_check_shows_the_assembly_and_writes_the_panel(project: Project) -> None:
    _split_costs(project)
    res = project.run("check", project.study, "--write-panel", project.root / "out.parquet")
    assert res.code == 0, res.err
    assert "sources   panel  panel.csv" in res.out and "costs  costs.csv" in res.out
    assert "joined by market and period: 144 of 144 main rows matched" in res.out
    assert len(pd.read_parquet(project.root / "out.parquet")) == 144
    assert_user_error(project.run("check", project.study, "--write-panel",
                                  project.root / "out.parquet"), "already exists")
