"""Scheduled reruns: history, what is new, compare, alerts, concurrency and rebuild."""

from __future__ import annotations

import json
import sqlite3
import subprocess
import sys
from pathlib import Path

import pandas as pd

from conduct.cli import main
from conduct.presets import write_study
from conduct.runs import read_history
from conduct.simulate import Episode, SimulationSpec
from conduct.study import load_study


def _quarterly_study(tmp_path: Path) -> tuple[Path, pd.DataFrame]:
    # 12 years of quarters; conduct turns collusive in every market for the last two years
    spec = SimulationSpec(markets=16, periods=48, seed=21, break_test=True,
                          episodes=(Episode("collusive", tuple(range(1, 17)), 41, 48),))
    study = write_study(tmp_path / "q", spec)
    full = pd.read_csv(study.parent / "panel.csv")
    return study, full


def test_quarterly_reruns_history_compare_and_alerts(tmp_path, capsys):
    study, full = _quarterly_study(tmp_path)
    quarters = list(dict.fromkeys(full["quarter"]))
    codes = {}
    for k in range(38, 49):  # the first 9.5 years, then one quarter at a time
        full[full["quarter"].isin(quarters[:k])].to_csv(study.parent / "panel.csv", index=False)
        codes[k] = main(["estimate", str(study), "--quiet", "--alert", "verdict-change",
                         "--alert", "break"])
    capsys.readouterr()
    # no alert before the change of conduct; exit codes are exactly 0 or 3
    assert all(codes[k] == 0 for k in (38, 39, 40)), codes
    assert set(codes.values()) <= {0, 3}
    assert any(codes[k] == 3 for k in range(41, 49)), codes
    runs = study.parent / "runs"
    hist = read_history(runs)
    assert len(hist) == 11
    assert list(hist["last_period"]) == quarters[37:48]
    # each run records what is new since the previous one
    last = json.loads((runs / hist["folder"].iloc[-1] / "summary.json").read_text())
    assert last["data"]["changes"]["new_periods"] == [quarters[47]]
    assert last["data"]["changes"]["revised_rows"] == 0
    alerted = [json.loads((runs / f / "summary.json").read_text())["alerts"]
               for f in hist["folder"]]
    assert [bool(a) for a in alerted] == [codes[k] == 3 for k in range(38, 49)]
    # compare the last two runs
    assert main(["compare", str(study), "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["data"]["new_periods"] == [quarters[47]]
    assert doc["data"]["new_rows"] == 16
    assert Path(doc["figure"]).exists()
    assert main(["history", str(study), "--json"]) == 0
    assert len(json.loads(capsys.readouterr().out)) == 11


def test_revised_rows_are_reported(tmp_path, capsys):
    spec = SimulationSpec(markets=10, periods=12, seed=4)
    study = write_study(tmp_path / "r", spec)
    assert main(["estimate", str(study), "--quiet"]) == 0
    panel = pd.read_csv(study.parent / "panel.csv")
    panel.loc[[3, 7], "price"] *= 1.01  # a statistics office revises two rows
    panel.to_csv(study.parent / "panel.csv", index=False)
    assert main(["estimate", str(study), "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["data"]["changes"]["revised_rows"] == 2
    assert out["data"]["changes"]["new_rows"] == 0


def test_formula_like_market_labels_are_not_new_rows_on_rerun(tmp_path, capsys):
    # the fingerprint file stores labels spreadsheet-safe ("'-M1"); the next run must
    # compare like with like, not report every such market as new and removed
    spec = SimulationSpec(markets=10, periods=12, seed=4)
    study = write_study(tmp_path / "f", spec)
    panel = pd.read_csv(study.parent / "panel.csv")
    market = load_study(study).panel.market
    assert market is not None
    panel[market] = "-" + panel[market].astype(str)
    panel.to_csv(study.parent / "panel.csv", index=False)
    assert main(["estimate", str(study), "--quiet"]) == 0
    stored = (study.parent / "runs").glob("*/data_rows.csv")
    assert any("'-" in p.read_text() for p in stored)
    assert main(["estimate", str(study), "--json"]) == 0
    changes = json.loads(capsys.readouterr().out)["data"]["changes"]
    assert (changes["new_rows"], changes["removed_rows"], changes["revised_rows"]) == (0, 0, 0)
    assert changes["new_markets"] == []


def test_concurrent_runs_both_recorded(tmp_path):
    spec = SimulationSpec(markets=10, periods=12, seed=6)
    study = write_study(tmp_path / "c", spec)
    cmd = [sys.executable, "-m", "conduct.cli", "estimate", str(study), "--quiet"]
    procs = [subprocess.Popen(cmd, stderr=subprocess.PIPE, text=True) for _ in range(2)]
    errs = [p.communicate(timeout=600)[1] for p in procs]
    assert [p.returncode for p in procs] == [0, 0], errs
    runs = study.parent / "runs"
    folders = [p for p in runs.iterdir() if p.is_dir() and not p.name.startswith(".")
               and p.name != "comparisons"]
    assert len(folders) == 2
    hist = read_history(runs)
    assert sorted(hist["folder"]) == sorted(p.name for p in folders)


def test_damaged_history_is_rebuilt_not_emptied(tmp_path, capsys):
    spec = SimulationSpec(markets=10, periods=12, seed=7)
    study = write_study(tmp_path / "h", spec)
    for label in ("first", "second"):
        assert main(["estimate", str(study), "--quiet", "--label", label]) == 0
    runs = study.parent / "runs"
    (runs / "history.sqlite").write_bytes(b"this is not a database")
    assert main(["history", str(study), "--json"]) == 0
    captured = capsys.readouterr()
    assert "rebuilt" in captured.err
    rows = json.loads(captured.out)
    assert sorted(r["run_id"] for r in rows) == ["first", "second"]
    assert (runs / "history.sqlite.damaged-1").read_bytes() == b"this is not a database"
    # a missing history is rebuilt as well, and the next run is added to it
    (runs / "history.sqlite").unlink()
    assert main(["estimate", str(study), "--quiet", "--label", "third"]) == 0
    with sqlite3.connect(runs / "history.sqlite") as con:
        ids = sorted(r[0] for r in con.execute("SELECT run_id FROM runs"))
    assert ids == ["first", "second", "third"]


def test_bad_alert_is_a_user_error(tmp_path, capsys):
    spec = SimulationSpec(markets=10, periods=12, seed=8)
    study = write_study(tmp_path / "a", spec)
    assert main(["estimate", str(study), "--alert", "theta-jump"]) == 2
    assert "theta-shift" in capsys.readouterr().err
    assert main(["estimate", str(study), "--alert", "break"]) == 2
    assert "break_test" in capsys.readouterr().err
    assert not (study.parent / "runs").exists() or not any(
        p.is_dir() for p in (study.parent / "runs").iterdir())
