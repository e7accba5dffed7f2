"""What the data checks find: a :class:`Check` per line of the checks table, and the
:class:`Tally` each row-level step leaves per file before the files' tallies are put
together (``checks.merged_steps``)."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

import numpy as np

Status = Literal["pass", "warn", "fail"]


@dataclass(frozen=True)
class Check:
    """One line of the checks table. A ``fail`` stops the run."""

    name: str
    status: Status
    detail: str


@dataclass(frozen=True)
class Tally:
    """What one step found in one file, before the files' findings are put together:
    counts, added over the files, and first examples, the first file's (in manifest order)
    that has one. ``sizes``: subjects per group (the groups step); ``file``: the file."""

    step: str
    n: tuple[int, ...] = ()
    first: tuple[str, ...] = ()
    sizes: tuple[tuple[str, int], ...] = ()
    file: str = ""


def totals(tallies: list[Tally]) -> list[int]:
    """The tallies' counts added over the files."""
    return [int(x) for x in np.sum([t.n for t in tallies], axis=0)]


def first_example(tallies: list[Tally], slot: int) -> str:
    """The first file's example in ``slot`` ("" when no file has one)."""
    return next((t.first[slot] for t in tallies if t.first[slot]), "")
