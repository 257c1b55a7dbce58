"""Results of the power analysis: rejection rates, their Monte Carlo errors, the answer.

:class:`PowerResult` holds the raw outcome of every simulated panel
(:class:`Replicate`) and turns them into rates: for the Wald test of each
candidate with each candidate as the truth (``size`` when the tested model
predicts the truth's markups, ``power`` otherwise), and for the pairwise menu
test (how often the true model fits significantly better than another, and
how often the other wrongly does).  A rate ``p`` over ``R`` usable panels has
Monte Carlo standard error ``sqrt(p (1 - p) / R)``.  Nothing here simulates or
estimates; :mod:`conduct.power` does.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import pandas as pd

from conduct.study import Study

__all__ = ["PowerResult", "Replicate", "TruthSummary"]

# A rate this far (in Monte Carlo standard errors) above nominal is reported as over-rejection.
_SIZE_ALARM_SE = 3.0
# Share of refused rows above which the simulated panels are flagged as unlike the data.
_REFUSED_ALARM = 0.05
# Power at or above this reads "yes"; below _POWER_NO on both sides reads "no".
_POWER_YES = 0.8
_POWER_NO = 0.5


@dataclass(frozen=True, slots=True)
class Replicate:
    """What one simulated panel gave.

    Attributes
    ----------
    ok : bool
        The estimation ran (False: the simulated panel could not be estimated).
    refused : int
        Rows left out because the equilibrium had no interior solution.
    theta : float
        Estimated theta (NaN when not ok).
    rejected : tuple of bool
        Wald rejection of each tested candidate, in :attr:`PowerResult.tested` order.
    menu : tuple of int or None
        Per menu pair (:attr:`PowerResult.pairs` order): 1 when the first model fits
        significantly better, -1 when the second does, 0 otherwise; None when the
        menu test is off or failed on this panel.
    """

    ok: bool
    refused: int
    theta: float
    rejected: tuple[bool, ...]
    menu: tuple[int, ...] | None


@dataclass(frozen=True, slots=True)
class TruthSummary:
    """The replicates simulated under one true model.

    Attributes
    ----------
    name : str
    theta : float or None
        The model's conduct (None: Cournot, theta = H per row).
    usable, failed : int
        Replicates estimated, and replicates whose panel could not be estimated.
    menu_usable : int
        Replicates where the menu test ran.
    refused_share : float
        Mean share of rows refused (no interior equilibrium).
    theta_mean, theta_sd : float
        Mean and standard deviation of the estimated theta.
    """

    name: str
    theta: float | None
    usable: int
    failed: int
    menu_usable: int
    refused_share: float
    theta_mean: float
    theta_sd: float


@dataclass(frozen=True, slots=True)
class PowerResult:
    """Rejection rates of the conduct tests with each candidate model as the truth.

    Attributes
    ----------
    study : Study
    replications : int
        Panels simulated per true model.
    seed : int
    level : float
        The study's confidence level; tests have nominal size ``1 - level``.
    truths : tuple of TruthSummary
        One per candidate that can be simulated, in the study's order.
    tested : tuple of str
        Candidates with a Wald test.
    same : dict of (str, str) to bool
        Whether two candidates predict the same markups at every row.
    pairs : tuple of (str, str)
        Menu pairs, in the menu test's order (empty when the menu test is off).
    menu_note : str
        Why the menu test is off, when it is.
    baseline : dict of str to float or str or None
        The estimate on the observed data: theta, se, cournot_benchmark, verdict.
    replicates : dict of str to tuple of Replicate
        The raw outcomes per true model.
    data_sha256 : str
    backend : str
        Where replicates ran (provenance only; numbers do not depend on it).
    shocks : str
        How residuals were resampled (``wild`` or ``blocks``).
    """

    study: Study
    replications: int
    seed: int
    level: float
    truths: tuple[TruthSummary, ...]
    tested: tuple[str, ...]
    same: dict[tuple[str, str], bool]
    pairs: tuple[tuple[str, str], ...]
    menu_note: str
    baseline: dict[str, float | str | None]
    replicates: dict[str, tuple[Replicate, ...]]
    data_sha256: str
    backend: str
    shocks: str = "wild"

    def table(self) -> pd.DataFrame:
        """All rates in long form.

        Returns
        -------
        pandas.DataFrame
            Columns ``test`` (``wald`` or ``menu``), ``truth``, ``model`` (the Wald
            null, or the other model of a menu pair), ``kind`` (``size`` when the
            model predicts the truth's markups, else ``power``), ``outcome``
            (``reject``; ``truth better`` or ``other better`` for the menu),
            ``rate``, ``mcse`` and ``replicates`` (usable panels).
        """
        rows: list[dict[str, Any]] = []
        for t in self.truths:
            reps = [r for r in self.replicates[t.name] if r.ok]
            for j, model in enumerate(self.tested):
                hits = sum(r.rejected[j] for r in reps)
                rows.append(_row("wald", t.name, model, self._kind(t.name, model), "reject",
                                 hits, len(reps)))
            menu_reps = [r.menu for r in reps if r.menu is not None]
            for i, (a, b) in enumerate(self.pairs):
                if t.name not in (a, b):
                    continue
                other = b if t.name == a else a
                sign = 1 if t.name == a else -1
                kind = self._kind(t.name, other)
                right = sum(m[i] == sign for m in menu_reps)
                wrong = sum(m[i] == -sign for m in menu_reps)
                rows.append(_row("menu", t.name, other, kind, "truth better", right,
                                 len(menu_reps)))
                rows.append(_row("menu", t.name, other, kind, "other better", wrong,
                                 len(menu_reps)))
        return pd.DataFrame(rows, columns=["test", "truth", "model", "kind", "outcome", "rate",
                                           "mcse", "replicates"])

    def _kind(self, truth: str, model: str) -> str:
        return "size" if truth == model or self.same.get((truth, model), False) else "power"

    def rate(self, truth: str, model: str, *, test: str = "wald",
             outcome: str = "reject") -> tuple[float, float]:
        """One rate and its Monte Carlo standard error.

        Parameters
        ----------
        truth, model : str
            True model, and the model tested (Wald) or compared with (menu).
        test : {'wald', 'menu'}
        outcome : str
            ``reject`` (Wald), ``truth better`` or ``other better`` (menu).

        Returns
        -------
        (float, float)
            Rate and standard error (NaN when there is no such rate).
        """
        return _lookup(self.table(), truth, model, test, outcome)

    def answer(self, a: str | None = None, b: str | None = None) -> str:
        """One sentence: can these data tell model ``a`` from model ``b``?

        Parameters
        ----------
        a, b : str or None
            Two true models; default Cournot and collusive when both were
            simulated, else the first and last true models.

        Returns
        -------
        str
        """
        names = [t.name for t in self.truths]
        if a is None or b is None:
            if "cournot" in names and "collusive" in names:
                a, b = "cournot", "collusive"
            elif len(names) >= 2:
                a, b = names[0], names[-1]
            else:
                return ("Only one candidate model could be simulated, so there is nothing to "
                        "tell apart.")
        pa, sa = self.rate(a, b)
        pb, sb = self.rate(b, a)
        nominal = 1.0 - self.level
        if self._kind(a, b) == "size":
            return (f"No: {a} and {b} predict the same markups in these data, so no test can "
                    "tell them apart.")
        if not (math.isfinite(pa) and math.isfinite(pb)):
            return f"Unknown: too few simulated panels could be estimated to compare {a} and {b}."
        low = min(pa, pb)
        if low >= _POWER_YES:
            verdict = "Yes"
        elif max(pa, pb) < _POWER_NO:
            verdict = "No"
        else:
            verdict = "Only partly"
        return (f"{verdict}: when conduct is {a} the Wald test rejects {b} in {pa:.0%} of "
                f"simulated panels (Monte Carlo s.e. {sa:.1%}), and when it is {b} it rejects "
                f"{a} in {pb:.0%} (s.e. {sb:.1%}), at a nominal size of {nominal:.0%}.")

    def warnings(self) -> tuple[str, ...]:
        """Cautions: over-rejection under the truth, refused rows, failed replicates."""
        out: list[str] = []
        nominal = 1.0 - self.level
        t = self.table()
        size = t[(t["test"] == "wald") & (t["kind"] == "size")]
        for _, row in size.iterrows():
            if not row["replicates"]:
                continue
            band = _SIZE_ALARM_SE * max(row["mcse"],
                                        math.sqrt(nominal * (1 - nominal) / row["replicates"]))
            where = (f"The Wald test of {row['model']} rejects in {row['rate']:.0%} of panels "
                     f"where conduct is {row['truth']} (nominal {nominal:.0%}): the test")
            if row["rate"] > nominal + band:
                out.append(f"{where} over-rejects at this sample size, so read its rejections "
                           "with care.")
            elif row["rate"] < nominal - band:
                out.append(f"{where} is conservative here, so the power figures understate "
                           "what a test of exact size would achieve.")
        for s in self.truths:
            if s.refused_share > _REFUSED_ALARM:
                out.append(f"Under {s.name}, {s.refused_share:.1%} of rows had no interior "
                           "equilibrium at the estimated structure and were left out of the "
                           "simulated panels.")
            if s.failed:
                out.append(f"Under {s.name}, {s.failed} of {self.replications} simulated "
                           "panels could not be estimated and were left out.")
        if self.menu_note:
            out.append(self.menu_note)
        return tuple(out)

    def text(self) -> str:
        """A terminal table of the Wald rejection rates (and the menu test's), and the answer."""
        nominal = 1.0 - self.level
        lines = [f"{self.study.title}",
                 f"power at the estimated structure: {self.replications} simulated panels per "
                 f"true model, seed {self.seed}, {self.shocks} shocks, tests at "
                 f"{nominal:.0%}"]
        base = self.baseline
        if base.get("theta") is not None:
            lines.append(f"estimated theta {_num(base['theta'])} (se {_num(base['se'])}), "
                         f"verdict {base['verdict']}")
        table = self.table()
        width = max(12, *(len(n) + 1 for n in self.tested))
        lines.append("")
        lines.append("Wald test rejection rate (Monte Carlo s.e.); * = size")
        lines.append(f"{'true model':<{width}}" + "".join(f"{m:>{width + 6}}"
                                                        for m in self.tested))
        for s in self.truths:
            cells = []
            for m in self.tested:
                p, se = _lookup(table, s.name, m)
                star = "*" if self._kind(s.name, m) == "size" else " "
                cells.append(f"{_cell(p, se)}{star}".rjust(width + 6))
            lines.append(f"{s.name:<{width}}" + "".join(cells))
        if self.pairs:
            lines.append("")
            lines.append("Menu test: true model significantly better / other model "
                         "significantly better")
            for s in self.truths:
                for b in self._others(s.name):
                    pr, _ = _lookup(table, s.name, b, "menu", "truth better")
                    pw, _ = _lookup(table, s.name, b, "menu", "other better")
                    lines.append(f"{s.name:<{width}} vs {b:<{width}} {_pct(pr):>6} / "
                                 f"{_pct(pw):>6}")
        lines.append("")
        lines.append(self.answer())
        lines += [f"warning: {w}" for w in self.warnings()]
        return "\n".join(lines)

    def _others(self, truth: str) -> list[str]:
        return [b if a == truth else a for a, b in self.pairs if truth in (a, b)]

    def document(self) -> dict[str, Any]:
        """The ``power.json`` document (sorted keys when written; no NaN)."""
        t = self.table()
        wald: dict[str, dict[str, Any]] = {}
        menu: dict[str, dict[str, Any]] = {}
        for _, row in t.iterrows():
            cell = {"kind": row["kind"], "rate": _finite(row["rate"]),
                    "mcse": _finite(row["mcse"]), "replicates": int(row["replicates"])}
            if row["test"] == "wald":
                wald.setdefault(row["truth"], {})[row["model"]] = cell
            else:
                key = "truth_better" if row["outcome"] == "truth better" else "other_better"
                menu.setdefault(row["truth"], {}).setdefault(row["model"], {})[key] = cell
        return {
            "answer": self.answer(),
            "baseline": {k: _finite(v) if isinstance(v, float) else v
                         for k, v in self.baseline.items()},
            "data_sha256": self.data_sha256,
            "level": self.level,
            "menu": menu or None,
            "menu_note": self.menu_note,
            "replications": self.replications,
            "seed": self.seed,
            "shocks": self.shocks,
            "study": self.study.title,
            "truths": {s.name: {"theta": s.theta, "usable": s.usable, "failed": s.failed,
                                "menu_usable": s.menu_usable,
                                "refused_share": _finite(s.refused_share),
                                "theta_mean": _finite(s.theta_mean),
                                "theta_sd": _finite(s.theta_sd)} for s in self.truths},
            "wald": wald,
            "warnings": list(self.warnings()),
        }


def _lookup(table: pd.DataFrame, truth: str, model: str, test: str = "wald",
            outcome: str = "reject") -> tuple[float, float]:
    sel = table[(table["test"] == test) & (table["truth"] == truth)
                & (table["model"] == model) & (table["outcome"] == outcome)]
    if sel.empty:
        return float("nan"), float("nan")
    return float(sel["rate"].iloc[0]), float(sel["mcse"].iloc[0])


def _row(test: str, truth: str, model: str, kind: str, outcome: str, hits: int,
         n: int) -> dict[str, Any]:
    rate = hits / n if n else float("nan")
    mcse = math.sqrt(rate * (1.0 - rate) / n) if n else float("nan")
    return {"test": test, "truth": truth, "model": model, "kind": kind, "outcome": outcome,
            "rate": rate, "mcse": mcse, "replicates": n}


def _finite(v: Any) -> Any:
    return None if isinstance(v, float) and not math.isfinite(v) else v


def _num(v: Any) -> str:
    return "-" if v is None else f"{float(v):.4f}"


def _pct(v: float) -> str:
    return "-" if not math.isfinite(v) else f"{v:.0%}"


def _cell(p: float, se: float) -> str:
    return "-" if not math.isfinite(p) else f"{p:.0%} ({se:.1%})"
