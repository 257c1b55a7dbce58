"""Fast paths used for large panels give what the plain library calls give (issue 9).

Each fast path here replaces a sort-based or wrapper-based library call with a
linear-time equivalent; the reference is the library call itself (numpy
``np.unique(..., return_inverse=True)``), so a fast path that drifts fails.
"""

from __future__ import annotations

import numpy as np
import pytest

from conduct.absorb import absorb, dense_codes
from conduct.design import _nested


@pytest.mark.parametrize("kind", ["small-ints", "sparse-ints", "negative-ints", "floats",
                                  "strings", "bools", "big-uint64", "datetimes-with-nat"])
def test_dense_codes_equal_numpy_unique(kind: str) -> None:
    rng = np.random.default_rng(7)
    values = {
        "small-ints": rng.integers(0, 50, 2_000),
        "sparse-ints": rng.integers(0, 50, 2_000) * 10**12,  # range far beyond 4n: hashed
        "negative-ints": rng.integers(-30, 30, 2_000),
        "floats": rng.integers(0, 40, 2_000) / 7.0,
        "strings": np.asarray([f"market {v}" for v in rng.integers(0, 120, 2_000)],
                              dtype=object),
        "bools": rng.integers(0, 2, 2_000).astype(bool),
        "big-uint64": (rng.integers(0, 5, 2_000).astype(np.uint64) * np.uint64(2**62)
                       + np.uint64(7)),  # values above 2**63
        "datetimes-with-nat": np.where(rng.integers(0, 5, 2_000) == 0, np.datetime64("NaT"),
                                       np.datetime64("2020-01-01")
                                       + rng.integers(0, 9, 2_000).astype("timedelta64[D]")),
    }[kind]
    expected = np.unique(values, return_inverse=True)[1]
    got = dense_codes(values)
    assert got.dtype == np.int64
    np.testing.assert_array_equal(got, expected)


def test_dense_codes_with_gaps_in_a_subset() -> None:
    codes = np.repeat(np.arange(10), 5)
    subset = codes[codes % 3 != 0]  # rows used by a stage: codes 1, 2, 4, 5, 7, 8
    np.testing.assert_array_equal(dense_codes(subset),
                                  np.unique(subset, return_inverse=True)[1])


def test_nested_groups_in_clusters() -> None:
    markets = np.repeat(np.arange(6), 4)
    regions = markets // 2  # each market inside one region
    periods = np.tile(np.arange(4), 6)
    assert _nested(markets, regions)
    assert _nested(markets, markets)
    assert not _nested(periods, regions)  # a period spans all regions
    pairs = np.unique(np.column_stack([periods, markets]), axis=0)  # the sort-based check
    assert _nested(periods, markets) == (len(pairs) == periods.max() + 1)


def test_balanced_exact_absorption_detected_without_sorting() -> None:
    rng = np.random.default_rng(3)
    g1, g2 = np.repeat(np.arange(8), 5), np.tile(np.arange(5), 8)
    x = rng.normal(size=(40, 2))
    exact = absorb(x, [g1, g2])
    assert exact.method == "two-way exact"
    # one duplicated cell makes the panel unbalanced even with n = G1 x G2 rows
    g2b = g2.copy()
    g2b[1] = 0
    assert absorb(x, [g1, g2b]).method == "alternating projections"
    # reference: least squares on explicit dummies (numpy lstsq)
    d = np.column_stack([np.eye(8)[g1], np.eye(5)[g2][:, 1:]])
    resid = x - d @ np.linalg.lstsq(d, x, rcond=None)[0]
    np.testing.assert_allclose(exact.values, resid, atol=1e-12)


# ----------------------------------------------------------------------------------------
# Bootstrap replicate kernel against the full estimation path on the resampled panel
# ----------------------------------------------------------------------------------------

def _kernel_case(tmp_path, spec_kw: dict, edit=None):  # type: ignore[no-untyped-def]
    from dataclasses import replace

    from conduct.panel import load_panel
    from conduct.presets import write_study
    from conduct.simulate import SimulationSpec
    from conduct.study import load_study

    study = load_study(write_study(tmp_path, SimulationSpec(markets=14, periods=12, seed=3,
                                                            **spec_kw)))
    if edit is not None:
        study = replace(study, demand=replace(study.demand, **edit))
    return load_panel(study), study


@pytest.mark.parametrize("case", ["two-way", "market-only", "no-effects", "cost-slope",
                                  "no-rotator"])
def test_replicate_kernel_equals_full_path(tmp_path, case: str) -> None:  # type: ignore[no-untyped-def]
    from conduct.bootstrap import one_replicate, replicate_kernel

    spec_kw, edit = {
        "two-way": ({}, None),
        "market-only": ({}, {"effects": ("market",)}),
        "no-effects": ({}, {"effects": ()}),
        "cost-slope": ({"cost_slope": 0.02}, None),
        "no-rotator": ({"rotator": None, "instrument_interactions": False}, None),
    }[case]
    panel, study = _kernel_case(tmp_path, spec_kw, edit)
    kernel = replicate_kernel(panel, study)
    assert kernel is not None
    full = np.array([one_replicate(panel, study, 5, r) for r in range(4)])
    fast = np.array([kernel.theta(5, r) for r in range(4)])
    assert np.all(np.isfinite(full))
    np.testing.assert_allclose(fast, full, rtol=1e-8, atol=1e-10)


def test_replicate_kernel_drops_a_degenerate_resample(tmp_path) -> None:  # type: ignore[no-untyped-def]
    from conduct.bootstrap import one_replicate, replicate_kernel

    panel, study = _kernel_case(tmp_path, {})
    # a cost shifter that varies in one market only: a resample without that market has
    # a constant (absorbed to zero) column, so both paths must give NaN there
    f = panel.frame.copy()
    col = study.supply.cost_shifters[0]
    first = f["_market"] == f["_market"].iloc[0]
    f[col] = np.where(first, f[col], 0.0)
    from dataclasses import replace
    panel = replace(panel, frame=f)
    kernel = replicate_kernel(panel, study)
    assert kernel is not None
    outcomes = [(np.isnan(kernel.theta(2, r)), np.isnan(one_replicate(panel, study, 2, r)))
                for r in range(12)]
    assert any(a for a, _ in outcomes)  # some resample misses the market
    assert all(a == b for a, b in outcomes)


def test_liml_demand_uses_the_full_path(tmp_path) -> None:  # type: ignore[no-untyped-def]
    from conduct.bootstrap import replicate_kernel

    panel, study = _kernel_case(tmp_path, {}, {"estimator": "liml"})
    assert replicate_kernel(panel, study) is None


@pytest.mark.parametrize("layout", ["sorted", "shuffled", "sorted-with-gap"])
def test_group_sums_equal_a_dense_indicator_product(layout: str) -> None:
    from conduct.iv import group_sums

    rng = np.random.default_rng(5)
    codes = np.sort(rng.integers(0, 30, 500))
    if layout == "shuffled":
        codes = rng.permutation(codes)
    if layout == "sorted-with-gap":
        codes = np.where(codes == 7, 8, codes)  # code 7 absent: its row of sums is zero
    a = rng.normal(size=(500, 4))
    g = int(codes.max()) + 1
    expected = np.eye(g)[codes].T @ a  # plain numpy: indicator matrix times the scores
    np.testing.assert_allclose(group_sums(codes, a), expected, rtol=1e-12, atol=1e-12)


def test_two_way_absorption_grid_order_equals_shuffled_rows() -> None:
    rng = np.random.default_rng(8)
    g1, g2 = np.repeat(np.arange(9), 6), np.tile(np.arange(6), 9)  # panel order: grid path
    x = rng.normal(size=(54, 3)) * [1.0, 1e3, 1e-3]
    perm = rng.permutation(54)  # same panel, rows shuffled: counting path
    grid, shuffled = absorb(x, [g1, g2]), absorb(x[perm], [g1[perm], g2[perm]])
    assert grid.method == shuffled.method == "two-way exact"
    np.testing.assert_allclose(grid.values[perm], shuffled.values, rtol=1e-12, atol=1e-15)
    d = np.column_stack([np.eye(9)[g1], np.eye(6)[g2][:, 1:]])  # numpy lstsq on dummies
    resid = x - d @ np.linalg.lstsq(d, x, rcond=None)[0]
    np.testing.assert_allclose(grid.values, resid, rtol=1e-10, atol=1e-12)


def test_add_rows_equals_fancy_indexing() -> None:
    from conduct.iv import add_rows

    rng = np.random.default_rng(9)
    vals = rng.normal(size=(6, 2))
    for rows in (np.arange(6), np.array([0, 2, 5])):
        target = rng.normal(size=(6, 2))
        expected = target.copy()
        expected[rows] += vals[: len(rows)]
        np.testing.assert_array_equal(add_rows(target, rows, vals[: len(rows)]), expected)


@pytest.mark.parametrize("case", ["well-conditioned", "mixed-scales", "near-collinear",
                                  "rank-deficient", "matrix-rhs", "near-the-limit"])
def test_ls_coef_equals_lstsq(case: str) -> None:
    from conduct.iv import ls_coef

    rng = np.random.default_rng(4)
    a = rng.normal(size=(300, 4))
    if case == "mixed-scales":
        a = a * [1e-4, 1.0, 1e5, 3.0]
    if case == "near-collinear":
        a[:, 3] = a[:, 0] + 1e-9 * rng.normal(size=300)  # beyond the normal-equation range
    if case == "near-the-limit":
        a[:, 3] = a[:, 0] + 3e-3 * rng.normal(size=300)
        a[:, 1] += 100.0  # an uncentred column, as a constant-plus-levels design has
    if case == "rank-deficient":
        a[:, 3] = 2.0 * a[:, 1]
    b = rng.normal(size=(300, 2)) if case == "matrix-rhs" else rng.normal(size=300)
    ref = np.linalg.lstsq(a, b, rcond=None)[0]  # numpy's SVD solver, the reference
    got = ls_coef(a, b)
    assert got.shape == ref.shape
    np.testing.assert_allclose(a @ got, a @ ref, rtol=1e-9, atol=1e-9)  # same projection
    if case in ("well-conditioned", "mixed-scales", "matrix-rhs"):
        np.testing.assert_allclose(got, ref, rtol=1e-9)
    if case == "near-the-limit":
        from conduct.iv import GRAM_COND

        scale = np.sqrt((a * a).sum(axis=0))
        vals = np.linalg.eigvalsh(a.T @ a / np.outer(scale, scale))
        assert 1e5 < vals[-1] / vals[0] < GRAM_COND  # solved by the normal equations
        np.testing.assert_allclose(got, ref, rtol=1e-9)
        resid, resid_ref = b - a @ got, b - a @ ref
        np.testing.assert_allclose(resid, resid_ref, rtol=1e-8, atol=1e-10)


@pytest.mark.parametrize("factor", [1e5, 4e3, 1e-4])
def test_replicate_kernel_does_not_depend_on_units(tmp_path, factor: float) -> None:  # type: ignore[no-untyped-def]
    from dataclasses import replace

    from conduct.bootstrap import one_replicate, replicate_kernel

    panel, study = _kernel_case(tmp_path, {})
    col = study.supply.cost_shifters[0]  # an instrument of both stages, in other units
    panel = replace(panel, frame=panel.frame.assign(**{col: panel.frame[col] * factor}))
    kernel = replicate_kernel(panel, study)
    assert kernel is not None
    full = np.array([one_replicate(panel, study, 7, r) for r in range(4)])
    fast = np.array([kernel.theta(7, r) for r in range(4)])
    assert np.all(np.isfinite(full))
    np.testing.assert_allclose(fast, full, rtol=1e-8)


def test_replicate_kernel_hands_ill_conditioned_resamples_to_the_full_path(tmp_path) -> None:  # type: ignore[no-untyped-def]
    from dataclasses import replace

    from conduct import bootstrap

    panel, study = _kernel_case(tmp_path, {})
    kernel = bootstrap.replicate_kernel(panel, study)
    assert kernel is not None
    calls = []
    real = bootstrap.one_replicate

    def spy(*args):  # type: ignore[no-untyped-def]
        calls.append(args[2:])
        return real(*args)

    strict = replace(kernel)
    old = bootstrap.SINGULAR
    try:
        bootstrap.SINGULAR = 1.0  # every design counts as ill-conditioned
        bootstrap.one_replicate = spy  # type: ignore[assignment]
        theta = strict.theta(3, 1)
    finally:
        bootstrap.SINGULAR = old
        bootstrap.one_replicate = real  # type: ignore[assignment]
    assert calls == [(3, 1)]
    assert theta == real(panel, study, 3, 1)


@pytest.mark.parametrize("dtype", ["string[pyarrow]", "object", "str"])
def test_dense_codes_of_a_text_series_equal_numpy_unique(dtype: str) -> None:
    import pandas as pd

    rng = np.random.default_rng(12)
    labels = [f"m{v}" for v in rng.integers(0, 300, 3_000)] + [
        "Zürich", "zebra", "Ärger", "éa", "ab c", "AB", "数量"]  # code-point order matters
    expected = np.unique(np.asarray(labels, dtype=object), return_inverse=True)[1]
    np.testing.assert_array_equal(dense_codes(pd.Series(labels, dtype=dtype)), expected)


def _design_matrix(case: str) -> np.ndarray:
    rng = np.random.default_rng(11)
    a = rng.normal(size=(3_000, 5))
    if case == "badly-scaled":
        a *= np.array([1e-6, 1.0, 1e3, 1e6, 7.0])
    elif case == "nearly-collinear":  # condition about 1e6: the Householder route
        a[:, 4] = a[:, 0] + a[:, 1] + 1e-6 * a[:, 4]
    return a


@pytest.mark.parametrize("case", ["plain", "badly-scaled", "nearly-collinear"])
def test_r_factor_equals_householder_qr(case: str) -> None:
    from conduct.iv import r_factor
    a = _design_matrix(case)
    ref = np.linalg.qr(a, mode="r")  # numpy's LAPACK Householder QR
    ref = ref * np.where(np.diag(ref) < 0, -1.0, 1.0)[:, None]
    got = r_factor(a)
    assert np.all(np.diag(got) > 0)
    # rows of R scale with the column norms; compare relative to them
    np.testing.assert_allclose(got / np.linalg.norm(a, axis=0), ref / np.linalg.norm(a, axis=0),
                               rtol=0, atol=1e-10)
    np.testing.assert_allclose(got.T @ got, a.T @ a, rtol=1e-10,
                               atol=1e-12 * float(np.abs(a.T @ a).max()))


@pytest.mark.parametrize("case", ["plain", "badly-scaled", "nearly-collinear"])
def test_orthonormal_basis_spans_the_columns(case: str) -> None:
    from conduct.iv import orthonormal_basis
    a = _design_matrix(case)
    q = orthonormal_basis(a)
    np.testing.assert_allclose(q.T @ q, np.eye(a.shape[1]), atol=1e-12)
    ref = np.linalg.qr(a)[0]
    y = np.random.default_rng(3).normal(size=len(a))
    np.testing.assert_allclose(q @ (q.T @ y), ref @ (ref.T @ y), atol=1e-10)


@pytest.mark.parametrize("case", ["plain", "badly-scaled", "nearly-collinear"])
def test_condition_number_equals_the_svd_of_the_scaled_matrix(case: str) -> None:
    from conduct.iv import condition_number
    a = _design_matrix(case)
    sv = np.linalg.svd(a / np.sqrt(np.mean(a * a, axis=0)), compute_uv=False)
    assert condition_number(a) == pytest.approx(sv[0] / sv[-1], rel=1e-8)


def test_group_sums_remember_runs_only_of_read_only_codes() -> None:
    from conduct.iv import group_sums
    rng = np.random.default_rng(5)
    a = rng.normal(size=(600, 3))
    codes = np.repeat(np.arange(60), 10)
    codes.flags.writeable = False
    first = group_sums(codes, a)
    np.testing.assert_allclose(group_sums(codes, a), first, rtol=0, atol=0)
    np.testing.assert_allclose(first, np.eye(60)[codes].T @ a, atol=1e-12)  # indicator product
    # a writeable array may change between calls: never served from memory
    moving = np.repeat(np.arange(60), 10)
    group_sums(moving, a)
    moving[:] = np.repeat(np.arange(30), 20)
    np.testing.assert_allclose(group_sums(moving, a), np.eye(30)[moving].T @ a, atol=1e-12)


@pytest.mark.parametrize("errors", ["cluster", "two-way", "robust", "hac", "homoskedastic"])
def test_one_coefficient_equals_the_full_solve(tmp_path, errors: str) -> None:  # type: ignore[no-untyped-def]
    # the candidate tests take theta and its sequential se without the full (n, k) fit
    from conduct.demand import estimate_demand
    from conduct.supply import _markup_h, build_system

    edit = ({"errors": "cluster", "cluster": ("market", "period")} if errors == "two-way"
            else {"errors": errors})
    panel, study = _kernel_case(tmp_path, {"cost_slope": 0.02}, edit)
    demand = estimate_demand(panel, study, diagnostics=False)
    system = build_system(panel, study, demand, candidates=study.candidates)
    i = system.theta_index[0]
    n = len(system.rows)
    for c in study.candidates:
        hc = _markup_h(c, system.h, n)
        if hc is None:
            continue
        fit, cov = system.solve(f"_dep:{c.name}", hc)
        coef, se = system.solve_coefficient(f"_dep:{c.name}", hc, i)
        assert coef == pytest.approx(float(fit.params[i]), rel=1e-10, abs=1e-12)
        assert se == pytest.approx(float(np.sqrt(cov[i, i])), rel=1e-9)


def test_cluster_ids_keep_read_only_dense_codes_and_code_the_rest() -> None:
    from conduct.absorb import dense_codes
    from conduct.iv import cluster_ids
    dense = np.repeat(np.arange(5, dtype=np.int64), 3)
    dense.flags.writeable = False
    assert cluster_ids(dense) is dense and cluster_ids(dense) is dense  # remembered
    gaps = np.repeat(np.array([3, 9, 4], dtype=np.int64), 2)
    gaps.flags.writeable = False
    np.testing.assert_array_equal(cluster_ids(gaps), dense_codes(gaps))
    assert cluster_ids(gaps) is not gaps
    labels = np.array(["b", "a", "b", "c"], dtype=object)
    np.testing.assert_array_equal(cluster_ids(labels), [1, 0, 1, 2])
    writeable = np.repeat(np.arange(4, dtype=np.int64), 2)
    assert cluster_ids(writeable) is not writeable  # may change later: always coded afresh


def test_group_sums_from_many_threads_agree_with_bincount() -> None:
    # replicates may run on threads (Dask workers); the remembered runs are shared
    from concurrent.futures import ThreadPoolExecutor

    from conduct.iv import cluster_ids, group_sums
    a = np.random.default_rng(2).normal(size=(400, 2))

    def one(i: int) -> bool:
        codes = np.repeat(np.arange(40 + i % 7, dtype=np.int64), 1)
        codes = np.resize(np.sort(codes), 400).astype(np.int64)
        codes.sort()
        codes.flags.writeable = False
        ref = np.column_stack([np.bincount(codes, weights=a[:, j]) for j in range(2)])
        return bool(np.allclose(group_sums(cluster_ids(codes), a), ref, atol=1e-12))

    with ThreadPoolExecutor(8) as pool:
        assert all(pool.map(one, range(400)))
