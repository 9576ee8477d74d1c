"""The fit result object and its results folder: write it atomically, read it back into the same object.

:class:`ChoiceFit` holds the posterior with the panel and spec it came from;
:func:`population_summary` tabulates its population parameters.

A results folder holds

``posterior.nc``
    ArviZ InferenceData as NetCDF (one HDF5 group per InferenceData group), format
    :data:`FOLDER_FORMAT`: posterior (reported variables only; person tastes as
    float32), sample_stats, observed_data (``chosen`` over ``obs``, one per real task),
    constant_data (the panel's real rows, :meth:`ChoicePanel.cells_dataset`; formats 1 and 2 held padded arrays)
    and, when the fit has one, posterior_predictive;
    every variable chunked and compressed (see :func:`save_fit`). The task-level
    log_likelihood is not stored when person draws are (it is rebuilt from them by
    :func:`hierchoice.diagnostics.loo.task_loo`); the posterior's attributes carry the
    folder format, the spec (TOML), the data summary, the panel's terms and the fit
    info (JSON). :func:`load_fit` also reads format 1 (before compaction) and refuses
    a newer format, naming the file.
``spec.toml``
    The spec the fit used (sampling options as run).
``fit.log``
    What was run, with which settings, and how long it took.

The folder is assembled in a temporary sibling and renamed into place, so an
interrupted write never leaves a half-written folder or damages an earlier one.
"""

from __future__ import annotations

import json
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Union

import numpy as np
import pandas as pd
import xarray as xr

from .._args import NOT_GIVEN, aliased
from .._io import atomic_dir
from ..data.panel import ChoicePanel, ValidationSummary
from ..exceptions import ArchiveError, FitError
from ..model.build import ModelLayout, model_layout
from ..spec import Spec

__all__ = ["APPROXIMATE_CAUTION", "ChoiceFit", "FitLike", "as_fit", "lend", "population_summary", "thin_draws", "save_fit",
           "load_fit", "POSTERIOR_FILE", "FOLDER_FORMAT"]

POSTERIOR_FILE = "posterior.nc"


#: What the stages above this one lend the fit object. They sit on higher floors of the pipeline, so this module
#: cannot import them; each registers its function here when it is imported (``import hierchoice`` imports them
#: all): ``"diagnostics"`` (fit -> :class:`hierchoice.diagnostics.overview.Diagnostics`) and ``"population"``
#: (fit, hdi_prob -> :func:`hierchoice.analysis.tastes.population_tastes`'s table).
_LENT: dict[str, Callable[..., Any]] = {}


def lend(name: str, function: Callable[..., Any]) -> None:
    """Register the higher stage's ``function`` that :class:`ChoiceFit` uses for ``name`` (see :data:`_LENT`)."""
    _LENT[name] = function


def _lent(name: str) -> Callable[..., Any]:
    if name not in _LENT:  # only when hierchoice.inference is used without the package above it
        raise FitError(f"The fit's {name} needs the rest of hierchoice: import hierchoice first.")
    return _LENT[name]


@dataclass
class ChoiceFit:
    """A fitted panel mixed logit: the posterior, the panel and the spec.

    Its display (``repr`` and the notebook's HTML) leads with the convergence verdict and the worst R-hat,
    bulk and tail ESS and divergences, from :attr:`diagnostics` (computed on first use, then kept), then the
    population table (:meth:`population`).

    Attributes
    ----------
    idata : arviz.InferenceData
    panel : ChoicePanel
    spec : Spec
    layout : ModelLayout
    info : dict
        Backend, wall times, settings and whether the result is approximate.
    """

    idata: Any
    panel: ChoicePanel
    spec: Spec
    layout: ModelLayout
    info: dict[str, Any] = field(default_factory=dict)
    _diagnostics: Any = field(default=None, init=False, repr=False, compare=False)

    @property
    def posterior(self) -> xr.Dataset:
        return self.idata.posterior

    @property
    def approximate(self) -> bool:
        return bool(self.info.get("approximate", False))

    @property
    def has_person_draws(self) -> bool:
        return "person_taste" in self.idata.posterior

    def person_draws(self, what: str) -> xr.DataArray:
        """The posterior person tastes ``person_taste``; a :class:`FitError` saying what needs them when absent."""
        if not self.has_person_draws:
            raise FitError(
                f"{what} needs the posterior person tastes ('person_taste'), which this fit did not store; refit "
                "with sampling.store_person_draws = true, or use the population-level results."
            )
        return self.idata.posterior["person_taste"]

    @property
    def diagnostics(self) -> Any:
        """The fit's convergence checks as a rich object (:func:`hierchoice.diagnose`), computed once and kept.

        Its predictive checks and PSIS-LOO are computed when first asked for; nothing is written to disk.
        """
        if self._diagnostics is None:
            self._diagnostics = _lent("diagnostics")(self)
        return self._diagnostics

    def population(self, hdi_prob: float = 0.9, *, prob: Any = NOT_GIVEN) -> pd.DataFrame:
        """The population table: :func:`hierchoice.population_tastes` of this fit (one implementation).

        ``hdi_prob`` is the probability mass of the HDI (``hdi_low``, ``hdi_high``) and equal-tailed
        (``eti_low``, ``eti_high``) intervals; ``prob`` is its older name.
        """
        hdi_prob = aliased("hdi_prob", hdi_prob, "prob", prob, 0.9)
        return _lent("population")(self, hdi_prob=hdi_prob)

    def save(self, out: str | Path, *, overwrite: bool = True) -> Path:
        """Write the results folder atomically (see :func:`save_fit`)."""
        return save_fit(self, out, overwrite=overwrite)

    def _headline(self) -> tuple[str, list[str]]:
        """The verdict and the lines that lead the display (never raises: a failure to check is shown)."""
        post = self.idata.posterior
        size = (f"{self.panel.n_persons:,} persons, {self.panel.n_tasks:,} tasks, {post.sizes['chain']} chains x "
                f"{post.sizes['draw']} draws, backend {self.info.get('backend')}"
                f"{', approximate (not for reporting)' if self.approximate else ''}")
        try:
            diag = self.diagnostics
            verdict, lines = diag.verdict, diag.headline()
        except Exception as err:  # a display must show, whatever went wrong with the checks
            verdict, lines = "not checked", [f"the convergence checks could not run: {type(err).__name__}: {err}"]
        return verdict, [size, *lines]

    def __repr__(self) -> str:
        verdict, lines = self._headline()
        head = f"ChoiceFit: convergence {verdict.upper()}"
        try:
            table = self.population()
            rows = table[table["quantity"].isin(("population_mean", "population_sd"))]
            shown = rows[["quantity", "attribute", "mean", "sd", "hdi_low", "hdi_high"]].to_string(
                index=False, float_format=lambda v: f"{v:.4g}")
            tail = [f"population ({table.attrs.get('prob', 0.9):.0%} HDI; fit.population() for every row):", shown]
        except Exception as err:  # noqa: BLE001 - the display names the problem instead of failing
            tail = [f"population table unavailable: {type(err).__name__}: {err}"]
        return "\n".join([head, *(f"  {line}" for line in lines), *tail])

    def _repr_html_(self) -> str:
        import html

        verdict, lines = self._headline()
        colour = {"pass": "#1f6f43", "warn": "#8a5a00"}.get(verdict, "#a3161a")
        words = {"pass": "converged", "warn": "converged with warnings", "fail": "NOT converged: do not use these "
                 "numbers yet"}.get(verdict, "not checked")
        items = "".join(f"<li>{html.escape(line)}</li>" for line in lines)
        try:
            table = self.population().to_html(index=False, float_format=lambda v: f"{v:.4g}")
        except Exception as err:  # noqa: BLE001
            table = f"<p>population table unavailable: {html.escape(f'{type(err).__name__}: {err}')}</p>"
        return (f"<div><p style='border-left:6px solid {colour};padding:4px 10px;font-weight:600;color:{colour}'>"
                f"ChoiceFit &mdash; convergence {html.escape(verdict.upper())} ({html.escape(words)})</p>"
                f"<ul>{items}</ul>{table}</div>")


#: What the analysis functions, the report and the checks take: a fit object or the path of its results folder.
FitLike = Union[ChoiceFit, str, Path]


def as_fit(source: Any, what: str = "this function") -> ChoiceFit:
    """A :class:`ChoiceFit` from a fit object or a results folder (a path); a :class:`FitError` for anything else."""
    if isinstance(source, ChoiceFit):
        return source
    if isinstance(source, (str, Path)):
        return load_fit(source)
    hint = ""
    if type(source).__name__ == "InferenceData":
        hint = " An InferenceData alone lacks the panel and spec: pass the ChoiceFit itself (not its .idata)."
    raise FitError(f"{what} takes a fit (what hierchoice.fit returns) or the path of a results folder; got "
                   f"{type(source).__name__}.{hint}")


def population_summary(result: ChoiceFit | str | Path, hdi_prob: float = 0.9, *, prob: Any = NOT_GIVEN) -> pd.DataFrame:
    """The population table of a fit: the same table as :meth:`ChoiceFit.population` and
    :func:`hierchoice.population_tastes` (kept under this name for older code)."""
    return as_fit(result, "population_summary").population(hdi_prob, prob=prob)


#: What every output of an approximate (ADVI) fit says about it: figures measured on the B1 benchmark
#: (docs/performance.md, "approximate path").
APPROXIMATE_CAUTION = (
    "This is an APPROXIMATE fit (mean-field ADVI): its intervals are narrower than the exact posterior's. On the B1 "
    "benchmark its posterior SDs were 0.47-0.73 of the exact ones for taste means and 0.28-0.50 for taste SDs "
    "(docs/performance.md). Do not report its intervals; refit with --method nuts, or --method blocked for large "
    "panels, for numbers you hand on."
)


def thin_draws(posterior: Any, max_draws: int | None) -> Any:
    """Keep at most ``max_draws`` draws in all, evenly spaced within each chain (every chain kept).

    The one thinning rule of the package: summaries, shares, LOO and predictive checks that cap their cost with
    ``max_draws`` all use it, so they see the same draws.
    """
    if max_draws is None:
        return posterior
    n_c, n_d = posterior.sizes["chain"], posterior.sizes["draw"]
    if n_c * n_d <= max_draws:
        return posterior
    per_chain = max(1, max_draws // n_c)
    keep = np.unique(np.linspace(0, n_d - 1, per_chain).round().astype(int))
    return posterior.isel(draw=keep)


def _attrs_for(result: ChoiceFit) -> dict[str, str]:
    return {
        "hierchoice_spec_toml": result.spec.to_toml(),
        "hierchoice_data_summary": json.dumps(result.panel.summary.to_dict()),
        "hierchoice_fit_info": json.dumps(result.info, default=str),
        "hierchoice_terms": json.dumps([vars(t) for t in result.panel.terms]),
    }


#: The layout of ``posterior.nc`` this version writes (attribute ``hierchoice_folder_format`` of the posterior).
#: 1 (no attribute): float64, uncompressed, ``observed_data.chosen`` over (person, task); still read.
#: 2: person draws as float32, every variable chunked and compressed, ``observed_data.chosen`` over ``obs``.
FOLDER_FORMAT = 3
#: Posterior variables stored as float32 (see :func:`save_fit`).
FLOAT32_VARS = ("person_taste", "person_wtp")
_DRAWS_PER_CHUNK = 100


def _encoding(ds: xr.Dataset, group: str) -> dict[str, dict[str, Any]]:
    """Compression (gzip level 1 after the byte shuffle, the cheapest that keeps most of the gain) and chunks of
    at most :data:`_DRAWS_PER_CHUNK` draws (one chain each) for every array variable; float32 where it is safe."""
    enc: dict[str, dict[str, Any]] = {}
    for name, da in ds.data_vars.items():
        if da.ndim == 0 or da.dtype.kind not in "biuf":
            continue
        chunks = tuple(1 if d == "chain" else min(n, _DRAWS_PER_CHUNK) if d == "draw" else n
                       for d, n in zip(da.dims, da.shape))
        enc[name] = {"zlib": True, "complevel": 1, "shuffle": True, "chunksizes": chunks}
        if group == "posterior" and name in FLOAT32_VARS and da.dtype == np.float64:
            enc[name]["dtype"] = "float32"
    return enc


def save_fit(result: ChoiceFit, out: str | Path, *, overwrite: bool = True, extra: dict[str, Any] | None = None) -> Path:
    """Write ``result`` into the folder ``out`` (atomically; see the module docstring).

    What is compact, and why it is safe:

    * the task-level log-likelihood (draws x tasks) is not stored: it is a function of the person tastes
      and the data, both stored, and :func:`hierchoice.diagnostics.loo.task_loo` rebuilds it;
    * the person tastes (and WTP) are stored as float32. Its relative rounding error, 2^-24 = 6e-8, is
      about 10^5 times below the Monte Carlo error of any posterior summary of them (a standard error of at
      least 1 % of the posterior SD with fewer than 10,000 effective draws), so tastes, WTP, shares and LOO
      agree with the in-memory fit to far better than their Monte Carlo error (LOO to 1e-4 relative:
      ``docs/performance.md``). Population parameters, sampler statistics and the data stay float64;
    * every variable is compressed (gzip after the byte shuffle) in chunks of at most
      :data:`_DRAWS_PER_CHUNK` draws of one chain.
    """
    out = Path(out)
    idata = result.idata
    attrs = {**_attrs_for(result), "hierchoice_folder_format": FOLDER_FORMAT}
    groups = [g for g in idata.groups() if not (g == "log_likelihood" and result.has_person_draws)]
    with atomic_dir(out, kind="results", overwrite=overwrite) as tmp:
        path = tmp / POSTERIOR_FILE
        for i, group in enumerate(groups):
            ds = getattr(idata, group).copy()
            if group == "posterior":
                ds.attrs = {**ds.attrs, **attrs}
            ds.to_netcdf(str(path), mode="w" if i == 0 else "a", group=group, engine="h5netcdf",
                         encoding=_encoding(ds, group))
        (tmp / "spec.toml").write_text(result.spec.to_toml(), encoding="utf-8")
        (tmp / "fit.log").write_text(_fit_log(result), encoding="utf-8")
        for name, text in (extra or {}).items():
            (tmp / name).write_text(str(text), encoding="utf-8")
    return out


def _fit_log(result: ChoiceFit) -> str:
    lines = [f"{k}: {v}" for k, v in result.info.items()]
    lines.append(f"persons: {result.panel.n_persons}, tasks: {result.panel.n_tasks}")
    return "\n".join(lines) + "\n"


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
    version = attrs.get("hierchoice_folder_format", 1)
    version = int(version) if isinstance(version, (int, np.integer)) else version
    if not isinstance(version, int) or not 1 <= version <= FOLDER_FORMAT:
        raise ArchiveError(f"{str(path)!r} is in results-folder format {version!r}, which this version of hierchoice "
                           f"(format {FOLDER_FORMAT}) cannot read: it was written by a newer hierchoice. Upgrade "
                           "hierchoice, or refit.")
    try:
        import tomllib

        spec = Spec.from_dict(tomllib.loads(attrs["hierchoice_spec_toml"]))
        summary_d = json.loads(attrs["hierchoice_data_summary"])
        info = json.loads(attrs["hierchoice_fit_info"])
        terms_d = json.loads(attrs["hierchoice_terms"])
    except KeyError as err:
        raise ArchiveError(f"{str(path)!r} lacks the hierchoice attribute {err}; was it written by hierchoice?") from None
    from ..data.panel import Term

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
    Z = const["z"].values if "z" in const else np.zeros((const.sizes["person"], 0))
    labels = {"persons": const["person"].values.tolist(), "alternatives": [str(a) for a in const["alternative"].values],
              "terms": [Term(**t) for t in terms_d],
              "covariates": [str(c) for c in const["covariate"].values] if "z" in const else [],
              "summary": summary, "spec": spec}
    if "row_ptr" in const:  # format 3: the real rows
        cells_ds = const.assign(task_chosen=("task", obs["chosen"].values.astype(np.int64)))
        panel = ChoicePanel(cells=ChoicePanel.cells_of(cells_ds), Z=Z, **labels)
        return ChoiceFit(idata=idata, panel=panel, spec=spec, layout=model_layout(panel, spec), info=info)
    task_mask = const["task_mask"].values.astype(bool)  # formats 1 and 2: padded (person, task, ...) arrays
    if obs["chosen"].dims == ("person", "task"):  # format 1
        chosen = obs["chosen"].values.astype(np.int64)
    else:  # format 2: over the real tasks in (person, task) order
        chosen = np.full(task_mask.shape, -1, dtype=np.int64)
        chosen[task_mask] = obs["chosen"].values
    task_ids = const["task_id"].values.astype(object)
    task_ids[~task_mask] = None
    panel = ChoicePanel(
        X=const["x"].values, available=const["available"].values.astype(bool), task_mask=task_mask,
        chosen=chosen, task_ids=task_ids, lag_missing=const["lag_missing"].values.astype(bool), Z=Z, **labels,
    )
    return ChoiceFit(idata=idata, panel=panel, spec=spec, layout=model_layout(panel, spec), info=info)
