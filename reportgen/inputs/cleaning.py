"""The later row-level steps of the data checks, on one file's typed readings: missing
values, groups, duplicates, the declared value range and the time domains. Each leaves a
:class:`~reportgen.inputs.findings.Tally`; each has a function that turns the tallies of
every file into its line of the checks table."""

from __future__ import annotations

import numpy as np
import pandas as pd

from .._text import plain
from .findings import Check, Status, Tally, first_example, totals
from .readers import Table
from .spec import ChecksSection, Spec


def cleaned(
    long: pd.DataFrame, table: Table, spec: Spec, found: list[Tally]
) -> pd.DataFrame | None:
    """Missing values, groups, duplicates, value range and domain, in that order; None
    when this file's rows fail a step that stops, or none is left."""
    c = spec.checks
    rows = long.attrs.pop("rows")
    na = (
        ~np.isfinite(long.time.to_numpy())
        | ~np.isfinite(long.value.to_numpy())
        | long.subject.isna().to_numpy()
    )
    if "group" in long:
        na |= long.group.isna().to_numpy()
    n_na = int(na.sum())
    found.append(
        Tally(
            "missing values",
            (n_na, len(long)),
            (table.where(int(rows[int(np.flatnonzero(na)[0])])) if n_na else "",),
        )
    )
    if n_na and (c.missing == "fail" or n_na == len(long)):
        return None
    long = long.loc[~na].reset_index(drop=True)
    if "group" in long:
        found.append(_group_tally(long))
        if found[-1].first[0]:
            return None
    long, tally = _duplicates(long, c.duplicates)
    found.append(tally)
    found.extend(_range_tallies(long, spec))
    long = _apply_drops(long, c, spec)
    return long if len(long) else None


def missing_check(tallies: list[Tally], spec: Spec) -> Check:
    n_na, n = totals(tallies)
    what = "subject, time, value" + (" or group" if spec.data.group else "")
    if n_na == 0:
        return Check("missing values", "pass", "no missing or non-finite values")
    if spec.checks.missing == "fail" or n_na == n:
        return Check(
            "missing values",
            "fail",
            f"{n_na} of {n} rows have a missing or non-finite {what} "
            f"(first at {first_example(tallies, 0)})",
        )
    return Check(
        "missing values", "warn", f"{n_na} of {n} rows dropped (missing or non-finite {what})"
    )


def _group_tally(long: pd.DataFrame) -> Tally:
    """A subject in two groups (the first met), and the subjects per group."""
    per = long.groupby("subject", sort=False)["group"].nunique()
    multi = ""
    if (per > 1).any():
        multi = plain(per.index[int(np.flatnonzero(per.to_numpy() > 1)[0])])
    sizes = long.drop_duplicates("subject").groupby("group").size()
    return Tally("groups", first=(multi,), sizes=tuple((str(g), int(n)) for g, n in sizes.items()))


def groups_check(tallies: list[Tally], spec: Spec, comparing: bool = True) -> Check:
    multi = first_example(tallies, 0)
    if multi:
        return Check(
            "groups",
            "fail",
            f"subject {multi} is in more than one group; "
            "a group (arm, cohort, site) is one value per subject",
        )
    sizes: dict[str, int] = {}
    for t in tallies:  # a subject's readings are in one file: its files' counts add up
        for g, n in t.sizes:
            sizes[g] = sizes.get(g, 0) + n
    labels = sorted(sizes)
    if len(labels) < 2 and not comparing:  # readings to predict: nothing is compared
        return Check(
            "groups", "pass", f"one group ({plain(labels[0])}, {sizes[labels[0]]} subjects)"
        )
    if len(labels) < 2:
        return Check(
            "groups",
            "fail",
            f"one group only ({plain(labels[0])}); a group comparison needs two or more",
        )
    listed = ", ".join(f"{g} ({sizes[g]} subjects)" for g in labels)
    status: Status = "pass" if min(sizes.values()) >= 2 else "warn"
    return Check("groups", status, f"{len(labels)} groups: {listed}")


def duplicate_mask(codes: np.ndarray, t: np.ndarray) -> np.ndarray:
    """The rows whose (subject code, time) another row shares.

    Each row's pair is hashed to 64 bits and the hashes sorted (a vectorised sort of
    integers): rows with a unique hash are unique. The few rows whose hash repeats (true
    duplicates, or a collision: about n^2 / 2^65, 5e-7 at 4.5 million rows) are compared
    exactly. A sort of integers, where pandas would hash pairs of values (CHOICES.md).
    """
    mask = np.zeros(codes.size, dtype=bool)
    bits = (np.asarray(t, dtype=np.float64) + 0.0).view(np.uint64)  # -0.0 + 0.0 is 0.0
    key = (bits * np.uint64(0x9E3779B97F4A7C15)) ^ (
        codes.astype(np.uint64) * np.uint64(0xC2B2AE3D27D4EB4F)
    )
    ordered = np.sort(key)
    repeated = ordered[1:][ordered[1:] == ordered[:-1]]
    if repeated.size == 0:
        return mask
    rows = np.flatnonzero(np.isin(key, repeated))
    rows = rows[np.lexsort((t[rows], codes[rows]))]
    same = (codes[rows][1:] == codes[rows][:-1]) & (t[rows][1:] == t[rows][:-1])
    mask[rows[1:][same]] = True
    mask[rows[:-1][same]] = True
    return mask


def _duplicates(long: pd.DataFrame, rule: str) -> tuple[pd.DataFrame, Tally]:
    """The readings as the rule leaves them; the tally counts the readings that share a
    (subject, time) and, when averaged, the readings they became."""
    dup = duplicate_mask(pd.factorize(long.subject)[0], long.time.to_numpy())
    n_dup = int(dup.sum())
    if n_dup == 0:
        return long, Tally("duplicate readings", (0, 0), ("",))
    if rule == "average":
        keys = ["subject", "time"] + (["group"] if "group" in long else [])
        merged = long.groupby(keys, sort=False)["value"].mean().reset_index()
        return merged, Tally(
            "duplicate readings", (n_dup, n_dup - (len(long) - len(merged))), ("",)
        )
    row = long[dup].iloc[0]
    return long, Tally(
        "duplicate readings", (n_dup, 0), (f"subject {plain(row.subject)} at time {row.time:g}",)
    )


def duplicates_check(tallies: list[Tally], spec: Spec) -> Check:
    n_dup, into = totals(tallies)
    rule = spec.checks.duplicates
    if n_dup == 0:
        return Check("duplicate readings", "pass", "no subject has two readings at one time")
    if rule == "fail":
        return Check(
            "duplicate readings",
            "fail",
            f"{n_dup} readings share a (subject, time) with another, e.g. "
            f"{first_example(tallies, 0)}",
        )
    if rule == "average":
        return Check(
            "duplicate readings",
            "warn",
            f"{n_dup} readings at a shared (subject, time) were averaged into {into}",
        )
    return Check(
        "duplicate readings", "warn", f"{n_dup} readings share a (subject, time); kept as they are"
    )


def data_domains(spec: Spec) -> list[tuple[str, tuple[float, float]]]:
    """The time domains the readings must lie in, each with its check's name:
    ``checks.domain`` (the plausible times) and ``model.domain`` (the fitted domain; the
    same as checks.domain when only that is given)."""
    out = []
    declared = spec.checks.domain
    if declared is not None:
        out.append(("times in declared domain", declared))
    fitted = spec.options.domain
    if fitted is not None and (declared is None or tuple(fitted) != out[0][1]):
        out.append(("times in the fitted domain", (float(fitted[0]), float(fitted[1]))))
    return out


def _range_tallies(long: pd.DataFrame, spec: Spec) -> list[Tally]:
    """Values outside checks.value_range, and times outside each domain, counted."""
    out = []
    if spec.checks.value_range is not None:
        lo, hi = spec.checks.value_range
        out.append(
            Tally("values in declared range", (int(((long.value < lo) | (long.value > hi)).sum()),))
        )
    for name, (lo, hi) in data_domains(spec):
        out.append(Tally(name, (int(((long.time < lo) | (long.time > hi)).sum()),)))
    return out


def range_check(step: str, tallies: list[Tally], spec: Spec) -> Check:
    c, n = spec.checks, totals(tallies)[0]
    if step == "values in declared range":
        assert c.value_range is not None
        lo, hi = c.value_range
        status: Status = "pass" if n == 0 else ("fail" if c.out_of_range == "fail" else "warn")
        action = {"warn": "kept", "drop": "dropped", "fail": "refused"}[c.out_of_range]
        return Check(
            step,
            status,
            f"all values within [{lo:g}, {hi:g}]"
            if n == 0
            else f"{n} values outside [{lo:g}, {hi:g}] ({action})",
        )
    lo, hi = dict(data_domains(spec))[step]
    if n == 0:
        return Check(step, "pass", f"all times within [{lo:g}, {hi:g}]")
    if c.out_of_domain == "drop":
        return Check(step, "warn", f"{n} readings at times outside [{lo:g}, {hi:g}] (dropped)")
    return Check(
        step,
        "fail",
        f"{n} readings at times outside [{lo:g}, {hi:g}] (refused; set "
        "checks.out_of_domain: drop to leave them out)",
    )


def _apply_drops(long: pd.DataFrame, c: ChecksSection, spec: Spec) -> pd.DataFrame:
    keep = np.ones(len(long), dtype=bool)
    if c.value_range is not None and c.out_of_range == "drop":
        lo, hi = c.value_range
        keep &= ((long.value >= lo) & (long.value <= hi)).to_numpy()
    if c.out_of_domain == "drop":
        for _, (lo, hi) in data_domains(spec):
            keep &= ((long.time >= lo) & (long.time <= hi)).to_numpy()
    return long if keep.all() else long.loc[keep].reset_index(drop=True)
