"""Cluster bootstrap of the conduct parameter that re-estimates both stages.

Each replicate draws markets with replacement (a market drawn twice enters as
two distinct clusters), re-estimates demand, rebuilds the markup regressor and
re-estimates the supply relation.  Replicate ``r`` draws from its own random
stream, seeded by ``(seed, r)``, so results do not depend on how replicates
are scheduled.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, replace
from functools import partial

import numpy as np

from conduct.demand import estimate_demand
from conduct.errors import ConductError
from conduct.panel import MARKET, Panel
from conduct.progress import Progress
from conduct.study import Study
from conduct.supply import estimate_supply

__all__ = ["BootstrapResult", "cluster_bootstrap", "one_replicate", "resample_markets"]


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


def one_replicate(panel: Panel, study: Study, seed: int, r: int) -> float:
    """Theta from bootstrap replicate ``r`` (NaN when it cannot be estimated)."""
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
    if mapper is None:
        bar = Progress(replications, "bootstrap", quiet=quiet)
        thetas = []
        for r in range(replications):
            thetas.append(one_replicate(panel, study, seed, r))
            bar.step()
        bar.close()
    else:
        thetas = mapper(partial(one_replicate, panel, study, seed), range(replications))
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

