"""The report page: the sections through the spec's template (Jinja2's sandbox, autoescape
on; a template of the user's own in a child process with limits, ``sandbox``)."""

from __future__ import annotations

from dataclasses import asdict
from typing import TYPE_CHECKING, Any

from ..analysis.analyse import AnalysisResult
from ..errors import TemplateError
from .sections import build_sections

if TYPE_CHECKING:
    from .styles import Style


def render_html(
    result: AnalysisResult,
    version: int,
    record_view: dict[str, Any],
    figures: dict[str, tuple[str, str, str]],
    style: Style,
) -> bytes:
    """The report page, in the spec's style (``style.load_style``).

    A shipped style renders in this process; the spec's own template in a sandboxed child
    process with time, memory and output limits (``sandbox``). Raises TemplateError.
    """
    from markupsafe import Markup

    from .sandbox import USER, TemplateFailure, render_here, render_in_child, shipped_sources

    spec = result.spec
    sections = build_sections(result, record_view, figures, style.numbering, style.sections)
    header = " · ".join(x for x in (style.header, f"{spec.report_id} v{version:03d}") if x)
    context = {
        "title": spec.report.title,
        "report_id": spec.report_id,
        "version": version,
        "authors": list(spec.report.authors),
        "description": spec.report.description,
        "sections": [asdict(x) for x in sections],
        "css": Markup(style.css),
        "logo": style.logo,
        "header_text": header,
        "footer_text": style.footer,
        "numbering": style.numbering,
        "started": _record_item(record_view, "run started"),
        "tool": _record_item(record_view, "tool"),
    }
    sources = shipped_sources()
    try:
        if style.user_template is None:
            html = render_here(sources, f"{style.name}/report.html.j2", context)
        else:
            html = render_in_child({**sources, USER: style.user_template}, USER, context)
    except TemplateFailure as e:
        which = (
            f"report.template {spec.report.template!r}"
            if style.user_template is not None
            else f"the {style.name} style"
        )
        raise TemplateError(f"{which}: {e}") from e
    return html.encode("utf-8")


def _record_item(record_view: dict[str, Any], prefix: str) -> str:
    return next((str(v) for k, v in record_view.get("items", []) if k.startswith(prefix)), "")
