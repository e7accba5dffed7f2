"""The rendering worker changes how fast a run is, never what it writes."""

from __future__ import annotations

from pathlib import Path

import pytest

import reportgen.runner
from reportgen.runner import run_spec
from reportgen.worker import RenderWorker


def _files(run: Path) -> dict[str, bytes]:
    return {str(p.relative_to(run)): p.read_bytes() for p in sorted(run.rglob("*"))
            if p.is_file()}


def test_worker_alone_and_dead_worker_write_the_same_bytes(
        study: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    with_worker = _files(run_spec(study, tmp_path / "a"))

    monkeypatch.setattr(reportgen.runner, "RenderWorker", lambda: RenderWorker(start=False))
    alone = _files(run_spec(study, tmp_path / "b"))

    def dying() -> RenderWorker:
        worker = RenderWorker()
        assert worker._proc is not None
        worker._proc.kill()  # gone before its first task: every task falls back
        return worker

    monkeypatch.setattr(reportgen.runner, "RenderWorker", dying)
    dead = _files(run_spec(study, tmp_path / "c"))
    assert "report.pdf" in with_worker and len(with_worker) > 20
    assert with_worker == alone == dead
