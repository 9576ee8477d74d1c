"""The convergence verdict of a results folder, read from ``diagnostics.json`` or from running the checks.

Owns :func:`convergence_status` and the reading of verdict words (:func:`_normal_verdict`). Produces no HTML.
Imports ``hierchoice.inference`` and, lazily (so that a missing or broken checks module still lets the report
be written), :func:`hierchoice.diagnostics.folder.check_folder`; no other module of ``hierchoice.report``.
"""

from __future__ import annotations

import json
import logging
from pathlib import Path
from typing import Any

from ..inference.results import ChoiceFit

__all__ = ["_normal_verdict", "convergence_status"]

log = logging.getLogger("hierchoice")


def _normal_verdict(value: Any) -> str:
    text = str(value).strip().lower()
    if text in ("pass", "ok", "passed", "good"):
        return "pass"
    if text in ("warn", "warning", "warnings", "caution"):
        return "warn"
    if text in ("fail", "failed", "bad", "error"):
        return "fail"
    return "not checked"


def _same_fit(report: dict[str, Any], result: ChoiceFit) -> bool:
    """Whether a stored diagnostics report belongs to this fit (not a stale one)."""
    stored = report.get("fit")
    if not isinstance(stored, dict):
        return True
    keys = ("wall_seconds", "seed", "draws", "chains", "backend")
    return all(str(stored.get(k)) == str(result.info.get(k)) for k in keys if k in result.info)


def convergence_status(folder: str | Path, result: ChoiceFit | None = None) -> dict[str, Any]:
    """The convergence verdict of a results folder, or why there is none.

    Reads ``diagnostics.json`` when it belongs to this fit; otherwise runs
    :func:`hierchoice.diagnostics.folder.check_folder` (which writes ``diagnostics.json`` and
    the diagnostic plots into the folder). Any problem — the checks module
    missing, or failing — gives ``verdict = "not checked"`` with the ``reason``;
    this function never raises because of the checks.

    Returns
    -------
    dict
        ``verdict`` (``"pass"``, ``"warn"``, ``"fail"`` or ``"not checked"``),
        ``checks`` (records with check, subject, value, threshold, verdict,
        advice), ``reason``, ``source`` and the rest of the diagnostics report
        (``predictive``, ``loo``, ``holdout``, ``plots``, ``notes``) when present.
    """
    folder = Path(folder)
    report: dict[str, Any] | None = None
    reasons: list[str] = []
    source = ""
    path = folder / "diagnostics.json"
    if path.exists():
        try:
            loaded = json.loads(path.read_text(encoding="utf-8"))
            if not isinstance(loaded, dict):
                raise ValueError("not a JSON object")
            if result is None or _same_fit(loaded, result):
                report, source = loaded, "diagnostics.json"
            else:
                reasons.append("diagnostics.json belongs to an earlier fit")
        except (OSError, ValueError) as err:
            reasons.append(f"diagnostics.json could not be read ({err})")
    if report is None:
        try:
            from ..diagnostics.folder import check_folder
        except Exception as err:  # the module is absent or broken: the report still gets written
            reasons.append(f"the convergence checks (hierchoice.checks) are not available ({type(err).__name__})")
        else:
            try:
                report, _code = check_folder(folder, result=result)
                source = "hierchoice.diagnostics.folder.check_folder"
            except Exception as err:  # a failing check must not stop the report
                log.warning("convergence checks failed: %s", err)
                reasons.append(f"the convergence checks failed: {type(err).__name__}: {err}")
    if report is None:
        return {"verdict": "not checked", "checks": [], "reason": "; ".join(reasons), "source": ""}
    checks = [c for c in report.get("checks", []) if isinstance(c, dict)]
    try:  # a diagnostics.json from before values were stored as text: format them as the checks do
        from ..diagnostics.checks import format_check_value

        for c in checks:
            c.setdefault("shown", format_check_value(str(c.get("check")), c.get("value"), c.get("threshold")))
    except Exception as err:  # the checks module is broken: the report shows the raw values
        log.warning("check values left unformatted: %s", err)
    verdict = _normal_verdict(report.get("verdict"))
    if verdict == "not checked" and checks:
        verdicts = {_normal_verdict(c.get("verdict")) for c in checks}
        verdict = next((v for v in ("fail", "warn", "pass") if v in verdicts), "not checked")
    if verdict == "not checked":
        reasons.append("the diagnostics report gives no verdict")
    out = dict(report)
    out.update(verdict=verdict, checks=checks, reason="; ".join(reasons), source=source)
    return out
