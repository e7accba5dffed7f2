from __future__ import annotations

from pathlib import Path
from typing import Any

import pytest

from tests.conftest import EXAMPLES
from tests.helpers import ROOT  # noqa: F401

STYLES = ("default", "journal", "submission")
STYLE_FIELDS = {
    "header": "Study XY-123 (fictional)",
    "footer": "Confidential: test only",
    "numbering": "14.2",
}


RECORD_VIEW = {
    "items": [("tool", "reportgen test"), ("run started (UTC)", "2025-12-01T00:00:00Z")],
    "commands": "reportgen run SPEC",
}


@pytest.fixture(scope="session")
def analysed(regenerated: dict[str, Path]) -> dict[str, tuple[Any, dict[str, Any]]]:
    """example -> (analysis, figures), each analysed and drawn once for the session."""
    from reportgen.analysis.analyse import analyse
    from reportgen.inputs.loader import load_dataset
    from reportgen.inputs.spec import load_spec
    from reportgen.report.figures import make_figures

    out = {}
    for name in EXAMPLES:
        spec = load_spec(regenerated[name].parents[2] / f"{name}.yaml")
        result = analyse(spec, load_dataset(spec, for_fit=True))
        out[name] = (result, make_figures(result))
    return out


@pytest.fixture(scope="session")
def styled(
    analysed: dict[str, tuple[Any, dict[str, Any]]],
) -> dict[tuple[str, str], tuple[bytes, bytes]]:
    """(example, style) -> (HTML, PDF) of both examples in every shipped style, with a
    running header, a footer and a numbering prefix."""
    from dataclasses import replace

    from reportgen.report.html import render_html
    from reportgen.report.pdf import render_pdf
    from reportgen.report.styles import load_style

    out = {}
    for name in EXAMPLES:
        result, figures = analysed[name]
        spec = result.spec
        for style in STYLES:
            report = replace(spec.report, **STYLE_FIELDS, template=style)
            styled_spec = replace(spec, report=report)
            html = render_html(
                replace(result, spec=styled_spec), 1, RECORD_VIEW, figures, load_style(styled_spec)
            )
            pdf = render_pdf(html, spec.raw, b"{}", "2025-12-01T00:00:00Z")
            out[(name, style)] = (html, pdf)
    return out
