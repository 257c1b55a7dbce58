"""Monte Carlo power of the conduct tests at a study's estimated structure.

``conduct power STUDY`` answers "could these data tell the candidate models
apart?".  It estimates the study once, then for each candidate model m as the
truth simulates R panels of the same shape with the estimated demand and cost
functions, the candidate's conduct and resampled shocks
(:mod:`conduct.power_sim`), re-runs the estimation on each (demand, supply and
every candidate's Wald test; the pairwise Rivers-Vuong menu test when
available) and counts rejections:

* **size**: how often the Wald test rejects the true model (or a candidate
  predicting the same markups), against the nominal ``1 - level``;
* **power**: how often it rejects each other model;
* **menu**: how often the true model fits significantly better than each other
  model, and how often the other model wrongly fits significantly better.

Each rate ``p`` over ``R`` usable panels carries the Monte Carlo standard error
``sqrt(p (1 - p) / R)``.  Replicate ``r`` of the model at position ``k`` in the
study's candidate list draws from its own stream ``default_rng([seed, k, r])``,
so the numbers do not depend on where or in which order replicates run.
"""

from __future__ import annotations

import datetime as dt
import json
import os
import re
import shutil
from collections.abc import Callable, Sequence
from functools import partial
from pathlib import Path
from typing import Any

import numpy as np

from conduct.demand import DemandResult, estimate_demand
from conduct.errors import ConductError, suggest
from conduct.identify import check_identification
from conduct.panel import Panel, load_panel
from conduct.power_result import PowerResult, Replicate, TruthSummary
from conduct.power_sim import (
    SHOCK_SCHEMES,
    ShockScheme,
    Structure,
    estimated_structure,
    markup_multiplier,
    simulated_panel,
)
from conduct.study import Study, load_study
from conduct.supply import SupplyResult, estimate_supply

__all__ = ["PowerResult", "Replicate", "TruthSummary", "power_analysis", "power_replicate",
           "write_power"]

Mapper = Callable[[Callable[[int], Any], Sequence[int]], list[Any]]
MenuFunction = Callable[[Panel, Study, DemandResult, SupplyResult], Any]

# Folder names a label may take (the same rule as run labels).
_LABEL = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]{0,63}$")
# Markups equal to this relative tolerance make two candidates the same model.
_SAME_MARKUP = 1e-9


# ----------------------------------------------------------------------------------------
# One replicate
# ----------------------------------------------------------------------------------------


def _menu_function() -> MenuFunction | None:
    """The Rivers-Vuong menu test, or None while :mod:`conduct.menu` cannot be imported."""
    try:
        from conduct.menu import menu_test
    except ImportError:
        return None
    return menu_test


def _menu_outcome(menu: Any, pairs: tuple[tuple[str, str], ...]) -> tuple[int, ...]:
    found = {(p.a, p.b): (1 if p.better == p.a else -1 if p.better == p.b else 0)
             for p in menu.pairs}
    return tuple(found.get(pair, 0) for pair in pairs)


def power_replicate(panel: Panel, study: Study, structure: Structure,
                    truths: tuple[int, ...], tested: tuple[str, ...],
                    pairs: tuple[tuple[str, str], ...], seed: int, replications: int,
                    scheme: ShockScheme, task: int) -> Replicate:
    """Simulate and re-estimate one panel: task ``i * replications + r`` for truth ``i``.

    Parameters
    ----------
    panel, study : Panel, Study
        The observed panel and the study.
    structure : Structure
        The estimated structure.
    truths : tuple of int
        Positions in ``study.candidates`` of the true models simulated.
    tested : tuple of str
        Candidates with a Wald test, in the order of the outcome.
    pairs : tuple of (str, str)
        Menu pairs to record (empty: no menu test).
    seed, replications : int
    scheme : {'wild', 'blocks'}
        How shocks are resampled (:func:`conduct.power_sim.draw_shocks`).
    task : int

    Returns
    -------
    Replicate
    """
    k = truths[task // replications]
    r = task % replications
    rng = np.random.default_rng([seed, k, r])
    theta = markup_multiplier(study.candidates[k], structure)
    assert theta is not None
    sim, refused = simulated_panel(panel, study, structure, theta, rng, scheme)
    try:
        demand = estimate_demand(sim, study, diagnostics=False)
        supply = estimate_supply(sim, study, demand, with_tests=True)
    except (ConductError, np.linalg.LinAlgError):  # a simulated panel that cannot be fitted
        return Replicate(False, refused, float("nan"), (), None)
    by_name = {t.name: t.rejected for t in supply.tests}
    rejected = tuple(bool(by_name.get(name, False)) for name in tested)
    menu_out = None
    menu_fn = _menu_function() if pairs else None
    if menu_fn is not None:
        try:
            menu_out = _menu_outcome(menu_fn(sim, study, demand, supply), pairs)
        except (ConductError, np.linalg.LinAlgError):
            menu_out = None
    return Replicate(True, refused, supply.theta, rejected, menu_out)


# ----------------------------------------------------------------------------------------
# The analysis
# ----------------------------------------------------------------------------------------


def _in_process(task: Callable[[int], Any], items: Sequence[int]) -> list[Any]:
    return [task(i) for i in items]


def _same_markups(study: Study, structure: Structure, rows: np.ndarray
                  ) -> dict[tuple[str, str], bool]:
    marks = {c.name: markup_multiplier(c, structure) for c in study.candidates}
    out: dict[tuple[str, str], bool] = {}
    for a, ha in marks.items():
        for b, hb in marks.items():
            if a != b and ha is not None and hb is not None:
                out[(a, b)] = bool(np.allclose(ha[rows], hb[rows], rtol=_SAME_MARKUP,
                                               atol=_SAME_MARKUP))
    return out


def _summary(name: str, theta: float | None, reps: Sequence[Replicate], n_rows: int
             ) -> TruthSummary:
    ok = [r for r in reps if r.ok]
    thetas = np.array([r.theta for r in ok], dtype=float)
    return TruthSummary(
        name=name, theta=theta, usable=len(ok), failed=len(reps) - len(ok),
        menu_usable=sum(r.menu is not None for r in ok),
        refused_share=float(np.mean([r.refused for r in reps]) / n_rows) if reps else 0.0,
        theta_mean=float(thetas.mean()) if thetas.size else float("nan"),
        theta_sd=float(thetas.std(ddof=1)) if thetas.size > 1 else float("nan"),
    )


def power_analysis(
    study: Study | str | Path,
    *,
    replications: int = 100,
    seed: int | None = None,
    mapper: Mapper | None = None,
    menu: bool = True,
    models: Sequence[str] | None = None,
    shocks: ShockScheme = "wild",
) -> PowerResult:
    """Monte Carlo size and power of the conduct tests at the estimated structure.

    Parameters
    ----------
    study : Study, str or Path
        A validated study or the path of a study file; needs a ``[supply]`` table.
    replications : int
        Simulated panels per true model (at least 2).
    seed : int or None
        Seed of every draw; None uses the study's ``[inference] seed``.
    mapper : callable or None
        ``mapper(task, range)`` returning results in order (see
        :func:`conduct.executor.make_mapper`); None runs in this process without
        a progress bar.
    menu : bool
        Also run the Rivers-Vuong menu test on every simulated panel.
    models : sequence of str or None
        Names of the candidates to simulate as the truth; None simulates every
        candidate that can be (Cournot needs sellers or concentration).
    shocks : {'wild', 'blocks'}
        How demand and cost residuals are resampled by market: random signs on
        each market's own residuals (``wild``, the default) or residual paths
        of markets drawn with replacement (``blocks``); see
        :mod:`conduct.power_sim`.

    Returns
    -------
    PowerResult

    Raises
    ------
    conduct.errors.ConductError
        For a study without ``[supply]``, fewer than two replications, no
        candidate that can be simulated, or any error of the estimation itself.

    Notes
    -----
    The panels are simulated by :func:`conduct.power_sim.simulated_panel`: the
    observed exogenous data, the estimated demand and cost functions (fixed
    effects included), the true model's conduct, and demand and cost residuals
    resampled jointly by market (``shocks``).  With R usable panels a rejection rate
    p has Monte Carlo standard error ``sqrt(p (1 - p) / R)``.
    """
    st = study if isinstance(study, Study) else load_study(study)
    if st.supply is None:
        raise ConductError(f"Study file {st.path}: the power analysis tests conduct and needs "
                           "a [supply] table.")
    if isinstance(replications, bool) or not isinstance(replications, int) or replications < 2:
        raise ConductError(f"--replications must be a whole number of at least 2, got "
                           f"{replications!r}.")
    seed = st.inference.seed if seed is None else int(seed)
    if shocks not in SHOCK_SCHEMES:
        raise ConductError(f"Unknown shock scheme {shocks!r}{suggest(str(shocks), SHOCK_SCHEMES)};"
                           f" allowed values: {', '.join(SHOCK_SCHEMES)}.")
    names = [c.name for c in st.candidates]
    unknown = [m for m in (models or ()) if m not in names]
    if unknown:
        raise ConductError(f"Unknown true model(s) {', '.join(unknown)}"
                           f"{suggest(unknown[0], names)}; the study's candidates are "
                           f"{', '.join(names)}.")
    check_identification(st)
    panel = load_panel(st)
    demand = estimate_demand(panel, st, diagnostics=False)
    supply = estimate_supply(panel, st, demand, with_tests=True)
    structure = estimated_structure(panel, st, demand, supply)
    truths = tuple(i for i, c in enumerate(st.candidates)
                   if markup_multiplier(c, structure) is not None
                   and (models is None or c.name in models))
    if not truths:
        raise ConductError("No candidate model can be simulated: the Cournot benchmark needs "
                           "a sellers or concentration column.")
    tested = tuple(t.name for t in supply.tests)
    pairs: tuple[tuple[str, str], ...] = ()
    note = "" if menu else "The menu test was not run (menu = False)."
    menu_fn = _menu_function() if menu else None
    if menu and menu_fn is None:
        note = "The menu test is not available in this version; only Wald tests were run."
    elif menu_fn is not None:
        try:
            base_menu = menu_fn(panel, st, demand, supply)
            pairs = tuple((p.a, p.b) for p in base_menu.pairs)
        except ConductError as exc:
            note = f"The menu test was left out: it cannot run on the observed data ({exc})"
    task = partial(power_replicate, panel, st, structure, truths, tested, pairs, seed,
                   replications, shocks)
    run = mapper if mapper is not None else _in_process
    outcomes = run(task, range(len(truths) * replications))
    replicates = {st.candidates[k].name: tuple(outcomes[i * replications:(i + 1) * replications])
                  for i, k in enumerate(truths)}
    n_rows = len(panel.frame)
    summaries = tuple(_summary(st.candidates[k].name, st.candidates[k].theta,
                               replicates[st.candidates[k].name], n_rows) for k in truths)
    describe = getattr(mapper, "describe", None)
    return PowerResult(
        study=st, replications=replications, seed=seed, level=st.inference.level,
        truths=summaries, tested=tested,
        same=_same_markups(st, structure, supply.rows), pairs=pairs, menu_note=note,
        baseline={"theta": supply.theta, "se": supply.se,
                  "cournot_benchmark": supply.cournot_benchmark, "verdict": supply.verdict},
        replicates=replicates, data_sha256=panel.description.sha256,
        backend=str(describe()) if callable(describe) else "in-process", shocks=shocks,
    )


# ----------------------------------------------------------------------------------------
# Output folder
# ----------------------------------------------------------------------------------------


def write_power(result: PowerResult, *, label: str | None = None,
                argv: Sequence[str] = ()) -> Path:
    """Write ``power.json``, ``power.csv`` and the study file to ``<runs>/power/<id>/``.

    The folder is written under a hidden temporary name and renamed in one
    step, so a half-written result is never visible and nothing is overwritten.

    Parameters
    ----------
    result : PowerResult
    label : str or None
        Folder name instead of the time and data hash.
    argv : sequence of str
        The command line, recorded for provenance.

    Returns
    -------
    Path
        The new folder.
    """
    root = result.study.output.runs / "power"
    try:
        root.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise ConductError(f"Cannot create the folder {root}: {exc.strerror}.") from None
    now = dt.datetime.now(dt.UTC).replace(microsecond=0)
    base = label or f"{now:%Y%m%dT%H%M%SZ}-{result.data_sha256[:8]}"
    if not _LABEL.match(base):
        raise ConductError(
            f"Power label '{base}' is not allowed: use 1-64 letters, digits, '.', '_' or '-', "
            "starting with a letter or digit."
        )
    tmp = root / f".incomplete-{base}-{os.getpid()}"
    tmp.mkdir()
    try:
        doc = result.document()
        doc["provenance"] = {"backend": result.backend, "command": list(argv),
                             "created_utc": now.isoformat().replace("+00:00", "Z"),
                             "study_file": str(result.study.path)}
        result.table().to_csv(tmp / "power.csv", index=False, float_format="%.10g")
        if result.study.text:
            (tmp / "study.toml").write_text(result.study.text, encoding="utf-8")
        for i in range(1, 1000):
            target = root / (base if i == 1 else f"{base}-{i}")
            if target.exists():
                continue
            doc["id"] = target.name
            (tmp / "power.json").write_text(
                json.dumps(doc, indent=2, sort_keys=True, allow_nan=False) + "\n",
                encoding="utf-8")
            try:
                os.rename(tmp, target)
            except OSError:
                continue
            return target
        raise ConductError(f"Could not find a free folder name for '{base}' in {root}.")
    finally:
        if tmp.exists():
            shutil.rmtree(tmp, ignore_errors=True)
