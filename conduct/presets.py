"""Named simulation scenarios, the ``conduct simulate`` options, and the files written.

:func:`write_study` turns a :class:`~conduct.simulate.SimulationSpec` into a
study folder: the panel (CSV or Parquet), a ``study.toml`` that runs with
``conduct estimate``, ``truth.json`` (parameters and conduct per regime) and
``truth_observations.csv`` (the truth per market-period).  The same spec and
seed give byte-identical files.  :func:`run_simulate` is what the command line
calls; it starts from a preset or the defaults and applies the options.

Episode syntax (the ``episode`` option)
---------------------------------------
``CONDUCT[:markets=LIST][:periods=FIRST-LAST]``, several joined by ``;``, or
``none`` for no episode.

* ``CONDUCT``: ``competitive``, ``cournot``, ``collusive``, or a theta in
  [0, 1] (``0.6`` or ``theta=0.6``).
* ``LIST``: comma-separated market numbers (1-based), ranges ``3-8`` or market
  names; all markets when left out.
* ``FIRST-LAST``: period labels (``2018Q1-2020Q4``) or 1-based period numbers
  (``21-32``), inclusive; one period alone is allowed; all periods when left out.

Example: ``collusive:markets=1-8:periods=2018Q1-2020Q4``.
"""

from __future__ import annotations

import dataclasses
import json
import math
from pathlib import Path
from typing import Any, Literal

import numpy as np
import pandas as pd

from conduct.errors import StudyFileError, suggest
from conduct.layouts import SourceLayout, layout_files, layout_toml, write_sources
from conduct.simulate import (
    CONDUCTS,
    Conduct,
    Episode,
    SimulatedPanel,
    SimulationSpec,
    conduct_theta,
    market_labels,
    period_labels,
    simulate,
    validate_spec,
)

__all__ = [
    "LOG_DEMAND",
    "PRESETS",
    "PRESET_LAYOUTS",
    "REGION_NAMES",
    "parse_conduct",
    "parse_episodes",
    "preset_files",
    "run_simulate",
    "study_toml",
    "truth_document",
    "write_study",
]

FORMATS = ("csv", "parquet")

#: Invented names of the 36 regional markets of the road-salt scenario.
REGION_NAMES: tuple[str, ...] = (
    "Ambervale", "Brindlecross", "Caldermoor", "Dunhollow", "Eastvale", "Fenmarch",
    "Glenwick", "Harrowfield", "Ivyhurst", "Juniper", "Kestrelmoor", "Larkspur",
    "Mistledale", "Northmoor", "Oakhallow", "Pinecrag", "Quarrowby", "Ravensmere",
    "Saltmere", "Thornfold", "Umberholt", "Valewood", "Westerfold", "Yarrowby",
    "Zephyrholm", "Ashcombe", "Briarwick", "Cindermoss", "Deepholm", "Elderbrook",
    "Frostholm", "Greymantle", "Hollinmoor", "Ironmere", "Kingsfrost", "Lowenstrand",
)

#: Demand knobs (log scale) used when the log form is asked for.
LOG_DEMAND: dict[str, float] = {
    "intercept": 23.0,
    "price_slope": -3.0,
    "rotator_level": -1.9,
    "rotator_strength": 0.5,
    "market_effect_sd": 0.2,
    "period_effect_sd": 0.05,
    "demand_shock_sd": 0.05,
}
_LOG_SHIFTER = 0.3

_ROAD_SALT_EPISODE = Episode("collusive", (3, 7, 12, 16, 21, 25, 30, 34), 21, 32)

#: Named scenarios.  ``road-salt``: design section 7 (winter road salt for
#: highway authorities, 36 regions, 2013Q1-2024Q4, Cournot with a collusive
#: episode in 8 regions over 2018Q1-2020Q4).
PRESETS: dict[str, SimulationSpec] = {
    "road-salt": SimulationSpec(
        markets=36,
        periods=48,
        first_quarter="2013Q1",
        market_names=REGION_NAMES,
        conduct="cournot",
        episodes=(_ROAD_SALT_EPISODE,),
        break_test=True,
        rolling_window=12,
        title="Winter road salt for highway authorities, 36 regions, 2013Q1-2024Q4 "
        "(invented data)",
        seed=1,
    ),
}


#: Presets written as several sources (the demo study exercises the panel assembly):
#: cost indexes by region-quarter, a national price index by quarter (the main table
#: then holds prices in current money, deflated by the study), firm-level quantities.
PRESET_LAYOUTS: dict[str, SourceLayout] = {"road-salt": SourceLayout()}

_FIXED_FILES = ("study.toml", "truth.json", "truth_observations.csv")


def preset_files(preset: str | None, fmt: str = "csv") -> tuple[str, ...]:
    """Every file ``conduct simulate`` writes for a preset (None: the defaults).

    Parameters
    ----------
    preset : str or None
    fmt : {"csv", "parquet"}

    Returns
    -------
    tuple of str
        ``panel.<fmt>``, any source files of the preset's layout, then the study
        file and the truth files; for the command's never-overwrite check.
    """
    layout = PRESET_LAYOUTS.get(preset) if preset else None
    extra = layout_files(layout, fmt) if layout is not None else ()
    return (f"panel.{fmt}", *extra, *_FIXED_FILES)


# ----------------------------------------------------------------------------------------
# Options
# ----------------------------------------------------------------------------------------


def parse_conduct(text: str) -> Conduct:
    """Read a conduct option: a name in CONDUCTS, ``0.6`` or ``theta=0.6``.

    Parameters
    ----------
    text : str

    Returns
    -------
    str or float

    Raises
    ------
    StudyFileError
        For anything else, listing the valid forms.
    """
    raw = text.strip()
    if raw in CONDUCTS:
        return raw
    number = raw.removeprefix("theta=").strip()
    try:
        value = float(number)
    except ValueError:
        raise StudyFileError(
            f"Unknown conduct '{raw}'{suggest(raw, CONDUCTS)}; use one of "
            f"{', '.join(CONDUCTS)} or a theta in [0, 1] such as 0.6 or theta=0.6."
        ) from None
    conduct_theta(value)
    return value


def _markets(value: str, spec: SimulationSpec, where: str) -> tuple[int, ...]:
    names = market_labels(spec)
    out: list[int] = []
    for item in (s.strip() for s in value.split(",")):
        first, dash, last = item.partition("-")
        if item.isdigit() or (dash and first.strip().isdigit() and last.strip().isdigit()):
            lo, hi = int(first), int(last) if dash else int(first)
            if not 1 <= lo <= hi <= spec.markets:
                raise StudyFileError(
                    f"{where}: markets '{item}' is outside 1-{spec.markets} (or reversed)."
                )
            out.extend(range(lo, hi + 1))
        elif item in names:
            out.append(names.index(item) + 1)
        else:
            raise StudyFileError(
                f"{where}: '{item}' is neither a market number, a range like 3-8, nor a market "
                f"name{suggest(item, names)}."
            )
    return tuple(sorted(set(out)))


def _period(token: str, spec: SimulationSpec, where: str) -> int:
    labels = period_labels(spec)
    token = token.strip()
    if token in labels:
        return labels.index(token) + 1
    if token.isdigit() and 1 <= int(token) <= spec.periods:
        return int(token)
    raise StudyFileError(
        f"{where}: period '{token}' is not one of {labels[0]}..{labels[-1]} "
        f"nor a number 1-{spec.periods}."
    )


def parse_episodes(text: str, spec: SimulationSpec) -> tuple[Episode, ...]:
    """Read the episode option (syntax in the module docstring).

    Parameters
    ----------
    text : str
        E.g. ``"collusive:markets=1-8:periods=2018Q1-2020Q4"``; ``"none"`` for none.
    spec : SimulationSpec
        Gives the market names, period labels and panel size.

    Returns
    -------
    tuple of Episode

    Raises
    ------
    StudyFileError
        Naming the episode and the part that cannot be read.
    """
    if text.strip().lower() in ("", "none"):
        return ()
    episodes = []
    for k, chunk in enumerate(text.split(";"), 1):
        where = f"Episode {k} ('{chunk.strip()}')"
        head, *parts = (p.strip() for p in chunk.split(":"))
        conduct = parse_conduct(head)
        found: dict[str, str] = {}
        for part in parts:
            key, eq, value = (s.strip() for s in part.partition("="))
            if key not in ("markets", "periods") or not eq or not value:
                raise StudyFileError(
                    f"{where}: cannot read '{part}'; write markets=LIST or periods=FIRST-LAST, "
                    "e.g. collusive:markets=1-8:periods=2018Q1-2020Q4."
                )
            if key in found:
                raise StudyFileError(f"{where}: '{key}=' is given twice.")
            found[key] = value
        markets = (
            _markets(found["markets"], spec, where)
            if "markets" in found
            else tuple(range(1, spec.markets + 1))
        )
        first, last = 1, spec.periods
        if "periods" in found:
            a, dash, b = found["periods"].partition("-")
            first = _period(a, spec, where)
            last = _period(b, spec, where) if dash else first
            if last < first:
                raise StudyFileError(f"{where}: the period window ends before it starts.")
        episodes.append(Episode(conduct, markets, first, last))
    return tuple(episodes)


def _with_form(spec: SimulationSpec, form: str) -> SimulationSpec:
    if form not in ("linear", "log"):
        raise StudyFileError(
            f"Unknown demand form '{form}'{suggest(form, ('linear', 'log'))}; "
            "use linear or log."
        )
    if form == spec.form:
        return spec
    if form == "log":
        shifters = tuple((n, _LOG_SHIFTER) for n, _ in spec.demand_shifters)
        return dataclasses.replace(spec, form="log", demand_shifters=shifters, **LOG_DEMAND)
    base = SimulationSpec()
    linear = {k: getattr(base, k) for k in LOG_DEMAND}
    coef = base.demand_shifters[0][1]
    shifters = tuple((n, coef) for n, _ in spec.demand_shifters)
    return dataclasses.replace(spec, form="linear", demand_shifters=shifters, **linear)


def run_simulate(
    out_dir: Path,
    *,
    preset: str | None,
    markets: int | None,
    periods: int | None,
    conduct: str | None,
    episode: str | None,
    form: str | None,
    seed: int | None,
    fmt: str,
) -> Path:
    """Build a spec from a preset (or the defaults) and options, and write the study.

    Parameters
    ----------
    out_dir : Path
        Folder to write into (created if needed; the four files are overwritten).
    preset : str or None
        A key of :data:`PRESETS`; None starts from ``SimulationSpec()`` (40 x 40,
        Cournot everywhere).
    markets, periods : int or None
        Panel size; None keeps the preset's.
    conduct : str or None
        Conduct outside episodes: competitive, cournot, collusive or a theta
        (``0.6`` / ``theta=0.6``); None keeps the preset's.
    episode : str or None
        Episodes (module docstring syntax) replacing the preset's; ``"none"``
        removes them; None keeps the preset's.
    form : str or None
        ``linear`` or ``log`` (log swaps in :data:`LOG_DEMAND`); None keeps the preset's.
    seed : int or None
        Seed; None keeps the preset's (1 for ``road-salt`` and the defaults).
    fmt : str
        ``csv`` or ``parquet``.

    Returns
    -------
    Path
        The written ``study.toml``.

    Raises
    ------
    StudyFileError
        For an unknown preset, format, conduct or form, bad episode syntax, or
        parameters without an interior equilibrium.
    """
    if preset is None:
        spec = SimulationSpec()
    elif preset in PRESETS:
        spec = PRESETS[preset]
    else:
        raise StudyFileError(
            f"Unknown preset '{preset}'{suggest(preset, PRESETS)}; presets: "
            f"{', '.join(sorted(PRESETS))}."
        )
    changes: dict[str, Any] = {}
    if markets is not None:
        changes["markets"] = markets
        if spec.market_names and markets > len(spec.market_names):
            changes["market_names"] = ()
    if periods is not None:
        changes["periods"] = periods
    if conduct is not None:
        changes["conduct"] = parse_conduct(conduct)
    if seed is not None:
        changes["seed"] = seed
    spec = dataclasses.replace(spec, **changes)
    if form is not None:
        spec = _with_form(spec, form)
    if episode is not None:
        spec = dataclasses.replace(spec, episodes=parse_episodes(episode, spec))
    else:
        for ep in spec.episodes:
            if max(ep.markets) > spec.markets or ep.last_period > spec.periods:
                raise StudyFileError(
                    f"The preset's episode (markets {list(ep.markets)}, periods "
                    f"{ep.first_period}-{ep.last_period}) does not fit {spec.markets} markets x "
                    f"{spec.periods} periods; set an episode that fits (e.g. "
                    "'collusive:markets=1-3:periods=5-8') or 'none'."
                )
    layout = PRESET_LAYOUTS.get(preset) if preset is not None else None
    return write_study(out_dir, spec, fmt=fmt, layout=layout)


# ----------------------------------------------------------------------------------------
# Files
# ----------------------------------------------------------------------------------------

_DECIMALS = {"price": 4, "hhi": 6}
_QUANTITY_DECIMALS = 2


def _panel_frame(sim: SimulatedPanel) -> pd.DataFrame:
    """The panel as written: price to 4 decimals, quantity to 2, H to 6, others to 4."""
    spec = sim.spec
    cols: dict[str, Any] = {}
    for name, values in sim.panel.items():
        if name in (spec.market_column, spec.period_column, "sellers"):
            cols[name] = values
        else:
            places = _QUANTITY_DECIMALS if name == spec.quantity_column else 4
            cols[name] = np.round(values.astype(float), _DECIMALS.get(name, places))
    return pd.DataFrame(cols)


def _toml_list(items: list[str]) -> str:
    return "[" + ", ".join(json.dumps(s) for s in items) + "]"


def study_toml(spec: SimulationSpec, panel_file: str, sources: list[str] | None = None) -> str:
    """The ``study.toml`` text for a simulated panel (design section 3 keys).

    Parameters
    ----------
    spec : SimulationSpec
    panel_file : str
        Panel file name, relative to the study file.
    sources : list of str or None
        Lines for ``[[sources]]``, ``[firms]`` and ``[derive]``, placed after
        ``[panel]`` (:func:`conduct.layouts.layout_toml`).

    Returns
    -------
    str
    """
    rot = [spec.rotator] if spec.rotator else []
    costs = [n for n, _ in spec.cost_shifters]
    instruments = list(costs)
    if spec.instrument_interactions and spec.rotator:
        instruments += [f"{n}_x_{spec.rotator}" for n in costs]
    effects = ["market"] + (["period"] if spec.period_effect_sd > 0 else [])
    lines = [
        f"title = {json.dumps(spec.title)}",
        "",
        "[panel]",
        f"file = {json.dumps(panel_file)}",
        f"market = {json.dumps(spec.market_column)}",
        f"period = {json.dumps(spec.period_column)}",
        'price = "price"',
        f"quantity = {json.dumps(spec.quantity_column)}",
        'sellers = "sellers"',
        'concentration = "hhi"',
        *(sources or []),
        "",
        "[demand]",
        f"form = {json.dumps(spec.form)}",
        f"shifters = {_toml_list([n for n, _ in spec.demand_shifters])}",
        f"rotators = {_toml_list(rot)}",
        f"instruments = {_toml_list(instruments)}",
        f"effects = {_toml_list(effects)}",
        'estimator = "2sls"',
        'errors = "cluster"',
        "",
        "[supply]",
        f"cost_shifters = {_toml_list(costs)}",
        f"cost_slope = {'true' if spec.cost_slope > 0 else 'false'}",
        "instruments = []",
        'regimes = ""',
        f"break_test = {'true' if spec.break_test else 'false'}",
        f"rolling_window = {spec.rolling_window}",
        "",
        "[models]",
        'candidates = ["competitive", "cournot", "collusive"]',
        "",
        "[inference]",
        "level = 0.95",
        "bootstrap = 0",
        f"seed = {spec.seed}",
        "",
        "[output]",
        'runs = "runs"',
        "",
    ]
    return "\n".join(lines)


def _stats(values: np.ndarray) -> dict[str, float]:
    return {
        "mean": round(float(values.mean()), 6),
        "min": round(float(values.min()), 6),
        "max": round(float(values.max()), 6),
    }


def _rule(conduct: Conduct) -> tuple[str, float | None, str]:
    kind, theta = conduct_theta(conduct)
    if kind == "cournot":
        return "cournot", None, "theta = H, the Herfindahl index of equilibrium shares"
    if kind == "competitive":
        return "competitive", 0.0, "theta = 0, price-taking (P = mc of every active firm)"
    name = "collusive" if conduct == "collusive" else f"theta={theta:g}"
    return name, theta, "theta fixed, industry conduct with equal quotas (H = 1/N)"


def truth_document(sim: SimulatedPanel, files: dict[str, str]) -> dict[str, Any]:
    """Everything planted, as a JSON-ready dict (written with sorted keys).

    Parameters
    ----------
    sim : SimulatedPanel
    files : dict of str to str
        Names of the files written beside it.

    Returns
    -------
    dict
    """
    spec, tr = sim.spec, sim.truth
    labels, names = period_labels(spec), market_labels(spec)
    regimes: list[dict[str, Any]] = []
    grid = np.zeros(len(tr["theta_true"]), dtype=int)
    for k, ep in enumerate(spec.episodes, 1):
        rows = np.isin(tr["market"], [names[m - 1] for m in ep.markets]) & np.isin(
            tr["period"], labels[ep.first_period - 1 : ep.last_period]
        )
        grid[rows] = k
    for k, conduct in enumerate((spec.conduct, *(e.conduct for e in spec.episodes))):
        name, theta, rule = _rule(conduct)
        sel = grid == k
        entry: dict[str, Any] = {"regime": "base" if k == 0 else f"episode {k}",
                                 "conduct": name, "theta": theta, "rule": rule,
                                 "observations": int(sel.sum())}
        if sel.any():
            entry["theta_true"] = _stats(tr["theta_true"][sel])
        if k > 0:
            ep = spec.episodes[k - 1]
            entry.update(markets=[names[m - 1] for m in ep.markets],
                         market_numbers=list(ep.markets),
                         first_period=labels[ep.first_period - 1],
                         last_period=labels[ep.last_period - 1])
        regimes.append(entry)
    scale = "log" if spec.form == "log" else "level"
    dropped = int((sim.firms["present"] & ~sim.firms["active"]).sum())
    return {
        "invented_data": True,
        "title": spec.title,
        "seed": spec.seed,
        "files": files,
        "panel": {"rows": len(tr["price"]), "markets": spec.markets, "periods": spec.periods,
                  "first_period": labels[0], "last_period": labels[-1]},
        "demand": {
            "form": spec.form, "scale": scale, "intercept": spec.intercept,
            "price": spec.price_slope, "rotator": spec.rotator,
            "rotator_level": spec.rotator_level, "price_x_rotator": spec.rotator_strength,
            "shifters": dict(spec.demand_shifters),
            "market_effect_sd": spec.market_effect_sd,
            "period_effect_sd": spec.period_effect_sd, "shock_sd": spec.demand_shock_sd,
        },
        "supply": {
            "cost_constant": spec.cost_constant, "cost_shifters": dict(spec.cost_shifters),
            "cost_slope": spec.cost_slope, "cost_slope_scope": spec.cost_slope_scope,
            "firm_cost_sd": spec.firm_cost_sd, "cost_shock_sd": spec.cost_shock_sd,
            "sellers_range": list(spec.sellers), "entry_exit_rate": spec.entry_exit_rate,
        },
        "conduct": {"regimes": regimes, "theta_true": _stats(tr["theta_true"])},
        "summary": {
            "price": _stats(tr["price"]), "quantity": _stats(tr["quantity"]),
            "marginal_cost": _stats(tr["marginal_cost"]), "lerner": _stats(tr["lerner"]),
            "hhi": _stats(tr["hhi"]), "elasticity": _stats(tr["elasticity"]),
            "sellers": {"min": int(tr["sellers"].min()), "max": int(tr["sellers"].max())},
            "firms_dropped_out": dropped,
        },
        "identity": "price = marginal_cost + theta_true * quantity / |dq_dp| in "
        "truth_observations.csv; marginal_cost is the share-weighted firm marginal cost",
    }


def _auto_layout(spec: SimulationSpec) -> SourceLayout | None:
    for name, layout in PRESET_LAYOUTS.items():
        if spec == PRESETS[name]:
            return layout
    return None


def write_study(out_dir: Path, spec: SimulationSpec, fmt: str = "csv",
                layout: SourceLayout | Literal["auto"] | None = "auto") -> Path:
    """Simulate and write panel, ``study.toml``, ``truth.json`` and ``truth_observations.csv``.

    Parameters
    ----------
    out_dir : Path
        Folder (created if needed); existing files of the same names are replaced.
    spec : SimulationSpec
    fmt : {"csv", "parquet"}
        Panel file format (``panel.csv`` or ``panel.parquet``).
    layout : SourceLayout, None or "auto"
        Split the panel into several sources (:mod:`conduct.layouts`); None writes
        one file; ``"auto"`` uses the layout of the preset ``spec`` equals
        (:data:`PRESET_LAYOUTS`: the demo study), else one file.

    Returns
    -------
    Path
        The ``study.toml`` written.

    Raises
    ------
    StudyFileError
        For an unknown format or a spec that cannot be simulated.

    Notes
    -----
    The panel holds what an analyst would see (no episode column); numbers are
    rounded (price to 4 decimals, quantity to 2, H to 6, others to 4).  The truth files keep
    full precision, so their identity holds to rounding error of doubles.
    """
    if fmt not in FORMATS:
        raise StudyFileError(
            f"Unknown panel format '{fmt}'{suggest(fmt, FORMATS)}; use {' or '.join(FORMATS)}."
        )
    validate_spec(spec)
    if layout == "auto":
        layout = _auto_layout(spec)
    sim = simulate(spec)
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    panel_name = f"panel.{fmt}"
    frame = _panel_frame(sim)
    extra: dict[str, str] = {}
    toml_lines: list[str] = []
    if layout is not None:
        frame = write_sources(sim, frame, layout, out, fmt)
        toml_lines = layout_toml(sim, layout, fmt)
        extra = {name.split(".")[0]: name for name in layout_files(layout, fmt)}
    if fmt == "csv":
        frame.to_csv(out / panel_name, index=False, lineterminator="\n")
    else:
        frame.to_parquet(out / panel_name, index=False, engine="pyarrow", compression="snappy")
    files = {"panel": panel_name, "study": "study.toml", "observations": "truth_observations.csv",
             **extra}
    pd.DataFrame(sim.truth).to_csv(out / files["observations"], index=False, lineterminator="\n")
    doc = truth_document(sim, files)
    text = json.dumps(doc, sort_keys=True, indent=2, allow_nan=False, default=_json_default)
    (out / "truth.json").write_text(text + "\n", encoding="utf-8")
    study = out / "study.toml"
    study.write_text(study_toml(spec, panel_name, toml_lines), encoding="utf-8")
    return study


def _json_default(value: Any) -> Any:
    if isinstance(value, np.integer):
        return int(value)
    if isinstance(value, np.floating) and math.isfinite(value):
        return float(value)
    raise TypeError(f"not JSON serialisable: {value!r}")
