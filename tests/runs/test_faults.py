"""Faults: killed runs, full or read-only disks, concurrent runs, untouched inputs."""

from __future__ import annotations

import errno
import hashlib
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from reportgen.cli import main
from reportgen.runs import writer as runner

pytestmark = pytest.mark.slow

ROOT = Path(__file__).resolve().parents[2]


@pytest.fixture
def study(tmp_path: Path) -> Path:
    for name in ("clinic_visits.yaml", "clinic_visits.csv"):
        shutil.copy(ROOT / "specs" / name, tmp_path / name)
    return tmp_path / "clinic_visits.yaml"


def _visible_versions(out: Path) -> list[Path]:
    return sorted(p for p in out.glob("*/v*") if p.is_dir())


def _start(study: Path, out: Path) -> subprocess.Popen[str]:
    return subprocess.Popen(
        [sys.executable, "-m", "reportgen.cli", "run", str(study), "--out", str(out)],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    )


def test_sigkill_leaves_no_visible_version_and_a_later_run_succeeds(
    study: Path, tmp_path: Path
) -> None:
    out = tmp_path / "runs"
    killed = 0
    for delay in (0.5, 1.5, 2.5, 3.5):
        proc = _start(study, out)
        time.sleep(delay)
        if proc.poll() is None:
            proc.send_signal(signal.SIGKILL)
            killed += 1
        proc.communicate(timeout=120)
        for version in _visible_versions(out):  # only complete runs may be visible
            assert (version / "record.json").is_file(), version
    assert killed >= 2, "the runs finished before they could be killed"
    finished_before = len(_visible_versions(out))
    proc = _start(study, out)
    _, stderr = proc.communicate(timeout=300)
    assert proc.returncode == 0, stderr
    assert len(_visible_versions(out)) == finished_before + 1


def test_sigterm_removes_the_run_being_written(study: Path, tmp_path: Path) -> None:
    # A polite stop (SIGTERM, what a CI runner or a scheduler sends) while the run is being
    # written: one line, exit 2, and no folder left behind, hidden or visible.
    out = tmp_path / "runs"
    proc = _start(study, out)
    deadline = time.monotonic() + 120
    while not list(out.glob("*/.v*.building")) and time.monotonic() < deadline:
        time.sleep(0.05)
    time.sleep(0.5)  # inside the fit
    proc.send_signal(signal.SIGTERM)
    try:
        _, stderr = proc.communicate(timeout=120)
    except subprocess.TimeoutExpired:  # never left running into the next test
        proc.kill()
        _, stderr = proc.communicate()
        raise AssertionError(f"the run did not stop within 120 s of SIGTERM: {stderr}") from None
    assert proc.returncode == 2, stderr
    assert stderr == "reportgen run: interrupted; nothing was written\n"
    assert not list(out.glob("*/.v*")) and not _visible_versions(out)


def test_disk_full_gives_a_clear_error_and_nothing_visible(
    study: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    calls = {"n": 0}
    real_write = runner._write

    def failing_write(path: Path, data: bytes) -> None:
        calls["n"] += 1
        if calls["n"] > 3:
            raise OSError(errno.ENOSPC, "No space left on device")
        real_write(path, data)

    monkeypatch.setattr(runner, "_write", failing_write)
    out = tmp_path / "runs"
    assert main(["run", str(study), "--out", str(out)]) == 2
    err = capsys.readouterr().err
    assert "the disk is full" in err and "Traceback" not in err
    assert _visible_versions(out) == [] and list(out.glob("*/.v*")) == []


def test_read_only_output_gives_a_clear_error(
    study: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    blocker = tmp_path / "not-a-folder"
    blocker.write_text("a file where the output folder should be")
    assert main(["run", str(study), "--out", str(blocker / "runs")]) == 2
    assert "cannot create the run folder" in capsys.readouterr().err

    def read_only(path: Path, data: bytes) -> None:
        raise OSError(errno.EROFS, "Read-only file system")

    monkeypatch.setattr(runner, "_write", read_only)
    out = tmp_path / "runs"
    assert main(["run", str(study), "--out", str(out)]) == 2
    assert "Read-only file system" in capsys.readouterr().err
    assert _visible_versions(out) == []


def test_two_concurrent_runs_get_distinct_versions(study: Path, tmp_path: Path) -> None:
    out = tmp_path / "runs"
    procs = [_start(study, out) for _ in range(2)]
    results = [p.communicate(timeout=300) for p in procs]
    assert [p.returncode for p in procs] == [0, 0], results
    assert [v.name for v in _visible_versions(out)] == ["v001", "v002"]


def test_inputs_are_read_only_and_unchanged(
    study: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    data = study.parent / "clinic_visits.csv"
    before = {
        p: (hashlib.sha256(p.read_bytes()).hexdigest(), p.stat().st_mtime_ns) for p in (study, data)
    }
    for p in before:
        os.chmod(p, 0o444)
    assert main(["run", str(study), "--out", str(tmp_path / "runs")]) == 0
    after = {p: (hashlib.sha256(p.read_bytes()).hexdigest(), p.stat().st_mtime_ns) for p in before}
    assert after == before


def test_missing_system_library_is_one_clear_line(
    monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    # cffi's dlopen failure as weasyprint raises it when Pango is absent (message shape from
    # weasyprint's text/ffi.py); the check names the library and the packages, no traceback.
    import builtins

    from reportgen import syscheck

    real = builtins.__import__

    def fake(name: str, *args: object, **kwargs: object) -> object:
        if name == "weasyprint":
            raise OSError(
                "cannot load library 'libpango-1.0-0': libpango-1.0-0: cannot open "
                "shared object file: No such file or directory"
            )
        return real(name, *args, **kwargs)  # type: ignore[arg-type]

    monkeypatch.setattr(builtins, "__import__", fake)
    assert syscheck.main() == 1
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1
    assert "libpango-1.0-0 is missing" in err and "apt-get install" in err


def test_every_file_is_on_the_disk_before_the_run_is_named(
    study: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # fsync of every file (and of the folders) before the rename that makes the run
    # visible: a power cut leaves the hidden folder, never a visible half-stored run
    import os

    synced: list[int] = []
    real = os.fsync
    renamed: list[int] = []

    def fsync(fd: int) -> None:
        synced.append(fd)
        real(fd)

    def rename(a: object, b: object) -> None:
        renamed.append(len(synced))
        os.replace(a, b)  # type: ignore[arg-type]

    monkeypatch.setattr(runner.os, "fsync", fsync)
    monkeypatch.setattr(runner.os, "rename", rename)
    run = runner.run_spec(study, tmp_path / "runs")
    n_files = sum(1 for p in run.rglob("*") if p.is_file())
    assert renamed and renamed[0] >= n_files  # every file synced before the rename


def test_a_swallowed_termination_is_delivered_again() -> None:
    # Python drops an exception raised by a signal handler inside a weakref callback or a
    # __del__ (it calls sys.unraisablehook instead): the stop must not be lost. The hook
    # main() installs sends SIGTERM again; anything else goes to the previous hook.
    from types import SimpleNamespace

    from reportgen.cli import Terminated, _redeliver

    seen: list[object] = []
    passed: list[object] = []
    before = signal.signal(signal.SIGTERM, lambda *_: seen.append("again"))
    try:
        hook = _redeliver(passed.append)
        hook(SimpleNamespace(exc_value=Terminated()))
        deadline = time.monotonic() + 5
        while not seen and time.monotonic() < deadline:
            time.sleep(0.01)
        other = SimpleNamespace(exc_value=ValueError("x"))
        hook(other)
    finally:
        signal.signal(signal.SIGTERM, before)
    assert seen == ["again"] and passed == [other]
