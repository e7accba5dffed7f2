"""Values as a reader would write them in a message (a leaf: every module may import it)."""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd


def plain(value: Any) -> str:
    """A value as a reader would write it: 0 and 'ALB', not np.float64(0.0) or a repr."""
    if value is None or (isinstance(value, float) and np.isnan(value)):
        return "(empty)"
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float):
        return f"{value:g}"
    if isinstance(value, pd.Timestamp):
        return value.isoformat()
    text = str(value)
    return f"'{text}'" if isinstance(value, str) else text
