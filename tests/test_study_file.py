"""Study-file validation: every rule fed bad input through the real command line.

Each case asserts exit code 2, a one-paragraph message without a traceback, and
that the message names the culprit (file and key; the allowed values or a
did-you-mean suggestion where one helps).
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from conftest import Project, assert_no_run, assert_user_error

from conduct.errors import StudyFileError
from conduct.study import load_study, parse_study


def test_base_study_is_valid(project: Project) -> None:
    res = project.check()
    assert res.code == 0, res.err
    assert "check     passed" in res.out
    assert "rows 144, markets 12, periods 12" in res.out


# ---------------------------------------------------------------------------- TOML itself


def test_invalid_toml_names_file_and_line(project: Project) -> None:
    path = project.write_study(text='title = "x"\n[panel]\nfile = "panel.csv\n')
    assert_user_error(project.check(), str(path), "not valid TOML", "line 3")


def test_invalid_toml_on_estimate_writes_nothing(project: Project) -> None:
    project.write_study(text="[panel\n")
    assert_user_error(project.estimate(), "not valid TOML")
    assert_no_run(project)


# ---------------------------------------------------------------------------- unknown keys


def test_unknown_top_level_key_suggests(project: Project) -> None:
    project.edit(lambda s: s.update(titel="x"))
    assert_user_error(project.check(), str(project.study), "unknown key 'titel'",
                      "did you mean 'title'?")


def test_unknown_top_level_table_suggests(project: Project) -> None:
    project.edit(lambda s: s.update(suply=s.pop("supply")))
    assert_user_error(project.check(), "unknown key 'suply'", "did you mean 'supply'?")


@pytest.mark.parametrize(
    ("table", "bad", "good"),
    [
        ("panel", "quantiy", "quantity"),
        ("panel", "drop_mising", "drop_missing"),
        ("demand", "estimater", "estimator"),
        ("demand", "rotator", "rotators"),
        ("supply", "cost_shifter", "cost_shifters"),
        ("supply", "cost_slop", "cost_slope"),
        ("models", "candidate", "candidates"),
        ("inference", "levle", "level"),
        ("inference", "bootstraps", "bootstrap"),
        ("output", "run", "runs"),
    ],
)
def test_unknown_key_in_each_table_suggests(project: Project, table: str, bad: str,
                                            good: str) -> None:
    def change(s: dict) -> None:
        t = s.setdefault(table, {})
        # when the misspelt key replaces a required one, drop the correct key too
        if good in t:
            t[bad] = t.pop(good)
        else:
            t[bad] = 1
        if table == "models" and bad == "candidate":
            t[bad] = ["cournot"]

    project.edit(change)
    msg = assert_user_error(project.check(), str(project.study), f"'{table}.{bad}'",
                            f"'{good}'")
    assert "did you mean" in msg or "misspel" in msg


def test_misspelt_required_key_points_to_the_right_name(project: Project) -> None:
    # `instrument` instead of the required `instruments`
    project.edit(lambda s: s["demand"].update(instrument=s["demand"].pop("instruments")))
    assert_user_error(project.check(), "'demand.instruments' is missing",
                      "'demand.instrument'", "did you mean 'instruments'?")


def test_unknown_key_in_candidate_table(project: Project) -> None:
    project.edit(lambda s: s.update(models={"candidates": [{"name": "half", "theeta": 0.5}]}))
    assert_user_error(project.check(), "models.candidates[1]", "theeta", "'theta'")


# ---------------------------------------------------------------------------- wrong types


@pytest.mark.parametrize(
    ("table", "key", "value", "needle"),
    [
        ("panel", "price", 3, "non-empty string"),
        ("panel", "file", ["panel.csv"], "non-empty string"),
        ("panel", "drop_missing", 1, "true or false"),
        ("panel", "drop_missing", "yes", "true or false"),
        ("demand", "instruments", 7, "list of column names"),
        ("demand", "instruments", "diesel", 'e.g. ["diesel"]'),
        ("demand", "effects", "market", 'e.g. ["market"]'),
        ("supply", "cost_shifters", "diesel", "bare string"),
        ("demand", "shifters", ["income", 2], "list of column names"),
        ("demand", "shifters", ["income", "income"], "more than once"),
        ("demand", "hac_lags", 2.5, "integer"),
        ("demand", "hac_lags", -1, "zero or positive"),
        ("supply", "cost_slope", 1, "true or false"),
        ("supply", "cost_slope", "false", "true or false"),
        ("models", "candidates", "cournot", "non-empty list"),
        ("models", "candidates", [], "non-empty list"),
        ("models", "candidates", [3], "item 1"),
        ("inference", "level", 1.5, "[0.5, 1)"),
        ("inference", "level", 0.2, "[0.5, 1)"),
        ("inference", "level", True, "[0.5, 1)"),
        ("inference", "level", "95%", "[0.5, 1)"),
        ("inference", "bootstrap", -5, "positive count"),
        ("inference", "bootstrap", 99.5, "integer"),
        ("inference", "seed", "one", "integer"),
        ("output", "runs", 5, "non-empty string"),
    ],
)
def test_wrong_type_names_key_and_file(project: Project, table: str, key: str, value: object,
                                       needle: str) -> None:
    project.edit(lambda s: s.setdefault(table, {}).update({key: value}))
    assert_user_error(project.check(), str(project.study), f"'{table}.{key}'", needle)


def test_title_must_be_string(project: Project) -> None:
    project.edit(lambda s: s.update(title=12))
    assert_user_error(project.check(), "'title'", "non-empty string")


def test_table_given_as_value(project: Project) -> None:
    project.write_study(text='panel = "panel.csv"\n[demand]\ninstruments = ["diesel"]\n')
    assert_user_error(project.check(), "'panel' must be a table")


# ---------------------------------------------------------------------------- required keys


@pytest.mark.parametrize("key", ["file", "period", "price", "quantity"])
def test_missing_required_panel_key(project: Project, key: str) -> None:
    project.edit(lambda s: s["panel"].pop(key))
    assert_user_error(project.check(), str(project.study),
                      f"required key 'panel.{key}' is missing")


def test_missing_demand_instruments(project: Project) -> None:
    project.edit(lambda s: s["demand"].pop("instruments"))
    assert_user_error(project.check(), "required key 'demand.instruments' is missing")


def test_empty_demand_instruments(project: Project) -> None:
    project.edit(lambda s: s["demand"].update(instruments=[]))
    assert_user_error(project.check(), "'demand.instruments'", "is empty")


@pytest.mark.parametrize("table", ["panel", "demand"])
def test_missing_required_table(project: Project, table: str) -> None:
    project.edit(lambda s: s.pop(table))
    assert_user_error(project.check(), str(project.study), f"required table [{table}]")


def test_market_may_be_left_out(project: Project) -> None:
    one = project.frame[project.frame.region == 1].drop(columns="region")
    project.write_csv(one)

    def change(s: dict) -> None:
        s["panel"].pop("market")
        s["demand"].update(effects=[], errors="hac")

    project.edit(change)
    res = project.check()
    assert res.code == 0, res.err
    assert "markets 1, periods 12" in res.out


# ---------------------------------------------------------------------------- choices


def test_bad_estimator_lists_allowed_values(project: Project) -> None:
    project.edit(lambda s: s["demand"].update(estimator="3sls"))
    assert_user_error(project.check(), "'demand.estimator'", "'3sls'", "2sls, liml, gmm")


@pytest.mark.parametrize(
    ("key", "value", "allowed"),
    [
        ("form", "loglinear", "linear, log"),
        ("errors", "clustered", "cluster, robust, homoskedastic, hac"),
        ("effects", ["market", "year"], "market, period"),
    ],
)
def test_bad_choice_lists_allowed_values(project: Project, key: str, value: object,
                                         allowed: str) -> None:
    project.edit(lambda s: s["demand"].update({key: value}))
    assert_user_error(project.check(), f"'demand.{key}'", allowed)


def test_bad_choice_suggests_near_value(project: Project) -> None:
    project.edit(lambda s: s["demand"].update(errors="robst"))
    assert_user_error(project.check(), "did you mean 'robust'?")


# ---------------------------------------------------------------------------- paths


def test_paths_resolve_relative_to_study_file(project: Project, tmp_path: Path,
                                              monkeypatch: pytest.MonkeyPatch) -> None:
    sub = tmp_path / "study"
    sub.mkdir()
    (sub / "data").mkdir()
    project.frame.to_csv(sub / "data" / "p.csv", index=False)

    def change(s: dict) -> None:
        s["panel"]["file"] = "data/p.csv"
        s["output"] = {"runs": "out/runs"}

    spec_path = project.edit(change)
    target = sub / "study.toml"
    spec_path.rename(target)
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    monkeypatch.chdir(elsewhere)
    res = project.run("estimate", "../study/study.toml", "--json")
    assert res.code == 0, res.err
    summary = json.loads(res.out)
    assert summary["data"]["file"] == "p.csv"
    assert (sub / "out" / "runs" / "history.sqlite").exists()
    assert not (elsewhere / "out").exists()
    assert not (elsewhere / "runs").exists()
    study = load_study(target)
    assert study.panel.file == (sub / "data" / "p.csv").resolve()


def test_data_file_missing_is_named_relative_to_study(project: Project) -> None:
    project.edit(lambda s: s["panel"].update(file="nowhere.csv"))
    assert_user_error(project.check(), str(project.root / "nowhere.csv"), "does not exist",
                      "relative to the study file")


def test_study_file_missing(project: Project) -> None:
    res = project.run("check", project.root / "nope.toml")
    assert_user_error(res, "nope.toml", "does not exist")


def test_study_file_is_a_directory(project: Project) -> None:
    assert_user_error(project.run("check", project.root), str(project.root), "is a directory")


def test_study_file_not_utf8(project: Project) -> None:
    project.study.write_bytes(b'title = "caf\xe9"\n')
    assert_user_error(project.check(), str(project.study), "not UTF-8")


def test_study_file_with_bom_is_fine(project: Project) -> None:
    project.study.write_bytes(b"\xef\xbb\xbf" + project.study.read_bytes())
    assert project.check().code == 0


@pytest.mark.parametrize("name", ["panel.txt", "panel.xls", "panel"])
def test_unsupported_data_suffix(project: Project, name: str) -> None:
    project.edit(lambda s: s["panel"].update(file=name))
    assert_user_error(project.check(), "'panel.file'", name, ".csv, .parquet")


# ---------------------------------------------------------------------------- roles


def test_same_column_in_two_panel_roles(project: Project) -> None:
    project.edit(lambda s: s["panel"].update(quantity="price"))
    assert_user_error(project.check(), "'price'", "panel.price", "panel.quantity")


@pytest.mark.parametrize(
    ("table", "key", "column", "role"),
    [
        ("demand", "shifters", "price", "panel.price"),
        ("demand", "instruments", "tonnes", "panel.quantity"),
        ("supply", "cost_shifters", "region", "panel.market"),
    ],
)
def test_panel_role_column_reused_as_variable(project: Project, table: str, key: str,
                                              column: str, role: str) -> None:
    project.edit(lambda s: s[table].update({key: [*s[table].get(key, []), column]}))
    assert_user_error(project.check(), f"'{column}'", role, f"{table}.{key}")


def test_instrument_repeating_a_shifter(project: Project) -> None:
    project.edit(lambda s: s["demand"].update(instruments=["diesel", "income"]))
    assert_user_error(project.check(), "'demand.instruments'", "income", "shifter")


def test_rotator_repeating_a_shifter(project: Project) -> None:
    project.edit(lambda s: s["demand"].update(rotators=["income"]))
    assert_user_error(project.check(), "income", "demand.rotators", "demand.shifters")


def test_cost_shifter_repeating_a_demand_shifter(project: Project) -> None:
    """A variable in both equations is allowed but is no longer a supply instrument.

    Here it was the only demand shifter, so the supply relation is left without an
    excluded instrument and the identification check says so.
    """
    project.edit(lambda s: s["supply"].update(cost_shifters=["diesel", "income"]))
    assert_user_error(project.check(), "excluded instrument", "Q*")


def test_supply_instrument_repeating_a_cost_shifter(project: Project) -> None:
    project.edit(lambda s: s["supply"].update(instruments=["diesel"]))
    assert_user_error(project.check(), "'diesel'", "supply.instruments",
                      "supply.cost_shifters")


# ---------------------------------------------------------------------------- candidates


def test_user_candidate_is_accepted_and_tested(project: Project) -> None:
    project.edit(lambda s: s.update(models={"candidates": [
        "competitive", "cournot", {"name": "half", "theta": 0.5}]}))
    res = project.check()
    assert res.code == 0, res.err
    assert "models    competitive, cournot, half" in res.out
    res = project.estimate("--json")
    assert res.code == 0, res.err
    tests = json.loads(res.out)["conduct"]["tests"]
    assert set(tests) == {"competitive", "cournot", "half"}


@pytest.mark.parametrize("theta", [-0.1, 1.5])
def test_user_candidate_theta_out_of_range(project: Project, theta: float) -> None:
    project.edit(lambda s: s.update(models={"candidates": [{"name": "odd", "theta": theta}]}))
    assert_user_error(project.check(), "'models.candidates[1].theta'", "[0, 1]")


def test_user_candidate_theta_not_a_number(project: Project) -> None:
    project.edit(lambda s: s.update(models={"candidates": [{"name": "odd", "theta": "0.5"}]}))
    assert_user_error(project.check(), "'models.candidates[1].theta'", "finite number")


def test_user_candidate_without_theta(project: Project) -> None:
    project.edit(lambda s: s.update(models={"candidates": ["cournot", {"name": "odd"}]}))
    assert_user_error(project.check(), "required key 'models.candidates[2].theta'")


def test_user_candidate_with_builtin_name(project: Project) -> None:
    project.edit(lambda s: s.update(models={"candidates": [{"name": "cournot",
                                                             "theta": 0.3}]}))
    assert_user_error(project.check(), "'models.candidates[1].name'", "built-in")


def test_unknown_builtin_model_suggests(project: Project) -> None:
    project.edit(lambda s: s.update(models={"candidates": ["competitive", "cournt"]}))
    assert_user_error(project.check(), "'models.candidates'", "item 2", "'cournt'",
                      "did you mean 'cournot'?", "theta")


def test_duplicate_candidate_names(project: Project) -> None:
    project.edit(lambda s: s.update(models={"candidates": [
        "cournot", {"name": "x", "theta": 0.2}, {"name": "x", "theta": 0.4}]}))
    assert_user_error(project.check(), "'models.candidates'", "x more than once")


# ---------------------------------------------------------------------------- library API


def test_library_raises_study_file_error(tmp_path: Path) -> None:
    with pytest.raises(StudyFileError, match=r"unknown key 'panel\.colour'"):
        parse_study('[panel]\nfile="a.csv"\nperiod="t"\nprice="p"\nquantity="q"\n'
                    'colour="red"\n[demand]\ninstruments=["w"]\n', tmp_path / "s.toml")


def test_study_is_frozen_and_nothing_is_evaluated(tmp_path: Path) -> None:
    text = ('title = "__import__(\'os\').system(\'exit 1\')"\n[panel]\nfile="a.csv"\n'
            'period="t"\nprice="p"\nquantity="q"\n[demand]\ninstruments=["w"]\n')
    study = parse_study(text, tmp_path / "s.toml")
    assert study.title.startswith("__import__")
    with pytest.raises(AttributeError):
        study.title = "other"  # type: ignore[misc]
