"""``reportgen init``: guess the subject, time and value columns of a data file.

The guess goes by name first, then by type, and never takes a date column for a number:

* subject: a column named like an identifier (id, subject, patient, unit, ...), else the
  first text or whole-number column whose values repeat;
* time: a column that varies within subjects (age at entry or a follow-up length does
  not), numeric and named like a time (time, day, week, visit, age, ...; by its name or
  its stored label, such as "Days since enrollment"), else a date column;
* value: the remaining numeric column that varies within subjects (a per-subject
  constant such as a birth weight is not a reading) and is not a flag or a code (four
  values at most), named (or labelled) like a measurement (value, result, aval, ...) if
  one is, else the first such column.

The starter spec lists every column of the file in a comment, with its type and any label
that the file stores, so the user can correct the guess.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

import pandas as pd

from .readers import Table, is_date_column, looks_like_dates

_ID = re.compile(
    r"(^|[^a-z])(id|ids|subj|subject|subjid|usubjid|patient|patid|pt|"
    r"participant|person|case|unit|device|pump|sensor|site_?id|animal|"
    r"rat|mouse|pig|chick|child|plant|tree|well|machine|serial)([^a-z]|$)",
    re.I,
)
_TIME = re.compile(
    r"(^|[^a-z])(t|time|times|day|days|week|weeks|wk|month|months|year|years|"
    r"visit|avisitn|ady|date|dt|adt|age|hour|hours|hr|min|minute|minutes|"
    r"occasion|session|follow_?up|tte|elapsed)([^a-z]|$)",
    re.I,
)
_VALUE = re.compile(
    r"(^|[^a-z])(value|val|aval|result|res|y|measure|measurement|response|"
    r"level|score|conc|concentration|reading|outcome|marker|weight|wt|"
    r"height|bp|count)([^a-z]|$)",
    re.I,
)


@dataclass(frozen=True)
class Column:
    name: str
    kind: str  # "date", "number", "whole number", "text"
    label: str


@dataclass(frozen=True)
class Guess:
    subject: str
    time: str
    value: str
    time_is_date: bool
    columns: tuple[Column, ...]


def _kind(series: pd.Series) -> str:
    if is_date_column(series) or looks_like_dates(series):
        return "date"
    if pd.api.types.is_bool_dtype(series):
        return "text"
    if pd.api.types.is_integer_dtype(series):
        return "whole number"
    if pd.api.types.is_numeric_dtype(series):
        values = series.dropna()
        whole = bool(len(values)) and bool((values == values.round()).all())
        return "whole number" if whole else "number"
    return "text"


def _first(names: list[str], test: object) -> str | None:
    return next((n for n in names if test(n)), None)  # type: ignore[operator]


def _varies_within(frame: pd.DataFrame, subject: str, column: str) -> bool:
    """True when the column takes more than one value within some subject (a reading,
    not a per-subject constant such as a birth weight or a treatment arm)."""
    per = frame[[subject, column]].dropna().groupby(subject)[column].nunique()
    return bool((per > 1).any())


def _coded(series: pd.Series) -> bool:
    """Four values at most: a flag or a code (0/1, 0/0.5/1, a stage 1-4), not a
    measurement."""
    return int(series.dropna().nunique()) <= 4


def guess_columns(table: Table) -> Guess:
    """The guessed subject, time and value columns (raises ValueError when none fits)."""
    frame = table.frame
    cols = [Column(str(c), _kind(frame[c]), table.labels.get(str(c), "")) for c in frame.columns]
    kinds = {c.name: c.kind for c in cols}
    names = [c.name for c in cols]

    def repeats(n: str) -> bool:
        s = frame[n].dropna()
        return 1 < s.nunique() < len(s)

    subject = (
        _first(names, lambda n: _ID.search(n) and kinds[n] != "date")
        or _first(names, lambda n: kinds[n] in ("text", "whole number") and repeats(n))
        or names[0]
    )
    rest = [n for n in names if n != subject]
    numeric = ("number", "whole number")
    labels = {c.name: c.label for c in cols}
    varies = {n: _varies_within(frame, subject, n) for n in rest if kinds[n] in (*numeric, "date")}

    def named(pattern: re.Pattern[str], n: str) -> bool:
        """The column's name or its stored label reads like ``pattern``."""
        return bool(pattern.search(n) or pattern.search(labels[n]))

    # the time varies within subjects: age at entry or a follow-up length is constant there
    time = (
        _first(rest, lambda n: named(_TIME, n) and kinds[n] in numeric and varies.get(n))
        or _first(rest, lambda n: kinds[n] == "date" and varies.get(n))
        or _first(rest, lambda n: named(_TIME, n) and kinds[n] in numeric)
        or _first(rest, lambda n: kinds[n] == "date")
        or _first(rest, lambda n: kinds[n] in numeric)
    )
    if time is None:
        raise ValueError("no column holds numbers or dates that could be the time")
    rest = [n for n in rest if n != time]

    def reading(n: str) -> bool:
        """Varies within subjects and is not a flag or a code."""
        return bool(varies.get(n)) and kinds[n] in numeric and not _coded(frame[n])

    value = (
        _first(rest, lambda n: named(_VALUE, n) and reading(n))
        or _first(rest, lambda n: kinds[n] == "number" and reading(n))
        or _first(rest, reading)
        or _first(rest, lambda n: bool(varies.get(n)) and kinds[n] in numeric)
        or _first(rest, lambda n: kinds[n] in numeric)
    )
    if value is None:
        raise ValueError("no column besides the time holds numbers that could be the value")
    return Guess(subject, time, value, kinds[time] == "date", tuple(cols))


def column_listing(guess: Guess) -> str:
    """Comment lines listing every column with its type, label and guessed role."""
    roles = {guess.subject: "subject", guess.time: "time", guess.value: "value"}
    lines = []
    for c in guess.columns:
        label = f', label "{c.label}"' if c.label else ""
        role = f"  <- {roles[c.name]}" if c.name in roles else ""
        lines.append(f"#   {c.name}: {c.kind}{label}{role}")
    return "\n".join(lines)
