"""The IV wrapper against independent computations.

Every number that conduct takes from linearmodels is checked here against a
plain-numpy computation of the textbook formulas (Wooldridge 2010,
*Econometric Analysis of Cross Section and Panel Data*, ch. 5 for 2SLS and its
robust variance; Cameron & Miller 2015, "A Practitioner's Guide to
Cluster-Robust Inference", JHR, for the cluster small-sample factor), and the
fixed-effect path against explicit dummy variables.
"""

from __future__ import annotations

import numpy as np
import pytest

from conduct.absorb import absorb
from conduct.iv import CovSpec, cluster_cov, fit_iv

TIGHT = 1e-8  # same arithmetic, different route: only rounding differs


def _data(n_markets: int = 25, n_periods: int = 12, seed: int = 0, unbalanced: bool = False):
    rng = np.random.default_rng(seed)
    m = np.repeat(np.arange(n_markets), n_periods)
    t = np.tile(np.arange(n_periods), n_markets)
    if unbalanced:
        keep = rng.random(m.size) > 0.2
        m, t = m[keep], t[keep]
    n = m.size
    fe_m = rng.normal(size=n_markets)[m]
    fe_t = rng.normal(size=n_periods)[t]
    z = rng.normal(size=(n, 2))
    w = rng.normal(size=n)
    v = rng.normal(size=n) + 0.5 * rng.normal(size=n_markets)[m]
    x = z @ np.array([1.0, 0.6]) + 0.4 * w + v + fe_m
    y = 2.0 - 1.5 * x + 0.8 * w + fe_m + fe_t + 0.7 * v + rng.normal(size=n)
    return y, x, w, z, m, t


def _tsls(y, x, z):
    pz = z @ np.linalg.solve(z.T @ z, z.T @ x)
    b = np.linalg.solve(pz.T @ x, pz.T @ y)
    return b, pz


@pytest.mark.parametrize("kind", ["homoskedastic", "robust", "cluster"])
def test_2sls_matches_numpy(kind):
    y, x, w, z, m, _ = _data()
    n = y.size
    exog = np.column_stack([np.ones(n), w])
    cov = CovSpec(kind=kind, clusters=m if kind == "cluster" else None)
    fit = fit_iv(y, exog, x[:, None], z, ("const", "w", "x"), cov=cov)
    X = np.column_stack([exog, x])
    Z = np.column_stack([exog, z])
    b, pz = _tsls(y, X, Z)
    e = y - X @ b
    k = X.shape[1]
    bread = np.linalg.inv(pz.T @ pz)
    if kind == "homoskedastic":
        v = (e @ e / (n - k)) * bread
    elif kind == "robust":
        meat = (pz * e[:, None]).T @ (pz * e[:, None])
        v = n / (n - k) * bread @ meat @ bread
    else:
        g = m.max() + 1
        s = np.zeros((g, k))
        np.add.at(s, m, pz * e[:, None])
        v = g / (g - 1) * (n - 1) / (n - k) * bread @ (s.T @ s) @ bread
    np.testing.assert_allclose(fit.params, b, rtol=TIGHT)
    np.testing.assert_allclose(fit.cov, v, rtol=1e-7)
    # the influence functions reproduce the same covariance (robust and cluster)
    if kind != "homoskedastic":
        np.testing.assert_allclose(cluster_cov(fit.influence, cov, k), v, rtol=1e-7)


def test_fixed_effects_equal_dummies_one_way():
    y, x, w, z, m, _ = _data(unbalanced=True)
    n = y.size
    a = absorb(np.column_stack([y, x, w, z]), [m])
    yd, xd, wd, zd = a.values[:, 0], a.values[:, 1], a.values[:, 2:3], a.values[:, 3:]
    cov = CovSpec(kind="robust", df_penalty=a.df_absorbed)
    fit = fit_iv(yd, wd, xd[:, None], zd, ("w", "x"), cov=cov)
    dummies = (m[:, None] == np.arange(m.max() + 1)).astype(float)
    full = fit_iv(y, np.column_stack([w, dummies]), x[:, None], z,
                  ("w", *[f"d{i}" for i in range(dummies.shape[1])], "x"),
                  cov=CovSpec(kind="robust"))
    np.testing.assert_allclose(fit.params[[0, 1]], full.params[[0, -1]], rtol=TIGHT)
    # HC1 with the absorbed effects counted equals HC1 with explicit dummies
    np.testing.assert_allclose(np.diag(fit.cov), np.diag(full.cov)[[0, -1]], rtol=1e-7)
    assert a.df_absorbed == m.max() + 1
    assert n > a.df_absorbed


@pytest.mark.parametrize("unbalanced", [False, True])
def test_two_way_absorption_equals_dummies(unbalanced):
    y, x, w, z, m, t = _data(unbalanced=unbalanced, seed=3)
    a = absorb(np.column_stack([y, x, w, z]), [m, t])
    assert a.method == ("alternating projections" if unbalanced else "two-way exact")
    dm = (m[:, None] == np.arange(m.max() + 1)).astype(float)
    dt = (t[:, None] == np.arange(1, t.max() + 1)).astype(float)
    D = np.column_stack([dm, dt])
    # residual-maker on the dummies, computed directly
    resid = np.column_stack([y, x, w, z]) - D @ np.linalg.lstsq(D, np.column_stack(
        [y, x, w, z]), rcond=None)[0]
    np.testing.assert_allclose(a.values, resid, atol=1e-9)
    assert a.df_absorbed == np.linalg.matrix_rank(D)


def test_cluster_with_nested_market_effects_convention():
    """Market effects nested in market clusters are not counted (Cameron & Miller 2015)."""
    y, x, w, z, m, _ = _data(seed=5)
    n = y.size
    a = absorb(np.column_stack([y, x, w, z]), [m])
    cov = CovSpec(kind="cluster", clusters=m, df_penalty=0)
    fit = fit_iv(a.values[:, 0], a.values[:, 2:3], a.values[:, 1:2], a.values[:, 3:],
                 ("w", "x"), cov=cov)
    X = np.column_stack([a.values[:, 2], a.values[:, 1]])
    Z = np.column_stack([a.values[:, 2], a.values[:, 3:]])
    b, pz = _tsls(a.values[:, 0], X, Z)
    e = a.values[:, 0] - X @ b
    g, k = m.max() + 1, 2
    s = np.zeros((g, k))
    np.add.at(s, m, pz * e[:, None])
    bread = np.linalg.inv(pz.T @ pz)
    v = g / (g - 1) * (n - 1) / (n - k) * bread @ (s.T @ s) @ bread
    np.testing.assert_allclose(fit.cov, v, rtol=1e-7)


def test_hansen_j_matches_two_step_gmm_formula():
    """Hansen (1982) J: n g' S^-1 g at the two-step GMM estimate, S from the 2SLS residuals."""
    y, x, w, z, _, _ = _data(seed=7)
    n = y.size
    exog = np.column_stack([np.ones(n), w])
    fit = fit_iv(y, exog, x[:, None], z, ("const", "w", "x"), cov=CovSpec(kind="robust"))
    X = np.column_stack([exog, x])
    Z = np.column_stack([exog, z])
    b1, _ = _tsls(y, X, Z)
    e1 = y - X @ b1
    S = (Z * e1[:, None]).T @ (Z * e1[:, None]) / n
    W = np.linalg.inv(S)
    G = Z.T @ X / n
    b2 = np.linalg.solve(G.T @ W @ G, G.T @ W @ (Z.T @ y / n))
    e2 = y - X @ b2
    gbar = Z.T @ e2 / n
    # linearmodels evaluates J with the weight of the estimating step, S(e1)^-1
    j = n * gbar @ W @ gbar
    assert fit.j_df == 1
    assert fit.j_stat == pytest.approx(j, rel=1e-7)


@pytest.mark.parametrize("kind", ["homoskedastic", "robust"])
def test_endogeneity_test_matches_linearmodels(kind):
    """Control-function test against linearmodels' Wooldridge regression test.

    linearmodels 7.1 ``wooldridge_regression`` runs the same augmented regression
    (Wooldridge 2010, sec. 6.3.1) with the covariance of the fit.
    """
    from linearmodels.iv import IV2SLS

    from conduct.diagnostics import endogeneity_test

    y, x, w, z, _, _ = _data(seed=9)
    n = y.size
    exog = np.column_stack([np.ones(n), w])
    ours = endogeneity_test(y, exog, x[:, None], z, CovSpec(kind=kind))
    cov_type = "unadjusted" if kind == "homoskedastic" else "robust"
    lm = IV2SLS(y, exog, x[:, None], z).fit(cov_type=cov_type, debiased=True)
    ref = lm.wooldridge_regression
    # same augmented regression, same small-sample factor (debiased=True): equal
    assert ours.stat == pytest.approx(ref.stat, rel=1e-10)
    assert ours.p < 0.05  # the design makes x endogenous
    # the demand stage passes its 2SLS projection instead of refitting the first stage
    from conduct.iv import Projection
    shared = endogeneity_test(y, exog, x[:, None], z, CovSpec(kind=kind),
                              projection=Projection(np.column_stack([exog, x]),
                                                    np.column_stack([exog, z])))
    assert shared.stat == pytest.approx(ref.stat, rel=1e-10)


@pytest.mark.parametrize("kind", ["homoskedastic", "robust", "cluster"])
def test_array_path_equals_linearmodels(kind):
    """The array 2SLS path (used without J) equals linearmodels IV2SLS to rounding."""
    from linearmodels.iv import IV2SLS

    from conduct.iv import fit_2sls_arrays

    y, x, w, z, m, _ = _data(seed=13, unbalanced=True)
    n = y.size
    exog = np.column_stack([np.ones(n), w])
    cov = CovSpec(kind=kind, clusters=m if kind == "cluster" else None, df_penalty=3)
    fast = fit_2sls_arrays(y, np.column_stack([exog, x]), np.column_stack([exog, z]),
                           ("const", "w", "x"), cov)
    lm_cov = {"homoskedastic": "unadjusted", "robust": "robust", "cluster": "clustered"}[kind]
    kw = {"clusters": m} if kind == "cluster" else {}
    ref = IV2SLS(y, exog, x[:, None], z).fit(cov_type=lm_cov, debiased=True, **kw)
    k = 3
    factor = (n - k) / (n - k - 3)  # conduct counts 3 absorbed parameters here
    np.testing.assert_allclose(fast.params, np.asarray(ref.params), rtol=TIGHT)
    np.testing.assert_allclose(fast.cov, np.asarray(ref.cov) * factor, rtol=1e-8)
    slow = fit_iv(y, exog, x[:, None], z, ("const", "w", "x"), cov=cov, overid=True)
    np.testing.assert_allclose(fast.influence, slow.influence, rtol=1e-8, atol=1e-12)


def test_two_way_cluster_matches_linearmodels():
    """Two-way clustering (Cameron, Gelbach & Miller 2011): V_m + V_t - V_mt, each with its
    own G/(G-1)(n-1)/(n-k) factor, as linearmodels computes it with two cluster columns."""
    from linearmodels.iv import IV2SLS

    from conduct.iv import fit_2sls_arrays

    y, x, w, z, m, t = _data(seed=2)
    n = y.size
    exog = np.column_stack([np.ones(n), w])
    cov = CovSpec(kind="cluster", clusters=m, clusters2=t)
    ours = fit_2sls_arrays(y, np.column_stack([exog, x]), np.column_stack([exog, z]),
                           ("const", "w", "x"), cov)
    ref = IV2SLS(y, exog, x[:, None], z).fit(cov_type="clustered",
                                             clusters=np.column_stack([m, t]), debiased=True)
    assert np.all(np.linalg.eigvalsh(np.asarray(ref.cov)) > 0)  # PSD here: no clipping
    np.testing.assert_allclose(ours.cov, np.asarray(ref.cov), rtol=1e-8)


@pytest.mark.parametrize("kind", ["homoskedastic", "robust", "cluster"])
def test_hansen_j_equals_linearmodels_ivgmm(kind):
    """conduct's own J equals linearmodels 7.1 IVGMM(...).j_stat with the same weight."""
    from linearmodels.iv import IVGMM

    from conduct.iv import hansen_j

    y, x, w, z, m, _ = _data(seed=4)
    n = y.size
    exog = np.column_stack([np.ones(n), w])
    weight = {"homoskedastic": "unadjusted", "robust": "robust", "cluster": "clustered"}[kind]
    kw = {"clusters": m} if kind == "cluster" else {}
    ref = IVGMM(y, exog, x[:, None], z, weight_type=weight, **kw).fit(cov_type="robust")
    cov = CovSpec(kind=kind, clusters=m if kind == "cluster" else None)
    ours = hansen_j(y, np.column_stack([exog, x]), np.column_stack([exog, z]), cov)
    assert ours == pytest.approx(float(ref.j_stat.stat), rel=1e-10)
