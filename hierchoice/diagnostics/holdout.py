"""``hierchoice holdout``'s job: refit without each person's last tasks, score and calibrate the held-out ones.

:func:`holdout_folder` runs :func:`hierchoice.diagnostics.predictive.holdout_validation`, grades the held-out
calibration (:func:`hierchoice.diagnostics.calibration.calibration_check`) and writes into a results folder
(atomically, each file registered in the folder's marker):

``holdout.json``
    The hit rate and mean log predictive density of the mixed model, the fixed-taste model and chance; the
    held-out reliability table with its bands; the calibration check record; how the split and fits were made.
``holdout_tasks.csv``
    Every held-out task's score (log predictive density, hit) under each model.
``holdout_reliability.png``
    The held-out reliability diagram with its bands.

The report shows them (section "Model fit") when they are in the folder.
"""

from __future__ import annotations

import datetime as _dt
import json
from pathlib import Path
from typing import Any

from .._io import atomic_write_text, claim_folder, make_folder, write_with
from .._records import jsonable
from .calibration import calibration_bands, calibration_check
from .plots import plot_reliability, save_figure
from .predictive import holdout_validation, reliability

__all__ = ["HOLDOUT_FILE", "holdout_folder", "holdout_summary", "format_holdout"]

HOLDOUT_FILE = "holdout.json"


def holdout_summary(result: Any, *, bins: int = 10, table: Any = None) -> dict[str, Any]:
    """JSON-ready summary of a :class:`~hierchoice.diagnostics.predictive.HoldoutResult`.

    Keys: ``table`` (one record per model), ``reliability`` (held-out bins with bands), ``checks`` (the
    calibration record), ``n_persons``, ``n_train_tasks``, ``n_test_tasks``.
    """
    rel = calibration_bands(reliability(result.fits["mixed"], panel=result.test, bins=bins))
    check = calibration_check(rel, subject="held-out tasks (mixed model)")
    table = result.table.reset_index()
    return jsonable({
        "table": table, "reliability": rel, "z_band": rel.attrs["z_band"], "alpha": rel.attrs["alpha"],
        "checks": [check.to_dict()], "verdict": check.verdict,
        "n_persons": result.test.n_persons, "n_train_tasks": result.train.n_tasks,
        "n_test_tasks": result.test.n_tasks,
    })


def holdout_folder(panel: Any, out: str | Path, *, spec: Any = None, tasks: int = 1, method: str = "last",
                   seed: int = 0, compare_fixed: bool = True, bins: int = 10, inputs: tuple[Any, ...] = (),
                   **fit_options: Any) -> dict[str, Any]:
    """Run the holdout validation of ``panel`` and write its files into the results folder ``out``.

    ``out`` is a results folder that ``hierchoice fit`` wrote (the files are added to it) or a new folder;
    a folder holding files of the user's is refused before any fit starts (:func:`hierchoice._io.claim_folder`),
    and a new folder is made only once the fits have succeeded.
    ``fit_options`` (draws, tune, chains, backend, fit_seed, progressbar) go to
    :func:`~hierchoice.diagnostics.predictive.holdout_validation`. Returns the summary written to
    ``holdout.json``.
    """
    claim_folder(out, "results", inputs=inputs)  # refuse before the fits, not after
    result = holdout_validation(panel, spec, tasks=tasks, method=method, seed=seed, compare_fixed=compare_fixed,
                                **fit_options)
    folder = make_folder(out, "results", inputs=inputs)  # only now: a failed fit leaves no folder behind
    rel = calibration_bands(reliability(result.fits["mixed"], panel=result.test, bins=bins))
    summary = holdout_summary(result, bins=bins, table=rel)
    info = result.fits["mixed"].info
    summary["split"] = {"tasks": tasks, "method": method, "seed": seed}
    summary["fit"] = {k: info.get(k) for k in ("backend", "draws", "tune", "chains", "seed", "wall_seconds")}
    summary["created_at"] = _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")
    write_with(folder / "holdout_tasks.csv", lambda tmp: result.tasks.to_csv(tmp, index=False))
    save_figure(plot_reliability(rel, in_sample=False), folder / "holdout_reliability.png")
    summary["plot"] = "holdout_reliability.png"
    atomic_write_text(folder / HOLDOUT_FILE, json.dumps(summary, indent=2) + "\n")
    return summary


def format_holdout(summary: dict[str, Any]) -> str:
    """A plain-text account of a :func:`holdout_folder` summary, for printing."""
    lines = [f"held-out tasks: {summary['n_test_tasks']} ({summary['split']['tasks']} per person, "
             f"{summary['split']['method']}), fitted on {summary['n_train_tasks']} tasks", "",
             f"  {'model':<8} {'hit rate':>9} {'mean log density':>17} {'tasks':>7}"]
    for row in summary["table"]:
        lines.append(f"  {row['model']:<8} {row['hit_rate']:>9.3f} {row['mean_lpd']:>17.3f} {int(row['n_tasks']):>7}")
    c = summary["checks"][0]
    mark = "PASS" if c["verdict"] == "pass" else "WARN"
    lines += ["", f"  {mark}  held-out calibration: largest |z| {c['value']:.2f} ({c['rule']})"
              if c["value"] is not None else f"  {mark}  held-out calibration: {c['advice']}"]
    if c["verdict"] != "pass" and c.get("advice"):
        lines.append(f"  - {c['advice']}")
    return "\n".join(lines)
