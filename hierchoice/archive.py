"""The results folder: write it atomically, read it back into the same result object.

A results folder holds

``posterior.nc``
    ArviZ InferenceData as NetCDF: posterior (reported variables only),
    sample_stats, observed_data, constant_data (the panel arrays) and, with
    person draws, log_likelihood at the task level. Its attributes carry the
    spec (TOML), the data summary, the internal layout and the fit info (JSON).
``population.csv``
    Population parameters with 90 % equal-tailed intervals and the implied
    moments of each taste distribution.
``spec.toml``
    The spec the fit used (sampling options as run).
``fit.log``
    What was run, with which settings, and how long it took.

The folder is assembled in a temporary sibling and renamed into place, so an
interrupted write never leaves a half-written folder or damages an earlier one.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np

from ._io import atomic_dir
from .exceptions import ArchiveError
from .fit import ChoiceFit, population_summary
from .model import model_layout
from .panel import ChoicePanel, ValidationSummary
from .spec import Spec

__all__ = ["save_fit", "load_fit", "POSTERIOR_FILE"]

POSTERIOR_FILE = "posterior.nc"


def _attrs_for(result: ChoiceFit) -> dict[str, str]:
    return {
        "hierchoice_spec_toml": result.spec.to_toml(),
        "hierchoice_data_summary": json.dumps(result.panel.summary.to_dict()),
        "hierchoice_layout": json.dumps(result.layout.to_dict()),
        "hierchoice_fit_info": json.dumps(result.info, default=str),
        "hierchoice_terms": json.dumps([vars(t) for t in result.panel.terms]),
    }


def save_fit(result: ChoiceFit, out: str | Path, *, overwrite: bool = True, extra: dict[str, Any] | None = None) -> Path:
    """Write ``result`` into the folder ``out`` (atomically; see the module docstring)."""
    out = Path(out)
    idata = result.idata
    attrs = _attrs_for(result)
    with atomic_dir(out, kind="results", overwrite=overwrite) as tmp:
        for group in idata.groups():
            getattr(idata, group).attrs.update(attrs if group == "posterior" else {})
        idata.to_netcdf(str(tmp / POSTERIOR_FILE), engine="h5netcdf")
        population_summary(result).to_csv(tmp / "population.csv")
        (tmp / "spec.toml").write_text(result.spec.to_toml(), encoding="utf-8")
        lines = [f"{k}: {v}" for k, v in result.info.items()]
        lines.append(f"persons: {result.panel.n_persons}, tasks: {result.panel.n_tasks}")
        (tmp / "fit.log").write_text("\n".join(lines) + "\n", encoding="utf-8")
        for name, text in (extra or {}).items():
            (tmp / name).write_text(str(text), encoding="utf-8")
    return out


def load_fit(folder: str | Path) -> ChoiceFit:
    """Reopen a results folder written by :func:`save_fit` into a :class:`ChoiceFit`."""
    import arviz as az

    folder = Path(folder)
    path = folder / POSTERIOR_FILE
    if not path.exists():
        raise ArchiveError(f"{str(folder)!r} is not a hierchoice results folder: {POSTERIOR_FILE} is missing.")
    try:
        idata = az.from_netcdf(str(path), engine="h5netcdf")
        idata.load()
    except Exception as err:  # a damaged or foreign file
        raise ArchiveError(f"Could not read {str(path)!r}: {type(err).__name__}: {err}") from None
    attrs = idata.posterior.attrs
    try:
        import tomllib

        spec = Spec.from_dict(tomllib.loads(attrs["hierchoice_spec_toml"]))
        summary_d = json.loads(attrs["hierchoice_data_summary"])
        info = json.loads(attrs["hierchoice_fit_info"])
        terms_d = json.loads(attrs["hierchoice_terms"])
    except KeyError as err:
        raise ArchiveError(f"{str(path)!r} lacks the hierchoice attribute {err}; was it written by hierchoice?") from None
    from .panel import Term

    const = idata.constant_data
    obs = idata.observed_data
    tpp = summary_d["tasks_per_person"]
    summary = ValidationSummary(
        rows_in=summary_d["rows_in"], persons=summary_d["persons"], tasks=summary_d["tasks"],
        tasks_per_person=(tpp["min"], tpp["median"], tpp["max"]),
        alternatives=tuple(summary_d["alternatives"]), attributes=tuple(summary_d["attributes"]),
        covariates=tuple(summary_d["covariates"]), removed=summary_d["removed"], filled=summary_d["filled"],
        notes=summary_d["notes"],
    )
    task_mask = const["task_mask"].values.astype(bool)
    task_ids = const["task_id"].values.astype(object)
    task_ids[~task_mask] = None
    panel = ChoicePanel(
        X=const["x"].values, available=const["available"].values.astype(bool), task_mask=task_mask,
        chosen=obs["chosen"].values.astype(np.int64), task_ids=task_ids,
        lag_missing=const["lag_missing"].values.astype(bool),
        Z=const["z"].values if "z" in const else np.zeros((const.sizes["person"], 0)),
        persons=const["person"].values.tolist(), alternatives=[str(a) for a in const["alternative"].values],
        terms=[Term(**t) for t in terms_d], covariates=[str(c) for c in const["covariate"].values] if "z" in const else [],
        summary=summary, spec=spec,
    )
    return ChoiceFit(idata=idata, panel=panel, spec=spec, layout=model_layout(panel, spec), info=info)
