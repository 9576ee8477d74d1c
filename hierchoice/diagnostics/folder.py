"""``hierchoice check``'s job: grade a results folder and write its diagnostics and plots.

The checks are :func:`hierchoice.diagnostics.overview.diagnose`'s (convergence, predictive checks, LOO, plots);
this module writes them (``diagnostics.json`` and the PNG plots, atomically) and prints them as text
(:func:`format_verdict`, which lives beside the checks object and is re-exported here).
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from ..exceptions import ArchiveError
from ..inference.results import ChoiceFit, FitLike, load_fit
from .overview import IN_SAMPLE_NOTE, THRESHOLDS, closing_line, diagnose, format_verdict

__all__ = ["check_folder", "format_verdict", "closing_line", "THRESHOLDS", "IN_SAMPLE_NOTE"]


def check_folder(folder: FitLike, *, out: str | Path | None = None,
                 result: ChoiceFit | None = None) -> tuple[dict[str, Any], int]:
    """Check a results folder: convergence verdict, predictive summary, LOO, plots and ``diagnostics.json``.

    The checks are :func:`hierchoice.diagnose`'s (the same object a notebook gets); this job writes them:
    ``diagnostics.json`` and the diagnostic plots (PNG), atomically (:meth:`Diagnostics.save`). Prints nothing.

    Parameters
    ----------
    folder : path or ChoiceFit
        A results folder written by :func:`hierchoice.save_fit`, or a fit in memory (then ``out`` is needed).
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
    if isinstance(folder, ChoiceFit):
        if out is None:
            raise ArchiveError("check_folder(fit) needs out=, the folder to write diagnostics.json and the plots "
                               "into; for the checks in memory, without files, use hierchoice.diagnose(fit).")
        result, folder = folder, Path(out)
    folder = Path(folder)
    target = Path(out) if out is not None else folder
    result = load_fit(folder) if result is None else result
    diag = diagnose(result)
    diag.source = str(folder)
    report = diag.save(target)
    return report, int(report["exit_code"])
