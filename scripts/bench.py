"""Benchmark the whole estimate path against a bare-numpy baseline (issue 9).

For each size (10^4, 10^5, 10^6 rows by default; two-way fixed effects) the
script simulates a panel with :mod:`conduct.simulate`, writes it as Parquet
with its ``study.toml`` and then, in this process and on the same file:

* **full**: ``conduct.estimate(study)`` (no run folder, report or figures;
  the study has ``break_test = false``, ``rolling_window = 0``,
  ``bootstrap = 0``), plus a per-stage breakdown;
* **baseline**: only the unavoidable work in plain numpy: read the needed
  columns, absorb market and period effects (exact in one pass on a balanced
  panel, alternating projections otherwise), 2SLS for demand, the markup
  regressor ``Q* = Q / |dQ/dP|``, 2SLS for the supply relation.  Point
  estimates only: no standard errors, diagnostics or tests.

It prints time and peak memory of each, their ratio, the growth exponent of
time in rows between consecutive sizes, the time of one cluster-bootstrap
replicate against one baseline fit (arrays in memory), and the targets of
issue 9 beside each ratio.  Times are the best of ``--repeat`` runs.  Peak
memory is the peak resident set size of a fresh process per measurement
(``VmHWM`` from ``/proc/self/status`` on Linux, ``ru_maxrss`` elsewhere),
which counts every allocation (numpy, pandas, pyarrow, BLAS); "+MB" is that
peak minus the process's resident size after imports.

Usage::

    python scripts/bench.py                   # 10^4, 10^5, 10^6 rows
    python scripts/bench.py --quick           # 10^4 and 10^5 only
    python scripts/bench.py --sizes 1e4,3e4 --json
    python scripts/bench.py --quick --profile 1e5   # cProfile of estimate() at 10^5

Nothing here is a test: no limits are asserted; compare the printed ratios
with the targets.
"""

from __future__ import annotations

import argparse
import contextlib
import cProfile
import gc
import importlib
import importlib.util
import itertools
import json
import math
import multiprocessing
import os
import pstats
import resource
import sys
import tempfile
import time
from collections.abc import Callable
from concurrent.futures import ProcessPoolExecutor
from concurrent.futures.process import BrokenProcessPool
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from conduct.bootstrap import one_replicate, replicate_kernel
from conduct.demand import estimate_demand
from conduct.derived import derive
from conduct.heap import keep_freed_memory
from conduct.identify import check_identification
from conduct.panel import load_panel
from conduct.pipeline import estimate
from conduct.presets import write_study
from conduct.simulate import SimulationSpec
from conduct.study import Study, load_study
from conduct.supply import estimate_supply
from conduct.thetaset import theta_ar_set

# Panel shapes (markets, periods) of the standard sizes; other sizes get a similar shape.
SHAPES = {10_000: (100, 100), 100_000: (500, 200), 1_000_000: (2000, 500)}
DEFAULT_SIZES = (10_000, 100_000, 1_000_000)
QUICK_SIZES = (10_000, 100_000)
# Targets of issue 9 (measured here, never asserted in tests).
TARGET_TIME_RATIO = 3.0  # full estimate / bare baseline at 10^6 rows
TARGET_EXPONENT = 1.1  # growth of full time in rows between 10^5 and 10^6
TARGET_PEAK_GB = 4.0  # peak memory at 10^6 rows
TARGET_REPLICATE_RATIO = 2.0  # one bootstrap replicate / one baseline fit
# The simulator's cost indexes are random walks with drift; over 500 periods the default
# cost coefficients push marginal cost above the demand intercept.  Scaling the index
# coefficients down and the constant up keeps every market-period interior.
COST_SCALE = 0.05
COST_CONSTANT = 30.0
# Alternating projections in the baseline (unbalanced panels only): relative tolerance.
AP_TOL = 1e-12
AP_MAX_SWEEPS = 10_000
BENCH_VERSION = 1  # bump when the benchmark panel's specification changes (cache key)


# ----------------------------------------------------------------------------------------
# Data
# ----------------------------------------------------------------------------------------


def shape_for(rows: int) -> tuple[int, int]:
    """Markets and periods for a panel of about ``rows`` rows.

    Parameters
    ----------
    rows : int

    Returns
    -------
    (int, int)
        The standard shape for 10^4, 10^5 and 10^6 rows; otherwise periods
        ``sqrt(rows)/2`` clipped to [20, 500] and as many markets as needed.
    """
    if rows in SHAPES:
        return SHAPES[rows]
    periods = int(min(500, max(20, round(math.sqrt(rows) / 2))))
    return max(2, round(rows / periods)), periods


def bench_spec(rows: int, seed: int) -> SimulationSpec:
    """The simulator's default linear Cournot model at the benchmark's shape.

    Parameters
    ----------
    rows : int
    seed : int

    Returns
    -------
    SimulationSpec
        Linear demand with one rotator, one demand shifter, three cost
        indexes (instruments), market and period effects, 2-6 asymmetric
        Cournot sellers with exit; integer periods.
    """
    markets, periods = shape_for(rows)
    base = SimulationSpec()
    costs = tuple((name, coef * COST_SCALE) for name, coef in base.cost_shifters)
    return replace(base, markets=markets, periods=periods, first_quarter=None,
                   cost_shifters=costs, cost_constant=COST_CONSTANT, seed=seed,
                   title=f"benchmark panel {markets} x {periods} (invented data)")


def make_study(rows: int, seed: int, workdir: Path) -> tuple[Path, float, bool]:
    """Simulate and write the benchmark panel, or reuse one written before.

    Parameters
    ----------
    rows : int
    seed : int
    workdir : Path
        Folder holding one sub-folder per panel.

    Returns
    -------
    (Path, float, bool)
        The ``study.toml``, the seconds spent simulating and writing, and
        whether an existing panel was reused.
    """
    spec = bench_spec(rows, seed)
    folder = workdir / f"bench_v{BENCH_VERSION}_{spec.markets}x{spec.periods}_seed{seed}"
    study = folder / "study.toml"
    if study.exists() and (folder / "panel.parquet").exists():
        return study, 0.0, True
    t0 = time.perf_counter()
    write_study(folder, spec, fmt="parquet")
    return study, time.perf_counter() - t0, False


# ----------------------------------------------------------------------------------------
# The bare-numpy baseline
# ----------------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class BaselineData:
    """The columns the baseline needs, as float arrays, and fixed-effect codes.

    Attributes
    ----------
    columns : dict of str to numpy.ndarray
        Each (n,).
    market, period : numpy.ndarray
        (n,) integer codes 0..G-1.
    """

    columns: dict[str, np.ndarray]
    market: np.ndarray
    period: np.ndarray


@dataclass(frozen=True, slots=True)
class BaselineFit:
    """Point estimates of the baseline.

    Attributes
    ----------
    demand : numpy.ndarray
        Demand coefficients: exogenous (shifters, rotators) then price, price x rotator.
    theta : float
        Coefficient of Q* in the supply relation.
    rows_used : int
        Rows with a negative demand slope (used in the supply relation).
    seconds : dict of str to float
        Time per step.
    """

    demand: np.ndarray
    theta: float
    rows_used: int
    seconds: dict[str, float]


def baseline_read(study: Study) -> BaselineData:
    """Read only the columns the baseline needs from the study's panel file.

    Parameters
    ----------
    study : Study

    Returns
    -------
    BaselineData
    """
    p, d = study.panel, study.demand
    assert study.supply is not None
    names = {p.price, p.quantity, *d.shifters, *d.rotators, *d.instruments,
             *study.supply.cost_shifters, *study.supply.instruments}
    frame = pd.read_parquet(p.file, columns=[p.market, p.period, *sorted(names)])
    cols = {c: frame[c].to_numpy(dtype=float) for c in names}
    market = pd.factorize(frame[p.market])[0]  # hashing: O(n), no sort
    period = pd.factorize(frame[p.period])[0]
    return BaselineData(cols, market, period)


def _demean(x: np.ndarray, codes: np.ndarray, counts: np.ndarray) -> np.ndarray:
    """Subtract group means from every column of ``x`` (n, k)."""
    out = np.empty_like(x)
    for j in range(x.shape[1]):
        means = np.bincount(codes, weights=x[:, j], minlength=counts.size) / counts
        out[:, j] = x[:, j] - means[codes]
    return out


def absorb_two_way(x: np.ndarray, g1: np.ndarray, g2: np.ndarray) -> np.ndarray:
    """Remove two sets of fixed effects from the columns of ``x``.

    Parameters
    ----------
    x : numpy.ndarray
        (n, k) data.
    g1, g2 : numpy.ndarray
        (n,) integer codes of the two effects.

    Returns
    -------
    numpy.ndarray
        (n, k) residuals of the projection on both sets of dummies: exact in
        one pass on a balanced panel (each cell once), alternating projections
        otherwise.
    """
    c1 = np.bincount(g1).astype(float)
    c2 = np.bincount(g2).astype(float)
    balanced = len(g1) == c1.size * c2.size and np.all(c1 == c2.size)
    if balanced:
        return _demean(_demean(x, g1, c1), g2, c2)
    scale = np.maximum(np.abs(x).max(axis=0), 1e-300)
    cur = x
    for _ in range(AP_MAX_SWEEPS):
        new = _demean(_demean(cur, g1, c1), g2, c2)
        done = np.all(np.abs(new - cur).max(axis=0) / scale < AP_TOL)
        cur = new
        if done:
            return cur
    raise RuntimeError("baseline alternating projections did not converge")


def tsls(y: np.ndarray, x: np.ndarray, z: np.ndarray) -> np.ndarray:
    """Two-stage least squares from cross-products.

    Parameters
    ----------
    y : numpy.ndarray
        (n,) dependent variable.
    x : numpy.ndarray
        (n, k) regressors.
    z : numpy.ndarray
        (n, m) instruments, m >= k.

    Returns
    -------
    numpy.ndarray
        (k,) ``(X'P_Z X)^{-1} X'P_Z y``.
    """
    zz, zx, zy = z.T @ z, z.T @ x, z.T @ y
    a = np.linalg.solve(zz, zx)  # (m, k): Z'Z^{-1} Z'X
    return np.linalg.solve(zx.T @ a, a.T @ zy)


def baseline_fit(data: BaselineData, study: Study) -> BaselineFit:
    """Demand by 2SLS, the markup regressor, the supply relation by 2SLS.

    Parameters
    ----------
    data : BaselineData
    study : Study
        Linear demand, market and period effects (the benchmark's study).

    Returns
    -------
    BaselineFit
    """
    d, s = study.demand, study.supply
    assert s is not None and d.form == "linear" and set(d.effects) == {"market", "period"}
    c = data.columns
    secs: dict[str, float] = {}
    t0 = time.perf_counter()
    p, q = c[study.panel.price], c[study.panel.quantity]
    exog = [c[x] for x in (*d.shifters, *d.rotators)]
    endog = [p] + [p * c[r] for r in d.rotators]
    instr = [c[w] for w in d.instruments]
    instr += [c[w] * c[r] for r in d.rotators for w in d.instruments]
    kx, ke = len(exog), len(endog)
    block = absorb_two_way(np.column_stack([q, *exog, *endog, *instr]), data.market,
                           data.period)
    t1 = time.perf_counter()
    secs["demand absorb"] = t1 - t0
    yd = block[:, 0]
    xd = block[:, 1:1 + kx + ke]
    zd = np.column_stack([block[:, 1:1 + kx], block[:, 1 + kx + ke:]])
    bd = tsls(yd, xd, zd)
    t2 = time.perf_counter()
    secs["demand 2sls"] = t2 - t1
    slope = bd[kx] + sum(bd[kx + 1 + i] * c[r] for i, r in enumerate(d.rotators))
    keep = slope < 0
    qstar = -q[keep] / slope[keep]
    t3 = time.perf_counter()
    secs["markup regressor"] = t3 - t2
    sx = [c[w][keep] for w in s.cost_shifters]
    sendog = [qstar] + ([q[keep]] if s.cost_slope else [])
    names = [*d.shifters, *d.rotators]
    sinstr = [c[v][keep] for v in names]
    sinstr += [c[x][keep] * c[r][keep] for r in d.rotators for x in d.shifters]
    sinstr += [c[v][keep] for v in s.instruments if v not in names]
    sblock = absorb_two_way(np.column_stack([p[keep], *sx, *sendog, *sinstr]),
                            data.market[keep], data.period[keep])
    t4 = time.perf_counter()
    secs["supply absorb"] = t4 - t3
    ks, kse = len(sx), len(sendog)
    bs = tsls(sblock[:, 0], sblock[:, 1:1 + ks + kse],
              np.column_stack([sblock[:, 1:1 + ks], sblock[:, 1 + ks + kse:]]))
    secs["supply 2sls"] = time.perf_counter() - t4
    return BaselineFit(demand=bd, theta=float(bs[ks]), rows_used=int(keep.sum()),
                       seconds=secs)


def run_baseline(study_path: Path) -> tuple[BaselineFit, float]:
    """Read and fit; return the fit and the seconds spent reading."""
    st = load_study(study_path)
    t0 = time.perf_counter()
    data = baseline_read(st)
    read = time.perf_counter() - t0
    return baseline_fit(data, st), read


# ----------------------------------------------------------------------------------------
# Measurements
# ----------------------------------------------------------------------------------------


def best_time(fn: Callable[[], Any], repeat: int) -> tuple[float, Any]:
    """Best wall time of ``repeat`` calls (garbage collected before each) and the last result."""
    best, out = math.inf, None
    for _ in range(max(repeat, 1)):
        gc.collect()
        t0 = time.perf_counter()
        out = fn()
        best = min(best, time.perf_counter() - t0)
    return best, out


def full_stages(study_path: Path,
                on_stage: Callable[[str, float, float | None], None]) -> float:
    """The estimate path stage by stage, with the time and peak memory of each.

    The stages are those :func:`conduct.estimate` runs for the benchmark's
    study; the derived costs come last because at large sizes they are the
    stage most likely to run out of memory.

    Parameters
    ----------
    study_path : Path
    on_stage : callable
        Called as ``on_stage(name, seconds, peak_mb)`` after each stage;
        ``peak_mb`` is the stage's peak RSS (None off Linux).

    Returns
    -------
    float
        theta.
    """
    gc.collect()
    _reset_peak()
    t = time.perf_counter()

    def lap(name: str) -> None:
        nonlocal t
        now = time.perf_counter()
        on_stage(name, now - t, _status_mb("VmHWM"))
        gc.collect()
        _reset_peak()
        t = time.perf_counter()

    st = load_study(study_path)
    check_identification(st)
    lap("study + identification")
    panel = load_panel(st)
    lap("load panel")
    demand = estimate_demand(panel, st)
    lap("demand (with diagnostics)")
    supply = estimate_supply(panel, st, demand)
    lap("supply (with tests)")
    theta_ar_set(panel, st, demand, supply)
    lap("AR set for theta")
    derive(panel, st, demand, supply)
    lap("derived costs")
    return supply.theta


def _status_mb(field: str) -> float | None:
    """A ``Vm*`` field of ``/proc/self/status`` in MB (Linux), or None."""
    try:
        text = Path("/proc/self/status").read_text()
    except OSError:
        return None
    for line in text.splitlines():
        if line.startswith(field + ":"):
            return float(line.split()[1]) / 1024.0  # kB
    return None


def _reset_peak() -> bool:
    """Reset this process's peak RSS to its current RSS (Linux >= 4.0)."""
    try:
        Path("/proc/self/clear_refs").write_text("5")
    except OSError:
        return False
    return True


def _peak_mb() -> float:
    """Peak RSS of this process in MB.

    ``VmHWM`` belongs to the process image, so it starts afresh at ``exec``;
    ``ru_maxrss`` (the fallback off Linux) also remembers the parent's peak
    across fork and exec, which overstates a spawned child.
    """
    hwm = _status_mb("VmHWM")
    if hwm is not None:
        return hwm
    scale = 1024.0 if sys.platform != "darwin" else 1024.0 * 1024.0
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / scale


def _measure_in_child(kind: str, study_path: str, keep_memory: bool) -> dict[str, float]:
    """Run one measurement in this (fresh) process and report its peak RSS."""
    if keep_memory:
        keep_freed_memory()
    gc.collect()
    start = _status_mb("VmRSS") or _peak_mb()
    _reset_peak()
    if kind == "full":
        estimate(Path(study_path), quiet=True)
    elif kind == "baseline":
        run_baseline(Path(study_path))
    else:
        st = load_study(Path(study_path))
        _replicate_function(load_panel(st), st)(0)
    return {"start_mb": start, "peak_mb": _peak_mb()}


def peak_memory(kind: str, study_path: Path, keep_memory: bool = True) -> dict[str, float]:
    """Peak RSS of one measurement in a freshly spawned process.

    Parameters
    ----------
    kind : {"full", "baseline", "replicate"}
    study_path : Path
    keep_memory : bool
        Apply :func:`conduct.heap.keep_freed_memory` in that process first.

    Returns
    -------
    dict
        ``start_mb`` (after imports), ``peak_mb`` and ``added_mb``.
    """
    ctx = multiprocessing.get_context("spawn")
    with ProcessPoolExecutor(max_workers=1, mp_context=ctx) as pool:
        out = pool.submit(_measure_in_child, kind, str(study_path), keep_memory).result()
    out["added_mb"] = out["peak_mb"] - out["start_mb"]
    return out


def time_power(study_path: Path, replications: int) -> dict[str, Any]:
    """Time the power analysis (``conduct.power.power_analysis``) when it exists.

    Parameters
    ----------
    study_path : Path
    replications : int
        Simulated panels per true model.

    Returns
    -------
    dict
        ``seconds`` (None when not timed), ``replications`` and ``note``.
    """
    if importlib.util.find_spec("conduct.power") is None:
        return {"seconds": None, "replications": 0,
                "note": "not timed: conduct.power does not exist yet"}
    power = importlib.import_module("conduct.power")
    gc.collect()
    t0 = time.perf_counter()
    power.power_analysis(study_path, replications=replications)
    secs = time.perf_counter() - t0
    return {"seconds": secs, "replications": replications,
            "note": f"{replications} simulated panels per candidate model, in-process"}


def profile_estimate(study_path: Path, top: int) -> dict[str, list[dict[str, Any]]]:
    """cProfile of :func:`conduct.estimate`.

    Returns
    -------
    dict
        ``own``: the ``top`` functions by own time (time in the function
        itself); ``cumulative``: the ``top`` functions of conduct and
        linearmodels by cumulative time.  Each row has ``function``, ``calls``,
        ``own_s`` and ``cumulative_s``.
    """
    prof = cProfile.Profile()
    prof.enable()
    estimate(study_path, quiet=True)
    prof.disable()
    stats = pstats.Stats(prof)
    rows = []
    for (file, line, name), (_cc, calls, own, cum, _callers) in stats.stats.items():  # type: ignore[attr-defined]
        where = file if file.startswith("~") else f"{_short(file)}:{line}"
        rows.append({"function": f"{name} ({where})", "calls": calls, "own_s": own,
                     "cumulative_s": cum, "ours": "/conduct/" in file
                     or "/linearmodels/" in file})
    own_rows = sorted(rows, key=lambda r: -r["own_s"])[:top]
    cum_rows = sorted((r for r in rows if r["ours"]), key=lambda r: -r["cumulative_s"])[:top]
    for r in rows:
        del r["ours"]
    return {"own": own_rows, "cumulative": cum_rows}


def _short(path: str) -> str:
    parts = Path(path).parts
    for anchor in ("conduct", "linearmodels", "pandas", "numpy", "scipy", "pyarrow"):
        if anchor in parts:
            return "/".join(parts[len(parts) - 1 - parts[::-1].index(anchor):])
    return Path(path).name


def time_replicate(study: Study, reps: int) -> tuple[float, float]:
    """Mean time of a cluster-bootstrap replicate and best time of a baseline fit.

    Both start from data already in memory (the loaded panel; the baseline's
    arrays), so neither pays for reading the file.

    Parameters
    ----------
    study : Study
    reps : int
        Replicates ``0..reps-1`` timed; the baseline fit is timed ``reps`` times.

    Returns
    -------
    (float, float)
    """
    one = _replicate_function(load_panel(study), study)  # built once, as the bootstrap does
    times = []
    for r in range(reps):
        gc.collect()
        t0 = time.perf_counter()
        one(r)
        times.append(time.perf_counter() - t0)
    data = baseline_read(study)
    fit_s, _ = best_time(lambda: baseline_fit(data, study), reps)
    return float(np.mean(times)), fit_s


def _replicate_function(panel: Any, study: Study) -> Callable[[int], float]:
    """What :func:`conduct.bootstrap.cluster_bootstrap` runs per replicate."""
    kernel = replicate_kernel(panel, study)
    if kernel is None:
        return lambda r: one_replicate(panel, study, study.inference.seed, r)
    return lambda r: kernel.theta(study.inference.seed, r)


def measure_size(rows: int, args: argparse.Namespace, workdir: Path,
                 save: Callable[[dict[str, Any]], None]) -> dict[str, Any]:
    """Every measurement at one size, saving what is known after each step.

    Parameters
    ----------
    rows : int
    args : argparse.Namespace
    workdir : Path
    save : callable
        Receives the result so far after each step (so a process killed later
        still reports the earlier steps).

    Returns
    -------
    dict
        The measurements; ``error`` names the step that ran out of memory.
    """
    markets, periods = shape_for(rows)
    n = markets * periods
    out: dict[str, Any] = {"rows": n, "markets": markets, "periods": periods,
                           "full_stages_s": {}, "full_stages_peak_mb": {}}
    step = "simulating the panel"

    def done(text: str) -> None:
        save(out)
        _log(args, f"[{n:,} rows] {text}")

    try:
        study_path, sim_s, reused = make_study(rows, args.seed, workdir)
        st = load_study(study_path)
        out["simulate_s"] = None if reused else sim_s
        done("panel " + ("reused" if reused else f"simulated and written in {sim_s:.1f} s"))
        step = "baseline"
        base_s, (bfit, read_s) = best_time(lambda: run_baseline(study_path), args.repeat)
        out.update(baseline_s=base_s, baseline_read_s=read_s,
                   baseline_steps_s=bfit.seconds, theta_baseline=bfit.theta)
        done(f"baseline {base_s:.3f} s")

        step = "a bootstrap replicate"
        rep_s, fit_s = time_replicate(st, max(args.boot_reps, 1))
        out.update(replicate_s=rep_s, baseline_fit_s=fit_s, replicate_ratio=rep_s / fit_s)
        done(f"bootstrap replicate {out['replicate_s']:.2f} s")
        if not args.no_memory:
            step = "the baseline's peak-memory run"
            out["baseline_memory"] = peak_memory("baseline", study_path, not args.malloc_default)
            done(f"peak RSS baseline {out['baseline_memory']['peak_mb']:.0f} MB")

        def on_stage(name: str, secs: float, peak: float | None) -> None:
            out["full_stages_s"][name] = secs
            out["full_stages_peak_mb"][name] = peak
            done(f"stage {name}: {secs:.2f} s, peak RSS {peak or float('nan'):.0f} MB")

        step = "the stage-by-stage run"
        full_stages(study_path, on_stage)
        step = "the full estimate"
        full_s, res = best_time(lambda: estimate(study_path, quiet=True), args.repeat)
        out.update(full_s=full_s, time_ratio=full_s / base_s, theta_full=res.supply.theta,
                   theta_abs_diff=abs(res.supply.theta - bfit.theta))
        del res
        done(f"full estimate {full_s:.2f} s")
        if not args.no_memory:
            step = "the full estimate's peak-memory run"
            out["full_memory"] = peak_memory("full", study_path, not args.malloc_default)
            done(f"peak RSS full {out['full_memory']['peak_mb']:.0f} MB")
        if rows <= args.power_max_rows:
            step = "the power analysis"
            out["power"] = time_power(study_path, args.power_reps)
            done(f"power analysis {out['power']['seconds'] or float('nan'):.2f} s")
        if args.profile is not None and rows == args.profile:
            step = "the profile"
            out["profile"] = profile_estimate(study_path, args.profile_top)
            done("profiled")
    except MemoryError:
        out["error"] = (f"out of memory during {step} (address-space limit "
                        f"{args.mem_limit_gb:g} GB per process, --mem-limit-gb)")
        done(out["error"])
    return out


def _log(args: argparse.Namespace, text: str) -> None:
    if not args.quiet:
        print(text, file=sys.stderr, flush=True)


def _size_in_child(rows: int, args: argparse.Namespace, workdir: str) -> dict[str, Any]:
    """Child-process body: cap the address space, warm up, measure one size."""
    if not args.malloc_default:
        keep_freed_memory()  # as the command line does; baseline and full alike
    limit = int(args.mem_limit_gb * 1024**3)
    with contextlib.suppress(ValueError, OSError):
        resource.setrlimit(resource.RLIMIT_AS, (limit, limit))
    folder = Path(workdir)
    partial_file = folder / f"partial_{rows}.json"

    def save(out: dict[str, Any]) -> None:
        partial_file.write_text(json.dumps(out, default=float))

    warm, _, _ = make_study(2_000, args.seed, folder)  # lazy imports and caches, untimed
    estimate(warm, quiet=True)
    run_baseline(warm)
    return measure_size(rows, args, folder, save)


def run_size(rows: int, args: argparse.Namespace, workdir: Path) -> dict[str, Any]:
    """Measure one size in a fresh process; survive that process being killed.

    Baseline and full estimate still run in one process on the same data; a
    process per size keeps sizes from sharing heap fragmentation and lets the
    benchmark report the steps done before an out-of-memory failure.
    """
    ctx = multiprocessing.get_context("spawn")
    partial_file = workdir / f"partial_{rows}.json"
    partial_file.unlink(missing_ok=True)
    try:
        with ProcessPoolExecutor(max_workers=1, mp_context=ctx) as pool:
            return pool.submit(_size_in_child, rows, args, str(workdir)).result()
    except BrokenProcessPool:
        markets, periods = shape_for(rows)
        out: dict[str, Any] = {"rows": markets * periods, "markets": markets,
                               "periods": periods}
        if partial_file.exists():
            out = json.loads(partial_file.read_text())
        out["error"] = "the measuring process was killed (out of memory?) after the steps shown"
        _log(args, f"[{out['rows']:,} rows] {out['error']}")
        return out


# ----------------------------------------------------------------------------------------
# Report
# ----------------------------------------------------------------------------------------


def add_exponents(results: list[dict[str, Any]]) -> None:
    """Growth exponent of time in rows, ``log(t_b/t_a) / log(n_b/n_a)``, from the size before."""
    for a, b in itertools.pairwise(results):
        span = math.log(b["rows"] / a["rows"])
        for key in ("full", "baseline"):
            if a.get(f"{key}_s") and b.get(f"{key}_s"):
                b[f"exponent_{key}"] = math.log(b[f"{key}_s"] / a[f"{key}_s"]) / span


def _num(value: float | None, spec: str) -> str:
    return "-" if value is None else format(value, spec)


def _verdict(value: float | None, ok: bool) -> str:
    return "-" if value is None else ("yes" if ok else "NO")


DATA_NOTE = (
    "conduct.simulate (the library's simulator, used at every size): linear demand with a "
    "rotator, Cournot with 2-6 asymmetric sellers and exit, market + period effects; "
    f"cost-index coefficients x{COST_SCALE} and cost_constant {COST_CONSTANT:g} so that "
    "500-period panels stay interior; written as Parquet"
)


def text_report(results: list[dict[str, Any]], args: argparse.Namespace) -> str:
    """The human-readable tables."""
    lines = [
        "conduct benchmark: full estimate vs bare-numpy baseline (same process, same file)",
        f"data: {DATA_NOTE}",
        f"time: best of {args.repeat} run(s), wall clock; memory: peak RSS (VmHWM) of a fresh "
        "process per measurement (+MB = peak minus RSS after imports)",
        "malloc: " + ("glibc defaults (--malloc-default)" if args.malloc_default else
                      "freed memory kept for reuse (conduct.heap, as the command line does) "
                      "in every measuring process, baseline and full alike"),
        "",
        f"{'rows':>10} {'shape':>10} | {'full s':>8} {'base s':>8} {'ratio':>6} "
        f"{'<=3':>4} | {'exp full':>8} {'exp base':>8} {'<=1.1':>5} | "
        f"{'full MB':>8} {'+MB':>7} {'base MB':>8} {'+MB':>7} {'<4GB':>4}",
    ]
    for r in results:
        fm, bm = r.get("full_memory") or {}, r.get("baseline_memory") or {}
        ratio, ef = r.get("time_ratio"), r.get("exponent_full")
        peak = fm.get("peak_mb")
        lines.append(
            f"{r['rows']:>10,} {r['markets']:>5}x{r['periods']:<4} | "
            f"{_num(r.get('full_s'), '8.2f'):>8} {_num(r.get('baseline_s'), '8.3f'):>8} "
            f"{_num(ratio, '6.1f'):>6} {_verdict(ratio, (ratio or 0) <= TARGET_TIME_RATIO):>4} | "
            f"{_num(ef, '.2f'):>8} {_num(r.get('exponent_baseline'), '.2f'):>8} "
            f"{_verdict(ef, (ef or 0) <= TARGET_EXPONENT):>5} | "
            f"{_num(peak, ',.0f'):>8} {_num(fm.get('added_mb'), ',.0f'):>7} "
            f"{_num(bm.get('peak_mb'), ',.0f'):>8} {_num(bm.get('added_mb'), ',.0f'):>7} "
            f"{_verdict(peak, (peak or 0) < TARGET_PEAK_GB * 1024):>4}"
        )
    lines += ["", f"{'rows':>10} | {'replicate s':>11} {'base fit s':>10} {'ratio':>6} "
                  f"{'<=2':>4} | {'theta full':>10} {'theta base':>10} {'|diff|':>8}"]
    for r in results:
        rr = r.get("replicate_ratio")
        lines.append(
            f"{r['rows']:>10,} | {_num(r.get('replicate_s'), '11.3f'):>11} "
            f"{_num(r.get('baseline_fit_s'), '10.3f'):>10} {_num(rr, '6.1f'):>6} "
            f"{_verdict(rr, (rr or 0) <= TARGET_REPLICATE_RATIO):>4} | "
            f"{_num(r.get('theta_full'), '10.5f'):>10} "
            f"{_num(r.get('theta_baseline'), '10.5f'):>10} "
            f"{_num(r.get('theta_abs_diff'), '8.1e'):>8}"
        )
    lines += ["", "where the time and memory go (seconds; peak RSS of the stage in MB):"]
    for r in results:
        stages = r.get("full_stages_s") or {}
        peaks = r.get("full_stages_peak_mb") or {}
        text = ", ".join(f"{k} {v:.2f} s / {_num(peaks.get(k), ',.0f')} MB"
                         for k, v in stages.items())
        lines.append(f"  {r['rows']:>9,} full: {text or '-'}")
        if "baseline_steps_s" in r:
            steps = ", ".join(f"{k} {v:.3f}" for k, v in r["baseline_steps_s"].items())
            lines.append(f"  {'':>9} baseline: read {r['baseline_read_s']:.3f}, {steps}")
        if r.get("simulate_s") is not None:
            lines.append(f"  {'':>9} simulating and writing the panel: "
                         f"{r['simulate_s']:.1f} s (not part of any ratio)")
        if "power" in r:
            pw = r["power"]
            lines.append(f"  {'':>9} power analysis: "
                         + (pw["note"] if pw["seconds"] is None else f"{pw['seconds']:.2f} s "
                            f"({pw['note']})"))
        if "error" in r:
            lines.append(f"  {'':>9} ERROR: {r['error']}")
    for r in results:
        if "profile" not in r:
            continue
        for view, what in (("own", "all functions by own time"),
                           ("cumulative", "conduct and linearmodels functions by cumulative "
                                          "time")):
            lines += ["", f"cProfile of conduct.estimate at {r['rows']:,} rows: {what} "
                          "(profiler overhead included)",
                      f"  {'own s':>7} {'cum s':>7} {'calls':>9}  function"]
            for p in r["profile"][view]:
                lines.append(f"  {p['own_s']:>7.2f} {p['cumulative_s']:>7.2f} "
                             f"{p['calls']:>9}  {p['function']}")
    return "\n".join(lines)


def _default_mem_limit() -> float:
    try:
        phys = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    except (ValueError, OSError, AttributeError):
        return 16.0
    return round(phys / 1024**3 / 2, 1)


def _size(text: str) -> int:
    return int(float(text))


def parse_args(argv: list[str] | None) -> argparse.Namespace:
    """Command-line options."""
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0],
                                formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--sizes", type=lambda s: [_size(x) for x in s.split(",")],
                   help="comma-separated row counts, e.g. 1e4,1e5,1e6 (default)")
    p.add_argument("--quick", action="store_true", help="10^4 and 10^5 rows only")
    p.add_argument("--repeat", type=int, default=1, help="timing runs per measurement (best)")
    p.add_argument("--boot-reps", type=int, default=2,
                   help="bootstrap replicates timed per size (mean)")
    p.add_argument("--power-reps", type=int, default=2,
                   help="simulated panels per model when timing the power analysis")
    p.add_argument("--power-max-rows", type=_size, default=100_000,
                   help="time the power analysis up to this size")
    p.add_argument("--malloc-default", action="store_true",
                   help="leave glibc malloc at its defaults (the command line and, by default, "
                        "every measuring process here keep freed memory for reuse)")
    p.add_argument("--no-memory", action="store_true", help="skip peak-memory processes")
    p.add_argument("--seed", type=int, default=1, help="simulation seed")
    p.add_argument("--workdir", type=Path,
                   help="keep panels here and reuse them on later runs (default: a "
                        "temporary folder removed at the end)")
    p.add_argument("--profile", type=_size, help="also cProfile estimate() at this size")
    p.add_argument("--profile-top", type=int, default=10, help="functions to list")
    p.add_argument("--mem-limit-gb", type=float, default=_default_mem_limit(),
                   help="address-space cap per measuring process, so that running out of "
                        "memory is reported instead of invoking the system's OOM killer "
                        "(default: half the physical memory)")
    p.add_argument("--json", action="store_true", help="print JSON instead of tables")
    p.add_argument("--quiet", action="store_true", help="no progress lines on stderr")
    args = p.parse_args(argv)
    if args.sizes is None:
        args.sizes = list(QUICK_SIZES if args.quick else DEFAULT_SIZES)
    args.sizes = sorted(set(args.sizes))
    if args.profile is not None and args.profile not in args.sizes:
        p.error(f"--profile {args.profile} is not one of --sizes {args.sizes}")
    return args


def main(argv: list[str] | None = None) -> int:
    """Run the benchmark and print the tables (or JSON)."""
    args = parse_args(argv)
    with contextlib.ExitStack() as stack:
        if args.workdir is None:
            workdir = Path(stack.enter_context(tempfile.TemporaryDirectory(prefix="bench-")))
        else:
            workdir = args.workdir
            workdir.mkdir(parents=True, exist_ok=True)
        results = [run_size(n, args, workdir) for n in args.sizes]
    add_exponents(results)
    if args.json:
        doc = {"targets": {"time_ratio": TARGET_TIME_RATIO, "exponent": TARGET_EXPONENT,
                           "peak_gb": TARGET_PEAK_GB, "replicate_ratio": TARGET_REPLICATE_RATIO},
               "memory": "peak RSS (VmHWM) of a fresh process per measurement",
               "timing": f"best of {args.repeat}, wall clock",
               "data": DATA_NOTE,
               "sizes": results}
        print(json.dumps(doc, indent=2, sort_keys=True, default=float))
    else:
        print(text_report(results, args))
    return 0


if __name__ == "__main__":
    sys.exit(main())
