"""Conduct over time and space: known regimes, groups, an unknown break, rolling windows.

Outside references: the sup-Wald critical values of Andrews (1993) as
corrected in Andrews (2003), for one restriction and 15% trimming, as
tabulated in Stock & Watson, *Introduction to Econometrics* (break-test
table): 7.12 (10%), 8.68 (5%), 12.16 (1%); Holm (1979) and
Benjamini & Hochberg (1995) step-down/step-up adjustments, recomputed by hand.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pandas as pd
import pytest

import conduct
from conduct.breaks import ANDREWS_CRITICAL, rolling_theta, simulated_sup_wald, sup_wald_break
from conduct.demand import estimate_demand
from conduct.panel import load_panel
from conduct.presets import write_study
from conduct.regimes import theta_by
from conduct.simulate import Episode, SimulationSpec
from conduct.study import load_study
from conduct.supply import build_system


def test_simulated_sup_wald_matches_andrews_table():
    draws = simulated_sup_wald()
    n = draws.size
    for alpha, published in ANDREWS_CRITICAL.items():
        q = np.quantile(draws, 1 - alpha)
        # Monte Carlo error of a quantile: sqrt(a(1-a)/n)/density; allow 3% (5% at 1%)
        tol = 0.05 if alpha == 0.01 else 0.03
        assert q == pytest.approx(published, rel=tol), (alpha, q, published, n)


def _episode_study(tmp_path, *, first: int, last: int, markets: tuple[int, ...], size=30,
                   seed=3, name="ep"):
    spec = SimulationSpec(markets=size, periods=size, seed=seed,
                          episodes=(Episode("collusive", markets, first, last),))
    study = write_study(tmp_path / name, spec)
    truth = pd.read_csv(study.parent / "truth_observations.csv")
    panel = pd.read_csv(study.parent / "panel.csv")
    panel["regime"] = np.where(truth["episode"].to_numpy() > 0, "episode", "normal")
    panel.to_csv(study.parent / "panel.csv", index=False)
    return study


def test_known_regimes_recover_planted_episode(tmp_path):
    study = _episode_study(tmp_path, first=11, last=30, markets=tuple(range(1, 31)))
    text = study.read_text().replace('regimes = ""', 'regimes = "regime"')
    study.write_text(text)
    res = conduct.estimate(study)
    assert res.regimes is not None
    by = {g.label: g for g in res.regimes.groups}
    assert by["episode"].ci[0] < 1.0 < by["episode"].ci[1]
    assert by["normal"].theta < 0.5
    assert res.regimes.equality_p < 0.01


def test_groups_rank_and_adjust(tmp_path):
    study = _episode_study(tmp_path, first=1, last=30, markets=tuple(range(1, 11)), name="g")
    panel = pd.read_csv(study.parent / "panel.csv")
    # groups of markets: the planted colluders form group "A"; the rest split in two
    names = sorted(panel["region"].unique(), key=list(panel["region"].unique()).index)
    group = {m: "A" if i < 10 else ("B" if i < 20 else "C") for i, m in enumerate(names)}
    panel["district"] = panel["region"].map(group)
    panel.to_csv(study.parent / "panel.csv", index=False)
    st = load_study(study)
    st = replace(st, supply=replace(st.supply, groups="district"))
    p = load_panel(st)
    d = estimate_demand(p, st)
    res = theta_by(p, st, d, "district", "group")
    assert res.groups[0].label == "A"  # ranked first: strongest evidence against competition
    assert res.groups[0].theta > 0.7
    pv = np.array([g.p_competitive for g in res.groups])
    order = np.argsort(pv)
    m = len(pv)
    holm = np.maximum.accumulate(np.minimum(1, (m - np.arange(m)) * pv[order]))
    bh = np.minimum.accumulate(m / np.arange(m, 0, -1) * pv[order][::-1])[::-1]
    bh = np.minimum(bh, 1)
    np.testing.assert_allclose([res.groups[i].p_holm for i in order], holm, rtol=1e-12)
    np.testing.assert_allclose([res.groups[i].p_bh for i in order], bh, rtol=1e-12)


def test_break_found_near_planted_date(tmp_path):
    study = _episode_study(tmp_path, first=16, last=30, markets=tuple(range(1, 31)), size=30,
                           name="brk")
    st = load_study(study)
    p = load_panel(st)
    d = estimate_demand(p, st)
    b = sup_wald_break(p, st, d)
    assert b.stat > ANDREWS_CRITICAL[0.01]
    labels = list(p.frame.drop_duplicates("_t").sort_values("_t")["_period"])
    assert abs(labels.index(b.date) - 15) <= 1
    assert b.theta_before < 0.5 < b.theta_after


def test_rolling_window_equals_subset_fit(tmp_path):
    spec = SimulationSpec(markets=15, periods=16, seed=8)
    study = write_study(tmp_path / "roll", spec)
    st = load_study(study)
    p = load_panel(st)
    d = estimate_demand(p, st)
    roll = rolling_theta(p, st, d, 8)
    assert len(roll.theta) == 16 - 8 + 1
    t = p.frame["_t"].to_numpy()
    times = np.sort(np.unique(t))
    mask = (t >= times[3]) & (t <= times[10])
    system = build_system(p, st, d, subset=mask)
    fit, cov = system.solve("_p", np.zeros(len(system.rows)))
    i = system.theta_index[0]
    assert roll.theta[3] == pytest.approx(fit.params[i], rel=1e-12)
    assert roll.se[3] == pytest.approx(np.sqrt(cov[i, i]), rel=1e-12)
