"""Round trips: one panel written as CSV, Parquet, Stata and Excel gives one answer.

Each format is written with the ordinary pandas writer, estimated through
``conduct estimate --json``, and every number in the summary must agree to
1e-10; only the data file's name and hash may differ.
"""

from __future__ import annotations

import json
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
from conftest import Project

WRITERS: dict[str, Callable[[pd.DataFrame, Path], None]] = {
    "csv": lambda f, p: f.to_csv(p, index=False),
    "parquet": lambda f, p: f.to_parquet(p, index=False),
    "dta": lambda f, p: f.to_stata(p, write_index=False),
    "xlsx": lambda f, p: f.to_excel(p, index=False, engine="openpyxl"),
}
VOLATILE = {"run", "provenance"}


def _estimate_each(project: Project, frame: pd.DataFrame,
                   suffixes: list[str]) -> dict[str, dict[str, Any]]:
    out = {}
    for suffix in suffixes:
        WRITERS[suffix](frame, project.root / f"panel.{suffix}")
        project.edit(lambda s, x=suffix: s["panel"].update(file=f"panel.{x}"))
        res = project.estimate("--json", "--label", suffix)
        assert res.code == 0, f"{suffix}: {res.err}"
        out[suffix] = json.loads(res.out)
    return out


def _assert_same(a: Any, b: Any, where: str = "") -> None:
    if isinstance(a, dict):
        assert isinstance(b, dict) and set(a) == set(b), where
        for k in a:
            # the data hash, file name and the comparison with the previous run differ by run
            if k not in VOLATILE and (where, k) not in {
                    ("data", "sha256"), ("data", "file"), ("data", "changes"),
                    ("data", "sources"),
                    ("data", "changes_line")}:
                _assert_same(a[k], b[k], k if not where else f"{where}.{k}")
    elif isinstance(a, list):
        assert isinstance(b, list) and len(a) == len(b), where
        for i, (x, y) in enumerate(zip(a, b, strict=True)):
            _assert_same(x, y, f"{where}[{i}]")
    elif isinstance(a, float) and not isinstance(a, bool):
        assert b == pytest.approx(a, rel=1e-10, abs=1e-10), where
    else:
        assert a == b, where


def test_every_format_gives_the_same_estimates(project: Project) -> None:
    formats = list(WRITERS)
    results = _estimate_each(project, project.frame, formats)
    ref = results["csv"]
    assert ref["conduct"]["theta"] is not None
    for suffix in formats[1:]:
        _assert_same(ref, results[suffix])
        assert results[suffix]["data"]["file"] == f"panel.{suffix}"
        assert (results[suffix]["conduct"]["theta"]
                == pytest.approx(ref["conduct"]["theta"], abs=1e-10))
    hashes = {r["data"]["sha256"] for r in results.values()}
    assert len(hashes) == len(formats)
    for key in ("rows", "markets", "periods", "first_period", "last_period", "dropped_rows"):
        assert {r["data"][key] for r in results.values()} == {ref["data"][key]}
    assert (ref["data"]["rows"], ref["data"]["markets"], ref["data"]["periods"]) == (144, 12, 12)
    # each run landed in its own folder with its label
    assert sorted(p.name for p in project.runs.iterdir() if p.is_dir()) == sorted(formats)


def test_quarter_labels_round_trip(project: Project) -> None:
    f = project.frame.copy()
    f["quarter"] = [f"{2016 + (q - 2000) // 4}Q{(q - 2000) % 4 + 1}" for q in f["quarter"]]
    results = _estimate_each(project, f, list(WRITERS))
    ref = results["csv"]
    assert (ref["data"]["first_period"], ref["data"]["last_period"]) == ("2016Q1", "2018Q4")
    for suffix in ("parquet", "dta", "xlsx"):
        _assert_same(ref, results[suffix])


def test_native_dates_match_iso_text(project: Project) -> None:
    """A datetime column in Parquet and Excel equals ISO date text in CSV."""
    f = project.frame.copy()
    f["quarter"] = pd.to_datetime([f"{2010 + q - 2000}-06-30" for q in f["quarter"]])
    results = _estimate_each(project, f, ["csv", "parquet", "xlsx"])
    ref = results["csv"]
    assert (ref["data"]["first_period"], ref["data"]["last_period"]) == (
        "2010-06-30", "2021-06-30")
    for suffix in ("parquet", "xlsx"):
        _assert_same(ref, results[suffix])


def test_pq_suffix_reads_parquet(project: Project) -> None:
    project.frame.to_parquet(project.root / "panel.pq", index=False)
    project.edit(lambda s: s["panel"].update(file="panel.pq"))
    res = project.check()
    assert res.code == 0, res.err
    assert "rows 144, markets 12, periods 12" in res.out


def test_stata_labels_under_another_name_and_repeated_are_refused(tmp_path) -> None:  # type: ignore[no-untyped-def]
    """A label set named unlike its variable, with a repeated label (pandas cannot make
    categories of it), still marks the column as codes (``label values diesel dlab``)."""
    from conduct.errors import DataError
    from conduct.tableio import read_table, to_numeric

    path = tmp_path / "lab.dta"
    frame = pd.DataFrame({"region": ["A", "B", "C"],
                          "diesel": np.array([1, 2, 3], dtype=np.int32)})
    frame.to_stata(path, write_index=False, version=118,
                   value_labels={"diesel": {1: "low", 2: "low", 3: "high"}})
    raw = bytearray(path.read_bytes())
    name = b"diesel\x00"
    at = [i for i in range(len(raw)) if raw.startswith(name, i)]
    for i in at[1:]:  # the variable's label-list entry and the label table's own name
        raw[i:i + len(name)] = b"dlab\x00\x00\x00"
    path.write_bytes(bytes(raw))
    with pytest.raises(ValueError):  # the case: pandas refuses to make categories
        pd.read_stata(path, convert_categoricals=True)
    table = read_table(path)
    with pytest.raises(DataError, match="'diesel' carries Stata value labels"):
        to_numeric(table, "diesel", path, np.arange(3) + 1)
