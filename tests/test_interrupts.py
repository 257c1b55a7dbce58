"""Interrupted runs: SIGINT, SIGTERM and SIGKILL at random and at chosen points.

``conduct estimate`` writes a run under a hidden temporary name
(``<runs>/.incomplete-<id>-<pid>``), renames it when complete and then adds a row to
``<runs>/history.sqlite``.  Whatever stops it, the contract is:

* no partial run folder is ever visible: every visible folder is a complete run;
* the history agrees with the visible folders (``conduct history`` repairs it when it
  does not): no row without a folder, no complete folder left out;
* after SIGINT and SIGTERM the temporary folder is removed.  SIGKILL cannot be caught,
  so a hidden ``.incomplete-*`` folder may remain after it; it is never listed as a run
  and the next run works beside it.

Two kinds of tests.  The random ones start ``conduct estimate`` on a panel big enough
to take several seconds (``conduct simulate --markets 40 --periods 40`` with
``[inference] bootstrap = 50``) and send each signal at a seeded random time, or at a
seeded random delay after the temporary folder appears (so the write phase is hit
too).  The chosen-point ones run the real command line in a small wrapper that pauses
at one exact place (after the outputs are written but before the rename, or just after
the rename and before the history row) and signal it there, so each window is tested
on every run.  Concurrent estimates of one study are tested in ``test_reruns.py``.
"""

from __future__ import annotations

import contextlib
import io
import json
import os
import random
import re
import shutil
import signal
import sqlite3
import subprocess
import sys
import time
from dataclasses import dataclass
from pathlib import Path

import pytest
from conftest import Project

from conduct.cli import main

SEED = 20240611
#: How long a process may take to reach the chosen point or to finish; generous because
#: CI machines are shared (never a limit on conduct's speed, only a guard against hangs).
WAIT_S = 600.0

HOOK = r'''
import os, sys, time
from pathlib import Path

where, ready = sys.argv[1], Path(sys.argv[2])
import conduct.runs as runs


def pause():
    import signal
    ready.write_text("ready")
    end = time.time() + 300
    while time.time() < end:
        if signal.sigpending():  # a signal was held back: conduct protects this window
            return
        time.sleep(0.05)


if where == "write":  # outputs written, folder still under its temporary name
    if not hasattr(runs, "write_outputs"):
        ready.write_text("conduct.runs.write_outputs is gone: update test_interrupts.HOOK")
        sys.exit(97)
    inner = runs.write_outputs

    def hooked(*args, **kwargs):
        out = inner(*args, **kwargs)
        pause()
        return out

    runs.write_outputs = hooked
elif where == "record":  # folder renamed into view, history row not yet written
    def after(fn):
        def wrapped(src, dst, *args, **kwargs):
            out = fn(src, dst, *args, **kwargs)
            if os.path.basename(os.fspath(src)).startswith(".incomplete-"):
                pause()
            return out
        return wrapped

    os.rename = after(os.rename)
    os.replace = after(os.replace)

from conduct.cli import main
sys.exit(main(sys.argv[3:]))
'''


def _default_signals() -> None:
    # a child of a shell job may inherit "ignore SIGINT"; conduct must see the real thing
    signal.signal(signal.SIGINT, signal.SIG_DFL)
    signal.signal(signal.SIGTERM, signal.SIG_DFL)


def _popen(args: list[str], cwd: Path) -> subprocess.Popen[str]:
    env = {k: v for k, v in os.environ.items() if k != "PYTHONWARNINGS"}
    return subprocess.Popen([sys.executable, *args], cwd=cwd, env=env, text=True,
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE,
                            preexec_fn=_default_signals)


def _run_cli(*args: str) -> tuple[int, str]:
    out = io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(io.StringIO()):
        code = main(list(args))
    return code, out.getvalue()


# ----------------------------------------------------------------------------------------
# The contract, checked on a runs folder
# ----------------------------------------------------------------------------------------


def _visible(runs: Path) -> list[str]:
    if not runs.exists():
        return []
    return sorted(p.name for p in runs.iterdir() if p.is_dir() and not p.name.startswith("."))


def _temporary(runs: Path) -> list[str]:
    if not runs.exists():
        return []
    return sorted(p.name for p in runs.iterdir() if p.name.startswith(".incomplete-"))


def _recorded(runs: Path) -> list[str]:
    path = runs / "history.sqlite"
    if not path.exists():
        return []
    with contextlib.closing(sqlite3.connect(path)) as con:
        return sorted(r[0] for r in con.execute("SELECT run_id FROM runs"))


def _assert_contract(study: Path, *, temporary_allowed: bool,
                     may_be_unrecorded: frozenset[str] = frozenset()) -> list[str]:
    """Check a runs folder after an interruption; return the visible runs."""
    runs = study.parent / "runs"
    visible = _visible(runs)
    for name in visible:  # every visible folder is a complete run
        folder = runs / name
        summary = json.loads((folder / "summary.json").read_text(encoding="utf-8"))
        assert summary["run"]["id"] == name
        for part in ("report.html", "observations.csv", "study.toml", "run.log"):
            assert (folder / part).is_file(), f"{name} lacks {part}"
    temps = _temporary(runs)
    if not temporary_allowed:
        assert temps == [], f"temporary folders left behind: {temps}"
    assert set(_recorded(runs)) <= set(visible), "a history row without its folder"
    code, out = _run_cli("history", str(study), "--json")
    assert code == 0
    listed = {row["run_id"] for row in json.loads(out)}
    assert listed <= set(visible)
    assert set(visible) - listed <= may_be_unrecorded, (
        f"complete runs missing from the history: {sorted(set(visible) - listed)}")
    return visible


# ----------------------------------------------------------------------------------------
# Chosen points, on the small conftest study
# ----------------------------------------------------------------------------------------


def _run_to_point(project: Project, where: str, sig: signal.Signals) -> int:
    hook = project.root / "hook.py"
    hook.write_text(HOOK, encoding="utf-8")
    ready = project.root / "ready.flag"
    proc = _popen([str(hook), where, str(ready), "estimate", str(project.study), "--quiet"],
                  project.root)
    start = time.monotonic()
    while not ready.exists():
        if proc.poll() is not None:
            pytest.fail(f"conduct ended (exit {proc.returncode}) before the {where} point: "
                        f"{proc.stderr.read() if proc.stderr else ''}")
        assert time.monotonic() - start < WAIT_S, "the chosen point was never reached"
        time.sleep(0.05)
    assert ready.read_text() == "ready", ready.read_text()
    proc.send_signal(sig)
    _, err = proc.communicate(timeout=WAIT_S)
    assert "Traceback" not in err, err
    return proc.returncode


SIGTERM_CLEANUP = ("cli.py:main — SIGTERM kills the process without running write_run's "
                   "cleanup, so the hidden .incomplete-* folder stays; install a SIGTERM "
                   "handler in main() that raises SystemExit(143) (or KeyboardInterrupt) so "
                   "the except-BaseException cleanup runs, and sweep .incomplete-* folders "
                   "of dead processes at the start of write_run")
EXPECTED_EXIT = {signal.SIGINT: {130}, signal.SIGTERM: {-15, 143},
                 signal.SIGKILL: {-9}}


@pytest.mark.parametrize("sig", [
    signal.SIGINT,
    signal.SIGTERM,
    signal.SIGKILL,
], ids=["SIGINT", "SIGTERM", "SIGKILL"])
def test_signal_while_writing_outputs(project: Project, sig: signal.Signals) -> None:
    code = _run_to_point(project, "write", sig)
    assert code in EXPECTED_EXIT[sig]
    assert _temporary(project.runs) or sig != signal.SIGKILL  # the point was reached
    visible = _assert_contract(project.study, temporary_allowed=sig == signal.SIGKILL)
    assert visible == []
    if sig == signal.SIGKILL:
        # the leftover is hidden, never listed, and the next run works beside it
        left = _temporary(project.runs)
        assert len(left) == 1 and re.fullmatch(r"\.incomplete-.+-\d+", left[0])
        assert project.estimate("--quiet").code == 0
        visible = _assert_contract(project.study, temporary_allowed=True)
        assert len(visible) == 1 and _recorded(project.runs) == visible
        # the next run sweeps temporary folders of processes that no longer exist
        assert _temporary(project.runs) == []


HISTORY_RECONCILE = ("runs.py:ensure_history/_healthy — a signal between the rename of the "
                     "run folder and the history INSERT leaves a complete, visible run with "
                     "no history row, and a healthy history.sqlite is never reconciled with "
                     "the folders; make ensure_history add rows for visible folders that "
                     "lack one (from their summary.json), and block SIGINT/SIGTERM around "
                     "rename+INSERT")


@pytest.mark.parametrize("sig", [signal.SIGINT, signal.SIGTERM, signal.SIGKILL],
                         ids=["SIGINT", "SIGTERM", "SIGKILL"])
def test_signal_between_rename_and_history_row(project: Project, sig: signal.Signals) -> None:
    assert project.estimate("--quiet").code == 0  # an earlier run: the history exists
    _run_to_point(project, "record", sig)
    visible = _assert_contract(project.study, temporary_allowed=sig == signal.SIGKILL)
    assert len(visible) in (1, 2)


# ----------------------------------------------------------------------------------------
# Random points, on a panel that takes several seconds
# ----------------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def big_study(tmp_path_factory: pytest.TempPathFactory) -> Path:
    root = tmp_path_factory.mktemp("interrupts") / "template"
    code, _ = _run_cli("simulate", "--out", str(root), "--markets", "40", "--periods", "40",
                       "--quiet")
    assert code == 0
    study = root / "study.toml"
    text, n = re.subn(r"(?m)^bootstrap = \d+$", "bootstrap = 50", study.read_text())
    assert n == 1
    study.write_text(text, encoding="utf-8")
    return study


@dataclass
class Kill:
    sig: signal.Signals
    mode: str  # "time": after `delay` seconds; "write": `delay` s after the temp folder shows
    delay: float
    study: Path
    proc: subprocess.Popen[str] | None = None
    sent_at: float | None = None
    seen_temp_at: float | None = None

    def describe(self) -> str:
        return f"{self.sig.name} {self.mode}+{self.delay:.2f}s"


def _plan(rng: random.Random, sig: signal.Signals, study: Path) -> Kill:
    if rng.random() < 0.5:
        return Kill(sig, "time", rng.uniform(0.3, 12.0), study)
    return Kill(sig, "write", rng.uniform(0.0, 1.5), study)


def _copy_study(template: Path, dest: Path) -> Path:
    dest.mkdir(parents=True)
    for name in ("study.toml", "panel.csv"):
        shutil.copy(template.parent / name, dest / name)
    return dest / "study.toml"


def _drive(kills: list[Kill]) -> None:
    """Start every process, send each signal at its point, wait for all."""
    start = time.monotonic()
    for k in kills:
        k.proc = _popen(["-m", "conduct.cli", "estimate", str(k.study), "--quiet"],
                        k.study.parent)
    pending = list(kills)
    while pending:
        now = time.monotonic()
        assert now - start < WAIT_S, [k.describe() for k in pending]
        for k in list(pending):
            assert k.proc is not None
            if k.proc.poll() is not None:  # finished before its signal
                pending.remove(k)
                continue
            due = k.delay
            if k.mode == "write":
                if k.seen_temp_at is None and _temporary(k.study.parent / "runs"):
                    k.seen_temp_at = now - start
                if k.seen_temp_at is None:
                    continue
                due = k.seen_temp_at + k.delay
            if now - start >= due:
                k.proc.send_signal(k.sig)
                k.sent_at = now - start
                pending.remove(k)
        time.sleep(0.02)
    for k in kills:
        assert k.proc is not None
        _, err = k.proc.communicate(timeout=WAIT_S)
        assert "Traceback" not in err or k.sig == signal.SIGINT, f"{k.describe()}: {err}"


def _check_kill(k: Kill) -> None:
    assert k.proc is not None
    code = k.proc.returncode
    finished = code == 0
    allowed = {signal.SIGINT: {130, -2}, signal.SIGTERM: {-15, 143},
               signal.SIGKILL: {-9}}[k.sig]
    assert finished or code in allowed, f"{k.describe()}: exit {code}"
    runs = k.study.parent / "runs"
    visible = _assert_contract(
        k.study,
        # SIGKILL cannot be caught
        temporary_allowed=k.sig == signal.SIGKILL,
        may_be_unrecorded=frozenset(),
    )
    if finished:
        assert len(visible) == 1 and _recorded(runs) == visible, k.describe()
    else:
        assert len(visible) <= 1, k.describe()
    if k.sig == signal.SIGINT:
        assert _temporary(runs) == [], k.describe()


@pytest.mark.slow
def test_random_signals_during_estimate(big_study: Path, tmp_path: Path) -> None:
    rng = random.Random(SEED)
    kills = [_plan(rng, sig, _copy_study(big_study, tmp_path / sig.name))
             for sig in (signal.SIGINT, signal.SIGTERM, signal.SIGKILL)]
    assert {k.mode for k in kills} == {"time", "write"}  # the seed covers both phases
    _drive(kills)
    for k in kills:
        _check_kill(k)


@pytest.mark.slow
def test_many_random_signals_into_one_history(big_study: Path, tmp_path: Path) -> None:
    """Twelve interruptions in a row into one runs folder, then a complete run."""
    rng = random.Random(SEED + 1)
    study = _copy_study(big_study, tmp_path / "shared")
    runs = study.parent / "runs"
    known: set[str] = set()
    for i in range(12):
        sig = rng.choice([signal.SIGINT, signal.SIGTERM, signal.SIGKILL])
        k = _plan(rng, sig, study)
        temps_before = set(_temporary(runs))
        _drive([k])
        visible = _assert_contract(study, temporary_allowed=True,
                                   may_be_unrecorded=frozenset(_visible(runs)))
        assert k.proc is not None
        new = set(visible) - known
        # a finished run adds its folder; a killed one adds none, or a complete one when
        # the signal came after the rename
        assert len(new) == 1 if k.proc.returncode == 0 else len(new) <= 1, k.describe()
        known |= new
        if sig == signal.SIGINT:
            assert set(_temporary(runs)) == temps_before, f"kill {i}: {k.describe()}"
    code, _ = _run_cli("estimate", str(study), "--quiet")
    assert code == 0
    visible = _assert_contract(study, temporary_allowed=True,
                               may_be_unrecorded=frozenset(known))
    assert len(visible) == len(known) + 1
