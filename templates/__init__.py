"""The report templates and house styles, installed as the package ``reportgen.styles``.

One folder per style: ``report.html.j2`` (a Jinja2 template) and ``style.css``. The
``default`` style is the base that the others extend by named blocks (see the README).
"""
