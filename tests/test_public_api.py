"""The public surface is exactly what __all__ lists (common practice, no source)."""

from __future__ import annotations

import reportgen


def test_all_is_sorted_and_complete() -> None:
    public = {n for n in dir(reportgen) if not n.startswith("_")} - {
        "api",
        "errors",
        "fpca",
        "cli",
        "inputs",
        "analysis",
        "report",
        "runs",
        "syscheck",
        "styles",
    }
    assert sorted(reportgen.__all__) == reportgen.__all__
    assert set(reportgen.__all__) - {"__version__"} == public
