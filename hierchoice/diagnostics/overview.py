"""A fit's checks as one object for notebooks and scripts: :func:`diagnose` and :class:`Diagnostics`.

:func:`diagnose` takes a fit or a results folder and returns a :class:`Diagnostics`: the convergence records
(:mod:`hierchoice.diagnostics.checks`) as a table, their verdict, the R-hat / ESS table of every population
parameter, the predictive checks and PSIS-LOO (computed when first asked for), and the diagnostic plots as
matplotlib figures on demand. Nothing is written to disk unless :meth:`Diagnostics.save` is called; the
``hierchoice check`` folder job (:func:`hierchoice.diagnostics.folder.check_folder`) is that call.

A fit keeps its :class:`Diagnostics` (``fit.diagnostics``): the convergence checks run once per fit, and its
display leads with their verdict. This module lends the fit that function when it is imported (the fit object
sits on a lower floor of the pipeline and cannot import it).
"""

from __future__ import annotations

import json
import warnings
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from .._io import atomic_write_text, make_folder
from .._records import checks_frame, jsonable, overall_verdict
from ..exceptions import FitError
from ..inference.results import ChoiceFit, FitLike, as_fit, lend
from ..model.build import implied_priors
from .checks import (
    _REF_COMMON,
    _REF_DEPTH,
    _REF_DIV,
    _REF_EBFMI,
    _REF_RHAT,
    EBFMI_MIN,
    ESS_FAIL,
    ESS_MIN,
    FOLDER_MAX_DRAWS,
    FOLDER_N_SIM,
    LOG_SD_COLLAPSED,
    LOG_SD_LARGE,
    RHAT_FAIL,
    RHAT_MAX,
    convergence_checks,
    format_check_value,
    parameter_diagnostics,
)
from .sensitivity import SENSITIVITY_THRESHOLD, sensitivity_checks, sensitivity_table

__all__ = ["Diagnostics", "diagnose", "format_verdict", "closing_line", "THRESHOLDS", "IN_SAMPLE_NOTE"]

#: Every threshold of the checks, with its source (stored in ``diagnostics.json``).
THRESHOLDS = {
    "rhat": {"pass_below": RHAT_MAX, "fail_at": RHAT_FAIL, "reference": _REF_RHAT + "; 1.05: common practice"},
    "ess_bulk": {"pass_at": ESS_MIN, "fail_below": ESS_FAIL, "reference": _REF_RHAT + "; 100: common practice"},
    "ess_tail": {"pass_at": ESS_MIN, "fail_below": ESS_FAIL, "reference": _REF_RHAT + "; 100: common practice"},
    "ebfmi": {"pass_at": EBFMI_MIN, "reference": _REF_EBFMI},
    "divergences": {"pass_at_most": 0, "reference": _REF_DIV},
    "tree_depth": {"pass_at_most": 0.0, "reference": _REF_DEPTH},
    "lognormal_sd": {"warn_below": LOG_SD_COLLAPSED, "warn_above": LOG_SD_LARGE, "reference": _REF_COMMON},
    "prior_sensitivity": {"warn_at": SENSITIVITY_THRESHOLD, "reference": "Kallioinen, Paananen, Bürkner & Vehtari "
                          "2024, Statistics and Computing 34:57"},
}

#: Why the in-sample reliability table is shown but never graded (docs/diagnostics.md, "Calibration").
IN_SAMPLE_NOTE = ("in-sample: each person's tastes were fitted to these choices, so observed shares come out more "
                  "extreme than predicted even for a correct model; not graded. The graded test is on held-out "
                  "tasks: hierchoice holdout.")

_COLOUR = {"pass": "#1f6f43", "warn": "#8a5a00", "fail": "#a3161a"}


@contextmanager
def _quiet() -> Iterator[None]:
    """ArviZ and numpy warn about constant or short chains; the checks report those as records instead."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        yield


class Diagnostics:
    """The checks of one fit: convergence records, their verdict, parameter table, predictive checks, plots.

    Build it with :func:`diagnose` (or read ``fit.diagnostics``). The convergence checks are computed when it
    is made; :attr:`predictive` and :attr:`loo` when first read. Nothing is written to disk but by
    :meth:`save`.

    Attributes
    ----------
    result : ChoiceFit
    checks : list of Check
        Every convergence record (:func:`hierchoice.diagnostics.checks.convergence_checks`).
    parameters : pandas.DataFrame
        R-hat, bulk and tail ESS, mean and SD of every population parameter
        (:func:`hierchoice.diagnostics.checks.parameter_diagnostics`).
    source : str
        The results folder it was read from, or ``""`` for a fit in memory.
    """

    def __init__(self, result: ChoiceFit, *, source: str = "") -> None:
        self.result = result
        self.source = source
        with _quiet():
            self.parameters = parameter_diagnostics(result.idata)
            self.checks = convergence_checks(result, table=self.parameters)
        self._predictive: dict[str, Any] | None = None
        self._loo: dict[str, Any] | None = None
        self._sensitivity: dict[str, Any] | None = None

    # ------------------------------------------------------------------ the verdict

    @property
    def verdict(self) -> str:
        """``"pass"``, ``"warn"`` or ``"fail"``: the worst verdict of the convergence checks."""
        return overall_verdict(self.checks)

    @property
    def exit_code(self) -> int:
        """1 when a convergence check failed (what ``hierchoice check`` exits with), else 0."""
        return int(any(c.verdict == "fail" for c in self.checks))

    @property
    def table(self) -> pd.DataFrame:
        """The convergence records as a table, one row per check, with ``shown`` (the value as text)."""
        frame = checks_frame(self.checks)
        frame.insert(3, "shown", [format_check_value(c.check, c.value, c.threshold) for c in self.checks])
        return frame

    def _worst(self, column: str, largest: bool) -> tuple[float, str] | None:
        values = self.parameters[column].dropna() if column in self.parameters else pd.Series(dtype=float)
        if values.empty:
            return None
        label = str(values.idxmax() if largest else values.idxmin())
        return float(values[label]), label

    def headline(self) -> list[str]:
        """The lines that lead a display: worst R-hat, smallest bulk and tail ESS, divergences, what failed."""
        parts = []
        rhat = self._worst("rhat", largest=True)
        if rhat:
            parts.append(f"worst R-hat {format_check_value('rhat', rhat[0], RHAT_MAX)} ({rhat[1]})")
        for kind, word in (("ess_bulk", "bulk"), ("ess_tail", "tail")):
            ess = self._worst(kind, largest=False)
            if ess:
                parts.append(f"smallest {word} ESS {format_check_value(kind, ess[0], ESS_MIN)} ({ess[1]})")
        lines = ["; ".join(parts)] if parts else ["no population parameter varies: nothing to diagnose"]
        div = next((c for c in self.checks if c.check == "divergences"), None)
        if div is not None and np.isfinite(div.value):
            lines.append(f"{int(div.value):,} divergent transition{'s' if div.value != 1 else ''}")
        for verdict in ("fail", "warn"):
            named = [f"{c.check} {c.subject}" for c in self.checks if c.verdict == verdict]
            if named:
                word = "failed" if verdict == "fail" else "warned"
                lines.append(f"{word}: {', '.join(named[:6])}{f' (and {len(named) - 6} more)' if len(named) > 6 else ''}")
        return lines

    # ------------------------------------------------------------------ predictive checks and LOO (on demand)

    @property
    def predictive(self) -> dict[str, Any] | None:
        """In-sample hit rate, reliability table and posterior-predictive shares (``None`` without person draws)."""
        if self._predictive is None and self.result.has_person_draws:
            from .predictive import hit_rate, posterior_choice_probabilities, ppc_shares, reliability

            with _quiet():
                prob = posterior_choice_probabilities(self.result)
                hr = hit_rate(self.result, probabilities=prob)
                rel = reliability(self.result, probabilities=prob)
                shares = ppc_shares(self.result, seed=0)
            n = rel["n"].sum()
            self._predictive = {
                "hit_rate": hr.to_dict(),
                "calibration_error": float((rel["n"] * (rel["observed"] - rel["mean_predicted"]).abs()).sum() / n),
                "calibration_note": IN_SAMPLE_NOTE,
                "reliability": rel,
                "shares": shares,
                "shares_outside_interval": int(shares["outside"].sum()),
            }
        return self._predictive

    @property
    def loo(self) -> dict[str, Any] | None:
        """Task- and person-level PSIS-LOO with their Pareto-k checks (``None`` without person draws)."""
        if self._loo is None and self.result.has_person_draws:
            from .loo import pareto_k_checks, person_loo, task_loo

            with _quiet():
                loo_t = task_loo(self.result)
                loo_p, mc = person_loo(self.result, n_sim=FOLDER_N_SIM, max_draws=FOLDER_MAX_DRAWS, seed=0,
                                       return_estimate=True)
            k_checks = pareto_k_checks(loo_t, "task") + pareto_k_checks(loo_p, "person")
            self._loo = {
                "task": _loo_dict(loo_t),
                "person": _loo_dict(loo_p) | {"elpd_mc_se": float(loo_p["elpd_mc_se"]),
                                               "mean_mc_se": float(mc["mc_se"].mean()), "n_sim": FOLDER_N_SIM,
                                               "max_draws": FOLDER_MAX_DRAWS},
                "checks": [c.to_dict() for c in k_checks],
            }
        return self._loo

    @property
    def sensitivity(self) -> dict[str, Any]:
        """Power-scaling prior / likelihood sensitivity of the population parameters, with graded records.

        Graded apart from the convergence checks: a prior-dominated parameter warns but does not change the
        exit code (docs/diagnostics.md, "Prior sensitivity").
        """
        if self._sensitivity is None:
            table = sensitivity_table(self.result)
            self._sensitivity = {"table": table, "threshold": table.attrs["threshold"], "delta": table.attrs["delta"],
                                 "checks": [c.to_dict() for c in sensitivity_checks(table)]}
        return self._sensitivity

    # ------------------------------------------------------------------ the report

    def to_dict(self, *, full: bool = True) -> dict[str, Any]:
        """The JSON-ready report that ``diagnostics.json`` holds.

        With ``full`` (the default) the predictive checks and PSIS-LOO are computed if they were not yet;
        otherwise only what is already known goes in.
        """
        report: dict[str, Any] = {"folder": self.source, "fit": dict(self.result.info), "notes": [],
                                  "verdict": self.verdict,
                                  "checks": [c.to_dict() | {"shown": format_check_value(c.check, c.value, c.threshold)}
                                             for c in self.checks],
                                  "parameters": self.parameters, "thresholds": THRESHOLDS}
        predictive = self.predictive if full else self._predictive
        loo = self.loo if full else self._loo
        if predictive is not None:
            report["predictive"] = predictive
        if loo is not None:
            report["loo"] = loo
        if not self.result.has_person_draws:
            report["notes"].append("the fit stores no person draws: hit rate, PPC and LOO were skipped")
        sensitivity = self.sensitivity if full else self._sensitivity
        if sensitivity is not None:
            report["sensitivity"] = sensitivity
        if full:
            report["priors"] = implied_priors(self.result.layout,
                                              self.result.spec.model.prior_scale).to_dict(orient="records")
        report["exit_code"] = self.exit_code
        return jsonable(report)

    def save(self, folder: str | Path) -> dict[str, Any]:
        """Write ``diagnostics.json`` and the diagnostic plots (PNG) into ``folder``, atomically; return the report.

        Computes the predictive checks and PSIS-LOO if they were not yet (what ``hierchoice check`` does).
        """
        from .plots import write_diagnostic_plots

        # a folder hierchoice marks as its own (or an existing results folder), so that the report or a later
        # save may write into it too; a folder holding the user's own files is refused, as everywhere
        target = make_folder(folder, "results")
        predictive = self.predictive
        self.loo  # noqa: B018 - computed before the report is assembled
        with _quiet():
            plots = write_diagnostic_plots(
                self.result, target, reliability_table=None if predictive is None else predictive["reliability"],
                shares_table=None if predictive is None else predictive["shares"], table=self.parameters)
        report = self.to_dict()
        if (target / "holdout.json").is_file():
            report["notes"].append("held-out validation (hierchoice holdout) is in holdout.json")
        report["plots"] = {name: path.name for name, path in plots.items()}
        atomic_write_text(target / "diagnostics.json", json.dumps(report, indent=2) + "\n")
        return report

    # ------------------------------------------------------------------ plots on demand (matplotlib figures)

    def plot_rank(self, *, max_parameters: int = 24) -> Any:
        """Rank plots of the population parameters (:func:`hierchoice.diagnostics.plots.plot_rank`)."""
        from .plots import plot_rank

        return plot_rank(self.result.idata, max_parameters=max_parameters)

    def plot_trace(self, *, max_parameters: int = 12) -> Any:
        """Traces of the population parameters, highest R-hat first (:func:`~hierchoice.diagnostics.plots.plot_trace`)."""
        from .plots import plot_trace

        return plot_trace(self.result.idata, max_parameters=max_parameters, table=self.parameters)

    def plot_energy(self) -> Any:
        """Energy plot with E-BFMI (:func:`hierchoice.diagnostics.plots.plot_energy`)."""
        from .plots import plot_energy

        return plot_energy(self.result.idata)

    def plot_pair(self, attribute: str | None = None) -> Any:
        """One attribute's population mean against its SD, divergences marked (default: the slowest-mixing SD)."""
        from .plots import plot_mean_sd_pair

        return plot_mean_sd_pair(self.result.idata, attribute)

    def plot_reliability(self) -> Any:
        """The in-sample reliability diagram (needs person draws)."""
        from .plots import plot_reliability

        return plot_reliability(self._needs_predictive("plot_reliability")["reliability"])

    def plot_ppc_shares(self) -> Any:
        """Observed choice shares against their posterior-predictive intervals (needs person draws)."""
        from .plots import plot_ppc_shares

        return plot_ppc_shares(self._needs_predictive("plot_ppc_shares")["shares"])

    def _needs_predictive(self, what: str) -> dict[str, Any]:
        predictive = self.predictive
        if predictive is None:
            raise FitError(f"{what} needs the posterior person tastes, which this fit did not store; refit with "
                           "sampling.store_person_draws = true.")
        return predictive

    # ------------------------------------------------------------------ displays

    def __repr__(self) -> str:
        fails = sum(c.verdict == "fail" for c in self.checks)
        warns = sum(c.verdict == "warn" for c in self.checks)
        where = f" of {self.source}" if self.source else ""
        head = (f"Diagnostics{where}: convergence {self.verdict.upper()} ({len(self.checks)} checks: {fails} failed, "
                f"{warns} warned)")
        hint = "  .table: every check; .parameters: R-hat/ESS per parameter; .plot_trace(), .plot_rank(); .save(folder)"
        return "\n".join([head, *(f"  {line}" for line in self.headline()), hint])

    def __str__(self) -> str:
        return format_verdict(self.to_dict(full=False))

    def _repr_html_(self) -> str:
        import html

        colour = _COLOUR.get(self.verdict, "#a3161a")
        items = "".join(f"<li>{html.escape(line)}</li>" for line in self.headline())
        table = self.table[["check", "subject", "shown", "rule", "verdict"]].to_html(index=False)
        advice = "".join(f"<li><strong>{html.escape(c.check)} {html.escape(c.subject)}</strong>: "
                         f"{html.escape(c.advice)}</li>" for c in self.checks if c.verdict != "pass" and c.advice)
        todo = f"<p>What to do:</p><ul>{advice}</ul>" if advice else ""
        return (f"<div><p style='border-left:6px solid {colour};padding:4px 10px;font-weight:600;color:{colour}'>"
                f"Convergence {html.escape(self.verdict.upper())}</p><ul>{items}</ul>{table}{todo}</div>")


def _loo_dict(loo: Any) -> dict[str, Any]:
    k = np.asarray(loo["pareto_k"]).ravel()
    return {
        "elpd_loo": float(loo["elpd_loo"]), "se": float(loo["se"]), "p_loo": float(loo["p_loo"]),
        "n_data_points": int(loo["n_data_points"]), "n_samples": int(loo["n_samples"]),
        "good_k": float(loo["good_k"]), "n_bad_k": int((k > float(loo["good_k"])).sum()),
        "max_k": float(np.max(k)) if k.size else None,
    }


_MARK = {"pass": "PASS", "warn": "WARN", "fail": "FAIL"}


def closing_line(report: dict[str, Any]) -> str:
    """The last line of :func:`format_verdict`: failed, passed, or passed with warnings to read (never a pass
    when a check warned)."""
    checks = report.get("checks", [])
    failed = sum(c.get("verdict") == "fail" for c in checks)
    warned = sum(c.get("verdict") == "warn" for c in checks)
    if failed or report.get("exit_code"):
        return (f"{failed} convergence check{'s' if failed != 1 else ''} FAILED: do not read the results until "
                "they pass (see what to do, above)")
    if warned:
        return (f"no convergence check failed, but {warned} warning{'s' if warned != 1 else ''}: read "
                f"{'them' if warned != 1 else 'it'} (what to do, above) before using the results")
    return "every convergence check passed"


def format_verdict(report: dict[str, Any]) -> str:
    """A plain-text account of a :func:`check_folder` report, for printing."""
    where = f"  ({report['folder']})" if report.get("folder") else ""
    lines = [f"convergence verdict: {report.get('verdict', '?').upper()}{where}", ""]
    checks = report.get("checks", [])
    width = max((len(f"{c['check']} {c['subject']}") for c in checks), default=10)
    for c in checks:
        value = c["value"]
        shown = c.get("shown") or format_check_value(c["check"], value, c.get("threshold"))
        name = f"{c['check']} {c['subject']}"
        lines.append(f"  {_MARK[c['verdict']]}  {name:<{width}}  {shown:>9}   ({c['rule']})")
    todo = [c for c in checks if c["verdict"] != "pass" and c.get("advice")]
    if todo:
        lines += ["", "what to do:"]
        for c in todo:
            lines.append(f"  - [{c['check']} {c['subject']}] {c['advice']}")
    pred = report.get("predictive")
    if pred:
        hr = pred["hit_rate"]
        lines += ["", f"in-sample hit rate {hr['hit_rate']:.3f} (chance {hr['chance_rate']:.3f}, "
                      f"{int(hr['n_tasks'])} tasks); in-sample calibration error {pred['calibration_error']:.3f} "
                      "(not graded: see reliability.png); "
                      f"{pred['shares_outside_interval']} of {len(pred['shares'])} predicted shares outside "
                      "their 90% interval"]
    loo = report.get("loo")
    if loo:
        for level in ("task", "person"):
            d = loo[level]
            lines.append(f"PSIS-LOO ({level} level): elpd {d['elpd_loo']:.1f} (se {d['se']:.1f}), p_loo "
                         f"{d['p_loo']:.1f}, {d['n_bad_k']} of {d['n_data_points']} Pareto k > {d['good_k']:.2f}")
        for c in loo.get("checks", []):
            if c["verdict"] != "pass":
                lines.append(f"  {_MARK[c['verdict']]}  {c['subject']}: {c['advice']}")
    priors = report.get("priors")
    if priors:
        lines += ["", "priors in the data's units (90 % prior intervals; docs/model.md):"]
        for r in priors:
            lines.append(f"  {r['parameter']}[{r['attribute']}]  {r['distribution']}  "
                         f"{r['eti_low']:.3g} to {r['eti_high']:.3g}  ({r['what']})")
    sens = report.get("sensitivity")
    if sens:
        flagged = [c for c in sens.get("checks", []) if c["verdict"] != "pass"]
        lines += ["", f"prior sensitivity (power-scaling, threshold {sens['threshold']:g}): "
                      f"{len(flagged)} of {len(sens.get('checks', []))} population parameters sensitive"]

        def shown(v: Any) -> str:
            return "n/a" if v is None else f"{v:.3f}"

        for row in sens.get("table", []):
            lines.append(f"  {row['parameter']:<{width}}  prior {shown(row.get('prior'))}  likelihood "
                         f"{shown(row.get('likelihood'))}  {row.get('diagnosis', '')}")
        for c in flagged:
            lines.append(f"  {_MARK[c['verdict']]}  {c['subject']}: {c['advice']}")
    for note in report.get("notes", []):
        lines.append(f"note: {note}")
    if report.get("plots"):
        lines += ["", "plots: " + ", ".join(report["plots"].values())]
    if report.get("exit_code") is not None:
        lines += ["", closing_line(report)]
    return "\n".join(lines)


def diagnose(fit: FitLike) -> Diagnostics:
    """The checks of a fit, in memory: verdict, table, plots on demand; no files written.

    Parameters
    ----------
    fit : ChoiceFit or path
        A fit (what :func:`hierchoice.fit` returns) or the path of its results folder.

    Returns
    -------
    Diagnostics
        The fit's own (``fit.diagnostics``, computed once per fit). ``.verdict``, ``.table``, ``.parameters``,
        ``.predictive`` and ``.loo`` (computed when first read), ``.plot_trace()`` and the other plots (matplotlib
        figures, not drawn twice in a notebook), ``.save(folder)`` (``diagnostics.json`` and PNGs).

    Examples
    --------
    >>> d = hc.diagnose(result)                     # doctest: +SKIP
    >>> d.verdict, d.table.query("verdict != 'pass'")  # doctest: +SKIP
    >>> d.plot_trace()                              # doctest: +SKIP
    """
    result = as_fit(fit, "diagnose")
    diag = result.diagnostics
    if isinstance(fit, (str, Path)):
        diag.source = str(fit)
    return diag


# the fit object (a lower floor) gets its diagnostics from here
lend("diagnostics", Diagnostics)
