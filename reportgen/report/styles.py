"""The report's look, from the spec's ``report`` section: template, extra style sheet, logo,
running header and footer, numbering prefix, and the sections and their order.

Files named by the spec (a template of the user's own, a style sheet, a logo) are inputs:
read once here, size-limited and checked, and hashed into record.json beside the data, so
that ``verify`` notices any change to them. Nothing else is read.
"""

from __future__ import annotations

import base64
import hashlib
from dataclasses import dataclass

from ..errors import SpecError
from ..inputs.spec import Spec
from .sandbox import STYLES, shipped_css

MAX_TEMPLATE_BYTES = 256 * 1024
MAX_STYLESHEET_BYTES = 256 * 1024
MAX_LOGO_BYTES = 512 * 1024


@dataclass(frozen=True)
class InputFile:
    """A file the spec names besides the data: ``path`` as the spec writes it."""

    role: str  # template | stylesheet | logo
    path: str
    data: bytes

    @property
    def sha256(self) -> str:
        return hashlib.sha256(self.data).hexdigest()


@dataclass(frozen=True)
class Style:
    name: str  # a shipped style, or "user" for the spec's own template
    user_template: str | None
    css: str
    logo: str  # a data: URI, or ""
    header: str
    footer: str
    numbering: str
    sections: tuple[str, ...] | None
    inputs: tuple[InputFile, ...]


def _read(spec: Spec, field: str, limit: int) -> InputFile:
    relpath = str(getattr(spec.report, field))
    path = spec.locate(relpath)
    try:
        size = path.stat().st_size
        if not path.is_file():
            raise SpecError(f"report.{field} {relpath!r} is not a regular file")
        if size > limit:
            raise SpecError(
                f"report.{field} {relpath!r} is {size} bytes; at most {limit} are allowed"
            )
        data = path.read_bytes()
    except FileNotFoundError:
        raise SpecError(
            f"report.{field} {relpath!r} does not exist (looked for {str(path)!r})"
        ) from None
    except OSError as e:
        raise SpecError(f"report.{field} {relpath!r} cannot be read: {e.strerror}") from e
    return InputFile(field, relpath, data)


def _text(file: InputFile) -> str:
    try:
        return file.data.decode("utf-8")
    except UnicodeDecodeError as e:
        raise SpecError(
            f"report.{file.role} {file.path!r} is not UTF-8 text (byte {e.start})"
        ) from e


def _stylesheet(file: InputFile) -> str:
    text = _text(file)
    if "<" in text:
        raise SpecError(
            f"report.stylesheet {file.path!r} contains '<': a style sheet holds CSS only"
        )
    from .markup import UnsafeMarkup, check_css

    try:
        check_css(text, f"report.stylesheet {file.path!r}")
    except UnsafeMarkup as e:
        raise SpecError(
            f"{e}. It refers to other files or URLs (@import or url()); only "
            "data: URIs are allowed, nothing is fetched"
        ) from None
    return text


def _logo(file: InputFile) -> str:
    data = file.data
    if file.path.lower().endswith(".png") and data.startswith(b"\x89PNG\r\n\x1a\n"):
        mime = "image/png"
    elif file.path.lower().endswith(".svg") and b"<svg" in data[:4096]:
        mime = "image/svg+xml"
    else:
        raise SpecError(
            f"report.logo {file.path!r} must be a PNG or SVG file (by its name and its content)"
        )
    return f"data:{mime};base64,{base64.b64encode(data).decode('ascii')}"


def load_style(spec: Spec) -> Style:
    """Read and check everything the spec's report section names. Raises SpecError."""
    r = spec.report
    inputs: list[InputFile] = []
    template = r.template
    user = None
    if template in STYLES:
        name = template
    elif template.lower().endswith((".j2", ".html", ".jinja")):
        file = _read(spec, "template", MAX_TEMPLATE_BYTES)
        inputs.append(file)
        user, name = _text(file), "user"
    else:
        raise SpecError(
            f"report.template must be a shipped style ({', '.join(STYLES)}) or a "
            f".j2 or .html file relative to the spec; got {template!r}."
        )
    base = "default" if name == "user" else name
    css = shipped_css("default") + ("" if base == "default" else "\n" + shipped_css(base))
    if r.stylesheet:
        file = _read(spec, "stylesheet", MAX_STYLESHEET_BYTES)
        inputs.append(file)
        css += "\n" + _stylesheet(file)
    logo = ""
    if r.logo:
        file = _read(spec, "logo", MAX_LOGO_BYTES)
        inputs.append(file)
        logo = _logo(file)
    return Style(
        name, user, css, logo, r.header, r.footer, r.numbering, r.sections or None, tuple(inputs)
    )
