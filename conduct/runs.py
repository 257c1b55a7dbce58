"""Run folders and run history.

Each estimation writes a new folder ``<runs>/<run-id>/``: everything is first
written under a hidden temporary name in the same directory and then renamed
in one step, so a half-written run is never visible and nothing earlier is
overwritten.  ``<runs>/history.sqlite`` gets one row per completed run.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import hashlib
import json
import os
import re
import shutil
import sqlite3
import sys
from collections.abc import Sequence
from importlib import metadata
from pathlib import Path
from typing import Any

import pandas as pd

from conduct.errors import ConductError
from conduct.pipeline import Results
from conduct.report import write_outputs
from conduct.summary import build_summary
from conduct.tables import spreadsheet_safe

__all__ = ["HISTORY_COLUMNS", "previous_summary", "read_history", "write_run"]

_LABEL = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]{0,63}$")
HISTORY_COLUMNS = (
    "run_id", "label", "created_utc", "study_sha256", "data_sha256", "rows", "markets",
    "first_period", "last_period", "theta", "ci_lo", "ci_hi", "verdict", "elasticity_mean",
    "lerner_mean", "folder",
)
_PACKAGES = ("conduct", "numpy", "pandas", "scipy", "statsmodels", "linearmodels")


def _versions() -> dict[str, str]:
    out = {"python": sys.version.split()[0]}
    for name in _PACKAGES:
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            out[name] = "not installed"
    return out


def _write_json(path: Path, doc: dict[str, Any]) -> None:
    path.write_text(json.dumps(doc, indent=2, sort_keys=True, allow_nan=False) + "\n",
                    encoding="utf-8")


def _claim(runs: Path, tmp: Path, base: str, summary: dict[str, Any]) -> Path:
    for i in range(1, 1000):
        target = runs / (base if i == 1 else f"{base}-{i}")
        if target.exists():
            continue
        summary["run"] = {"id": target.name, "folder": str(target)}
        _write_json(tmp / "summary.json", summary)
        try:
            os.rename(tmp, target)
        except OSError:
            continue
        return target
    raise ConductError(f"Could not find a free run folder name for '{base}' in {runs}.")


def write_run(res: Results, *, label: str | None = None,
              argv: Sequence[str] = ()) -> tuple[Path, dict[str, Any]]:
    """Write a new run folder for ``res`` and record it in the history.

    Parameters
    ----------
    res : Results
    label : str or None
        Run id to use instead of the time-and-hash id.
    argv : sequence of str
        The command line, recorded for provenance.

    Returns
    -------
    (Path, dict)
        The run folder and the summary document written to ``summary.json``.
    """
    if label is not None and not _LABEL.match(label):
        raise ConductError(
            f"Run label '{label}' is not allowed: use 1-64 letters, digits, '.', '_' or '-', "
            "starting with a letter or digit."
        )
    runs = res.study.output.runs
    try:
        runs.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise ConductError(f"Cannot create the runs folder {runs}: {exc.strerror}.") from None
    now = dt.datetime.now(dt.UTC).replace(microsecond=0)
    data_sha = res.panel.description.sha256
    study_sha = hashlib.sha256(res.study.text.encode("utf-8")).hexdigest()
    base = label or f"{now:%Y%m%dT%H%M%SZ}-{data_sha[:8]}"
    summary = build_summary(res)
    tmp = runs / f".incomplete-{base}-{os.getpid()}"
    tmp.mkdir()
    try:
        summary["provenance"] = {
            "command": list(argv),
            "created_utc": now.isoformat().replace("+00:00", "Z"),
            "data_sha256": data_sha,
            "seed": res.study.inference.seed,
            "study_file": str(res.study.path),
            "study_sha256": study_sha,
            "versions": _versions(),
        }
        obs = spreadsheet_safe(res.derived.observations)
        obs.to_csv(tmp / "observations.csv", index=False, float_format="%.10g")
        summary["run"] = {"id": base, "folder": None}
        write_outputs(res, summary, tmp, previous=previous_summary(runs))
        (tmp / "study.toml").write_text(res.study.text, encoding="utf-8")
        (tmp / "run.log").write_text(res.summary() + "\n", encoding="utf-8")
        folder = _claim(runs, tmp, base, summary)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    _record(runs, folder, summary, label, now, study_sha)
    return folder, summary


def _connect(runs: Path) -> sqlite3.Connection:
    con = sqlite3.connect(runs / "history.sqlite", timeout=60)
    con.execute(
        "CREATE TABLE IF NOT EXISTS runs (" + ", ".join(
            f"{c} TEXT PRIMARY KEY" if c == "run_id" else c for c in HISTORY_COLUMNS) + ")"
    )
    return con


def _record(runs: Path, folder: Path, summary: dict[str, Any], label: str | None,
            now: dt.datetime, study_sha: str) -> None:
    c = summary.get("conduct") or {}
    costs = summary.get("costs") or {}
    d = summary["data"]
    ci = c.get("ci") or [None, None]
    row = (
        folder.name, label, now.isoformat(), study_sha, d["sha256"], d["rows"], d["markets"],
        d["first_period"], d["last_period"], c.get("theta"), ci[0], ci[1], c.get("verdict"),
        summary["demand"]["elasticity"]["mean"], costs.get("lerner_mean"), folder.name,
    )
    with contextlib.closing(_connect(runs)) as con, con:
        con.execute(f"INSERT INTO runs VALUES ({', '.join('?' * len(row))})", row)


def previous_summary(runs: Path) -> dict[str, Any] | None:
    """The ``summary.json`` of the latest recorded run, or None."""
    hist = read_history(runs)
    for folder in reversed(hist["folder"].tolist()):
        path = runs / str(folder) / "summary.json"
        try:
            return dict(json.loads(path.read_text(encoding="utf-8")))
        except (OSError, ValueError):
            continue
    return None


def read_history(runs: Path) -> pd.DataFrame:
    """All recorded runs, oldest first (empty frame when there is no history)."""
    if not (runs / "history.sqlite").exists():
        return pd.DataFrame(columns=list(HISTORY_COLUMNS))
    with contextlib.closing(_connect(runs)) as con:
        return pd.read_sql_query("SELECT * FROM runs ORDER BY created_utc, run_id", con)
