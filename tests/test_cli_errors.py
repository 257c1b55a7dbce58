"""Exit codes and messages of the command line for identification and estimation errors.

Most cases call :func:`conduct.cli.main` in-process; a few run the real
``conduct`` entry points in a subprocess to prove that no traceback reaches
stderr and that the process exit code is 2.
"""

from __future__ import annotations

import copy
import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from conftest import (
    BASE_SPEC,
    Project,
    assert_no_run,
    assert_user_error,
    cournot_frame,
    to_toml,
)

import conduct.pipeline
from conduct.cli import main

# ---------------------------------------------------------------------------- identification


def _linear_no_rotator_free_slope(s: dict) -> None:
    s["supply"]["cost_slope"] = True


@pytest.mark.parametrize("command", ["check", "estimate"])
def test_unidentified_theta_explains_both_remedies(project: Project, command: str) -> None:
    project.edit(_linear_no_rotator_free_slope)
    msg = assert_user_error(project.run(command, project.study), str(project.study),
                            "not identified", "rotator", "cost_slope = false",
                            "constant marginal cost")
    assert "[demand] rotators" in msg
    assert_no_run(project)


def test_cost_slope_defaults_to_true(project: Project) -> None:
    project.edit(lambda s: s["supply"].pop("cost_slope"))
    assert_user_error(project.check(), "not identified")


def test_rotator_identifies_theta(project: Project) -> None:
    def change(s: dict) -> None:
        s["supply"]["cost_slope"] = True
        s["demand"]["rotators"] = ["winter"]

    project.edit(change)
    res = project.check()
    assert res.code == 0, res.err
    assert "identified by the demand rotation through winter" in res.out


def test_log_demand_without_rotator_is_refused(project: Project) -> None:
    """With log demand and no rotator the markup is proportional to price (exit 2)."""
    project.edit(lambda s: s["demand"].update(form="log"))
    assert_user_error(project.check(), str(project.study), "functional form", "rotator")
    assert_user_error(project.estimate(), "functional form")
    assert_no_run(project)


@pytest.mark.parametrize("command", ["check", "estimate"])
def test_too_few_supply_instruments(project: Project, command: str) -> None:
    """With a rising cost, Q and Q* are endogenous; one rotator alone is one instrument."""
    def change(s: dict) -> None:
        s["supply"]["cost_slope"] = True
        s["demand"].update(rotators=["winter"], shifters=[])

    project.edit(change)
    assert_user_error(project.run(command, project.study), "2 endogenous", "Q*", "and Q",
                      "only 1 excluded instrument", "(winter)", "[supply] instruments")
    assert_no_run(project)


def test_no_supply_instrument_at_all(project: Project) -> None:
    """Fewer instruments (0) than endogenous regressors (Q*) in the supply relation."""
    project.edit(lambda s: s["demand"].update(shifters=[]))
    assert_user_error(project.estimate(), "1 endogenous", "only 0 excluded instrument",
                      "(none)")
    assert_no_run(project)


def test_extra_supply_instrument_fills_the_gap(project: Project) -> None:
    def change(s: dict) -> None:
        s["demand"].update(shifters=[])
        s["supply"]["instruments"] = ["income"]

    project.edit(change)
    assert project.check().code == 0


def test_demand_only_study_runs(project: Project) -> None:
    project.edit(lambda s: s.pop("supply"))
    res = project.estimate("--json")
    assert res.code == 0, res.err
    summary = json.loads(res.out)
    assert summary["conduct"] is None
    assert summary["demand"]["coefficients"]["price"]["estimate"] < 0


# ---------------------------------------------------------------------------- estimation


def _one_market(project: Project, periods: int = 40) -> None:
    frame = cournot_frame(markets=1, periods=periods).drop(columns="region")
    project.write_csv(frame)


def test_cluster_errors_with_a_single_market(project: Project) -> None:
    _one_market(project)
    project.edit(lambda s: s["panel"].pop("market"))
    assert_user_error(project.estimate(), "cluster-robust", "single market", "\"robust\"",
                      "\"hac\"")
    assert_no_run(project)


@pytest.mark.parametrize("errors", ["robust", "hac"])
def test_single_market_with_suggested_errors_runs(project: Project, errors: str) -> None:
    _one_market(project)

    def change(s: dict) -> None:
        s["panel"].pop("market")
        s["demand"].update(errors=errors, effects=[])

    project.edit(change)
    res = project.estimate("--json")
    assert res.code == 0, res.err
    assert json.loads(res.out)["data"]["markets"] == 1


def test_constant_instrument_is_refused(project: Project) -> None:
    f = project.frame.copy()
    f["flat"] = 5.0
    project.write_csv(f)
    project.edit(lambda s: s["demand"].update(instruments=["diesel", "flat"]))
    assert_user_error(project.estimate(), "instruments", "no variation")
    assert_no_run(project)


def test_constant_instrument_without_effects_is_refused(project: Project) -> None:
    f = project.frame.copy()
    f["flat"] = 5.0
    project.write_csv(f)
    project.edit(lambda s: s["demand"].update(instruments=["flat"], effects=[]))
    assert_user_error(project.estimate(), "instruments are collinear")
    assert_no_run(project)


def test_collinear_instruments_are_refused(project: Project) -> None:
    f = project.frame.copy()
    f["diesel2"] = 2 * f["diesel"] + 1
    project.write_csv(f)
    project.edit(lambda s: s["demand"].update(instruments=["diesel", "diesel2"]))
    assert_user_error(project.estimate(), "collinear", "Drop one")
    assert_no_run(project)


def test_collinear_regressors_name_the_columns(project: Project) -> None:
    f = project.frame.copy()
    f["income2"] = 3 * f["income"] - 2
    project.write_csv(f)
    project.edit(lambda s: s["demand"].update(shifters=["income", "income2"]))
    assert_user_error(project.estimate(), "collinear", "income", "income2")
    assert_no_run(project)


def test_constant_shifter_named(project: Project) -> None:
    f = project.frame.copy()
    f["flat"] = 5.0
    project.write_csv(f)
    project.edit(lambda s: s["demand"].update(shifters=["income", "flat"]))
    assert_user_error(project.estimate(), "'flat'", "no variation")
    assert_no_run(project)


def test_collinear_instruments_name_the_columns(project: Project) -> None:
    f = project.frame.copy()
    f["diesel2"] = 2 * f["diesel"] + 1
    f["flat"] = 5.0
    project.write_csv(f)
    project.edit(lambda s: s["demand"].update(instruments=["diesel", "diesel2"]))
    assert_user_error(project.estimate(), "diesel2")
    project.edit(lambda s: s["demand"].update(instruments=["diesel", "flat"]))
    assert_user_error(project.estimate(), "'flat'")


def test_constant_supply_instrument_is_a_user_error(project: Project) -> None:
    f = project.frame.copy()
    f["flat"] = 5.0
    project.write_csv(f)
    project.edit(lambda s: s["supply"].update(instruments=["flat"]))
    assert_user_error(project.estimate(), "flat")
    assert_no_run(project)


def test_too_few_observations(project: Project) -> None:
    project.write_csv(cournot_frame(markets=1, periods=3))
    project.edit(lambda s: s["demand"].update(errors="robust", effects=[]))
    assert_user_error(project.estimate(), "Too few observations (3)")
    assert_no_run(project)


def test_bad_run_label(project: Project) -> None:
    assert_user_error(project.estimate("--label", "../escape"), "Run label '../escape'")
    assert_no_run(project)
    assert not (project.root / "escape").exists()


# ---------------------------------------------------------------------------- exit codes


def test_internal_error_exits_1_without_traceback(project: Project,
                                                  monkeypatch: pytest.MonkeyPatch) -> None:
    def broken(*args: object, **kwargs: object) -> None:
        raise RuntimeError("boom")

    monkeypatch.setattr(conduct.pipeline, "estimate", broken)
    res = project.estimate()
    assert res.code == 1
    assert "Traceback" not in res.err
    assert "internal error" in res.err and "RuntimeError: boom" in res.err
    assert "--debug" in res.err
    with pytest.raises(RuntimeError, match="boom"):
        main(["--debug", "estimate", str(project.study)])


def test_usage_error_exits_2(project: Project) -> None:
    res = project.run("frobnicate")
    assert res.code == 2
    assert "usage:" in res.err
    assert project.run("--version").code == 0


def test_success_exits_0_and_writes_one_run(project: Project) -> None:
    res = project.estimate("--quiet")
    assert (res.code, res.out, res.err) == (0, "", "")
    folders = [p for p in project.runs.iterdir() if p.is_dir()]
    assert len(folders) == 1
    assert (folders[0] / "summary.json").exists()
    assert (project.runs / "history.sqlite").exists()


# ---------------------------------------------------------------------------- subprocesses
# Three failing runs of the real entry points, started together so the suite stays fast.


def _write(root: Path, change=None, frame=None) -> Path:
    root.mkdir()
    spec = copy.deepcopy(BASE_SPEC)
    if change is not None:
        change(spec)
    (cournot_frame() if frame is None else frame).to_csv(root / "panel.csv", index=False)
    (root / "study.toml").write_text(to_toml(spec), encoding="utf-8")
    return root / "study.toml"


@pytest.fixture(scope="module")
def subprocess_runs(tmp_path_factory: pytest.TempPathFactory) -> dict[str, tuple]:
    base = tmp_path_factory.mktemp("subprocess")
    py = [sys.executable, "-m", "conduct.cli"]
    script = shutil.which("conduct", path=str(Path(sys.executable).parent))
    missing = cournot_frame()
    missing.loc[5, "price"] = np.nan
    cases: dict[str, tuple[list[str], Path]] = {}
    study = _write(base / "unknown", lambda s: s["demand"].update(estimater="liml"))
    cases["unknown_key"] = ([*py, "check", str(study)], study.parent)
    study = _write(base / "missing", frame=missing)
    cases["missing_values"] = ([*py, "estimate", "study.toml"], study.parent)
    study = _write(base / "ident", lambda s: s["supply"].update(cost_slope=True))
    cmd = [script] if script is not None else py
    cases["identification"] = ([*cmd, "estimate", str(study), "--json"], study.parent)
    env = {k: v for k, v in os.environ.items() if k != "PYTHONWARNINGS"}
    procs = {
        name: (subprocess.Popen(args, cwd=cwd, env=env, stdout=subprocess.PIPE,
                                stderr=subprocess.PIPE, text=True), cwd)
        for name, (args, cwd) in cases.items()
    }
    out = {}
    for name, (proc, cwd) in procs.items():
        stdout, stderr = proc.communicate(timeout=120)
        out[name] = (proc.returncode, stdout, stderr, cwd)
    return out


def _assert_clean_failure(run: tuple, *needles: str) -> None:
    code, stdout, stderr, cwd = run
    assert code == 2, stderr
    assert "Traceback" not in stderr
    assert stdout == ""
    message = " ".join(stderr.split())
    assert message.startswith("conduct: error: ")
    for needle in needles:
        assert needle in message, message
    assert not (cwd / "runs").exists()


def test_subprocess_unknown_key(subprocess_runs: dict[str, tuple]) -> None:
    _assert_clean_failure(subprocess_runs["unknown_key"], "'demand.estimater'",
                          "did you mean 'estimator'?")


def test_subprocess_missing_values_on_estimate(subprocess_runs: dict[str, tuple]) -> None:
    _assert_clean_failure(subprocess_runs["missing_values"], "column 'price'", "row 7",
                          "drop_missing")


def test_subprocess_console_script_identification(subprocess_runs: dict[str, tuple]) -> None:
    _assert_clean_failure(subprocess_runs["identification"], "not identified", "rotator",
                          "cost_slope = false")
