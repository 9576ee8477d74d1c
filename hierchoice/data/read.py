"""Reading choice tables: CSV, Parquet or DataFrame in, and wide (one row per task) <-> long (one row per alternative).

Owns: :func:`read_table`, :func:`wide_to_long` and :func:`long_to_wide`.
May import: ``hierchoice.exceptions``, ``hierchoice.spec`` and :mod:`hierchoice.data.validate` (for the message
helpers and the reserved column names).
"""

from __future__ import annotations

import codecs
import csv
import gzip
import io
import re
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from ..exceptions import DataError, first_few
from ..spec import Spec, WideSpec, load_spec
from .validate import _LINE, _ROW, LINE_INDEX, _check_reserved, _label, _rows

__all__ = ["long_to_wide", "read_table", "wide_to_long"]


#: The file types :func:`read_table` reads, for messages.
FILE_TYPES = "CSV (.csv, .txt, .gz: comma-separated, UTF-8) and Parquet (.parquet, .pq)"


def read_table(source: pd.DataFrame | str | Path) -> pd.DataFrame:
    """Read a DataFrame, a CSV file or a Parquet file into a DataFrame (a copy).

    A CSV file's rows are labelled by their line in the file: the index (named ``"file line"``) holds line
    numbers, the header being line 1, so the first data row is line 2, and messages name rows by those lines. A
    DataFrame keeps its own index; so does a Parquet file (which stores one).
    """
    if isinstance(source, pd.DataFrame):
        return source.copy()
    path = Path(source)
    if not path.exists():
        raise DataError(f"Data file {str(path)!r} does not exist.")
    if path.is_dir():
        raise DataError(f"Data file {str(path)!r} is a folder; give a {FILE_TYPES} file.")
    suffix = path.suffix.lower()
    try:
        if suffix in (".parquet", ".pq"):
            return pd.read_parquet(path)
        if suffix in (".csv", ".txt", ".gz"):
            return _read_csv(path)
    except DataError:
        raise
    except UnicodeDecodeError as err:
        raise DataError(
            f"Could not read {str(path)!r}: it is not UTF-8 text (byte {err.object[err.start:err.start + 1]!r} at "
            f"position {err.start}; a file saved as Latin-1 or Windows-1252, perhaps). Save it as UTF-8 (\"CSV "
            "UTF-8\" in a spreadsheet), or read it with pandas.read_csv(path, encoding=\"latin-1\") and pass the "
            "DataFrame."
        ) from None
    except pd.errors.EmptyDataError:
        raise DataError(f"Could not read {str(path)!r}: the file is empty. Give a {FILE_TYPES} file.") from None
    except (ValueError, OSError, ImportError) as err:
        raise DataError(f"Could not read {str(path)!r}: {err}") from None
    hint = " (a JSON file: hierchoice does not read JSON)" if suffix == ".json" else ""
    raise DataError(f"Data file {str(path)!r}: unknown format {suffix!r}{hint}; hierchoice reads {FILE_TYPES}.")


def _open(path: Path) -> Any:
    """The file, opened for bytes (decompressed if it ends in ``.gz``)."""
    return gzip.open(path, "rb") if path.suffix.lower() == ".gz" else path.open("rb")


def _read_csv(path: Path) -> pd.DataFrame:
    """A CSV file, checked for what a user most often gives by mistake, with its rows labelled by file line."""
    with _open(path) as fh:
        head = fh.read(4096)
    for bom, encoding in ((codecs.BOM_UTF32_LE, "utf-32"), (codecs.BOM_UTF32_BE, "utf-32"),
                          (codecs.BOM_UTF16_LE, "utf-16"), (codecs.BOM_UTF16_BE, "utf-16")):
        if head.startswith(bom):
            raise DataError(
                f"Could not read {str(path)!r}: it is encoded as {encoding.upper()} (it starts with a "
                f"{encoding.upper()} byte-order mark); hierchoice reads UTF-8 text. Save it as UTF-8 (\"CSV UTF-8\" "
                f"in a spreadsheet), or read it with pandas.read_csv(path, encoding=\"{encoding}\") and pass the "
                "DataFrame."
            )
    if re.match(rb"\s*(\{|\[\s*[\[{\"\d\]-])", head.removeprefix(codecs.BOM_UTF8)):
        raise DataError(f"{str(path)!r} looks like JSON, not CSV; hierchoice reads {FILE_TYPES}. Convert it, "
                        "e.g. pandas.read_json(path).to_csv(\"choices.csv\", index=False).")
    frame = pd.read_csv(path)
    if frame.shape[1] == 1:
        header = str(frame.columns[0])
        for sep, name, arg in ((";", "semicolon", ";"), ("\t", "tab", "\\t")):
            if sep in header:
                raise DataError(
                    f"{str(path)!r} was read as one column named {header[:60]!r}: it looks like a {name}-separated "
                    f"file; hierchoice reads comma-separated files. Save it with commas, or read it with "
                    f"pandas.read_csv(path, sep=\"{arg}\") (add decimal=\",\" for decimal commas) and pass the "
                    "DataFrame."
                )
    if len(frame) == 0:
        raise DataError(f"{str(path)!r} has a header line but no data rows: the table is empty.")
    frame.index = _line_numbers(path, len(frame))
    return frame


def _line_numbers(path: Path, n_rows: int) -> pd.Index:
    """The file line (header = line 1) where each of the ``n_rows`` data rows starts, as an index named
    ``"file line"``; the plain 0..n-1 index if the lines cannot be matched to the rows pandas read.

    Fast path: a file of exactly ``n_rows + 1`` lines has one row per line. Otherwise (blank lines, which pandas
    skips, or line breaks inside quoted fields) the lines are matched record by record with the csv module.
    """
    with _open(path) as fh:
        n_breaks, last = 0, b""
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            n_breaks += chunk.count(b"\n")
            last = chunk[-1:]
    n_lines = n_breaks + (last not in (b"\n", b""))
    if n_lines == n_rows + 1:
        return pd.RangeIndex(2, n_rows + 2, name=LINE_INDEX)
    starts: list[int] = []
    try:
        with _open(path) as fh:
            reader = csv.reader(io.TextIOWrapper(fh, encoding="utf-8-sig", errors="replace", newline=""))
            previous = 0
            for record in reader:
                if record and not (len(record) == 1 and not record[0].strip()):  # pandas skips blank lines
                    starts.append(previous + 1)
                previous = reader.line_num
    except csv.Error:
        starts = []
    if len(starts) == n_rows + 1:
        return pd.Index(starts[1:], name=LINE_INDEX)
    return pd.RangeIndex(n_rows)


# --------------------------------------------------------------------------- wide <-> long


def wide_to_long(frame: pd.DataFrame, spec: Spec | Mapping[str, Any] | str | Path) -> pd.DataFrame:
    """Turn a wide table (one row per task) into the long format the panel reads.

    The spec's ``[wide]`` table names the alternatives, the column holding the
    chosen alternative and the column-name ``pattern`` (for example
    ``"{attribute}{alternative}"`` turns ``price`` and ``1`` into ``price1``).
    Attributes with no per-alternative column are copied to every alternative
    (person covariates, for example). The long table has a fresh 0..n-1 index.
    """
    return _to_long(frame, load_spec(spec)).reset_index(drop=True)


def _to_long(frame: pd.DataFrame, spec: Spec) -> pd.DataFrame:
    """:func:`wide_to_long`, each long row keeping the index label of its wide row (a file line, or the frame's own
    label; repeated once per alternative), so that the panel's messages name the row the user can find."""
    wide, cols = spec.wide, spec.columns
    if wide is None:
        raise DataError("wide_to_long needs a spec with a [wide] table.")
    if len(frame) == 0:
        raise DataError("The wide choice table is empty: no rows to read.")
    frame = frame.copy()
    frame.columns = [str(c) for c in frame.columns]
    frame = frame.drop(columns=[c for c in (_LINE, _ROW) if c in frame.columns])  # helper names; never carried
    for role, c in (("person", cols.person), ("task", cols.task), ("wide.choice", wide.choice)):
        if c not in frame.columns:
            raise DataError(f"Missing column {c!r} ({role}) in the wide table; it has {first_few(list(frame.columns), 12)}.")
    _check_reserved({"person": cols.person, "task": cols.task, "alternative": cols.alternative,
                     "chosen": cols.chosen}
                    | ({"available": cols.available} if cols.available else {})
                    | {f"attribute {a.name}": a.source for a in spec.attributes.values()}
                    | {f"covariate {c}": c for c in (spec.covariates.columns if spec.covariates else ())})
    labels = wide.choice_labels or {a: a for a in wide.alternatives}
    choice = frame[wide.choice].map(lambda v: None if pd.isna(v) else _label(v))
    mapped = choice.map(lambda v: labels.get(v) if v is not None else None)
    bad = mapped.isna() | ~mapped.isin(list(wide.alternatives))
    if bad.any():
        raise DataError(
            f"Column {wide.choice!r} has values {first_few(choice[bad].astype(str).unique().tolist())} at "
            f"{_rows(frame, bad)} that are not alternatives {list(wide.alternatives)} "
            "(map them with wide.choice_labels)."
        )
    carried = [c for c in (spec.covariates.columns if spec.covariates else ()) if c in frame.columns]
    pieces = [_wide_piece(frame, spec, wide, alt, mapped, carried) for alt in wide.alternatives]
    for attr in spec.attributes.values():
        found = [wide.pattern.format(attribute=attr.source, alternative=a) in frame.columns for a in wide.alternatives]
        if not any(found) and attr.source not in frame.columns:
            expect = wide.pattern.format(attribute=attr.source, alternative=wide.alternatives[0])
            raise DataError(
                f"Attribute {attr.name!r}: no column {expect!r} (pattern {wide.pattern!r}) nor {attr.source!r} "
                "in the wide table."
            )
    long = pd.concat(pieces, ignore_index=True)
    long = long.sort_values(["_row", cols.alternative], key=lambda s: s.map(
        {a: i for i, a in enumerate(wide.alternatives)}) if s.name == cols.alternative else s, kind="stable")
    # each long row keeps the label of its wide row (a file line, or the frame's index label) for messages
    long.index = frame.index[long["_row"].to_numpy()]
    return long.drop(columns="_row")


def _wide_piece(frame: pd.DataFrame, spec: Spec, wide: WideSpec, alt: str, mapped: pd.Series,
                carried: list[str]) -> pd.DataFrame:
    """The long rows of alternative ``alt``: one per wide row, with ``_row`` the wide row's position."""
    cols = spec.columns
    piece = pd.DataFrame({
        cols.person: frame[cols.person].to_numpy(),
        cols.task: frame[cols.task].to_numpy(),
        cols.alternative: alt,
        cols.chosen: (mapped == alt).astype(int).to_numpy(),
        "_row": np.arange(len(frame)),
    })
    for attr in spec.attributes.values():
        name = wide.pattern.format(attribute=attr.source, alternative=alt)
        if name in frame.columns:
            piece[attr.source] = frame[name].to_numpy()
        elif attr.source in frame.columns:
            piece[attr.source] = frame[attr.source].to_numpy()
        else:
            piece[attr.source] = np.nan  # absent for this alternative: must be unavailable or opt-out
    if wide.available_pattern is not None and cols.available:
        name = wide.available_pattern.format(alternative=alt)
        piece[cols.available] = frame[name].to_numpy() if name in frame.columns else 1
    elif cols.available:
        piece[cols.available] = 1
    for c in carried:
        piece[c] = frame[c].to_numpy()
    return piece


def long_to_wide(frame: pd.DataFrame, spec: Spec | Mapping[str, Any] | str | Path) -> pd.DataFrame:
    """The inverse of :func:`wide_to_long` for tables whose tasks list every alternative."""
    spec = load_spec(spec)
    wide, cols = spec.wide, spec.columns
    if wide is None:
        raise DataError("long_to_wide needs a spec with a [wide] table.")
    inverse = {v: k for k, v in (wide.choice_labels or {a: a for a in wide.alternatives}).items()}
    sources = list(dict.fromkeys(a.source for a in spec.attributes.values()))
    carried = list(spec.covariates.columns) if spec.covariates else []
    with_avail = wide.available_pattern is not None and cols.available is not None
    needed = [cols.person, cols.task, cols.alternative, cols.chosen] + sources + carried
    needed += [cols.available] if with_avail else []
    absent = [c for c in needed if c not in frame.columns]
    if absent:
        raise DataError(f"Missing column(s) {first_few(absent)} in the long table; it has "
                        f"{first_few(list(frame.columns), 12)}.")
    frame = frame.copy()
    frame[cols.alternative] = frame[cols.alternative].map(_label)
    keys = [cols.person, cols.task]
    out = frame[keys + carried].drop_duplicates(keys).reset_index(drop=True)
    picked = frame.loc[frame[cols.chosen].astype(bool), keys + [cols.alternative]]
    out = out.merge(picked, on=keys, how="left").rename(columns={cols.alternative: wide.choice})
    out[wide.choice] = out[wide.choice].map(inverse)
    for alt in wide.alternatives:
        part = frame.loc[frame[cols.alternative] == alt, keys + sources + ([cols.available] if with_avail else [])]
        names = {s: wide.pattern.format(attribute=s, alternative=alt) for s in sources}
        if with_avail:
            names[cols.available] = wide.available_pattern.format(alternative=alt)  # type: ignore[union-attr]
        out = out.merge(part.rename(columns=names), on=keys, how="left")
    return out
