"""Stage 1, the data: reading choice tables, validating and coding them into panel arrays.

Owns: :class:`ChoicePanel` (validated, labelled dense arrays), reading CSV / Parquet / frames, wide <-> long,
dynamics (lagged choice, initial conditions).
May import: ``hierchoice.spec``, ``hierchoice.exceptions``, ``hierchoice._io``. Knows nothing of PyMC.

Inside, imports run one way: :mod:`~hierchoice.data.validate` (checks of the long table, ``ValidationSummary``)
<- :mod:`~hierchoice.data.read` (files, wide <-> long) and :mod:`~hierchoice.data.coding` (``Term``, attribute
coding) <- :mod:`~hierchoice.data.dynamics` (task order, lags, initial conditions) <- :mod:`~hierchoice.data.panel`
(``ChoicePanel``, ``load_panel``, the build and the dense arrays).
"""

from __future__ import annotations

from .coding import Term
from .panel import ChoicePanel, load_panel
from .read import long_to_wide, read_table, wide_to_long
from .validate import ValidationSummary

__all__ = [
    "Term",
    "ValidationSummary",
    "ChoicePanel",
    "read_table",
    "wide_to_long",
    "long_to_wide",
    "load_panel",
]
