"""How many numbers a pass brings back to the caller (for tests of what is gathered)."""

from __future__ import annotations

from typing import Any

import numpy as np


def numbers_in(x: Any) -> int:
    """The numbers in a pass's result: array elements, each other scalar as one, through
    tuples, lists, dicts and dataclasses."""
    if isinstance(x, np.ndarray):
        return int(x.size)
    if isinstance(x, tuple | list):
        return sum(numbers_in(v) for v in x)
    if isinstance(x, dict):
        return sum(numbers_in(v) for v in x.values())
    if hasattr(x, "__dataclass_fields__"):
        return sum(numbers_in(getattr(x, f)) for f in x.__dataclass_fields__)
    return 1
