"""The blocked sampler's persons on a Dask cluster: one :class:`~.shard.PersonShard` actor per shard.

Each worker holds its shard's data and latent tastes for the whole chain (a Dask actor); each block of a
sweep sends the population parameters to every shard at once and gets back a few sums per chunk of
persons (:mod:`.shard`), so the driver's traffic per sweep does not grow with the persons' data. The
draws are the same as in one process for the same seed (the sums are added chunk by chunk in order and
the persons' random numbers are drawn per chunk). Workers should run one thread and the thread variables
of :data:`hierchoice.validation.distributed.SINGLE_THREAD_ENV` (BLAS with several threads may add
floating-point numbers in another order).

May import: :mod:`.shard`, :mod:`.problem`.
"""

from __future__ import annotations

from typing import Any

from ...exceptions import FitError
from .problem import BlockedProblem
from .shard import CHUNK, PersonShard, Shards, restrict, shard_bounds


class DaskShards(Shards):
    """``shards`` person shards as actors on the workers of ``client`` (round-robin)."""

    def __init__(self, client: Any, prob: BlockedProblem, key: tuple[int, ...], shards: int, chunk: int = CHUNK):
        workers = sorted(client.scheduler_info()["workers"])
        if not workers:
            raise FitError("the Dask cluster has no workers to hold the persons: start workers (dask worker "
                           "ADDRESS --nthreads 1) or fit without a cluster.")
        self.n_persons = prob.n_persons
        self._futures: list[Any] = []
        for i, (a, b) in enumerate(shard_bounds(prob.n_persons, shards, chunk)):
            local = restrict(prob, a, b)
            self._futures.append(client.submit(PersonShard, local, a, key, chunk, actor=True,
                                               workers=[workers[i % len(workers)]], pure=False))
        self.actors = [f.result() for f in self._futures]

    def call(self, method: str, *args: Any) -> list[Any]:
        pending = [getattr(a, method)(*args) for a in self.actors]  # all shards at once
        return [p.result() for p in pending]

    def close(self) -> None:
        self.actors = []
        self._futures = []
