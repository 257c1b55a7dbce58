"""Figures, tables and ``report.html``: open every output of a run on a simulated panel.

One small simulated panel (20 markets x 12 quarters, Cournot conduct) is
estimated once per module; its outputs are written with
:func:`conduct.report.write_outputs` and every file is opened and checked:
PNG signatures and sizes, CSV columns, the structure of ``tables.tex`` and the
sections, escaping and self-containment of ``report.html``.  One market is
named like an HTML script element and the title holds LaTeX and HTML special
characters, so escaping is tested on real output.
"""

from __future__ import annotations

import ast
import base64
import dataclasses
import json
import re
import struct
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
from conftest import BASE_SPEC, cournot_frame, to_toml
from matplotlib.figure import Figure

import conduct
from conduct import figures, report, tables
from conduct.presets import REGION_NAMES
from conduct.simulate import Episode, SimulationSpec
from conduct.summary import CAUTION, build_summary

# PNG sizes at the default dpi: the smallest figure is 6 x 4.2 in (900 x 630 px at 150 dpi);
# anything far outside this range means a broken layout or a wrong dpi.
MIN_SIDE_PX, MAX_SIDE_PX = 300, 2500
EVIL_MARKET = "<script>alert(1)</script>"
TITLE = "Salt & grit <b>study</b>: 100% invented_data #1"
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"

EXPECTED_CSV = {
    "demand_coefficients.csv": ["term", "estimate", "se", "z", "p"],
    "supply_coefficients.csv": ["term", "estimate", "se", "z", "p", "se_naive"],
    "first_stage.csv": ["stage", "endogenous", "f", "df_num", "df_den", "p", "partial_r2",
                        "weak", "convention"],
    "conduct_tests.csv": ["model", "theta", "delta", "se", "wald", "p", "rejected", "null"],
    "costs_markups.csv": ["model", "theta_mean", "marginal_cost_mean", "marginal_cost_median",
                          "lerner_mean", "lerner_median", "negative_cost_share", "rows"],
}
EXPECTED_FIGURES = {"first_stage", "demand_residuals", "elasticities", "conduct",
                    "marginal_cost", "lerner"}


@dataclasses.dataclass(frozen=True)
class Run:
    results: conduct.Results
    summary: dict[str, Any]
    folder: Path
    files: list[Path]


@pytest.fixture(scope="module")
def run(tmp_path_factory: pytest.TempPathFactory) -> Run:
    from conduct.presets import write_study

    root = tmp_path_factory.mktemp("report")
    names = (EVIL_MARKET, *REGION_NAMES[:19])
    spec = SimulationSpec(markets=20, periods=12, market_names=names, title=TITLE, seed=3)
    study = write_study(root / "study", spec)
    res = conduct.estimate(study)
    summary = build_summary(res)
    summary["provenance"] = {"command": ["conduct", "estimate", str(study)], "seed": 3,
                             "versions": {"conduct": conduct.__version__},
                             "data_sha256": summary["data"]["sha256"]}
    summary["run"] = {"id": "test-run"}
    folder = root / "run"
    folder.mkdir()
    files = report.write_outputs(res, summary, folder)
    return Run(res, summary, folder, files)


def _png_size(data: bytes) -> tuple[int, int]:
    assert data[:8] == PNG_SIGNATURE, "not a PNG signature"
    length, kind = struct.unpack(">I4s", data[8:16])
    assert kind == b"IHDR" and length == 13, "first chunk is not IHDR"
    width, height = struct.unpack(">II", data[16:24])
    return width, height


# ----------------------------------------------------------------------------------------
# Figures
# ----------------------------------------------------------------------------------------


def test_every_figure_is_a_png_of_sensible_size(run: Run) -> None:
    pngs = sorted((run.folder / "figures").glob("*.png"))
    assert {p.stem for p in pngs} == EXPECTED_FIGURES
    for path in pngs:
        data = path.read_bytes()
        w, h = _png_size(data)
        assert MIN_SIDE_PX <= w <= MAX_SIDE_PX and MIN_SIDE_PX <= h <= MAX_SIDE_PX, (path, w, h)
        assert data.endswith(b"IEND\xaeB`\x82"), f"{path.name} is truncated"


@pytest.mark.parametrize("build", [
    figures.first_stage_figure, figures.residual_figure, figures.elasticity_figure,
    figures.conduct_figure, figures.marginal_cost_figure, figures.lerner_figure,
])
def test_figure_functions_return_labelled_figures(run: Run, build: Any) -> None:
    fig = build(run.results)
    assert isinstance(fig, Figure)
    ax = fig.axes[0]
    assert ax.get_xlabel()
    if build is not figures.conduct_figure:  # its rows are labelled by tick labels instead
        assert ax.get_ylabel()


def test_axis_labels_name_the_study_columns(run: Run) -> None:
    fig = figures.marginal_cost_figure(run.results)
    assert "(price)" in fig.axes[0].get_ylabel()
    assert "(quarter)" in fig.axes[0].get_xlabel()
    fig = figures.residual_figure(run.results)
    assert "tonnes" in fig.axes[0].get_ylabel()


def test_figures_do_not_use_pyplot() -> None:
    tree = ast.parse(Path(figures.__file__).read_text(encoding="utf-8"))
    imported = {a.name for n in ast.walk(tree) if isinstance(n, ast.Import) for a in n.names}
    imported |= {n.module or "" for n in ast.walk(tree) if isinstance(n, ast.ImportFrom)}
    assert not any("pyplot" in name for name in imported)


def test_figures_are_deterministic(run: Run) -> None:
    a = figures.figure_png(figures.conduct_figure(run.results))
    b = figures.figure_png(figures.conduct_figure(run.results))
    assert a == b


def test_conduct_figure_draws_given_ar_sets(run: Run) -> None:
    for ar in ({"intervals": [[None, 0.1], [0.3, None]], "kind": "union"}, [0.1, 0.4],
               {"intervals": [], "kind": "empty"}):
        fig = figures.conduct_figure(run.results, ar_set=ar)
        assert "Anderson-Rubin" in " ".join(t.get_text() for t in fig.axes[0].get_yticklabels())


# ----------------------------------------------------------------------------------------
# Tables
# ----------------------------------------------------------------------------------------


def test_csv_tables_have_their_columns(run: Run) -> None:
    for name, columns in EXPECTED_CSV.items():
        frame = pd.read_csv(run.folder / name)
        assert list(frame.columns) == columns, name
        assert len(frame) > 0, name
    tests = pd.read_csv(run.folder / "conduct_tests.csv")
    assert list(tests["model"]) == ["competitive", "cournot", "collusive"]
    costs = pd.read_csv(run.folder / "costs_markups.csv")
    assert list(costs["model"]) == ["estimated", "competitive", "cournot", "collusive"]
    assert costs["negative_cost_share"].between(0, 1).all()


def test_menu_table_follows_the_menu_test(run: Run) -> None:
    assert run.summary["menu"] is not None
    table = pd.read_csv(run.folder / "menu_tests.csv")
    assert list(table.columns) == ["a", "b", "t_rv", "p", "f", "weak", "better", "best"]
    assert len(table) == len(run.summary["menu"]["pairs"])
    built = tables.build_tables(run.results, {**run.summary, "menu": None})
    assert "menu_tests" not in built or built["menu_tests"] is None
    tex = tables.tables_tex(tables.build_tables(run.results, run.summary))
    assert r"\label{tab:menu_tests}" in tex


def _strip_comments(tex: str) -> str:
    return "\n".join(re.sub(r"(?<!\\)%.*$", "", line) for line in tex.splitlines())


def test_tables_tex_is_well_formed(run: Run) -> None:
    tex = (run.folder / "tables.tex").read_text(encoding="utf-8")
    body = _strip_comments(tex)
    stack: list[str] = []
    for kind, env in re.findall(r"\\(begin|end)\{(\w+)\}", body):
        if kind == "begin":
            stack.append(env)
        else:
            assert stack and stack.pop() == env, f"unbalanced \\end{{{env}}}"
    assert not stack, f"unclosed environments {stack}"
    unescaped = re.sub(r"\\[{}]", "", body)
    assert unescaped.count("{") == unescaped.count("}")
    n_tables = body.count(r"\begin{table}")
    assert n_tables == len(EXPECTED_CSV) + (run.folder / "overidentification.csv").exists() \
        + (run.folder / "menu_tests.csv").exists()
    for rule in (r"\toprule", r"\midrule", r"\bottomrule"):
        assert body.count(rule) == n_tables, rule
    text = re.sub(r"\\label\{[\w:-]+\}", "", body)  # labels may hold underscores
    for char in "_#%$":
        bad = [line for line in text.splitlines()
               if re.search(r"(?<!\\)" + re.escape(char), line.replace("$", "")
                            if char != "$" else re.sub(r"\$[^$]*\$", "", line))]
        assert not bad, (char, bad[:3])
    assert r"winter\_severity" in body
    assert "invented_data" in tex.splitlines()[0]  # comment line keeps the title as written
    # every row has as many cells as the column specification
    for table in re.findall(r"\\begin\{tabular\}\{(\w+)\}(.*?)\\end\{tabular\}", body, re.S):
        spec, rows = table
        for line in rows.splitlines():
            line = line.strip()
            if line.endswith(r"\\"):
                cells = re.split(r"(?<!\\)&", line[:-2])
                assert len(cells) == len(spec), line


def test_latex_escape_handles_special_characters() -> None:
    assert tables.latex_escape("a_b%c&d#e$f{g}~h^i\\j") == (
        r"a\_b\%c\&d\#e\$f\{g\}\textasciitilde{}h\textasciicircum{}i\textbackslash{}j"
    )
    assert tables.latex_escape("two\nlines") == "two lines"


def test_number_formats() -> None:
    assert tables.format_value(0.0004, "p") == "<0.001"
    assert tables.format_value(12345.678, "num") == "12,345.7"
    assert tables.format_value(float("nan"), "num") == ""
    assert tables.format_value(0.295, "share") == "29.5%"
    frame = pd.DataFrame({"x": [-1.5e-7, 2.0]})
    tex = tables.to_booktabs(frame, caption="c", label="x")
    assert r"$-1.500\times 10^{-7}$" in tex and "2.000" in tex


def test_tables_are_deterministic(run: Run, tmp_path: Path) -> None:
    tables.write_tables(run.results, run.summary, tmp_path)
    for path in tmp_path.iterdir():
        assert path.read_bytes() == (run.folder / path.name).read_bytes(), path.name


# ----------------------------------------------------------------------------------------
# Report
# ----------------------------------------------------------------------------------------


def test_report_has_every_section_in_order(run: Run) -> None:
    html = (run.folder / "report.html").read_text(encoding="utf-8")
    found = re.findall(r"<h2>(.*?)</h2>", html)
    assert found == [heading for _, heading in report.SECTIONS]
    # verdict and cautions come before the first section
    first = html.index("<h2>")
    assert html.index("cv-headline") < first
    assert html.index(CAUTION.replace("'", "&#39;")) < first


def test_report_is_self_contained(run: Run) -> None:
    html = (run.folder / "report.html").read_text(encoding="utf-8")
    assert "http://" not in html and "https://" not in html
    assert not re.search(r"""(?:src|href|action)\s*=\s*["']?\s*(?:[a-z]+:)?//""", html, re.I)
    assert not re.search(r"\burl\(", html) and "@import" not in html
    assert "<link" not in html and "<script" not in html.lower().replace("&lt;script", "")
    srcs = re.findall(r'<img src="([^"]+)"', html)
    assert len(srcs) == len(EXPECTED_FIGURES)
    for src in srcs:
        assert src.startswith("data:image/png;base64,")
        w, h = _png_size(base64.b64decode(src.split(",", 1)[1]))
        assert w >= MIN_SIDE_PX and h >= MIN_SIDE_PX
    hrefs = re.findall(r'href="([^"]*)"', html)
    assert hrefs and all(h.startswith("#") for h in hrefs)


def test_report_escapes_names_from_the_data(run: Run) -> None:
    html = (run.folder / "report.html").read_text(encoding="utf-8")
    assert EVIL_MARKET not in html
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in html
    assert "<b>study</b>" not in html and "&lt;b&gt;study&lt;/b&gt;" in html


def test_report_states_verdict_menu_and_placeholders(run: Run) -> None:
    html = (run.folder / "report.html").read_text(encoding="utf-8")
    c = run.summary["conduct"]
    assert f"At the {c['level']:.0%} level the data" in html
    assert f"{c['theta']:.3f}" in html
    assert run.summary["menu"]["reading"].split(";")[0] in html
    assert "No regimes or breaks analysed." in html
    assert "No previous run" in html
    assert "test-run" in html and "conduct estimate" in html


def test_report_compares_with_the_previous_run(run: Run) -> None:
    previous = json.loads(json.dumps(run.summary))
    previous["run"] = {"id": "earlier-run"}
    previous["conduct"]["theta"] = 0.5
    previous["conduct"]["verdict"] = "collusive"
    html = report.render_report(run.results, run.summary, previous=previous, folder=run.folder)
    section = html[html.index('id="comparison"'):html.index('id="provenance"')]
    assert "earlier-run" in section
    rows = report.comparison_rows(previous, run.summary)
    changed = {r["what"] for r in rows if r["changed"]}
    assert {"theta", "verdict"} <= changed
    assert "rows" not in changed
    assert 'class="changed key"' in section


def test_report_reuses_written_figures_and_is_deterministic(run: Run) -> None:
    a = report.render_report(run.results, run.summary, folder=run.folder)
    assert a == (run.folder / "report.html").read_text(encoding="utf-8")


@pytest.mark.parametrize(("tests", "expected"), [
    ({"competitive": True, "cournot": False, "collusive": True},
     "At the 95% level the data reject competitive and collusive conduct and do not reject "
     "Cournot; theta = 0.240 [0.220, 0.250]."),
    ({"competitive": True, "cournot": True, "collusive": True},
     "At the 95% level the data reject every candidate model (competitive, Cournot and "
     "collusive); theta = 0.240 [0.220, 0.250]."),
    ({"competitive": False, "cournot": False},
     "At the 95% level the data reject none of the candidate models (competitive and "
     "Cournot); theta = 0.240 [0.220, 0.250]."),
])
def test_verdict_sentence(tests: dict[str, bool], expected: str) -> None:
    conduct_section = {"level": 0.95, "theta": 0.24, "ci": [0.22, 0.25],
                       "tests": {k: {"rejected": v} for k, v in tests.items()}}
    assert report.verdict_text(conduct_section) == expected


def test_verdict_fragment_for_notebooks() -> None:
    c = {"level": 0.9, "theta": 0.3, "ci": [0.1, 0.5], "verdict": "cournot",
         "tests": {"cournot": {"rejected": False}, "collusive": {"rejected": True}}}
    html = report.verdict_html(c, warnings=["<i>weak</i> first stage"])
    assert "Cournot conduct" in html and "At the 90% level" in html
    assert "&lt;i&gt;weak&lt;/i&gt;" in html
    assert "<html" not in html and "<h2>" not in html
    assert "Demand only" in report.verdict_text(None)


# ----------------------------------------------------------------------------------------
# Demand-only study
# ----------------------------------------------------------------------------------------


def test_demand_only_study_writes_what_applies(tmp_path: Path) -> None:
    spec = {k: v for k, v in BASE_SPEC.items() if k != "supply"}
    cournot_frame(markets=8, periods=6).to_csv(tmp_path / "panel.csv", index=False)
    (tmp_path / "study.toml").write_text(to_toml(spec), encoding="utf-8")
    res = conduct.estimate(tmp_path / "study.toml")
    assert res.supply is None
    summary = build_summary(res)
    out = tmp_path / "run"
    out.mkdir()
    report.write_outputs(res, summary, out)
    assert {p.stem for p in (out / "figures").glob("*.png")} == {
        "first_stage", "demand_residuals", "elasticities"}
    assert (out / "demand_coefficients.csv").exists()
    assert not (out / "conduct_tests.csv").exists()
    html = (out / "report.html").read_text(encoding="utf-8")
    assert "Not estimated: this study has no supply relation." in html
    assert re.findall(r"<h2>(.*?)</h2>", html) == [h for _, h in report.SECTIONS]
    with pytest.raises(conduct.ConductError, match="demand only"):
        figures.conduct_figure(res)


def test_regimes_section_shows_break_and_rolling(tmp_path) -> None:
    from conduct.cli import main
    from conduct.presets import write_study
    from conduct.simulate import SimulationSpec

    spec = SimulationSpec(markets=10, periods=16, seed=4, break_test=True, rolling_window=8)
    study = write_study(tmp_path / "rb", spec)
    assert main(["estimate", str(study), "--quiet", "--label", "rb"]) == 0
    folder = study.parent / "runs" / "rb"
    html = (folder / "report.html").read_text(encoding="utf-8")
    assert "Break at an unknown date (sup-Wald)" in html
    assert "Rolling windows of 8 periods" in html
    assert "No regimes or breaks analysed." not in html
    assert (folder / "figures" / "rolling.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


# ----------------------------------------------------------------------------------------
# Lerner figure: markets, regime periods and break date flagged by the time/space analyses
# ----------------------------------------------------------------------------------------

# Simulated 20 markets x 16 quarters from 2013Q1; period 9 is 2015Q1.
BREAK_PERIOD, BREAK_LABEL = 9, "2015Q1"
# Tolerance for recomputing a drawn median from the observations (same arithmetic, other
# order of operations).
SAME_NUMBER = 1e-12


def _split_study(root: Path, *, episodes: tuple[Episode, ...], district: str,
                 regimes: bool, break_test: bool) -> conduct.Results:
    """Estimate a simulated study with a group column ``district`` (one letter per market
    in ``district``) and, optionally, a known regime column (``episode`` / ``normal``)."""
    from conduct.presets import write_study

    spec = SimulationSpec(markets=20, periods=16, seed=5, break_test=break_test,
                          episodes=episodes)
    study = write_study(root, spec)
    panel = pd.read_csv(study.parent / "panel.csv")
    names = list(dict.fromkeys(panel["region"]))
    panel["district"] = panel["region"].map(dict(zip(names, district, strict=True)))
    lines = 'groups = "district"\n'
    if regimes:
        truth = pd.read_csv(study.parent / "truth_observations.csv")
        panel["regime"] = np.where(truth["episode"].to_numpy() > 0, "episode", "normal")
        lines += 'regimes = "regime"'
    else:
        lines += 'regimes = ""'
    panel.to_csv(study.parent / "panel.csv", index=False)
    study.write_text(study.read_text(encoding="utf-8").replace('regimes = ""', lines),
                     encoding="utf-8")
    return conduct.estimate(study)


@pytest.fixture(scope="module")
def colluding_group(tmp_path_factory: pytest.TempPathFactory) -> conduct.Results:
    # the first four markets collude throughout and form district A; B and C are Cournot
    return _split_study(tmp_path_factory.mktemp("group"),
                        episodes=(Episode("collusive", (1, 2, 3, 4), 1, 16),),
                        district="AAAA" + "B" * 8 + "C" * 8, regimes=False, break_test=False)


@pytest.fixture(scope="module")
def collusion_from_2015(tmp_path_factory: pytest.TempPathFactory) -> conduct.Results:
    # every market colludes from 2015Q1 (a known regime and a break); districts are
    # drawn across that, so they do not differ
    return _split_study(tmp_path_factory.mktemp("break"),
                        episodes=(Episode("collusive", tuple(range(1, 21)), BREAK_PERIOD, 16),),
                        district="ABC" * 6 + "AB", regimes=True, break_test=True)


def _legend(fig: Figure) -> list[str]:
    return [t.get_text() for legend in fig.legends for t in legend.get_texts()]


def _line(fig: Figure, start: str) -> Any:
    found = [ln for ln in fig.axes[0].lines if ln.get_label().startswith(start)]
    assert len(found) == 1, [ln.get_label() for ln in fig.axes[0].lines]
    return found[0]


def _own_theta_median(res: conduct.Results, rows: np.ndarray, theta: float) -> np.ndarray:
    """Median Lerner index by period of ``rows`` under ``theta``, from the observations."""
    obs = res.derived.observations[rows]
    lerner = theta * obs["qstar"] / obs["price"]
    t = res.panel.frame.loc[rows, "_t"]
    return lerner.groupby(t.to_numpy()).median().sort_index().to_numpy()


def test_lerner_figure_draws_the_flagged_group_under_its_own_theta(
        colluding_group: conduct.Results) -> None:
    res = colluding_group
    flags = figures.lerner_flags(res)
    assert [(s.kind, s.label, s.markets) for s in flags.splits] == [("group", "A", 4)]
    assert flags.break_date is None and not flags.regime_periods
    group = res.groups
    assert group is not None and group.equality_p < 0.05
    a = next(g for g in group.groups if g.label == "A")
    frame = res.panel.frame
    in_a = (frame["district"] == "A").to_numpy()
    assert set(frame.loc[in_a, "region"]) == set(frame["region"].unique()[:4])  # planted
    np.testing.assert_array_equal(np.isfinite(flags.own_theta["group"]), in_a)

    fig = figures.lerner_figure(res)
    labels = _legend(fig)
    assert "flagged group A (4 markets), own \N{GREEK SMALL LETTER THETA}" in labels
    assert "each market of a flagged group" in labels
    assert not any(lab.startswith("nothing flagged") for lab in labels)
    flagged = _line(fig, "flagged group A")
    np.testing.assert_allclose(flagged.get_ydata(), _own_theta_median(res, in_a, a.theta),
                               rtol=SAME_NUMBER)
    thin = [ln for ln in fig.axes[0].lines
            if ln.get_color() == flagged.get_color() and ln is not flagged]
    assert len(thin) == 4  # one per flagged market
    # the colluders' margins under their own theta lie above the overall median
    overall = _line(fig, "median, estimated")
    assert np.nanmedian(flagged.get_ydata() - overall.get_ydata()) > 0
    assert not any(p.get_label().startswith("periods of") for p in fig.axes[0].patches)
    assert not any(ln.get_label().startswith("break in conduct") for ln in fig.axes[0].lines)


def test_lerner_figure_marks_regime_periods_and_the_break(
        collusion_from_2015: conduct.Results) -> None:
    res = collusion_from_2015
    flags = figures.lerner_flags(res)
    frame = res.panel.frame
    t_of = dict(zip(frame["_period"].astype(str), frame["_t"], strict=False))
    times = sorted(set(frame["_t"]))
    assert [(s.kind, s.label) for s in flags.splits] == [("regime", "episode")]
    assert flags.regime_periods == tuple(times[BREAK_PERIOD - 1:])
    assert flags.break_date == BREAK_LABEL
    assert flags.break_at == t_of[BREAK_LABEL] - 0.5
    assert flags.notes and flags.notes[0].startswith(
        "equal conduct across groups of 'district' not rejected")

    fig = figures.lerner_figure(res)
    ax = fig.axes[0]
    labels = _legend(fig)
    # the break: a vertical line between 2014Q4 and 2015Q1, named in the legend
    brk = _line(fig, f"break in conduct from {BREAK_LABEL}")
    assert list(brk.get_xdata()) == [flags.break_at, flags.break_at]
    assert any(lab.startswith("median under \N{GREEK SMALL LETTER THETA}") for lab in labels)
    # the regime's periods shaded, from half a period before 2015Q1 to after the last one
    shade = [p for p in ax.patches if p.get_label() == "periods of flagged regime episode"]
    assert len(shade) == 1
    xs = shade[0].get_patch_transform().transform(shade[0].get_path().vertices)[:, 0]
    assert (xs.min(), xs.max()) == (t_of[BREAK_LABEL] - 0.5, times[-1] + 0.5)
    regime = next(g for g in res.regimes.groups if g.label == "episode")
    in_regime = (frame["regime"] == "episode").to_numpy()
    line = _line(fig, "flagged regime episode (20 markets)")
    drawn = line.get_ydata()[np.isfinite(line.get_ydata())]
    np.testing.assert_allclose(drawn, _own_theta_median(res, in_regime, regime.theta),
                               rtol=SAME_NUMBER)
    # the group analysis ran and flagged nothing: said so
    assert any(lab.startswith("equal conduct across groups of 'district'") for lab in labels)
    text = figures.flags_text(res)
    assert text.startswith("Flagged in this run: regime 'episode' of 'regime'")
    assert f"a break in conduct from {BREAK_LABEL} on" in text


def test_lerner_figure_says_when_nothing_is_flagged(
        run: Run, collusion_from_2015: conduct.Results) -> None:
    # no analysis asked for
    fig = figures.lerner_figure(run.results)
    assert "nothing flagged: no group, regime or break analysis in this study" in _legend(fig)
    assert not figures.lerner_flags(run.results).anything
    assert [ln.get_label() for ln in fig.axes[0].lines if not ln.get_label().startswith(
        ("median", "_"))] == ["nothing flagged: no group, regime or break analysis in this "
                              "study"]
    # analyses that ran and found nothing: no regime split, a break test that does not reject
    b = collusion_from_2015.breaks
    assert b is not None
    quiet = dataclasses.replace(collusion_from_2015, regimes=None,
                                breaks=dataclasses.replace(b, p=0.5))
    flags = figures.lerner_flags(quiet)
    assert not flags.anything and flags.break_at is None and not flags.own_theta
    labels = _legend(figures.lerner_figure(quiet))
    assert labels[-2].startswith("nothing flagged: equal conduct across groups of 'district'")
    assert labels[-1] == "no break in conduct at the 95% level (sup-Wald p = 0.500)"
    assert not any("break in conduct from" in lab or "flagged regime" in lab for lab in labels)
    assert figures.flags_text(quiet).startswith("Nothing is flagged in this run.")


def test_report_says_what_is_flagged_beside_the_lerner_figure(
        collusion_from_2015: conduct.Results) -> None:
    res = collusion_from_2015
    fake = {spec.name: PNG_SIGNATURE for spec in figures.available_figures(res)}
    html = report.render_report(res, build_summary(res), figures=fake)
    block = html[html.index('id="figure-lerner"'):]
    block = block[:block.index("</figure>")]
    assert "Flagged in this run: regime &#39;episode&#39; of &#39;regime&#39;" in block
    assert f"a break in conduct from {BREAK_LABEL} on" in block


# ----------------------------------------------------------------------------------------
# Comparison with the previous run: the figure in the later run's report
# ----------------------------------------------------------------------------------------


def _images(html: str) -> dict[str, bytes]:
    found = re.findall(r'<figure class="plot" id="figure-([\w-]+)">\s*<img src="'
                       r'data:image/png;base64,([^"]+)"', html)
    return {name: base64.b64decode(data) for name, data in found}


def test_second_run_embeds_the_comparison_figure(tmp_path: Path,
                                                 capsys: pytest.CaptureFixture[str]) -> None:
    from conduct.cli import main
    from conduct.presets import write_study

    study = write_study(tmp_path / "cmp", SimulationSpec(markets=10, periods=12, seed=4))
    full = pd.read_csv(study.parent / "panel.csv")
    last = full["quarter"].iloc[-1]
    full[full["quarter"] != last].to_csv(study.parent / "panel.csv", index=False)
    assert main(["estimate", str(study), "--quiet", "--label", "first"]) == 0
    full.to_csv(study.parent / "panel.csv", index=False)  # one more quarter of data
    assert main(["estimate", str(study), "--quiet", "--label", "second"]) == 0
    runs = study.parent / "runs"

    first = (runs / "first" / "report.html").read_text(encoding="utf-8")
    assert "comparison" not in _images(first)
    assert not (runs / "first" / "figures" / "comparison.png").exists()
    assert "No previous run of this study to compare with." in first

    second = (runs / "second" / "report.html").read_text(encoding="utf-8")
    images = _images(second)
    assert set(images) == set(_images(first)) | {"comparison"}
    png = images["comparison"]
    w, h = _png_size(png)
    assert MIN_SIDE_PX <= w <= MAX_SIDE_PX and MIN_SIDE_PX <= h <= MAX_SIDE_PX
    assert png == (runs / "second" / "figures" / "comparison.png").read_bytes()
    section = second[second.index('id="comparison"'):second.index('id="provenance"')]
    assert 'id="figure-comparison"' in section and "<code>first</code>" in section

    # the figure itself: both runs' theta, and the later run's Lerner path one quarter longer
    summaries = [json.loads((runs / r / "summary.json").read_text()) for r in ("first", "second")]
    obs = [pd.read_csv(runs / r / "observations.csv", dtype={"period": str})
           for r in ("first", "second")]
    fig = figures.run_comparison_figure(
        figures.RunSnapshot.of(summaries[0], obs[0], "previous run"),
        figures.RunSnapshot.of(summaries[1], obs[1], "this run"), period_column="quarter")
    left, right = fig.axes
    thetas = [ln.get_xdata()[0] for ln in left.lines if ln.get_linestyle() == "None"]
    assert thetas == [s["conduct"]["theta"] for s in summaries]
    earlier, later = right.lines
    assert later.get_xdata().max() == earlier.get_xdata().max() + 1
    assert right.get_xlabel() == "period (quarter)"
    assert _legend(fig) == ["previous run: first", "this run: second"]

    # conduct compare still draws its figure from the two run folders
    capsys.readouterr()
    assert main(["compare", str(study), "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert Path(doc["figure"]).read_bytes()[:8] == PNG_SIGNATURE
