"""Declarative argument checks: every bad argument gets the same message shape, naming the argument and the fix.

Used by the spec (every TOML key) and by public functions for their numeric options.
"""

from __future__ import annotations

import argparse
import difflib
from collections.abc import Callable, Mapping
from typing import Any

from .exceptions import SpecError

__all__ = ["check_keys", "choice", "text", "text_list", "label_list", "pattern_check", "flag", "whole_number",
           "whole_number_option", "NOT_GIVEN", "aliased"]


def check_keys(table: Mapping[str, Any], allowed: set[str], where: str) -> None:
    if not isinstance(table, Mapping):
        raise SpecError(f"[{where}] must be a table of keys, got {type(table).__name__}: {table!r}.")
    for key in table:
        if key not in allowed:
            close = difflib.get_close_matches(str(key), sorted(allowed), n=1)
            hint = f" Did you mean {close[0]!r}?" if close else ""
            raise SpecError(
                f"Unknown key {key!r} in [{where}]; known keys: {', '.join(sorted(allowed))}.{hint}"
            )


def choice(value: Any, options: tuple[str, ...], where: str) -> str:
    if value not in options:
        close = difflib.get_close_matches(str(value), options, n=1)
        hint = f" Did you mean {close[0]!r}?" if close else ""
        raise SpecError(f"{where} = {value!r} is not one of: {', '.join(options)}.{hint}")
    return str(value)


def text(value: Any, where: str) -> str:
    if not isinstance(value, str) or not value:
        raise SpecError(f"{where} must be a non-empty string (a column or label name), got {value!r}.")
    return value


def text_list(value: Any, where: str) -> tuple[str, ...]:
    if isinstance(value, str):
        value = [value]
    if not isinstance(value, (list, tuple)) or not all(isinstance(v, str) and v for v in value):
        raise SpecError(f"{where} must be a list of names, got {value!r}.")
    if len(set(value)) != len(value):
        raise SpecError(f"{where} lists a name twice: {value!r}.")
    return tuple(value)


def label_list(value: Any, where: str) -> tuple[str, ...]:
    """A list of alternative labels; numbers are read as text (``1`` -> ``"1"``)."""
    if not isinstance(value, (list, tuple)):
        raise SpecError(f"{where} must be a list of alternative labels, e.g. [\"a\", \"b\"], got {value!r}.")
    return text_list([str(v) for v in value], where)


def pattern_check(pattern: str, where: str, **fields: str) -> None:
    try:
        pattern.format(**fields)
    except (KeyError, IndexError, ValueError, AttributeError, TypeError) as err:
        raise SpecError(
            f"{where} {pattern!r} is not a valid pattern ({err!r}); it may only use "
            f"{', '.join('{' + f + '}' for f in fields)} (write {{{{ and }}}} for literal braces)."
        ) from None


def flag(value: Any, where: str) -> bool:
    if not isinstance(value, bool):
        raise SpecError(f"{where} must be true or false, got {value!r}.")
    return value


def whole_number(value: Any, where: str, *, minimum: int = 1) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or value < minimum:
        raise SpecError(f"{where} must be a whole number >= {minimum}, got {value!r}.")
    return value


def whole_number_option(minimum: int = 1) -> Callable[[str], int]:
    """An ``argparse`` ``type``: a whole number >= ``minimum``, refused when the command line is read.

    So a bad ``--draws 0`` is refused before any file is read, with the message shape of :func:`whole_number`.
    """
    def parse(text: str) -> int:
        try:
            value = int(text)
        except ValueError:
            value = None
        if value is None or value < minimum:
            raise argparse.ArgumentTypeError(f"must be a whole number >= {minimum}, got {text!r}")
        return value

    parse.__name__ = f"whole number >= {minimum}"  # argparse names the type by it
    return parse


class _NotGiven:
    """The default of an argument's old name: tells "not given" apart from every value, ``None`` included."""

    def __repr__(self) -> str:
        return "<not given>"


#: The default of an alias argument (an old name kept working beside the ecosystem's name).
NOT_GIVEN: Any = _NotGiven()


def aliased(name: str, value: Any, alias: str, alias_value: Any, default: Any) -> Any:
    """The value of an argument that also goes by an older name: ``random_seed`` / ``seed``, ``hdi_prob`` / ``prob``.

    ``alias_value`` is :data:`NOT_GIVEN` unless the caller used the older name; both names with different values
    is a :class:`~hierchoice.exceptions.SpecError`.
    """
    if alias_value is NOT_GIVEN:
        return value
    if value is not default and value != default and value != alias_value:
        raise SpecError(f"{name}={value!r} and its alias {alias}={alias_value!r} were both given; give one of them "
                        f"({name} is the documented name).")
    return alias_value
