"""``hierchoice check``'s job: grade a results folder and write its diagnostics and plots.

Uses every diagnostic module (convergence checks, predictive checks, LOO, plots)
and writes ``diagnostics.json`` and the PNG plots into the folder atomically.
"""

from __future__ import annotations

import json
import warnings
from pathlib import Path
from typing import Any

import numpy as np

from .._io import atomic_write_text
from .._records import jsonable, overall_verdict
from ..inference.results import load_fit
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
from .loo import pareto_k_checks, person_loo, task_loo
from .plots import write_diagnostic_plots
from .predictive import (
    hit_rate,
    posterior_choice_probabilities,
    ppc_shares,
    reliability,
)
from .sensitivity import SENSITIVITY_THRESHOLD, sensitivity_checks, sensitivity_table

__all__ = ["check_folder", "format_verdict", "closing_line", "THRESHOLDS"]

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

def check_folder(folder: str | Path, *, out: str | Path | None = None,
                 result: Any = None) -> tuple[dict[str, Any], int]:
    """Check a results folder: convergence verdict, predictive summary, LOO, plots and ``diagnostics.json``.

    Loads the fit (:func:`hierchoice.archive.load_fit`), grades every convergence
    check, computes the in-sample hit rate, reliability table and posterior-predictive
    shares (:mod:`hierchoice.predictive`), task- and person-level PSIS-LOO
    (:mod:`hierchoice.diagnostics.loo`), and writes ``diagnostics.json`` and the diagnostic
    plots (PNG) atomically. Prints nothing.

    Parameters
    ----------
    folder : path
        A results folder written by :func:`hierchoice.save_fit`.
    out : path, optional
        Where to write ``diagnostics.json`` and the plots; defaults to ``folder``.
    result : ChoiceFit, optional
        The fit in ``folder`` when the caller has already loaded it (it is not read again).

    Returns
    -------
    report : dict
        JSON-ready: ``verdict``, ``checks`` (every check with value, threshold, verdict
        and advice), ``parameters``, ``predictive``, ``loo``, ``plots``, ``thresholds``.
    exit_code : int
        0 when no convergence check failed, 1 otherwise (warnings do not count).
    """
    folder = Path(folder)
    target = Path(out) if out is not None else folder
    result = load_fit(folder) if result is None else result
    report: dict[str, Any] = {"folder": str(folder), "fit": dict(result.info), "notes": []}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        table = parameter_diagnostics(result.idata)
        checks = convergence_checks(result, table=table)
        report["verdict"] = overall_verdict(checks)
        report["checks"] = [c.to_dict() | {"shown": format_check_value(c.check, c.value, c.threshold)}
                            for c in checks]
        report["parameters"] = table
        report["thresholds"] = THRESHOLDS

        rel = shares = None
        if result.has_person_draws:
            prob = posterior_choice_probabilities(result)
            hr = hit_rate(result, probabilities=prob)
            rel = reliability(result, probabilities=prob)
            shares = ppc_shares(result, seed=0)
            n = rel["n"].sum()
            report["predictive"] = {
                "hit_rate": hr.to_dict(),
                "calibration_error": float((rel["n"] * (rel["observed"] - rel["mean_predicted"]).abs()).sum() / n),
                "calibration_note": _IN_SAMPLE_NOTE,
                "reliability": rel,
                "shares": shares,
                "shares_outside_interval": int(shares["outside"].sum()),
            }
            loo_t = task_loo(result)
            loo_p, mc = person_loo(result, n_sim=FOLDER_N_SIM, max_draws=FOLDER_MAX_DRAWS, seed=0,
                                   return_estimate=True)
            k_checks = pareto_k_checks(loo_t, "task") + pareto_k_checks(loo_p, "person")
            report["loo"] = {
                "task": _loo_dict(loo_t),
                "person": _loo_dict(loo_p) | {"elpd_mc_se": float(loo_p["elpd_mc_se"]),
                                               "mean_mc_se": float(mc["mc_se"].mean()), "n_sim": FOLDER_N_SIM,
                                               "max_draws": FOLDER_MAX_DRAWS},
                "checks": [c.to_dict() for c in k_checks],
            }
        else:
            report["notes"].append("the fit stores no person draws: hit rate, PPC and LOO were skipped")
        report["sensitivity"] = _sensitivity_dict(result)
        report["priors"] = implied_priors(result.layout, result.spec.model.prior_scale).to_dict(orient="records")
        plots = write_diagnostic_plots(result, target, reliability_table=rel, shares_table=shares, table=table)
        holdout = target / "holdout.json"
        if holdout.is_file():
            report["notes"].append("held-out validation (hierchoice holdout) is in holdout.json")
        report["plots"] = {name: path.name for name, path in plots.items()}
    code = 1 if any(c.verdict == "fail" for c in checks) else 0
    report["exit_code"] = code
    report = jsonable(report)
    atomic_write_text(target / "diagnostics.json", json.dumps(report, indent=2) + "\n")
    return report, code


def _sensitivity_dict(result: Any) -> dict[str, Any]:
    """Power-scaling prior / likelihood sensitivity of the population parameters, with graded records.

    Graded apart from the convergence checks: a prior-dominated parameter warns but does not change the exit code.
    """
    table = sensitivity_table(result)
    return {"table": table, "threshold": table.attrs["threshold"], "delta": table.attrs["delta"],
            "checks": [c.to_dict() for c in sensitivity_checks(table)]}


def _loo_dict(loo: Any) -> dict[str, Any]:
    k = np.asarray(loo["pareto_k"]).ravel()
    return {
        "elpd_loo": float(loo["elpd_loo"]), "se": float(loo["se"]), "p_loo": float(loo["p_loo"]),
        "n_data_points": int(loo["n_data_points"]), "n_samples": int(loo["n_samples"]),
        "good_k": float(loo["good_k"]), "n_bad_k": int((k > float(loo["good_k"])).sum()),
        "max_k": float(np.max(k)) if k.size else None,
    }


_MARK = {"pass": "PASS", "warn": "WARN", "fail": "FAIL"}

#: Why the in-sample reliability table is shown but never graded (docs/diagnostics.md, "Calibration").
_IN_SAMPLE_NOTE = ("in-sample: each person's tastes were fitted to these choices, so observed shares come out more "
                   "extreme than predicted even for a correct model; not graded. The graded test is on held-out "
                   "tasks: hierchoice holdout.")


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
    lines = [f"convergence verdict: {report.get('verdict', '?').upper()}"
             f"  ({report.get('folder', '')})", ""]
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
