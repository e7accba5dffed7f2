"""What a report page may hold, checked by parsing (never by a regular expression): an
allow-list of elements, no event handlers, no reference outside the page, and style sheets
whose escapes are resolved before they are judged.

The page is read by the standard library's HTML parser (which resolves character references
in attribute values, so ``&#106;avascript:`` is seen as ``javascript:``) and every style sheet
and ``style`` attribute by tinycss2 (which resolves CSS escapes, so ``\\75 rl(`` is ``url(``
and ``@\\69mport`` is ``@import``). A page must also carry the Content-Security-Policy of
:data:`CSP`, so that a browser refuses whatever a checker might miss.
"""

from __future__ import annotations

from html.parser import HTMLParser

import tinycss2

CSP = "default-src 'none'; img-src data:; style-src 'unsafe-inline'"

# Elements a report may hold: text, tables, figures and static SVG drawings.
ALLOWED = frozenset(
    {
        "html",
        "head",
        "meta",
        "title",
        "style",
        "body",
        "header",
        "footer",
        "main",
        "section",
        "nav",
        "article",
        "aside",
        "h1",
        "h2",
        "h3",
        "h4",
        "h5",
        "h6",
        "p",
        "div",
        "span",
        "a",
        "ul",
        "ol",
        "li",
        "dl",
        "dt",
        "dd",
        "table",
        "thead",
        "tbody",
        "tfoot",
        "tr",
        "th",
        "td",
        "caption",
        "colgroup",
        "col",
        "figure",
        "figcaption",
        "img",
        "pre",
        "code",
        "strong",
        "em",
        "b",
        "i",
        "u",
        "small",
        "sub",
        "sup",
        "br",
        "hr",
        "blockquote",
        "abbr",
        "time",
        "mark",
        "svg",
        "g",
        "path",
        "rect",
        "circle",
        "ellipse",
        "line",
        "polyline",
        "polygon",
        "text",
        "tspan",
        "textpath",
        "defs",
        "clippath",
        "use",
        "image",
        "desc",
        "lineargradient",
        "radialgradient",
        "stop",
        "pattern",
        "mask",
        "symbol",
        "marker",
    }
)
# Attributes that name something to load or to go to.
URL_ATTRIBUTES = frozenset(
    {
        "href",
        "xlink:href",
        "src",
        "srcset",
        "action",
        "formaction",
        "poster",
        "data",
        "background",
        "ping",
        "codebase",
        "cite",
        "longdesc",
        "usemap",
        "manifest",
        "lowsrc",
        "dynsrc",
    }
)
# CSS functions that load something: their arguments must be data: URIs.
LOADING_FUNCTIONS = frozenset(
    {"url", "src", "image-set", "-webkit-image-set", "image", "cross-fade", "element"}
)


class UnsafeMarkup(ValueError):
    """What the page holds that a report may not (the message quotes it)."""


def _inside(value: str) -> bool:
    """A reference that stays inside the page: a fragment, or an image as a data: URI."""
    text = "".join(value.split()).lower()
    return text.startswith("#") or text.startswith("data:image/")


def check_css(text: str, where: str, inline: bool = False) -> None:
    """Refuse a style sheet (or, ``inline``, a style attribute's declarations) that loads
    anything but data: images. What cannot be parsed is dropped by a browser, and so not
    judged; what loads is refused wherever it stands."""
    if inline:
        nodes = tinycss2.parse_blocks_contents(text, skip_comments=True, skip_whitespace=True)
    else:
        nodes = tinycss2.parse_stylesheet(text, skip_comments=True, skip_whitespace=True)
    _check_tokens(nodes, where)


def _check_tokens(nodes: list[object], where: str) -> None:
    """Every component value, at any depth: at-rules and at-keywords that load (``@import``),
    ``url(...)`` and the functions that load, whose arguments must stay inside the page."""
    for node in nodes:
        kind = getattr(node, "type", "")
        if kind == "error":
            raise UnsafeMarkup(
                f"{where} holds CSS that cannot be parsed ({getattr(node, 'message', '')})"
            )
        keyword = str(
            getattr(node, "lower_at_keyword", "")
            or (getattr(node, "lower_value", "") if kind == "at-keyword" else "")
        )
        if kind in ("at-rule", "at-keyword") and keyword in ("import", "namespace"):
            raise UnsafeMarkup(
                f"{where} refers to other files (@{keyword}); a report loads nothing"
            )
        if kind == "url" and not _inside(str(getattr(node, "value", ""))):
            raise UnsafeMarkup(
                f"{where} refers outside the page: url({getattr(node, 'value', '')})"
            )
        if kind == "function" and str(getattr(node, "lower_name", "")) in LOADING_FUNCTIONS:
            name = getattr(node, "lower_name", "")
            for arg in getattr(node, "arguments", []):
                value = str(getattr(arg, "value", ""))
                if getattr(arg, "type", "") in ("string", "url") and not _inside(value):
                    raise UnsafeMarkup(f"{where} refers outside the page: {name}({value})")
        for child in ("prelude", "content", "arguments", "value"):  # a declaration's value
            inner = getattr(node, child, None)
            if isinstance(inner, list):
                _check_tokens(inner, where)


class _Checker(HTMLParser):
    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.csp = 0
        self.in_style = False
        self.style: list[str] = []

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        shown = self.get_starttag_text() or tag
        if tag not in ALLOWED:
            raise UnsafeMarkup(
                f"the rendered report contains active content or an element a "
                f"report may not hold: <{tag}> ({shown[:80]!r})"
            )
        names = {name.lower(): value or "" for name, value in attrs}
        for name, value in names.items():
            if name.startswith("on"):
                raise UnsafeMarkup(
                    f"the rendered report contains active content (an event "
                    f"handler, {name}) in {shown[:80]!r}"
                )
            if name in URL_ATTRIBUTES and not _inside(value):
                raise UnsafeMarkup(
                    f"the report refers to something outside itself "
                    f"({shown[:80]!r}); a report may use only data: images and "
                    "in-page links"
                )
            if name == "style":
                check_css(value, f"a style attribute ({shown[:60]!r})", inline=True)
        if tag == "a" and "href" in names and not names["href"].strip().startswith("#"):
            raise UnsafeMarkup(
                f"the report refers to something outside itself ({shown[:80]!r}); "
                "a link may only point inside the page"
            )
        if tag == "meta":
            self._meta(names, shown)
        if tag == "style":
            self.in_style, self.style = True, []

    def handle_startendtag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.handle_starttag(tag, attrs)
        if tag == "style":
            self.handle_endtag(tag)

    def handle_endtag(self, tag: str) -> None:
        if tag == "style" and self.in_style:
            self.in_style = False
            check_css("".join(self.style), "the report's style sheet")

    def handle_data(self, data: str) -> None:
        if self.in_style:
            self.style.append(data)

    def _meta(self, names: dict[str, str], shown: str) -> None:
        equiv = names.get("http-equiv", "").strip().lower()
        if not equiv:
            if set(names) - {"charset", "name", "content"}:
                raise UnsafeMarkup(f"this <meta> is not allowed in a report ({shown[:80]!r})")
            return
        if equiv == "content-security-policy" and names.get("content") == CSP:
            self.csp += 1
            return
        raise UnsafeMarkup(f"<meta http-equiv> is not allowed in a report ({shown[:80]!r})")


def check_page(html: str) -> None:
    """Raise UnsafeMarkup for anything a report page may not hold, or when the page does not
    carry the Content-Security-Policy."""
    checker = _Checker()
    checker.feed(html)
    checker.close()
    if checker.csp != 1:
        raise UnsafeMarkup(
            "the page must carry the report's Content-Security-Policy once "
            f'(<meta http-equiv="Content-Security-Policy" content="{CSP}">); '
            "a template of your own extends the default one, which has it"
        )
