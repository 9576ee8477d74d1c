"""HTML building blocks for the report: escaping, number formats, tables.

Owns the only escaping of user text in the report: :func:`_e` for HTML (with :class:`_Raw` marking trusted
markup this package made) and :func:`_mpl_text` for matplotlib, so that attribute, alternative and person names
are never read as markup or mathtext. Also the number formats (:func:`_num`, :func:`_pct`, :func:`_interval`)
and the generic HTML tables every section uses. Internal to ``hierchoice.report``: the bottom of the package;
imports only ``hierchoice._records`` (for a type), never another module of ``report/``.
"""

from __future__ import annotations

import html
from collections.abc import Sequence
from typing import Any

import numpy as np

from .._records import Check

__all__ = ["_Raw", "_e", "_generic_table", "_interval", "_kv", "_mpl_text", "_num", "_pct", "_records_html",
           "_table"]


class _Raw(str):
    """Trusted HTML made by this package (never user text)."""


def _e(value: Any) -> str:
    """HTML-escape any value (user text included)."""
    if isinstance(value, _Raw):
        return str(value)
    return html.escape(str(value), quote=True)


def _num(value: Any) -> str:
    """A number with about three significant digits; an en dash when missing."""
    try:
        v = float(value)
    except (TypeError, ValueError):
        return str(value)
    if not np.isfinite(v):
        return "–"
    a = abs(v)
    if a == 0:
        return "0"
    if a >= 1e5 or a < 1e-4:
        return f"{v:.2e}"
    return f"{v:,.0f}" if a >= 1000 else f"{v:.3g}"


def _pct(value: Any) -> str:
    try:
        v = float(value)
    except (TypeError, ValueError):
        return str(value)
    return "–" if not np.isfinite(v) else f"{100 * v:.1f} %"


def _interval(row: Any, fmt: Any = _num) -> _Raw:
    """``median [hdi_low, hdi_high]`` of a summary row."""
    return _Raw(f"{_e(fmt(row['median']))} <span class='sub'>[{_e(fmt(row['hdi_low']))}, "
                f"{_e(fmt(row['hdi_high']))}]</span>")


def _table(columns: Sequence[str], rows: Sequence[Sequence[Any]], *, numeric: Sequence[int] = ()) -> str:
    head = "".join(f"<th>{_e(c)}</th>" for c in columns)
    body = []
    for row in rows:
        cells = "".join(f"<td class='num'>{_e(v)}</td>" if i in numeric else f"<td>{_e(v)}</td>"
                        for i, v in enumerate(row))
        body.append(f"<tr>{cells}</tr>")
    return f"<div class='wide'><table><thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody></table></div>"


def _kv(pairs: Sequence[tuple[str, Any]]) -> str:
    rows = "".join(f"<tr><th>{_e(k)}</th><td>{_e(v)}</td></tr>" for k, v in pairs)
    return f"<table class='kv'><tbody>{rows}</tbody></table>"


def _records_html(records: Sequence[Check]) -> str:
    """Warnings as cautions, ``info`` records (a long WTP tail, say) as notes."""
    return "".join(f"<div class='{'caution' if r.level == 'warning' else 'note'}'><strong>"
                   f"{_e(r.kind.replace('_', ' '))}:</strong> {_e(r.message)}</div>" for r in records)


def _mpl_text(text: Any) -> str:
    """Text for matplotlib: escape ``$`` so that user names are never read as mathtext."""
    return str(text).replace("\\", "\\\\").replace("$", r"\$")


def _generic_table(value: Any) -> str:
    """A table for a diagnostics entry of unknown shape: records, a mapping of mappings, or key-value pairs."""
    if isinstance(value, dict) and isinstance(value.get("table"), (list, dict)):
        value = value["table"]
    if isinstance(value, list) and value and all(isinstance(r, dict) for r in value):
        cols = list(dict.fromkeys(k for r in value for k in r))
        return _table(cols, [[_num(r.get(c)) if isinstance(r.get(c), (int, float)) else r.get(c, "")
                              for c in cols] for r in value])
    if isinstance(value, dict) and value and all(isinstance(v, dict) for v in value.values()):
        cols = list(dict.fromkeys(k for v in value.values() for k in v))
        return _table(["", *cols], [[k, *[_num(v.get(c)) if isinstance(v.get(c), (int, float)) else v.get(c, "")
                                          for c in cols]] for k, v in value.items()])
    if isinstance(value, dict):
        return _kv([(k, _num(v) if isinstance(v, (int, float)) else v) for k, v in value.items()])
    return f"<p>{_e(value)}</p>"
