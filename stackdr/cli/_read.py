"""Reading a data file for ``stackdr estimate``: CSV (robust to byte-order marks, delimiters,
quoted numbers and decimal commas) or Parquet, chosen by extension."""

from __future__ import annotations

import csv
import io
import re
from pathlib import Path

import pandas as pd

from stackdr.errors import InputError

CSV_SUFFIXES = (".csv", ".tsv", ".txt")
PARQUET_SUFFIXES = (".parquet", ".pq")
DELIMITERS = (",", ";", "\t", "|")
_DECIMAL_COMMA = re.compile(r"^[-+]?\d+(,\d+)?([eE][-+]?\d+)?$")


# ----------------------------------------------------------------------------- reading data


def _sniff_delimiter(sample: str) -> str:
    """The first of , ; tab | that splits the sample's lines into a constant number (> 1) of
    quoted-aware fields; comma when none does."""
    lines = sample.splitlines()
    if len(lines) > 1 and not sample.endswith(("\n", "\r")):
        lines = lines[:-1]  # the sample may end mid-line
    lines = [line for line in lines[:50] if line.strip()]
    for delimiter in DELIMITERS:
        widths = {len(row) for row in csv.reader(lines, delimiter=delimiter)}
        if len(widths) == 1 and widths.pop() > 1:
            return delimiter
    return ","


def _numeric_text_columns(frame: pd.DataFrame, decimal_comma: bool) -> pd.DataFrame:
    """Turn text columns holding only numbers (quoted, padded, or with a decimal comma in a
    semicolon file) into numbers, so they are not mistaken for categories."""
    for col in frame.columns:
        series = frame[col]
        if (
            pd.api.types.is_numeric_dtype(series)
            or series.dtype == bool
            or not series.notna().any()
        ):
            continue
        text = series.where(series.isna(), series.astype(str).str.strip())
        if decimal_comma and text.dropna().str.match(_DECIMAL_COMMA).all():
            text = text.str.replace(",", ".", regex=False)
        converted = pd.to_numeric(text, errors="coerce")
        if converted.notna().sum() == series.notna().sum():
            frame[col] = converted
    return frame


def read_table(path: str | Path) -> pd.DataFrame:
    """Read a CSV or Parquet data file (chosen by extension).

    CSV files are read robustly: a UTF-8 byte-order mark is dropped (Latin-1 is the fallback
    for files that are not UTF-8), the delimiter (comma, semicolon, tab or bar) is detected
    from the first lines, quoted or padded numbers are read as numbers, and in semicolon files
    a decimal comma is accepted. Column names are stripped of surrounding spaces.

    Parameters
    ----------
    path : str or Path

    Returns
    -------
    DataFrame

    Raises
    ------
    InputError
        Missing, empty or unreadable file, or an unsupported extension.
    """
    path = Path(path)
    label = f"data file {str(path)!r}"
    if not path.exists():
        raise InputError(f"{label} not found")
    if path.is_dir():
        raise InputError(f"{label} is a folder, not a file")
    suffix = path.suffix.lower()
    if suffix in PARQUET_SUFFIXES:
        try:
            frame = pd.read_parquet(path)
        except (OSError, ValueError, ImportError) as exc:
            raise InputError(f"cannot read {label} as Parquet: {exc}") from None
    elif suffix in CSV_SUFFIXES:
        raw = path.read_bytes()
        try:
            text = raw.decode("utf-8-sig")
        except UnicodeDecodeError:
            text = raw.decode("latin-1")
        if not text.strip():
            raise InputError(f"{label} is empty")
        delimiter = "\t" if suffix == ".tsv" else _sniff_delimiter(text[:65536])
        # pandas renames a repeated header ("x", "x.1") silently; a repeated name is ambiguous.
        try:
            first = next(csv.reader(io.StringIO(text), delimiter=delimiter))
        except csv.Error as exc:
            raise InputError(f"cannot read {label} as CSV: {exc}") from None
        header = [h.strip() for h in first]
        repeated = sorted({h for h in header if header.count(h) > 1})
        if repeated:
            raise InputError(
                f"{label} has duplicated column names: {', '.join(map(repr, repeated))}"
            )
        try:
            frame = pd.read_csv(io.StringIO(text), sep=delimiter, skipinitialspace=True)
        except (pd.errors.ParserError, pd.errors.EmptyDataError, ValueError) as exc:
            message = str(exc).strip().splitlines()[-1] if str(exc).strip() else "parse error"
            raise InputError(f"cannot read {label} as CSV: {message}") from None
        frame = _numeric_text_columns(frame, decimal_comma=delimiter == ";")
    else:
        raise InputError(
            f"{label} has extension {path.suffix or '(none)'!r}; give a .csv or .parquet file"
        )
    frame.columns = [str(c).strip() for c in frame.columns]
    if len(frame) == 0:
        raise InputError(f"{label} has column names but no data rows")
    return frame
