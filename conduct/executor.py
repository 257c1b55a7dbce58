"""Where independent replicates run: this process, local processes or a Dask cluster.

Bootstrap replicates, power-analysis replicates and per-group estimates are
independent tasks numbered ``0..B-1``.  A *mapper* runs them and returns the
results in task order::

    mapper(task, range(B)) -> [task(0), task(1), ..., task(B - 1)]

:func:`make_mapper` picks the backend at run time:

* in-process (the default): a plain loop;
* local processes (``workers=N``): a :class:`concurrent.futures.ProcessPoolExecutor`
  started with the ``spawn`` method (safe in threaded programs, the same on
  every platform);
* a Dask distributed cluster (``scheduler="tcp://host:port"``): the optional
  ``dask[distributed]`` package (``pip install "conduct[dask]"``), imported only
  when asked for.

Results do not depend on the backend: every task seeds its own random stream
from ``(seed, r)`` (see :func:`conduct.bootstrap.one_replicate`), never from a
worker, and results are put back in task order whatever order they finish in.

Notes
-----
**Tasks must be picklable** for the two parallel backends: map over a
top-level function bound with :func:`functools.partial` (e.g.
``partial(one_replicate, panel, study, seed)``), not over a lambda or a nested
function.  The task (which holds the panel) is serialised once per call and
sent once to each worker, then the workers receive only chunks of task
numbers: a process pool gets it through the worker initialiser, a Dask cluster
through ``scatter(..., broadcast=True)``.

**Chunks.**  Tasks travel in contiguous chunks of about ``B / (4 * workers)``
(at least one), which keeps the per-message overhead small while leaving
enough chunks to balance the load.

**Cost.**  A process pool is started for each call (a spawned worker imports
numpy, pandas and linearmodels, about a second) and shut down at the end, so
it pays off from a few dozen replicates on small panels and from a handful on
large ones.  Worker processes each use the machine's BLAS threads; with many
workers set ``OMP_NUM_THREADS=1`` (Dask workers do this themselves).
"""

from __future__ import annotations

import math
import multiprocessing
import pickle
from collections.abc import Callable, Sequence
from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait
from concurrent.futures.process import BrokenProcessPool
from dataclasses import dataclass
from typing import Any, Protocol, TypeVar

from conduct.errors import ConductError
from conduct.progress import Progress

__all__ = ["DaskMapper", "InProcessMapper", "Mapper", "ProcessMapper", "check_workers", "chunked",
           "make_mapper"]

T = TypeVar("T")

# Chunks per worker: more balances uneven replicates better, fewer cuts messaging overhead.
_CHUNKS_PER_WORKER = 4
# Seconds to wait for a Dask scheduler to answer and for at least one worker to join.
_DASK_TIMEOUT = 30


class Mapper(Protocol):
    """Run ``task(r)`` for every ``r`` in ``items``; return the results in that order."""

    def __call__(self, task: Callable[[int], T], items: Sequence[int]) -> list[T]:
        """Map ``task`` over ``items``."""
        ...

    def describe(self) -> str:
        """One line naming the backend (for logs and provenance)."""
        ...


def chunked(items: Sequence[int], size: int) -> list[list[int]]:
    """Split ``items`` into contiguous chunks of at most ``size``, in order.

    Parameters
    ----------
    items : sequence of int
    size : int
        Largest chunk, at least 1.

    Returns
    -------
    list of list of int
    """
    seq = list(items)
    size = max(int(size), 1)
    return [seq[i:i + size] for i in range(0, len(seq), size)]


def _chunk_size(n_items: int, workers: int, chunksize: int | None) -> int:
    if chunksize is not None:
        return max(int(chunksize), 1)
    return max(1, math.ceil(n_items / (_CHUNKS_PER_WORKER * max(workers, 1))))


def _serialise(task: Callable[[int], Any], where: str) -> bytes:
    """Pickle a task once, with a message that says how to fix an unpicklable one."""
    try:
        return pickle.dumps(task, protocol=pickle.HIGHEST_PROTOCOL)
    except (pickle.PicklingError, TypeError, AttributeError) as exc:
        raise TypeError(
            f"Tasks sent to {where} must be picklable; got {task!r} ({exc}). Map over a "
            "top-level function bound with functools.partial, not a lambda or a nested "
            "function."
        ) from exc


def _run_chunk(task: Callable[[int], T], chunk: list[int]) -> list[T]:
    """Run one chunk of tasks (executed on a worker)."""
    return [task(r) for r in chunk]


# The task installed in a pool worker by its initialiser (one per worker process).
_WORKER_TASK: Callable[[int], Any] | None = None


def _install_task(payload: bytes) -> None:
    """Worker initialiser: unpickle the task once per worker process."""
    global _WORKER_TASK
    _WORKER_TASK = pickle.loads(payload)


def _run_installed(chunk: list[int]) -> list[Any]:
    """Run one chunk with the task installed in this worker process."""
    if _WORKER_TASK is None:  # pragma: no cover - initialiser always runs first
        raise RuntimeError("worker process has no task installed")
    return _run_chunk(_WORKER_TASK, chunk)


def _worker_version() -> str:
    """The conduct version importable on a worker (run remotely by the Dask backend)."""
    import conduct

    return str(conduct.__version__)


@dataclass(frozen=True, slots=True)
class InProcessMapper:
    """Run tasks one after another in this process.

    Attributes
    ----------
    quiet : bool
        Suppress the progress bar (shown only on a terminal anyway).
    label : str
        What the progress bar counts.
    """

    quiet: bool = True
    label: str = "replicates"

    def __call__(self, task: Callable[[int], T], items: Sequence[int]) -> list[T]:
        """Map ``task`` over ``items`` in order.

        Parameters
        ----------
        task : callable
            ``task(r)`` for one task number.
        items : sequence of int

        Returns
        -------
        list
            ``[task(r) for r in items]``.
        """
        bar = Progress(len(items), self.label, quiet=self.quiet)
        out = []
        for r in items:
            out.append(task(r))
            bar.step()
        bar.close()
        return out

    def describe(self) -> str:
        """``in-process``."""
        return "in-process"


@dataclass(frozen=True, slots=True)
class ProcessMapper:
    """Run tasks on a pool of local worker processes.

    Attributes
    ----------
    workers : int
        Worker processes (at least 2; one worker runs in-process instead).
    chunksize : int or None
        Tasks per message; None picks about ``B / (4 * workers)``.
    quiet : bool
        Suppress the progress bar (shown only on a terminal anyway).
    label : str
        What the progress bar counts.
    """

    workers: int
    chunksize: int | None = None
    quiet: bool = True
    label: str = "replicates"

    def __call__(self, task: Callable[[int], T], items: Sequence[int]) -> list[T]:
        """Map ``task`` over ``items`` on worker processes; results in ``items`` order.

        Parameters
        ----------
        task : callable
            A picklable ``task(r)``.
        items : sequence of int

        Returns
        -------
        list

        Raises
        ------
        TypeError
            When ``task`` cannot be pickled.
        ConductError
            When a worker process dies (for instance killed for lack of memory).
        """
        items = list(items)
        if not items:
            return []
        payload = _serialise(task, "worker processes")
        chunks = chunked(items, _chunk_size(len(items), self.workers, self.chunksize))
        results: list[list[T] | None] = [None] * len(chunks)
        bar = Progress(len(items), self.label, quiet=self.quiet)
        ctx = multiprocessing.get_context("spawn")
        try:
            with ProcessPoolExecutor(max_workers=min(self.workers, len(chunks)), mp_context=ctx,
                                     initializer=_install_task, initargs=(payload,)) as pool:
                pending = {pool.submit(_run_installed, c): i for i, c in enumerate(chunks)}
                while pending:
                    done, _ = wait(pending, return_when=FIRST_COMPLETED)
                    for fut in done:
                        i = pending.pop(fut)
                        results[i] = fut.result()
                        bar.step(len(chunks[i]))
        except BrokenProcessPool as exc:
            raise ConductError(
                f"A worker process stopped unexpectedly ({exc}); it may have run out of "
                f"memory. Use fewer workers than {self.workers} or run in-process."
            ) from exc
        finally:
            bar.close()
        return [x for part in results if part is not None for x in part]

    def describe(self) -> str:
        """``processes:N``."""
        return f"processes:{self.workers}"


@dataclass(frozen=True, slots=True)
class DaskMapper:
    """Run tasks on a Dask distributed cluster.

    Attributes
    ----------
    address : str
        Scheduler address, e.g. ``tcp://10.0.0.5:8786``.
    chunksize : int or None
        Tasks per Dask task; None picks about ``B / (4 * workers)``.
    quiet : bool
        Suppress the progress bar (shown only on a terminal anyway).
    label : str
        What the progress bar counts.
    """

    address: str
    chunksize: int | None = None
    quiet: bool = True
    label: str = "replicates"

    def __call__(self, task: Callable[[int], T], items: Sequence[int]) -> list[T]:
        """Map ``task`` over ``items`` on the cluster; results in ``items`` order.

        Parameters
        ----------
        task : callable
            A picklable ``task(r)``.
        items : sequence of int

        Returns
        -------
        list

        Raises
        ------
        TypeError
            When ``task`` cannot be pickled.
        ConductError
            When dask is not installed, the scheduler cannot be reached, no worker
            joins, or the workers run another version of conduct.
        """
        items = list(items)
        if not items:
            return []
        _serialise(task, "Dask workers")  # same rule as local processes, checked up front
        distributed = _import_distributed()
        client = _connect(distributed, self.address)
        bar = Progress(len(items), self.label, quiet=self.quiet)
        try:
            check_workers(client, self.address)
            n_workers = len(client.scheduler_info()["workers"])
            chunks = chunked(items, _chunk_size(len(items), n_workers, self.chunksize))
            shared = client.scatter(task, broadcast=True, hash=False)
            futures = [client.submit(_run_chunk, shared, c, pure=False) for c in chunks]
            sizes = {f.key: len(c) for f, c in zip(futures, chunks, strict=True)}
            for fut in distributed.as_completed(futures, loop=client.loop):
                bar.step(sizes[fut.key])
            results = client.gather(futures)
        finally:
            bar.close()
            client.close()
        return [x for part in results for x in part]

    def describe(self) -> str:
        """``dask:ADDRESS``."""
        return f"dask:{self.address}"


def _import_distributed() -> Any:
    try:
        import distributed
    except ImportError as exc:
        raise ConductError(
            "Running on a Dask cluster (--scheduler) needs the optional Dask packages: "
            "install conduct[dask] (pip install \"conduct[dask]\"), or leave out "
            "--scheduler to run on this machine."
        ) from exc
    return distributed


def _connect(distributed: Any, address: str) -> Any:
    try:
        return distributed.Client(address, timeout=f"{_DASK_TIMEOUT}s", set_as_default=False)
    except (OSError, TimeoutError, ValueError) as exc:
        raise ConductError(
            f"Could not connect to the Dask scheduler at '{address}' within {_DASK_TIMEOUT} s "
            f"({exc}). Check the address (e.g. tcp://host:8786) and that the scheduler runs."
        ) from exc


def check_workers(client: Any, address: str) -> None:
    """Refuse a Dask cluster without workers or whose workers run another conduct.

    Parameters
    ----------
    client : distributed.Client
    address : str
        The scheduler's address, for messages.

    Raises
    ------
    ConductError
    """
    try:
        client.wait_for_workers(1, timeout=_DASK_TIMEOUT)
    except TimeoutError as exc:
        raise ConductError(
            f"The Dask scheduler at '{address}' has no workers (waited {_DASK_TIMEOUT} s); "
            "start at least one with: dask worker " + address
        ) from exc
    from conduct import __version__

    try:
        versions = client.run(_worker_version)
    except Exception as exc:  # unpickling fails on workers without conduct
        raise ConductError(
            f"The workers of the Dask scheduler at '{address}' cannot import conduct ({exc}); "
            f"install conduct {__version__} on every worker."
        ) from exc
    other = sorted({v for v in versions.values() if v != __version__})
    if other:
        raise ConductError(
            f"Workers of the Dask scheduler at '{address}' run conduct {', '.join(other)}, "
            f"this process runs {__version__}; install the same version everywhere so "
            "results do not depend on where replicates run."
        )


def make_mapper(
    workers: int | None = None,
    scheduler: str | None = None,
    *,
    quiet: bool = True,
    label: str = "replicates",
    chunksize: int | None = None,
) -> Mapper:
    """Choose where independent replicates run.

    Parameters
    ----------
    workers : int or None
        Local worker processes (``--workers N``); None or 1 runs in this process.
    scheduler : str or None
        Address of a Dask distributed scheduler (``--scheduler ADDRESS``).
    quiet : bool
        Suppress progress bars (shown only on a terminal anyway).
    label : str
        What the progress bar counts.
    chunksize : int or None
        Tasks per message for the parallel backends; None chooses.

    Returns
    -------
    Mapper
        ``mapper(task, items) -> list`` with results in ``items`` order, and
        ``mapper.describe()``.

    Raises
    ------
    ConductError
        When ``workers`` is not a positive integer, when both ``workers`` and
        ``scheduler`` are given, or when ``scheduler`` is empty.

    Examples
    --------
    >>> from functools import partial
    >>> from conduct.bootstrap import one_replicate
    >>> mapper = make_mapper(workers=4)                                # doctest: +SKIP
    >>> thetas = mapper(partial(one_replicate, panel, study, 1), range(200))  # doctest: +SKIP
    """
    if workers is not None and (isinstance(workers, bool) or not isinstance(workers, int)
                                or workers < 1):
        raise ConductError(f"--workers must be a positive whole number, got {workers!r}.")
    if scheduler is not None:
        if workers is not None and workers > 1:
            raise ConductError(
                "Give either --workers (local processes) or --scheduler (a Dask cluster), "
                "not both: a Dask cluster's size is set where its workers are started."
            )
        if not scheduler.strip():
            raise ConductError("--scheduler needs an address such as tcp://host:8786.")
        return DaskMapper(scheduler.strip(), chunksize=chunksize, quiet=quiet, label=label)
    if workers is None or workers == 1:
        return InProcessMapper(quiet=quiet, label=label)
    return ProcessMapper(workers, chunksize=chunksize, quiet=quiet, label=label)
