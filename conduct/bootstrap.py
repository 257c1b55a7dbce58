"""Cluster bootstrap of the conduct parameter that re-estimates both stages.

Each replicate draws markets with replacement (a market drawn twice enters as
two distinct clusters), re-estimates demand, rebuilds the markup regressor and
re-estimates the supply relation.  Replicate ``r`` draws from its own random
stream, seeded by ``(seed, r)``, so results do not depend on how replicates
are scheduled.

Replicates run on a :class:`ReplicateKernel`: the raw demand and supply
columns are built once, and each replicate only gathers rows, absorbs the
fixed effects and solves the two 2SLS normal equations (point estimates, no
standard errors or diagnostics); a resample whose design is too
ill-conditioned for the normal equations goes through the full path.  Tests
keep it equal to re-running
:func:`conduct.demand.estimate_demand` and :func:`conduct.supply.estimate_supply`
on the resampled panel (:func:`one_replicate`), which remains the reference and
the path for LIML and GMM demand.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, replace
from functools import partial

import numpy as np

from conduct.absorb import absorb, dense_codes
from conduct.demand import demand_columns, estimate_demand, price_slope
from conduct.errors import ConductError
from conduct.panel import MARKET, TIME, Panel
from conduct.progress import Progress
from conduct.study import Study
from conduct.supply import estimate_supply, supply_columns

__all__ = ["BootstrapResult", "ReplicateKernel", "cluster_bootstrap", "one_replicate",
           "replicate_kernel", "resample_markets"]

SINGULAR = 1e10  # scaled Z'Z or X_hat'X condition beyond which the full path is used instead


@dataclass(frozen=True, slots=True)
class BootstrapResult:
    """Bootstrap distribution of theta.

    Attributes
    ----------
    replications : int
        Replicates requested.
    thetas : numpy.ndarray
        (B_ok,) theta of each replicate that could be estimated.
    failures : int
        Replicates that could not be estimated (e.g. a resample without variation).
    se : float
        Standard deviation of the replicates.
    ci : tuple of float
        Percentile interval at the study's level.
    seed : int
    """

    replications: int
    thetas: np.ndarray
    failures: int
    se: float
    ci: tuple[float, float]
    seed: int


def resample_markets(panel: Panel, rng: np.random.Generator) -> Panel:
    """Draw markets with replacement; each draw becomes its own market label.

    Parameters
    ----------
    panel : Panel
    rng : numpy.random.Generator

    Returns
    -------
    Panel
        Same description and source rows as the original (used only for messages).
    """
    f = panel.frame
    labels = f[MARKET].to_numpy()
    uniq, inverse = np.unique(labels, return_inverse=True)
    order = np.argsort(inverse, kind="stable")
    bounds = np.searchsorted(inverse[order], np.arange(uniq.size + 1))
    draws = rng.integers(0, uniq.size, uniq.size)
    sizes = bounds[draws + 1] - bounds[draws]
    idx = np.concatenate([order[bounds[g]:bounds[g + 1]] for g in draws])
    frame = f.iloc[idx].reset_index(drop=True)
    names = np.asarray([f"{uniq[g]}#{j}" for j, g in enumerate(draws)], dtype=object)
    frame[MARKET] = np.repeat(names, sizes)
    return replace(panel, frame=frame, source_rows=np.arange(len(frame)) + 2)


def _draw(n_markets: int, seed: int, r: int) -> np.ndarray:
    """Markets drawn by replicate ``r`` (the same draws as :func:`resample_markets`)."""
    return np.random.default_rng([seed, r]).integers(0, n_markets, n_markets)


def _tsls(y: np.ndarray, x: np.ndarray, z: np.ndarray) -> np.ndarray:
    """2SLS point estimates from the normal equations; ValueError when near-singular.

    Columns are scaled to unit length inside the cross-products, so the
    singularity checks do not depend on the units of the data.
    """
    zz, zx, zy = z.T @ z, z.T @ x, z.T @ y
    sz = np.sqrt(np.diag(zz))
    sx = np.sqrt(np.einsum("ij,ij->j", x, x))
    if np.any(sz <= 0) or np.any(sx <= 0):
        raise ValueError("a column without variation")
    zz_s = zz / np.outer(sz, sz)
    zx_s = zx / np.outer(sz, sx)
    if np.linalg.cond(zz_s) > SINGULAR:
        raise ValueError("instruments nearly collinear")
    a = np.linalg.solve(zz_s, zx_s)
    xpx = zx_s.T @ a
    if np.linalg.cond(xpx) > SINGULAR:
        raise ValueError("regressors nearly collinear given the instruments")
    return np.linalg.solve(xpx, a.T @ (zy / sz)) / sx


@dataclass(frozen=True)
class ReplicateKernel:
    """Arrays a bootstrap replicate needs, built once from the panel.

    Attributes
    ----------
    order, bounds : numpy.ndarray
        Rows sorted by market and the start of each market in ``order``.
    periods : numpy.ndarray
        (n,) period codes.
    demand : numpy.ndarray
        (n, k_d) raw demand columns: ``_y``, exogenous, price terms, instruments.
    n_exog, n_endog : int
        Counts of demand exogenous regressors and price terms.
    names : tuple of str
        Demand regressor names (exogenous then price terms; ``const`` first without effects).
    rotators : numpy.ndarray
        (n, r) rotator values, in the order of ``rotator_names``.
    rotator_names : tuple of str
    supply : numpy.ndarray
        (n, k_s) raw supply columns: price, cost shifters, Q, excluded instruments.
    n_cost, n_instr : int
        Counts of cost shifters and supply excluded instruments.
    p, q : numpy.ndarray
        (n,) price and quantity.
    effects : tuple of str
    price_name, form : str
    cost_slope : bool
    panel, study
        For replicates whose design is too ill-conditioned for the normal
        equations: those are estimated by :func:`one_replicate` instead.
    """

    order: np.ndarray
    bounds: np.ndarray
    periods: np.ndarray
    demand: np.ndarray
    n_exog: int
    n_endog: int
    names: tuple[str, ...]
    rotators: np.ndarray
    rotator_names: tuple[str, ...]
    supply: np.ndarray
    n_cost: int
    n_instr: int
    p: np.ndarray
    q: np.ndarray
    effects: tuple[str, ...]
    price_name: str
    form: str
    cost_slope: bool
    panel: Panel
    study: Study

    @property
    def n_markets(self) -> int:
        """Markets in the panel."""
        return len(self.bounds) - 1

    def _absorb(self, x: np.ndarray, markets: np.ndarray, periods: np.ndarray
                ) -> np.ndarray:
        groups = [dense_codes(g) for name, g in (("market", markets), ("period", periods))
                  if name in self.effects]
        if not groups:
            return np.column_stack([x, np.ones(len(x))])  # constant as the last column
        return absorb(x, groups).values

    def theta(self, seed: int, r: int) -> float:
        """Theta of replicate ``r`` (NaN when the resample cannot be estimated)."""
        draws = _draw(self.n_markets, seed, r)
        starts, sizes = self.bounds[draws], np.diff(self.bounds)[draws]
        ends = np.cumsum(sizes)
        idx = self.order[np.arange(ends[-1]) - np.repeat(ends - sizes - starts, sizes)]
        markets = np.repeat(np.arange(len(draws)), sizes)
        periods = self.periods[idx]
        try:
            d = self._absorb(self.demand[idx], markets, periods)
            const = d[:, -1:] if d.shape[1] > self.demand.shape[1] else d[:, :0]
            ex = np.column_stack([const, d[:, 1:1 + self.n_exog]])
            en = d[:, 1 + self.n_exog:1 + self.n_exog + self.n_endog]
            inst = d[:, 1 + self.n_exog + self.n_endog:self.demand.shape[1]]
            b = _tsls(d[:, 0], np.column_stack([ex, en]), np.column_stack([ex, inst]))
            coef = dict(zip(self.names, b, strict=True))
            p, q = self.p[idx], self.q[idx]
            rot = {name: self.rotators[idx, j] for j, name in enumerate(self.rotator_names)}
            slope, _ = price_slope(coef, self.price_name, rot, p, q, self.form)
            keep = np.flatnonzero(slope < 0)
            if len(keep) < 10:
                return float("nan")
            qstar = -q[keep] / slope[keep]
            raw = np.column_stack([self.supply[idx[keep]], qstar])
            s = self._absorb(raw, markets[keep], periods[keep])
            k_raw = raw.shape[1]
            const = s[:, -1:] if s.shape[1] > k_raw else s[:, :0]
            ex = np.column_stack([const, s[:, 1:1 + self.n_cost]])
            en = np.column_stack([s[:, k_raw - 1:k_raw]]
                                 + ([s[:, 1 + self.n_cost:2 + self.n_cost]]
                                    if self.cost_slope else []))
            inst = s[:, 2 + self.n_cost:2 + self.n_cost + self.n_instr]
            bs = _tsls(s[:, 0], np.column_stack([ex, en]), np.column_stack([ex, inst]))
        except (ValueError, np.linalg.LinAlgError, ConductError):
            # ill-conditioned resample: the full path decides (estimate or refuse)
            return one_replicate(self.panel, self.study, seed, r)
        theta = float(bs[ex.shape[1]])
        return theta if np.isfinite(theta) else float("nan")


def replicate_kernel(panel: Panel, study: Study) -> ReplicateKernel | None:
    """Build the replicate kernel; None when replicates need the full path (LIML, GMM).

    Parameters
    ----------
    panel : Panel
    study : Study
        With a ``[supply]`` table.

    Returns
    -------
    ReplicateKernel or None
    """
    if study.demand.estimator != "2sls" or study.supply is None:
        return None
    f = panel.frame
    mk = panel.market_codes()
    order = np.argsort(mk, kind="stable")
    bounds = np.searchsorted(mk[order], np.arange(int(mk.max()) + 2))
    dc = demand_columns(f, study)
    names_d = ["_y", *dc.exog, *dc.endog, *dc.instr]
    sdata, sraw = supply_columns(f, study)
    cost = list(study.supply.cost_shifters)
    names_s = ["_p", *cost, "Q", *sraw]
    scols = {**sdata, **sraw}
    const = () if study.demand.effects else ("const",)
    rot = tuple(study.demand.rotators)
    return ReplicateKernel(
        order=order, bounds=bounds, periods=dense_codes(f[TIME].to_numpy()),
        demand=np.column_stack([dc.data[c] for c in names_d]),
        n_exog=len(dc.exog), n_endog=len(dc.endog),
        names=(*const, *dc.exog, *dc.endog),
        rotators=(np.column_stack([f[r].to_numpy(dtype=float) for r in rot]) if rot
                  else np.zeros((len(f), 0))),
        rotator_names=rot,
        supply=np.column_stack([scols[c] for c in names_s]), n_cost=len(cost),
        n_instr=len(sraw), p=sdata["_p"], q=sdata["Q"], effects=tuple(study.demand.effects),
        price_name=dc.price_name, form=study.demand.form,
        cost_slope=bool(study.supply.cost_slope), panel=panel, study=study,
    )


def one_replicate(panel: Panel, study: Study, seed: int, r: int) -> float:
    """Theta from bootstrap replicate ``r`` by the full estimation path (NaN on failure).

    The reference for :class:`ReplicateKernel` and the path for LIML or GMM demand.
    """
    rng = np.random.default_rng([seed, r])
    boot = resample_markets(panel, rng)
    try:
        demand = estimate_demand(boot, study, diagnostics=False)
        supply = estimate_supply(boot, study, demand, with_tests=False)
    except ConductError:
        return float("nan")
    return supply.theta


def cluster_bootstrap(
    panel: Panel,
    study: Study,
    *,
    replications: int,
    seed: int,
    quiet: bool = False,
    mapper: Callable[[Callable[[int], float], range], list[float]] | None = None,
) -> BootstrapResult:
    """Cluster (market) bootstrap of theta re-estimating demand and supply.

    Parameters
    ----------
    panel : Panel
    study : Study
    replications : int
    seed : int
    quiet : bool
        Suppress the progress bar.
    mapper : callable or None
        ``mapper(function, range)`` returning a list, to run replicates on an
        executor; None runs them in this process with a progress bar.

    Returns
    -------
    BootstrapResult
    """
    kernel = replicate_kernel(panel, study)
    one: Callable[[int], float] = (partial(kernel.theta, seed) if kernel is not None
                                   else partial(one_replicate, panel, study, seed))
    if mapper is None:
        bar = Progress(replications, "bootstrap", quiet=quiet)
        thetas = []
        for r in range(replications):
            thetas.append(one(r))
            bar.step()
        bar.close()
    else:
        thetas = mapper(one, range(replications))
    arr = np.asarray(thetas, dtype=float)
    ok = arr[np.isfinite(arr)]
    level = study.inference.level
    if ok.size < 2:
        return BootstrapResult(replications, ok, int(arr.size - ok.size), float("nan"),
                               (float("nan"), float("nan")), seed)
    lo, hi = np.quantile(ok, [(1 - level) / 2, (1 + level) / 2])
    return BootstrapResult(
        replications=replications,
        thetas=ok,
        failures=int(arr.size - ok.size),
        se=float(np.std(ok, ddof=1)),
        ci=(float(lo), float(hi)),
        seed=seed,
    )

