"""What changed between two runs of a study.

Reads two run folders (their ``summary.json``, ``observations.csv`` and row
fingerprints) and reports: new and revised data, the change in theta and its
interval, tests whose decision changed, and the change in elasticities,
marginal costs and Lerner indexes over the market-periods both runs cover.
A figure overlays the two runs' conduct intervals and median Lerner paths.
"""

from __future__ import annotations

import json
import tomllib
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from matplotlib.figure import Figure

from conduct.errors import ConductError, suggest
from conduct.figures import RunSnapshot, run_comparison_figure
from conduct.runs import FINGERPRINTS, data_changes, ensure_history, read_history
from conduct.summary import clean

__all__ = ["Comparison", "compare_runs", "comparison_figure"]


@dataclass(frozen=True, slots=True)
class Comparison:
    """Differences between run ``a`` (earlier) and run ``b`` (later).

    Attributes
    ----------
    a, b : str
        Run ids.
    document : dict
        JSON-ready description of every change.
    """

    a: str
    b: str
    document: dict[str, Any]

    def text(self) -> str:
        """Aligned plain-text lines for the terminal."""
        d = self.document
        lines = [f"compare {self.a} -> {self.b}"]
        ch = d["data"]
        lines.append(f"  data      {ch['new_rows']} new rows ({len(ch['new_periods'])} new "
                     f"periods, {len(ch['new_markets'])} new markets), {ch['revised_rows']} "
                     f"revised, {ch['removed_rows']} removed")
        c = d.get("conduct")
        if c:
            lines.append(f"  theta     {c['theta_a']:.4f} -> {c['theta_b']:.4f} "
                         f"(change {c['theta_change']:+.4f})")
            lines.append(f"  verdict   {c['verdict_a']} -> {c['verdict_b']}")
            for t in c["tests_changed"]:
                lines.append(f"  test      {t['model']}: {t['a']} -> {t['b']}")
        for name, v in d["common_rows"].items():
            if isinstance(v, dict):
                lines.append(f"  {name:<9} mean over common rows {v['a']:.4f} -> {v['b']:.4f}")
        return "\n".join(lines)


def _folder(runs: Path, run_id: str, ids: list[str]) -> Path:
    path = runs / run_id
    if run_id not in ids or not (path / "summary.json").exists():
        raise ConductError(f"No run '{run_id}' in {runs}{suggest(run_id, ids)}; "
                           "`conduct history STUDY` lists the runs.")
    return path


def _load(path: Path) -> tuple[dict[str, Any], pd.DataFrame, pd.DataFrame | None]:
    summary = json.loads((path / "summary.json").read_text(encoding="utf-8"))
    obs = pd.read_csv(path / "observations.csv", dtype={"market": str, "period": str})
    try:
        prints = pd.read_csv(path / FINGERPRINTS, dtype=str, keep_default_na=False)
    except (OSError, ValueError):
        prints = None
    return summary, obs, prints


def compare_runs(runs: Path, a: str | None = None, b: str | None = None) -> Comparison:
    """Compare two runs (default: the last two recorded).

    Parameters
    ----------
    runs : Path
        The study's runs folder.
    a, b : str or None
        Run ids, earlier then later.

    Returns
    -------
    Comparison
    """
    ensure_history(runs)
    ids = [str(v) for v in read_history(runs)["run_id"]]
    if a is None or b is None:
        if len(ids) < 2:
            raise ConductError(f"{runs} holds {len(ids)} run(s); compare needs two.")
        a, b = ids[-2], ids[-1]
    sa, oa, pa = _load(_folder(runs, a, ids))
    sb, ob, pb = _load(_folder(runs, b, ids))
    if pa is not None and pb is not None:
        changes = data_changes(pb, pa, a)
    else:
        changes = data_changes(ob[["market", "period"]].assign(hash=""),
                               oa[["market", "period"]].assign(hash=""), a)
    assert changes is not None
    doc: dict[str, Any] = {"a": a, "b": b, "data": changes}
    ca, cb = sa.get("conduct"), sb.get("conduct")
    if ca and cb:
        tests_changed = []
        for model, tb in cb["tests"].items():
            ta = ca["tests"].get(model)
            if ta is not None and ta["rejected"] != tb["rejected"]:
                tests_changed.append({
                    "model": model,
                    "a": "rejected" if ta["rejected"] else "not rejected",
                    "b": "rejected" if tb["rejected"] else "not rejected",
                })
        doc["conduct"] = {
            "theta_a": ca["theta"], "theta_b": cb["theta"],
            "theta_change": cb["theta"] - ca["theta"],
            "ci_a": ca["ci"], "ci_b": cb["ci"],
            "verdict_a": ca["verdict"], "verdict_b": cb["verdict"],
            "verdict_changed": ca["verdict"] != cb["verdict"],
            "tests_changed": tests_changed,
        }
    common = oa.merge(ob, on=["market", "period"], suffixes=("_a", "_b"))
    rows: dict[str, Any] = {"count": len(common)}
    for col in ("elasticity", "marginal_cost_estimated", "lerner_estimated"):
        if f"{col}_a" in common and f"{col}_b" in common:
            va, vb = common[f"{col}_a"].to_numpy(float), common[f"{col}_b"].to_numpy(float)
            ok = np.isfinite(va) & np.isfinite(vb)
            if ok.any():
                rows[col.replace("_estimated", "")] = {
                    "a": float(va[ok].mean()), "b": float(vb[ok].mean()),
                    "mean_abs_change": float(np.abs(vb[ok] - va[ok]).mean()),
                }
    doc["common_rows"] = rows
    return Comparison(a=a, b=b, document=clean(doc))


def _period_column(folder: Path) -> str:
    """The period column named in a run's copy of its study file (``period`` if unreadable)."""
    try:
        doc = tomllib.loads((folder / "study.toml").read_text(encoding="utf-8"))
        return str(doc["panel"]["period"])
    except (OSError, ValueError, KeyError, TypeError):
        return "period"


def comparison_figure(runs: Path, comp: Comparison) -> Figure:
    """Both runs' conduct intervals and median Lerner paths, side by side.

    Parameters
    ----------
    runs : Path
        The study's runs folder.
    comp : Comparison
        The two runs compared.

    Returns
    -------
    matplotlib.figure.Figure
        Drawn by :func:`conduct.figures.run_comparison_figure` from each run's
        ``summary.json`` and ``observations.csv``.
    """
    snaps = []
    for run, role in ((comp.a, "earlier"), (comp.b, "later")):
        summary, obs, _ = _load(runs / run)
        snaps.append(RunSnapshot.of(summary, obs, role))
    return run_comparison_figure(snaps[0], snaps[1], period_column=_period_column(runs / comp.b))
