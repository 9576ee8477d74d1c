"""Many independent tasks (model fits) on ``dask.distributed``.

The validation workloads (:mod:`~hierchoice.validation.sbc`,
:mod:`~hierchoice.validation.recovery`, :mod:`~hierchoice.validation.power`)
fit the same model to hundreds of simulated data sets. Each fit is an
independent task; this module runs a list of them on a
`dask.distributed <https://distributed.dask.org>`_ cluster and collects what
comes back:

* **Where.** By default a :class:`distributed.LocalCluster` of worker
  *processes* on this machine, one thread each, with ``OMP_NUM_THREADS``,
  ``MKL_NUM_THREADS``, ``OPENBLAS_NUM_THREADS`` and ``NUMBA_NUM_THREADS`` set to 1 so that ``n``
  workers use ``n`` cores (each fit inside a worker is single-threaded and runs
  its chains one after the other). Pass a :class:`distributed.Client` or a
  scheduler address (``"tcp://host:8786"``) to use a cluster of your own.
* **Seeds.** Task ``i`` of a run with seed ``s`` draws its random numbers from
  ``numpy.random.SeedSequence(s, spawn_key=(0, i, stream))``, a descendant of
  ``SeedSequence(s)`` as ``SeedSequence.spawn`` makes them, never from the
  order in which tasks finish: a run gives the same results on 1 worker or 8.
* **Failures.** A task that raises is retried ``retries`` times (dask's
  ``retries=``); a task whose worker process dies is rescheduled on another
  worker by the scheduler. A task that still fails is reported as a
  :class:`TaskFailure` in its slot; every finished result is gathered to this
  process as soon as it completes, so a later failure cannot lose it.
* **Progress.** One short line per step of progress on standard error.
"""

from __future__ import annotations

import os
import sys
import time
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..exceptions import FitError, SpecError
from ..spec import _positive_int

__all__ = [
    "SINGLE_THREAD_ENV",
    "TaskFailure",
    "task_seed_sequence",
    "task_seed",
    "local_cluster",
    "run_tasks",
]

#: Environment of local worker processes: one BLAS / OpenMP / numba thread each (the blocked sampler's person
#: kernels run in parallel over numba's threads; in a worker beside others that only oversubscribes the cores).
SINGLE_THREAD_ENV = {"OMP_NUM_THREADS": "1", "MKL_NUM_THREADS": "1", "OPENBLAS_NUM_THREADS": "1",
                     "NUMBA_NUM_THREADS": "1"}

_INSTALL = "pip install \"dask[distributed]>=2024.1\""


@dataclass(frozen=True)
class TaskFailure:
    """A task that failed after its retries: which one, and the error it raised."""

    index: int
    key: str
    error: str

    def __str__(self) -> str:
        return f"task {self.index} ({self.key}): {self.error}"


def task_seed_sequence(seed: int, index: int | tuple[int, ...], stream: int = 0) -> np.random.SeedSequence:
    """The :class:`numpy.random.SeedSequence` of random stream ``stream`` of task ``index``.

    It depends only on ``(seed, index, stream)``: ``SeedSequence(seed).spawn(n)[i]``
    is ``SeedSequence(seed, spawn_key=(i,))``, and this uses the spawn key
    ``(0, *index, stream)``, so tasks (and streams within a task) are independent
    and a run does not depend on how many tasks it has or where they run. ``index``
    may be a tuple (for a grid of tasks, e.g. ``(n_persons, replication)``).

    >>> a = task_seed_sequence(7, 3).generate_state(2)
    >>> b = task_seed_sequence(7, 3).generate_state(2)
    >>> bool((a == b).all())
    True
    """
    _positive_int(seed, "seed", minimum=0)
    key = tuple(int(i) for i in index) if isinstance(index, tuple) else (int(index),)
    return np.random.SeedSequence(int(seed), spawn_key=(0, *key, int(stream)))


def task_seed(seed: int, index: int | tuple[int, ...], stream: int = 0) -> int:
    """A 32-bit integer seed for task ``index`` (for samplers that take an ``int`` seed)."""
    return int(task_seed_sequence(seed, index, stream).generate_state(1, dtype=np.uint32)[0])


def local_cluster(workers: int | None = None, **kwargs: Any) -> Any:
    """A :class:`distributed.LocalCluster` of single-threaded worker processes.

    Parameters
    ----------
    workers : int, optional
        Number of worker processes; defaults to the number of CPU cores.
    **kwargs
        Passed to :class:`distributed.LocalCluster` (for example ``memory_limit``).
    """
    distributed = _import_distributed()
    n = _positive_int(workers, "workers") if workers is not None else (os.cpu_count() or 1)
    options: dict[str, Any] = {
        "n_workers": n, "threads_per_worker": 1, "processes": True,
        # a dashboard (when bokeh is installed) on a free local port: never a clash with another cluster
        "dashboard_address": "127.0.0.1:0",
        "env": dict(SINGLE_THREAD_ENV),
    }
    options.update(kwargs)
    return distributed.LocalCluster(**options)


def run_tasks(
    func: Callable[..., Any],
    items: Sequence[Any],
    *,
    common: Mapping[str, Any] | None = None,
    client: Any = None,
    workers: int | None = None,
    retries: int = 2,
    progress: bool = True,
    label: str = "tasks",
) -> list[Any]:
    """Run ``func(item, **common)`` for every item as independent dask tasks.

    Parameters
    ----------
    func : callable
        A module-level function (it is pickled to the workers).
    items : sequence
        One task per item; each item should carry its own seed.
    common : mapping, optional
        Keyword arguments shared by every task (the panel, the spec, the fitter);
        sent to the workers once.
    client : distributed.Client or str, optional
        A client of your own (left open), or a scheduler address to connect to.
        By default a :func:`local_cluster` of ``workers`` processes is started and
        closed afterwards. Workers of your own cluster should run one thread each
        (``--nthreads 1``) with the thread variables of :data:`SINGLE_THREAD_ENV`.
    workers : int, optional
        Worker processes of the default local cluster (default: the CPU cores,
        at most one per task).
    retries : int, default 2
        How many times a task that raises is run again before it counts as failed.
    progress : bool, default True
        Print a progress line on standard error.
    label : str, default "tasks"
        What the tasks are, for the progress line and the task keys.

    Returns
    -------
    list
        ``func``'s results in the order of ``items``; a task that failed after its
        retries (or whose worker kept dying) holds a :class:`TaskFailure` instead.
    """
    distributed = _import_distributed()
    _positive_int(retries, "retries", minimum=0)
    items = list(items)
    if not items:
        return []
    own_cluster = own_client = None
    if client is None:
        n = _positive_int(workers, "workers") if workers is not None else (os.cpu_count() or 1)
        own_cluster = local_cluster(min(n, len(items)))
        own_client = client = distributed.Client(own_cluster, set_as_default=False)
    elif isinstance(client, str):
        try:
            own_client = client = distributed.Client(client, set_as_default=False)
        except (OSError, TimeoutError) as err:
            raise FitError(f"Could not connect to the dask scheduler at {client!r}: {err}") from None
    elif not isinstance(client, distributed.Client):
        raise SpecError(
            f"client must be a distributed.Client or a scheduler address such as 'tcp://host:8786', "
            f"got {type(client).__name__}."
        )
    try:
        return _run(distributed, client, func, items, dict(common or {}), retries, progress, label)
    finally:
        if own_client is not None:
            own_client.close()
        if own_cluster is not None:
            own_cluster.close()


def _run(distributed: Any, client: Any, func: Callable[..., Any], items: list[Any], common: dict[str, Any],
         retries: int, progress: bool, label: str) -> list[Any]:
    token = f"{label}-{os.getpid()}-{time.time_ns()}"
    # shared objects travel as tasks of their own (not scattered data): if the worker holding
    # one dies, the scheduler can compute it again from the task itself
    shared = {k: client.submit(_identity, v, key=f"{token}-{k}", pure=False) for k, v in common.items()}
    futures = []
    for i, item in enumerate(items):
        futures.append(client.submit(func, item, **shared, key=f"{token}-{i}", retries=retries, pure=False))
    index = {f.key: i for i, f in enumerate(futures)}
    results: list[Any] = [None] * len(items)
    done = failed = 0
    meter = _Progress(label, len(items), progress)
    for future in distributed.as_completed(futures, loop=client.loop):
        i = index[future.key]
        if future.status == "finished":
            try:
                results[i] = future.result()
            except Exception as err:  # lost between finishing and gathering: count it as a failure
                results[i] = TaskFailure(i, str(future.key), _describe(err))
                failed += 1
        else:
            results[i] = TaskFailure(i, str(future.key), _describe(future.exception()))
            failed += 1
        future.release()
        done += 1
        meter.update(done, failed)
    return results


def _identity(value: Any) -> Any:
    return value


def _describe(err: BaseException | None) -> str:
    if err is None:
        return "cancelled"
    return f"{type(err).__name__}: {err}"


class _Progress:
    """A progress line, printed about twenty times over a run (and at the end)."""

    def __init__(self, label: str, total: int, enabled: bool) -> None:
        self.label, self.total, self.enabled = label, total, enabled
        self.start = time.perf_counter()
        self.step = max(1, total // 20)

    def update(self, done: int, failed: int) -> None:
        if not self.enabled or (done % self.step and done != self.total):
            return
        elapsed = time.perf_counter() - self.start
        rate = elapsed / done
        left = rate * (self.total - done)
        print(f"{self.label}: {done}/{self.total} done, {failed} failed, {elapsed:.0f} s elapsed"
              + (f", about {left:.0f} s left" if done < self.total else ""), file=sys.stderr, flush=True)


def _import_distributed() -> Any:
    try:
        import distributed
    except ImportError:
        raise FitError(f"Running many fits needs dask.distributed, which is not installed: {_INSTALL}.") from None
    return distributed
