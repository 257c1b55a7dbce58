"""Shared fixtures: a small synthetic panel and study written into ``tmp_path``.

The panel follows the symmetric N-firm Cournot closed form with linear inverse
demand P = a - b Q and constant marginal cost c: P = (a + N c)/(N + 1) and
Q = N (a - c) / ((N + 1) b) (textbook result), so the study estimates cleanly
and every validation test can start from a good study and break one thing.
"""

from __future__ import annotations

import copy
import re
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest

from conduct.cli import main

BASE_SPEC: dict[str, Any] = {
    "title": "test study",
    "panel": {
        "file": "panel.csv",
        "market": "region",
        "period": "quarter",
        "price": "price",
        "quantity": "tonnes",
        "sellers": "sellers",
    },
    "demand": {
        "shifters": ["income"],
        "instruments": ["diesel"],
        "effects": ["market"],
    },
    "supply": {
        "cost_shifters": ["diesel"],
        "cost_slope": False,
    },
}


def cournot_frame(markets: int = 12, periods: int = 12, *, b: float = 0.5,
                  seed: int = 0) -> pd.DataFrame:
    """A balanced market x period panel from the symmetric Cournot closed form.

    Columns: region, quarter (integers from 2000), price, tonnes, sellers,
    income (demand shifter), diesel (cost shifter), winter (a candidate rotator,
    unrelated to the data-generating process).
    """
    rng = np.random.default_rng(seed)
    m = np.repeat(np.arange(1, markets + 1), periods)
    t = np.tile(np.arange(periods), markets)
    n = 2 + m % 4
    income = rng.uniform(0, 2, m.size)
    diesel = rng.uniform(0, 2, m.size)
    a = 20 + 3 * income + 0.4 * (m % 5) + rng.normal(0, 0.5, m.size)
    c = 2 + 2 * diesel + rng.normal(0, 0.3, m.size)
    return pd.DataFrame({
        "region": m,
        "quarter": 2000 + t,
        "price": (a + n * c) / (n + 1),
        "tonnes": n * (a - c) / ((n + 1) * b),
        "sellers": n,
        "income": income,
        "diesel": diesel,
        "winter": rng.uniform(0, 1, m.size),
    })


def _toml_value(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int | float):
        return repr(v)
    if isinstance(v, str):
        return '"' + v.replace("\\", "\\\\").replace('"', '\\"') + '"'
    if isinstance(v, list | tuple):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{" + ", ".join(f"{k} = {_toml_value(x)}" for k, x in v.items()) + "}"
    raise TypeError(f"cannot write {v!r} as TOML")


def to_toml(spec: dict[str, Any]) -> str:
    """Write a nested dict (top-level scalars, then one level of tables) as TOML."""
    lines = [f"{k} = {_toml_value(v)}" for k, v in spec.items() if not isinstance(v, dict)]
    for name, table in spec.items():
        if isinstance(table, dict):
            lines.append(f"[{name}]")
            lines += [f"{k} = {_toml_value(v)}" for k, v in table.items()]
    return "\n".join(lines) + "\n"


@dataclass
class Outcome:
    """What one command run produced."""

    code: int
    out: str
    err: str

    @property
    def message(self) -> str:
        """stderr with line wrapping undone (messages are wrapped at 88 columns)."""
        return " ".join(self.err.split())


@dataclass
class Project:
    """A folder with a panel and a study, and ways to break them and run the CLI."""

    root: Path
    frame: pd.DataFrame
    spec: dict[str, Any]
    _capsys: Any = field(repr=False)

    @property
    def study(self) -> Path:
        return self.root / "study.toml"

    @property
    def runs(self) -> Path:
        return self.root / "runs"

    def write_study(self, spec: dict[str, Any] | None = None, *, text: str | None = None,
                    name: str = "study.toml") -> Path:
        path = self.root / name
        path.write_text(text if text is not None else to_toml(spec or self.spec),
                        encoding="utf-8")
        return path

    def edit(self, change: Callable[[dict[str, Any]], None]) -> Path:
        """Write the study after applying ``change`` to a deep copy of the spec."""
        spec = copy.deepcopy(self.spec)
        change(spec)
        return self.write_study(spec)

    def write_csv(self, frame: pd.DataFrame | None = None, name: str = "panel.csv") -> Path:
        path = self.root / name
        (self.frame if frame is None else frame).to_csv(path, index=False)
        return path

    def run(self, *args: str | Path) -> Outcome:
        """Run ``conduct ARGS`` in-process and capture its output."""
        self._capsys.readouterr()
        code = main([str(a) for a in args])
        cap = self._capsys.readouterr()
        return Outcome(code, cap.out, cap.err)

    def check(self) -> Outcome:
        return self.run("check", self.study)

    def estimate(self, *extra: str) -> Outcome:
        return self.run("estimate", self.study, *extra)


def assert_user_error(res: Outcome, *needles: str) -> str:
    """Exit code 2, one message on stderr without a traceback, naming every needle."""
    assert res.code == 2, f"exit {res.code}; stderr: {res.err}; stdout: {res.out}"
    assert "Traceback" not in res.err
    assert res.message.startswith("conduct: error: "), res.err
    for needle in needles:
        assert needle in res.message, f"{needle!r} not in message: {res.message}"
    return res.message


def assert_no_run(project: Project) -> None:
    """A failed ``estimate`` leaves no run folder and no history behind."""
    runs = project.runs
    if runs.exists():
        assert not (runs / "history.sqlite").exists()
        assert [p.name for p in runs.iterdir()] == []


def rows_named(message: str) -> list[int]:
    """Row numbers a message cites after the word 'row' or 'rows' (first list only)."""
    m = re.search(r"\brows? (\d+(?:, \d+)*)", message)
    return [int(x) for x in m.group(1).split(",")] if m else []


@pytest.fixture
def project(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> Project:
    """A 12-market x 12-period Cournot panel (panel.csv) with a working study.toml."""
    proj = Project(tmp_path, cournot_frame(), copy.deepcopy(BASE_SPEC), capsys)
    proj.write_csv()
    proj.write_study()
    return proj
