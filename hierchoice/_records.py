"""Problems found while computing a result, as data: one record type for every stage.

A :class:`Check` is a graded diagnostic (a convergence check, a Pareto-k check, a
warning about a WTP ratio or a share). Functions return records; callers log,
print or report them. Nothing here raises.
"""

from __future__ import annotations

import logging
import math
import warnings
from collections.abc import Iterable, Sequence
from dataclasses import asdict, dataclass
from typing import Any

import numpy as np

__all__ = ["Check", "VERDICTS", "warning_record", "warn_records", "overall_verdict", "checks_frame", "json_number",
           "jsonable"]

log = logging.getLogger("hierchoice")

VERDICTS = ("pass", "warn", "fail")
_RANK = {v: i for i, v in enumerate(VERDICTS)}


@dataclass(frozen=True)
class Check:
    """One graded diagnostic.

    Attributes
    ----------
    check : str
        What was measured (``rhat``, ``ess_bulk``, ``divergences``, ...).
    subject : str
        Which quantity: a variable (``taste_sd``), its worst element (``taste_sd[fare]``),
        ``sampler`` or ``person_taste``.
    value : float
        The measured value (NaN when it could not be computed).
    threshold : float
        The pass threshold; ``rule`` says in which direction.
    rule : str
        The pass rule as text, e.g. ``"value < 1.01"``.
    verdict : {"pass", "warn", "fail"}
    advice : str
        What to do about it, in plain words; empty on a pass.
    reference : str
        Where the threshold comes from.
    detail : str
        Extra facts (which element, how many over the threshold).
    """

    check: str
    subject: str
    value: float
    threshold: float
    rule: str
    verdict: str
    advice: str = ""
    reference: str = ""
    detail: str = ""

    @property
    def kind(self) -> str:
        """The problem's name (the same as ``check``)."""
        return self.check

    @property
    def where(self) -> str:
        """The attribute, alternative, variable or persons concerned (the same as ``subject``)."""
        return self.subject

    @property
    def message(self) -> str:
        """What it means and what to do (the ``advice``, or the rule on a pass)."""
        return self.advice or self.detail or self.rule

    @property
    def level(self) -> str:
        """``"warning"`` for a warn or fail verdict, else ``"info"``."""
        return "info" if self.verdict == "pass" else "warning"

    def to_dict(self) -> dict[str, Any]:
        out = asdict(self)
        out["value"] = json_number(self.value)
        out["threshold"] = json_number(self.threshold)
        return out


def warning_record(kind: str, level: str, message: str, where: str = "") -> Check:
    """A problem found while computing a result (a WTP ratio, a share), as a :class:`Check` with no measured value.

    ``level`` is ``"warning"`` (verdict ``"warn"``) or ``"info"`` (verdict ``"pass"``); ``message`` says what it
    means for the reader and what to do; ``where`` names the attribute, alternative or persons concerned.
    """
    return Check(kind, where, math.nan, math.nan, "", "warn" if level == "warning" else "pass", advice=message)


def warn_records(records: Iterable[Check], *, stacklevel: int = 3) -> None:
    """Issue the warning-level records as :class:`~hierchoice.exceptions.HierchoiceWarning` (``warnings.warn``);
    info-level ones go to the ``hierchoice`` logger at INFO."""
    from .exceptions import HierchoiceWarning

    for rec in records:
        if rec.level == "warning":
            warnings.warn(f"{rec.kind}: {rec.message}", HierchoiceWarning, stacklevel=stacklevel)
        else:
            log.info("%s: %s", rec.kind, rec.message)


def overall_verdict(checks: Iterable[Check]) -> str:
    """The worst verdict among ``checks`` (``"pass"`` when there are none)."""
    worst = 0
    for c in checks:
        worst = max(worst, _RANK[c.verdict])
    return VERDICTS[worst]


def checks_frame(checks: Sequence[Check]) -> Any:
    """The records as a tidy table, one row per check."""
    import pandas as pd

    cols = ["check", "subject", "value", "threshold", "rule", "verdict", "advice", "reference", "detail"]
    return pd.DataFrame([asdict(c) for c in checks], columns=cols)



def json_number(value: Any) -> Any:
    try:
        f = float(value)
    except (TypeError, ValueError):
        return value
    if not math.isfinite(f):
        return None
    return int(f) if isinstance(value, (int, np.integer)) and not isinstance(value, bool) else f


def jsonable(obj: Any) -> Any:
    if isinstance(obj, dict):
        return {str(k): jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [jsonable(v) for v in obj]
    if _is_frame(obj):
        return jsonable(obj.reset_index().to_dict(orient="records"))
    if _is_series(obj):
        return jsonable(obj.to_dict())
    if isinstance(obj, np.ndarray):
        return jsonable(obj.tolist())
    if isinstance(obj, (bool, np.bool_)):
        return bool(obj)
    if isinstance(obj, (int, float, np.integer, np.floating)):
        return json_number(obj)
    if obj is None or isinstance(obj, str):
        return obj
    return str(obj)


def _is_frame(obj: Any) -> bool:
    return type(obj).__name__ == "DataFrame" and hasattr(obj, "reset_index")


def _is_series(obj: Any) -> bool:
    return type(obj).__name__ == "Series" and hasattr(obj, "to_dict")
