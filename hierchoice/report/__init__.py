"""The last stage: the self-contained HTML report with its CSV tables.

Owns: :func:`write_report` and :func:`convergence_status`. A thin layer over ``hierchoice.analysis`` and
``hierchoice.diagnostics``; may import every stage below it, never the CLI.
"""

from __future__ import annotations

from .html import REPORT_FILE, write_report
from .status import convergence_status

__all__ = [
    "REPORT_FILE",
    "convergence_status",
    "write_report",
]
