"""A workload's result: the per-fit bookkeeping every workload shares, and saving and loading as NetCDF.

Each workload returns a labelled :class:`xarray.Dataset`; :func:`save_result`
writes one as NetCDF atomically and :func:`load_result` reads it back.

May import: :mod:`~hierchoice.validation.distributed` and the modules below
``hierchoice.validation``; no other workload module.
"""

from __future__ import annotations

import json
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr

from .._io import write_with
from ..exceptions import ArchiveError, FitError
from .distributed import TaskFailure

__all__ = ["save_result", "load_result"]


def _per_fit_fields(results: Sequence[Any]) -> dict[str, np.ndarray]:
    """Per task: failed, error, wall and CPU seconds of the fit, divergences (-1: not reported)."""
    n = len(results)
    out = {"failed": np.zeros(n, dtype=bool), "error": np.full(n, "", dtype=object),
           "seconds": np.full(n, np.nan), "cpu_seconds": np.full(n, np.nan),
           "divergences": np.full(n, -1, dtype=np.int64)}
    for i, res in enumerate(results):
        if isinstance(res, TaskFailure):
            out["failed"][i], out["error"][i] = True, res.error
        else:
            for key in ("seconds", "cpu_seconds", "divergences"):
                out[key][i] = res[key]
    return out


def _first_success(results: Sequence[Any], what: str) -> dict[str, Any]:
    for res in results:
        if not isinstance(res, TaskFailure):
            return res
    raise FitError(f"All {len(results)} {what} failed; the first: {results[0]}")


def _options_json(options: Mapping[str, Any]) -> str:
    """The simulation options as JSON, for the result's attributes (arrays as lists)."""
    return json.dumps(dict(options), default=lambda o: o.tolist() if hasattr(o, "tolist") else str(o))


def save_result(result: xr.Dataset, path: str | Path) -> Path:
    """Write a workload's Dataset as NetCDF (h5netcdf) atomically: a reader never sees half a file."""
    ds = result.copy()
    for name in list(ds.variables):
        if ds[name].dtype == object:
            ds[name] = ds[name].astype(str)
    return write_with(Path(path), lambda tmp: ds.to_netcdf(tmp, engine="h5netcdf"))


def load_result(path: str | Path) -> xr.Dataset:
    """Read a Dataset written by :func:`save_result` (loaded into memory, file closed)."""
    path = Path(path)
    if not path.exists():
        raise ArchiveError(f"{str(path)!r} does not exist.")
    try:
        with xr.open_dataset(path, engine="h5netcdf") as ds:
            return ds.load()
    except (OSError, ValueError) as err:
        raise ArchiveError(f"Could not read {str(path)!r}: {type(err).__name__}: {err}") from None
