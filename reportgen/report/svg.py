"""Figures as SVG text fit for inlining in one HTML page: deterministic (fixed metadata and
hash salt, set in ``figures.PLOT_RC``), no prolog, comments or metadata, ids prefixed per
figure, and the empty groups matplotlib wraps every artist in spliced out."""

from __future__ import annotations

import io
import re
from xml.etree import ElementTree

import matplotlib.pyplot as plt
from matplotlib.figure import Figure


def inline_svg(text: str, prefix: str) -> str:
    """Make matplotlib's SVG fit for inlining in HTML: no prolog, comments, RDF metadata or
    namespace URIs (inline SVG needs none), plain ``href``, and ids prefixed so that several
    figures in one page never share an id."""
    text = text[text.index("<svg") :]
    text = re.sub(r"<!--.*?-->", "", text, flags=re.S)
    text = re.sub(r"\s*<metadata>.*?</metadata>", "", text, flags=re.S)
    text = re.sub(r'\s+xmlns(:\w+)?="[^"]*"', "", text)
    text = text.replace("xlink:href=", "href=")
    text = re.sub(r'\bid="', f'id="{prefix}-', text)
    text = text.replace("url(#", f"url(#{prefix}-").replace('href="#', f'href="#{prefix}-')
    return _flatten(text)


_KEEPS_TEXT = {"text", "tspan", "style", "title"}


def _flatten(text: str) -> str:
    """Splice out the groups that carry nothing but an unreferenced id (matplotlib wraps
    every artist in one), and drop whitespace between elements. The drawing is unchanged;
    the HTML and PDF renderers have far fewer elements to style."""
    referenced = set(re.findall(r'(?:url\(#|href="#)([^)"]+)', text))
    root = ElementTree.fromstring(text)

    def walk(node: ElementTree.Element) -> None:
        kept: list[ElementTree.Element] = []
        for child in node:
            walk(child)
            if (
                child.tag == "g"
                and set(child.attrib) <= {"id"}
                and child.get("id") not in referenced
            ):
                kept.extend(child)
            else:
                kept.append(child)
        node[:] = kept
        if node.tag not in _KEEPS_TEXT and node.text is not None and not node.text.strip():
            node.text = None
        for child in node:
            if child.tail is not None and not child.tail.strip():
                child.tail = None

    walk(root)
    return ElementTree.tostring(root, encoding="unicode")


def figure_svg(fig: Figure, name: str) -> str:
    """A drawn figure as inline SVG (closed after), its ids prefixed with ``name``."""
    buf = io.StringIO()
    fig.tight_layout()
    fig.savefig(buf, format="svg", metadata={"Date": None, "Creator": None}, dpi=150)
    plt.close(fig)
    return inline_svg(buf.getvalue(), name)
