"""Anderson-Rubin inference for theta (Anderson & Rubin 1949, by test inversion)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

import conduct
from conduct.presets import write_study
from conduct.simulate import SimulationSpec
from conduct.thetaset import _Linear, _Shared


@pytest.fixture(scope="module")
def res(tmp_path_factory):
    spec = SimulationSpec(markets=20, periods=20, seed=31)
    return conduct.estimate(write_study(tmp_path_factory.mktemp("ar"), spec))


def test_set_contains_estimate_and_endpoints_sit_on_the_critical_value(res):
    ts = res.theta_set
    assert ts is not None and ts.kind == "bounded"
    (lo, hi), = ts.intervals
    assert lo < res.supply.theta < hi
    lin = _Linear(_Shared(res.panel, res.study, res.demand, res.supply))
    crit = stats.chi2.ppf(ts.level, ts.df)
    for end in (lo, hi):
        assert lin.profile(end) == pytest.approx(crit, rel=1e-6)
    # with strong instruments the AR set and the Wald interval are close
    assert hi - lo == pytest.approx(res.supply.ci[1] - res.supply.ci[0], rel=0.5)


def test_candidate_ar_equals_set_statistic_at_fixed_theta(res):
    # A fixed-theta candidate's statistic is taken as the set's statistic at its theta;
    # the candidate's own reduced form (y = P - theta Q*, absorbed on its own, with its own
    # generated-regressor term) must give the same number.
    shared = _Shared(res.panel, res.study, res.demand, res.supply)
    n = len(res.panel.frame)
    for name, theta in (("competitive", 0.0), ("collusive", 1.0)):
        stat, df, p = res.candidate_ar[name]
        own = _Linear(shared, markup=(res.supply.prepared.columns[f"_dep:{name}"],
                                      np.full(n, theta)))
        assert stat == pytest.approx(own.profile(1.0), rel=1e-9)
        assert p == pytest.approx(stats.chi2.sf(stat, df), rel=1e-12)
    # Cournot's markup varies with H by row; its AR statistic is still finite
    assert np.isfinite(res.candidate_ar["cournot"][0])


def test_two_way_clustering_keeps_ar_statistics_non_negative(tmp_path):
    # V1 + V2 - V12 (Cameron, Gelbach & Miller 2011) need not be positive semi-definite;
    # as for the Wald tests its negative eigenvalues are clipped, so the statistic minimised
    # over the free cost slope cannot run off to minus infinity
    path = write_study(tmp_path, SimulationSpec(markets=14, periods=12, seed=3, cost_slope=0.02))
    text = path.read_text()
    assert 'errors = "cluster"' in text
    path.write_text(text.replace('errors = "cluster"',
                                 'errors = "cluster"\ncluster = ["market", "period"]', 1))
    res = conduct.estimate(path)
    assert res.demand.fit.cov_spec.clusters2 is not None
    assert res.study.supply is not None and res.study.supply.cost_slope
    for stat, _df, p in res.candidate_ar.values():
        assert np.isfinite(stat) and stat >= 0 and 0 <= p <= 1
    assert res.theta_set is not None and res.theta_set.stat_at_estimate >= 0
