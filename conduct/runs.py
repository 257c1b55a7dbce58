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
import signal
import sqlite3
import sys
from collections.abc import Iterator, Sequence
from importlib import metadata
from pathlib import Path
from typing import Any

import pandas as pd

from conduct.alerts import AlertSpec, evaluate_alerts
from conduct.coverage import source_changes, source_changes_line
from conduct.errors import ConductError
from conduct.panel import row_fingerprints
from conduct.pipeline import Results
from conduct.report import write_outputs
from conduct.summary import build_summary
from conduct.tables import spreadsheet_safe, write_csv

__all__ = [
    "HISTORY_COLUMNS", "data_changes", "ensure_history", "read_history",
    "rebuild_history", "write_run",
]

_LABEL = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]{0,63}$")
HISTORY_COLUMNS = (
    "run_id", "label", "created_utc", "study_sha256", "data_sha256", "rows", "markets",
    "first_period", "last_period", "theta", "ci_lo", "ci_hi", "verdict", "elasticity_mean",
    "lerner_mean", "break_stat", "alerts", "folder",
)
FINGERPRINTS = "data_rows.csv"
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


def data_changes(current: pd.DataFrame, previous: pd.DataFrame | None,
                 previous_id: str | None) -> dict[str, Any] | None:
    """What is new or revised in the data since the previous run.

    Parameters
    ----------
    current, previous : pandas.DataFrame
        Row fingerprints (market, period, hash) of this and the previous run.
    previous_id : str or None

    Returns
    -------
    dict or None
        ``previous_run``, ``new_periods``, ``new_markets``, ``new_rows``,
        ``revised_rows`` (same market and period, different values), a few
        ``revised_examples`` and ``removed_rows``; None without a previous run.
    """
    if previous is None:
        return None
    prev = previous.astype(str)
    cur = current.astype(str)
    merged = cur.merge(prev, on=["market", "period"], how="outer", suffixes=("", "_prev"),
                       indicator=True)
    new = merged[merged["_merge"] == "left_only"]
    gone = merged[merged["_merge"] == "right_only"]
    both = merged[merged["_merge"] == "both"]
    revised = both[both["hash"] != both["hash_prev"]]
    return {
        "previous_run": previous_id,
        "new_periods": sorted(set(cur["period"]) - set(prev["period"])),
        "new_markets": sorted(set(cur["market"]) - set(prev["market"])),
        "new_rows": len(new),
        "revised_rows": len(revised),
        "revised_examples": [f"{m} {p}" for m, p in zip(revised["market"][:5],
                                                         revised["period"][:5], strict=True)],
        "removed_rows": len(gone),
    }


def _changes_line(ch: dict[str, Any] | None) -> str:
    if ch is None:
        return "first run of this study: nothing to compare with"
    periods = ch["new_periods"]
    what = (f"{len(periods)} new period(s) ({periods[0]} to {periods[-1]})" if periods
            else "no new periods")
    line = (f"since {ch['previous_run']}: {what}, {len(ch['new_markets'])} new market(s), "
            f"{ch['revised_rows']} revised row(s), {ch['removed_rows']} removed row(s)")
    if ch.get("sources") is not None:
        line += f"; {source_changes_line(ch['sources'])}"
    return line


def _previous(runs: Path) -> tuple[dict[str, Any] | None, pd.DataFrame | None, str | None]:
    hist = read_history(runs)
    for folder in reversed(hist["folder"].tolist()):
        path = runs / str(folder)
        try:
            summary = dict(json.loads((path / "summary.json").read_text(encoding="utf-8")))
        except (OSError, ValueError):
            continue
        try:
            prints = pd.read_csv(path / FINGERPRINTS, dtype=str, keep_default_na=False)
        except (OSError, ValueError):
            prints = None
        return summary, prints, str(folder)
    return None, None, None


def _previous_observations(folder: Path) -> pd.DataFrame | None:
    """A run's ``observations.csv`` as far as the report's comparison figure needs it."""
    try:
        return pd.read_csv(folder / "observations.csv", dtype={"period": str},
                           usecols=lambda c: c in ("period", "lerner_estimated"))
    except (OSError, ValueError):
        return None


def write_run(res: Results, *, label: str | None = None,
              argv: Sequence[str] = (),
              alerts: Sequence[AlertSpec] = ()) -> tuple[Path, dict[str, Any]]:
    """Write a new run folder for ``res`` and record it in the history.

    Parameters
    ----------
    res : Results
    label : str or None
        Run id to use instead of the time-and-hash id.
    argv : sequence of str
        The command line, recorded for provenance.
    alerts : sequence of AlertSpec
        Conditions to check against the previous run; those met are listed in
        ``summary["alerts"]`` and open the report.

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
    sweep_incomplete(runs)
    repaired = ensure_history(runs)
    now = dt.datetime.now(dt.UTC).replace(microsecond=0)
    data_sha = res.panel.description.sha256
    study_sha = hashlib.sha256(res.study.text.encode("utf-8")).hexdigest()
    base = label or f"{now:%Y%m%dT%H%M%SZ}-{data_sha[:8]}"
    summary = build_summary(res)
    if repaired:
        summary["warnings"].append(repaired)
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
        write_csv(obs, tmp / "observations.csv", float_format="%.10g")
        for key, table in (("period", res.derived.by_period),
                           ("market", res.derived.by_market)):
            if table is not None:
                spreadsheet_safe(table).to_csv(tmp / f"costs_by_{key}.csv", index=False,
                                               float_format="%.10g")
        # compared as stored: labels a spreadsheet would run as formulas carry their prefix
        prints = spreadsheet_safe(row_fingerprints(res.panel, res.study.columns()))
        write_csv(prints, tmp / FINGERPRINTS)
        prev_summary, prev_prints, prev_id = _previous(runs)
        changes = data_changes(prints, prev_prints, prev_id)
        if changes is not None:
            previous_sources = (prev_summary or {}).get("data", {}).get("sources")
            changes["sources"] = source_changes(summary["data"]["sources"], previous_sources)
        summary["data"]["changes"] = changes
        summary["data"]["changes_line"] = _changes_line(changes)
        summary["run"] = {"id": base, "folder": None}
        met = evaluate_alerts(alerts, summary, prev_summary)
        summary["alerts"] = met
        if met:
            summary["warnings"] = [*met, *summary["warnings"]]
        prev_obs = _previous_observations(runs / prev_id) if prev_id is not None else None
        write_outputs(res, summary, tmp, previous=prev_summary, previous_observations=prev_obs)
        (tmp / "study.toml").write_text(res.study.text, encoding="utf-8")
        (tmp / "run.log").write_text(res.summary() + "\n", encoding="utf-8")
        # no interrupt between the rename and the history row (SIGKILL aside, which the
        # next ensure_history repairs)
        with _signals_blocked():
            folder = _claim(runs, tmp, base, summary)
            _record(runs, folder, summary, label, now, study_sha)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return folder, summary


@contextlib.contextmanager
def _signals_blocked() -> Iterator[None]:
    """Hold SIGINT and SIGTERM until the block ends (main thread, POSIX only)."""
    sigs = {signal.SIGINT, signal.SIGTERM}
    try:
        old = signal.pthread_sigmask(signal.SIG_BLOCK, sigs)
    except (AttributeError, ValueError, OSError):  # not available on this platform
        yield
        return
    try:
        yield
    finally:
        signal.pthread_sigmask(signal.SIG_SETMASK, old)


def sweep_incomplete(runs: Path) -> int:
    """Remove hidden temporary run folders left by processes that no longer exist.

    Returns
    -------
    int
        Folders removed.
    """
    removed = 0
    for p in runs.glob(".incomplete-*"):
        tail = p.name.rsplit("-", 1)[-1]
        if not tail.isdigit():
            continue
        pid = int(tail)
        try:
            os.kill(pid, 0)
        except ProcessLookupError:
            shutil.rmtree(p, ignore_errors=True)
            removed += 1
        except (PermissionError, OSError):
            continue
    return removed


def _create(con: sqlite3.Connection) -> None:
    con.execute(
        "CREATE TABLE IF NOT EXISTS runs (" + ", ".join(
            f"{c} TEXT PRIMARY KEY" if c == "run_id" else c for c in HISTORY_COLUMNS) + ")"
    )


def _history_row(folder_name: str, summary: dict[str, Any], label: str | None,
                 created: str, study_sha: str) -> tuple[Any, ...]:
    c = summary.get("conduct") or {}
    costs = summary.get("costs") or {}
    d = summary["data"]
    ci = c.get("ci") or [None, None]
    brk = c.get("break") or {}
    return (
        folder_name, label, created, study_sha, d["sha256"], d["rows"], d["markets"],
        d["first_period"], d["last_period"], c.get("theta"), ci[0], ci[1], c.get("verdict"),
        summary["demand"]["elasticity"]["mean"], costs.get("lerner_mean"), brk.get("stat"),
        "; ".join(summary.get("alerts") or []) or None, folder_name,
    )


def _healthy(runs: Path) -> bool:
    path = runs / "history.sqlite"
    if not path.exists():
        return not _run_folders(runs)
    try:
        with contextlib.closing(sqlite3.connect(path, timeout=60)) as con:
            cols = [r[1] for r in con.execute("PRAGMA table_info(runs)")]
            con.execute("SELECT count(*) FROM runs").fetchone()
    except sqlite3.DatabaseError:
        return False
    return tuple(cols) == HISTORY_COLUMNS or not cols


def _run_folders(runs: Path) -> list[Path]:
    if not runs.is_dir():
        return []
    return sorted(p for p in runs.iterdir()
                  if p.is_dir() and not p.name.startswith(".") and (p / "summary.json").exists())


def _rows_from_folders(folders: list[Path]) -> list[tuple[Any, ...]]:
    """History rows read back from run folders' ``summary.json`` (unreadable ones skipped)."""
    rows = []
    for folder in folders:
        try:
            summary = json.loads((folder / "summary.json").read_text(encoding="utf-8"))
            prov = summary.get("provenance") or {}
            rows.append(_history_row(folder.name, summary, None,
                                     str(prov.get("created_utc", "")),
                                     str(prov.get("study_sha256", ""))))
        except (OSError, ValueError, KeyError, TypeError):
            continue
    return rows


def rebuild_history(runs: Path) -> int:
    """Rebuild ``history.sqlite`` from the run folders' ``summary.json`` files.

    A damaged history is kept beside the new one as ``history.sqlite.damaged-<n>``;
    nothing is silently emptied.

    Returns
    -------
    int
        Number of runs recorded.
    """
    path = runs / "history.sqlite"
    if path.exists():
        n = 1
        while (runs / f"history.sqlite.damaged-{n}").exists():
            n += 1
        os.replace(path, runs / f"history.sqlite.damaged-{n}")
    rows = _rows_from_folders(_run_folders(runs))
    tmp = runs / f".history-{os.getpid()}.sqlite"
    with contextlib.closing(sqlite3.connect(tmp)) as con, con:
        _create(con)
        con.executemany(f"INSERT OR REPLACE INTO runs VALUES "
                        f"({', '.join('?' * len(HISTORY_COLUMNS))})", rows)
    os.replace(tmp, path)
    return len(rows)


def ensure_history(runs: Path) -> str | None:
    """Check the history: rebuild it when missing or damaged, and add rows for complete run
    folders that lack one (a run stopped between its rename and its history row).

    Returns
    -------
    str or None
        A warning when anything was repaired.
    """
    if _healthy(runs):
        return _reconcile(runs)
    n = rebuild_history(runs)
    return (f"The run history {runs / 'history.sqlite'} was missing or damaged; it was rebuilt "
            f"from {n} run folder(s) (a damaged file is kept beside it).")


def _reconcile(runs: Path) -> str | None:
    path = runs / "history.sqlite"
    if not path.exists():
        return None
    with contextlib.closing(sqlite3.connect(path, timeout=60)) as con:
        known = {r[0] for r in con.execute("SELECT folder FROM runs")}
    missing = [f for f in _run_folders(runs) if f.name not in known]
    rows = _rows_from_folders(missing)
    if not rows:
        return None
    with contextlib.closing(_connect(runs)) as con, con:
        con.executemany(f"INSERT OR IGNORE INTO runs VALUES "
                        f"({', '.join('?' * len(HISTORY_COLUMNS))})", rows)
    return (f"The run history lacked {len(rows)} complete run folder(s) "
            f"({', '.join(r[0] for r in rows)}); they were added from their summary.json.")


def _connect(runs: Path) -> sqlite3.Connection:
    con = sqlite3.connect(runs / "history.sqlite", timeout=60)
    _create(con)
    return con


def _record(runs: Path, folder: Path, summary: dict[str, Any], label: str | None,
            now: dt.datetime, study_sha: str) -> None:
    row = _history_row(folder.name, summary, label, now.isoformat(), study_sha)
    with contextlib.closing(_connect(runs)) as con, con:
        con.execute(f"INSERT INTO runs VALUES ({', '.join('?' * len(row))})", row)


def read_history(runs: Path) -> pd.DataFrame:
    """All recorded runs, oldest first (empty frame when there is no history)."""
    if not (runs / "history.sqlite").exists():
        return pd.DataFrame(columns=list(HISTORY_COLUMNS))
    with contextlib.closing(_connect(runs)) as con:
        # insertion order: runs finishing within the same second keep their order
        return pd.read_sql_query("SELECT * FROM runs ORDER BY rowid", con)
