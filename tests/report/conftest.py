from __future__ import annotations

import shutil
from pathlib import Path

import pytest

from reportgen.runs.writer import run_spec

ROOT = Path(__file__).resolve().parents[2]
EXAMPLES = ("clinic_visits", "pump_service")
SAMPLE_EPOCH = "1764547200"  # the fixed timestamp the committed sample runs were made with


@pytest.fixture(scope="session")
def regenerated(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    """Both example specs run afresh (copied with their data) with the sample timestamp."""
    mp = pytest.MonkeyPatch()
    mp.setenv("SOURCE_DATE_EPOCH", SAMPLE_EPOCH)
    base = tmp_path_factory.mktemp("examples")
    runs = {}
    try:
        for name in EXAMPLES:
            for suffix in (".yaml", ".csv"):
                shutil.copy(ROOT / "specs" / f"{name}{suffix}", base / f"{name}{suffix}")
            shutil.copy(ROOT / "specs" / "fleet_logo.svg", base / "fleet_logo.svg")
            runs[name] = run_spec(base / f"{name}.yaml", base / "runs")
    finally:
        mp.undo()
    return runs


STYLES = ("default", "journal", "submission")
STYLE_FIELDS = {"header": "Study XY-123 (fictional)", "footer": "Confidential: test only",
                "numbering": "14.2"}


@pytest.fixture(scope="session")
def styled(regenerated: dict[str, Path]) -> dict[tuple[str, str], tuple[bytes, bytes]]:
    """(example, style) -> (HTML, PDF) of both examples in every shipped style, with a
    running header, a footer and a numbering prefix; analysed and drawn once per example."""
    from dataclasses import replace

    from reportgen.analysis.analyse import analyse
    from reportgen.inputs.loader import load_dataset
    from reportgen.inputs.spec import load_spec
    from reportgen.report.figures import make_figures
    from reportgen.report.html import render_html
    from reportgen.report.pdf import render_pdf
    from reportgen.report.styles import load_style

    out = {}
    for name in EXAMPLES:
        spec = load_spec(regenerated[name].parents[2] / f"{name}.yaml")
        result = analyse(spec, load_dataset(spec, for_fit=True))
        figures = make_figures(result)
        record_view = {"items": [("tool", "reportgen test"), ("run started (UTC)",
                                                               "2025-12-01T00:00:00Z")],
                       "commands": "reportgen run SPEC"}
        for style in STYLES:
            report = replace(spec.report, **STYLE_FIELDS, template=style)
            styled_spec = replace(spec, report=report)
            html = render_html(replace(result, spec=styled_spec), 1, record_view, figures,
                               load_style(styled_spec))
            pdf = render_pdf(html, spec.raw, b"{}", "2025-12-01T00:00:00Z")
            out[(name, style)] = (html, pdf)
    return out
