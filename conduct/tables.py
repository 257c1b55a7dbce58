"""Tables of a run: pandas DataFrames, written as CSV files and as one booktabs ``tables.tex``.

Each table is a :class:`TableSpec` in :data:`TABLES`: a name (the CSV stem and
the LaTeX label), a caption, a builder ``(results, summary) -> DataFrame or
None`` and how each column is printed in LaTeX.  A builder returns None when
the run has nothing for that table (no supply relation, no menu test), and the
table is then left out of both outputs.  Adding a table is adding one entry.

CSV files hold full precision (``%.10g``) and no index; ``tables.tex`` holds
rounded numbers, escaped names and no timestamp, so reruns diff cleanly.
"""

from __future__ import annotations

import csv
import math
import os
import re
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Literal

import numpy as np
import pandas as pd

from conduct.pipeline import Results

__all__ = [
    "TABLES",
    "TableSpec",
    "Tex",
    "build_tables",
    "conduct_tests_table",
    "costs_table",
    "demand_table",
    "first_stage_table",
    "format_value",
    "header_text",
    "latex_escape",
    "menu_table",
    "overid_table",
    "spreadsheet_safe",
    "supply_table",
    "tables_tex",
    "to_booktabs",
    "write_csv",
    "write_tables",
]

#: How a column is printed in LaTeX and HTML.
Kind = Literal["text", "num", "p", "int", "bool", "share"]


class Tex(str):
    """A column header already written in LaTeX, printed without escaping.

    Its plain-text form for HTML is given by :attr:`plain`.
    """

    __slots__ = ("plain",)

    def __new__(cls, latex: str, plain: str) -> Tex:
        obj = super().__new__(cls, latex)
        obj.plain = plain
        return obj


def header_text(header: str) -> str:
    """The plain-text form of a column header (for HTML)."""
    return header.plain if isinstance(header, Tex) else str(header)

#: Rule of thumb for a weak first stage (Staiger & Stock 1997).
WEAK_F = 10.0


# ----------------------------------------------------------------------------------------
# Builders
# ----------------------------------------------------------------------------------------


def demand_table(res: Results, summary: Mapping[str, Any] | None = None) -> pd.DataFrame:
    """Demand coefficients: term, estimate, se, z, p.

    Parameters
    ----------
    res : Results
    summary : mapping or None
        Unused; every builder takes it.

    Returns
    -------
    pandas.DataFrame
    """
    return res.demand.coefficients().reset_index()


def supply_table(res: Results, summary: Mapping[str, Any] | None = None) -> pd.DataFrame | None:
    """Supply-relation coefficients with sequential and naive standard errors.

    Returns
    -------
    pandas.DataFrame or None
        Columns term, estimate, se (sequential: accounts for the estimated
        demand), z, p, se_naive (treats Q* as data); None without supply.
    """
    if res.supply is None:
        return None
    return res.supply.coefficients().reset_index()


def first_stage_table(res: Results,
                      summary: Mapping[str, Any] | None = None) -> pd.DataFrame:
    """First-stage and weak-instrument diagnostics of both IV stages.

    Returns
    -------
    pandas.DataFrame
        One row per stage and endogenous regressor: stage, endogenous, f,
        df_num, df_den, p, partial_r2, weak (F below 10), convention.
    """
    rows = []
    stages = [("demand", res.demand.first_stage)]
    if res.supply is not None:
        stages.append(("supply", res.supply.first_stage))
    for stage, table in stages:
        for fs in table:
            rows.append({
                "stage": stage, "endogenous": fs.name, "f": fs.f, "df_num": fs.df[0],
                "df_den": fs.df[1], "p": fs.p, "partial_r2": fs.partial_r2,
                "weak": bool(fs.f < WEAK_F), "convention": fs.convention,
            })
    return pd.DataFrame(rows, columns=["stage", "endogenous", "f", "df_num", "df_den", "p",
                                       "partial_r2", "weak", "convention"])


def overid_table(res: Results, summary: Mapping[str, Any] | None = None) -> pd.DataFrame | None:
    """Hansen's J test of the overidentifying restrictions, per stage.

    Returns
    -------
    pandas.DataFrame or None
        Columns stage, j, df, p; None when no stage is overidentified.
    """
    fits = [("demand", res.demand.fit)]
    if res.supply is not None:
        fits.append(("supply", res.supply.fit))
    rows = [{"stage": stage, "j": fit.j_stat, "df": fit.j_df, "p": fit.j_p}
            for stage, fit in fits if fit.j_stat is not None]
    return pd.DataFrame(rows, columns=["stage", "j", "df", "p"]) if rows else None


def conduct_tests_table(res: Results,
                        summary: Mapping[str, Any] | None = None) -> pd.DataFrame | None:
    """Wald test of each candidate model of conduct.

    Returns
    -------
    pandas.DataFrame or None
        Columns model, theta (NaN for Cournot, whose theta is H per row),
        delta, se, wald, p, rejected, null; None without supply.
    """
    if res.supply is None:
        return None
    return pd.DataFrame([
        {"model": t.name, "theta": np.nan if t.theta is None else t.theta, "delta": t.delta,
         "se": t.se, "wald": t.stat, "p": t.p, "rejected": t.rejected, "null": t.null}
        for t in res.supply.tests
    ], columns=["model", "theta", "delta", "se", "wald", "p", "rejected", "null"])


def costs_table(res: Results, summary: Mapping[str, Any] | None = None) -> pd.DataFrame | None:
    """Implied marginal cost and Lerner index under the estimated theta and each candidate.

    Returns
    -------
    pandas.DataFrame or None
        Columns model, theta_mean (the candidate's theta, or the mean H for
        Cournot), marginal_cost_mean, marginal_cost_median, lerner_mean,
        lerner_median, negative_cost_share, rows; over rows with a negative
        demand slope.  None without supply.
    """
    if res.supply is None:
        return None
    obs = res.derived.observations
    ok = np.isfinite(obs["qstar"].to_numpy(dtype=float))
    names = ["estimated", *[c.name for c in res.study.candidates]]
    rows = []
    for name in names:
        if f"marginal_cost_{name}" not in obs:
            continue
        mc = obs[f"marginal_cost_{name}"].to_numpy(dtype=float)[ok]
        ler = obs[f"lerner_{name}"].to_numpy(dtype=float)[ok]
        th = obs[f"theta_{name}"].to_numpy(dtype=float)[ok]
        rows.append({
            "model": name, "theta_mean": float(np.mean(th)),
            "marginal_cost_mean": float(np.mean(mc)), "marginal_cost_median": float(np.median(mc)),
            "lerner_mean": float(np.mean(ler)), "lerner_median": float(np.median(ler)),
            "negative_cost_share": float(np.mean(mc < 0)), "rows": int(ok.sum()),
        })
    return pd.DataFrame(rows, columns=["model", "theta_mean", "marginal_cost_mean",
                                       "marginal_cost_median", "lerner_mean", "lerner_median",
                                       "negative_cost_share", "rows"])


def menu_table(res: Results, summary: Mapping[str, Any] | None = None) -> pd.DataFrame | None:
    """Pairwise model-comparison (menu) tests from ``summary['menu']``.

    Returns
    -------
    pandas.DataFrame or None
        Columns a, b, t_rv, p, f, weak (instruments weak for testing), better
        (the model favoured) and best (both models of the pair among the models
        not beaten); None while the menu test is not run.
    """
    menu = (summary or {}).get("menu")
    if not menu:
        return None
    best = set(menu.get("best") or [])
    rows = [{"a": p["a"], "b": p["b"], "t_rv": p.get("t_rv"), "p": p.get("p"),
             "f": p.get("f"), "weak": p.get("weak"), "better": p.get("better"),
             "best": p["a"] in best and p["b"] in best}
            for p in menu.get("pairs") or []]
    return pd.DataFrame(rows, columns=["a", "b", "t_rv", "p", "f", "weak", "better", "best"])


# ----------------------------------------------------------------------------------------
# Registry
# ----------------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class TableSpec:
    """One table of the run folder.

    Attributes
    ----------
    name : str
        CSV file stem and LaTeX label (``tab:<name>``).
    title : str
        Caption.
    build : callable
        ``build(results, summary) -> DataFrame or None``.
    columns : dict of str to (header, kind)
        Columns shown in LaTeX, in order, with their header and print kind;
        columns not listed are left out of LaTeX (they stay in the CSV).
    note : str
        Footnote printed under the LaTeX table.
    """

    name: str
    title: str
    build: Callable[[Results, Mapping[str, Any] | None], pd.DataFrame | None]
    columns: dict[str, tuple[str, Kind]] = field(default_factory=dict)
    note: str = ""


_THETA = Tex(r"$\theta$", "\N{GREEK SMALL LETTER THETA}")
_COEF = {"term": ("Term", "text"), "estimate": ("Estimate", "num"), "se": ("SE", "num"),
         "z": ("z", "num"), "p": ("p", "p")}

#: Every table, in the order of ``tables.tex`` and the report.
TABLES: tuple[TableSpec, ...] = (
    TableSpec("demand_coefficients", "Demand coefficients", demand_table, _COEF,
              "IV estimates; standard errors in the covariance choice of the study."),
    TableSpec("supply_coefficients", "Supply relation", supply_table,
              {**_COEF, "se_naive": ("Naive SE", "num")},
              "SE: sequential (two-step GMM) standard errors that account for the estimated "
              "demand slope in Q* = Q/|dQ/dP|; naive SE treats Q* as data and is shown only "
              "for comparison."),
    TableSpec("first_stage", "First-stage and weak-instrument diagnostics",
              first_stage_table,
              {"stage": ("Stage", "text"), "endogenous": ("Endogenous", "text"),
               "f": ("F", "num"), "df_num": ("df1", "int"), "df_den": ("df2", "int"),
               "p": ("p", "p"), "partial_r2": ("Partial R2", "num"),
               "weak": ("F < 10", "bool")},
              "F on the excluded instruments per endogenous regressor (Wald/k under robust, "
              "cluster or HAC errors); F < 10 is the Staiger-Stock rule of thumb for weak "
              "instruments."),
    TableSpec("overidentification", "Overidentification tests", overid_table,
              {"stage": ("Stage", "text"), "j": ("Hansen J", "num"), "df": ("df", "int"),
               "p": ("p", "p")},
              "Hansen's J from two-step efficient GMM with the same covariance choice."),
    TableSpec("conduct_tests", "Tests of conduct models", conduct_tests_table,
              {"model": ("Model", "text"), "theta": (_THETA, "num"),
               "delta": ("Deviation", "num"), "se": ("SE", "num"), "wald": ("Wald", "num"),
               "p": ("p", "p"), "rejected": ("Rejected", "bool")},
              "Each model is tested as a restriction: Q* should not enter the supply relation "
              "once the model's markup is subtracted (Wald, chi-square with 1 df, sequential "
              "standard errors). Cournot uses theta = H per observation."),
    TableSpec("costs_markups", "Implied marginal cost and markups by conduct model",
              costs_table,
              {"model": ("Model", "text"),
               "theta_mean": (Tex(r"Mean $\theta$", "Mean \N{GREEK SMALL LETTER THETA}"), "num"),
               "marginal_cost_mean": ("Mean MC", "num"),
               "marginal_cost_median": ("Median MC", "num"),
               "lerner_mean": ("Mean Lerner", "num"), "lerner_median": ("Median Lerner", "num"),
               "negative_cost_share": ("MC < 0", "share")},
              "MC = P - theta Q*; Lerner = (P - MC)/P. Over observations with a negative "
              "estimated demand slope. A large share of negative implied costs speaks against "
              "a model."),
    TableSpec("menu_tests", "Pairwise model comparison", menu_table,
              {"a": ("Model A", "text"), "b": ("Model B", "text"), "t_rv": ("T (RV)", "num"),
               "p": ("p", "p"), "f": ("F", "num"), "best": ("Both not beaten", "bool")},
              "Rivers-Vuong test of each pair of models with the F-statistic diagnosing weak "
              "instruments for testing."),
)


def build_tables(res: Results, summary: Mapping[str, Any] | None = None
                 ) -> dict[str, pd.DataFrame]:
    """Every table that applies to the run, by name, in :data:`TABLES` order.

    Parameters
    ----------
    res : Results
    summary : mapping or None
        The run summary (for results kept only there, such as the menu test).

    Returns
    -------
    dict of str to pandas.DataFrame
    """
    out = {}
    for spec in TABLES:
        frame = spec.build(res, summary)
        if frame is not None:
            out[spec.name] = frame
    return out


# ----------------------------------------------------------------------------------------
# CSV
# ----------------------------------------------------------------------------------------


_FORMULA_START = "=+-@\t\r"  # first characters a spreadsheet reads as a formula


def spreadsheet_safe(frame: pd.DataFrame) -> pd.DataFrame:
    """Prefix text cells that a spreadsheet would run as formulas with an apostrophe."""
    out = frame.copy()
    for col in out.columns:
        s = out[col]
        # distinct values checked once (labels repeat across a large panel's rows)
        if (s.dtype == object or pd.api.types.is_string_dtype(s)) and any(
                isinstance(v, str) and v[:1] in _FORMULA_START and v
                for v in pd.unique(s.to_numpy(dtype=object)).tolist()):
            out[col] = s.map(lambda v: "'" + v if isinstance(v, str)
                             and v[:1] in _FORMULA_START and v else v)
    return out


def write_csv(frame: pd.DataFrame, path: Path, float_format: str = "%.10g") -> None:
    """``frame.to_csv(path, index=False, float_format=float_format)``, byte for byte, faster.

    pandas formats every float cell through several Python calls; for the
    per-observation table of a large panel (millions of cells) this formats
    each column with one comprehension and writes the rows with the :mod:`csv`
    module, which pandas itself writes through (minimal quoting, ``os.linesep``
    line ends).  Columns other than float, integer, boolean and text fall back
    to pandas.  Tests keep it equal to ``to_csv``.

    Parameters
    ----------
    frame : pandas.DataFrame
    path : Path
    float_format : str
        ``%``-format of float cells; missing floats are written as empty cells.
    """
    cols: list[list[str]] = []
    for name in frame.columns:
        s = frame[name]
        kind = s.dtype.kind if isinstance(s.dtype, np.dtype) else ""
        if kind == "f":
            cols.append(["" if x != x else float_format % x
                         for x in s.to_numpy(dtype=float).tolist()])
        elif kind in "iub" and kind:
            cols.append([str(x) for x in s.to_numpy().tolist()])
        elif pd.api.types.is_string_dtype(s.dtype) and not s.isna().any():
            cols.append([str(x) for x in s.to_numpy(dtype=object).tolist()])
        else:
            frame.to_csv(path, index=False, float_format=float_format)
            return
    with open(path, "w", newline="", encoding="utf-8") as fh:
        out = csv.writer(fh, lineterminator=os.linesep)
        out.writerow([str(c) for c in frame.columns])
        out.writerows(zip(*cols, strict=True))


def write_tables(res: Results, summary: Mapping[str, Any] | None, folder: Path) -> list[Path]:
    """Write each table as ``<name>.csv`` and all of them as ``tables.tex``.

    Parameters
    ----------
    res : Results
    summary : mapping or None
        The run summary.
    folder : Path
        The run folder (must exist).

    Returns
    -------
    list of Path
        The CSV files in :data:`TABLES` order, then ``tables.tex``.
    """
    folder = Path(folder)
    tables = build_tables(res, summary)
    paths = []
    for name, frame in tables.items():
        path = folder / f"{name}.csv"
        spreadsheet_safe(frame).to_csv(path, index=False, float_format="%.10g",
                                       lineterminator="\n")
        paths.append(path)
    tex = folder / "tables.tex"
    tex.write_text(tables_tex(tables, title=res.study.title, summary=summary), encoding="utf-8")
    paths.append(tex)
    return paths


# ----------------------------------------------------------------------------------------
# LaTeX
# ----------------------------------------------------------------------------------------

_LATEX_SPECIAL = {
    "\\": r"\textbackslash{}", "&": r"\&", "%": r"\%", "$": r"\$", "#": r"\#", "_": r"\_",
    "{": r"\{", "}": r"\}", "~": r"\textasciitilde{}", "^": r"\textasciicircum{}",
    "<": r"\textless{}", ">": r"\textgreater{}",
}


def latex_escape(text: str) -> str:
    """Escape LaTeX special characters so ``text`` prints literally in text mode.

    Line breaks become spaces (a table cell or caption is one line).
    """
    text = " ".join(str(text).split())
    return "".join(_LATEX_SPECIAL.get(ch, ch) for ch in text)


def format_value(value: Any, kind: Kind) -> str:
    """Format one table cell as plain text (shared by the LaTeX and HTML tables).

    Parameters
    ----------
    value : object
        The cell; None and non-finite floats give an empty string.
    kind : {"text", "num", "p", "int", "bool", "share"}
        ``num`` rounds to about four significant digits (scientific notation
        outside 1e-4 to 1e6), ``p`` prints ``<0.001`` below 0.001, ``share``
        prints a percentage.

    Returns
    -------
    str
    """
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return ""
    if kind == "text":
        return str(value)
    if kind == "bool":
        return "yes" if bool(value) else "no"
    if kind == "int":
        return str(int(value))
    v = float(value)
    if not math.isfinite(v):
        return ""
    if kind == "p":
        return "<0.001" if v < 0.001 else f"{v:.3f}"
    if kind == "share":
        return f"{100 * v:.1f}%"
    a = abs(v)
    if a == 0:
        return "0"
    if a >= 1e6 or a < 1e-4:
        return f"{v:.3e}"
    if a >= 100:
        return f"{v:,.1f}"
    return f"{v:.3f}" if a >= 1 else f"{v:.4f}"


_SCI = re.compile(r"^(-?)(\d\.\d+)e([+-]\d+)$")


def _cell(value: Any, kind: Kind) -> str:
    text = format_value(value, kind)
    if text == "":
        return "--"
    if kind == "text":
        return latex_escape(text)
    m = _SCI.match(text)
    if m:
        return f"${m.group(1)}{m.group(2)}\\times 10^{{{int(m.group(3))}}}$"
    text = text.replace(",", "{,}").replace("%", "\\%").replace("<", "$<$")
    return "$-$" + text[1:] if text.startswith("-") else text


def _header(header: str) -> str:
    return str(header) if isinstance(header, Tex) else latex_escape(header)


def to_booktabs(frame: pd.DataFrame, *, caption: str, label: str,
                columns: Mapping[str, tuple[str, Kind]] | None = None, note: str = "") -> str:
    """One booktabs ``table`` environment for a DataFrame.

    Parameters
    ----------
    frame : pandas.DataFrame
    caption : str
        Plain text (escaped here).
    label : str
        LaTeX label (``tab:`` is prefixed); only letters, digits, ``_`` and ``-``.
    columns : mapping or None
        Column -> (header, kind) for the columns to show, in order; None shows
        every column, numbers as ``num`` and the rest as ``text``.
    note : str
        Plain-text footnote under the table (escaped here).

    Returns
    -------
    str
    """
    if columns is None:
        columns = {c: (str(c), "num" if pd.api.types.is_numeric_dtype(frame[c])
                       and not pd.api.types.is_bool_dtype(frame[c]) else "text")
                   for c in frame.columns}
    shown = [(c, h, k) for c, (h, k) in columns.items() if c in frame.columns]
    align = "".join("l" if k == "text" else "r" for _, _, k in shown)
    lines = [
        r"\begin{table}[htbp]",
        r"  \centering",
        f"  \\caption{{{latex_escape(caption)}}}",
        f"  \\label{{tab:{label}}}",
        f"  \\begin{{tabular}}{{{align}}}",
        r"    \toprule",
        "    " + " & ".join(_header(h) for _, h, _ in shown) + r" \\",
        r"    \midrule",
    ]
    for _, row in frame.iterrows():
        lines.append("    " + " & ".join(_cell(row[c], k) for c, _, k in shown) + r" \\")
    lines += [r"    \bottomrule", r"  \end{tabular}"]
    if note:
        lines.append(f"  \\par\\smallskip{{\\footnotesize {latex_escape(note)}\\par}}")
    lines.append(r"\end{table}")
    return "\n".join(lines) + "\n"


def tables_tex(tables: Mapping[str, pd.DataFrame], *, title: str = "",
               summary: Mapping[str, Any] | None = None) -> str:
    """The ``tables.tex`` document body: every table as a booktabs ``table``.

    Parameters
    ----------
    tables : mapping of str to pandas.DataFrame
        As returned by :func:`build_tables`.
    title : str
        Study title, written in a comment.
    summary : mapping or None
        When given, the conduct table's caption states theta and its interval.

    Returns
    -------
    str
        LaTeX to ``\\input`` in a document that loads ``booktabs``.
    """
    specs = {s.name: s for s in TABLES}
    head = [
        f"% Tables of the study: {' '.join(title.split())}".rstrip(),
        "% Generated by conduct; requires \\usepackage{booktabs}.",
        "",
    ]
    parts = ["\n".join(head)]
    conduct = (summary or {}).get("conduct") or {}
    for name, frame in tables.items():
        spec = specs.get(name)
        caption = spec.title if spec else name
        if name == "conduct_tests" and conduct.get("theta") is not None and conduct.get("ci"):
            lo, hi = conduct["ci"]
            level = conduct.get("level", 0.95)
            caption += (f" (estimated theta = {conduct['theta']:.3f}, {level:.0%} interval "
                        f"[{lo:.3f}, {hi:.3f}])")
        parts.append(to_booktabs(frame, caption=caption, label=name,
                                 columns=spec.columns if spec else None,
                                 note=spec.note if spec else ""))
    return "\n".join(parts)
