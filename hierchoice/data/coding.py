"""Coding the spec's attributes into the columns of the model's attribute array.

Owns: :class:`Term` (one column of that array and how its taste varies); numeric attributes, dummy and effects
coding of categorical attributes, alternative-specific constants, and the check that every term varies over the
available alternatives (else its taste is not identified). Works on the long table, one value per row.
May import: ``hierchoice.exceptions``, ``hierchoice.spec`` and :mod:`hierchoice.data.validate`.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

from ..exceptions import DataError, first_few
from ..spec import AttributeSpec, Spec
from .validate import MAX_MAGNITUDE, ValidationSummary, _check_missing, _label, _rows

__all__ = ["Term"]


@dataclass(frozen=True)
class Term:
    """One column of the model's attribute array and how its taste varies.

    ``kind`` is one of ``numeric``, ``dummy``, ``effects``, ``constant``, ``lag``,
    ``lead`` or ``lagged_choice``; ``source`` is the spec attribute (or the
    alternative, for a constant) it comes from.
    """

    name: str
    source: str
    kind: str
    taste: str
    sign: str | None = None
    level: str | None = None


def _code_attributes(
    df: pd.DataFrame, spec: Spec, alternatives: Sequence[str], exempt: pd.Series, summary: ValidationSummary,
) -> tuple[list[Term], dict[str, pd.Series]]:
    """The terms of the spec's attributes and constants, and each term's value per row (a Series over ``df.index``).

    ``exempt`` rows (unavailable or opt-out) may miss attribute values and carry 0 in every non-constant term.
    """
    terms: list[Term] = []
    values: dict[str, pd.Series] = {}
    for attr in spec.attributes.values():
        col = df[attr.source]
        missing = col.isna()
        if attr.coding == "numeric":
            values[attr.name] = _numeric(df, attr, missing, exempt, summary)
            terms.append(Term(attr.name, attr.name, "numeric", attr.taste, attr.sign))
        else:
            for term, coded in _categorical(df, attr, missing, exempt, summary):
                values[term.name] = coded
                terms.append(term)
    if spec.constants is not None:
        for alt in alternatives:
            if alt == spec.constants.reference:
                continue
            name = f"asc:{alt}"
            values[name] = (df[spec.columns.alternative] == alt).astype(float)
            terms.append(Term(name, alt, "constant", spec.constants.taste))

    # rows exempt from attributes carry zeros (opt-out and unavailable rows)
    for name, value in values.items():
        term = next(t for t in terms if t.name == name)
        if term.kind != "constant":
            values[name] = value.where(~exempt, 0.0)
    return terms, values


def _numeric(df: pd.DataFrame, attr: AttributeSpec, missing: pd.Series, exempt: pd.Series,
             summary: ValidationSummary) -> pd.Series:
    """A numeric attribute as float per row, missing values (allowed on exempt rows only) set to 0."""
    col = df[attr.source]
    if not (pd.api.types.is_numeric_dtype(col) or pd.api.types.is_bool_dtype(col)):
        numeric = pd.to_numeric(col, errors="coerce")
        bad = numeric.isna() & ~missing
        if bad.any():
            shown = first_few(col[bad].astype(str).unique().tolist())
            raise DataError(
                f"Attribute column {attr.source!r} is not numeric: values {shown} at "
                f"{_rows(df, bad)}. Give coding = \"dummy\" (with base = ...) for a categorical attribute."
            )
        col = numeric
    col = col.astype(float)
    inf = ~np.isfinite(col) & ~col.isna()
    if inf.any():
        raise DataError(f"Attribute column {attr.source!r} has infinite values at {_rows(df, inf)}. Fix or remove "
                        "them: a utility must be a finite number.")
    _check_missing(df, attr.source, missing, exempt, summary)
    return col.fillna(0.0)


def _categorical(df: pd.DataFrame, attr: AttributeSpec, missing: pd.Series, exempt: pd.Series,
                 summary: ValidationSummary) -> list[tuple[Term, pd.Series]]:
    """A categorical attribute as one dummy (or effects) column per level other than ``attr.base``."""
    col = df[attr.source]
    _check_missing(df, attr.source, missing, exempt, summary)
    labels = col.map(lambda v: None if pd.isna(v) else _label(v))
    levels = sorted(set(labels[~missing & ~exempt]))
    if len(levels) == 1:
        raise DataError(
            f"Attribute column {attr.source!r} has one level ({levels[0]!r}) over every available "
            "alternative: its taste is not identified. Remove it from the spec."
        )
    if attr.base not in levels:
        raise DataError(
            f"attributes.{attr.name}.base = {attr.base!r} is not a level of column {attr.source!r} "
            f"(levels: {first_few(levels, 10)})."
        )
    out = []
    for level in levels:
        if level == attr.base:
            continue
        coded = (labels == level).astype(float)
        if attr.coding == "effects":
            coded = coded - (labels == attr.base).astype(float)
        out.append((Term(f"{attr.name}:{level}", attr.name, attr.coding, attr.taste, level=level),
                    coded.where(~missing, 0.0)))
    return out


def _check_identified(terms: Sequence[Term], values: Mapping[str, pd.Series], avail: pd.Series,
                      is_opt_out: pd.Series, spec: Spec) -> None:
    """Every term varies over the available alternatives, and there is at least one term."""
    for term in terms:
        # the opt-out's attributes are 0 by construction; an attribute constant over the other
        # alternatives is then collinear with the alternative-specific constants
        rows = avail if term.kind in ("constant", "lagged_choice") else avail & ~is_opt_out
        v = values[term.name][rows]
        if len(v) and v.min() == v.max():
            column = f" (column {spec.attributes[term.source].source!r})" if term.source in spec.attributes else ""
            raise DataError(
                f"Attribute {term.name!r}{column} is constant ({v.iloc[0]:g}) over every available "
                "alternative: its taste is not identified. Remove it from the spec."
            )
    if not terms:
        raise DataError("The spec gives no attribute, constant or dynamic term: the model would have no taste.")


#: Terms coded 0/1 (or -1/0/1) by hierchoice itself: their magnitude needs no check.
_CODED_KINDS = ("dummy", "effects", "constant", "lagged_choice")


def _check_magnitudes(df: pd.DataFrame, terms: Sequence[Term], values: Mapping[str, pd.Series], avail: pd.Series,
                      spec: Spec) -> None:
    """Every attribute value is small enough, raw and after the internal scaling, to give a finite, exact utility.

    The scaling is the model's: each numeric term divided by its standard deviation over the available rows.
    """
    for term in terms:
        if term.kind in _CODED_KINDS:
            continue
        value = values[term.name].where(avail, 0.0).astype(float)
        column = f" (column {spec.attributes[term.source].source!r})" if term.source in spec.attributes else ""
        big = value.abs() > MAX_MAGNITUDE
        if big.any():
            shown = first_few([float(v) for v in value[big].unique()])
            raise DataError(
                f"Attribute {term.name!r}{column} has values beyond +/-{MAX_MAGNITUDE:g} ({shown}) at "
                f"{_rows(df, big)}: a utility built from them would overflow or lose its precision. Check them for "
                "a data-entry error, or rescale the column (for example thousands instead of units)."
            )
        used = value[avail].to_numpy()
        sd = float(np.std(used)) if used.size else 0.0
        scaled = value.abs() / sd if sd > 0 else value * 0.0
        far = scaled > MAX_MAGNITUDE
        if far.any():
            raise DataError(
                f"Attribute {term.name!r}{column} has values up to {float(scaled.max()):.3g} standard deviations "
                f"(sd {sd:.3g}) from 0 at {_rows(df, far)}: the model divides each attribute by its standard "
                "deviation, and values this far from 0 leave utility differences without precision. Subtract a "
                "constant from the column (for example its mean) so that its values sit near 0."
            )


def _check_enough_persons(n_persons: int, terms: Sequence[Term], spec: Spec, summary: ValidationSummary | None) -> None:
    """Correlated random tastes need more persons than random tastes; one person shows no spread of tastes.

    Correlated tastes with fewer persons than random tastes + 1 are a :class:`DataError`: a sample correlation
    matrix of ``R`` tastes from ``n <= R`` persons is singular. A single person with independent random tastes is
    noted in ``summary``: their spread across persons is then the prior's.
    """
    random = [t.name for t in terms if t.taste != "fixed"]
    if not random:
        return
    if spec.model.correlated and n_persons < len(random) + 1:
        raise DataError(
            f"model.correlated = true estimates the correlations of {len(random)} random tastes "
            f"({first_few(random)}) from how tastes differ across persons, and the panel has {n_persons} "
            f"person{'s' if n_persons != 1 else ''}: at least {len(random) + 1} (random tastes + 1) are needed, and "
            "many more to learn anything. Set model.correlated = false, make some tastes fixed, or add persons."
        )
    if n_persons == 1 and summary is not None:
        summary.notes.append(
            f"only 1 person: the spread across persons of the random tastes ({first_few(random)}) cannot be "
            "learnt from the data (its posterior is its prior). Make the tastes fixed, or add persons."
        )
