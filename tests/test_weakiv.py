"""Weak-instrument diagnostics against independent computations.

Independent references: statsmodels OLS F and Wald tests (HC1 and cluster
covariances; statsmodels' cluster correction is G/(G-1)*(n-1)/(n-K) with an
F(q, G-1) reference, the same convention as ``conduct.weakiv``) and
linearmodels IV2SLS first-stage diagnostics (``debiased=True`` so that its
variances divide by n - K; under robust covariance its ``f.stat`` is a Wald
chi-square, which we divide by the number of instruments).
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from linearmodels.iv import IV2SLS
from scipy import stats

from conduct import stockyogo, weakiv
from conduct.errors import EstimationError, IdentificationError

# Agreement with statsmodels/linearmodels: both solve the same least-squares
# problems in double precision, so only rounding separates them.
REF_RTOL = 1e-8
# AR endpoints: the brief requires p-value = 1 - level within 1e-6.
ENDPOINT_PTOL = 1e-6
# Coverage Monte Carlo: 200 replications, accept within 3 binomial standard errors.
COVERAGE_REPS = 200
COVERAGE_SD = math.sqrt(0.95 * 0.05 / COVERAGE_REPS)

COVS: tuple[weakiv.Covariance, ...] = ("homoskedastic", "robust", "cluster")


def simulate(
    n: int = 300,
    k: int = 3,
    pi: float = 1.0,
    rho: float = 0.6,
    p: int = 1,
    hetero: bool = False,
    seed: int = 0,
    n_clusters: int = 30,
) -> dict[str, np.ndarray]:
    """Linear IV data: y = -1.5 x1 (+ 0.5 x2) + W g + u, X = Z Pi + W h + V."""
    rng = np.random.default_rng(seed)
    Z = rng.standard_normal((n, k))
    W = np.column_stack([np.ones(n), rng.standard_normal(n)])
    u = rng.standard_normal(n)
    scale = 1 + np.abs(Z[:, 0]) if hetero else np.ones(n)
    u = u * scale
    V = rho * u[:, None] + rng.standard_normal((n, p))
    Pi = pi * rng.uniform(0.5, 1.5, size=(k, p))
    X = Z @ Pi + W @ np.full((2, p), 0.5) + V
    beta = np.array([-1.5, 0.5][:p])
    y = X @ beta + W @ np.array([2.0, 1.0]) + u
    clusters = rng.integers(0, n_clusters, size=n)
    return {"y": y, "X": X, "Z": Z, "W": W, "clusters": clusters}


def _sm_fit(target: np.ndarray, d: dict[str, np.ndarray], cov: str) -> object:
    design = np.column_stack([d["Z"], d["W"]])
    kwargs: dict[str, object] = {
        "homoskedastic": {},
        "robust": {"cov_type": "HC1"},
        "cluster": {"cov_type": "cluster", "cov_kwds": {"groups": d["clusters"]}},
    }[cov]
    return sm.OLS(target, design).fit(**kwargs)


def _sm_instrument_test(target: np.ndarray, d: dict[str, np.ndarray], cov: str) -> object:
    k, w = d["Z"].shape[1], d["W"].shape[1]
    R = np.hstack([np.eye(k), np.zeros((k, w))])
    return _sm_fit(target, d, cov).wald_test(R, use_f=True, scalar=True)  # type: ignore[attr-defined]


# --------------------------------------------------------------------------
# First stage
# --------------------------------------------------------------------------


@pytest.mark.parametrize("cov", COVS)
def test_first_stage_f_matches_statsmodels(cov: weakiv.Covariance) -> None:
    d = simulate(p=2, pi=0.2, hetero=True, seed=1)
    fs = weakiv.first_stage(d["X"], d["Z"], d["W"], cov, clusters=d["clusters"])
    for j in range(2):
        ref = _sm_instrument_test(d["X"][:, j], d, cov)
        ours = fs.f[j]
        assert ours.stat == pytest.approx(float(ref.statistic), rel=REF_RTOL)
        assert ours.pvalue == pytest.approx(float(ref.pvalue), rel=1e-6)
        assert ours.df == (float(ref.df_num), float(ref.df_denom))
    if cov == "homoskedastic":  # also the classic compare_f_test of nested models
        full = sm.OLS(d["X"][:, 0], np.column_stack([d["Z"], d["W"]])).fit()
        restricted = sm.OLS(d["X"][:, 0], d["W"]).fit()
        f_value, p_value, _ = full.compare_f_test(restricted)
        assert fs.f[0].stat == pytest.approx(f_value, rel=REF_RTOL)
        assert fs.f[0].pvalue == pytest.approx(p_value, rel=1e-6)


def _linearmodels_first_stage(d: dict[str, np.ndarray], cov_type: str, **kw: object) -> object:
    p = d["X"].shape[1]
    X = pd.DataFrame(d["X"], columns=[f"x{j}" for j in range(p)])
    Z = pd.DataFrame(d["Z"], columns=[f"z{j}" for j in range(d["Z"].shape[1])])
    W = pd.DataFrame(d["W"], columns=["const", "w1"])
    res = IV2SLS(pd.Series(d["y"], name="y"), W, X, Z).fit(cov_type=cov_type, debiased=True, **kw)
    return res.first_stage.diagnostics


def test_first_stage_matches_linearmodels_unadjusted() -> None:
    d = simulate(p=2, pi=0.3, seed=2)
    diag = _linearmodels_first_stage(d, "unadjusted")
    fs = weakiv.first_stage(d["X"], d["Z"], d["W"], "homoskedastic")
    np.testing.assert_allclose(fs.f_values, diag["f.stat"].to_numpy(float), rtol=REF_RTOL)
    np.testing.assert_allclose(
        fs.partial_r2, diag["partial.rsquared"].to_numpy(float), rtol=REF_RTOL
    )
    np.testing.assert_allclose(fs.shea_r2, diag["shea.rsquared"].to_numpy(float), rtol=REF_RTOL)


@pytest.mark.parametrize("cov", ["robust", "cluster"])
def test_first_stage_matches_linearmodels_robust_wald_over_k(cov: weakiv.Covariance) -> None:
    d = simulate(p=1, pi=0.3, hetero=True, seed=3)
    kw = {"clusters": pd.Series(d["clusters"])} if cov == "cluster" else {}
    diag = _linearmodels_first_stage(d, "robust" if cov == "robust" else "clustered", **kw)
    k = d["Z"].shape[1]
    fs = weakiv.first_stage(d["X"], d["Z"], d["W"], cov, clusters=d["clusters"])
    # linearmodels 7.1 reports the robust/cluster first-stage Wald chi-square: divide by k.
    np.testing.assert_allclose(fs.f_values, diag["f.stat"].to_numpy(float) / k, rtol=REF_RTOL)


def test_partial_r2_equals_shea_with_one_regressor_and_no_conditional_f() -> None:
    d = simulate(p=1, seed=4)
    fs = weakiv.first_stage(d["X"], d["Z"], d["W"], "homoskedastic")
    assert fs.shea_r2 == pytest.approx(fs.partial_r2)
    assert fs.conditional_f is None
    assert fs.n_exog == 2 and fs.n_instruments == 3 and fs.n_endog == 1


def _sw_reference(d: dict[str, np.ndarray], j: int, cov: str) -> float:
    """Two-step Sanderson-Windmeijer: linearmodels 2SLS residuals, statsmodels test."""
    p, k = d["X"].shape[1], d["Z"].shape[1]
    others = [i for i in range(p) if i != j]
    res = IV2SLS(d["X"][:, j], d["W"], d["X"][:, others], d["Z"]).fit(cov_type="unadjusted")
    eps = np.asarray(res.resids)
    ref = _sm_instrument_test(eps, d, cov)
    return float(ref.statistic) * k / (k - p + 1)


@pytest.mark.parametrize("cov", COVS)
def test_conditional_f_matches_two_step_reference(cov: weakiv.Covariance) -> None:
    d = simulate(p=2, k=4, pi=0.3, hetero=cov != "homoskedastic", seed=5)
    fs = weakiv.first_stage(d["X"], d["Z"], d["W"], cov, clusters=d["clusters"])
    assert fs.conditional_f is not None
    for j in range(2):
        assert fs.conditional_f[j].stat == pytest.approx(_sw_reference(d, j, cov), rel=1e-7)
        assert fs.conditional_f[j].df[0] == 3.0


def test_conditional_f_sees_what_the_plain_f_misses() -> None:
    """Two regressors moved by one instrument combination: each F is large, but
    neither is identified given the other, and only the conditional F says so."""
    rng = np.random.default_rng(6)
    n, k = 500, 3
    Z = rng.standard_normal((n, k))
    common = Z @ np.array([1.0, 1.0, 1.0])
    X = np.column_stack([common, 2.0 * common]) + rng.standard_normal((n, 2))
    fs = weakiv.first_stage(X, Z, np.ones((n, 1)), "homoskedastic")
    assert fs.conditional_f is not None
    assert min(fs.f_values) > 100
    assert max(t.stat for t in fs.conditional_f) < 10


def test_absorbed_effects_count_in_degrees_of_freedom() -> None:
    """Demeaned data with df_absorbed = G equal explicit dummies in statsmodels."""
    d = simulate(n=240, seed=7)
    g = np.repeat(np.arange(24), 10)
    dummies = (g[:, None] == np.arange(24)).astype(float)
    x = d["X"][:, 0] + g * 0.3

    def demean(a: np.ndarray) -> np.ndarray:
        a2 = a.reshape(len(a), -1)
        means = np.stack([np.bincount(g, col) / np.bincount(g) for col in a2.T], axis=1)
        return a2 - means[g]

    fs = weakiv.first_stage(
        demean(x), demean(d["Z"]), demean(d["W"][:, 1:]), "homoskedastic", df_absorbed=24
    )
    full = sm.OLS(x, np.column_stack([d["Z"], d["W"][:, 1:], dummies])).fit()
    ref = full.f_test(np.hstack([np.eye(3), np.zeros((3, 25))]))
    assert fs.f[0].stat == pytest.approx(float(ref.fvalue), rel=REF_RTOL)
    assert fs.f[0].df == (3.0, float(ref.df_denom))


def test_bad_options_and_shapes_raise_conduct_errors() -> None:
    d = simulate(p=2, k=1, seed=8)
    with pytest.raises(IdentificationError):
        weakiv.first_stage(d["X"], d["Z"], d["W"], "homoskedastic")
    with pytest.raises(EstimationError, match="homoskedastic, robust, cluster"):
        weakiv.first_stage(d["X"][:, 0], d["Z"], d["W"], "hc3")  # type: ignore[arg-type]
    with pytest.raises(EstimationError, match="clusters"):
        weakiv.first_stage(d["X"][:, 0], d["Z"], d["W"], "cluster")
    few = np.arange(len(d["y"])) % 1
    with pytest.raises(EstimationError, match="more clusters than instruments"):
        weakiv.first_stage(d["X"][:, 0], d["Z"], d["W"], "cluster", clusters=few)
    with pytest.raises(EstimationError, match="collinear"):
        weakiv.first_stage(d["X"][:, 0], np.column_stack([d["Z"], d["Z"]]), d["W"], "robust")
    with pytest.raises(EstimationError, match="one endogenous"):
        weakiv.effective_f(d["X"], d["Z"], d["W"], "robust")


# --------------------------------------------------------------------------
# Effective F
# --------------------------------------------------------------------------


def test_effective_f_equals_homoskedastic_f_with_non_robust_covariance() -> None:
    d = simulate(p=1, pi=0.2, hetero=True, seed=9)
    fs = weakiv.first_stage(d["X"], d["Z"], d["W"], "homoskedastic")
    ef = weakiv.effective_f(d["X"], d["Z"], d["W"], "homoskedastic")
    assert ef.f_eff == pytest.approx(fs.f_values[0], rel=1e-12)
    assert ef.k_eff == pytest.approx(3.0, rel=1e-12)
    assert ef.critical_value == pytest.approx(weakiv.mop_critical_value(3.0))


@pytest.mark.parametrize("cov", ["robust", "cluster"])
def test_effective_f_with_one_instrument_is_the_robust_f(cov: weakiv.Covariance) -> None:
    d = simulate(p=1, k=1, hetero=True, seed=10)
    fs = weakiv.first_stage(d["X"], d["Z"], d["W"], cov, clusters=d["clusters"])
    ef = weakiv.effective_f(d["X"], d["Z"], d["W"], cov, clusters=d["clusters"])
    assert ef.f_eff == pytest.approx(fs.f_values[0], rel=1e-10)
    assert ef.k_eff == pytest.approx(1.0)
    assert ef.critical_value == pytest.approx(23.1085, abs=1e-3)  # Montiel Olea-Pflueger, tau=10%


def test_effective_f_is_invariant_to_recombining_instruments() -> None:
    d = simulate(p=1, k=3, hetero=True, seed=11)
    A = np.array([[2.0, 1.0, 0.0], [0.0, 1.0, 3.0], [1.0, 0.0, 1.0]])
    a = weakiv.effective_f(d["X"], d["Z"], d["W"], "robust")
    b = weakiv.effective_f(d["X"], d["Z"] @ A, d["W"], "robust")
    assert a.f_eff == pytest.approx(b.f_eff, rel=1e-10)
    assert a.k_eff == pytest.approx(b.k_eff, rel=1e-10)
    assert 1.0 <= a.k_eff <= 3.0


def test_mop_simplified_critical_values() -> None:
    # Simplified procedure, K_eff = 1, 5% size: tau = 10% gives 23.109 (stated in the brief).
    assert weakiv.mop_critical_value(1.0, 0.10) == pytest.approx(23.109, abs=1e-3)
    assert weakiv.mop_critical_value(1.0, 0.05) > weakiv.mop_critical_value(1.0, 0.10)


# --------------------------------------------------------------------------
# Anderson-Rubin
# --------------------------------------------------------------------------


@pytest.mark.parametrize("cov", COVS)
def test_ar_test_matches_statsmodels(cov: weakiv.Covariance) -> None:
    d = simulate(pi=0.3, hetero=True, seed=12)
    y, x = d["y"], d["X"][:, 0]
    for b0 in (-1.5, 0.0, 2.0):
        ours = weakiv.ar_test(y, x, d["Z"], d["W"], b0, cov, clusters=d["clusters"])
        ref = _sm_instrument_test(y - b0 * x, d, cov)
        assert ours.stat == pytest.approx(float(ref.statistic), rel=REF_RTOL)
        assert ours.pvalue == pytest.approx(float(ref.pvalue), rel=1e-6)
        assert ours.distribution.startswith("F(") and "beta" in ours.null


def _tsls(d: dict[str, np.ndarray]) -> tuple[float, float]:
    res = IV2SLS(d["y"], d["W"], d["X"], d["Z"]).fit(cov_type="unadjusted", debiased=True)
    return float(np.asarray(res.params)[-1]), float(np.asarray(res.std_errors)[-1])


@pytest.mark.parametrize("cov", COVS)
def test_ar_set_is_bounded_and_contains_tsls_with_strong_instruments(
    cov: weakiv.Covariance,
) -> None:
    d = simulate(pi=1.0, seed=13)
    s = weakiv.anderson_rubin_set(d["y"], d["X"][:, 0], d["Z"], d["W"], cov, clusters=d["clusters"])
    est, _ = _tsls(d)
    assert s.kind == "bounded" and s.bounded
    assert s.contains(est)
    assert s.contains(-1.5)
    assert "interval" in s.describe()


def _endpoints(s: weakiv.ARSet) -> list[float]:
    return [e for iv in s.intervals for e in iv if math.isfinite(e)]


@pytest.mark.parametrize("cov", COVS)
@pytest.mark.parametrize("pi", [1.0, 0.15, 0.05])
def test_ar_set_endpoints_have_p_value_one_minus_level(cov: weakiv.Covariance, pi: float) -> None:
    d = simulate(pi=pi, hetero=True, seed=13)
    y, x = d["y"], d["X"][:, 0]
    for level in (0.90, 0.95):
        s = weakiv.anderson_rubin_set(
            y, x, d["Z"], d["W"], cov, clusters=d["clusters"], level=level
        )
        assert _endpoints(s), s
        for e in _endpoints(s):
            p = weakiv.ar_test(y, x, d["Z"], d["W"], e, cov, clusters=d["clusters"]).pvalue
            assert abs(p - (1 - level)) < ENDPOINT_PTOL


@pytest.mark.parametrize("cov", COVS)
def test_union_endpoints_have_p_value_one_minus_level(cov: weakiv.Covariance) -> None:
    d = simulate(k=4, pi=0.08, hetero=True, seed=17, n_clusters=40)
    y, x = d["y"], d["X"][:, 0]
    s = weakiv.anderson_rubin_set(y, x, d["Z"], d["W"], cov, clusters=d["clusters"])
    assert s.kind == "union" and len(_endpoints(s)) == 2
    for e in _endpoints(s):
        p = weakiv.ar_test(y, x, d["Z"], d["W"], e, cov, clusters=d["clusters"]).pvalue
        assert abs(p - 0.05) < ENDPOINT_PTOL


@pytest.mark.parametrize("cov", COVS)
@pytest.mark.parametrize("seed", [15, 16, 17, 25])
def test_ar_set_agrees_with_a_brute_force_grid(cov: weakiv.Covariance, seed: int) -> None:
    d = simulate(k=4, pi=0.08, hetero=True, seed=seed, n_clusters=40)
    y, x = d["y"], d["X"][:, 0]
    s = weakiv.anderson_rubin_set(y, x, d["Z"], d["W"], cov, clusters=d["clusters"])
    ends = _endpoints(s)
    for b in np.linspace(-30, 30, 241):
        if any(abs(b - e) < 1e-6 for e in ends):
            continue
        p = weakiv.ar_test(y, x, d["Z"], d["W"], float(b), cov, clusters=d["clusters"]).pvalue
        assert s.contains(float(b)) == (p >= 0.05), b
    # Unbounded exactly when the first-stage F (same covariance) is below the cut-off.
    fs = weakiv.first_stage(x, d["Z"], d["W"], cov, clusters=d["clusters"]).f_values[0]
    assert s.first_stage_f == pytest.approx(fs)
    assert s.bounded == (fs > s.critical_value)


def test_ar_set_union_and_whole_line_are_described() -> None:
    rng = np.random.default_rng(18)
    found = set()
    for seed in range(40):
        d = simulate(n=120, k=2, pi=0.0, seed=int(rng.integers(1_000_000)) + seed)
        s = weakiv.anderson_rubin_set(d["y"], d["X"][:, 0], d["Z"], d["W"], "homoskedastic")
        found.add(s.kind)
        text = s.describe("the price coefficient")
        if s.kind == "union":
            assert not s.bounded and "unbounded" in text and len(s.intervals) == 2
            assert s.intervals[0][0] == -math.inf and s.intervals[1][1] == math.inf
        if s.kind == "unbounded":
            assert s.intervals == ((-math.inf, math.inf),) and "whole real line" in text
    assert {"union", "unbounded"} <= found


def test_weak_instruments_demonstration() -> None:
    """As instrument strength goes to zero (same error draws): the first-stage F
    falls below the Stock-Yogo critical values, the AR set widens and becomes
    unbounded, while the Wald interval stays a finite interval."""
    rng = np.random.default_rng(19)
    n, k = 400, 3
    Z = rng.standard_normal((n, k))
    W = np.column_stack([np.ones(n), rng.standard_normal(n)])
    u = rng.standard_normal(n)
    v = 0.8 * u + 0.6 * rng.standard_normal(n)
    Pi = rng.uniform(0.5, 1.5, size=k)
    cv10 = stockyogo.stock_yogo("tsls_size", 1, 3, 0.10)
    cv25 = stockyogo.stock_yogo("tsls_size", 1, 3, 0.25)
    assert cv10 is not None and cv25 is not None
    rows = []
    for strength in (1.0, 0.3, 0.1, 0.03, 0.0):
        x = Z @ (strength * Pi) + W @ np.array([0.5, 0.5]) + v
        y = -1.5 * x + W @ np.array([2.0, 1.0]) + u
        d = {"y": y, "X": x[:, None], "Z": Z, "W": W}
        f = weakiv.first_stage(x, Z, W, "homoskedastic").f_values[0]
        s = weakiv.anderson_rubin_set(y, x, Z, W, "homoskedastic")
        est, se = _tsls(d)
        rows.append((strength, f, s, est - 1.96 * se, est + 1.96 * se))
    fs = [r[1] for r in rows]
    assert all(a > b for a, b in itertools.pairwise(fs))
    assert fs[0] > cv10 and fs[-1] < cv25
    assert rows[0][2].kind == "bounded"
    assert not rows[-1][2].bounded and rows[-1][2].length == math.inf
    lengths = [r[2].length for r in rows]
    assert all(a <= b for a, b in itertools.pairwise(lengths))
    for _, _, _, lo, hi in rows:
        assert math.isfinite(lo) and math.isfinite(hi) and lo < hi


def _coverage(cov: weakiv.Covariance, hetero: bool, pi: float) -> float:
    hits = 0
    for rep in range(COVERAGE_REPS):
        d = simulate(n=100, k=3, pi=pi, rho=0.8, hetero=hetero, seed=1000 + rep)
        s = weakiv.anderson_rubin_set(
            d["y"], d["X"][:, 0], d["Z"], d["W"], cov, clusters=d["clusters"]
        )
        hits += s.contains(-1.5)
    return hits / COVERAGE_REPS


@pytest.mark.parametrize(("cov", "hetero"), [("homoskedastic", False), ("robust", True)])
def test_ar_set_coverage_under_weak_instruments(cov: weakiv.Covariance, hetero: bool) -> None:
    assert abs(_coverage(cov, hetero, pi=0.05) - 0.95) < 3 * COVERAGE_SD


def test_homoskedastic_ar_reference_distribution_is_exact() -> None:
    d = simulate(n=50, k=2, seed=20)
    t = weakiv.ar_test(d["y"], d["X"][:, 0], d["Z"], d["W"], -1.5, "homoskedastic")
    assert t.df == (2.0, 46.0) and t.distribution == "F(2, 46)"
    assert t.pvalue == pytest.approx(float(stats.f.sf(t.stat, 2, 46)))
