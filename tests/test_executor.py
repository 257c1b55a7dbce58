"""Replicates give the same results wherever they run (issue 9, item 3).

The cluster bootstrap of a small simulated panel is run in this process, on a
two-process local pool and on a real two-worker ``distributed.LocalCluster``
started on loopback; the replicate thetas must be identical to the last bit,
because every replicate seeds its own stream from ``(seed, r)`` and results are
returned in replicate order.  No test here measures time.
"""

from __future__ import annotations

import functools
import importlib.util
import sys
from collections.abc import Iterator

import numpy as np
import pytest

from conduct import executor
from conduct.bootstrap import cluster_bootstrap
from conduct.errors import ConductError
from conduct.executor import (
    DaskMapper,
    InProcessMapper,
    ProcessMapper,
    chunked,
    make_mapper,
)
from conduct.panel import Panel, load_panel
from conduct.presets import write_study
from conduct.simulate import SimulationSpec
from conduct.study import Study, load_study

SEED = 11
REPLICATES = 6
HAVE_DASK = importlib.util.find_spec("distributed") is not None


@pytest.fixture(scope="module")
def small_study(tmp_path_factory: pytest.TempPathFactory) -> tuple[Panel, Study]:
    """A 12 x 12 simulated Cournot panel with market and period effects."""
    folder = tmp_path_factory.mktemp("executor")
    path = write_study(folder, SimulationSpec(markets=12, periods=12, seed=5))
    study = load_study(path)
    return load_panel(study), study


@pytest.fixture(scope="module")
def reference(small_study: tuple[Panel, Study]) -> np.ndarray:
    """Replicate thetas from the plain in-process loop (no mapper)."""
    panel, study = small_study
    res = cluster_bootstrap(panel, study, replications=REPLICATES, seed=SEED, quiet=True)
    assert res.failures == 0  # a clean panel: every replicate estimates
    return res.thetas


def _bootstrap(small_study: tuple[Panel, Study], mapper: executor.Mapper) -> np.ndarray:
    panel, study = small_study
    res = cluster_bootstrap(panel, study, replications=REPLICATES, seed=SEED, quiet=True,
                            mapper=mapper)
    return res.thetas


def test_chunks_are_contiguous_and_in_order() -> None:
    assert chunked(range(7), 3) == [[0, 1, 2], [3, 4, 5], [6]]
    assert chunked([4, 2, 9], 0) == [[4], [2], [9]]
    assert chunked([], 5) == []


def test_make_mapper_picks_the_backend() -> None:
    assert isinstance(make_mapper(), InProcessMapper)
    assert isinstance(make_mapper(workers=1), InProcessMapper)
    assert isinstance(make_mapper(workers=3), ProcessMapper)
    assert make_mapper(workers=3).describe() == "processes:3"
    m = make_mapper(scheduler=" tcp://127.0.0.1:8786 ")
    assert isinstance(m, DaskMapper)
    assert m.describe() == "dask:tcp://127.0.0.1:8786"


@pytest.mark.parametrize(
    ("kwargs", "needle"),
    [
        ({"workers": 0}, "positive whole number"),
        ({"workers": True}, "positive whole number"),
        ({"workers": 2.5}, "positive whole number"),
        ({"workers": 2, "scheduler": "tcp://127.0.0.1:8786"}, "not both"),
        ({"scheduler": "  "}, "needs an address"),
    ],
)
def test_bad_choices_are_user_errors(kwargs: dict[str, object], needle: str) -> None:
    with pytest.raises(ConductError, match=needle):
        make_mapper(**kwargs)  # type: ignore[arg-type]


def test_unpicklable_task_is_refused_before_any_worker_starts() -> None:
    with pytest.raises(TypeError, match=r"functools\.partial"):
        ProcessMapper(2)(lambda r: float(r), range(3))


def test_in_process_mapper_equals_the_plain_loop(small_study: tuple[Panel, Study],
                                                 reference: np.ndarray) -> None:
    np.testing.assert_array_equal(_bootstrap(small_study, make_mapper()), reference)


def test_process_pool_gives_identical_thetas(small_study: tuple[Panel, Study],
                                             reference: np.ndarray) -> None:
    # chunks of one replicate: finishing order may differ from replicate order
    thetas = _bootstrap(small_study, make_mapper(workers=2, chunksize=1))
    np.testing.assert_array_equal(thetas, reference)


def test_missing_dask_names_the_extra(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setitem(sys.modules, "distributed", None)  # import now raises ImportError
    with pytest.raises(ConductError, match=r"conduct\[dask\]"):
        make_mapper(scheduler="tcp://127.0.0.1:8786")(functools.partial(pow, 2), range(2))


@pytest.fixture(scope="module")
def local_cluster() -> Iterator[str]:
    """A real two-process Dask cluster on loopback; yields the scheduler address."""
    if not HAVE_DASK:
        pytest.skip("dask[distributed] is not installed (pip install 'conduct[dask]')")
    import distributed

    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  host="127.0.0.1", dashboard_address=":0") as cluster:
        yield cluster.scheduler_address


@pytest.mark.skipif(not HAVE_DASK, reason="dask[distributed] is not installed "
                                          "(pip install 'conduct[dask]')")
def test_dask_local_cluster_gives_identical_thetas(small_study: tuple[Panel, Study],
                                                   reference: np.ndarray,
                                                   local_cluster: str) -> None:
    thetas = _bootstrap(small_study, make_mapper(scheduler=local_cluster, chunksize=1))
    np.testing.assert_array_equal(thetas, reference)


@pytest.mark.skipif(not HAVE_DASK, reason="dask[distributed] is not installed "
                                          "(pip install 'conduct[dask]')")
def test_unreachable_scheduler_is_a_user_error(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(executor, "_DASK_TIMEOUT", 1)
    with pytest.raises(ConductError, match="Could not connect"):
        make_mapper(scheduler="tcp://127.0.0.1:9")(functools.partial(pow, 2), range(2))
