"""The rendering worker changes how fast a run is, never what it writes."""

from __future__ import annotations

from pathlib import Path

import pandas as pd
import pytest

import reportgen.report.render_process
import reportgen.runs.writer
from reportgen.report.render_process import RenderProcess
from reportgen.report.tables import canonical_bytes
from reportgen.runs.writer import run_spec

pytestmark = pytest.mark.render


def _files(run: Path) -> dict[str, bytes]:
    return {str(p.relative_to(run)): p.read_bytes() for p in sorted(run.rglob("*")) if p.is_file()}


def test_worker_alone_and_dead_worker_write_the_same_bytes(
    study: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # the example's per-subject tables count as large: the worker writes them
    monkeypatch.setattr(reportgen.report.render_process, "LARGE_TABLE_ROWS", 10)
    with_worker = _files(run_spec(study, tmp_path / "a"))

    monkeypatch.setattr(reportgen.runs.writer, "RenderProcess", lambda: RenderProcess(start=False))
    alone = _files(run_spec(study, tmp_path / "b"))

    def dying() -> RenderProcess:
        worker = RenderProcess()
        assert worker._proc is not None
        worker._proc.kill()  # gone before its first task: every task falls back
        return worker

    monkeypatch.setattr(reportgen.runs.writer, "RenderProcess", dying)
    dead = _files(run_spec(study, tmp_path / "c"))
    assert "report.pdf" in with_worker and len(with_worker) > 20
    assert with_worker == alone == dead


def test_replies_are_claimed_in_any_order() -> None:
    frames = [{"a": pd.DataFrame({"x": [1.5, 2.0]})}, {"b": pd.DataFrame({"y": ["p", "q"]})}]
    worker = RenderProcess()
    try:
        first, second = (worker._submit("csv", f) for f in frames)
        assert first is not None and second is not None
        assert second.result() == canonical_bytes(frames[1])
        assert first.result() == canonical_bytes(frames[0])
    finally:
        worker.close()
