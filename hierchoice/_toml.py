"""A small TOML writer: enough for specs (strings, numbers, booleans, lists, nested tables).

Python reads TOML with :mod:`tomllib`; it has no writer in the standard library.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from .exceptions import SpecError

__all__ = ["dumps_toml"]


def _toml_value(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, (int, float)):
        return repr(value)
    if isinstance(value, str):
        escaped = value.replace("\\", "\\\\").replace('"', '\\"').replace("\n", "\\n")
        escaped = "".join(f"\\u{ord(c):04x}" if ord(c) < 0x20 or ord(c) == 0x7F else c for c in escaped)
        return f'"{escaped}"'
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    if isinstance(value, Mapping):
        return "{ " + ", ".join(f"{_toml_key(k)} = {_toml_value(v)}" for k, v in value.items()) + " }"
    raise SpecError(f"Cannot write {value!r} to TOML.")


def _toml_key(key: str) -> str:
    if key and all((c.isascii() and c.isalnum()) or c in "_-" for c in key):
        return key
    return _toml_value(str(key))


def dumps_toml(table: Mapping[str, Any], prefix: str = "") -> str:
    """Write a nested mapping as TOML (tables for nested mappings, inline otherwise)."""
    lines: list[str] = []
    scalars = {k: v for k, v in table.items() if not isinstance(v, Mapping) or k.endswith("_labels")}
    tables = {k: v for k, v in table.items() if k not in scalars}
    if prefix and (scalars or not tables):
        lines.append(f"[{prefix}]")
    for key, value in scalars.items():
        lines.append(f"{_toml_key(key)} = {_toml_value(value)}")
    if lines:
        lines.append("")
    for key, value in tables.items():
        sub = f"{prefix}.{_toml_key(key)}" if prefix else _toml_key(key)
        lines.append(dumps_toml(value, sub))
    return "\n".join(lines)
