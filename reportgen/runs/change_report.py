"""The change report (``reportgen compare A B --out DIR``): what changed from one run of a
report to the next, as a self-contained page and a PDF/A in the house style, with its
tables, the findings as JSON and a SHA256SUMS, written whole or not at all.

Same machinery as the appendix: the shipped default template (Jinja2's sandbox,
autoescape), the page checked by ``report.markup`` (nothing outside the page), figures as
inline SVG, the PDF rendered offline. Same inputs, same bytes.
"""

from __future__ import annotations

import json
import os
import shutil
import tempfile
from pathlib import Path
from typing import Any, cast

import numpy as np
import pandas as pd

from ..errors import RecordError
from ..inputs.spec import GatesSection
from .compare import BEYOND, Comparison, Curves, _functions_on
from .integrity import SUMS, checksum_list

SHOWN_IDS = 20  # added or removed subjects listed by id in the page (all in the tables)
CAUTIONS = (
    "A comparison of two runs describes how the study sample and its analysis changed "
    "under the model's assumptions; it is not evidence about any single subject.",
    "Nothing here is for decisions about an individual without review by a qualified "
    "statistician or clinician.",
    "The study protocol and statistical analysis plan take precedence over this comparison.",
)


def _figures(found: Comparison) -> dict[str, tuple[str, str, str]]:
    """name -> (svg, caption, alt): the two means with their bands, and the eigenfunctions
    (the newer run's matched and sign-aligned to the earlier's)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from ..report.figures import PALETTE, PLOT_RC, legend_beside
    from ..report.svg import figure_svg

    ca, cb = found.curves
    time_unit, value_unit = found.units
    time_label = "time" + (f" ({time_unit})" if time_unit else "")
    out = {}
    with plt.rc_context(cast(Any, PLOT_RC)):
        fig, ax = plt.subplots(figsize=(6, 3))
        for c, name, colour in ((ca, "A (earlier)", PALETTE[0]), (cb, "B (newer)", PALETTE[1])):
            if c.mean_band is not None:
                ax.fill_between(c.mean_time, *c.mean_band, color=colour, alpha=0.15, linewidth=0)
            ax.plot(c.mean_time, c.mean, color=colour, label=f"{name} mean")
        ax.set_xlabel(time_label)
        ax.set_ylabel("mean" + (f" ({value_unit})" if value_unit else ""))
        legend_beside(ax)
        out["mean_change"] = (
            figure_svg(fig, "mean_change"),
            "The two runs' mean curves, each with its simultaneous band (shaded), each over "
            "its own time domain.",
            "Two mean curves with shaded bands, one per run.",
        )
        fig, ax = plt.subplots(figsize=(6, 3))
        grid = ca.time
        fb = _functions_on(cb, cb.time)
        matching = {j: k for j, k in _pairs(found)}
        signs = _signs(found)
        for j in range(ca.functions.shape[1]):
            colour = PALETTE[j % len(PALETTE)]
            ax.plot(grid, ca.functions[:, j], color=colour, label=f"A phi_{j + 1}")
            if j in matching:
                k = matching[j]
                ax.plot(
                    cb.time,
                    signs.get(j, 1.0) * fb[:, k],
                    color=colour,
                    linestyle="--",
                    label=f"B phi_{k + 1}",
                )
        ax.axhline(0, color="#888", linewidth=0.8)
        ax.set_xlabel(time_label)
        ax.set_ylabel("eigenfunction")
        legend_beside(ax)
        out["eigenfunction_change"] = (
            figure_svg(fig, "eigenfunction_change"),
            "Eigenfunctions of the earlier run (solid) and their matched counterparts in the "
            "newer run (dashed, signed to agree), each on its own domain and normalised "
            "there; the findings compare them on the common domain, renormalised.",
            "Line plot of each run's eigenfunctions, matched pairs in one colour.",
        )
    return out


def _pairs(found: Comparison) -> list[tuple[int, int]]:
    return [(m[0], m[1]) for m in found.matching.pairs] if found.matching else []


def _signs(found: Comparison) -> dict[int, float]:
    return dict(found.matching.signs) if found.matching else {}


def _cell(x: Any) -> str:
    if isinstance(x, float | np.floating):
        return f"{x:.4g}"
    return str(x)


def _listed(what: str, ids: pd.Index) -> str:
    """``what: id, id, ...`` (the first ``SHOWN_IDS``, and how many in all), or none."""
    shown = ", ".join(ids[:SHOWN_IDS]) or "none"
    more = f" (first {SHOWN_IDS} of {len(ids)})" if len(ids) > SHOWN_IDS else ""
    return f"{what}: {shown}{more}"


def _short(text: str) -> str:
    """A SHA-256 digest cut to 16 digits (a page column cannot hold 64)."""
    if len(text) == 64 and all(c in "0123456789abcdef" for c in text):
        return text[:16]
    return text


def _table(number: int, caption: str, frame: pd.DataFrame) -> dict[str, Any]:
    return {
        "kind": "table",
        "number": number,
        "caption": caption,
        "header": [str(c) for c in frame.columns],
        "rows": [[_cell(x) for x in row] for row in frame.itertuples(index=False)],
    }


def _components(ca: Curves, cb: Curves, found: Comparison) -> pd.DataFrame:
    rows = []
    pairs = dict(_pairs(found))
    for j in range(ca.eigenvalues.size):
        k = pairs.get(j)
        rows.append(
            {
                "component (A)": j + 1,
                "eigenvalue A": ca.eigenvalues[j],
                "FVE A": ca.fve[j],
                "matched in B": "" if k is None else k + 1,
                "eigenvalue B": np.nan if k is None else cb.eigenvalues[k],
                "FVE B": np.nan if k is None else cb.fve[k],
            }
        )
    return pd.DataFrame(rows)


def change_page(found: Comparison, gates: GatesSection) -> tuple[bytes, dict[str, bytes]]:
    """The page and its tables (name -> CSV bytes)."""
    from markupsafe import Markup

    from ..report.sandbox import render_here, shipped_css, shipped_sources

    ids = dict((i, (a, b)) for i, a, b in found.identities)
    report_id = ids["report id"][1]
    findings = pd.DataFrame(
        {
            "item": [f.item for f in found.findings],
            "A": [f.a for f in found.findings],
            "B": [f.b for f in found.findings],
            "gate": ["CROSSED" if f.crossed else "" for f in found.findings],
            "against the runs' uncertainty": [f.noise for f in found.findings],
        }
    )
    added = pd.DataFrame({"subject": found.added})
    removed = pd.DataFrame({"subject": found.removed})
    tables = {
        "tables/findings.csv": findings,
        "tables/subject_moves.csv": found.moves,
        "tables/subjects_added.csv": added,
        "tables/subjects_removed.csv": removed,
    }
    figures = _figures(found)
    crossed = found.crossed
    beyond = [f.item for f in found.findings if f.noise.startswith(BEYOND)]
    verdict = (
        f"{len(crossed)} gate(s) crossed: {', '.join(crossed)}." if crossed else "Every gate holds."
    ) + (
        f" Beyond the runs' uncertainty: {', '.join(beyond)}."
        if beyond
        else " No change that the runs carry an uncertainty for is beyond it."
    )
    gate_words = (
        f"Gates (the newer run's spec): largest mean change at most {gates.max_mean_change:g} "
        f"of the mean's range; eigenvalues and error variance within "
        f"{gates.max_eigenvalue_change:.0%} and {gates.max_error_variance_change:.0%}; "
        f"eigenfunction similarity at least {gates.min_eigenfunction_similarity:g}"
        + ("; the same number of components." if gates.same_components else ".")
    )
    ca, cb = found.curves
    n = 0

    def number() -> int:
        nonlocal n
        n += 1
        return n

    sections = [
        {
            "id": "runs",
            "title": "Runs compared",
            "lead": "Run A is the earlier, run B the newer; B's spec sets the gates.",
            "blocks": [
                _table(
                    number(),
                    "Identities of the two runs (digests: the first 16 hexadecimal digits of "
                    "the SHA-256; change.json has them whole).",
                    pd.DataFrame(
                        [(i, _short(a), _short(b)) for i, a, b in found.identities],
                        columns=["item", "A", "B"],
                    ),
                )
            ],
        },
        {
            "id": "findings",
            "title": "Findings",
            "lead": verdict,
            "blocks": [
                {"kind": "text", "text": gate_words},
                {
                    "kind": "text",
                    "text": "Each change with a known uncertainty is set against the "
                    "uncertainty of the difference between the runs: "
                    f"{found.overlap.words}. The mean's largest standardized change is set "
                    "against its simultaneous multiplier; an eigenvalue's or the error "
                    "variance's against 2 standard deviations of the difference (from the "
                    "corrected band's resamples; a run with a plug-in band has none).",
                },
                _table(
                    number(),
                    "Findings, their gates and their size against the runs' uncertainty.",
                    findings,
                ),
            ],
        },
        {
            "id": "curves",
            "title": "Mean and components",
            "lead": "The curves of both runs; the findings compare them on the common domain.",
            "blocks": [
                {
                    "kind": "figure",
                    "number": number(),
                    "svg": Markup(figures["mean_change"][0]),
                    "caption": figures["mean_change"][1],
                    "alt": figures["mean_change"][2],
                },
                {
                    "kind": "figure",
                    "number": number(),
                    "svg": Markup(figures["eigenfunction_change"][0]),
                    "caption": figures["eigenfunction_change"][1],
                    "alt": figures["eigenfunction_change"][2],
                },
                _table(
                    number(),
                    "Eigenvalues and FVE side by side (components matched).",
                    _components(ca, cb, found),
                ),
            ],
        },
        {
            "id": "subjects",
            "title": "Subjects",
            "lead": f"{found.overlap.common} subjects in both runs, {len(found.added)} added, "
            f"{len(found.removed)} removed. Moved beyond the rule ({found.move_rule}): "
            f"{found.moved_beyond}.",
            "blocks": [
                _table(
                    number(),
                    f"The {len(found.moves)} largest trajectory moves of subjects in both runs "
                    "(largest move over the common domain; score changes of matched "
                    "components, signs aligned). All moves: tables/subject_moves.csv holds "
                    "these; added and removed subjects are in tables/subjects_added.csv and "
                    "tables/subjects_removed.csv.",
                    found.moves,
                ),
                {
                    "kind": "list",
                    "items": [_listed("added", found.added), _listed("removed", found.removed)],
                },
            ],
        },
        {
            "id": "inputs",
            "title": "Inputs that changed",
            "lead": (
                "Input files whose SHA-256 differs between the runs: "
                + ", ".join(found.inputs_changed)
                + "."
            )
            if found.inputs_changed
            else "Every input file has the same SHA-256 in both runs.",
            "blocks": [],
        },
        {
            "id": "cautions",
            "title": "Cautions",
            "lead": "Read this comparison with the appendix of each run.",
            "blocks": [{"kind": "list", "items": list(CAUTIONS)}],
        },
    ]
    context = {
        "title": f"What changed: {report_id}",
        "report_id": report_id,
        "version": ids["version"][1],
        "authors": [],
        "description": f"Run {ids['version'][0]} against run {ids['version'][1]}.",
        "sections": sections,
        "css": Markup(shipped_css("default")),
        "logo": "",
        "header_text": f"{report_id}: change report",
        "footer_text": "",
        "numbering": "",
        "started": ids["started (UTC)"][1],
        "tool": f"reportgen {ids['tool'][1]}",
    }
    html = render_here(shipped_sources(), "default/report.html.j2", context)
    return html.encode("utf-8"), {
        name: frame.to_csv(index=False, lineterminator="\n").encode("utf-8")
        for name, frame in tables.items()
    }


def write_change_report(found: Comparison, gates: GatesSection, out: Path) -> Path:
    """Write the change report to the new folder ``out`` (built beside it and renamed:
    nothing half-written under its name). Raises RecordError if ``out`` exists."""
    from ..report.pdf import render_pdf_with

    if out.exists():
        raise RecordError(f"{str(out)!r} exists already; give a new folder for the change report")
    html, tables = change_page(found, gates)
    findings_json = (
        json.dumps(found.as_dict(), indent=2, ensure_ascii=False, default=str) + "\n"
    ).encode("utf-8")
    stamp = dict((i, b) for i, _, b in found.identities)["finished (UTC)"]
    pdf = render_pdf_with(
        html, [("change.json", findings_json, "The findings of this comparison")], stamp
    )
    files = {"change.html": html, "change.pdf": pdf, "change.json": findings_json, **tables}
    out.parent.mkdir(parents=True, exist_ok=True)
    building = Path(tempfile.mkdtemp(prefix=f".{out.name}.building-", dir=out.parent))
    try:
        for name, data in files.items():
            path = building / name
            path.parent.mkdir(parents=True, exist_ok=True)
            path.write_bytes(data)
        from ..inputs.files import sha256_bytes

        (building / SUMS).write_bytes(
            checksum_list({name: sha256_bytes(data) for name, data in sorted(files.items())})
        )
        os.rename(building, out)
    except BaseException:
        shutil.rmtree(building, ignore_errors=True)
        raise
    return out
