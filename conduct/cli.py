"""The ``conduct`` command line: a thin layer over the library.

It parses arguments, calls the library, prints or writes the result, and maps
errors to exit codes: 0 done, 2 user error (one paragraph, no traceback),
3 an alert condition was met, 1 internal error (traceback only with
``--debug``).  No statistics are computed here.
"""

from __future__ import annotations

import argparse
import contextlib
import json
import signal
import sys
import textwrap
from collections.abc import Callable, Iterator, Sequence
from pathlib import Path
from typing import Any

from conduct import __version__
from conduct.errors import ConductError
from conduct.heap import keep_freed_memory

__all__ = ["main"]

EXIT_OK, EXIT_INTERNAL, EXIT_USER, EXIT_ALERT = 0, 1, 2, 3


def _paragraph(prefix: str, message: str) -> str:
    return textwrap.fill(f"{prefix}{message}", width=88, break_long_words=False,
                         break_on_hyphens=False)


def _cmd_check(args: argparse.Namespace) -> int:
    from conduct.identify import check_identification
    from conduct.panel import describe_assembly, load_panel, write_panel
    from conduct.partitioned import check_partitioned
    from conduct.study import load_study

    study = load_study(args.study)
    if study.panel.partitioned:
        if args.write_panel is not None:
            raise ConductError(f"--write-panel writes the panel from memory, which a "
                               f"partitioned study ({study.path}) never holds; leave it out.")
        head, panel = [("data", check_partitioned(study))], None
    else:
        panel = load_panel(study)
        head = [("data", f"{study.panel.file} (sha256 {panel.description.sha256[:12]})"),
                ("panel", panel.description.text())]
    print(f"study     {study.path}")
    print(f"title     {study.title}")
    for label, text in head:
        print(f"{label:<10}" + text.replace("\n", "\n          "))
    d = study.demand
    print(f"demand    {d.form}, {d.estimator}, errors {d.errors}, effects "
          f"{', '.join(d.effects) or 'none'}")
    print(f"          shifters {', '.join(d.shifters) or '-'}; rotators "
          f"{', '.join(d.rotators) or '-'}; instruments {', '.join(d.instruments)}")
    ident = check_identification(study)
    if study.supply is None:
        print("supply    none (demand-only study)")
    else:
        s = study.supply
        print(f"supply    cost shifters {', '.join(s.cost_shifters) or '-'}; marginal cost "
              f"{'may rise with output' if s.cost_slope else 'constant in output'}")
        print(f"conduct   {ident.reason}")
        print(f"models    {', '.join(c.name for c in study.candidates)}")
    if panel is not None:
        print(describe_assembly(panel))
        if args.write_panel is not None:
            print(f"wrote     {write_panel(panel, args.write_panel)} (the assembled panel)")
    for w in ident.warnings:
        print(_paragraph("warning: ", w), file=sys.stderr)
    print("check     passed: nothing was estimated")
    return EXIT_OK


def _fmt(v: Any, spec: str = ".4f") -> str:
    return "-" if v is None else format(v, spec)


def _terminal_summary(summary: dict[str, Any], folder: Path) -> str:
    d, dem = summary["data"], summary["demand"]
    rows = [
        ("data", f"{d['rows']} rows, {d['markets']} markets, {d['periods']} periods "
                 f"({d['first_period']} to {d['last_period']})"),
        ("demand", f"{dem['form']} by {dem['estimator']}, errors {dem['errors']}"),
        ("elasticity", f"mean {_fmt(dem['elasticity']['mean'], '.3f')}, median "
                       f"{_fmt(dem['elasticity']['median'], '.3f')}"),
    ]
    for name, fs in dem["first_stage"].items():
        rows.append(("first stage", f"{name}: F = {_fmt(fs['f'], '.1f')}"))
    c = summary.get("conduct")
    if c:
        lo, hi = c["ci"]
        rows.append(("theta", f"{_fmt(c['theta'])} (se {_fmt(c['se'])}), "
                              f"{c['level']:.0%} CI [{_fmt(lo)}, {_fmt(hi)}]"))
        if c.get("cournot_benchmark") is not None:
            rows.append(("cournot H", f"{_fmt(c['cournot_benchmark'])} (Q*-weighted)"))
        for name, t in c["tests"].items():
            state = "rejected" if t["rejected"] else "not rejected"
            rows.append((f"test {name}", f"Wald {t['stat']:.2f}, p {t['p']:.4f}, {state}"))
        rows.append(("verdict", c["verdict"]))
        if c.get("ar_set"):
            rows.append(("AR set", c["ar_set"]["reading"]))
        menu = summary.get("menu")
        if menu:
            rows.append(("menu test", f"not beaten: {', '.join(menu['best']) or 'none'}"))
        for key in ("regimes", "groups", "break"):
            if c.get(key):
                rows.append((key, c[key]["reading"]))
        costs = summary.get("costs")
        if costs:
            rows.append(("lerner", f"mean {_fmt(costs['lerner_mean'])}; negative costs "
                                   f"{costs['negative_cost_share']:.1%} of rows"))
        if c.get("regime_shift"):
            rows.append(("regimes", c["regime_shift"]["reading"]))
    if d.get("changes_line"):
        rows.append(("new data", d["changes_line"]))
    rows.append(("run folder", str(folder)))
    width = max(len(k) for k, _ in rows)
    lines = [f"{k:<{width}}  {v}" for k, v in rows]
    for w in summary["warnings"]:
        lines.append(_paragraph("warning: ", w))
    lines.append(_paragraph("note: ", "estimates are economic evidence under stated "
                                      "assumptions, not a legal finding."))
    return "\n".join(lines)


def _cmd_estimate(args: argparse.Namespace, argv: Sequence[str]) -> int:
    from conduct.alerts import parse_alerts
    from conduct.pipeline import estimate
    from conduct.runs import write_run
    from conduct.study import load_study

    specs = parse_alerts(args.alert or [])
    study = load_study(args.study)
    if any(a.name == "break" for a in specs) and not (study.supply and study.supply.break_test):
        raise ConductError(
            f"--alert break needs the break test: set break_test = true under [supply] in "
            f"{study.path}."
        )
    if study.panel.partitioned:
        return _estimate_partitioned(args, study, argv)
    res = estimate(study, quiet=args.quiet or args.json, workers=args.workers,
                   scheduler=args.scheduler)
    folder, summary = write_run(res, label=args.label, argv=["conduct", *argv], alerts=specs)
    if args.json:
        print(json.dumps(summary, indent=2, sort_keys=True))
    elif not args.quiet:
        print(_terminal_summary(summary, folder))
    if summary.get("alerts"):
        if args.quiet or args.json:
            for line in summary["alerts"]:
                print(line, file=sys.stderr)
        return EXIT_ALERT
    return EXIT_OK


def _estimate_partitioned(args: argparse.Namespace, study: Any, argv: Sequence[str]) -> int:
    from conduct.partitioned import estimate_partitioned
    from conduct.partitioned_result import write_result

    for flag, value, why in (("--alert", args.alert, "compares run folders, which a "
                              "partitioned study does not write"),
                             ("--workers", args.workers, "runs bootstrap replicates, which a "
                              "partitioned study skips; --scheduler ADDRESS reads the parts "
                              "on a Dask cluster")):
        if value:
            raise ConductError(f"{flag} {why}; leave it out for {study.path} "
                               "(partitioned = true).")
    res = estimate_partitioned(study, scheduler=args.scheduler)
    path, doc = write_result(res, label=args.label, argv=["conduct", *argv])
    if args.json:
        print(json.dumps(doc, indent=2, sort_keys=True))
    elif not args.quiet:
        print(res.summary())
        print(f"written     {path}")
    return EXIT_OK


def _cmd_history(args: argparse.Namespace) -> int:
    from conduct.runs import ensure_history, read_history
    from conduct.study import load_study

    study = load_study(args.study)
    warning = ensure_history(study.output.runs)
    if warning:
        print(_paragraph("warning: ", warning), file=sys.stderr)
    hist = read_history(study.output.runs)
    if args.json:
        print(json.dumps(hist.to_dict(orient="records"), indent=2, sort_keys=True,
                         default=str))
        return EXIT_OK
    if hist.empty:
        print(f"no runs recorded yet in {study.output.runs}")
        return EXIT_OK
    cols = ["run_id", "rows", "last_period", "theta", "ci_lo", "ci_hi", "verdict", "break_stat"]
    table = hist[cols].copy()
    for c in ("theta", "ci_lo", "ci_hi", "break_stat"):
        table[c] = table[c].map(lambda v: "-" if v is None or v != v else f"{v:.4f}")
    print(table.to_string(index=False))
    return EXIT_OK


def _cmd_simulate(args: argparse.Namespace) -> int:
    from conduct.presets import preset_files, run_simulate

    out: Path = args.out
    names = dict.fromkeys([*preset_files(args.preset, "csv"), *preset_files(args.preset,
                                                                            "parquet")])
    taken = [n for n in names if (out / n).exists()]
    if out.exists() and not out.is_dir():
        raise ConductError(f"Output folder {out} exists and is not a folder.")
    if taken and not args.replace:
        raise ConductError(
            f"Output folder {out} already holds {', '.join(taken)}; conduct never overwrites "
            "files you have. Choose another --out folder, or add --replace to overwrite them."
        )
    study = run_simulate(out, preset=args.preset, markets=args.markets, periods=args.periods,
                         conduct=args.conduct, episode=args.episode, form=args.form,
                         seed=args.seed, fmt=args.format)
    if not args.quiet:
        print(f"wrote {study.parent}: {', '.join(preset_files(args.preset, args.format))}")
        print(f"next: conduct estimate {study}")
    return EXIT_OK


def _cmd_compare(args: argparse.Namespace) -> int:
    from conduct.compare import compare_runs, comparison_figure
    from conduct.study import load_study

    study = load_study(args.study)
    if len(args.runs) not in (0, 2):
        raise ConductError("compare takes no run ids (the last two runs) or exactly two.")
    a, b = (args.runs[0], args.runs[1]) if args.runs else (None, None)
    comp = compare_runs(study.output.runs, a, b)
    out_dir = study.output.runs / "comparisons"
    out_dir.mkdir(exist_ok=True)
    target = out_dir / f"{comp.a}_vs_{comp.b}.png"
    n = 2
    while target.exists():
        target = out_dir / f"{comp.a}_vs_{comp.b}-{n}.png"
        n += 1
    comparison_figure(study.output.runs, comp).savefig(target, dpi=120)
    doc = {**comp.document, "figure": str(target)}
    if args.json:
        print(json.dumps(doc, indent=2, sort_keys=True))
    else:
        print(comp.text())
        print(f"  figure    {target}")
    return EXIT_OK


def _cmd_power(args: argparse.Namespace, argv: Sequence[str]) -> int:
    from conduct.executor import make_mapper
    from conduct.power import power_analysis, write_power
    from conduct.study import load_study

    study = load_study(args.study)
    quiet = args.quiet or args.json
    mapper = make_mapper(args.workers, args.scheduler, quiet=quiet, label="power")
    res = power_analysis(study, replications=args.replications, seed=args.seed, mapper=mapper)
    folder = write_power(res, label=args.label, argv=["conduct", *argv])
    if args.json:
        print((folder / "power.json").read_text(encoding="utf-8"), end="")
    elif not args.quiet:
        print(res.text())
        print(f"written to {folder}")
    return EXIT_OK


def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="conduct",
        description="Estimate demand, the conduct parameter and markups from a panel of "
                    "markets, and test competitive, Cournot and collusive conduct.",
    )
    p.add_argument("--version", action="version", version=f"conduct {__version__}")
    p.add_argument("--debug", action="store_true", help="show full tracebacks on errors")
    sub = p.add_subparsers(dest="command", required=True, metavar="COMMAND")
    c = sub.add_parser("check", help="validate a study and its panel; estimate nothing")
    c.add_argument("study", type=Path, help="study file (TOML)")
    c.add_argument("--write-panel", type=Path, metavar="FILE",
                   help="save the assembled panel (.csv, .parquet, .xlsx or .dta)")
    e = sub.add_parser("estimate", help="run the whole job and write a new run folder")
    e.add_argument("study", type=Path, help="study file (TOML)")
    e.add_argument("--json", action="store_true", help="print summary.json instead of a table")
    e.add_argument("--quiet", action="store_true", help="print nothing on success")
    e.add_argument("--label", help="run id to use instead of time and data hash")
    e.add_argument("--workers", type=int, metavar="N",
                   help="run bootstrap replicates on N local processes")
    e.add_argument("--scheduler", metavar="ADDRESS",
                   help="run bootstrap replicates on a Dask cluster at ADDRESS "
                        "(e.g. tcp://host:8786); needs conduct[dask]")
    e.add_argument("--alert", action="append", metavar="CONDITION",
                   help="exit with code 3 (after writing the run) when a condition is met: "
                        "verdict-change, break, theta-shift=X; repeatable")
    m = sub.add_parser("simulate", help="write a synthetic panel with known conduct, its "
                       "study file and the truth")
    m.add_argument("--out", type=Path, required=True, help="folder to write into")
    m.add_argument("--preset", help="named scenario, e.g. road-salt (the demo study)")
    m.add_argument("--markets", type=int, help="number of markets")
    m.add_argument("--periods", type=int, help="number of periods")
    m.add_argument("--conduct", help="competitive, cournot, collusive or a theta in [0, 1]")
    m.add_argument("--episode", help="a different conduct in some markets and periods, e.g. "
                   "collusive:markets=1-8:periods=2018Q1-2020Q4 (several joined by ';'; "
                   "'none' removes the preset's)")
    m.add_argument("--form", choices=["linear", "log"], help="demand form")
    m.add_argument("--seed", type=int, help="random seed (same seed, same bytes)")
    m.add_argument("--format", choices=["csv", "parquet"], default="csv",
                   help="panel file format")
    m.add_argument("--replace", action="store_true", help="overwrite files already in --out")
    m.add_argument("--quiet", action="store_true", help="print nothing on success")
    cp = sub.add_parser("compare", help="what changed between two runs (default: last two)")
    cp.add_argument("study", type=Path, help="study file (TOML)")
    cp.add_argument("runs", nargs="*", metavar="RUN", help="two run ids, earlier first")
    cp.add_argument("--json", action="store_true", help="print the comparison as JSON")
    pw = sub.add_parser("power", help="Monte Carlo size and power of the conduct tests at the "
                        "estimated structure")
    pw.add_argument("study", type=Path, help="study file (TOML)")
    pw.add_argument("--replications", type=int, default=100, metavar="R",
                    help="simulated panels per true model (default 100)")
    pw.add_argument("--seed", type=int, help="random seed (default: [inference] seed)")
    pw.add_argument("--workers", type=int, metavar="N", help="local worker processes")
    pw.add_argument("--scheduler", metavar="ADDRESS",
                    help="Dask scheduler address, e.g. tcp://host:8786")
    pw.add_argument("--label", help="folder name under <runs>/power/ instead of time and hash")
    pw.add_argument("--json", action="store_true", help="print power.json instead of a table")
    pw.add_argument("--quiet", action="store_true", help="print nothing on success")
    h = sub.add_parser("history", help="one line per past run of a study")
    h.add_argument("study", type=Path, help="study file (TOML)")
    h.add_argument("--json", action="store_true", help="print the history as JSON")
    return p


@contextlib.contextmanager
def _exit_on_sigterm() -> Iterator[None]:
    """Turn SIGTERM into SystemExit(143) so that temporary run folders are cleaned up."""

    def handler(signum: int, frame: Any) -> None:
        raise SystemExit(128 + signum)

    try:
        previous = signal.signal(signal.SIGTERM, handler)
    except ValueError:  # only the main thread may set handlers
        yield
        return
    try:
        yield
    finally:
        signal.signal(signal.SIGTERM, previous)


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; return the exit code.

    Parameters
    ----------
    argv : sequence of str or None
        Arguments without the program name; None reads ``sys.argv``.

    Returns
    -------
    int
        0 done, 1 internal error, 2 user error, 3 alert met.
    """
    args_list = list(sys.argv[1:] if argv is None else argv)
    keep_freed_memory()
    parser = _parser()
    try:
        args = parser.parse_args(args_list)
    except SystemExit as exc:
        return int(exc.code or 0)
    handlers: dict[str, Callable[[argparse.Namespace], int]] = {
        "check": _cmd_check,
        "estimate": lambda a: _cmd_estimate(a, args_list),
        "history": _cmd_history,
        "simulate": _cmd_simulate,
        "compare": _cmd_compare,
        "power": lambda a: _cmd_power(a, args_list),
    }
    try:
        with _exit_on_sigterm():
            return handlers[args.command](args)
    except ConductError as exc:
        print(_paragraph("conduct: error: ", str(exc)), file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        print("conduct: interrupted", file=sys.stderr)
        return 130
    except Exception as exc:
        if args.debug:
            raise
        print(_paragraph("conduct: internal error: ",
                         f"{type(exc).__name__}: {exc}. This is a bug in conduct; rerun with "
                         "--debug for the full traceback and report it."), file=sys.stderr)
        return EXIT_INTERNAL


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
