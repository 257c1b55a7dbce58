"""The equilibrium generator, its truth files and the demo study.

Recovery of planted conduct by the estimator is tested elsewhere; here we test
that the planted equilibria are exactly what they claim to be.
"""

from __future__ import annotations

import dataclasses
import json
import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from conduct.errors import ConductError
from conduct.presets import (
    PRESETS,
    parse_conduct,
    parse_episodes,
    run_simulate,
    write_study,
)
from conduct.simulate import Episode, SimulationSpec, simulate, solve_market, validate_spec

# First-order conditions in price units (prices are ~50-300): the issue asks for 1e-8;
# closed forms hit ~1e-12 and bisection on ln P stops at a few ulps.
FOC_TOL = 1e-8
# Market clearing relative to quantity (quantities are ~1e3-1e5).
CLEARING_RTOL = 1e-10
# Textbook closed forms against the solver: same arithmetic, different order.
CLOSED_FORM_RTOL = 1e-12

ROOT = Path(__file__).resolve().parents[1]
SMALL = SimulationSpec(markets=5, periods=8, seed=11)


def _check_observations(sim) -> None:
    """Every observation satisfies its conduct's conditions and clears the market."""
    spec, tr, f = sim.spec, sim.truth, sim.firms
    cq_firm = spec.cost_slope if spec.cost_slope_scope == "firm" else 0.0
    cq_ind = spec.cost_slope if spec.cost_slope_scope == "industry" else 0.0
    for i in range(len(tr["price"])):
        p, q_tot, slope = tr["price"][i], tr["quantity"][i], tr["dq_dp"][i]
        present = f["present"][i]
        q = f["output"][i][present]
        c = f["cost"][i][present]
        active = q > 0
        mc = c + cq_firm * q + cq_ind * q_tot
        np.testing.assert_allclose(mc, f["marginal_cost"][i][present], rtol=0, atol=1e-9)
        assert q.sum() == pytest.approx(q_tot, rel=CLEARING_RTOL)
        # demand at the equilibrium price
        a = tr["demand_intercept"][i]
        if spec.form == "linear":
            coef = slope
            demanded = a + coef * p
        else:
            coef = slope * p / q_tot  # eta = dQ/dP * P / Q
            demanded = math.exp(a + coef * math.log(p))
        assert demanded == pytest.approx(q_tot, rel=CLEARING_RTOL)
        conduct = tr["conduct"][i]
        if conduct == "cournot":
            # P + q_i dP/dQ = mc_i for producers; P <= mc_i(0) for firms that stay out
            assert np.abs(p + q[active] / slope - mc[active]).max() < FOC_TOL
            assert np.all(p - mc[~active] <= FOC_TOL)
        elif conduct == "competitive":
            assert np.abs(p - mc[active]).max() < FOC_TOL
            assert np.all(p - mc[~active] <= FOC_TOL)
        else:  # equal quotas: P + theta Q dP/dQ = average marginal cost
            theta = 1.0 if conduct == "collusive" else float(conduct.split("=")[1])
            np.testing.assert_allclose(q[active], q_tot / active.sum(), rtol=1e-12)
            assert abs(p + theta * q_tot / slope - mc[active].mean()) < FOC_TOL
            assert np.all(mc[active] <= p + FOC_TOL)


def _check_identity(tr: dict | pd.DataFrame) -> None:
    gap = tr["price"] - tr["marginal_cost"] - tr["theta_true"] * tr["q_star"]
    assert np.abs(np.asarray(gap, dtype=float)).max() < FOC_TOL
    q_star = np.asarray(tr["quantity"], dtype=float) / np.abs(np.asarray(tr["dq_dp"], dtype=float))
    np.testing.assert_allclose(tr["q_star"], q_star, rtol=1e-12)


# ----------------------------------------------------------------------------------------
# First-order conditions at every observation
# ----------------------------------------------------------------------------------------

LOG = dict(form="log", intercept=23.0, price_slope=-3.0, rotator_level=-1.9,
           rotator_strength=0.5, demand_shifters=(("highway_km", 0.3),),
           market_effect_sd=0.2, period_effect_sd=0.05, demand_shock_sd=0.05)


@pytest.mark.parametrize("form", ["linear", "log"])
@pytest.mark.parametrize("conduct", ["cournot", "competitive", "collusive", 0.4])
@pytest.mark.parametrize(
    ("cost_slope", "scope"), [(0.0, "firm"), (4e-4, "firm"), (4e-4, "industry")]
)
def test_first_order_conditions_hold_everywhere(form, conduct, cost_slope, scope):
    extra = LOG if form == "log" else {}
    spec = dataclasses.replace(SMALL, conduct=conduct, cost_slope=cost_slope,
                               cost_slope_scope=scope, **extra)
    sim = simulate(spec)
    _check_observations(sim)
    _check_identity(sim.truth)


def test_episode_conducts_hold_in_their_window():
    spec = dataclasses.replace(
        SMALL, episodes=(Episode("collusive", (2, 4), 3, 6), Episode(0.3, (1,), 1, 2))
    )
    sim = simulate(spec)
    _check_observations(sim)
    tr = sim.truth
    grid = tr["episode"].reshape(5, 8)
    expected = np.zeros((5, 8), dtype=int)
    expected[[1, 3], 2:6] = 1
    expected[0, 0:2] = 1
    np.testing.assert_array_equal(grid, expected)
    assert set(tr["conduct"][tr["episode"] == 1]) == {"collusive", "theta=0.3"}
    assert np.all(tr["theta_true"][tr["conduct"] == "collusive"] == 1.0)
    cournot = tr["conduct"] == "cournot"
    np.testing.assert_allclose(tr["theta_true"][cournot], tr["hhi"][cournot], rtol=1e-15)


def test_entry_and_exit_stay_in_range():
    sim = simulate(dataclasses.replace(SMALL, markets=12, periods=40, entry_exit_rate=0.3))
    n = sim.firms["present"].sum(axis=1).reshape(12, 40)
    assert n.min() >= 2 and n.max() <= 6
    assert (np.diff(n, axis=1) != 0).any()
    assert np.abs(np.diff(n, axis=1)).max() == 1


# ----------------------------------------------------------------------------------------
# Textbook closed forms (linear inverse demand P = a - bQ, so Q = a/b - P/b)
# ----------------------------------------------------------------------------------------


def _linear(a: float, b: float, costs: list[float], conduct) -> object:
    return solve_market(form="linear", intercept=a / b, slope=-1.0 / b,
                        costs=np.array(costs), conduct=conduct)


@pytest.mark.parametrize("n", [1, 2, 3, 5, 8])
def test_symmetric_cournot_closed_form(n):
    # Tirole (1988), The Theory of Industrial Organization, ch. 5  # from memory
    a, b, c = 120.0, 0.5, 30.0
    eq = _linear(a, b, [c] * n, "cournot")
    assert eq.quantity == pytest.approx(n * (a - c) / ((n + 1) * b), rel=CLOSED_FORM_RTOL)
    assert eq.price == pytest.approx((a + n * c) / (n + 1), rel=CLOSED_FORM_RTOL)
    assert eq.hhi == pytest.approx(1.0 / n) and eq.theta == pytest.approx(1.0 / n)


def test_asymmetric_duopoly_closed_form():
    # Tirole (1988), The Theory of Industrial Organization, ch. 5  # from memory
    a, b, c1, c2 = 100.0, 2.0, 10.0, 25.0
    eq = _linear(a, b, [c1, c2], "cournot")
    np.testing.assert_allclose(
        eq.outputs, [(a - 2 * c1 + c2) / (3 * b), (a - 2 * c2 + c1) / (3 * b)],
        rtol=CLOSED_FORM_RTOL,
    )
    s = eq.outputs / eq.quantity
    assert eq.theta == pytest.approx(float(s @ s), rel=1e-14)


@pytest.mark.parametrize(("conduct", "n"), [("cournot", 1), ("collusive", 1), ("collusive", 4)])
def test_monopoly_closed_form(conduct, n):
    # Tirole (1988), The Theory of Industrial Organization, ch. 1  # from memory
    # (a cartel of n identical firms maximising joint profit behaves as a monopolist)
    a, b, c = 80.0, 0.25, 20.0
    eq = _linear(a, b, [c] * n, conduct)
    assert eq.quantity == pytest.approx((a - c) / (2 * b), rel=CLOSED_FORM_RTOL)
    assert eq.price == pytest.approx((a + c) / 2, rel=CLOSED_FORM_RTOL)


@pytest.mark.parametrize("costs", [[40.0], [40.0, 40.0, 40.0], [40.0, 47.0, 55.0]])
def test_competition_prices_at_cost(costs):
    # common practice: price-taking firms with constant marginal cost set P = c (lowest c)
    eq = _linear(100.0, 1.0, costs, "competitive")
    assert eq.price == pytest.approx(min(costs), rel=CLOSED_FORM_RTOL)
    assert eq.quantity == pytest.approx(100.0 - min(costs), rel=CLOSED_FORM_RTOL)
    assert eq.markup == pytest.approx(0.0, abs=1e-12)


def test_log_demand_cournot_lerner_rule():
    # Cowling & Waterson (1976): L = H / |eps| for Cournot; symmetric constant elasticity
    # gives P = c * N|eta| / (N|eta| - 1).  # from memory
    eta, n, c = -2.5, 3, 40.0
    eq = solve_market(form="log", intercept=12.0, slope=eta, costs=np.full(n, c),
                      conduct="cournot")
    assert eq.price == pytest.approx(c * n * -eta / (n * -eta - 1), rel=1e-13)
    asym = solve_market(form="log", intercept=12.0, slope=eta,
                        costs=np.array([30.0, 36.0, 45.0]), conduct="cournot")
    lerner = asym.markup / asym.price
    assert lerner == pytest.approx(asym.hhi / abs(asym.elasticity), rel=1e-12)


def test_linear_cournot_lerner_rule_with_asymmetric_firms():
    # Cowling & Waterson (1976), industry Lerner index with share-weighted cost  # from memory
    eq = _linear(150.0, 0.01, [30.0, 34.0, 41.0, 45.0], "cournot")
    assert eq.markup / eq.price == pytest.approx(eq.hhi / abs(eq.elasticity), rel=1e-12)


# ----------------------------------------------------------------------------------------
# Drop-out of firms that would produce negative output
# ----------------------------------------------------------------------------------------


@pytest.mark.parametrize("form", ["linear", "log"])
def test_negative_output_firm_drops_out(form):
    if form == "linear":
        # three firms would give the high-cost firm (a - 3*95 + 10 + 10)/4 < 0
        eq = _linear(100.0, 1.0, [95.0, 10.0, 10.0], "cournot")
        np.testing.assert_allclose(eq.outputs, [0.0, 30.0, 30.0], atol=1e-12)
        assert eq.price == pytest.approx(40.0)
    else:
        eq = solve_market(form="log", intercept=10.0, slope=-2.0,
                          costs=np.array([10.0, 10.0, 30.0]), conduct="cournot")
        # duopoly with eta = -2: P = c * 2*2 / (2*2 - 1)
        assert eq.price == pytest.approx(10.0 * 4 / 3, rel=1e-13)
        assert eq.outputs[2] == 0.0
    assert eq.sellers == 2 and not eq.active[0 if form == "linear" else 2]
    assert eq.hhi == pytest.approx(0.5)


@pytest.mark.parametrize("form", ["linear", "log"])
def test_dropouts_in_a_panel_respect_the_conditions(form):
    extra = LOG if form == "log" else {}
    spec = dataclasses.replace(SMALL, markets=10, firm_cost_sd=25.0, cost_constant=20.0, **extra)
    sim = simulate(spec)
    dropped = sim.firms["present"] & ~sim.firms["active"]
    assert dropped.any()
    np.testing.assert_array_equal(sim.truth["sellers"], sim.firms["active"].sum(axis=1))
    _check_observations(sim)


# ----------------------------------------------------------------------------------------
# Refusals
# ----------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("changes", "culprit"),
    [
        ({"rotator_strength": 1000.0}, "rotator_strength"),
        ({"intercept": -80000.0}, "intercept"),
        ({"cost_constant": -80.0}, "cost_constant"),
        ({**LOG, "price_slope": -1.2, "rotator_strength": 0.3, "conduct": "collusive"},
         "price_slope"),
    ],
)
def test_no_interior_equilibrium_is_refused(changes, culprit):
    with pytest.raises(ConductError) as err:
        simulate(dataclasses.replace(SMALL, **changes))
    message = str(err.value)
    assert culprit in message
    assert "market 'M0" in message and "period 20" in message


@pytest.mark.parametrize(
    ("changes", "culprit"),
    [
        ({"sellers": (4, 2)}, "sellers"),
        ({"form": "quadratic"}, "form"),
        ({"price_slope": 5.0}, "price_slope"),
        ({"conduct": "colusive"}, "did you mean 'collusive'"),
        ({"conduct": 1.5}, "[0, 1]"),
        ({"episodes": (Episode("collusive", (9,), 1, 2),)}, "episode 1"),
        ({"episodes": (Episode("collusive", (1,), 3, 99),)}, "episode 1"),
        ({"first_quarter": "2013-01"}, "first_quarter"),
        ({"demand_shock_sd": -1.0}, "demand_shock_sd"),
    ],
)
def test_bad_settings_are_named(changes, culprit):
    with pytest.raises(ConductError) as err:
        validate_spec(dataclasses.replace(SMALL, **changes))
    assert culprit in str(err.value)


@pytest.mark.parametrize(
    ("text", "culprit"),
    [
        ("collusive:markets=1-9", "outside 1-5"),
        ("collusive:periods=2013Q1-2030Q1", "2030Q1"),
        ("collusive:regions=1-3", "regions=1-3"),
        ("collusive:markets=Nowhere", "Nowhere"),
        ("sneaky:markets=1", "sneaky"),
        ("collusive:periods=2014Q2-2013Q3", "ends before it starts"),
        ("theta=2:markets=1", "[0, 1]"),
    ],
)
def test_bad_episode_syntax_is_named(text, culprit):
    with pytest.raises(ConductError) as err:
        parse_episodes(text, SMALL)
    assert culprit in str(err.value)


def test_episode_syntax():
    eps = parse_episodes("collusive:markets=1-2,M04:periods=2013Q3-2014Q1; 0.5:periods=8", SMALL)
    assert eps == (Episode("collusive", (1, 2, 4), 3, 5), Episode(0.5, (1, 2, 3, 4, 5), 8, 8))
    assert parse_episodes("none", SMALL) == ()
    assert parse_conduct("theta=0.6") == 0.6 and parse_conduct("cournot") == "cournot"


def test_run_simulate_refuses_preset_episode_that_does_not_fit(tmp_path):
    with pytest.raises(ConductError, match="does not fit"):
        run_simulate(tmp_path, preset="road-salt", markets=5, periods=None, conduct=None,
                     episode=None, form=None, seed=None, fmt="csv")
    with pytest.raises(ConductError, match="did you mean 'road-salt'"):
        run_simulate(tmp_path, preset="roadsalt", markets=None, periods=None, conduct=None,
                     episode=None, form=None, seed=None, fmt="csv")
    with pytest.raises(ConductError, match="parquet"):
        write_study(tmp_path, SMALL, fmt="xls")


# ----------------------------------------------------------------------------------------
# Files: determinism, truth, study
# ----------------------------------------------------------------------------------------

FILES = ("study.toml", "truth.json", "truth_observations.csv")


@pytest.mark.parametrize("fmt", ["csv", "parquet"])
def test_same_seed_gives_identical_bytes(tmp_path, fmt):
    spec = dataclasses.replace(SMALL, episodes=(Episode("collusive", (1, 2), 2, 5),))
    a = write_study(tmp_path / "a", spec, fmt=fmt).parent
    b = write_study(tmp_path / "b", spec, fmt=fmt).parent
    for name in (*FILES, f"panel.{fmt}"):
        assert (a / name).read_bytes() == (b / name).read_bytes(), name
    c = write_study(tmp_path / "c", dataclasses.replace(spec, seed=12), fmt=fmt).parent
    assert (a / f"panel.{fmt}").read_bytes() != (c / f"panel.{fmt}").read_bytes()


def test_truth_files_and_study(tmp_path):
    study = run_simulate(tmp_path, preset=None, markets=6, periods=10, conduct="0.3",
                         episode="collusive:markets=2,3:periods=2013Q4-2014Q3", form="log",
                         seed=5, fmt="parquet")
    obs = pd.read_csv(tmp_path / "truth_observations.csv")
    _check_identity(obs)
    panel = pd.read_parquet(tmp_path / "panel.parquet")
    assert "episode" not in panel.columns and len(panel) == 60
    assert obs["episode"].sum() == 8
    doc = json.loads((tmp_path / "truth.json").read_text())
    episode = doc["conduct"]["regimes"][1]
    assert episode["markets"] == ["M02", "M03"] and episode["first_period"] == "2013Q4"
    assert doc["conduct"]["regimes"][0]["theta"] == 0.3 and doc["demand"]["form"] == "log"
    text = study.read_text()
    assert 'form = "log"' in text and 'file = "panel.parquet"' in text


def test_study_file_is_read_by_the_study_loader(tmp_path):
    from conduct.study import load_study

    study = load_study(write_study(tmp_path, SMALL))
    assert study.panel.market == "region" and study.panel.quantity == "tonnes"
    assert study.demand.rotators == ("winter_severity",)
    assert set(study.supply.cost_shifters) == {"diesel", "energy", "wage"}
    assert study.supply.cost_slope is False


def test_sample_panel_is_up_to_date(tmp_path):
    # sample_panel/ must be what scripts/make_sample.py writes from the preset today
    write_study(tmp_path, PRESETS["road-salt"], fmt="csv")
    for name in (*FILES, "panel.csv"):
        fresh = (tmp_path / name).read_bytes()
        assert (ROOT / "sample_panel" / name).read_bytes() == fresh, (
            f"sample_panel/{name} is stale: run scripts/make_sample.py"
        )


def test_road_salt_preset_shape():
    spec = PRESETS["road-salt"]
    sim = simulate(spec)
    assert list(sim.panel)[:11] == [
        "region", "quarter", "price", "tonnes", "sellers", "hhi", "winter_severity",
        "highway_km", "diesel", "energy", "wage",
    ]
    assert sim.panel["quarter"][0] == "2013Q1" and sim.panel["quarter"][47] == "2024Q4"
    assert len(set(sim.panel["region"])) == 36
    assert sim.truth["episode"].sum() == 8 * 12
    assert sim.truth["sellers"].min() >= 2 and sim.truth["sellers"].max() <= 6
    _check_identity(sim.truth)
