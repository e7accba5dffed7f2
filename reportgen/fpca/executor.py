"""Who runs a pass over parts of the data, and how their sums are added.

PartResults apart from ``plan`` (which loads the compiled kernels) so that reading and checking
the data, which also runs as passes over files, loads nothing compiled.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import Any, Protocol, TypeVar

T = TypeVar("T")


class Executor(Protocol):
    """Runs a pass over parts. ``place`` puts parts where the passes run and returns their
    handles. ``per_part[i]`` (a tuple) goes to part ``i`` only; ``shared`` to every part.
    ``map`` returns the results in the parts' order; ``keep`` leaves them where they were
    computed and returns handles that ``map`` accepts as parts."""

    def place(self, parts: list[Any]) -> Sequence[Any]: ...

    def map(
        self,
        fn: Callable[..., T],
        parts: Sequence[Any],
        per_part: Sequence[tuple[Any, ...]] | None = None,
        shared: tuple[Any, ...] = (),
    ) -> list[T]: ...

    def keep(
        self,
        fn: Callable[..., Any],
        parts: Sequence[Any],
        per_part: Sequence[tuple[Any, ...]] | None = None,
        shared: tuple[Any, ...] = (),
    ) -> list[Any]: ...


class InProcess:
    """Runs every pass here, one part after another; the parts are their own handles."""

    def place(self, parts: list[Any]) -> list[Any]:
        return list(parts)

    def map(
        self,
        fn: Callable[..., T],
        parts: Sequence[Any],
        per_part: Sequence[tuple[Any, ...]] | None = None,
        shared: tuple[Any, ...] = (),
    ) -> list[T]:
        extra = per_part if per_part is not None else [()] * len(parts)
        return [fn(p, *e, *shared) for p, e in zip(parts, extra, strict=True)]

    keep = map


def tree_sum(items: Sequence[T], add: Callable[[T, T], T]) -> T:
    """Sum in a fixed binary tree: neighbours in order, level by level
    (((0 + 1) + (2 + 3)) + 4 for five items); one item is returned as it is."""
    level = list(items)
    if not level:
        raise ValueError("nothing to add")
    while len(level) > 1:
        level = [
            add(level[i], level[i + 1]) if i + 1 < len(level) else level[i]
            for i in range(0, len(level), 2)
        ]
    return level[0]
