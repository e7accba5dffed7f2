"""A second process for the rendering half of a run, so that a 2-core laptop uses both cores
(loading the plotting and PDF libraries, drawing and the PDF are single-core Python; the
times are in benchmarks/CHOICES.md).

The worker is started before the data are read; it loads the rendering libraries while the
main process fits. It then draws the figures that need only summaries of the fit (the main
process draws the ones that need every reading, in the same time), and renders the PDF.

Every figure and the PDF are pure functions of what they are given, so the bytes are the
same whichever process made them (``tests/report/test_render_process.py`` compares a run made with
the worker to one made without it, and to one whose worker died). Should the worker be
unavailable or die, the main process does the work itself: slower, never different.
"""

from __future__ import annotations

import os
import pickle
import subprocess
import sys
import threading
from collections.abc import Callable
from pathlib import Path
from typing import TYPE_CHECKING, Any, BinaryIO

from .._threads import one_blas_thread

if TYPE_CHECKING:
    import pandas as pd

    from ..analysis.analyse import AnalysisResult

# Figures that need the fit's summaries only (not the readings or per-subject results),
# drawn by the worker from a slim copy of the analysis: about the third of the drawing that
# the worker, ready later than the main process, can take (benchmarks/CHOICES.md).
SUMMARY_FIGURES = ("pair_coverage", "covariance", "bandwidths", "eigenvalues")


def _warm_up() -> None:
    """Load what the tasks need; runs once, at the worker's start, while the main process
    reads the data and fits."""
    import weasyprint  # noqa: F401

    from . import figures, pdf  # noqa: F401


def _draw(result: AnalysisResult, names: tuple[str, ...]) -> dict[str, tuple[str, str, str]]:
    from .figures import make_figures

    return make_figures(result, names)


def _pdf(html: bytes, spec_bytes: bytes, record_bytes: bytes, stamp: str) -> bytes:
    from .pdf import render_pdf

    return render_pdf(html, spec_bytes, record_bytes, stamp)


def _csv(frames: dict[str, pd.DataFrame]) -> dict[str, bytes]:
    from .tables import canonical_bytes

    return canonical_bytes(frames)


# Tables with more rows than this are written by the worker while the main process draws
# the figures (at large sizes the two take about as long).
LARGE_TABLE_ROWS = 50_000

_TASKS: dict[str, Callable[..., Any]] = {"draw": _draw, "pdf": _pdf, "csv": _csv}


def serve(inbox: BinaryIO | None = None, outbox: BinaryIO | None = None) -> None:
    """The worker's loop: unpickle (task, args) from stdin, pickle ("ok", result) or
    ("error", text) to stdout, until stdin closes. Started by :class:`RenderProcess` as
    ``python -c "from reportgen.report.render_process import serve; serve()"``: a fresh
    interpreter that imports nothing of the caller's (unlike multiprocessing's spawn, which
    re-runs the caller's main script when it has no ``if __name__ == "__main__"`` guard)."""
    inbox = inbox or sys.stdin.buffer
    outbox = outbox or sys.stdout.buffer
    sys.stdout = sys.stderr  # the pipe carries results only
    with one_blas_thread():  # as in the commands that compute numbers
        _warm_up()
        while True:
            try:
                task, args = pickle.load(inbox)
            except EOFError:
                return
            try:
                reply: tuple[str, Any] = ("ok", _TASKS[task](*args))
            except Exception as e:  # reported to the caller, which then does the task itself
                reply = ("error", f"{type(e).__name__}: {e}")
            pickle.dump(reply, outbox, protocol=pickle.HIGHEST_PROTOCOL)
            outbox.flush()


SERVE = "from reportgen.report.render_process import serve; serve()"


class _Pending:
    """A task sent to the worker; ``result`` waits for its reply (None if the worker failed).
    Several may be pending at once, and their results read in any order."""

    def __init__(self, worker: RenderProcess, task: str, args: tuple[Any, ...]) -> None:
        self._worker = worker
        self._number: int | None = None  # the task's place in the worker's queue
        self._sent = threading.Thread(target=self._send, args=(task, args), daemon=True)
        self._sent.start()  # a large message must not block the caller while the worker loads

    def _send(self, task: str, args: tuple[Any, ...]) -> None:
        self._number = self._worker._send(task, args)

    def result(self) -> Any:
        self._sent.join()
        return None if self._number is None else self._worker._reply(self._number)


class RenderProcess:
    """The worker process, started at once; ``close`` ends it. Tasks run one at a time, in
    the order sent; replies are read in the same order."""

    def __init__(self, start: bool = True) -> None:
        self._lock = threading.Lock()
        self._proc: subprocess.Popen[bytes] | None = None
        self._sent = 0  # tasks sent; the worker answers them in this order
        # Replies are read as they come, by a thread of their own: a worker blocked on
        # writing a large reply would otherwise never read the next task (a deadlock).
        self._replies: dict[int, Any] = {}  # read, not yet claimed
        self._arrived = threading.Condition()
        self._gone = False  # the worker died or was ended
        if not start:  # every task then runs in the calling process
            return
        root = str(Path(__file__).resolve().parents[2])
        env = dict(os.environ)
        env["PYTHONPATH"] = os.pathsep.join(p for p in (root, env.get("PYTHONPATH")) if p)
        try:
            self._proc = subprocess.Popen(
                [sys.executable, "-c", SERVE],
                stdin=subprocess.PIPE,
                stdout=subprocess.PIPE,
                stderr=subprocess.DEVNULL,
                env=env,
            )
        except OSError:
            self._proc = None
            return
        threading.Thread(target=self._read_replies, args=(self._proc,), daemon=True).start()

    def figures(self, result: AnalysisResult) -> dict[str, tuple[str, str, str]]:
        """Every figure, in report order: the summary ones drawn by the worker while this
        process draws the rest."""
        from .figures import FIGURES, make_figures

        pending = (
            self._submit("draw", result.without_subjects(), SUMMARY_FIGURES)
            if self._proc is not None
            else None
        )
        local = make_figures(result, [n for n in FIGURES if n not in SUMMARY_FIGURES])
        remote = pending.result() if pending is not None else None
        if remote is None:
            remote = make_figures(result, SUMMARY_FIGURES)
        both = {**local, **remote}
        return {name: both[name] for name in FIGURES if name in both}

    def tables(self, frames: dict[str, pd.DataFrame]) -> Callable[[], dict[str, bytes]]:
        """Start writing the canonical CSV bytes (``tables.canonical_bytes``): the large
        tables in the worker, the others here. Returns the function that waits for them
        and gives them all, in name order."""
        from .tables import canonical_bytes

        large = {n: f for n, f in frames.items() if len(f) > LARGE_TABLE_ROWS}
        pending = self._submit("csv", large) if large else None
        small = canonical_bytes({n: f for n, f in frames.items() if n not in large})

        def collect() -> dict[str, bytes]:
            remote = pending.result() if pending is not None else None
            if remote is None:
                remote = canonical_bytes(large)
            both = {**small, **remote}
            return {name: both[name] for name in sorted(both)}

        return collect

    def pdf(self, html: bytes, spec_bytes: bytes, record_bytes: bytes, stamp: str) -> bytes:
        pending = self._submit("pdf", html, spec_bytes, record_bytes, stamp)
        pdf = pending.result() if pending is not None else None
        return pdf if pdf is not None else _pdf(html, spec_bytes, record_bytes, stamp)

    def close(self) -> None:
        """End the worker. It holds nothing but loaded libraries, so it is killed rather
        than asked to exit (its interpreter's teardown would cost the run time)."""
        self._kill()

    def _submit(self, task: str, *args: Any) -> _Pending | None:
        return _Pending(self, task, args) if self._proc is not None else None

    def _send(self, task: str, args: tuple[Any, ...]) -> int | None:
        """Send a task; its number in the worker's queue, or None if it could not be sent
        (the caller then does the task itself)."""
        with self._lock:
            proc = self._proc
            try:
                assert proc is not None and proc.stdin is not None
                pickle.dump((task, args), proc.stdin, protocol=pickle.HIGHEST_PROTOCOL)
                proc.stdin.flush()
            except (OSError, ValueError, AssertionError):  # ValueError: the pipe was closed
                return None
            self._sent += 1
            return self._sent - 1

    def _read_replies(self, proc: subprocess.Popen[bytes]) -> None:
        received = 0
        try:
            assert proc.stdout is not None
            while True:
                status, value = pickle.load(proc.stdout)
                with self._arrived:
                    self._replies[received] = value if status == "ok" else None
                    received += 1
                    self._arrived.notify_all()
        except (EOFError, OSError, ValueError, AssertionError, pickle.UnpicklingError):
            pass  # the worker ended: every unanswered task falls back to the caller
        with self._arrived:
            self._gone = True
            self._arrived.notify_all()

    def _reply(self, number: int) -> Any:
        """The reply to task ``number`` (None if the worker failed or died)."""
        with self._arrived:
            self._arrived.wait_for(lambda: number in self._replies or self._gone)
            return self._replies.pop(number, None)

    def _kill(self) -> None:
        proc, self._proc = self._proc, None
        if proc is not None:
            proc.kill()
            proc.wait()
            for pipe in (proc.stdin, proc.stdout):
                if pipe is not None:
                    try:
                        pipe.close()
                    except OSError:  # a write the dead worker never read
                        pass
