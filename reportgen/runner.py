"""Run a spec into a new, atomically written run directory; verify a run by re-running it.

Layout: ``OUT/<report id>/vNNN/``. A version number is reserved by creating the hidden
folder ``.vNNN.building`` (``mkdir`` is atomic, so two runs never get the same number);
all files are written there and the folder is renamed to ``vNNN`` at the end. A run that
is interrupted leaves only the hidden folder, never a visible half-written version.
"""

from __future__ import annotations

import errno
import os
import re
import shutil
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

from .analysis import AnalysisResult, analyse
from .data import load_dataset, require_passed
from .errors import OutputError
from .record import (
    build_record,
    dump_record,
    load_record,
    settings,
    sha256_bytes,
    sha256_file,
)
from .render import render_html, render_pdf
from .spec import Spec, load_spec, spec_from_bytes
from .tables import build_tables, canonical_bytes, results_digest

Progress = Callable[[str], None]
_VERSION = re.compile(r"^\.?v(\d{3,})(\.building)?$")


def _timestamp() -> str:
    epoch = os.environ.get("SOURCE_DATE_EPOCH")
    seconds = int(epoch) if epoch and epoch.isdigit() else int(time.time())
    return time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(seconds))


@dataclass(frozen=True)
class Built:
    """Every output file of a run except record.json, and the record's ingredients."""

    files: dict[str, bytes]
    results_sha256: str
    result: AnalysisResult


class Timer:
    """Wall-clock seconds per step (for the benchmarks; never written into a run)."""

    def __init__(self) -> None:
        self.seconds: dict[str, float] = {}
        self._last = time.perf_counter()

    def lap(self, step: str) -> None:
        now = time.perf_counter()
        self.seconds[step] = self.seconds.get(step, 0.0) + now - self._last
        self._last = now


def build_outputs(spec: Spec, version: int, progress: Progress = lambda _: None,
                  timer: Timer | None = None) -> Built:
    """Every output except record.json and report.pdf (which depend on the record)."""
    clock = timer or Timer()
    dataset = load_dataset(spec)
    require_passed(dataset)
    clock.lap("data")
    result = analyse(spec, dataset, progress, clock.lap)
    tables = canonical_bytes(build_tables(result))
    digest = results_digest(tables)
    clock.lap("tables")
    progress("figures")
    from .figures import make_figures

    figures = make_figures(result)
    clock.lap("figures")
    record_view = {
        "items": [
            ("spec sha256", spec.sha256),
            (f"data sha256 ({dataset.relpath})", dataset.sha256),
            ("data bytes / rows", f"{dataset.n_bytes} / {dataset.rows_read}"),
            ("results sha256 (tables)", digest),
        ],
        "commands": (f"reportgen run {spec.path.name} --out RUNS\n"
                     f"reportgen verify RUNS/{spec.report_id}/v{version:03d}\n"
                     "(RUNS: the folder that holds the runs; run from the spec's folder)"),
    }
    progress("html")
    html = render_html(result, version, record_view, figures)
    clock.lap("html")
    files = dict(tables)
    files["report.html"] = html
    files["spec.yaml"] = spec.raw
    for name, (svg, _, _) in figures.items():
        # The standalone file needs the namespace that the inline copy does without.
        standalone = svg.replace("<svg ", '<svg xmlns="http://www.w3.org/2000/svg" ', 1)
        files[f"figures/{name}.svg"] = standalone.encode("utf-8")
    return Built(files, digest, result)


def _next_version(folder: Path) -> int:
    numbers = [int(m.group(1)) for p in folder.iterdir() if (m := _VERSION.match(p.name))]
    return max(numbers, default=0) + 1


def _reserve(folder: Path) -> tuple[int, Path]:
    for _ in range(1000):
        version = _next_version(folder)
        building = folder / f".v{version:03d}.building"
        try:
            building.mkdir()
            return version, building
        except FileExistsError:
            continue
    raise OutputError(f"could not reserve a version number in {str(folder)!r}")


def _write(path: Path, data: bytes) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    with open(path, "wb") as fh:
        fh.write(data)


def run_spec(spec_path: str | Path, out: str | Path, progress: Progress = lambda _: None,
             timer: Timer | None = None) -> Path:
    """Run a spec; returns the new run directory ``out/<id>/vNNN``.

    record.json lists the hash of every file except itself and report.pdf: the PDF carries
    record.json inside it, so its own hash cannot be in the record. ``verify`` checks the
    PDF by re-rendering it from the verified HTML, spec and record.
    """
    spec = load_spec(spec_path)
    folder = Path(out) / spec.report_id
    try:
        folder.mkdir(parents=True, exist_ok=True)
        version, building = _reserve(folder)
    except OSError as e:
        raise OutputError(f"cannot create the run folder in {str(out)!r}: {e.strerror}") from e
    try:
        final = folder / f"v{version:03d}"
        source = os.path.relpath(spec.path, final.resolve())
        started = _timestamp()
        built = build_outputs(spec, version, progress, timer)
        for name, data in built.files.items():
            _write(building / name, data)
        outputs = {name: sha256_bytes(data) for name, data in built.files.items()}
        finished = _timestamp()
        record = dump_record(build_record(built.result, version, started, finished, source,
                                          built.results_sha256, outputs))
        progress("pdf")
        pdf = render_pdf(built.files["report.html"], spec.raw, record, finished)
        if timer is not None:
            timer.lap("pdf")
        _write(building / "report.pdf", pdf)
        _write(building / "record.json", record)
        os.rename(building, final)
        return final
    except OSError as e:
        shutil.rmtree(building, ignore_errors=True)
        reason = "the disk is full" if e.errno == errno.ENOSPC else (e.strerror or str(e))
        raise OutputError(f"cannot write the run into {str(folder)!r}: {reason}") from e
    except BaseException:
        shutil.rmtree(building, ignore_errors=True)
        raise


@dataclass(frozen=True)
class VerifyRow:
    item: str
    recorded: str
    now: str

    @property
    def match(self) -> bool:
        return self.recorded == self.now


def verify_run(run_dir: str | Path, progress: Progress = lambda _: None) -> list[VerifyRow]:
    """Re-hash and re-run a run directory; one row per item compared."""
    run = Path(run_dir)
    record = load_record(run)
    rows: list[VerifyRow] = []
    present = sorted(str(p.relative_to(run)) for p in run.rglob("*")
                     if p.is_file() and p.name not in ("record.json", "report.pdf"))
    for name in sorted(set(present) | set(record["outputs"])):
        rec = record["outputs"].get(name, "absent")
        now = sha256_file(run / name) if (run / name).is_file() else "absent"
        rows.append(VerifyRow(f"file {name}", rec, now))
    spec_bytes = (run / "spec.yaml").read_bytes() if (run / "spec.yaml").is_file() else b""
    rows.append(_pdf_row(run, spec_bytes, record))
    rows.append(VerifyRow("spec sha256", record["spec"]["sha256"], sha256_bytes(spec_bytes)))
    source = (run / record["spec"]["source"]).resolve()
    spec = spec_from_bytes(spec_bytes, source)
    for entry in record["inputs"]:
        path = (source.parent / entry["path"]).resolve()
        now = sha256_file(path) if path.is_file() else "absent"
        rows.append(VerifyRow(f"input {entry['path']}", entry["sha256"], now))
    progress("re-running the recorded spec")
    built = build_outputs(spec, int(record["run"]["version"]), progress)
    rows.append(VerifyRow("results sha256", record["results_sha256"], built.results_sha256))
    rec_settings = record["spec"].get("settings", {})
    now_settings = settings(built.result)
    for key in ("mean_bandwidth", "covariance_bandwidth", "n_components", "component_rule",
                "error_variance"):
        rows.append(VerifyRow(f"setting {key}", str(rec_settings.get(key)),
                              str(now_settings[key])))
    for name, data in sorted(built.files.items()):
        rows.append(VerifyRow(f"re-run {name}", record["outputs"].get(name, "absent"),
                              sha256_bytes(data)))
    return rows


def _pdf_row(run: Path, spec_bytes: bytes, record: dict) -> VerifyRow:
    """The stored PDF against a re-render from the stored HTML, spec and record."""
    pdf, html = run / "report.pdf", run / "report.html"
    if not pdf.is_file() or not html.is_file():
        return VerifyRow("file report.pdf", "present", "absent")
    expected = render_pdf(html.read_bytes(), spec_bytes, (run / "record.json").read_bytes(),
                          str(record["run"]["finished"]))
    return VerifyRow("file report.pdf", sha256_bytes(expected), sha256_file(pdf))
