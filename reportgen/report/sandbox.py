"""Rendering report templates safely: Jinja2's sandbox, a closed set of templates, bounded
time, memory and output, and no reference to anything outside the page.

The shipped styles (``templates/`` at the top of the repository, installed as
``reportgen.styles``) are rendered in this process. A template from the user's own file is
rendered in a child process (``python -c``) with a wall-clock limit, an address-space limit
and an output limit, so that a loop that does not end or a template that writes gigabytes
stops with a clear message instead of hanging or exhausting the machine.

Either way the template runs in :class:`jinja2.sandbox.ImmutableSandboxedEnvironment`
(no access to attributes that start with an underscore, to Python internals, or to methods
that change values) with autoescaping, and its loader knows only the shipped templates
and the user's file: ``{% include "/etc/passwd" %}`` finds nothing. The rendered page is
then parsed (``markup``): it may hold only an allow-list of elements, no event handler, no
reference outside itself (links only to ``#``, images only as ``data:``; style sheets
parsed with their escapes resolved), and must carry the report's Content-Security-Policy.

This module imports only jinja2, markupsafe and (for the check) tinycss2: the child starts
in a fraction of a second.
"""

from __future__ import annotations

import operator
import pickle
import subprocess
import sys
from importlib import resources
from typing import Any

import jinja2
from jinja2.exceptions import SecurityError
from jinja2.sandbox import ImmutableSandboxedEnvironment
from markupsafe import Markup

STYLES = ("default", "journal", "submission")
TEMPLATE_SECONDS = 30.0
MAX_OUTPUT_BYTES = 64 * 2**20
MAX_MEMORY_BYTES = 2 * 2**30
MAX_REPEAT = 2 * 2**20  # the longest string or list that "*" may build in a template
USER = "user/report.html.j2"


class TemplateFailure(Exception):
    """The template could not be rendered; the message says why (for TemplateError)."""


def shipped_sources() -> dict[str, str]:
    """Every shipped template by name (``default/report.html.j2``), plus the short names
    ``default``, ``journal`` and ``submission`` for use in ``{% extends %}``."""
    root = resources.files("reportgen.styles")
    out: dict[str, str] = {}
    for name in STYLES:
        text = root.joinpath(name, "report.html.j2").read_text("utf-8")
        out[f"{name}/report.html.j2"] = text
        out[name] = text
    return out


def shipped_css(name: str) -> str:
    return resources.files("reportgen.styles").joinpath(name, "style.css").read_text("utf-8")


def css_string(value: Any) -> Markup:
    """A value as a quoted CSS string (for ``content:`` in page rules), safe in <style>."""
    text = str(value)
    escaped = "".join(
        ch if ch.isalnum() or ch in " .,:;-_/()[]+=" else f"\\{ord(ch):x} " for ch in text
    )
    return Markup(f'"{escaped}"')


class _Environment(ImmutableSandboxedEnvironment):
    """The sandbox, with ``*`` and ``**`` bounded (``"x" * 10**10`` would exhaust memory)."""

    intercepted_binops = frozenset({"*", "**"})

    def call_binop(self, context: Any, op: str, left: Any, right: Any) -> Any:
        if op == "**":
            if isinstance(right, int | float) and abs(right) > 1000:
                raise SecurityError("exponents above 1000 are not allowed in a template")
            return operator.pow(left, right)
        sized = [x for x in (left, right) if isinstance(x, str | list | tuple)]
        count = [x for x in (left, right) if isinstance(x, int)]
        if sized and count and len(sized[0]) * max(count[0], 0) > MAX_REPEAT:
            raise SecurityError(f"a template may not build values longer than {MAX_REPEAT}")
        return operator.mul(left, right)


def environment(sources: dict[str, str]) -> jinja2.Environment:
    env = _Environment(
        loader=jinja2.DictLoader(sources),
        autoescape=True,
        undefined=jinja2.StrictUndefined,
        keep_trailing_newline=True,
    )
    env.filters["css_string"] = css_string
    return env


def refuse_unsafe_markup(html: str) -> None:
    """Refuse a page that refers outside itself, carries active content, or lacks the
    report's Content-Security-Policy (``markup.check_page``: parsed, not matched)."""
    from .markup import UnsafeMarkup, check_page

    try:
        check_page(html)
    except UnsafeMarkup as e:
        raise TemplateFailure(str(e)) from None


def render_here(
    sources: dict[str, str], entry: str, context: dict[str, Any], max_bytes: int | None = None
) -> str:
    """Render ``entry`` in this process (the shipped styles)."""
    max_bytes = MAX_OUTPUT_BYTES if max_bytes is None else max_bytes
    try:
        template = environment(sources).get_template(entry)
        parts: list[str] = []
        size = 0
        for chunk in template.generate(**context):
            size += len(chunk)
            if size > max_bytes:
                raise TemplateFailure(f"the template's output passed {max_bytes} characters")
            parts.append(chunk)
    except TemplateFailure:
        raise
    except SecurityError as e:
        raise TemplateFailure(
            f"the template did something a sandboxed template may not: {e}"
        ) from e
    except jinja2.TemplateNotFound as e:
        raise TemplateFailure(
            f"the template refers to {e.name!r}, which is neither a shipped "
            f"style ({', '.join(STYLES)}) nor the spec's template"
        ) from e
    except jinja2.TemplateSyntaxError as e:
        raise TemplateFailure(
            f"the template has a syntax error at line {e.lineno}: {e.message}"
        ) from e
    except jinja2.UndefinedError as e:
        raise TemplateFailure(
            f"the template uses a name the report does not provide: {e.message}"
        ) from e
    except MemoryError as e:
        raise TemplateFailure("the template needed more memory than a report may use") from e
    except RecursionError as e:
        raise TemplateFailure("the template recurses without end") from e
    except Exception as e:  # a template can raise anything (a filter on a wrong type, ...)
        raise TemplateFailure(f"the template failed: {type(e).__name__}: {e}") from e
    html = "".join(parts)
    refuse_unsafe_markup(html)
    return html


def render_in_child(
    sources: dict[str, str],
    entry: str,
    context: dict[str, Any],
    seconds: float | None = None,
    max_bytes: int | None = None,
) -> str:
    """Render ``entry`` in a child process with time, memory and output limits."""
    limit = TEMPLATE_SECONDS if seconds is None else seconds
    max_bytes = MAX_OUTPUT_BYTES if max_bytes is None else max_bytes
    payload = pickle.dumps((sources, entry, context, max_bytes), protocol=pickle.HIGHEST_PROTOCOL)
    code = "from reportgen.report.sandbox import _child; _child()"
    try:
        done = subprocess.run(
            [sys.executable, "-c", code],
            input=payload,
            capture_output=True,
            timeout=limit,
            check=False,
        )
    except subprocess.TimeoutExpired:
        raise TemplateFailure(
            f"the template did not finish within {limit:g} s (a loop that "
            "does not end, or far too much work for a report)"
        ) from None
    try:
        status, value = pickle.loads(done.stdout)
    except Exception:
        raise TemplateFailure(
            "the template's renderer stopped without a result (it may have "
            f"run out of its {MAX_MEMORY_BYTES // 2**30} GiB of memory)"
        ) from None
    if status != "ok":
        raise TemplateFailure(str(value))
    return str(value)


def _child() -> None:
    """The child's side of :func:`render_in_child`: limits, render, one pickled answer."""
    try:
        import resource

        resource.setrlimit(resource.RLIMIT_AS, (MAX_MEMORY_BYTES, MAX_MEMORY_BYTES))
    except (ImportError, ValueError, OSError):  # not on every platform; the timeout stays
        pass
    sources, entry, context, max_bytes = pickle.load(sys.stdin.buffer)
    try:
        answer: tuple[str, str] = ("ok", render_here(sources, entry, context, max_bytes))
    except TemplateFailure as e:
        answer = ("error", str(e))
    except MemoryError:
        answer = ("error", "the template needed more memory than a report may use")
    sys.stdout.buffer.write(pickle.dumps(answer))
    sys.stdout.flush()
