"""Delta-method intervals for mean costs, markups and Lerner indexes.

The analytic gradients in ``conduct.derived`` are checked against central
finite differences of the same means, recomputed from perturbed theta and
demand coefficients (an independent route to the gradient; the delta method
itself is textbook: Wooldridge 2010, *Econometric Analysis of Cross Section
and Panel Data*, sec. 3.5.2), with the joint covariance of theta and the
demand coefficients built from their influence functions.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

import conduct
from conduct.iv import cluster_cov
from conduct.presets import write_study
from conduct.simulate import SimulationSpec

RTOL = 1e-5  # finite differences with step 1e-6 relative: agreement to ~1e-6 expected


@pytest.fixture(scope="module")
def results(tmp_path_factory):
    study = write_study(tmp_path_factory.mktemp("d"), SimulationSpec(markets=14, periods=16,
                                                                      seed=12))
    return conduct.estimate(study)


def _mean(res, theta, alpha, rows, lerner=False):
    d = res.demand
    q = res.derived.observations["quantity"].to_numpy()
    p = res.derived.observations["price"].to_numpy()
    slope = d.slope_grad @ alpha  # linear demand: the slope is linear in the coefficients
    qstar = -q / slope
    w = 1.0 / p if lerner else 1.0
    return float(np.mean((theta * qstar * w)[rows]))


@pytest.mark.parametrize("lerner", [False, True])
def test_period_mean_interval_matches_numeric_delta_method(results, lerner):
    res = results
    s, d = res.supply, res.demand
    np.testing.assert_allclose(d.slope_grad @ d.fit.params, d.slope, rtol=1e-12)
    table = res.derived.by_period.query("model == 'estimated'").reset_index(drop=True)
    label = table["group"].iloc[3]
    rows = (res.derived.observations["period"].to_numpy() == label) & np.isfinite(s.qstar)
    theta, alpha = s.theta, d.fit.params.copy()
    base = _mean(res, theta, alpha, rows, lerner)
    col = "lerner" if lerner else "markup"
    assert table[col].iloc[3] == pytest.approx(base, rel=1e-12)
    grad = np.zeros(1 + alpha.size)
    h = 1e-6 * max(abs(theta), 1.0)
    grad[0] = (_mean(res, theta + h, alpha, rows, lerner)
               - _mean(res, theta - h, alpha, rows, lerner)) / (2 * h)
    for j in range(alpha.size):
        step = 1e-6 * max(abs(alpha[j]), 1.0)
        up, dn = alpha.copy(), alpha.copy()
        up[j] += step
        dn[j] -= step
        grad[1 + j] = (_mean(res, theta, up, rows, lerner)
                       - _mean(res, theta, dn, rows, lerner)) / (2 * step)
    psi = np.column_stack([s.theta_influence, d.fit.influence])
    var = grad @ cluster_cov(psi, s.full_cov, 1) @ grad
    z = stats.norm.ppf(0.975)
    half = table[f"{col}_hi"].iloc[3] - table[col].iloc[3]
    assert half == pytest.approx(z * np.sqrt(var), rel=RTOL)


def test_marginal_cost_interval_mirrors_markup(results):
    t = results.derived.by_market
    np.testing.assert_allclose(t["mc_hi"] - t["mc"], t["markup_hi"] - t["markup"], rtol=1e-12)
    # fixed-theta candidates carry only demand uncertainty: competitive markups are exactly 0
    comp = t[t["model"] == "competitive"]
    assert np.all(comp["markup"] == 0) and np.all(comp["markup_hi"] == 0)
