"""Hardening: a corpus of bad inputs through the real command line, and hostile strings.

The corpus is the table :data:`CORPUS` below: one row per bad input, each built in
``tmp_path`` from the good conftest project by breaking one thing.  Every case runs
through :func:`conduct.cli.main` (``estimate``, and ``check`` when the problem is
visible without estimating) and must give exit code 2, one message without a
traceback that names the culprit (file, key, column, rows), and leave no run folder
and no history row behind.  A handful of cases also run in a subprocess of the real
entry point.  :data:`ACCEPTED` lists inputs that look odd but have one sensible
reading, which must be read (exit 0); :data:`HINTS` lists inputs with a sensible
reading that conduct does not take, whose message must say how to ask for it.

Cases marked xfail are bugs found by this corpus; the reason says where and what to
fix.  The note at the end of this docstring is the corpus summary asked for in issue 10.

Corpus note (issue 10, item 6)
------------------------------
76 bad-input cases in :data:`CORPUS` (none xfail), 7 accepted
readings, 3 reading hints, plus hostile-string and never-evaluated tests at the end of
this module; ``tests/test_properties.py`` fuzzes the same loaders.  By input class:

* empty / header-only / ragged / wrong delimiter / BOM / non-UTF-8 text: exit 2,
  "Data file ... is empty", "has a header but no data rows", "rows do not all have the
  same fields (... line N)", "an opening quote on line N is never closed", "is not UTF-8
  text (first bad byte at offset N); re-save it as UTF-8", or, for a wrong delimiter,
  "was read as a single column ... say so with delimiter = ";" under [panel]".  A UTF-8
  BOM and CRLF are read.
* thousands separators, decimal commas, ``inf``/``NaN``/``#N/A`` strings: exit 2
  naming column, value and rows, and saying how to ask for the reading (``thousands`` /
  ``decimal`` under [panel]); ``inf`` as a market id names the rows.
* zero or negative prices and quantities, duplicate (market, period) keys (also across
  quarter spellings and padded labels): exit 2 naming column, value and rows.
  "Q1 2016" quarter labels are read as 2016Q1.
* one market with cluster errors, an instrument constant within markets, collinear
  instruments, too few supply instruments, a single period with market effects: exit 2
  naming the columns (or the period) and the remedy.
* extreme magnitudes (1e300, 1e-300, a period of 1e19): exit 2 naming the column and
  suggesting other units.
* study files: invalid TOML (with line and column), wrong types, unknown keys (with a
  did-you-mean), a negative seed, absurd hac_lags or bootstrap counts, a ``~unknownuser``
  path, a NUL in output.runs: exit 2 naming file and key.
* missing, dangling, unreadable data files, a path under a file, directories where a
  file belongs, a runs path that is a file, a 300-character file name: exit 2.
* Excel with several sheets or a title block, a CSV named .xlsx, Parquet with text
  numbers: exit 2 naming sheet or column and rows; clean text numbers in Parquet are
  read.  A Stata column with value labels in a numeric role: exit 2 naming the column
  and its labels and how to drop them; labelled market ids are read as codes.
* a supply cost shifter or instrument named ``Q`` or ``Q*`` (the supply relation's own
  names for quantity and the markup regressor, which it used to overwrite silently):
  exit 2 naming the column and asking to rename it.
"""

from __future__ import annotations

import ast
import copy
import csv
import io
import os
import pickle
import re
import subprocess
import sys
import unicodedata
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
from conftest import BASE_SPEC, Outcome, Project, assert_user_error, cournot_frame, to_toml

import conduct

Builder = Callable[[Project, pytest.MonkeyPatch], None]
Needle = str | tuple[str, ...] | re.Pattern[str]

# ----------------------------------------------------------------------------------------
# Building blocks for the corpus: each returns a Builder that breaks one thing.
# ----------------------------------------------------------------------------------------


def raw_csv(make: Callable[[pd.DataFrame], bytes | str]) -> Builder:
    """Write panel.csv as raw bytes or text made from the good frame."""

    def build(p: Project, mp: pytest.MonkeyPatch) -> None:
        data = make(p.frame.copy())
        (p.root / "panel.csv").write_bytes(data.encode("utf-8") if isinstance(data, str)
                                           else data)

    return build


def frame(change: Callable[[pd.DataFrame], pd.DataFrame], fmt: str = "csv") -> Builder:
    """Write the changed frame as panel.<fmt> (and point the study at it)."""

    def build(p: Project, mp: pytest.MonkeyPatch) -> None:
        f = change(p.frame.copy())
        path = p.root / f"panel.{fmt}"
        if fmt == "csv":
            f.to_csv(path, index=False)
        elif fmt == "parquet":
            f.to_parquet(path, index=False)
        else:
            raise ValueError(fmt)
        if fmt != "csv":
            p.edit(lambda s: s["panel"].update(file=path.name))

    return build


def study(change: Callable[[dict[str, Any]], None]) -> Builder:
    """Rewrite study.toml after changing a copy of the good specification."""

    def build(p: Project, mp: pytest.MonkeyPatch) -> None:
        p.edit(change)

    return build


def study_text(change: Callable[[str], str]) -> Builder:
    """Rewrite study.toml from its good text by a text substitution."""

    def build(p: Project, mp: pytest.MonkeyPatch) -> None:
        p.write_study(text=change(to_toml(p.spec)))

    return build


def both(*builders: Builder) -> Builder:
    def build(p: Project, mp: pytest.MonkeyPatch) -> None:
        for b in builders:
            b(p, mp)

    return build


def _set(col: str, rows: list[int], value: Any) -> Callable[[pd.DataFrame], pd.DataFrame]:
    def change(f: pd.DataFrame) -> pd.DataFrame:
        f = f.astype({col: object})
        f.loc[rows, col] = value
        return f

    return change


def _scale(col: str, k: float) -> Callable[[pd.DataFrame], pd.DataFrame]:
    def change(f: pd.DataFrame) -> pd.DataFrame:
        f[col] = f[col] * k
        return f

    return change


def _with(**cols: Callable[[pd.DataFrame], Any]) -> Callable[[pd.DataFrame], pd.DataFrame]:
    def change(f: pd.DataFrame) -> pd.DataFrame:
        for name, make in cols.items():
            f[name] = make(f)
        return f

    return change


def _replace_line(index: int, make: Callable[[str], str]) -> Callable[[pd.DataFrame], str]:
    def change(f: pd.DataFrame) -> str:
        lines = f.to_csv(index=False).splitlines()
        lines[index] = make(lines[index])
        return "\n".join(lines) + "\n"

    return change


def _quarter_labels(f: pd.DataFrame) -> list[str]:
    return [f"{2016 + (q - 2000) // 4}Q{(q - 2000) % 4 + 1}" for q in f["quarter"]]


def _two_sheets(p: Project, mp: pytest.MonkeyPatch) -> None:
    with pd.ExcelWriter(p.root / "panel.xlsx", engine="openpyxl") as book:
        p.frame.head(3).to_excel(book, sheet_name="notes", index=False)
        p.frame.to_excel(book, sheet_name="data", index=False)
    p.edit(lambda s: s["panel"].update(file="panel.xlsx"))


def _title_block(p: Project, mp: pytest.MonkeyPatch) -> None:
    with pd.ExcelWriter(p.root / "panel.xlsx", engine="openpyxl") as book:
        pd.DataFrame({"a": ["Road salt panel (invented)"]}).to_excel(
            book, sheet_name="data", index=False, header=False)
        p.frame.to_excel(book, sheet_name="data", index=False, startrow=2)
    p.edit(lambda s: s["panel"].update(file="panel.xlsx"))


def _xlsx_holding_csv(p: Project, mp: pytest.MonkeyPatch) -> None:
    (p.root / "panel.xlsx").write_text(p.frame.to_csv(index=False), encoding="utf-8")
    p.edit(lambda s: s["panel"].update(file="panel.xlsx"))


def _stata_labelled_numeric(p: Project, mp: pytest.MonkeyPatch) -> None:
    f = p.frame.copy()
    f["diesel"] = (f["diesel"].round(0) + 1).astype("int32")  # codes 1, 2, 3
    f.to_stata(p.root / "panel.dta", write_index=False,
               value_labels={"diesel": {1: "low", 2: "mid", 3: "high"}})
    p.edit(lambda s: s["panel"].update(file="panel.dta"))


def _stata_labelled_market(p: Project, mp: pytest.MonkeyPatch) -> None:
    f = p.frame.copy()
    f["region"] = f["region"].astype("int32")
    f.to_stata(p.root / "panel.dta", write_index=False,
               value_labels={"region": {i: f"Region {i}" for i in range(1, 13)}})
    p.edit(lambda s: s["panel"].update(file="panel.dta"))


def _dangling_link(p: Project, mp: pytest.MonkeyPatch) -> None:
    (p.root / "panel.csv").unlink()
    (p.root / "panel.csv").symlink_to(p.root / "moved-away.csv")


def _unreadable(p: Project, mp: pytest.MonkeyPatch) -> None:
    path = p.root / "panel.csv"
    path.chmod(0)
    if os.geteuid() == 0:  # root reads anything: make the read fail as it would for a user
        real = Path.read_bytes

        def read_bytes(self: Path) -> bytes:
            if self == path:
                raise PermissionError(13, "Permission denied", str(self))
            return real(self)

        mp.setattr(Path, "read_bytes", read_bytes)


def _study_is_directory(p: Project, mp: pytest.MonkeyPatch) -> None:
    p.study.unlink()
    p.study.mkdir()


def _data_is_directory(p: Project, mp: pytest.MonkeyPatch) -> None:
    (p.root / "panel.csv").unlink()
    (p.root / "panel.csv").mkdir()


def _runs_is_file(p: Project, mp: pytest.MonkeyPatch) -> None:
    p.runs.write_text("not a folder\n", encoding="utf-8")


def _single_period(p: Project, mp: pytest.MonkeyPatch) -> None:
    p.write_csv(cournot_frame(markets=40, periods=1))


def _single_market(p: Project, mp: pytest.MonkeyPatch) -> None:
    p.write_csv(cournot_frame(markets=1, periods=40))  # the market column is kept


def _log_with_rotator(s: dict[str, Any]) -> None:
    s["demand"].update(form="log", rotators=["winter"])


def _pad_market(f: pd.DataFrame) -> pd.DataFrame:
    f["region"] = [f"R{m}" for m in f["region"]]
    f.loc[1, "region"] = " R1 "
    f.loc[1, "quarter"] = f.loc[0, "quarter"]
    return f


def _two_spellings(f: pd.DataFrame) -> pd.DataFrame:
    f["quarter"] = _quarter_labels(f)
    f.loc[1, "quarter"] = "2016 q1"  # row 2 holds 2016Q1 for the same market
    return f


def _text_numbers(f: pd.DataFrame) -> pd.DataFrame:
    f["price"] = [f"{v:.6f}" for v in f["price"]]
    f.loc[10, "price"] = "12,5"
    f.loc[20, "price"] = "n.a."
    return f


def _text_overflow(f: pd.DataFrame) -> pd.DataFrame:
    f["price"] = [f"{v:.6f}" for v in f["price"]]
    f.loc[5, "price"] = "1e400"
    return f


def _rng_column(f: pd.DataFrame, scale: float = 1.0) -> np.ndarray:
    return scale * np.random.default_rng(7).uniform(0, 1, len(f))


class _Payload:
    """Unpickling this creates a marker file: proof that a file was unpickled."""

    def __init__(self, marker: Path) -> None:
        self.marker = marker

    def __reduce__(self) -> tuple[Any, ...]:
        return (Path.touch, (self.marker,))


# ----------------------------------------------------------------------------------------
# The corpus
# ----------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Case:
    """One bad input.

    Attributes
    ----------
    id : str
    klass : str
        The input class of issue 10, item 1.
    build : Builder
    needles : tuple
        Each must be in the message: a string, any one of a tuple of strings, or a regex.
    stage : str
        ``load``: ``check`` and ``estimate`` both refuse; ``estimate``: only estimating
        can see the problem.
    bug : str or None
        Reason for a strict xfail: file:function, what is wrong, suggested fix.
    """

    id: str
    klass: str
    build: Builder
    needles: tuple[Needle, ...]
    stage: str = "load"
    bug: str | None = None


SCALE_WORDS = re.compile(r"(?i)rescal|magnitude|scale|units")

CORPUS: list[Case] = [
    # --- empty file
    Case("empty-zero-bytes", "empty file", raw_csv(lambda f: b""), ("panel.csv", "is empty")),
    Case("empty-only-whitespace", "empty file", raw_csv(lambda f: "\n \n\t\n"),
         ("panel.csv", "is empty")),
    Case("empty-only-bom", "empty file", raw_csv(lambda f: b"\xef\xbb\xbf"),
         ("panel.csv", "empty")),
    # --- header only
    Case("header-only-no-newline", "header only",
         raw_csv(lambda f: ",".join(f.columns)), ("panel.csv", "header but no data rows")),
    Case("header-then-blank-lines", "header only",
         raw_csv(lambda f: ",".join(f.columns) + "\n\n\n"),
         ("panel.csv", "header but no data rows")),
    # --- ragged rows
    Case("ragged-extra-fields", "ragged rows",
         raw_csv(_replace_line(20, lambda line: line + ",,7")),
         ("panel.csv", "same fields", "line 21")),
    Case("ragged-unclosed-quote", "ragged rows",
         raw_csv(_replace_line(5, lambda line: '"' + line)),
         ("panel.csv", re.compile(r"(?i)quote"), re.compile(r"\b(line|row) 6\b"))),
    # --- wrong delimiter
    Case("delimiter-semicolon", "wrong delimiter",
         raw_csv(lambda f: f.to_csv(index=False, sep=";")),
         ("panel.csv", "'region'", "region;quarter;price")),
    Case("delimiter-tab", "wrong delimiter", raw_csv(lambda f: f.to_csv(index=False, sep="\t")),
         ("panel.csv", "'region'")),
    Case("delimiter-pipe", "wrong delimiter", raw_csv(lambda f: f.to_csv(index=False, sep="|")),
         ("panel.csv", "'region'", "region|quarter")),
    # --- byte-order marks
    Case("bom-utf16-le", "byte-order mark",
         raw_csv(lambda f: f.to_csv(index=False).encode("utf-16")),
         ("panel.csv", "not UTF-8", "offset 0")),
    Case("bom-utf16-be", "byte-order mark",
         raw_csv(lambda f: b"\xfe\xff" + f.to_csv(index=False).encode("utf-16-be")),
         ("panel.csv", "not UTF-8")),
    # --- non-UTF-8 text
    Case("latin1-market-label", "non-UTF-8 text",
         raw_csv(lambda f: f.assign(region=[f"Région {m}" for m in f["region"]])
                 .to_csv(index=False).encode("latin-1")),
         ("panel.csv", "not UTF-8", "offset")),
    Case("cp1252-header", "non-UTF-8 text",
         both(raw_csv(lambda f: f.rename(columns={"income": "revenu€"})
                      .to_csv(index=False).encode("cp1252")),
              study(lambda s: s["demand"].update(shifters=["revenu€"]))),
         ("panel.csv", "not UTF-8", "offset 42")),
    Case("binary-pickle-as-csv", "non-UTF-8 text",
         raw_csv(lambda f: pickle.dumps(f)), ("panel.csv", "not UTF-8")),
    # --- thousands separators and decimal commas
    Case("thousands-comma", "thousands separators",
         frame(lambda f: f.assign(tonnes=[f"{v * 100:,.2f}" for v in f["tonnes"]])),
         ("panel.csv", "'tonnes'", "must be numeric", "rows 2, 3")),
    Case("thousands-space", "thousands separators",
         frame(lambda f: f.assign(tonnes=[f"{v * 100:,.1f}".replace(",", " ")
                                          for v in f["tonnes"]])),
         ("'tonnes'", "must be numeric", "rows 2, 3")),
    Case("decimal-comma-quoted", "decimal commas",
         frame(lambda f: f.assign(price=[f"{v:.3f}".replace(".", ",") for v in f["price"]])),
         ("'price'", "decimal comma", "rows 2, 3")),
    Case("decimal-comma-semicolon-file", "decimal commas",
         raw_csv(lambda f: f.to_csv(index=False, sep=";", decimal=",")),
         ("panel.csv", "'region'")),
    # --- inf / NaN strings
    Case("inf-in-instrument", "inf/NaN strings", frame(_set("diesel", [3], "inf")),
         ("'diesel'", "infinite", "row 5")),
    Case("minus-infinity-price", "inf/NaN strings", frame(_set("price", [3], "-Infinity")),
         ("'price'", "infinite", "row 5")),
    Case("nan-quantity", "inf/NaN strings", frame(_set("tonnes", [7], "NaN")),
         ("'tonnes'", "missing values", "row 9", "drop_missing")),
    Case("excel-na-shifter", "inf/NaN strings", frame(_set("income", [7, 8], "#N/A")),
         ("'income'", "missing values", "rows 9, 10")),
    Case("nan-market-label", "inf/NaN strings", frame(_set("region", [24], "nan")),
         ("'region'", "missing values", "row 26")),
    Case("inf-period", "inf/NaN strings", frame(_set("quarter", [3], "inf")),
         ("'quarter'", "row 5")),
    Case("inf-market-id", "inf/NaN strings", frame(_set("region", [3], "inf")),
         ("'region'", "row 5")),
    # --- zero or negative prices and quantities
    Case("zero-price", "zero or negative price/quantity", frame(_set("price", [4], 0.0)),
         ("'price'", "must be positive", "row 6")),
    Case("negative-quantity-parquet", "zero or negative price/quantity",
         frame(_set("tonnes", [4], -3.0), fmt="parquet"),
         ("panel.parquet", "'tonnes'", "-3", "row 5")),
    Case("zero-quantity-log-demand", "zero or negative price/quantity",
         both(frame(_set("tonnes", [10], 0.0)), study(_log_with_rotator)),
         ("'tonnes'", "must be positive", "row 12")),
    # --- duplicate (market, period) keys
    Case("duplicate-row", "duplicate keys",
         frame(lambda f: pd.concat([f, f.iloc[[2]]], ignore_index=True)),
         ("(market, period)", "rows 4, 146")),
    Case("duplicate-quarter-spellings", "duplicate keys", frame(_two_spellings),
         ("(market, period)", "2016Q1", "rows 2, 3")),
    Case("duplicate-padded-market", "duplicate keys", frame(_pad_market),
         ("(market, period)", "'R1'", "rows 2, 3")),
    # --- identification and estimation
    Case("cluster-errors-one-market", "cluster errors with a single market",
         _single_market, ("cluster-robust", "single market", '"robust"', '"hac"'),
         stage="estimate"),
    Case("single-period", "single period", _single_period,
         (("single period", "one period", "1 period"),), stage="estimate"),
    Case("instrument-constant-within-markets", "constant instrument",
         both(frame(_with(flatm=lambda f: 1.5 * f["region"])),
              study(lambda s: s["demand"].update(instruments=["diesel", "flatm"]))),
         ("'flatm'", "no variation", "effects"), stage="estimate"),
    Case("instruments-sum-collinear", "collinear instruments",
         both(frame(_with(w2=_rng_column, w3=lambda f: f["diesel"] + f["w2"])),
              study(lambda s: s["demand"].update(instruments=["diesel", "w2", "w3"]))),
         ("collinear", "condition number", "w3", "Drop one"), stage="estimate"),
    Case("instrument-multiple-of-shifter", "collinear instruments",
         both(frame(_with(inc2=lambda f: 2 * f["income"])),
              study(lambda s: s["demand"].update(instruments=["diesel", "inc2"]))),
         ("collinear", "inc2"), stage="estimate"),
    Case("too-few-supply-instruments-log", "fewer instruments than endogenous",
         study(lambda s: (s["demand"].update(form="log", rotators=["winter"], shifters=[]),
                          s["supply"].update(cost_slope=True))),
         ("2 endogenous", "only 1 excluded instrument", "(winter)")),
    # --- extreme magnitudes
    Case("price-1e300", "extreme magnitudes", frame(_scale("price", 1e300)),
         ("'price'", SCALE_WORDS), stage="estimate"),
    Case("quantity-1e-300", "extreme magnitudes", frame(_scale("tonnes", 1e-300)),
         ("'tonnes'", SCALE_WORDS), stage="estimate"),
    Case("instrument-1e300", "extreme magnitudes", frame(_scale("diesel", 1e300)),
         ("'diesel'", SCALE_WORDS), stage="estimate"),
    Case("period-beyond-int64", "extreme magnitudes", frame(_set("quarter", [3], "1e19")),
         ("'quarter'", "row 5")),
    Case("shifter-1e-300", "extreme magnitudes", frame(_scale("income", 1e-300)),
         ("'income'", SCALE_WORDS), stage="estimate"),
    # --- non-ASCII column names
    Case("non-ascii-misspelt", "non-ASCII column names",
         both(frame(lambda f: f.rename(columns={"price": "Preis_€"})),
              study(lambda s: s["panel"].update(price="preis_€"))),
         ("'preis_€'", "did you mean 'Preis_€'?")),
    Case("non-ascii-cjk-missing", "non-ASCII column names",
         both(frame(lambda f: f.rename(columns={"tonnes": "数量"})),
              study(lambda s: s["panel"].update(quantity="数值"))),
         ("'数值'", "数量")),
    # --- a column named like the supply relation's own terms (was silently overwritten)
    Case("column-named-Q", "reserved names",
         both(frame(lambda f: f.rename(columns={"income": "Q"})),
              study(lambda s: s["demand"].update(shifters=["Q"]))),
         ("'Q'", "supply-relation instrument", "Rename"), stage="estimate"),
    # --- invalid TOML
    Case("toml-duplicate-key", "invalid TOML",
         study_text(lambda t: t.replace("[demand]\n", '[demand]\nform = "linear"\n'
                                                      'form = "log"\n')),
         ("study.toml", "not valid TOML", "line 11")),
    Case("toml-unterminated-string", "invalid TOML",
         study_text(lambda t: t.replace('"test study"', '"test study')),
         ("study.toml", "not valid TOML", "line 1")),
    Case("toml-nul-byte", "invalid TOML",
         study_text(lambda t: t.replace('"test study"', '"te\x00st"')),
         ("study.toml", "not valid TOML")),
    Case("toml-table-twice", "invalid TOML",
         study_text(lambda t: t + '[panel]\nfile = "other.csv"\n'),
         ("study.toml", "not valid TOML")),
    # --- wrong types
    Case("type-effects-bare-string", "wrong types",
         study(lambda s: s["demand"].update(effects="market")),
         ("study.toml", "'demand.effects'", "list")),
    Case("type-bootstrap-string", "wrong types",
         study(lambda s: s.update(inference={"bootstrap": "50"})),
         ("'inference.bootstrap'", "integer")),
    Case("type-level-percent", "wrong types", study(lambda s: s.update(inference={"level": 95})),
         ("'inference.level'", "0.95")),
    Case("type-panel-not-a-table", "wrong types",
         study_text(lambda t: 'title = "x"\npanel = "panel.csv"\n[demand]\n'
                              'instruments = ["diesel"]\n'),
         ("'panel'", "must be a table")),
    Case("type-cost-slope-yes", "wrong types",
         study(lambda s: s["supply"].update(cost_slope="yes")),
         ("'supply.cost_slope'", "true or false")),
    Case("type-seed-negative", "wrong types",
         study(lambda s: s.update(inference={"seed": -1, "bootstrap": 2})),
         ("'inference.seed'",)),
    Case("type-hac-lags-absurd", "wrong types",
         study(lambda s: s["demand"].update(errors="hac", hac_lags=10**12)),
         ("'demand.hac_lags'",), stage="estimate"),
    # --- unknown keys
    Case("unknown-key-separator", "unknown keys",
         study(lambda s: s["panel"].update(separator=";")),
         ("'panel.separator'", "Valid keys here")),
    Case("unknown-table-outputs", "unknown keys",
         study(lambda s: s.update(outputs={"runs": "r"})),
         ("'outputs'", "did you mean 'output'?")),
    Case("unknown-key-replications", "unknown keys",
         study(lambda s: s.update(inference={"replications": 50})),
         ("'inference.replications'",)),
    # --- missing or unreadable data file
    Case("data-file-missing", "missing or unreadable data file",
         study(lambda s: s["panel"].update(file="nope.csv")), ("nope.csv", "does not exist")),
    Case("data-file-dangling-link", "missing or unreadable data file", _dangling_link,
         ("panel.csv", "does not exist")),
    Case("data-file-permission-denied", "missing or unreadable data file", _unreadable,
         ("panel.csv", "permission denied")),
    Case("data-file-under-a-file", "missing or unreadable data file",
         study(lambda s: s["panel"].update(file="panel.csv/inner.csv")),
         ("inner.csv", "does not exist")),
    Case("data-file-name-too-long", "missing or unreadable data file",
         study(lambda s: s["panel"].update(file="p" * 300 + ".csv")),
         ("ppppp", "too long")),
    Case("data-file-unknown-home", "missing or unreadable data file",
         study(lambda s: s["panel"].update(file="~nosuchuser_conduct/panel.csv")),
         ("~nosuchuser_conduct",)),
    Case("runs-path-with-nul", "missing or unreadable data file",
         study_text(lambda t: t + '[output]\nruns = "r\\u0000uns"\n'),
         ("output.runs",), stage="estimate"),
    # --- directory where a file should be
    Case("data-file-is-directory", "directory instead of file", _data_is_directory,
         ("panel.csv", "is a directory")),
    Case("study-file-is-directory", "directory instead of file", _study_is_directory,
         ("study.toml", "is a directory")),
    Case("runs-folder-is-a-file", "directory instead of file", _runs_is_file,
         ("runs folder", "runs"), stage="estimate"),
    # --- Excel
    Case("excel-two-sheets", "Excel with several sheets", _two_sheets,
         ("panel.xlsx", "2 sheets", "notes, data", "panel.sheet")),
    Case("excel-title-block", "Excel with several sheets", _title_block,
         ("panel.xlsx", "'region'", "Columns present")),
    Case("excel-suffix-on-csv-text", "Excel with several sheets", _xlsx_holding_csv,
         ("panel.xlsx", "could not be read")),
    # --- Parquet with string-typed numbers
    Case("parquet-text-numbers", "Parquet with string-typed numbers",
         frame(_text_numbers, fmt="parquet"),
         ("panel.parquet", "'price'", "'12,5'", "rows 11, 21")),
    Case("parquet-text-overflow", "Parquet with string-typed numbers",
         frame(_text_overflow, fmt="parquet"),
         ("panel.parquet", "'price'", "infinite", "row 6")),
    # --- Stata value labels
    Case("stata-labelled-numeric-column", "Stata file with labelled categories",
         _stata_labelled_numeric, ("panel.dta", "'diesel'", "value labels", "'low'")),
]

ACCEPTED: list[tuple[str, Builder]] = [
    ("utf8-bom", raw_csv(lambda f: b"\xef\xbb\xbf" + f.to_csv(index=False).encode())),
    ("crlf-line-ends", raw_csv(lambda f: f.to_csv(index=False, lineterminator="\r\n"))),
    ("parquet-clean-text-numbers",
     frame(lambda f: f.assign(price=[f"{v:.9f}" for v in f["price"]]), fmt="parquet")),
    ("non-ascii-names",
     both(frame(lambda f: f.rename(columns={"price": "prix_€", "tonnes": "数量",
                                            "region": "région"})),
          study(lambda s: s["panel"].update(price="prix_€", quantity="数量",
                                            market="région")))),
    ("stata-labelled-market", _stata_labelled_market),
    ("quarter-labels-quarter-first",  # "Q1 2016" has one reading: 2016Q1
     frame(lambda f: f.assign(quarter=[f"Q{q[-1]} {q[:4]}" for q in _quarter_labels(f)]))),
    ("quarter-labels-mixed-spelling",
     frame(lambda f: f.assign(quarter=[q.replace("Q", " q") if i % 2 else q
                                       for i, q in enumerate(_quarter_labels(f))]))),
]


def _matches(message: str, needle: Needle) -> bool:
    if isinstance(needle, re.Pattern):
        return needle.search(message) is not None
    if isinstance(needle, tuple):
        return any(n in message for n in needle)
    return needle in message


def _runs_state(p: Project) -> Any:
    if not p.runs.exists():
        return None
    if p.runs.is_file():
        return ("file", p.runs.read_bytes())
    return sorted(x.name for x in p.runs.iterdir())


def _assert_refused(res: Outcome, case: Case, root: Path) -> None:
    assert_user_error(res)
    message = res.message.replace(str(root), "<tmp>")  # the test's folder name is no evidence
    missing = [n for n in case.needles if not _matches(message, n)]
    assert not missing, f"{case.id}: {missing!r} not in message: {message}"


def _params(cases: list[Case]) -> list[Any]:
    return [pytest.param(c, id=c.id, marks=[pytest.mark.xfail(strict=True, reason=c.bug)]
                         if c.bug else []) for c in cases]


def test_corpus_is_large_and_covers_every_class() -> None:
    ids = [c.id for c in CORPUS]
    assert len(ids) == len(set(ids)) >= 40
    classes = {c.klass for c in CORPUS}
    expected = {
        "empty file", "header only", "ragged rows", "wrong delimiter", "byte-order mark",
        "non-UTF-8 text", "thousands separators", "decimal commas", "inf/NaN strings",
        "zero or negative price/quantity", "duplicate keys",
        "cluster errors with a single market", "single period", "constant instrument",
        "collinear instruments", "fewer instruments than endogenous", "extreme magnitudes",
        "non-ASCII column names", "invalid TOML", "wrong types", "unknown keys",
        "missing or unreadable data file", "directory instead of file",
        "Excel with several sheets", "Parquet with string-typed numbers",
        "Stata file with labelled categories", "reserved names",
    }
    assert classes == expected


@pytest.mark.parametrize("case", _params(CORPUS))
def test_bad_input_is_a_clear_user_error(project: Project, monkeypatch: pytest.MonkeyPatch,
                                         case: Case) -> None:
    case.build(project, monkeypatch)
    before = _runs_state(project)
    if case.stage == "load":
        _assert_refused(project.check(), case, project.root)
    _assert_refused(project.estimate(), case, project.root)
    assert _runs_state(project) == before, "a failed estimate left a run folder or history"


@pytest.mark.parametrize("build", [pytest.param(b, id=i) for i, b in ACCEPTED])
def test_inputs_with_one_sensible_reading_are_read(project: Project,
                                                   monkeypatch: pytest.MonkeyPatch,
                                                   build: Builder) -> None:
    build(project, monkeypatch)
    res = project.check()
    assert res.code == 0, res.err
    assert "rows 144, markets 12, periods 12" in res.out


# ----------------------------------------------------------------------------------------
# Inputs with a sensible reading that conduct does not take: say how to ask for it.
# ----------------------------------------------------------------------------------------

ASK = re.compile(r"\[panel\]|\bpanel\.(?!(?:csv|parquet|pq|dta|xlsx)\b)[a-z_]+")
HINTS = [
    pytest.param(frame(lambda f: f.assign(tonnes=[f"{v * 100:,.2f}" for v in f["tonnes"]])),
                 re.compile(r"(?i)thousands"), id="thousands-separator"),
    pytest.param(frame(lambda f: f.assign(price=[f"{v:.3f}".replace(".", ",")
                                                 for v in f["price"]])),
                 re.compile(r"(?i)decimal"), id="decimal-comma"),
    pytest.param(raw_csv(lambda f: f.to_csv(index=False, sep=";")),
                 re.compile(r"(?i)delimiter|separator"), id="semicolon-delimiter"),
]


@pytest.mark.parametrize(("build", "topic"), HINTS)
def test_message_says_how_to_ask_for_the_sensible_reading(
        project: Project, monkeypatch: pytest.MonkeyPatch, build: Builder,
        topic: re.Pattern[str]) -> None:
    build(project, monkeypatch)
    msg = assert_user_error(project.check())
    assert topic.search(msg) and ASK.search(msg), msg


def test_decomposed_accents_in_column_names(project: Project) -> None:
    nfd = unicodedata.normalize("NFD", "région")
    project.write_csv(project.frame.rename(columns={"region": nfd}))
    project.edit(lambda s: s["panel"].update(market=unicodedata.normalize("NFC", "région")))
    res = project.check()
    msg = res.message.replace(str(project.root), "<root>")
    assert res.code == 0 or (res.code == 2 and re.search(r"(?i)unicode|normali", msg)), res.err


def test_large_numeric_market_ids_stay_distinct(project: Project) -> None:
    f = project.frame[project.frame["region"] <= 2].copy()
    f = f[(f["region"] == 1) & (f["quarter"] < 2006) | (f["region"] == 2) & (f["quarter"] >= 2006)]
    f["region"] = f["region"] * 1e20
    project.write_csv(f)
    res = project.check()
    assert res.code == 0, res.err
    assert "markets 2" in res.out, res.out


def test_absurd_bootstrap_count_is_refused(tmp_path: Path) -> None:
    from conduct.errors import StudyFileError
    from conduct.study import parse_study

    spec = copy.deepcopy(BASE_SPEC)
    spec["inference"] = {"bootstrap": 10**15}
    with pytest.raises(StudyFileError, match=r"inference\.bootstrap"):
        parse_study(to_toml(spec), tmp_path / "study.toml")


# ----------------------------------------------------------------------------------------
# A handful of corpus cases through the real entry point, in subprocesses run together.
# ----------------------------------------------------------------------------------------

SUBPROCESS_CASES = ("bom-utf16-le", "toml-duplicate-key", "parquet-text-numbers",
                    "duplicate-quarter-spellings")


def test_corpus_through_the_console_entry_point(tmp_path: Path) -> None:
    by_id = {c.id: c for c in CORPUS}
    env = {k: v for k, v in os.environ.items() if k != "PYTHONWARNINGS"}
    procs = {}
    for cid in SUBPROCESS_CASES:
        case = by_id[cid]
        assert case.bug is None
        root = tmp_path / cid
        root.mkdir()
        proj = Project(root, cournot_frame(), copy.deepcopy(BASE_SPEC), None)
        proj.write_csv()
        proj.write_study()
        with pytest.MonkeyPatch.context() as mp:
            case.build(proj, mp)
        cmd = [sys.executable, "-m", "conduct.cli", "estimate", "study.toml"]
        procs[cid] = (subprocess.Popen(cmd, cwd=root, env=env, stdout=subprocess.PIPE,
                                       stderr=subprocess.PIPE, text=True), proj)
    for cid, (proc, proj) in procs.items():
        out, err = proc.communicate(timeout=300)
        res = Outcome(proc.returncode, out, err)
        _assert_refused(res, by_id[cid], proj.root)
        assert out == ""
        assert not proj.runs.exists()


# ----------------------------------------------------------------------------------------
# Hostile strings: escaped in report.html, neutralised in CSV, never evaluated.
# ----------------------------------------------------------------------------------------

HOSTILE_MARKETS = {
    1: "<script>alert(1)</script>",
    2: '=HYPERLINK("http://example.invalid/x","open")',
    3: "+cmd|' /C calc'!A0",
    4: "@SUM(A1:A9)",
    5: "-2+3",
    6: "\t=1+1",
    7: 'quote " and, comma',
}
FORMULA_START = ("=", "+", "-", "@", "\t", "\r")


def _is_number(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


def _hostile_project(project: Project) -> Project:
    f = project.frame.copy()
    f["region"] = [HOSTILE_MARKETS.get(m, f"R{m}") for m in f["region"]]
    f = f.rename(columns={"income": "<b>inc</b>", "diesel": "=diesel"})
    project.write_csv(f)

    def change(s: dict[str, Any]) -> None:
        s["demand"].update(shifters=["<b>inc</b>"], instruments=["=diesel"])
        s["supply"].update(cost_shifters=["=diesel"])
        s["title"] = "<img src=x onerror=alert(2)> study"

    project.edit(change)
    return project


def test_hostile_strings_are_escaped_and_neutralised(project: Project) -> None:
    _hostile_project(project)
    res = project.estimate("--quiet")
    assert res.code == 0, res.err
    (folder,) = [p for p in project.runs.iterdir() if p.is_dir()]
    html = (folder / "report.html").read_text(encoding="utf-8")
    for raw in ("<script>alert(1)</script>", "<b>inc</b>", "<img src=x onerror"):
        assert raw not in html
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in html
    assert "&lt;b&gt;inc&lt;/b&gt;" in html
    assert "&lt;img src=x onerror=alert(2)&gt;" in html
    # every CSV cell that a spreadsheet would run as a formula is neutralised
    seen = set()
    files = sorted(folder.rglob("*.csv"))
    assert {"observations.csv", "data_rows.csv", "demand_coefficients.csv"} <= {
        p.name for p in files}
    for path in files:
        for row in csv.reader(io.StringIO(path.read_text(encoding="utf-8"))):
            for cell in row:
                seen.add(cell)
                assert not (cell.startswith(FORMULA_START) and not _is_number(cell)), \
                    f"{path.name}: {cell!r}"
    for label in list(HOSTILE_MARKETS.values())[1:6]:
        assert "'" + label.strip() in seen  # the label is there, neutralised
    assert "'=diesel" in seen


@pytest.mark.parametrize("where", ["candidate-name", "price-column"])
def test_dollar_signs_in_names_do_not_break_figures(project: Project, where: str) -> None:
    if where == "candidate-name":
        project.edit(lambda s: s.update(models={"candidates": [
            "competitive", "collusive", {"name": "$\\frac$ plan", "theta": 0.5}]}))
    else:
        project.write_csv(project.frame.rename(columns={"price": "p $\\frac$"}))
        project.edit(lambda s: s["panel"].update(price="p $\\frac$"))
    res = project.estimate("--quiet")
    assert res.code == 0, res.err


PAYLOAD_SUFFIXES = ["csv", "parquet", "pq", "dta", "xlsx"]


@pytest.mark.parametrize("suffix", PAYLOAD_SUFFIXES)
def test_data_files_are_never_unpickled(project: Project, suffix: str) -> None:
    marker = project.root / f"unpickled-{suffix}"
    (project.root / f"panel.{suffix}").write_bytes(pickle.dumps(_Payload(marker)))
    project.edit(lambda s: s["panel"].update(file=f"panel.{suffix}"))
    assert_user_error(project.check(), f"panel.{suffix}")
    assert_user_error(project.estimate(), f"panel.{suffix}")
    assert not marker.exists()
    assert not project.runs.exists()


def test_study_strings_are_never_evaluated(project: Project) -> None:
    marker = project.root / "evaluated"
    code = f"__import__('pathlib').Path({str(marker)!r}).touch()"

    def change(s: dict[str, Any]) -> None:
        s["title"] = code
        s["panel"]["market"] = "{" + code + "}"
        s["demand"]["shifters"] = [f"$(touch {marker})"]

    project.edit(change)
    msg = assert_user_error(project.check(), "{__import__(", "not in the data")
    assert "Columns present" in msg
    project.edit(lambda s: s["panel"].update(file=f"`touch {marker}`.csv"))
    assert_user_error(project.check(), "`touch", "does not exist")
    assert not marker.exists()


# Calls that would evaluate or unpickle text.  The executor pickles its own task
# functions for its worker processes and unpickles only those bytes: allowed.
EVALUATING_BUILTINS = {"eval", "exec", "compile", "__import__"}
EVALUATING_METHODS = {"eval", "query", "read_pickle", "unsafe_load", "full_load"}
UNPICKLING_MODULES = {"pickle", "marshal", "dill", "cloudpickle", "shelve", "yaml", "joblib"}
ALLOWED = {("executor.py", "pickle.loads")}


def _risky_call(node: ast.Call) -> str | None:
    func = node.func
    if any(k.arg == "allow_pickle" for k in node.keywords):
        return "allow_pickle="
    if isinstance(func, ast.Name) and func.id in EVALUATING_BUILTINS:
        return func.id
    if isinstance(func, ast.Attribute):
        base = func.value.id if isinstance(func.value, ast.Name) else "<expr>"
        name = f"{base}.{func.attr}"
        if func.attr in EVALUATING_METHODS:
            return name
        if func.attr in ("load", "loads") and base in UNPICKLING_MODULES:
            return name
    return None


def test_package_never_evaluates_or_unpickles_input() -> None:
    found = []
    for path in sorted(Path(conduct.__file__).parent.rglob("*.py")):
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            name = _risky_call(node) if isinstance(node, ast.Call) else None
            if name and (path.name, name) not in ALLOWED:
                found.append(f"{path.name}:{node.lineno}: {name}")
    assert not found, found
