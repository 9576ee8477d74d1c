"""All of hierchoice's exception types, in one place.

Every error the package raises on purpose is a :class:`HierchoiceError`. The
subclasses say which stage found the problem. Messages say *what* is wrong,
*where* (column, person id, task id, row index — the first few), and *how* to
fix it. They subclass :class:`ValueError` so that generic ``except ValueError``
code keeps working.
"""

from __future__ import annotations

from collections.abc import Iterable

__all__ = [
    "HierchoiceError",
    "DataError",
    "SpecError",
    "FitError",
    "ArchiveError",
    "HierchoiceWarning",
    "first_few",
]


class HierchoiceError(ValueError):
    """Base class of every error raised on purpose by hierchoice."""


class DataError(HierchoiceError):
    """The choice table is malformed: a column, row, task or person is at fault."""


class SpecError(HierchoiceError):
    """The model specification (TOML file or dict) is malformed or inconsistent."""


class FitError(HierchoiceError):
    """The model could not be built or sampled."""


class ArchiveError(HierchoiceError):
    """A results folder is missing, incomplete or cannot be written."""


class HierchoiceWarning(UserWarning):
    """A note about a result that is not an error: an extrapolated share, a WTP ratio near a zero price.

    Issued through :mod:`warnings`, so notebooks show it once per place and ``warnings.filterwarnings`` (or
    pytest's ``-W``) controls it; the same records are in the result's ``attrs["warnings"]``.
    """


def first_few(values: Iterable[object], limit: int = 5) -> str:
    """Format the first ``limit`` values of ``values`` for an error message.

    >>> first_few([3, 1, 4, 1, 5, 9, 2])
    '3, 1, 4, 1, 5 (and 2 more)'
    """
    items = list(values)
    shown = ", ".join(repr(v) if isinstance(v, str) else str(v) for v in items[:limit])
    if len(items) > limit:
        shown += f" (and {len(items) - limit} more)"
    return shown
