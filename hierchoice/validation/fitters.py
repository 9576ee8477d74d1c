"""Fitters: what every many-fits workload calls to fit one simulated data set, and the seeds it uses.

A *fitter* is any callable ``(panel, spec, seed) -> posterior Dataset`` (the
:class:`Fitter` protocol); the default, :class:`NutsFitter`, is
:func:`hierchoice.fit` on one core, so a different sampler, or a deliberately
wrong one, can be checked the same way. :func:`_call_fitter` runs one, checks
what it returns and times it. The random streams within one task (``_STREAM_*``)
are shared by :mod:`~hierchoice.validation.sbc`, :mod:`~hierchoice.validation.recovery`
and :mod:`~hierchoice.validation.power`.

May import: ``hierchoice.inference`` and everything below it; nothing else of
``hierchoice.validation``.
"""

from __future__ import annotations

import time
from dataclasses import dataclass
from typing import Any, Protocol

import xarray as xr

from .._backend import quiet_pymc_logs
from ..data.panel import ChoicePanel
from ..exceptions import FitError
from ..spec import Spec

__all__ = ["Fitter", "NutsFitter"]

#: Random streams within one task (see :func:`hierchoice.validation.distributed.task_seed_sequence`).
_STREAM_PRIOR, _STREAM_DATA, _STREAM_FIT, _STREAM_TIES = 0, 1, 2, 3


class Fitter(Protocol):
    """What the workloads call to fit one simulated data set.

    It receives the simulated panel, the spec and an integer seed, and returns a
    posterior :class:`xarray.Dataset` with dims ``chain``, ``draw`` and the model's
    population variables (``taste_mean`` over ``attribute``, ``taste_sd`` over
    ``random_attribute``, ...) in the user's units, as ``ChoiceFit.posterior``.
    It runs inside a worker process, so it must be picklable (a module-level
    function or an instance of a module-level class).
    """

    def __call__(self, panel: ChoicePanel, spec: Spec, seed: int) -> xr.Dataset: ...


@dataclass(frozen=True)
class NutsFitter:
    """The default fitter: :func:`hierchoice.fit` with NUTS on one core, chains one after another.

    Person draws are not kept (only the population parameters are compared).
    The posterior's ``attrs["divergences"]`` counts divergent transitions.

    Parameters
    ----------
    draws, tune, chains : int, default 1000, 1000, 2
    backend : {"pymc", "nutpie", "numpyro", "auto"}, default "pymc"
        For many fits of one design ``"pymc"`` is the quickest we measured
        (``docs/calibration.md``): PyTensor caches the compiled C code of
        same-shaped models, while nutpie compiles each new model afresh.
    target_accept : float, optional
        Defaults to the spec's ``sampling.target_accept``.
    """

    draws: int = 1000
    tune: int = 1000
    chains: int = 2
    backend: str = "pymc"
    target_accept: float | None = None
    method: str = "auto"

    @classmethod
    def from_spec(cls, spec: Spec) -> NutsFitter:
        """The sampler settings of the spec's ``[sampling]`` table.

        ``backend = "auto"`` becomes ``"pymc"``: the quickest for many fits of one
        design (``docs/calibration.md``).
        """
        s = spec.sampling
        backend = "pymc" if s.backend == "auto" else s.backend
        return cls(draws=s.draws, tune=s.tune, chains=s.chains, backend=backend, target_accept=s.target_accept,
                   method=s.method)

    def __call__(self, panel: ChoicePanel, spec: Spec, seed: int) -> xr.Dataset:
        from ..inference.sampling import fit

        spec = spec.with_sampling(store_person_draws=False)
        with quiet_pymc_logs():
            result = fit(panel, spec, draws=self.draws, tune=self.tune, chains=self.chains, seed=seed,
                         backend=self.backend, target_accept=self.target_accept, cores=1, progressbar=False,
                         method=self.method)
        post = result.posterior
        stats = result.idata.sample_stats if "sample_stats" in result.idata.groups() else None
        if stats is not None and "diverging" in stats:
            post.attrs["divergences"] = int(stats["diverging"].values.sum())
        return post


def _call_fitter(fitter: Fitter, panel: ChoicePanel, spec: Spec, seed: int) -> tuple[xr.Dataset, dict[str, Any]]:
    """Run the fitter, check what it returns, and time it (wall and CPU seconds of this process)."""
    t0, c0 = time.perf_counter(), time.process_time()
    post = fitter(panel, spec, seed)
    seconds, cpu = time.perf_counter() - t0, time.process_time() - c0
    if not isinstance(post, xr.Dataset) or "taste_mean" not in post or not {"chain", "draw"} <= set(post.dims):
        raise FitError(
            f"The fitter {fitter!r} must return a posterior xarray.Dataset with dims chain and draw and the "
            f"variable taste_mean (as ChoiceFit.posterior); it returned {type(post).__name__}."
        )
    return post, {"seconds": seconds, "cpu_seconds": cpu, "divergences": int(post.attrs.get("divergences", -1))}
