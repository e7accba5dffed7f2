"""Figures' furniture: every legend beside or below the panels (never over a curve or a
point) and inside the drawn figure; every panel's axes labelled. Checked on the shipped
examples' analyses (one with groups and two or more components, one without).

The rule is common practice, no source: a legend over data hides the data it explains,
and a label outside the saved figure is cut off."""

from __future__ import annotations

from typing import Any, cast

import matplotlib.pyplot as plt
import pytest

from tests.conftest import EXAMPLES

pytestmark = pytest.mark.slow


def _legend_problems(name: str, fig: Any) -> tuple[list[str], int]:
    renderer = fig.canvas.get_renderer()
    whole = fig.bbox
    panels = [ax for ax in fig.axes if ax.has_data() and ax.get_label() != "<colorbar>"]
    legends = [ax.get_legend() for ax in fig.axes if ax.get_legend() is not None]
    problems = []
    for legend in legends + list(fig.legends):
        box = legend.get_window_extent(renderer)
        if any(box.overlaps(ax.bbox) for ax in panels):
            problems.append(f"{name}: legend over a panel")
        if not (
            box.x0 >= whole.x0 - 1
            and box.y0 >= whole.y0 - 1
            and box.x1 <= whole.x1 + 1
            and box.y1 <= whole.y1 + 1
        ):
            problems.append(f"{name}: legend cut off by the figure's edge")
    return problems, len(legends) + len(fig.legends)


def _label_problems(name: str, fig: Any) -> list[str]:
    # Every panel says what its x axis is (or shares it with a panel that does); the
    # leftmost panel of each row says what its y axis is (row-mates' titles say the rest).
    problems = []
    panels = [ax for ax in fig.axes if ax.has_data() and ax.get_label() != "<colorbar>"]
    for ax in panels:
        if not any(o.get_xlabel() for o in ax.get_shared_x_axes().get_siblings(ax)):
            problems.append(f"{name}: a panel without an x label")
        at = ax.get_position()
        leftmost = not any(
            o.get_position().x1 <= at.x0 and o.get_position().overlaps(at.translated(-at.x0, 0))
            for o in panels
            if o is not ax
        )
        if leftmost and not any(o.get_ylabel() for o in ax.get_shared_y_axes().get_siblings(ax)):
            problems.append(f"{name}: a row without a y label")
    if name == "sensitivity" and not all(ax.get_xlabel() and ax.get_ylabel() for ax in fig.axes):
        problems.append("sensitivity: every panel needs both axis labels")
    return problems


@pytest.fixture(scope="module")
def checked(analysed: dict[str, tuple[Any, dict[str, Any]]]) -> dict[str, dict[str, Any]]:
    """example -> legend problems, legends counted, label problems; each figure drawn,
    laid out as ``figure_svg`` does before saving, checked and closed."""
    from reportgen.report.figures import FIGURES, PLOT_RC

    out: dict[str, dict[str, Any]] = {}
    for example in EXAMPLES:
        facts: dict[str, Any] = {"legends": [], "count": 0, "labels": []}
        with plt.rc_context(cast(Any, PLOT_RC)):
            for name, draw in FIGURES.items():
                drawn = draw(analysed[example][0])
                if drawn is None:
                    continue
                fig = drawn[0]
                fig.tight_layout()
                fig.canvas.draw()
                problems, count = _legend_problems(name, fig)
                facts["legends"] += problems
                facts["count"] += count
                facts["labels"] += _label_problems(name, fig)
                plt.close(fig)
        out[example] = facts
    return out


@pytest.mark.parametrize("example", EXAMPLES)
def test_legends_lie_outside_every_panel_and_inside_the_figure(
    checked: dict[str, dict[str, Any]], example: str
) -> None:
    assert checked[example]["count"] >= 5, "the examples' figures carry legends to check"
    assert not checked[example]["legends"], checked[example]["legends"]


@pytest.mark.parametrize("example", EXAMPLES)
def test_every_panel_has_axis_labels(checked: dict[str, dict[str, Any]], example: str) -> None:
    assert not checked[example]["labels"], checked[example]["labels"]
