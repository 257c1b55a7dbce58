"""Numerical traps: units, near-singular designs, weak first stages, wrong-signed slopes.

Rescaling price or quantity (cents instead of units, thousands of tonnes instead of
tonnes) must not change anything that has no units: elasticities, theta (the supply
relation ``P = MC + theta Q/|dQ/dP|`` has price units on both sides), test
statistics, p-values, verdicts, first-stage F, Lerner indexes.  Quantities in price
units (marginal cost, markups, cost coefficients) scale with the price factor, and the
demand slope with the quantity/price ratio.

Near-singular designs must be reported with their numbers, and a demand slope of the
wrong sign at some rows must be reported with its share and give those rows no markup
(NaN), never a negative one.
"""

from __future__ import annotations

import contextlib
import io
import json
import re
import shutil
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
from conftest import Project, assert_user_error, cournot_frame

from conduct.cli import main

#: Rescaling by powers of ten changes only floating-point rounding: differences seen are
#: ~1e-13 relative.  1e-7 leaves room for iterative steps (interval bounds found by
#: root-finding) while catching any real unit dependence, which would be of order 1.
RTOL = 1e-7
#: Absolute floor for values that are zero up to rounding (shares of 0, deltas near 0).
ATOL = 1e-10

#: Parts of summary.json that carry units or identify the run, and are not compared as
#: invariant: (path prefix, why).
NOT_INVARIANT: dict[tuple[str, ...], str] = {
    ("provenance",): "run metadata",
    ("run",): "run metadata",
    ("title",): "same text, not a number",
    ("data", "changes"): "compares with the previous run in the same folder",
    ("data", "changes_line"): "compares with the previous run in the same folder",
    ("demand", "coefficients"): "in units of quantity over price (checked below)",
    ("demand", "ar_set"): "a set for the price coefficient, which carries units",
    ("conduct", "coefficients"): "cost coefficients carry price units (theta checked)",
    ("costs", "marginal_cost_mean"): "in price units (checked below)",
}
#: Keys anywhere in summary.json whose values carry units (or identify a file): key -> why.
UNIT_KEYS = {
    "sha256": "a different file",
    "q_a": "menu-test lack of fit, in squared price units (the t statistic is unitless)",
    "q_b": "menu-test lack of fit, in squared price units (the t statistic is unitless)",
    "lack_of_fit": "menu-test lack of fit per model, in squared price units",
}
RESCALINGS = [("price", 100.0), ("price", 1e-3), ("tonnes", 100.0), ("tonnes", 1e-3)]


def _estimate(folder: Path) -> dict[str, Any]:
    out = io.StringIO()
    with contextlib.redirect_stdout(out):
        code = main(["estimate", str(folder / "study.toml"), "--json"])
    assert code == 0
    return json.loads(out.getvalue())


@pytest.fixture(scope="module")
def simulated(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    """Simulated studies (20 markets x 20 quarters, one rotator), linear and log."""
    root = tmp_path_factory.mktemp("invariance")
    out = {}
    for form in ("linear", "log"):
        assert main(["simulate", "--out", str(root / form), "--markets", "20", "--periods",
                     "20", "--seed", "3", "--form", form, "--quiet"]) == 0
        out[form] = root / form
    return out


@pytest.fixture(scope="module")
def baseline(simulated: dict[str, Path], tmp_path_factory: pytest.TempPathFactory
             ) -> dict[str, tuple[Path, dict[str, Any]]]:
    """Each form estimated once as simulated (filled on first use)."""

    class Lazy(dict[str, tuple[Path, dict[str, Any]]]):
        def __missing__(self, form: str) -> tuple[Path, dict[str, Any]]:
            folder = _rescaled(simulated[form], tmp_path_factory.mktemp(f"base-{form}"),
                               None, 1.0)
            self[form] = (folder, _estimate(folder))
            return self[form]

    return Lazy()


def _rescaled(src: Path, dst: Path, column: str | None, factor: float) -> Path:
    dst.mkdir(exist_ok=True)
    shutil.copy(src / "study.toml", dst / "study.toml")
    f = pd.read_csv(src / "panel.csv")
    if column is not None:
        f[column] = f[column] * factor
    f.to_csv(dst / "panel.csv", index=False)  # full precision: repr round trip
    return dst


def _leaves(doc: Any, path: tuple[str, ...] = ()) -> Iterator[tuple[tuple[str, ...], Any]]:
    if isinstance(doc, dict):
        for k in sorted(doc):
            yield from _leaves(doc[k], (*path, str(k)))
    elif isinstance(doc, list):
        for i, v in enumerate(doc):
            yield from _leaves(v, (*path, str(i)))
    else:
        yield path, doc


def _skipped(path: tuple[str, ...]) -> bool:
    if any(part in UNIT_KEYS for part in path):
        return True
    return any(path[:len(p)] == p for p in NOT_INVARIANT)


def _assert_invariant(base: dict[str, Any], other: dict[str, Any]) -> int:
    a = dict(_leaves(base))
    b = dict(_leaves(other))
    compared = 0
    for path, x in a.items():
        if _skipped(path):
            continue
        where = ".".join(path)
        assert path in b, f"{where} missing after rescaling"
        y = b[path]
        if isinstance(x, float) and not isinstance(x, bool):
            assert isinstance(y, float | int), where
            if np.isnan(x):
                assert np.isnan(y), where
            else:
                assert y == pytest.approx(x, rel=RTOL, abs=ATOL), where
        else:
            assert y == x, where
        compared += 1
    return compared


def _observations(folder: Path) -> pd.DataFrame:
    (run,) = [p for p in (folder / "runs").iterdir() if p.is_dir()]
    return pd.read_csv(run / "observations.csv")


@pytest.mark.parametrize(("column", "factor"), RESCALINGS,
                         ids=[f"{c}x{f:g}" for c, f in RESCALINGS])
@pytest.mark.parametrize("form", ["linear", pytest.param("log", marks=pytest.mark.slow)])
def test_rescaling_units_changes_nothing_unitless(
        simulated: dict[str, Path], baseline: dict[str, tuple[Path, dict[str, Any]]],
        tmp_path: Path, form: str, column: str, factor: float) -> None:
    base_dir, base = baseline[form]
    other_dir = _rescaled(simulated[form], tmp_path / "scaled", column, factor)
    other = _estimate(other_dir)
    assert base["conduct"]["theta"] is not None
    assert _assert_invariant(base, other) > 50  # elasticities, theta, tests, F, verdict...
    kp = factor if column == "price" else 1.0
    kq = factor if column == "tonnes" else 1.0
    # theta is the Q* coefficient; cost coefficients and marginal cost are in price units
    coef, coef_s = base["conduct"]["coefficients"], other["conduct"]["coefficients"]
    for name, c in coef.items():
        expected = c["estimate"] if name == "Q*" else c["estimate"] * (
            kp / kq if name == "Q" else kp)
        assert coef_s[name]["estimate"] == pytest.approx(expected, rel=RTOL, abs=ATOL), name
    assert other["costs"]["marginal_cost_mean"] == pytest.approx(
        base["costs"]["marginal_cost_mean"] * kp, rel=RTOL)
    if form == "linear":
        assert other["demand"]["coefficients"]["price"]["estimate"] == pytest.approx(
            base["demand"]["coefficients"]["price"]["estimate"] * kq / kp, rel=RTOL)
    # per observation: unitless columns equal, price-unit columns scale
    ob, os_ = _observations(base_dir), _observations(other_dir)
    for col in ob.columns:
        if col.startswith(("elasticity", "lerner_", "theta_", "herfindahl")):
            np.testing.assert_allclose(os_[col], ob[col], rtol=RTOL, atol=ATOL, err_msg=col)
        elif col.startswith(("marginal_cost_", "markup_", "qstar")):
            np.testing.assert_allclose(os_[col], ob[col] * kp, rtol=RTOL, atol=ATOL,
                                       err_msg=col)


# ----------------------------------------------------------------------------------------
# Near-singular designs
# ----------------------------------------------------------------------------------------


def _near_copy(project: Project, noise: float) -> None:
    f = project.frame.copy()
    f["diesel2"] = f["diesel"] + noise * np.random.default_rng(1).normal(size=len(f))
    project.write_csv(f)
    project.edit(lambda s: s["demand"].update(instruments=["diesel", "diesel2"]))


def test_numerically_collinear_instruments_are_refused_with_the_number(
        project: Project) -> None:
    _near_copy(project, 1e-13)  # condition number ~1e13 after scaling
    msg = assert_user_error(project.estimate(), "collinear", "diesel2")
    m = re.search(r"condition number ([0-9.]+e[+-]?\d+)", msg)
    assert m and float(m.group(1)) > 1e10, msg
    assert not project.runs.exists()


def test_ill_conditioned_instruments_are_reported_with_the_number(project: Project) -> None:
    _near_copy(project, 1e-8)  # condition number ~1e8: not collinear, badly conditioned
    res = project.estimate("--json")
    if res.code == 2:
        msg = res.message
    else:
        assert res.code == 0, res.err
        msg = " ".join(json.loads(res.out)["warnings"])
    m = re.search(r"condition number ([0-9.]+e[+-]?\d+)", msg)
    assert m and 1e6 < float(m.group(1)) < 1e11, msg


def test_instrument_with_almost_no_within_variation_is_reported(project: Project) -> None:
    f = project.frame.copy()
    f["depot"] = 1.5 * f["region"] + 1e-9 * np.random.default_rng(2).normal(size=len(f))
    project.write_csv(f)
    project.edit(lambda s: s["demand"].update(instruments=["diesel", "depot"]))
    res = project.estimate("--json")
    if res.code == 2:
        text = res.message
    else:
        assert res.code == 0, res.err
        text = " ".join(json.loads(res.out)["warnings"])
    assert "depot" in text and re.search(r"\d(e-\d+|\.\d+)", text), text


def test_weak_first_stage_is_reported_with_its_f(project: Project) -> None:
    f = project.frame.copy()
    f["noise"] = np.random.default_rng(5).normal(size=len(f))  # unrelated to price
    project.write_csv(f)

    def change(s: dict[str, Any]) -> None:
        s.pop("supply")
        s["demand"].update(instruments=["noise"])

    project.edit(change)
    res = project.estimate("--json")
    assert res.code == 0, res.err
    summary = json.loads(res.out)
    fstat = summary["demand"]["first_stage"]["price"]["f"]
    assert fstat < 10
    weak = [w for w in summary["warnings"] if "first stage" in w.lower() and "price" in w]
    assert weak and f"{fstat:.1f}" in weak[0], summary["warnings"]


# ----------------------------------------------------------------------------------------
# Demand slopes of the wrong sign
# ----------------------------------------------------------------------------------------


def _rotating_frame(markets: int = 12, periods: int = 20, seed: int = 4) -> pd.DataFrame:
    """Demand whose slope -2 + 2.5 R turns positive where the rotator R exceeds 0.8.

    Prices are set by costs (diesel) and noise, so price is a valid instrumented
    regressor; about a fifth of the rows have a positive true slope.
    """
    rng = np.random.default_rng(seed)
    m = np.repeat(np.arange(1, markets + 1), periods)
    t = np.tile(np.arange(periods), markets)
    n = m.size
    r = rng.uniform(0, 1, n)
    diesel = rng.uniform(0, 2, n)
    income = rng.uniform(0, 2, n)
    price = 5 + 2 * diesel + 0.2 * (m % 3) + 0.3 * rng.normal(size=n)
    tonnes = 60 + 3 * income + (-2 + 2.5 * r) * price + 0.5 * rng.normal(size=n)
    return pd.DataFrame({"region": m, "quarter": 2000 + t, "price": price, "tonnes": tonnes,
                         "sellers": 2 + m % 4, "income": income, "diesel": diesel,
                         "winter": r})


def test_wrong_sign_slope_is_reported_and_gets_no_markup(project: Project) -> None:
    project.write_csv(_rotating_frame())
    project.edit(lambda s: s["demand"].update(rotators=["winter"]))
    res = project.estimate("--json")
    assert res.code == 0, res.err
    summary = json.loads(res.out)
    (run,) = [p for p in project.runs.iterdir() if p.is_dir()]
    obs = pd.read_csv(run / "observations.csv")
    wrong = (obs["slope"] >= 0).to_numpy()
    share = float(wrong.mean())
    assert 0.05 < share < 0.5  # the design plants about a fifth
    assert summary["demand"]["wrong_slope_share"] == pytest.approx(share)
    assert any(f"{share:.1%}" in w for w in summary["warnings"]), summary["warnings"]
    markups = [c for c in obs.columns if c.startswith(("markup_", "lerner_", "qstar",
                                                       "marginal_cost_"))]
    assert markups
    assert obs.loc[wrong, markups].isna().all().all()  # no markup where the slope is wrong
    assert obs.loc[~wrong, "qstar"].gt(0).all()
    for col in markups:
        if col.startswith(("markup_", "lerner_")) and col.split("_", 1)[1] != "estimated":
            assert not (obs[col] < 0).any(), col  # candidate thetas are >= 0: never negative
    costs = summary["costs"]
    assert np.isfinite(costs["lerner_mean"]) and np.isfinite(costs["marginal_cost_mean"])


def test_wrong_sign_rows_through_the_python_api(project: Project) -> None:
    """Same trap through the Python API: NaN never turns into a number downstream."""
    import conduct

    project.write_csv(_rotating_frame())
    project.edit(lambda s: s["demand"].update(rotators=["winter"]))
    res = conduct.estimate(project.study)
    obs = res.derived.observations
    wrong = obs["slope"].to_numpy() >= 0
    assert np.isnan(obs.loc[wrong, "markup_cournot"]).all()
    assert np.isnan(res.supply.qstar[wrong]).all()
    assert res.demand.wrong_sign_share == pytest.approx(wrong.mean())


def test_all_wrong_signs_refused(project: Project) -> None:
    """When the slope is positive nearly everywhere the supply relation is refused."""
    f = cournot_frame()
    f["tonnes"] = 10 + 2 * f["price"] + np.random.default_rng(3).normal(size=len(f))
    project.write_csv(f)
    assert_user_error(project.estimate(), "demand slope", "negative")
    assert not project.runs.exists()
