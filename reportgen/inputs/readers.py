"""Data files -> a pandas table, with the labels and display formats the file stores.

Formats: CSV (the delimiter is detected from the header line), Parquet, and the files that
statistical packages write: SAS transport (.xpt), SAS7BDAT, Stata (.dta) and SPSS (.sav).
The last four are read with pyreadstat (the ReadStat C library): one maintained reader for
all four, it reads from the bytes already in memory (so the bytes hashed are the bytes
parsed), returns each column's label and display format, and turns date-formatted columns
into dates. pandas' own readers cover only some of the four and drop the labels.

Every reader takes the file's bytes: the caller reads the file once and hashes that.
"""

from __future__ import annotations

import io
from dataclasses import dataclass, field
from typing import Any

import pandas as pd

from ..errors import DataError

SUFFIXES = {
    ".csv": "csv",
    ".txt": "csv",
    ".tsv": "csv",
    ".parquet": "parquet",
    ".pq": "parquet",
    ".xpt": "xpt",
    ".sas7bdat": "sas7bdat",
    ".dta": "dta",
    ".sav": "sav",
    ".zsav": "sav",
}
FORMATS = ("csv", "parquet", "xpt", "sas7bdat", "dta", "sav")
DELIMITERS = (",", ";", "\t", "|")
_DELIMITER_NAMES = {",": "commas", ";": "semicolons", "\t": "tabs", "|": "vertical bars"}


@dataclass(frozen=True)
class Table:
    """A parsed data file.

    ``labels`` and ``formats`` hold what the file stores per column (SAS, Stata and SPSS
    files do; CSV and Parquet do not). ``delimiter`` is the CSV field separator used.
    """

    frame: pd.DataFrame
    format: str
    labels: dict[str, str] = field(default_factory=dict)
    formats: dict[str, str] = field(default_factory=dict)
    delimiter: str = ""
    file: str = ""  # one file of many: its path relative to the folder or pattern

    def where(self, row: int) -> str:
        """Where row ``row`` (0-based, in the parsed table) is, in the user's terms."""
        if self.file:
            return f"data row {row + 1} of {self.file}"
        if self.format == "csv":
            return f"row {row + 2} of the file"  # as a spreadsheet shows it: row 1 is the header
        return f"data row {row + 1} of the table"

    def describe_delimiter(self) -> str:
        return _DELIMITER_NAMES.get(self.delimiter, repr(self.delimiter))


def detect_format(name: str, declared: str = "auto") -> str:
    """The format named in the spec, or the one the file's suffix implies (CSV otherwise)."""
    if declared != "auto":
        return declared
    lowered = name.lower()
    for suffix, fmt in SUFFIXES.items():
        if lowered.endswith(suffix):
            return fmt
    return "csv"


def sniff_delimiter(raw: bytes) -> str:
    """The separator that the header line uses most among comma, semicolon, tab and bar.

    A comma wins ties (and a header without any of them); quoted names are not split.
    """
    head = raw[:65536].split(b"\n", 1)[0].decode("utf-8", errors="replace")
    unquoted = "".join(part for i, part in enumerate(head.split('"')) if i % 2 == 0)
    counts = {d: unquoted.count(d) for d in DELIMITERS}
    best = max(DELIMITERS, key=lambda d: (counts[d], d == ","))
    return best if counts[best] > 0 else ","


def _statistical(raw: bytes, fmt: str, nrows: int | None) -> tuple[pd.DataFrame, Any]:
    import pyreadstat

    reader: Any = {
        "xpt": pyreadstat.read_xport,
        "sas7bdat": pyreadstat.read_sas7bdat,
        "dta": pyreadstat.read_dta,
        "sav": pyreadstat.read_sav,
    }[fmt]
    frame, meta = reader(io.BytesIO(raw), dates_as_pandas_datetime=True, row_limit=nrows or 0)
    return frame, meta


def parse_table(
    raw: bytes, fmt: str, shown: str, text_columns: tuple[str, ...] = (), nrows: int | None = None
) -> Table:
    """Parse ``raw`` as ``fmt``; ``text_columns`` of a CSV are read as text (subject ids).

    Raises :class:`DataError` naming the file for an empty or malformed file.
    """
    if not raw.strip():
        raise DataError(f"data.file {shown!r} is empty")
    try:
        if fmt == "csv":
            sep = sniff_delimiter(raw)
            frame = pd.read_csv(
                io.BytesIO(raw),
                sep=sep,
                nrows=nrows,
                dtype=dict.fromkeys(text_columns, str),
                keep_default_na=True,
            )
            return Table(frame, fmt, delimiter=sep)
        if fmt == "parquet":
            frame = pd.read_parquet(io.BytesIO(raw))
            return Table(frame if nrows is None else frame.head(nrows), fmt)
        frame, meta = _statistical(raw, fmt, nrows)
    except DataError:
        raise
    except Exception as e:  # the readers raise many types for malformed files
        first = str(e).splitlines()[0] if str(e) else type(e).__name__
        raise DataError(f"data.file {shown!r} cannot be parsed as {fmt}: {first}") from e
    labels = {str(k): str(v) for k, v in (meta.column_names_to_labels or {}).items() if v}
    formats = {str(k): str(v) for k, v in (meta.original_variable_types or {}).items() if v}
    return Table(frame, fmt, labels, formats)


def is_date_column(series: pd.Series) -> bool:
    """True for date or date-time columns (Parquet timestamps, SAS/Stata/SPSS dates)."""
    return bool(pd.api.types.is_datetime64_any_dtype(series))


def looks_like_dates(series: pd.Series, sample: int = 50) -> bool:
    """True when a text column's first non-empty values all parse as calendar dates."""
    if is_date_column(series):
        return True
    if pd.api.types.is_numeric_dtype(series) or pd.api.types.is_bool_dtype(series):
        return False
    values = series.dropna().astype(str).head(sample)
    if values.empty or not values.str.contains(r"\d[-/.]\d|\d{4}", regex=True).all():
        return False
    parsed = pd.to_datetime(values, errors="coerce", format="mixed")
    return bool(parsed.notna().all())
