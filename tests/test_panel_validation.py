"""Panel validation: bad data files fed through the command line, and the panel description.

Row numbers in messages are the rows of the file as a spreadsheet shows them:
for CSV and Excel the header is row 1, so data row i (0-based) is row i + 2.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from conftest import Project, assert_no_run, assert_user_error, rows_named

from conduct.panel import MARKET, PERIOD, load_panel
from conduct.study import load_study

# ---------------------------------------------------------------------------- columns


def test_missing_column_suggests_near_name(project: Project) -> None:
    project.write_csv(project.frame.rename(columns={"diesel": "diesel_idx"}))
    assert_user_error(project.check(), str(project.root / "panel.csv"), "column 'diesel'",
                      "did you mean 'diesel_idx'?", "study.toml", "Columns present:")


def test_missing_column_case_only_suggests(project: Project) -> None:
    project.write_csv(project.frame.rename(columns={"tonnes": "Tonnes"}))
    assert_user_error(project.check(), "column 'tonnes'", "did you mean 'Tonnes'?")


def test_column_names_are_stripped(project: Project) -> None:
    project.write_csv(project.frame.rename(columns={"price": " price "}))
    assert project.check().code == 0


def test_missing_column_on_estimate_writes_nothing(project: Project) -> None:
    project.write_csv(project.frame.drop(columns="income"))
    assert_user_error(project.estimate(), "column 'income'")
    assert_no_run(project)


# ---------------------------------------------------------------------------- numbers


def test_text_in_numeric_column_names_column_and_rows(project: Project) -> None:
    f = project.frame.astype({"income": object})
    f.loc[[4, 9], "income"] = "abc"
    project.write_csv(f)
    msg = assert_user_error(project.check(), "column 'income'", "must be numeric", "'abc'")
    assert rows_named(msg) == [6, 11]


def test_decimal_comma_gets_a_hint(project: Project) -> None:
    f = project.frame.astype({"diesel": object})
    f.loc[0, "diesel"] = "1,25"
    project.write_csv(f)
    msg = assert_user_error(project.check(), "column 'diesel'", "'1,25'", "decimal comma")
    assert rows_named(msg) == [2]


@pytest.mark.parametrize("column", ["price", "tonnes"])
@pytest.mark.parametrize("value", [0.0, -3.0])
def test_non_positive_price_or_quantity(project: Project, column: str, value: float) -> None:
    f = project.frame.copy()
    f.loc[[2, 40], column] = value
    project.write_csv(f)
    msg = assert_user_error(project.check(), f"column '{column}'", "must be positive",
                            f"{value:g}")
    assert rows_named(msg) == [4, 42]


def test_infinite_values(project: Project) -> None:
    f = project.frame.copy()
    f.loc[7, "diesel"] = np.inf
    f.loc[8, "diesel"] = -np.inf
    project.write_csv(f)
    msg = assert_user_error(project.check(), "column 'diesel'", "infinite")
    assert rows_named(msg) == [9, 10]


@pytest.mark.parametrize("value", [0.0, 1.5, 2500.0])
def test_concentration_outside_unit_interval(project: Project, value: float) -> None:
    f = project.frame.copy()
    f["hhi"] = 1 / f["sellers"]
    f.loc[11, "hhi"] = value
    project.write_csv(f)
    project.edit(lambda s: s["panel"].update(concentration="hhi"))
    msg = assert_user_error(project.check(), "concentration column 'hhi'", "(0, 1]",
                            f"{value:g}", "10,000")
    assert rows_named(msg) == [13]


def test_concentration_of_one_is_allowed(project: Project) -> None:
    f = project.frame.copy()
    f["hhi"] = 1 / f["sellers"]
    f.loc[11, "hhi"] = 1.0
    project.write_csv(f)
    project.edit(lambda s: s["panel"].update(concentration="hhi"))
    assert project.check().code == 0


@pytest.mark.parametrize("value", [2.5, 0.0, -1.0])
def test_sellers_must_be_whole_numbers(project: Project, value: float) -> None:
    f = project.frame.astype({"sellers": float})
    f.loc[20, "sellers"] = value
    project.write_csv(f)
    msg = assert_user_error(project.check(), "sellers column 'sellers'", "whole numbers",
                            f"{value:g}")
    assert rows_named(msg) == [22]


# ---------------------------------------------------------------------------- keys


def test_duplicate_market_period(project: Project) -> None:
    f = pd.concat([project.frame, project.frame.iloc[[13]]], ignore_index=True)
    project.write_csv(f)
    msg = assert_user_error(project.check(), "(market, period)", "market '2'",
                            "period '2001'")
    assert rows_named(msg) == [15, 146]


def test_duplicate_period_without_market_column_hints(project: Project) -> None:
    project.write_csv(project.frame.drop(columns="region"))

    def change(s: dict) -> None:
        s["panel"].pop("market")
        s["demand"].update(effects=[], errors="robust")

    project.edit(change)
    msg = assert_user_error(project.check(), "each period must appear once", "period '2000'",
                            "panel.market")
    assert rows_named(msg)[:2] == [2, 14]


# ---------------------------------------------------------------------------- periods


def _relabel(project: Project, labels: list[str]) -> None:
    """Replace the 12 integer periods by ``labels`` (one per period, same in every market)."""
    f = project.frame.copy()
    f["quarter"] = [labels[q - 2000] for q in f["quarter"]]
    project.write_csv(f)


def _periods(project: Project) -> list[str]:
    frame = load_panel(load_study(project.study)).frame
    return list(frame.loc[frame[MARKET] == "1", PERIOD])


def test_quarter_labels_in_mixed_spellings_sort_by_calendar(project: Project) -> None:
    written = ["2018Q3", "2018-Q4", "2019q1", "2019Q2", "2019 Q3", "2019Q4",
               "2020Q1", "2020-q2", "2020Q3", "2020Q4", "2021Q1", "2021Q2"]
    # shuffle the rows so that order in the file does not help
    _relabel(project, written)
    f = pd.read_csv(project.root / "panel.csv").sample(frac=1.0, random_state=3)
    project.write_csv(f)
    expected = ["2018Q3", "2018Q4", "2019Q1", "2019Q2", "2019Q3", "2019Q4",
                "2020Q1", "2020Q2", "2020Q3", "2020Q4", "2021Q1", "2021Q2"]
    assert _periods(project) == expected
    res = project.check()
    assert res.code == 0, res.err
    assert "(2018Q3 to 2021Q2, quarter periods), balanced" in res.out


def test_quarter_year_boundary_is_not_a_gap(project: Project) -> None:
    labels = [f"{2019 + (i + 3) // 4}Q{(i + 3) % 4 + 1}" for i in range(12)]  # 2019Q4 ...
    assert labels[:2] == ["2019Q4", "2020Q1"]
    _relabel(project, labels)
    f = pd.read_csv(project.root / "panel.csv")
    project.write_csv(f[f["quarter"] != "2020Q2"].reset_index(drop=True))
    desc = load_panel(load_study(project.study)).description
    assert (desc.periods, desc.gaps, desc.balanced) == (11, 12, True)
    assert (desc.first_period, desc.last_period) == ("2019Q4", "2022Q3")


def test_integer_periods_sort_numerically(project: Project) -> None:
    f = project.frame.copy()
    f["quarter"] = f["quarter"] - 1995  # 5 ... 16: text order would put 10 before 5
    project.write_csv(f.sample(frac=1.0, random_state=1))
    assert _periods(project) == [str(v) for v in range(5, 17)]


def test_iso_dates_sort_by_calendar(project: Project) -> None:
    labels = [f"{2019 + (m - 1) // 12}-{(m - 1) % 12 + 1:02d}-01" for m in range(9, 21)]
    _relabel(project, labels)
    periods = _periods(project)
    assert periods == labels
    assert periods[3:5] == ["2019-12-01", "2020-01-01"]


@pytest.mark.parametrize("bad", ["2019Q10", "2019Q0", "2019Q5", "soon", "2019-13-01"])
def test_unparseable_period_names_value_and_row(project: Project, bad: str) -> None:
    labels = [f"{2019 + i // 4}Q{i % 4 + 1}" for i in range(12)]
    if "-" in bad:
        labels = [f"2019-{m:02d}-01" for m in range(1, 13)]
    _relabel(project, labels)
    f = pd.read_csv(project.root / "panel.csv")
    f.loc[30, "quarter"] = bad
    project.write_csv(f)
    msg = assert_user_error(project.check(), "period column 'quarter'", f"'{bad}'",
                            "2019Q3")
    assert rows_named(msg) == [32]


def test_fractional_integer_period(project: Project) -> None:
    f = project.frame.astype({"quarter": float})
    f.loc[5, "quarter"] = 2003.5
    project.write_csv(f)
    msg = assert_user_error(project.check(), "period column 'quarter'", "non-integer")
    assert rows_named(msg) == [7]


def test_period_error_rows_count_dropped_rows(project: Project) -> None:
    """Row numbers stay those of the file when earlier rows were dropped."""
    f = project.frame.astype({"quarter": object})
    f.loc[0, "income"] = np.nan
    f.loc[5, "quarter"] = "someday"
    project.write_csv(f)
    project.edit(lambda s: s["panel"].update(drop_missing=True))
    msg = assert_user_error(project.check(), "'someday'")
    assert rows_named(msg) == [7]


# ---------------------------------------------------------------------------- missing values


def test_missing_values_refused_by_default(project: Project) -> None:
    f = project.frame.copy()
    f.loc[[3, 7], "income"] = np.nan
    project.write_csv(f)
    msg = assert_user_error(project.check(), "column 'income'", "missing values",
                            "drop_missing = true")
    assert rows_named(msg) == [5, 9]
    assert_user_error(project.estimate(), "column 'income'")
    assert_no_run(project)


def test_missing_market_or_period_refused(project: Project) -> None:
    f = project.frame.astype({"region": float})
    f.loc[50, "region"] = np.nan
    project.write_csv(f)
    msg = assert_user_error(project.check(), "column 'region'", "missing")
    assert rows_named(msg) == [52]


def test_drop_missing_counts_every_dropped_row(project: Project) -> None:
    f = project.frame.copy()
    f.loc[[3, 10], "diesel"] = np.nan
    f.loc[[3, 100], "income"] = np.nan  # row 3 has two gaps but is one dropped row
    f["unused"] = np.nan  # columns the study does not use never cause a drop
    project.write_csv(f)
    project.edit(lambda s: s["panel"].update(drop_missing=True))
    res = project.check()
    assert res.code == 0, res.err
    assert "dropped 3 rows with missing values (diesel: 2, income: 2)" in res.out
    res = project.estimate("--json")
    assert res.code == 0, res.err
    data = json.loads(res.out)["data"]
    assert data["dropped_rows"] == 3
    assert data["dropped_by_column"] == {"diesel": 2, "income": 2}
    assert data["rows"] == 141
    assert data["balanced"] is False


def test_drop_missing_everything(project: Project) -> None:
    f = project.frame.copy()
    f["income"] = np.nan
    project.write_csv(f)
    project.edit(lambda s: s["panel"].update(drop_missing=True))
    assert_user_error(project.check(), "every row has a missing value")


# ---------------------------------------------------------------------------- file shape


def test_empty_csv(project: Project) -> None:
    (project.root / "panel.csv").write_bytes(b"")
    assert_user_error(project.check(), str(project.root / "panel.csv"), "is empty")


def test_header_only_csv(project: Project) -> None:
    (project.root / "panel.csv").write_text(",".join(project.frame.columns) + "\n")
    assert_user_error(project.check(), "panel.csv", "header but no data rows")


def test_ragged_rows(project: Project) -> None:
    path = project.write_csv()
    lines = path.read_text().splitlines()
    lines[6] += ",99,100"
    path.write_text("\n".join(lines) + "\n")
    assert_user_error(project.check(), "panel.csv", "same fields", "line 7")


def test_short_row_is_reported_as_missing(project: Project) -> None:
    path = project.write_csv()
    lines = path.read_text().splitlines()
    lines[6] = ",".join(lines[6].split(",")[:-3])
    path.write_text("\n".join(lines) + "\n")
    msg = assert_user_error(project.check(), "missing values")
    assert rows_named(msg) == [7]


def test_csv_not_utf8(project: Project) -> None:
    path = project.write_csv()
    path.write_bytes(path.read_bytes().replace(b"region", b"r\xe9gion", 1))
    assert_user_error(project.check(), str(path), "not UTF-8", "offset 1")


def test_data_file_is_a_directory(project: Project) -> None:
    (project.root / "dir.csv").mkdir()
    project.edit(lambda s: s["panel"].update(file="dir.csv"))
    assert_user_error(project.check(), "dir.csv", "is a directory")


def test_corrupt_parquet(project: Project) -> None:
    (project.root / "panel.parquet").write_bytes(b"not parquet at all")
    project.edit(lambda s: s["panel"].update(file="panel.parquet"))
    assert_user_error(project.check(), "panel.parquet", "could not be read as parquet")


# ---------------------------------------------------------------------------- Excel sheets


def _two_sheets(project: Project) -> None:
    with pd.ExcelWriter(project.root / "panel.xlsx", engine="openpyxl") as book:
        pd.DataFrame({"note": ["invented data"]}).to_excel(book, sheet_name="About",
                                                           index=False)
        project.frame.to_excel(book, sheet_name="Panel", index=False)


def test_excel_with_several_sheets_needs_a_sheet(project: Project) -> None:
    _two_sheets(project)
    project.edit(lambda s: s["panel"].update(file="panel.xlsx"))
    assert_user_error(project.check(), "panel.xlsx", "2 sheets", "About, Panel",
                      "panel.sheet")


def test_excel_wrong_sheet_suggests(project: Project) -> None:
    _two_sheets(project)
    project.edit(lambda s: s["panel"].update(file="panel.xlsx", sheet="panel "))
    assert_user_error(project.check(), "no sheet 'panel'", "did you mean 'Panel'?")


def test_excel_named_sheet_is_read(project: Project) -> None:
    _two_sheets(project)
    project.edit(lambda s: s["panel"].update(file="panel.xlsx", sheet="Panel"))
    res = project.check()
    assert res.code == 0, res.err
    assert "rows 144, markets 12" in res.out


def test_excel_row_numbers_count_the_header(project: Project) -> None:
    f = project.frame.copy()
    f.loc[9, "price"] = -1.0
    f.to_excel(project.root / "panel.xlsx", index=False)
    project.edit(lambda s: s["panel"].update(file="panel.xlsx"))
    msg = assert_user_error(project.check(), "panel.xlsx", "column 'price'")
    assert rows_named(msg) == [11]


def test_parquet_row_numbers_start_at_one(project: Project) -> None:
    f = project.frame.astype({"income": str})
    f.loc[9, "income"] = "abc"
    f.to_parquet(project.root / "panel.parquet")
    project.edit(lambda s: s["panel"].update(file="panel.parquet"))
    msg = assert_user_error(project.check(), "panel.parquet", "column 'income'", "'abc'")
    assert rows_named(msg) == [10]


# ---------------------------------------------------------------------------- description


def test_description_of_small_unbalanced_panel(project: Project) -> None:
    """By hand: A has 2019Q1-Q4; B has 2019Q1, 2019Q3, 2020Q1 (2 gaps); C has 2019Q2-Q3.

    Rows 9, markets 3, periods 5 (2019Q1 ... 2020Q1), unbalanced, 2 gaps.
    """
    cells = [("A", "2019Q1"), ("A", "2019Q2"), ("A", "2019Q3"), ("A", "2019Q4"),
             ("B", "2020Q1"), ("B", "2019Q1"), ("B", "2019Q3"),
             ("C", "2019Q3"), ("C", "2019Q2")]
    f = project.frame.iloc[: len(cells)].copy()
    f["region"] = [m for m, _ in cells]
    f["quarter"] = [q for _, q in cells]
    project.write_csv(f)
    panel = load_panel(load_study(project.study))
    d = panel.description
    assert (d.rows, d.markets, d.periods) == (9, 3, 5)
    assert (d.first_period, d.last_period, d.period_kind) == ("2019Q1", "2020Q1", "quarter")
    assert d.balanced is False
    assert d.gaps == 2
    assert d.dropped_rows == 0
    assert list(panel.frame[PERIOD][panel.frame[MARKET] == "B"]) == [
        "2019Q1", "2019Q3", "2020Q1"]
    # each validated row remembers its row in the file (header = row 1)
    assert list(panel.source_rows[panel.frame[MARKET] == "B"]) == [7, 8, 6]
    res = project.check()
    assert res.code == 0, res.err
    assert ("rows 9, markets 3, periods 5 (2019Q1 to 2020Q1, quarter periods), "
            "unbalanced, 2 gaps inside markets") in res.out


def test_description_with_date_periods_counts_gaps_on_the_panel_calendar(
        project: Project) -> None:
    cells = [("A", "2020-01-31"), ("A", "2020-02-29"), ("A", "2020-03-31"),
             ("B", "2020-01-31"), ("B", "2020-03-31")]
    f = project.frame.iloc[: len(cells)].copy()
    f["region"] = [m for m, _ in cells]
    f["quarter"] = [q for _, q in cells]
    project.write_csv(f)
    d = load_panel(load_study(project.study)).description
    assert (d.rows, d.markets, d.periods, d.gaps, d.balanced) == (5, 2, 3, 1, False)
    assert d.period_kind == "date"


def test_european_csv_conventions_are_read_when_declared(tmp_path) -> None:
    """A file with ';' between fields, ',' for decimals and '.' grouping thousands reads
    to the same panel as the plain file once [panel] says so."""
    from conduct.panel import load_panel
    from conduct.presets import write_study
    from conduct.simulate import SimulationSpec
    from conduct.study import load_study

    study = write_study(tmp_path / "eu", SimulationSpec(markets=6, periods=8, seed=2))
    plain = load_panel(load_study(study))
    frame = pd.read_csv(study.parent / "panel.csv")
    (study.parent / "panel.csv").write_text(frame.to_csv(index=False, sep=";", decimal=","))
    toml = study.read_text().replace('file = "panel.csv"',
                                     'file = "panel.csv"\ndelimiter = ";"\ndecimal = ","')
    study.write_text(toml)
    eu = load_panel(load_study(study))
    cols = [c for c in plain.frame.columns if pd.api.types.is_float_dtype(plain.frame[c])]
    np.testing.assert_allclose(eu.frame[cols].to_numpy(), plain.frame[cols].to_numpy(),
                               rtol=1e-12)
