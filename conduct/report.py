"""The run's ``report.html``: one self-contained page a case team can read, print and file.

The page is rendered from the Jinja2 template ``conduct/templates/report.html``
with autoescaping on, so every name that comes from the user's data (market
labels, column names, the study title) is shown as text, never run as markup.
Figures are embedded as base64 PNG data URIs and the style sheet is inline:
the file makes no network request and holds no external address.  When the
run has a previous run, its comparison section holds a table of headline
numbers and a figure of both runs (:func:`comparison_figure`, drawn from the
previous run's summary and observations, written as ``figures/comparison.png``).

The verdict block at the top is available on its own, from plain summary
values only (:func:`verdict_text`, :func:`verdict_html`), so a notebook
representation can reuse it without a run folder.
"""

from __future__ import annotations

import base64
import shlex
from collections.abc import Callable, Mapping, Sequence
from pathlib import Path
from typing import Any

import pandas as pd
from jinja2 import Environment, PackageLoader, StrictUndefined, select_autoescape
from matplotlib.figure import Figure

from conduct.figures import (
    RunSnapshot,
    available_figures,
    figure_png,
    run_comparison_figure,
    save_figures,
)
from conduct.panel import MARKET
from conduct.pipeline import Results
from conduct.summary import CAUTION
from conduct.tables import TABLES, build_tables, format_value, header_text, write_tables

__all__ = [
    "COMPARISON_FIGURE",
    "SECTIONS",
    "comparison_applies",
    "comparison_figure",
    "comparison_rows",
    "render_report",
    "verdict_html",
    "verdict_text",
    "write_outputs",
    "write_report",
]

#: Section anchors and headings of the report, in order.
SECTIONS: tuple[tuple[str, str], ...] = (
    ("data", "Data"),
    ("demand", "Demand"),
    ("instruments", "Instruments"),
    ("conduct", "Conduct"),
    ("menu", "Menu test"),
    ("costs", "Costs and markups"),
    ("regimes", "Regimes and breaks"),
    ("comparison", "Comparison with the previous run"),
    ("provenance", "Provenance"),
)

# Where each table and figure goes; a table not listed is shown in the conduct section.
_TABLE_SECTION = {
    "demand_coefficients": "demand", "first_stage": "instruments",
    "overidentification": "instruments", "supply_coefficients": "conduct",
    "conduct_tests": "conduct", "menu_tests": "menu", "costs_markups": "costs",
}
_FIGURE_SECTION = {
    "first_stage": "instruments", "demand_residuals": "demand", "elasticities": "demand",
    "conduct": "conduct", "marginal_cost": "costs", "lerner": "costs", "rolling": "regimes",
}
_MAX_MARKETS_LISTED = 60
_THETA = "\N{GREEK SMALL LETTER THETA}"


def _environment() -> Environment:
    return Environment(
        loader=PackageLoader("conduct", "templates"),
        autoescape=select_autoescape(default=True, default_for_string=True),
        undefined=StrictUndefined,
        trim_blocks=True,
        lstrip_blocks=True,
        keep_trailing_newline=True,
    )


# ----------------------------------------------------------------------------------------
# Verdict (plain values only)
# ----------------------------------------------------------------------------------------


def _model(name: str) -> str:
    return {"cournot": "Cournot", "competitive": "competitive", "collusive": "collusive"}.get(
        name, f"'{name}'")


def _join(names: Sequence[str]) -> str:
    names = list(names)
    if len(names) <= 1:
        return "".join(names)
    return ", ".join(names[:-1]) + " and " + names[-1]


def _headline(conduct: Mapping[str, Any]) -> str:
    tests = conduct.get("tests") or {}
    kept = [n for n, t in tests.items() if not t.get("rejected")]
    verdict = conduct.get("verdict")
    if verdict == "competitive":
        return "Competitive conduct"
    if verdict == "cournot":
        return "Cournot conduct"
    if verdict == "collusive":
        return "Collusive conduct (joint profit maximisation)"
    if verdict and verdict != "inconclusive":
        return f"Conduct of the candidate model '{verdict}'"
    if not tests:
        return "Inconclusive: no candidate model was tested"
    if not kept:
        return "Inconclusive: every candidate model is rejected"
    return f"Inconclusive: the data do not separate {_join([_model(n) for n in kept])}"


def verdict_text(conduct: Mapping[str, Any] | None, *, theta_symbol: str = "theta") -> str:
    """The plain-language verdict sentence with its confidence statement.

    Parameters
    ----------
    conduct : mapping or None
        The ``conduct`` section of the summary (keys used: ``level``, ``tests``
        with ``rejected`` per model, ``theta``, ``ci``, ``cournot_benchmark``,
        ``identified``); None for a demand-only study.
    theta_symbol : str
        How to write theta (``"theta"`` in plain text, the Greek letter in HTML).

    Returns
    -------
    str
        For example ``"At the 95% level the data reject competitive and collusive
        conduct and do not reject Cournot; theta = 0.240 [0.220, 0.250]."``
    """
    if not conduct:
        return ("Demand only: this study estimates no supply relation, so conduct was not "
                "assessed.")
    if conduct.get("identified") is False:
        return "The conduct parameter is not identified by this specification."
    level = conduct.get("level") or 0.95
    tests = conduct.get("tests") or {}
    rejected = [_model(n) for n, t in tests.items() if t.get("rejected")]
    kept = [_model(n) for n, t in tests.items() if not t.get("rejected")]
    head = f"At the {level:.0%} level the data "
    if rejected and kept:
        body = (f"reject {_join(rejected)} conduct and do not reject {_join(kept)}")
    elif rejected:
        body = f"reject every candidate model ({_join(rejected)})"
    elif kept:
        body = f"reject none of the candidate models ({_join(kept)})"
    else:
        body = "were not used to test any candidate model"
    theta = conduct.get("theta")
    tail = ""
    if theta is not None:
        tail = f"; {theta_symbol} = {theta:.3f}"
        ci = conduct.get("ci")
        if ci and None not in ci:
            tail += f" [{ci[0]:.3f}, {ci[1]:.3f}]"
        bench = conduct.get("cournot_benchmark")
        if bench is not None:
            tail += f" (Cournot benchmark H = {bench:.3f})"
    return head + body + tail + "."


def _ar_reading(conduct: Mapping[str, Any] | None) -> str:
    ar = (conduct or {}).get("ar_set")
    if isinstance(ar, Mapping) and ar.get("reading"):
        reading = str(ar["reading"])
        return "Check robust to weak instruments: " + reading[:1].lower() + reading[1:]
    return ""


def _verdict_context(conduct: Mapping[str, Any] | None, warnings: Sequence[str],
                     caution: str) -> dict[str, Any]:
    kind = "none"
    if conduct:
        v = conduct.get("verdict") or "inconclusive"
        kind = v if v in ("competitive", "cournot", "collusive", "inconclusive") else "candidate"
    return {
        "headline": _headline(conduct) if conduct else "No conduct assessed (demand only)",
        "sentence": verdict_text(conduct, theta_symbol=_THETA),
        "robust": _ar_reading(conduct),
        "kind": kind,
        "caution": caution,
        "warnings": list(warnings),
    }


def verdict_html(conduct: Mapping[str, Any] | None, *, warnings: Sequence[str] = (),
                 caution: str = CAUTION) -> str:
    """The verdict block alone, as an HTML fragment with its own small style sheet.

    Parameters
    ----------
    conduct : mapping or None
        The ``conduct`` section of the summary (see :func:`verdict_text`).
    warnings : sequence of str
        Shown under the verdict.
    caution : str
        The cautions of the design (default :data:`conduct.summary.CAUTION`).

    Returns
    -------
    str
        Escaped HTML suitable for a notebook ``_repr_html_``.
    """
    template = _environment().get_template("report.html")
    return template.render(mode="verdict", verdict=_verdict_context(conduct, warnings, caution))


# ----------------------------------------------------------------------------------------
# Comparison with the previous run
# ----------------------------------------------------------------------------------------


def _get(doc: Mapping[str, Any] | None, *path: str) -> Any:
    cur: Any = doc
    for key in path:
        if not isinstance(cur, Mapping):
            return None
        cur = cur.get(key)
    return cur


def _show(value: Any, digits: int = 4) -> str:
    if value is None:
        return "-"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, float):
        return f"{value:.{digits}g}"
    return str(value)


def comparison_rows(previous: Mapping[str, Any], current: Mapping[str, Any]
                    ) -> list[dict[str, Any]]:
    """Headline quantities of two summaries side by side.

    Parameters
    ----------
    previous, current : mapping
        Two ``summary.json`` documents.

    Returns
    -------
    list of dict
        Each with ``what``, ``previous``, ``current`` (display strings),
        ``change`` (difference for numbers, ``changed`` for other values, or
        empty) and ``changed`` (bool).
    """
    items: list[tuple[str, tuple[str, ...]]] = [
        ("rows", ("data", "rows")), ("markets", ("data", "markets")),
        ("periods", ("data", "periods")), ("last period", ("data", "last_period")),
        ("data file hash", ("data", "sha256")),
        ("mean elasticity", ("demand", "elasticity", "mean")),
        ("median elasticity", ("demand", "elasticity", "median")),
    ]
    names = list((_get(current, "demand", "first_stage") or {}).keys())
    for n in (_get(previous, "demand", "first_stage") or {}):
        if n not in names:
            names.append(n)
    items += [(f"first-stage F, {n}", ("demand", "first_stage", n, "f")) for n in names]
    items += [
        ("theta", ("conduct", "theta")), ("theta SE", ("conduct", "se")),
        ("verdict", ("conduct", "verdict")),
    ]
    models = list((_get(current, "conduct", "tests") or {}).keys())
    for n in (_get(previous, "conduct", "tests") or {}):
        if n not in models:
            models.append(n)
    items += [(f"p-value, {n}", ("conduct", "tests", n, "p")) for n in models]
    items += [
        ("mean marginal cost", ("costs", "marginal_cost_mean")),
        ("mean Lerner index", ("costs", "lerner_mean")),
        ("negative-cost share", ("costs", "negative_cost_share")),
    ]
    rows = []
    for what, path in items:
        a, b = _get(previous, *path), _get(current, *path)
        if what == "data file hash":
            a, b = (a[:12] if isinstance(a, str) else a), (b[:12] if isinstance(b, str) else b)
        numeric = all(isinstance(v, int | float) and not isinstance(v, bool) for v in (a, b))
        if numeric:
            diff = b - a
            change = "" if diff == 0 else f"{diff:+.4g}"
            changed = diff != 0
        else:
            changed = a != b
            change = "changed" if changed else ""
        rows.append({"what": what, "previous": _show(a), "current": _show(b),
                     "change": change, "changed": changed, "key": what == "verdict"})
    ci_a, ci_b = _get(previous, "conduct", "ci"), _get(current, "conduct", "ci")
    if ci_a or ci_b:
        def fmt(ci: Any) -> str:
            return f"[{_show(ci[0])}, {_show(ci[1])}]" if ci else "-"
        rows.insert(next(i for i, r in enumerate(rows) if r["what"] == "verdict"),
                    {"what": "theta interval", "previous": fmt(ci_a), "current": fmt(ci_b),
                     "change": "" if ci_a == ci_b else "changed", "changed": ci_a != ci_b,
                     "key": False})
    return rows


# ----------------------------------------------------------------------------------------
# Page context
# ----------------------------------------------------------------------------------------


def _table_view(name: str, frame: pd.DataFrame) -> dict[str, Any]:
    spec = next((s for s in TABLES if s.name == name), None)
    if spec is not None and spec.columns:
        cols = [(c, h, k) for c, (h, k) in spec.columns.items() if c in frame.columns]
    else:
        cols = [(c, str(c), "num" if pd.api.types.is_numeric_dtype(frame[c]) else "text")
                for c in frame.columns]
    rows = [[(format_value(row[c], k) or "\N{EN DASH}", k != "text") for c, _, k in cols]
            for _, row in frame.iterrows()]
    return {
        "name": name,
        "title": spec.title if spec else name,
        "note": spec.note if spec else "",
        "headers": [(header_text(h), k != "text") for _, h, k in cols],
        "rows": rows,
        "csv": f"{name}.csv",
    }


def _png(name: str, build: Callable[[], Figure], figures: Mapping[str, bytes] | None,
         folder: Path | None) -> str:
    """A figure as a data URI: given bytes, else ``<folder>/figures/<name>.png``, else drawn."""
    data = (figures or {}).get(name)
    path = folder / "figures" / f"{name}.png" if folder is not None else None
    if data is None and path is not None and path.is_file():
        data = path.read_bytes()
    if data is None:
        data = figure_png(build())
    return "data:image/png;base64," + base64.b64encode(data).decode("ascii")


def _figure_views(res: Results, summary: Mapping[str, Any],
                  figures: Mapping[str, bytes] | None, folder: Path | None
                  ) -> list[dict[str, Any]]:
    out = []
    for spec in available_figures(res):
        out.append({
            "name": spec.name, "title": spec.title, "caption": spec.caption,
            "note": spec.note(res) if spec.note is not None else "",
            "src": _png(spec.name, lambda spec=spec: spec.build(res, summary), figures, folder),
            "section": _FIGURE_SECTION.get(spec.name, "conduct"),
        })
    return out


#: File stem of the comparison figure in a later run's ``figures/``.
COMPARISON_FIGURE = "comparison"


def comparison_applies(summary: Mapping[str, Any], previous: Mapping[str, Any] | None
                       ) -> bool:
    """Whether a run's report shows the figure comparing it with the previous run.

    It does when there is a previous run and either run estimated conduct (with demand
    only, the comparison table says all there is).
    """
    return previous is not None and bool(summary.get("conduct") or previous.get("conduct"))


def comparison_figure(res: Results, summary: Mapping[str, Any], previous: Mapping[str, Any],
                      previous_observations: pd.DataFrame | None = None) -> Figure:
    """The previous run against this one (see :func:`conduct.figures.run_comparison_figure`).

    Parameters
    ----------
    res : Results
        This run's results.
    summary : mapping
        This run's summary.
    previous : mapping
        The previous run's summary.
    previous_observations : pandas.DataFrame or None
        The previous run's ``observations.csv``; without it, only theta is compared.

    Returns
    -------
    matplotlib.figure.Figure
    """
    return run_comparison_figure(
        RunSnapshot.of(previous, previous_observations, "previous run"),
        RunSnapshot.of(summary, res.derived.observations, "this run"),
        period_column=res.study.panel.period)


def _comparison_views(res: Results, summary: Mapping[str, Any],
                      previous: Mapping[str, Any] | None,
                      previous_observations: pd.DataFrame | None,
                      figures: Mapping[str, bytes] | None, folder: Path | None
                      ) -> list[dict[str, Any]]:
    if previous is None or not comparison_applies(summary, previous):
        return []
    lerner = "" if previous_observations is not None else (
        " The previous run's observations were not available, so only theta is compared.")
    return [{
        "name": COMPARISON_FIGURE, "title": "This run against the previous run",
        "caption": "The previous run in blue (squares, dashed), this run in vermillion "
                   "(circles, solid). Left: the conduct parameter with its Wald interval; "
                   "dotted lines mark competitive (0) and collusive (1) conduct. Right: the "
                   "median Lerner index across markets in each period, both runs on one "
                   "calendar; where the lines part over the same periods, revised data or "
                   "the re-estimated demand and conduct moved the margins." + lerner,
        "note": "",
        "src": _png(COMPARISON_FIGURE, lambda: comparison_figure(
            res, summary, previous, previous_observations), figures, folder),
        "section": "comparison",
    }]


def _facts(pairs: Sequence[tuple[str, Any]]) -> list[tuple[str, str]]:
    return [(k, _show(v)) for k, v in pairs if v is not None and v != ""]


def _data_facts(res: Results, summary: Mapping[str, Any]) -> dict[str, Any]:
    d = summary.get("data") or {}
    p = res.study.panel
    markets = sorted({str(m) for m in res.panel.frame[MARKET].tolist()})
    dropped = d.get("dropped_rows") or 0
    by_col = d.get("dropped_by_column") or {}
    dropped_text = str(dropped)
    if dropped and by_col:
        dropped_text += " (" + ", ".join(f"{k}: {v}" for k, v in sorted(by_col.items())) + ")"
    facts = _facts([
        ("data file", d.get("file")),
        ("rows used", d.get("rows")),
        ("markets", d.get("markets")),
        ("periods", d.get("periods")),
        ("first and last period", f"{d.get('first_period')} to {d.get('last_period')}"),
        ("period type", res.panel.description.period_kind),
        ("balanced", d.get("balanced")),
        ("gaps inside markets", d.get("gaps")),
        ("rows dropped for missing values", dropped_text),
        ("data sha256", d.get("sha256")),
    ])
    columns = _facts([
        ("market", p.market), ("period", p.period), ("price", p.price),
        ("quantity", p.quantity), ("sellers", p.sellers), ("concentration", p.concentration),
    ])
    return {
        "facts": facts,
        "columns": columns,
        "markets": markets[:_MAX_MARKETS_LISTED],
        "markets_more": max(0, len(markets) - _MAX_MARKETS_LISTED),
    }


def _spec_facts(res: Results) -> dict[str, list[tuple[str, str]]]:
    dm = res.study.demand
    demand = _facts([
        ("form", dm.form), ("estimator", dm.estimator), ("errors", dm.errors),
        ("fixed effects", ", ".join(dm.effects) or "none"),
        ("shifters", ", ".join(dm.shifters) or "none"),
        ("rotators", ", ".join(dm.rotators) or "none"),
        ("instruments", ", ".join(res.demand.instruments)),
        ("covariance convention", res.demand.fit.convention),
    ])
    supply: list[tuple[str, str]] = []
    sp = res.study.supply
    if sp is not None and res.supply is not None:
        supply = _facts([
            ("cost shifters", ", ".join(sp.cost_shifters) or "none"),
            ("marginal cost", "may rise with output" if sp.cost_slope else "constant in output"),
            ("instruments", ", ".join(res.supply.instruments)),
            ("candidate models", ", ".join(c.name for c in res.study.candidates)),
        ])
    return {"demand": demand, "supply": supply}


def _conduct_facts(summary: Mapping[str, Any]) -> list[tuple[str, str]]:
    c = summary.get("conduct")
    if not c:
        return []
    level = c.get("level") or 0.95
    ci = c.get("ci") or [None, None]
    ar = c.get("ar_set")
    if isinstance(ar, Mapping):
        ar_text = ar.get("reading") or _intervals_text(ar.get("intervals") or [])
    elif ar:
        ar_text = _intervals_text(ar)
    else:
        ar_text = "not computed"
    boot = c.get("bootstrap")
    boot_facts: list[tuple[str, Any]] = []
    if isinstance(boot, Mapping):
        bci = boot.get("ci") or [None, None]
        boot_facts = [
            ("bootstrap standard error", boot.get("se")),
            (f"bootstrap {level:.0%} interval", _intervals_text([bci])),
            ("bootstrap replications (failed)",
             f"{boot.get('replications')} ({boot.get('failures', 0)})"),
            ("bootstrap method", boot.get("method")),
        ]
    return _facts([
        (f"{_THETA} (conduct parameter)", f"{c['theta']:.4f}" if c.get("theta") is not None
         else None),
        ("standard error (sequential)", c.get("se")),
        ("standard error (naive, for comparison)", c.get("se_naive")),
        ("standard-error method", c.get("se_method")),
        (f"{level:.0%} Wald interval", f"[{ci[0]:.4f}, {ci[1]:.4f}]" if None not in ci
         else None),
        (f"{level:.0%} Anderson-Rubin set", ar_text),
        *boot_facts,
        ("Cournot benchmark (Q*-weighted H)", c.get("cournot_benchmark")),
        ("models not rejected", ", ".join(c.get("not_rejected") or []) or "none"),
        ("identification", c.get("identification")),
        ("observations in the supply relation", c.get("observations")),
    ])


def _intervals_text(pieces: Sequence[Any]) -> str:
    if pieces and not isinstance(pieces[0], list | tuple):
        pieces = [pieces]
    if not pieces:
        return "empty"

    def end(v: Any, sign: str) -> str:
        return f"{sign}\N{INFINITY}" if v is None else f"{float(v):.4f}"

    return " \N{UNION} ".join(f"[{end(lo, '-')}, {end(hi, '')}]" for lo, hi in pieces)


def _provenance(summary: Mapping[str, Any]) -> dict[str, Any]:
    prov = summary.get("provenance") or {}
    run = summary.get("run") or {}
    command = prov.get("command")
    if isinstance(command, list | tuple):
        command = shlex.join(str(a) for a in command) if command else None
    facts = _facts([
        ("run id", run.get("id")),
        ("created (UTC)", prov.get("created_utc")),
        ("command", command),
        ("study file", prov.get("study_file")),
        ("study sha256", prov.get("study_sha256")),
        ("data sha256", prov.get("data_sha256") or _get(summary, "data", "sha256")),
        ("seed", prov.get("seed")),
    ])
    versions = sorted((str(k), str(v)) for k, v in (prov.get("versions") or {}).items())
    return {"facts": facts, "versions": versions, "recorded": bool(prov)}


def _extra_analyses(summary: Mapping[str, Any]) -> list[dict[str, Any]]:
    """Regimes, groups, the break test, rolling windows and Porter's regime shift, each as
    a title, a plain reading and a small table (header, rows of formatted cells)."""
    c = summary.get("conduct") or {}
    out: list[dict[str, Any]] = []

    def num(v: Any, spec: str = ".4f") -> str:
        return "-" if v is None else format(v, spec)

    for key, title in (("regimes", "Conduct by known regime"),
                       ("groups", "Conduct by group of markets")):
        split = c.get(key)
        if split:
            rows = [[g["label"], num(g["theta"]), num(g["se"]),
                     f"[{num(g['ci'][0])}, {num(g['ci'][1])}]", str(g["rows"]),
                     num(g["p_competitive"], ".4g"), num(g["p_holm"], ".4g"),
                     num(g["p_bh"], ".4g")] for g in split["thetas"]]
            out.append({"title": f"{title} ('{split['column']}')", "reading": split["reading"],
                        "header": ["value", "theta", "se", "interval", "rows",
                                   "p (theta = 0)", "Holm", "BH"], "rows": rows})
    brk = c.get("break")
    if brk:
        top = sorted(brk.get("path") or [], key=lambda d: -d["wald"])[:5]
        out.append({"title": "Break at an unknown date (sup-Wald)", "reading": brk["reading"],
                    "header": ["candidate date", "Wald"],
                    "rows": [[d["date"], num(d["wald"], ".2f")] for d in top]})
    roll = c.get("rolling")
    if roll:
        wins = roll["windows"]
        rows = [[w["start"], w["end"], num(w["theta"]), num(w["se"])]
                for w in wins[:: max(1, len(wins) // 12)]]
        out.append({"title": f"Rolling windows of {roll['window']} periods",
                    "reading": "Theta on consecutive windows of periods (every few windows "
                               "shown; all are in summary.json and the figure).",
                    "header": ["first period", "last period", "theta", "se"], "rows": rows})
    shift = c.get("regime_shift")
    if shift:
        out.append({"title": f"Conduct relative to regime '{shift['base']}' (Porter 1983)",
                    "reading": shift["reading"],
                    "header": ["regime", "price effect", "theta", "se"],
                    "rows": [[r["label"], num(r["price_effect"]), num(r["theta"]),
                              num(r["se"])] for r in shift["regimes"]]})
    return out


def render_report(res: Results, summary: Mapping[str, Any], *,
                  previous: Mapping[str, Any] | None = None,
                  previous_observations: pd.DataFrame | None = None,
                  figures: Mapping[str, bytes] | None = None,
                  folder: Path | None = None) -> str:
    """Render ``report.html`` as a string.

    Parameters
    ----------
    res : Results
    summary : mapping
        The run summary (as written to ``summary.json``; provenance optional).
    previous : mapping or None
        The previous run's summary, for the comparison section.
    previous_observations : pandas.DataFrame or None
        The previous run's ``observations.csv``, for the comparison figure's Lerner
        index by period.
    figures : mapping of str to bytes, or None
        PNG bytes by figure name; missing figures are read from
        ``<folder>/figures/<name>.png`` when present, else rendered here.
    folder : Path or None
        The run folder, to reuse figures already written.

    Returns
    -------
    str
    """
    tables = build_tables(res, summary)
    views = [_table_view(name, frame) for name, frame in tables.items()]
    for v in views:
        v["section"] = _TABLE_SECTION.get(v["name"], "conduct")
    dem = summary.get("demand") or {}
    context = {
        "mode": "page",
        "title": res.study.title,
        "sections": SECTIONS,
        "verdict": _verdict_context(summary.get("conduct"), summary.get("warnings") or [],
                                    summary.get("caution") or CAUTION),
        "data": _data_facts(res, summary),
        "spec": _spec_facts(res),
        "elasticity": _facts([
            ("mean elasticity", _get(dem, "elasticity", "mean")),
            ("median elasticity", _get(dem, "elasticity", "median")),
            ("share of rows with a non-negative slope", format_value(
                dem.get("wrong_slope_share"), "share")),
            ("fixed effects", dem.get("fixed_effects_method")),
            ("observations", dem.get("observations")),
        ]),
        "has_supply": res.supply is not None,
        "conduct": _conduct_facts(summary),
        "tables": views,
        "figures": [*_figure_views(res, summary, figures, folder),
                    *_comparison_views(res, summary, previous, previous_observations,
                                       figures, folder)],
        "menu": summary.get("menu"),
        "extra": _extra_analyses(summary),
        "previous": previous is not None,
        "previous_id": _get(previous, "run", "id") if previous else None,
        "comparison": comparison_rows(previous, summary) if previous else [],
        "provenance": _provenance(summary),
    }
    return _environment().get_template("report.html").render(**context)


def write_report(res: Results, summary: Mapping[str, Any], folder: Path,
                 previous: Mapping[str, Any] | None = None,
                 previous_observations: pd.DataFrame | None = None) -> Path:
    """Write ``<folder>/report.html``.

    Parameters
    ----------
    res : Results
    summary : mapping
        The run summary.
    folder : Path
        The run folder (must exist); figures already in ``figures/`` are reused.
    previous : mapping or None
        The previous run's summary, for the comparison section.
    previous_observations : pandas.DataFrame or None
        The previous run's ``observations.csv``, for the comparison figure.

    Returns
    -------
    Path
    """
    path = Path(folder) / "report.html"
    path.write_text(render_report(res, summary, previous=previous,
                                  previous_observations=previous_observations,
                                  folder=Path(folder)),
                    encoding="utf-8")
    return path


def write_outputs(res: Results, summary: Mapping[str, Any], folder: Path,
                  previous: Mapping[str, Any] | None = None,
                  previous_observations: pd.DataFrame | None = None) -> list[Path]:
    """Write figures, tables and the report into a run folder.

    Parameters
    ----------
    res : Results
    summary : mapping
        The run summary (with provenance when available).
    folder : Path
        The run folder (must exist).
    previous : mapping or None
        The previous run's summary.
    previous_observations : pandas.DataFrame or None
        The previous run's ``observations.csv``, for the comparison figure.

    Returns
    -------
    list of Path
        Every file written: ``figures/*.png`` (with ``figures/comparison.png`` when
        there is a previous run to compare with), the table CSV files, ``tables.tex``
        and ``report.html``.
    """
    folder = Path(folder)
    paths = save_figures(res, folder, summary=summary)
    if previous is not None and comparison_applies(summary, previous):
        path = folder / "figures" / f"{COMPARISON_FIGURE}.png"
        path.write_bytes(figure_png(comparison_figure(res, summary, previous,
                                                      previous_observations)))
        paths.append(path)
    paths += write_tables(res, summary, folder)
    paths.append(write_report(res, summary, folder, previous, previous_observations))
    return paths
