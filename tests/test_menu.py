"""The Rivers-Vuong menu test on markets simulated with known conduct.

Panels come from :mod:`conduct.simulate` with symmetric firms (``firm_cost_sd =
0``), so the industry supply relation ``P = MC + theta Q*`` holds with the
planted theta and a cost shock independent of the instruments.  Default runs
use one seed per design (a few seconds in all); the Monte Carlo checks behind
``@pytest.mark.slow`` repeat them over seeds and print the rates they measure.
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

import numpy as np
import pytest

from conduct.demand import DemandResult, estimate_demand
from conduct.errors import ConductError, DataError, EstimationError
from conduct.iv import CovSpec
from conduct.menu import MenuResult, menu_test
from conduct.menu_stats import (
    CRITICAL_VALUES,
    critical_values,
    lack_of_fit,
    limit_draws,
    orthonormal,
    pair_stats,
    weak_bounds,
)
from conduct.panel import MARKET, Panel, load_panel
from conduct.presets import write_study
from conduct.simulate import SimulationSpec
from conduct.study import Candidate, Study, load_study
from conduct.supply import SupplyResult, benchmark_h, estimate_supply

# Symmetric firms, integer periods, 40 markets x 40 periods (the simulator's default size).
BASE = {"firm_cost_sd": 0.0, "first_quarter": None}
# The misspecified design: theta 0.6 with 3 sellers (Cournot theta = H = 1/3, collusion 1),
# smaller demand shocks so that the instruments explain more of Q*.
MISSPEC = {"conduct": 0.6, "sellers": (3, 3), "demand_shock_sd": 400.0}
# Weak instruments for testing: no demand rotation and a free cost slope (Bresnahan 1982):
# every markup theta Q* = theta Q / |a_p| is then collinear with the cost slope term.
WEAK = {"rotator_strength": 0.0, "cost_slope": 0.002}
# Nominal level of the tests; Monte Carlo rejection rates of a 5% test with R draws have
# standard error sqrt(0.05 * 0.95 / R) (0.015 at R = 200), so "near nominal" allows 0.05
# plus about three standard errors.
ALPHA = 0.05
# Cluster-bootstrap standard deviation of Q_a - Q_b against the analytic one: with B = 200
# replicates the bootstrap sd has a relative standard error of about 1/sqrt(2B) = 5%.
BOOT_RATIO = (0.8, 1.25)
# Sampling sd against the analytic se with 400 Monte Carlo draws: the sd's relative
# standard error is about 1/sqrt(800) = 3.5%, so +-10% is three standard errors.
MC_SD_RATIO = (0.9, 1.1)
# Rejection rate of a 5% test with 40,000 limit draws: standard error 0.0011.
LIMIT_SIZE_TOL = 0.006


def near_nominal(rate: float, runs: int) -> bool:
    """A 5% test's rejection rate within three Monte Carlo standard errors above nominal."""
    return rate <= ALPHA + 3 * np.sqrt(ALPHA * (1 - ALPHA) / runs)


def simulate_study(root: Path, **changes: object) -> tuple[Study, Panel]:
    """Write a simulated study under ``root`` and load it."""
    spec = SimulationSpec(**{**BASE, **changes})  # type: ignore[arg-type]
    study = load_study(write_study(root, spec))
    return study, load_panel(study)


def fit_all(study: Study, panel: Panel, *, tests: bool = False,
            ) -> tuple[DemandResult, SupplyResult, MenuResult]:
    """Demand, supply and the menu test."""
    demand = estimate_demand(panel, study, diagnostics=False)
    supply = estimate_supply(panel, study, demand, with_tests=tests)
    return demand, supply, menu_test(panel, study, demand, supply)


def favours(menu: MenuResult, model: str) -> bool:
    """T has the sign favouring ``model`` in every pair that contains it."""
    return all((p.t_rv < 0) == (p.a == model) for p in menu.pairs if model in (p.a, p.b))


@pytest.fixture(scope="module")
def strong(tmp_path_factory: pytest.TempPathFactory) -> dict[str, tuple]:
    """One strong-instrument panel per true conduct (seed 1), fitted."""
    out = {}
    for truth in ("competitive", "cournot", "collusive"):
        study, panel = simulate_study(tmp_path_factory.mktemp(truth), conduct=truth, seed=1)
        out[truth] = (study, panel, *fit_all(study, panel))
    return out


# ----------------------------------------------------------------------------------------
# Recovery with strong instruments
# ----------------------------------------------------------------------------------------


@pytest.mark.parametrize("truth", ["competitive", "cournot", "collusive"])
def test_strong_instruments_pick_the_true_model(strong, truth):
    menu = strong[truth][-1]
    assert menu.models == ("competitive", "cournot", "collusive")
    assert menu.best == (truth,)
    assert favours(menu, truth)
    for p in menu.pairs:
        if truth in (p.a, p.b):
            assert p.better == truth and not p.weak
            assert p.p < ALPHA and p.f > 0
    assert menu.reading().startswith(f"{truth} fits the data significantly better than")


@pytest.mark.slow
@pytest.mark.parametrize("truth", ["competitive", "cournot", "collusive"])
def test_strong_instruments_over_seeds(tmp_path, truth):
    hits, signs, runs = 0, 0, 0
    for seed in range(1, 31):
        try:
            study, panel = simulate_study(tmp_path, conduct=truth, seed=seed)
        except ConductError:  # the simulator found no interior equilibrium for this draw
            continue
        menu = fit_all(study, panel)[2]
        runs += 1
        hits += menu.best == (truth,)
        signs += favours(menu, truth)
    print(f"\n{truth}: best is the truth in {hits}/{runs} seeds, T signs right in {signs}/{runs}")
    assert runs >= 25
    assert hits >= 0.8 * runs
    assert signs == runs


# ----------------------------------------------------------------------------------------
# Misspecification: the truth is outside the menu
# ----------------------------------------------------------------------------------------


def _side_by_side(menu: MenuResult, supply: SupplyResult) -> str:
    lines = ["model        Wald stat   Wald p   | RV pair              T      p"]
    rv = {(p.a, p.b): p for p in menu.pairs}
    for t, (pair, p) in zip(supply.tests, rv.items(), strict=False):
        lines.append(f"{t.name:<12} {t.stat:9.2f} {t.p:8.4f}   | {pair[0]:>11} vs {pair[1]:<10}"
                     f"{p.t_rv:6.2f} {p.p:6.3f}")
    return "\n".join(lines)


def test_misspecified_truth_favours_the_closer_model(tmp_path):
    # theta = 0.6: Cournot (theta = H = 1/3) is closer than collusion (theta = 1).
    study, panel = simulate_study(tmp_path, seed=2, **MISSPEC)
    _, supply, menu = fit_all(study, panel, tests=True)
    print("\n" + _side_by_side(menu, supply))
    wald = {t.name: t for t in supply.tests}
    # model assessment rejects every candidate ...
    assert all(t.rejected for t in wald.values())
    # ... while model selection still points to the closer one
    pair = next(p for p in menu.pairs if (p.a, p.b) == ("cournot", "collusive"))
    assert pair.t_rv < 0 and pair.better == "cournot" and not pair.weak
    assert menu.best == ("cournot",)


@pytest.mark.slow
def test_misspecified_truth_over_seeds(tmp_path):
    runs = cournot_sign = cournot_better = collusive_better = both_rejected = 0
    for seed in range(1, 31):
        try:
            study, panel = simulate_study(tmp_path, seed=seed, **MISSPEC)
        except ConductError:
            continue
        _, supply, menu = fit_all(study, panel, tests=True)
        runs += 1
        pair = next(p for p in menu.pairs if (p.a, p.b) == ("cournot", "collusive"))
        cournot_sign += pair.t_rv < 0
        cournot_better += pair.better == "cournot"
        collusive_better += pair.better == "collusive"
        rejected = {t.name for t in supply.tests if t.rejected}
        both_rejected += {"cournot", "collusive"} <= rejected
    print(f"\ntheta 0.6 ({runs} seeds): Wald rejects both Cournot and collusion in "
          f"{both_rejected}; RV T favours Cournot in {cournot_sign}, significantly in "
          f"{cournot_better}; significantly favours collusion in {collusive_better}")
    assert runs >= 25
    assert both_rejected >= 0.8 * runs
    assert cournot_sign >= 0.9 * runs
    assert collusive_better == 0


# ----------------------------------------------------------------------------------------
# Weak instruments for testing
# ----------------------------------------------------------------------------------------


def test_weak_instruments_are_flagged(tmp_path):
    study, panel = simulate_study(tmp_path, conduct="cournot", seed=1, **WEAK)
    menu = fit_all(study, panel)[2]
    assert menu.sets[0].df == 2  # three instruments, one used by the cost slope
    for p in menu.pairs:
        assert p.weak and p.power_bound is None
        assert p.f < CRITICAL_VALUES[2][1][0]
    assert "weak for testing" in menu.reading()


def _equal_fit_rejections(root: Path, seeds: range, **changes: object) -> tuple[int, int, list]:
    """Rejections of the RV test between theta 0.3 and 0.7 when the truth is 0.5."""
    cands = (Candidate("low", 0.3), Candidate("high", 0.7))
    runs, rejections, fs = 0, 0, []
    for seed in seeds:
        try:
            study, panel = simulate_study(root, conduct=0.5, seed=seed, **changes)
        except ConductError:
            continue
        study = dataclasses.replace(study, candidates=cands)
        pair = fit_all(study, panel)[2].pairs[0]
        runs += 1
        rejections += pair.p < ALPHA
        fs.append(pair.f)
    return runs, rejections, fs


@pytest.mark.slow
@pytest.mark.parametrize("design", ["strong", "weak"])
def test_equal_fit_rejection_rate_near_nominal(tmp_path, design):
    changes = WEAK if design == "weak" else {}
    runs, rejections, fs = _equal_fit_rejections(tmp_path, range(1, 201), **changes)
    rate = rejections / runs
    print(f"\nequal fit, {design} instruments: rejection rate {rate:.3f} over {runs} seeds "
          f"(nominal {ALPHA}); median F {np.median(fs):.2f}")
    assert runs >= 180
    assert near_nominal(rate, runs)


# ----------------------------------------------------------------------------------------
# The variance: influence functions against Monte Carlo and the cluster bootstrap
# ----------------------------------------------------------------------------------------


def test_influence_variance_and_size_by_monte_carlo():
    """Pure arrays, no demand stage: se of Q_a - Q_b against its sampling sd, and size."""
    rng = np.random.default_rng(3)
    n, reps = 400, 400
    diffs, ses, rejections = [], [], 0
    zero = np.zeros((n, 1))
    rows = np.arange(n)
    robust = CovSpec(kind="robust")
    for _ in range(reps):
        z = rng.normal(size=(n, 3))
        x = z @ np.array([0.4, -0.3, 0.2]) + rng.normal(size=n)  # a markup regressor
        omega = rng.normal(size=n) * (1 + 0.5 * np.abs(z[:, 0]))  # heteroskedastic cost
        zw = orthonormal(z, what="instruments")
        # model a closer to the truth than model b
        fa = lack_of_fit(zw, omega + 0.2 * x, zero, zero, rows, n)
        fb = lack_of_fit(zw, omega - 0.5 * x, zero, zero, rows, n)
        diffs.append(fa.q - fb.q)
        ses.append(pair_stats(fa, fb, robust, 0).se)
        # equal fit: the two models miss the truth by the same amount in opposite directions
        fa = lack_of_fit(zw, omega + 0.3 * x, zero, zero, rows, n)
        fb = lack_of_fit(zw, omega - 0.3 * x, zero, zero, rows, n)
        rejections += abs(pair_stats(fa, fb, robust, 0).t) > 1.959964
    ratio = np.std(diffs, ddof=1) / np.sqrt(np.mean(np.square(ses)))
    assert MC_SD_RATIO[0] < ratio < MC_SD_RATIO[1]
    assert rejections / reps > 0.01 and near_nominal(rejections / reps, reps)


def test_demand_estimation_enters_the_variance(strong):
    study, panel, demand, supply, menu = strong["collusive"]
    without = menu_test(panel, study, dataclasses.replace(
        demand, fit=dataclasses.replace(demand.fit, influence=np.zeros_like(
            demand.fit.influence))), supply)
    change = []
    for full, naive in zip(menu.pairs, without.pairs, strict=True):
        assert full.q_a == naive.q_a and full.q_b == naive.q_b
        change.append(abs(naive.t_rv / full.t_rv - 1))
    # the demand coefficients in Q* move both models' moments: leaving them out changes
    # the standard errors (in either direction: the two sources of noise are correlated)
    assert max(change) > 0.02


def resample_markets(panel: Panel, rng: np.random.Generator) -> Panel:
    """Markets drawn with replacement; each draw becomes a market of its own."""
    f = panel.frame
    codes = np.unique(f[MARKET].to_numpy(), return_inverse=True)[1]
    order = np.argsort(codes, kind="stable")
    bounds = np.searchsorted(codes[order], np.arange(codes.max() + 2))
    draws = rng.integers(0, codes.max() + 1, codes.max() + 1)
    idx = np.concatenate([order[bounds[g]:bounds[g + 1]] for g in draws])
    label = np.repeat(np.arange(len(draws)), np.diff(bounds)[draws])
    frame = f.iloc[idx].reset_index(drop=True)
    frame[MARKET] = np.array([f"draw{j:03d}" for j in label], dtype=object)
    return dataclasses.replace(panel, frame=frame, source_rows=np.arange(len(frame)) + 2)


@pytest.mark.slow
def test_sigma_matches_cluster_bootstrap(strong):
    study, panel, *_, menu = strong["cournot"]
    rng = np.random.default_rng(20)
    diffs = []
    for _ in range(200):
        boot = resample_markets(panel, rng)
        d_b = estimate_demand(boot, study, diagnostics=False)
        s_b = estimate_supply(boot, study, d_b, with_tests=False)
        diffs.append([p.q_a - p.q_b for p in menu_test(boot, study, d_b, s_b).pairs])
    boot_sd = np.std(np.asarray(diffs), axis=0, ddof=1)
    analytic = np.array([(p.q_a - p.q_b) / p.t_rv for p in menu.pairs])
    print(f"\nse of Q_a - Q_b: analytic {np.round(analytic, 3)}, bootstrap {np.round(boot_sd, 3)}")
    ratio = boot_sd / analytic
    assert np.all((ratio > BOOT_RATIO[0]) & (ratio < BOOT_RATIO[1])), ratio


# ----------------------------------------------------------------------------------------
# Instrument sets, degenerate pairs, messages
# ----------------------------------------------------------------------------------------


def test_several_instrument_sets(strong):
    study, panel, demand, supply, _ = strong["cournot"]
    sets = {"all": supply.instruments,
            "rotator": ("winter_severity", "highway_km*winter_severity")}
    menu = menu_test(panel, study, demand, supply, instrument_sets=sets)
    assert [s.name for s in menu.sets] == ["all", "rotator"]
    assert menu.pairs == menu.sets[0].pairs and menu.best == menu.sets[0].best
    assert menu.sets[1].df == 2 and len(menu.sets[1].pairs) == 3
    text = menu.reading()
    assert text.startswith("With all, ") and "; with rotator, " in text and text.endswith(".")
    table = menu.table()
    assert list(table["set"].unique()) == ["all", "rotator"] and len(table) == 6


def test_identical_markups_make_a_degenerate_pair(strong):
    study, panel, demand, supply, _ = strong["collusive"]
    twin = dataclasses.replace(study, candidates=(Candidate("collusive", 1.0),
                                                  Candidate("monopoly", 1.0),
                                                  Candidate("cournot", None)))
    menu = menu_test(panel, twin, demand, supply)
    pair = menu.pairs[0]
    assert (pair.a, pair.b) == ("collusive", "monopoly")
    assert np.isnan(pair.t_rv) and pair.p == 1.0 and pair.weak and pair.better is None
    assert set(menu.best) == {"collusive", "monopoly"}


def test_cournot_without_concentration_is_skipped(strong):
    study, panel, demand, supply, _ = strong["cournot"]
    menu = menu_test(panel, study, demand, dataclasses.replace(supply, h=None))
    assert menu.models == ("competitive", "collusive")
    assert "cournot" in menu.skipped[0]


def test_bad_inputs_are_named(strong):
    study, panel, demand, supply, _ = strong["cournot"]
    with pytest.raises(DataError, match=r"'diesle'.*not a column"):
        menu_test(panel, study, demand, supply, instrument_sets={"typo": ["diesle"]})
    # the supply stage's internal columns (Q*, quantity, P - markup) are not instruments,
    # even though the menu test reuses that stage's absorbed instruments
    for internal in ("Q*", "Q", "_dep:collusive", "_p"):
        with pytest.raises(DataError, match="not a column"):
            menu_test(panel, study, demand, supply,
                      instrument_sets={"inside": [internal, "winter_severity"]})
    # sets are checked in their order: the first set's bad column is named first
    with pytest.raises(DataError, match=r"'diesle'.*not a column"):
        menu_test(panel, study, demand, supply, instrument_sets={"a": ["diesle"], "b": []})
    with pytest.raises(EstimationError, match="only 1 can be tested"):
        menu_test(panel, dataclasses.replace(study, candidates=(Candidate("cournot", None),)),
                  demand, supply)
    assert study.supply is not None
    sloped = dataclasses.replace(study, supply=dataclasses.replace(study.supply,
                                                                   cost_slope=True))
    with pytest.raises(EstimationError, match="at least two instruments"):
        menu_test(panel, sloped, demand, supply, instrument_sets={"one": ["winter_severity"]})


def test_benchmark_h_is_what_cournot_uses(strong):
    study, panel, _, supply, _ = strong["cournot"]
    np.testing.assert_array_equal(supply.h, benchmark_h(panel, study))


# ----------------------------------------------------------------------------------------
# The weak-instrument limit experiment and its critical values
# ----------------------------------------------------------------------------------------


def test_limit_experiment_strong_and_weak():
    rng = np.random.default_rng(0)
    d, reps = 3, 40_000
    e_a, e_b = rng.standard_normal((reps, d)), rng.standard_normal((reps, d))
    strong_mu = np.array([30.0, 0.0, 0.0])
    t, f = limit_draws(d, 0.5, 1.0, strong_mu, np.array([0.0, 30.0, 0.0]), e_a, e_b)
    # equal fit with strong instruments: nominal size
    assert abs(np.mean(np.abs(t) > 1.96) - ALPHA) < LIMIT_SIZE_TOL
    assert np.median(f) > 100
    t, f = limit_draws(d, 0.5, 1.0, np.zeros(d), np.zeros(d), e_a, e_b)
    assert np.mean(np.abs(t) > 1.96) < 0.01 and np.median(f) < 1  # no signal: no rejections


def test_weak_bounds_classify():
    assert weak_bounds(0.5, 3) == (True, 0.075, None)
    weak, size, power = weak_bounds(50.0, 3)
    assert not weak and size == 0.075 and power == 0.95
    assert weak_bounds(6.0, 3) == (False, 0.075, 0.5)
    # one instrument: size is at risk until F is large
    assert weak_bounds(15.0, 1)[1] == 0.125 and weak_bounds(15.0, 1)[0]
    assert weak_bounds(40.0, 1) == (False, 0.075, 0.95)
    # more instruments than the table has: the last row
    assert weak_bounds(2.5, 25) == weak_bounds(2.5, 10)


@pytest.mark.slow
@pytest.mark.parametrize("d", [1, 3])
def test_critical_values_reproduce(d):
    assert critical_values(d) == CRITICAL_VALUES[d]
