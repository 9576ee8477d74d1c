"""Import PyTensor (and with it PyMC's backend) once, without its BLAS start-up warning.

PyTensor warns (at import, or when it first looks for BLAS) when it links BLAS through NumPy (pip installs); the message is about speed, not
correctness, and would be the first thing users see. The warning is silenced for that one import only: the
package sets no global warning filter.
"""

from __future__ import annotations

import functools
import logging
import warnings
from collections.abc import Iterator
from contextlib import contextmanager

__all__ = ["load_backend", "quiet_pymc_logs"]


@functools.cache
def load_backend() -> None:
    """Import pytensor quietly (idempotent; cheap after the first call)."""
    logging.getLogger("pytensor.tensor.blas").setLevel(logging.ERROR)
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message="PyTensor could not link to a BLAS installation",
                                category=UserWarning)
        import pytensor
        import pytensor.tensor  # noqa: F401

        pytensor.config.blas__ldflags  # noqa: B018  (detected lazily, with the warning, on first use: do it here)


@contextmanager
def quiet_pymc_logs() -> Iterator[None]:
    """Hold PyMC's INFO messages (its own variable names, its sampler set-up) while the block runs."""
    loggers = [logging.getLogger(name) for name in ("pymc", "pymc.sampling", "pymc.stats.convergence")]
    levels = [lg.level for lg in loggers]
    for lg in loggers:
        lg.setLevel(logging.WARNING)
    try:
        yield
    finally:
        for lg, level in zip(loggers, levels):
            lg.setLevel(level)
