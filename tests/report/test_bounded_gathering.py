"""What the report's passes bring back to the ``reportgen`` process does not grow with the
subjects: besides the summary pass (subject codes and reading counts) and the Parquet bytes
of the tables of subjects (which this process writes), no pass over the parts or over the
results kept with them returns more when the subjects double, once the report's samples
are capped. The scores, their covariances and the residual sums stay with the parts.
(The contract is the project's own; the counting is plain arithmetic.)
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest

from reportgen.analysis import views as analysis
from reportgen.analysis.analyse import analyse
from reportgen.fpca import fit as fit_module
from reportgen.fpca.plan import InProcess
from reportgen.inputs.loader import load_dataset
from reportgen.inputs.spec import load_spec
from reportgen.report.subject_parts import subject_parts
from tests.counting import numbers_in
from tests.designs import yao_design

ROOT = Path(__file__).resolve().parents[2]
N_SUBJECTS = 4000
CAP = 40


class _Counting(InProcess):
    """Runs the passes here and records, per pass, the most numbers one call brought back
    (``keep`` leaves its results where they were made: not counted)."""

    def __init__(self) -> None:
        self.largest: dict[str, int] = {}

    def map(self, fn, parts, per_part=None, shared=()):  # type: ignore[no-untyped-def]
        out = super().map(fn, parts, per_part, shared)
        size = sum(numbers_in(x) for x in out)
        self.largest[fn.__name__] = max(self.largest.get(fn.__name__, 0), size)
        return out


def _run(tmp_path: Path, n: int) -> tuple[_Counting, Any]:
    data = yao_design(n, seed=5)
    data = data.assign(
        patient=[f"S{i:05d}" for i in data.id],
        week=data.t * 10.0,
        marker=100.0 + 10.0 * data.y,
        arm=np.where(data.id % 3 == 0, "a", "b"),
    )
    folder = tmp_path / str(n)
    folder.mkdir()
    data[["patient", "week", "marker", "arm"]].to_csv(folder / "clinic_visits.csv", index=False)
    text = (ROOT / "specs" / "clinic_visits.yaml").read_text()
    text = text.replace("  value: marker\n", "  value: marker\n  group: arm\n")
    text = text.replace("subjects:\n  count: 6\n", "subjects:\n  count: 6\n  tables: parquet\n")
    (folder / "s.yaml").write_text(text)
    spec = load_spec(folder / "s.yaml")
    counting = _Counting()
    result = analyse(spec, load_dataset(spec, counting, for_fit=True))
    written = [entry for name, entry, _ in subject_parts(result, counting) if name == "scores"]
    assert result.fit.n_subjects == n and result.groups is not None
    assert sum(e.rows for e in written) == n
    assert result.subjects_view.sampled.size == CAP
    return counting, result


@pytest.fixture
def capped(monkeypatch: pytest.MonkeyPatch) -> None:
    """The report's samples (scores, residual readings, likelihood) capped at CAP subjects."""
    for module, name in (
        (analysis, "SUBJECT_SAMPLE_MAX"),
        (analysis, "DIAGNOSTIC_MAX_SUBJECTS"),
        (fit_module, "REFINE_MAX_SUBJECTS"),
    ):
        monkeypatch.setattr(module, name, CAP)


def test_the_report_gathers_nothing_per_subject(tmp_path: Path, capped: None) -> None:
    small, _ = _run(tmp_path, N_SUBJECTS)
    large, result = _run(tmp_path, 2 * N_SUBJECTS)
    passes = set(large.largest) - {"part_summary", "made_part"}
    assert {
        "part_farthest",
        "part_largest_rms",
        "part_group_sums",
        "checked_found",
        "take_rows",
    } <= passes
    # a per-subject return would grow by N_SUBJECTS numbers or more; the sampled subjects'
    # readings vary a little with their reading counts
    for name in sorted(passes):
        assert large.largest[name] - small.largest[name] < N_SUBJECTS / 4, name
    # the count can fail: gathering every subject's scores is seen
    assert result.fit.score_values.shape == (2 * N_SUBJECTS, result.fit.n_components)
    assert large.largest["as_they_are"] >= 2 * N_SUBJECTS


def test_the_report_says_where_it_uses_the_sample(tmp_path: Path, capped: None) -> None:
    # Above SUBJECT_SAMPLE_MAX the residual quantiles, the group test and the score figures
    # come from the sample, and each says so; the count of flagged subjects is of all.
    from dataclasses import asdict

    from reportgen.report.figures import make_figures
    from reportgen.report.sections import build_sections

    _, result = _run(tmp_path, N_SUBJECTS)
    words = f"a seeded sample of {CAP} of the {N_SUBJECTS:,} subjects"
    figures = make_figures(result, ["scores", "group_scores"])
    for name in ("scores", "group_scores"):
        assert words in figures[name][1], name
    empty = {name: ("<svg></svg>", "c", "a") for name in ("residuals", "group_means")}
    text = "".join(
        str(asdict(s))
        for s in build_sections(
            result, {}, {**figures, **empty}, order=["residuals", "groups", "scores"]
        )
    )
    assert (
        f"90th percentile {pd.Series(result.subjects_view.rms).quantile(0.9):.3g} "
        f"(over {words})" in text
    )
    assert f"group labels over {words} (seed" in text
    assert f"{result.subjects_view.n_flagged} subject(s) flagged" in text
