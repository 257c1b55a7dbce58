"""Figures of a run: one public function per figure, each returning a matplotlib Figure.

Every function takes :class:`~conduct.pipeline.Results` and builds a
:class:`matplotlib.figure.Figure` on its own Agg canvas, so nothing touches
pyplot's global state and the module works without a display.  Colours come
from the Okabe-Ito palette (distinguishable under the common forms of colour
blindness), layouts are constrained so labels never overlap, and axis labels
name the study's own price and quantity columns as units.

:data:`FIGURES` lists the figures in report order; :func:`save_figures` writes
them as ``figures/<name>.png``.  :func:`run_comparison_figure` sets two runs
side by side from their summaries and observations (the later run's report and
``conduct compare`` both draw it).
"""

from __future__ import annotations

import io
import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.lines import Line2D

from conduct.errors import ConductError
from conduct.panel import MARKET, PERIOD, TIME
from conduct.pipeline import Results
from conduct.tableio import parse_periods

__all__ = [
    "DPI",
    "FIGURES",
    "PALETTE",
    "FigureSpec",
    "FlaggedSplit",
    "LernerFlags",
    "RunSnapshot",
    "ar_intervals",
    "available_figures",
    "conduct_figure",
    "elasticity_figure",
    "figure_png",
    "first_stage_figure",
    "flags_text",
    "lerner_figure",
    "lerner_flags",
    "marginal_cost_figure",
    "residual_figure",
    "run_comparison_figure",
    "save_figures",
]

#: Okabe & Ito (2008) colour-blind-safe palette.
PALETTE: dict[str, str] = {
    "black": "#000000",
    "orange": "#E69F00",
    "sky": "#56B4E9",
    "green": "#009E73",
    "yellow": "#F0E442",
    "blue": "#0072B2",
    "vermillion": "#D55E00",
    "purple": "#CC79A7",
}
#: Colour of each conduct model (user candidates take the remaining colours in turn).
MODEL_COLOURS: dict[str, str] = {
    "estimated": PALETTE["black"],
    "competitive": PALETTE["sky"],
    "cournot": PALETTE["orange"],
    "collusive": PALETTE["vermillion"],
}
_SPARE = (PALETTE["green"], PALETTE["purple"], PALETTE["blue"], PALETTE["yellow"])
_GREY = "#7f7f7f"

#: Resolution of the written PNG files (7 x 4.2 in -> 1050 x 630 pixels).
DPI = 150
_SIZE = (7.0, 4.2)
_MAX_TICKS = 8


def _new_figure(size: tuple[float, float] = _SIZE) -> Figure:
    fig = Figure(figsize=size, layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def _need_supply(res: Results, what: str) -> None:
    if res.supply is None:
        raise ConductError(
            f"The {what} figure needs a supply relation; this study estimates demand only."
        )


def _model_colours(res: Results) -> dict[str, str]:
    colours = dict(MODEL_COLOURS)
    spare = iter(_SPARE * 4)
    for c in res.study.candidates:
        if c.name not in colours:
            colours[c.name] = next(spare)
    return colours


def _num(value: float, digits: int = 2) -> str:
    """Format a number with a typographic minus sign, like the axis tick labels."""
    text = "\N{INFINITY}" if math.isinf(value) else f"{abs(value):.{digits}f}"
    return ("\N{MINUS SIGN}" if value < 0 else "") + text


def _plain(text: str) -> str:
    """User text for a matplotlib label: '$' escaped so it is never read as mathtext."""
    return text.replace("$", r"\$")


def _label(name: str) -> str:
    return _plain({"cournot": "Cournot"}.get(name, name))


def _quantity_unit(res: Results) -> str:
    return _plain(res.study.panel.quantity)


def _price_unit(res: Results) -> str:
    return _plain(res.study.panel.price)


# ----------------------------------------------------------------------------------------
# Demand and instruments
# ----------------------------------------------------------------------------------------


def _residualise(y: np.ndarray, x: np.ndarray) -> np.ndarray:
    if x.shape[1] == 0:
        return y
    return y - x @ np.linalg.lstsq(x, y, rcond=None)[0]


def first_stage_figure(res: Results) -> Figure:
    """Observed price against its first-stage fit on the excluded instruments.

    Parameters
    ----------
    res : Results

    Returns
    -------
    matplotlib.figure.Figure

    Notes
    -----
    Both axes are after partialling out (Frisch-Waugh-Lovell): the fixed
    effects absorbed by the study and the included exogenous regressors are
    removed from price and from the instruments, then the partialled price is
    regressed on the partialled instruments.  Points along the 45-degree line
    mean the instruments move price strongly; a flat cloud means they are weak.
    """
    dem = res.demand
    cols = dem.prepared.columns
    price_term = dem.price_terms[0]
    n = len(cols[price_term])
    spec = res.study.demand
    exog = [np.ones(n)] if dem.prepared.constant else []
    exog += [cols[c] for c in (*spec.shifters, *spec.rotators)]
    x = np.column_stack(exog) if exog else np.zeros((n, 0))
    z = np.column_stack([cols[c] for c in dem.instruments])
    p_t = _residualise(cols[price_term], x)
    z_t = _residualise(z, x)
    fitted = z_t @ np.linalg.lstsq(z_t, p_t, rcond=None)[0]
    fs = dem.first_stage[0]

    fig = _new_figure((6.0, 5.0))
    ax = fig.add_subplot()
    ax.scatter(fitted, p_t, s=9, alpha=0.45, color=PALETTE["blue"], linewidths=0,
               label="market-period")
    lo, hi = float(fitted.min()), float(fitted.max())
    ax.plot([lo, hi], [lo, hi], color=PALETTE["vermillion"], lw=1.2, ls="--",
            label="45-degree line")
    unit = _price_unit(res)
    what = "log price" if dem.form == "log" else "price"
    ax.set_xlabel(f"{what} predicted by the excluded instruments ({unit}, partialled)")
    ax.set_ylabel(f"observed {what} ({unit}, partialled)")
    ax.set_title(f"First stage of {price_term}: F = {fs.f:.1f}, "
                 f"partial R\N{SUPERSCRIPT TWO} = {fs.partial_r2:.2f}", fontsize=10)
    ax.legend(loc="upper left", fontsize=8, frameon=False)
    ax.grid(alpha=0.3)
    return fig


def residual_figure(res: Results) -> Figure:
    """Demand residuals against fitted values, with a binned mean.

    Parameters
    ----------
    res : Results

    Returns
    -------
    matplotlib.figure.Figure

    Notes
    -----
    Values are those of the estimated equation, after the study's fixed
    effects were absorbed.  The binned mean (twenty equal-count bins of the
    fitted value) should stay near zero; a pattern suggests a misspecified
    functional form.
    """
    dem = res.demand
    y = dem.prepared.columns["_y"]
    resid = dem.fit.resid
    fitted = y - resid
    fig = _new_figure()
    ax = fig.add_subplot()
    ax.scatter(fitted, resid, s=9, alpha=0.45, color=PALETTE["blue"], linewidths=0,
               label="market-period")
    ax.axhline(0.0, color=_GREY, lw=1)
    bins = min(20, max(2, len(fitted) // 10))
    edges = np.unique(np.quantile(fitted, np.linspace(0, 1, bins + 1)))
    which = np.clip(np.searchsorted(edges, fitted, side="right") - 1, 0, len(edges) - 2)
    centres = [float(np.mean(fitted[which == b])) for b in range(len(edges) - 1)
               if np.any(which == b)]
    means = [float(np.mean(resid[which == b])) for b in range(len(edges) - 1)
             if np.any(which == b)]
    ax.plot(centres, means, color=PALETTE["vermillion"], lw=1.8, marker="o", ms=3,
            label="binned mean")
    q = _quantity_unit(res)
    unit = f"log {q}" if dem.form == "log" else q
    effects = " and ".join(res.study.demand.effects)
    note = f", {effects} effects removed" if effects else ""
    ax.set_xlabel(f"fitted demand ({unit}{note})")
    ax.set_ylabel(f"demand residual ({unit})")
    ax.set_title("Demand residuals against fitted values", fontsize=10)
    ax.legend(loc="upper right", fontsize=8, frameon=False)
    ax.grid(alpha=0.3)
    return fig


def elasticity_figure(res: Results) -> Figure:
    """Histogram of the price elasticity of demand across market-periods.

    Parameters
    ----------
    res : Results

    Returns
    -------
    matplotlib.figure.Figure
    """
    e = np.asarray(res.demand.elasticity, dtype=float)
    e = e[np.isfinite(e)]
    fig = _new_figure()
    ax = fig.add_subplot()
    edges = np.histogram_bin_edges(e, bins="auto")
    if len(edges) > 51:
        edges = np.histogram_bin_edges(e, bins=50)
    ax.hist(e, bins=edges, color=PALETTE["sky"], edgecolor="white", linewidth=0.4,
            label="market-periods")
    med = float(np.median(e))
    ax.axvline(med, color=PALETTE["black"], lw=1.6, label=f"median {_num(med)}")
    ax.axvline(float(np.mean(e)), color=PALETTE["blue"], lw=1.4, ls=":",
               label=f"mean {_num(float(np.mean(e)))}")
    if e.min() <= -1 <= e.max() or abs(med + 1) < 1:
        ax.axvline(-1.0, color=PALETTE["vermillion"], lw=1.2, ls="--", label="unit elastic (-1)")
    share = res.demand.wrong_sign_share
    if share > 0:
        ax.plot([], [], " ", label=f"slope not negative: {share:.1%}")
    q, p = _quantity_unit(res), _price_unit(res)
    ax.set_xlabel(f"price elasticity of demand (dQ/dP \N{MULTIPLICATION SIGN} P/Q; "
                  f"Q = {q}, P = {p})")
    ax.set_ylabel("market-periods")
    ax.set_title("Distribution of demand elasticities", fontsize=10)
    ax.legend(loc="upper left", fontsize=8, frameon=False)
    ax.grid(alpha=0.3, axis="y")
    return fig


# ----------------------------------------------------------------------------------------
# Conduct
# ----------------------------------------------------------------------------------------


def ar_intervals(ar_set: Any) -> tuple[list[tuple[float, float]], bool]:
    """Normalise an Anderson-Rubin set to a list of (lo, hi) intervals.

    Parameters
    ----------
    ar_set : ThetaSet, mapping, sequence or None
        A :class:`conduct.thetaset.ThetaSet`; the summary's ``conduct.ar_set``
        mapping (``intervals``, ``kind``); a single ``[lo, hi]``; or a list of
        them.  ``None`` as an end (JSON null) means unbounded on that side.

    Returns
    -------
    (list of (float, float), bool)
        The intervals (infinite ends for unbounded pieces) and whether a set
        was computed at all (an empty set gives ``([], True)``).
    """
    if ar_set is None:
        return [], False
    if isinstance(ar_set, Mapping):
        raw = ar_set.get("intervals") or []
    elif hasattr(ar_set, "intervals"):
        raw = list(ar_set.intervals)
    else:
        raw = list(ar_set)
        if raw and not isinstance(raw[0], list | tuple):
            raw = [raw]
    out = []
    for lo, hi in raw:
        out.append((-math.inf if lo is None else float(lo), math.inf if hi is None else float(hi)))
    return out, True


def conduct_figure(res: Results, *, ar_set: Any = None) -> Figure:
    """The conduct parameter with its confidence intervals against the benchmarks.

    Parameters
    ----------
    res : Results
    ar_set : ThetaSet, mapping, sequence or None
        Anderson-Rubin set to draw instead of ``res.theta_set`` (see
        :func:`ar_intervals` for the accepted forms).

    Returns
    -------
    matplotlib.figure.Figure

    Notes
    -----
    Rows: the Wald interval from the sequential standard error; the
    Anderson-Rubin set (robust to weak instruments) when computed; the
    cluster-bootstrap percentile interval when run.  Vertical lines mark the
    benchmarks: competitive (0), Cournot (the Q*-weighted mean Herfindahl
    index, when concentration or sellers are known), collusive (1), and any
    user candidate with a fixed theta.  Unbounded pieces run to the edge of
    the plot.
    """
    _need_supply(res, "conduct")
    s = res.supply
    assert s is not None
    theta_sym = "\N{GREEK SMALL LETTER THETA}"
    level = res.study.inference.level
    colours = _model_colours(res)
    pieces, has_ar = ar_intervals(ar_set if ar_set is not None else res.theta_set)
    boot = res.bootstrap
    rows: list[str] = [f"Wald {level:.0%} interval\n(sequential SE)"]
    if has_ar:
        rows.append(f"Anderson-Rubin\n{level:.0%} set")
    if boot is not None:
        rows.append(f"bootstrap {level:.0%}\n({boot.replications} draws)")
    fig = _new_figure((7.0, 2.9 + 0.45 * len(rows)))
    ax = fig.add_subplot()
    y_of = {name: len(rows) - 1 - i for i, name in enumerate(rows)}
    lo, hi = s.ci
    ax.errorbar([s.theta], [y_of[rows[0]]], xerr=[[s.theta - lo], [hi - s.theta]], fmt="o",
                color=PALETTE["black"], ecolor=PALETTE["black"], capsize=5, lw=2, ms=7,
                label=f"{theta_sym} = {s.theta:.3f}, Wald [{lo:.3f}, {hi:.3f}]")
    marks = [0.0, 1.0, s.theta, lo, hi]
    finite = [v for p in pieces for v in p if math.isfinite(v)]
    marks += finite
    bench: list[tuple[str, float, str]] = []
    for c in res.study.candidates:
        if c.theta is not None:
            bench.append((c.name, c.theta, "--"))
        elif s.cournot_benchmark is not None:
            bench.append((c.name, s.cournot_benchmark, "-."))
    marks += [v for _, v, _ in bench]
    if boot is not None:
        marks += [v for v in boot.ci if math.isfinite(v)]
    span = (min(marks), max(marks))
    pad = 0.08 * (span[1] - span[0] + 1e-9)
    left, right = span[0] - pad, span[1] + pad
    if has_ar:
        y = y_of[rows[1]]
        for a, b in pieces:
            ax.plot([max(a, left), min(b, right)], [y, y], color=PALETTE["blue"], lw=6,
                    solid_capstyle="butt")
            for end, edge, marker in ((a, left, "<"), (b, right, ">")):
                if not math.isfinite(end):
                    ax.plot([edge], [y], marker=marker, color=PALETTE["blue"], ms=9)
        if pieces:
            shown = ", ".join(f"[{_num(a, 3)}, {_num(b, 3)}]" for a, b in pieces)
            ax.plot([], [], color=PALETTE["blue"], lw=6, label=f"Anderson-Rubin {shown}")
        else:
            ax.text(0.5 * (left + right), y, "empty: no value of theta fits", ha="center",
                    va="center", fontsize=8, color=PALETTE["blue"])
    if boot is not None:
        b_lo, b_hi = boot.ci
        ax.plot([b_lo, b_hi], [y_of[rows[-1]]] * 2, color=PALETTE["green"], lw=2.5,
                marker="|", ms=12, label=f"bootstrap [{b_lo:.3f}, {b_hi:.3f}]")
    for name, value, ls in bench:
        what = "H, Q*-weighted" if name == "cournot" else theta_sym
        ax.axvline(value, color=colours.get(name, _GREY), ls=ls, lw=1.6,
                   label=f"{_label(name)} ({what} = {value:.3g})")
    ax.set_xlim(left, right)
    ax.set_ylim(-0.7, len(rows) - 0.3)
    ax.set_yticks(list(y_of.values()), list(y_of), fontsize=8)
    ax.set_xlabel(f"conduct parameter {theta_sym} (0 = competitive, "
                  "1 = joint profit maximisation)")
    ax.set_title("Estimated conduct and the benchmarks", fontsize=10)
    ax.grid(alpha=0.3, axis="x")
    handles, labels = ax.get_legend_handles_labels()
    # the estimate (an errorbar container, listed last by matplotlib) leads the legend
    order = sorted(range(len(labels)), key=lambda i: not labels[i].startswith(theta_sym))
    fig.legend([handles[i] for i in order], [labels[i] for i in order],
               loc="outside lower center", ncol=2, fontsize=8, frameon=False)
    return fig


# ----------------------------------------------------------------------------------------
# Costs and markups over time
# ----------------------------------------------------------------------------------------


def _period_axis(res: Results) -> tuple[np.ndarray, dict[int, str]]:
    """Time position of every observation and the label of each position."""
    t = res.panel.frame[TIME].to_numpy()
    labels = res.derived.observations["period"].astype(str).to_numpy()
    mapping: dict[int, str] = {}
    for ti, lab in zip(t.tolist(), labels.tolist(), strict=True):
        mapping.setdefault(int(ti), lab)
    return t.astype(int), mapping


def _set_period_ticks(ax: Any, mapping: Mapping[int, str], column: str, kind: str) -> None:
    pos = sorted(mapping)
    span = min(pos[-1] - pos[0] + 1, 4 * len(pos))
    step = max(1, math.ceil(span / _MAX_TICKS))
    season = {"quarter": 4, "month": 12}.get(kind, 1)
    if step > season // 2 and season > 1:
        step = season * math.ceil(step / season)  # whole years: every tick the same season
    ticks = [p for p in pos if (p - pos[0]) % step == 0]
    if len(ticks) < 2:  # a sparse calendar: space ticks by count instead
        ticks = pos[:: max(1, math.ceil(len(pos) / _MAX_TICKS))]
    labels = [mapping[p] for p in ticks]
    rotate = 30 if max((len(s) for s in labels), default=0) > 7 else 0
    ax.set_xticks(ticks, labels, rotation=rotate, ha="right" if rotate else "center")
    ax.set_xlabel(f"period ({column})")


def _by_period(values: np.ndarray, t: np.ndarray, how: Sequence[float]) -> pd.DataFrame:
    frame = pd.DataFrame({"t": t, "v": values}).dropna()
    grouped = frame.groupby("t")["v"]
    out = pd.DataFrame({q: grouped.quantile(q) for q in how}).sort_index()
    full = range(int(out.index.min()), int(out.index.max()) + 1)
    if len(full) > 4 * len(out):  # a sparse calendar: keep observed periods only
        return out
    # periods with no data become gaps in the lines instead of being bridged
    return out.reindex(full)


def marginal_cost_figure(res: Results) -> Figure:
    """Median implied marginal cost per period under each conduct model.

    Parameters
    ----------
    res : Results

    Returns
    -------
    matplotlib.figure.Figure

    Notes
    -----
    ``MC = P - theta * Q*`` at every market-period, with theta the estimate or
    the candidate's value (H per row for Cournot); lines are medians across
    markets.  Under competitive conduct marginal cost equals price.  The dashed
    grey line is the cost-shifter index ``c'W`` from the supply relation,
    shifted to the mean of the estimated marginal cost (its level is not
    identified once fixed effects are absorbed).
    """
    _need_supply(res, "marginal cost")
    s = res.supply
    assert s is not None
    obs = res.derived.observations
    t, mapping = _period_axis(res)
    colours = _model_colours(res)
    fig = _new_figure()
    ax = fig.add_subplot()
    names = ["estimated", *[c.name for c in res.study.candidates]]
    for name in names:
        col = f"marginal_cost_{name}"
        if col not in obs:
            continue
        med = _by_period(obs[col].to_numpy(dtype=float), t, [0.5])[0.5]
        if name == "estimated":
            label = f"estimated \N{GREEK SMALL LETTER THETA} = {s.theta:.3f}"
        elif name == "competitive":
            label = "competitive (MC = price)"
        else:
            label = _label(name)
        ax.plot(med.index, med.to_numpy(), color=colours.get(name, _GREY),
                lw=2.2 if name == "estimated" else 1.4,
                ls="-" if name in ("estimated", "competitive") else "--", label=label)
    shifters = res.study.supply.cost_shifters if res.study.supply else ()
    if shifters:
        f = res.panel.frame
        index = sum(s.fit.coef(w) * f[w].to_numpy(dtype=float) for w in shifters)
        mc = obs["marginal_cost_estimated"].to_numpy(dtype=float)
        ok = np.isfinite(mc)
        index = np.asarray(index) - np.mean(np.asarray(index)[ok]) + np.mean(mc[ok])
        med = _by_period(np.where(ok, index, np.nan), t, [0.5])[0.5]
        ax.plot(med.index, med.to_numpy(), color=_GREY, lw=1.2, ls=":",
                label="cost-shifter index c'W (level matched)")
    _set_period_ticks(ax, mapping, res.study.panel.period,
                      res.panel.description.period_kind)
    ax.set_ylabel(f"implied marginal cost ({_price_unit(res)})")
    ax.set_title("Implied marginal cost over time (median across markets)", fontsize=10)
    fig.legend(loc="outside lower center", ncol=3, fontsize=8, frameon=False)
    ax.grid(alpha=0.3)
    return fig


def rolling_figure(res: Results) -> Figure:
    """Rolling-window theta with its Wald band and the three benchmarks.

    Parameters
    ----------
    res : Results
        With ``res.rolling`` set (``[supply] rolling_window``).

    Returns
    -------
    matplotlib.figure.Figure
    """
    roll = res.rolling
    if roll is None or res.supply is None:
        raise ConductError("No rolling-window estimates in these results.")
    lo, hi = roll.ci()
    x = np.arange(len(roll.theta))
    fig = _new_figure()
    ax = fig.add_subplot()
    ax.fill_between(x, lo, hi, color=PALETTE["sky"], alpha=0.45, linewidth=0,
                    label=f"{roll.level:.0%} interval")
    ax.plot(x, roll.theta, color=PALETTE["black"], lw=2,
            label=f"\N{GREEK SMALL LETTER THETA}, {roll.window}-period windows")
    ax.axhline(0.0, color=PALETTE["blue"], lw=1, ls=":", label="competitive (0)")
    if res.supply.cournot_benchmark is not None:
        ax.axhline(res.supply.cournot_benchmark, color=PALETTE["orange"], lw=1, ls="--",
                   label=f"Cournot (H = {res.supply.cournot_benchmark:.2f})")
    ax.axhline(1.0, color=PALETTE["vermillion"], lw=1, ls="-.", label="collusive (1)")
    step = max(1, len(x) // 8)
    ax.set_xticks(x[::step], [_plain(e) for e in roll.ends[::step]], rotation=45, ha="right")
    ax.set_xlabel("last period of the window")
    ax.set_ylabel("conduct parameter \N{GREEK SMALL LETTER THETA}")
    ax.legend(loc="upper center", bbox_to_anchor=(0.5, -0.28), ncol=3, fontsize=8,
              frameon=False)
    return fig


@dataclass(frozen=True, slots=True)
class FlaggedSplit:
    """One group of markets or known regime flagged by :func:`lerner_flags`.

    Attributes
    ----------
    kind : str
        ``group`` or ``regime``.
    column : str
        The panel column that defines the split.
    label : str
        The flagged value of that column.
    theta : float
        Its conduct parameter.
    p_holm : float
        Holm-adjusted one-sided p-value of theta = 0 against theta > 0.
    average : float
        The yardstick it exceeds: the mean theta across its split, weighted by rows.
    markets : int
        Markets holding rows of this group or regime.
    """

    kind: str
    column: str
    label: str
    theta: float
    p_holm: float
    average: float
    markets: int


@dataclass(frozen=True, slots=True)
class LernerFlags:
    """What the Lerner figure marks, from the group, regime and break analyses.

    Attributes
    ----------
    level : float
        The study's confidence level; tests are read at ``1 - level``.
    own_theta : dict of str to numpy.ndarray
        ``group`` and/or ``regime`` (only those that flag something) -> (n,) array over
        the rows of ``res.panel.frame``: the theta of the flagged group or regime the row
        belongs to, NaN for rows not flagged by that split.
    splits : tuple of FlaggedSplit
        The flagged groups and regimes.
    regime_periods : tuple of int
        Time positions (``_t``) of the periods holding rows of a flagged regime.
    break_date : str or None
        First period after a break in conduct the sup-Wald test finds at the study's level.
    break_at : float or None
        Where to draw that break: halfway between the last period before it and its
        first period, in time positions.
    notes : tuple of str
        Analyses that ran and flagged nothing, or that none was asked for.
    """

    level: float
    own_theta: dict[str, np.ndarray]
    splits: tuple[FlaggedSplit, ...]
    regime_periods: tuple[int, ...]
    break_date: str | None
    break_at: float | None
    notes: tuple[str, ...]

    @property
    def anything(self) -> bool:
        """Whether any market-period or break is flagged."""
        return bool(self.splits) or self.break_date is not None


def lerner_flags(res: Results) -> LernerFlags:
    """The markets, regime periods and break date the Lerner figure marks.

    Parameters
    ----------
    res : Results
        With a supply relation.

    Returns
    -------
    LernerFlags

    Notes
    -----
    With ``alpha = 1 - level`` (the study's level), a group of markets
    (``[supply] groups``) or a known regime (``[supply] regimes``) is
    *flagged* when all three hold:

    1. the Wald test that conduct is equal across the split rejects (p < alpha),
       so conduct differs somewhere;
    2. its own theta is above zero after Holm's adjustment across the split
       (one-sided ``p_holm`` < alpha);
    3. its theta is above the mean theta across the split, weighted by the
       rows of each group or regime (a comparison of point estimates: the
       equality test carries the evidence of a difference, not a pairwise
       test).  The split's own mean is the yardstick rather than the pooled
       theta, which is not an average of the split's thetas when conduct
       differs (a misspecified pooled relation can lie below all of them).

    Flagged market-periods are the rows in a flagged group or regime; flagged
    markets are the markets holding such rows.  The break date is flagged when
    the sup-Wald test rejects a constant theta at alpha; it says that conduct
    changed for the panel as a whole at that date, not in particular markets.
    """
    _need_supply(res, "Lerner index")
    level = res.study.inference.level
    alpha = 1.0 - level
    f = res.panel.frame
    own: dict[str, np.ndarray] = {}
    splits: list[FlaggedSplit] = []
    notes: list[str] = []
    for split in (res.groups, res.regimes):
        if split is None:
            continue
        what = "groups" if split.kind == "group" else "regimes"
        if split.equality_p >= alpha:
            notes.append(f"equal conduct across {what} of '{split.column}' not rejected "
                         f"(p = {split.equality_p:.3g})")
            continue
        weights = np.array([g.rows for g in split.groups], dtype=float)
        average = float(np.average([g.theta for g in split.groups], weights=weights))
        hit = [g for g in split.groups if g.p_holm < alpha and g.theta > average]
        if not hit:
            notes.append(f"no {split.kind} of '{split.column}' above the mean "
                         f"\N{GREEK SMALL LETTER THETA} with Holm p < {alpha:.2g}")
            continue
        values = f[split.column].astype(str).str.strip().to_numpy()
        theta = np.full(len(f), np.nan)
        for g in hit:
            mask = values == g.label
            theta[mask] = g.theta
            splits.append(FlaggedSplit(kind=split.kind, column=split.column, label=g.label,
                                       theta=g.theta, p_holm=g.p_holm, average=average,
                                       markets=int(f.loc[mask, MARKET].nunique())))
        own[split.kind] = theta
    break_date = break_at = None
    if res.breaks is not None:
        b = res.breaks
        if b.p < alpha:
            times = np.unique(f[TIME].to_numpy())
            at = int(f.loc[f[PERIOD].astype(str) == b.date, TIME].iloc[0])
            before = times[times < at]
            break_date = b.date
            break_at = 0.5 * (at + before[-1]) if len(before) else at - 0.5
        else:
            notes.append(f"no break in conduct at the {level:.0%} level "
                         f"(sup-Wald p {_p(b.p)})")
    if res.groups is None and res.regimes is None and res.breaks is None:
        notes.append("no group, regime or break analysis in this study")
    in_regime = np.isfinite(own["regime"]) if "regime" in own else np.zeros(len(f), bool)
    return LernerFlags(
        level=level, own_theta=own, splits=tuple(splits),
        regime_periods=tuple(int(v) for v in np.unique(f.loc[in_regime, TIME].to_numpy())),
        break_date=break_date, break_at=break_at, notes=tuple(notes),
    )


def flags_text(res: Results) -> str:
    """One paragraph saying what the Lerner figure flags in these results, for the report.

    Parameters
    ----------
    res : Results

    Returns
    -------
    str
        Plain text (no markup); empty for a demand-only study.
    """
    if res.supply is None:
        return ""
    fl = lerner_flags(res)
    theta = "\N{GREEK SMALL LETTER THETA}"
    parts = []
    for sp in fl.splits:
        parts.append(f"{sp.kind} '{sp.label}' of '{sp.column}' ({sp.markets} market"
                     f"{'s' if sp.markets != 1 else ''}, {theta} = {sp.theta:.3f} against "
                     f"{sp.average:.3f} on average across the {sp.kind}s, Holm-adjusted "
                     f"p {_p(sp.p_holm)})")
    if fl.break_date is not None and res.breaks is not None:
        b = res.breaks
        parts.append(f"a break in conduct from {b.date} on (sup-Wald p {_p(b.p)}; "
                     f"{theta} {b.theta_before:.3f} before, {b.theta_after:.3f} after)")
    text = ("Flagged in this run: " + "; ".join(parts) + "." if parts
            else "Nothing is flagged in this run.")
    if fl.notes:
        rest = "; ".join(fl.notes)
        text += " " + rest[0].upper() + rest[1:] + "."
    return text


def _p(p: float) -> str:
    """A p-value after its verb: ``< 0.001`` or ``= 0.042``."""
    return "< 0.001" if p < 0.001 else f"= {p:.3f}"


def _short(text: str, limit: int = 18) -> str:
    return _plain(text if len(text) <= limit else text[: limit - 1] + "\N{HORIZONTAL ELLIPSIS}")


def _runs_of(positions: Sequence[int]) -> list[tuple[int, int]]:
    """Consecutive runs ``(first, last)`` of sorted integer positions."""
    out: list[tuple[int, int]] = []
    for p in positions:
        if out and p == out[-1][1] + 1:
            out[-1] = (out[-1][0], p)
        else:
            out.append((p, p))
    return out


#: Up to this many flagged markets, each is also drawn as a thin line.
_FEW_MARKETS = 4
#: Longest legend entry (characters at 8 pt) that still fits two legend columns in 7 in.
_LEGEND_COLUMN_CHARS = 52
_FLAG_COLOURS = {"group": PALETTE["vermillion"], "regime": PALETTE["purple"]}


def lerner_figure(res: Results) -> Figure:
    """Lerner index per period: median and interquartile band across markets, with the
    markets, regime periods and break date flagged by the time and space analyses.

    Parameters
    ----------
    res : Results

    Returns
    -------
    matplotlib.figure.Figure

    Notes
    -----
    Under the estimated theta, ``L = (P - MC) / P = theta / |elasticity|``.
    When the Cournot benchmark is available its median Lerner index
    (``H / |elasticity|``) is drawn for comparison.

    What is flagged is defined in :func:`lerner_flags`.  The median Lerner
    index of the flagged groups' markets, and that of the flagged regimes'
    market-periods, are drawn as their own lines under the flagged group's or
    regime's own theta (``L = theta_g Q* / P``: under the pooled theta a
    market that prices higher faces more elastic demand and would show a
    *lower* margin); each flagged market is also a thin line when there are at
    most four.  Periods of a flagged regime are shaded, and a significant break
    is a vertical line between the last period before it and its first period,
    with the median Lerner index under the break's two thetas.
    Analyses that flagged nothing, or their absence, are stated in the legend.
    """
    _need_supply(res, "Lerner index")
    s = res.supply
    assert s is not None
    obs = res.derived.observations
    t, mapping = _period_axis(res)
    flags = lerner_flags(res)
    lerner = obs["lerner_estimated"].to_numpy(dtype=float)
    fig = _new_figure()
    ax = fig.add_subplot()
    regimes = ", ".join(_short(sp.label) for sp in flags.splits if sp.kind == "regime")
    for i, (a, b) in enumerate(_runs_of(flags.regime_periods)):
        ax.axvspan(a - 0.5, b + 0.5, color=PALETTE["yellow"], alpha=0.3, linewidth=0,
                   label=f"periods of flagged regime {regimes}" if i == 0 else None)
    band = _by_period(lerner, t, [0.25, 0.5, 0.75])
    ax.fill_between(band.index, band[0.25].to_numpy(), band[0.75].to_numpy(),
                    color=PALETTE["sky"], alpha=0.45, linewidth=0,
                    label="interquartile range across markets")
    ax.plot(band.index, band[0.5].to_numpy(), color=PALETTE["black"], lw=2,
            label=f"median, estimated \N{GREEK SMALL LETTER THETA} = {s.theta:.3f}")
    if "lerner_cournot" in obs:
        med = _by_period(obs["lerner_cournot"].to_numpy(dtype=float), t, [0.5])[0.5]
        ax.plot(med.index, med.to_numpy(), color=PALETTE["orange"], lw=1.4, ls="--",
                label="median under Cournot (H / |elasticity|)")
    market = obs["market"].astype(str).to_numpy()
    per_price = obs["qstar"].to_numpy(dtype=float) / obs["price"].to_numpy(dtype=float)
    for kind, own in flags.own_theta.items():
        mask = np.isfinite(own)
        lerner_own = own * per_price  # L = theta Q* / P under the row's own theta
        colour = _FLAG_COLOURS[kind]
        flagged = sorted(set(market[mask].tolist()))
        if len(flagged) <= _FEW_MARKETS:
            for i, m in enumerate(flagged):
                mine = mask & (market == m)
                line = _by_period(lerner_own[mine], t[mine], [0.5])[0.5]
                ax.plot(line.index, line.to_numpy(), color=colour, lw=0.8, alpha=0.6,
                        label=f"each market of a flagged {kind}" if i == 0 else None)
        names = ", ".join(_short(sp.label) for sp in flags.splits if sp.kind == kind)
        med = _by_period(np.where(mask, lerner_own, np.nan), t, [0.5])[0.5]
        n = len(flagged)
        ax.plot(med.index, med.to_numpy(), color=colour, lw=2, zorder=4,  # above the break line
                ls="-." if kind == "group" else (0, (1, 1)),
                label=f"flagged {kind} {names} ({n} market{'s' if n != 1 else ''}), "
                      "own \N{GREEK SMALL LETTER THETA}")
    if flags.break_at is not None and res.breaks is not None:
        b = res.breaks
        ax.axvline(flags.break_at, color=PALETTE["blue"], lw=1.6, ls=(0, (5, 2)),
                   label=f"break in conduct from {_plain(b.date)} (sup-Wald p {_p(b.p)})")
        split = np.where(t > flags.break_at, b.theta_after, b.theta_before) * per_price
        med = _by_period(split, t, [0.5])[0.5]
        ax.plot(med.index, med.to_numpy(), color=PALETTE["blue"], lw=1.4,
                label=f"median under \N{GREEK SMALL LETTER THETA} {_num(b.theta_before)} "
                      f"before, {_num(b.theta_after)} from the break")
    for i, note in enumerate(flags.notes):
        lead = "nothing flagged: " if i == 0 and not flags.anything else ""
        ax.plot([], [], " ", label=lead + _plain(note))
    _set_period_ticks(ax, mapping, res.study.panel.period,
                      res.panel.description.period_kind)
    ax.set_ylabel("Lerner index (P \N{MINUS SIGN} MC) / P")
    ax.set_title("Price-cost margin over time", fontsize=10)
    labels = ax.get_legend_handles_labels()[1]
    ncol = 2 if max(len(x) for x in labels) <= _LEGEND_COLUMN_CHARS else 1
    fig.set_size_inches(_SIZE[0], _SIZE[1] + 0.17 * max(0, math.ceil(len(labels) / ncol) - 2))
    fig.legend(loc="outside lower center", ncol=ncol, fontsize=8, frameon=False)
    ax.grid(alpha=0.3)
    return fig


# ----------------------------------------------------------------------------------------
# Two runs side by side
# ----------------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class RunSnapshot:
    """What the comparison figure needs of one run.

    Attributes
    ----------
    run_id : str
    role : str
        How the figure names the run (``previous run``, ``this run``, ``earlier``).
    conduct : mapping or None
        The summary's ``conduct`` section (``theta``, ``ci``, ``level`` used); None for a
        demand-only run.
    lerner : pandas.Series or None
        Median Lerner index across markets under the estimated conduct, indexed by
        period label; None when the run has none.
    """

    run_id: str
    role: str
    conduct: Mapping[str, Any] | None
    lerner: pd.Series | None

    @classmethod
    def of(cls, summary: Mapping[str, Any], observations: pd.DataFrame | None,
           role: str) -> RunSnapshot:
        """Build from a run's summary and its observations.

        Parameters
        ----------
        summary : mapping
            The run's ``summary.json`` document.
        observations : pandas.DataFrame or None
            The run's ``observations.csv`` (columns ``period`` and ``lerner_estimated``
            used; others ignored).
        role : str
            How the figure names the run.

        Returns
        -------
        RunSnapshot
        """
        lerner = None
        if observations is not None and {"period", "lerner_estimated"} <= set(observations):
            values = pd.to_numeric(observations["lerner_estimated"], errors="coerce")
            lerner = values.groupby(observations["period"].astype(str)).median().dropna()
        run = summary.get("run") or {}
        return cls(run_id=str(run.get("id") or "unnamed"), role=role,
                   conduct=summary.get("conduct") or None, lerner=lerner)


def _calendar(labels: Sequence[str]) -> tuple[dict[str, int], str]:
    """Time position of each period label, parsed the way the panel parses periods."""
    try:
        _, pos, kind = parse_periods(pd.Series(list(labels), dtype=object), "period",
                                     Path("observations.csv"), np.arange(len(labels)) + 2)
    except ConductError:  # labels written by hand: keep their sorted order
        return {lab: i for i, lab in enumerate(sorted(labels))}, "integer"
    return {lab: int(p) for lab, p in zip(labels, pos, strict=True)}, kind


def run_comparison_figure(earlier: RunSnapshot, later: RunSnapshot, *,
                          period_column: str = "period") -> Figure:
    """Two runs side by side: theta with its interval, and the median Lerner index by period.

    Parameters
    ----------
    earlier, later : RunSnapshot
        The two runs, earlier first.
    period_column : str
        The study's period column, for the axis label.

    Returns
    -------
    matplotlib.figure.Figure

    Notes
    -----
    Left: each run's conduct parameter with its Wald interval at the run's
    level; dotted lines mark competitive (0) and collusive (1) conduct.  Right:
    each run's median Lerner index across markets per period on one calendar
    (labels parsed the way the panel parses periods), so new periods extend the
    later run to the right and revisions show where both runs cover the same
    period.  The earlier run is dashed blue with squares, the later solid
    vermillion with circles, so the two differ without colour too.
    """
    fig = _new_figure((9.0, 4.4))
    left, right = fig.subplots(1, 2, width_ratios=[1, 2])
    runs = (earlier, later)
    # (colour, line style, marker, width): the earlier run wide underneath, the later one
    # narrow on top, so both stay visible where they coincide
    styles = ((PALETTE["blue"], "--", "s", 2.8), (PALETTE["vermillion"], "-", "o", 1.4))
    theta_sym = "\N{GREEK SMALL LETTER THETA}"
    level = None
    for y, (run, (colour, _, marker, _)) in enumerate(zip(runs, styles, strict=True)):
        c = run.conduct or {}
        if c.get("theta") is None:
            left.text(0.5, y, "not estimated", transform=left.get_yaxis_transform(),
                      ha="center", va="center", fontsize=8, color=colour)
            continue
        ci = c.get("ci")
        if ci and None not in ci:  # a segment, not error bars: any ends are drawn as given
            left.plot([float(ci[0]), float(ci[1])], [y, y], color=colour, lw=2, marker="|",
                      ms=12)
        left.plot([float(c["theta"])], [y], color=colour, marker=marker, ms=7, ls="none")
        level = c.get("level") or level
    for bench in (0.0, 1.0):
        left.axvline(bench, color=_GREY, lw=1, ls=":")
    left.set_yticks([0, 1], [f"{r.role}\n{_plain(r.run_id)}" for r in runs], fontsize=7)
    left.set_ylim(-0.6, 1.6)
    interval = f"{level:.0%} Wald interval" if level else "Wald interval"
    left.set_xlabel(f"conduct parameter {theta_sym}, {interval}\n"
                    "(0 competitive, 1 collusive)")
    left.set_title("Conduct parameter", fontsize=10)
    left.grid(alpha=0.3, axis="x")
    series = [r.lerner for r in runs if r.lerner is not None and len(r.lerner)]
    if series:
        labels = list(dict.fromkeys(str(v) for s in series for v in s.index))
        pos, kind = _calendar(labels)
        for run, (colour, ls, marker, width) in zip(runs, styles, strict=True):
            if run.lerner is None or not len(run.lerner):
                continue
            t = np.array([pos[str(v)] for v in run.lerner.index])
            med = _by_period(run.lerner.to_numpy(dtype=float), t, [0.5])[0.5]
            right.plot(med.index, med.to_numpy(), color=colour, ls=ls, lw=width, marker=marker,
                       ms=3)
        _set_period_ticks(right, {p: lab for lab, p in pos.items()}, _plain(period_column),
                          kind)
    else:
        right.text(0.5, 0.5, "no Lerner index in either run (no supply relation)",
                   transform=right.transAxes, ha="center", va="center", fontsize=8)
        right.set_xlabel(f"period ({_plain(period_column)})")
    right.set_ylabel("median Lerner index (P \N{MINUS SIGN} MC) / P")
    right.set_title("Lerner index across markets, by period", fontsize=10)
    right.grid(alpha=0.3)
    handles = [Line2D([], [], color=c, ls=ls, marker=m, lw=w) for c, ls, m, w in styles]
    fig.legend(handles, [f"{r.role}: {_plain(r.run_id)}" for r in runs],
               loc="outside lower center", ncol=2, fontsize=8, frameon=False)
    return fig


# ----------------------------------------------------------------------------------------
# Registry and files
# ----------------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class FigureSpec:
    """One figure of the run folder and report.

    Attributes
    ----------
    name : str
        File stem (``figures/<name>.png``) and report anchor.
    title : str
        Caption title.
    caption : str
        What the figure shows and how to read it.
    build : callable
        ``build(results, summary) -> Figure``.
    needs_supply : bool
        Skipped for demand-only studies.
    when : callable or None
        Further condition for the figure to apply (e.g. a rolling window was asked for).
    note : callable or None
        ``note(results) -> str``: what this run's figure shows, said in words under the
        caption (e.g. which markets are flagged).
    """

    name: str
    title: str
    caption: str
    build: Callable[[Results, Mapping[str, Any] | None], Figure]
    needs_supply: bool
    when: Callable[[Results], bool] | None = None
    note: Callable[[Results], str] | None = None


#: The figures in report order.
FIGURES: tuple[FigureSpec, ...] = (
    FigureSpec("first_stage", "First stage of price",
               "Price against its prediction from the excluded instruments, both after "
               "removing fixed effects and the included exogenous regressors. A cloud along "
               "the 45-degree line means strong instruments; a flat cloud means weak ones.",
               lambda r, s: first_stage_figure(r), False),
    FigureSpec("demand_residuals", "Demand residuals",
               "Residuals of the demand equation against its fitted values, with the mean "
               "residual in twenty bins. A binned mean away from zero points to a "
               "misspecified functional form.",
               lambda r, s: residual_figure(r), False),
    FigureSpec("elasticities", "Demand elasticities",
               "Distribution of the price elasticity of demand across market-periods.",
               lambda r, s: elasticity_figure(r), False),
    FigureSpec("conduct", "Conduct parameter",
               "Estimated conduct parameter with its confidence interval (and the "
               "Anderson-Rubin set when computed) against the competitive, Cournot and "
               "collusive benchmarks.",
               lambda r, s: conduct_figure(r), True),
    FigureSpec("marginal_cost", "Implied marginal cost",
               "Median implied marginal cost across markets in each period, under the "
               "estimated conduct and under each candidate model.",
               lambda r, s: marginal_cost_figure(r), True),
    FigureSpec("lerner", "Lerner index",
               "Median Lerner index across markets in each period under the estimated "
               "conduct, with the interquartile band. A group of markets or a known regime "
               "is flagged when equal conduct across its split is rejected at the study's "
               "level, its theta is above zero after Holm's adjustment and above the "
               "split's mean theta (weighted by rows). A flagged group's markets "
               "(dash-dot) and a flagged regime's market-periods (dotted) have their median "
               "Lerner index drawn under their own theta, each market also as a thin line "
               "when there are at most four; "
               "the periods of a flagged regime are shaded. A vertical line marks a break "
               "in conduct the sup-Wald test finds at the study's level, with the median "
               "Lerner index under the thetas before and after it. The legend says when "
               "an analysis flagged nothing.",
               lambda r, s: lerner_figure(r), True, note=flags_text),
    FigureSpec("rolling", "Rolling-window conduct",
               "Conduct parameter estimated on rolling windows of periods (demand from the "
               "whole panel), with its confidence band, against the competitive, Cournot and "
               "collusive benchmarks; each point is placed at the window's last period.",
               lambda r, s: rolling_figure(r), True, lambda r: r.rolling is not None),
)


def available_figures(res: Results) -> tuple[FigureSpec, ...]:
    """The figures that apply to ``res`` (supply figures only when supply was estimated)."""
    return tuple(f for f in FIGURES if (res.supply is not None or not f.needs_supply)
                 and (f.when is None or f.when(res)))


def figure_png(fig: Figure, *, dpi: int = DPI) -> bytes:
    """Render a figure to PNG bytes (no timestamp or software metadata)."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi, metadata={"Software": None})
    return buf.getvalue()


def save_figures(res: Results, folder: Path, *, summary: Mapping[str, Any] | None = None,
                 dpi: int = DPI) -> list[Path]:
    """Write every applicable figure as ``<folder>/figures/<name>.png``.

    Parameters
    ----------
    res : Results
    folder : Path
        The run folder; ``figures/`` is created inside it.
    summary : mapping or None
        The run summary, for builders that need results kept only there (none yet).
    dpi : int
        Resolution of the PNG files.

    Returns
    -------
    list of Path
        The files written, in report order.
    """
    out = Path(folder) / "figures"
    out.mkdir(parents=True, exist_ok=True)
    paths = []
    for spec in available_figures(res):
        path = out / f"{spec.name}.png"
        path.write_bytes(figure_png(spec.build(res, summary), dpi=dpi))
        paths.append(path)
    return paths
