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

import pandas as pd
import pytest
from conftest import BASE_SPEC, cournot_frame, to_toml
from matplotlib.figure import Figure

import conduct
from conduct import figures, report, tables
from conduct.presets import REGION_NAMES
from conduct.simulate import SimulationSpec
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
