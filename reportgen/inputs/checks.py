"""The data checks of one file and of all files together (each line: pass, warn or fail).

The order of the steps, each one a line of the checks table: the columns; the row
selection (``data.keep_rows``); the types (dates need an origin); the time origin; the log
transform; missing values; duplicates; the declared value range and time domain; then the
design of all readings (``design_checks``). A failed step stops the later ones; the run
refuses the data only after every step that could run has reported.

The row-level steps (``rows``, ``cleaning``) run file by file (a single file is one file):
each leaves a :class:`~reportgen.inputs.findings.Tally` per file, and :func:`merged_steps`
turns the tallies of every file into the step's check, adding the counts and quoting the
first file's example. So the texts of a folder and of the same rows in one file agree
(tests/inputs/test_folders.py), and the per-file step can run where the file is (a
cluster's workers) without changing a word.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import pandas as pd

from ..errors import DataError
from .cleaning import (
    cleaned,
    data_domains,
    duplicates_check,
    groups_check,
    missing_check,
    range_check,
)
from .findings import Check, Tally
from .readers import Table
from .rows import log_check, select_rows, selection_check, typed, typed_check
from .spec import DataSection, Spec


def _columns_needed(d: DataSection) -> list[tuple[str, str]]:
    """(field, column) for every column that the data section names."""
    out = [("data.subject", d.subject), ("data.time", d.time), ("data.value", d.value)]
    if d.group:
        out.append(("data.group", d.group))
    if d.time_origin is not None and d.time_origin.kind == "column":
        out.append(("data.time_origin.column", d.time_origin.value))
    for i, cond in enumerate(d.keep_rows):
        out.append((f"data.keep_rows[{i}].column", cond.column))
    return out


def column_check(table: Table, d: DataSection, shown: str) -> Check:
    """The columns the spec names are in the file (DataError naming them otherwise)."""
    frame = table.frame
    missing = [(f, c) for f, c in _columns_needed(d) if c not in frame.columns]
    if missing:
        have = ", ".join(map(str, frame.columns))
        hint = ""
        if len(frame.columns) == 1 and table.format == "csv":
            hint = (
                " (the file has a single column: is it separated by something other than "
                "commas, semicolons, tabs or vertical bars?)"
            )
        cols = ", ".join(repr(c) for _, c in missing)
        names = ", ".join(f for f, _ in missing)
        raise DataError(
            f"column(s) {cols} not found in {shown!r} (named by {names}){hint}; "
            f"the file has {len(frame.columns)} column(s): {have}"
        )
    found = [d.subject, d.time, d.value] + ([d.group] if d.group else [])
    parts = []
    for c in found:
        label = table.labels.get(c)
        fmt = table.formats.get(c)
        extra = "; ".join(
            x for x in (f"label {label!r}" if label else "", f"format {fmt}" if fmt else "") if x
        )
        parts.append(f"{c} ({extra})" if extra else c)
    sep = (
        f"; fields separated by {table.describe_delimiter()}"
        if table.format == "csv" and table.delimiter != ","
        else ""
    )
    return Check("columns present", "pass", f"{', '.join(parts)} found ({table.format}{sep})")


def column_labels(table: Table, d: DataSection) -> dict[str, str]:
    """The labels the file stores for the time and value columns."""
    named = {"time": d.time, "value": d.value}
    return {
        role: table.labels[column] for role, column in named.items() if table.labels.get(column)
    }


@dataclass(frozen=True)
class FileChecks:
    """One file's findings and its cleaned readings (None: a step stopped the file, or no
    reading of it was left)."""

    tallies: tuple[Tally, ...]
    long: pd.DataFrame | None


def file_checks(table: Table, spec: Spec) -> FileChecks:
    """The row-level steps on one parsed file, each leaving a tally.

    A file stops where its own rows make a step fail; it is not stopped by what only all
    files together decide (no row kept, every row missing, one group only): it then
    contributes no readings, and the merged check decides."""
    found: list[Tally] = []
    frame, rows = table.frame, np.arange(len(table.frame))
    if len(frame) and spec.data.keep_rows:
        keep, tally = select_rows(table, spec.data.keep_rows)
        found.append(tally)
        rows = rows[keep]
        frame = frame.loc[keep].reset_index(drop=True)
    long = typed(frame, rows, table, spec, found) if len(frame) else None
    if long is not None:
        long = cleaned(long, table, spec, found)
    return FileChecks(tuple(found), long)


_STEPS_THAT_STOP = {"row selection", "columns typed", "log transform", "missing values", "groups"}
_MERGE: dict[str, Callable[[list[Tally], Spec], Check | None]] = {
    "row selection": selection_check,
    "columns typed": typed_check,
    "log transform": log_check,
    "missing values": missing_check,
    "groups": groups_check,
    "duplicate readings": duplicates_check,
}


def merged_steps(
    spec: Spec, tallies: list[tuple[Tally, ...]], comparing: bool = True
) -> tuple[list[Check], bool]:
    """The files' tallies (one tuple per file, in manifest order) put together step by step,
    and whether a failed step stopped the later ones. ``comparing=False``: readings of new
    subjects to predict, where one group is no fault (nothing is compared)."""
    steps = [
        "row selection",
        "columns typed",
        "log transform",
        "missing values",
        "groups",
        "duplicate readings",
        "values in declared range",
        *(name for name, _ in data_domains(spec)),
    ]
    checks = []
    for step in steps:
        these = [t for file in tallies for t in file if t.step == step]
        if not these:
            continue
        merge = _MERGE.get(step)
        if step == "groups":
            check: Check | None = groups_check(these, spec, comparing)
        elif merge is not None:
            check = merge(these, spec)
        else:
            check = range_check(step, these, spec)
        if check is not None:
            checks.append(check)
            if check.status == "fail" and step in _STEPS_THAT_STOP:
                return checks, True
    return checks, False


def empty_readings(spec: Spec) -> pd.DataFrame:
    columns = ["subject", "time", "value"] + (["group"] if spec.data.group else [])
    return pd.DataFrame({c: [] for c in columns})
