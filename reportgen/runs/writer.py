"""Run a spec into a new, atomically written run directory.

Layout: ``OUT/<report id>/vNNN/``. A version number is reserved by creating the hidden
folder ``.vNNN.building`` (``mkdir`` is atomic, so two runs never get the same number);
all files are written there, SHA256SUMS last, and the folder is renamed to ``vNNN`` at the
end. A run that is interrupted leaves only the hidden folder, never a visible half-written
version.
"""

from __future__ import annotations

import errno
import importlib
import os
import re
import shutil
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

from .._version import __version__
from ..analysis.analyse import AnalysisResult, analyse
from ..analysis.engine import Engine, local_engine, open_engine
from ..analysis.subjects import subject_table_names
from ..errors import DataError, OutputError
from ..inputs.files import current_sha256, sha256_bytes
from ..inputs.loader import Dataset, load_dataset, require_passed
from ..inputs.spec import Spec, load_spec
from ..report.html import render_html
from ..report.render_process import RenderProcess
from ..report.styles import InputFile, load_style
from ..report.subject_parts import PartEntry, part_list_bytes, part_list_file, subject_parts
from ..report.tables import build_tables, canonical_bytes, results_digest
from .integrity import SIGNATURE, SUMS, checksum_list
from .record import build_record, dump_record, environment
from .signature import check_signing_key, sign

Progress = Callable[[str], None]
_VERSION = re.compile(r"^\.?v(\d{3,})(\.building)?$")


def _timestamp() -> str:
    epoch = os.environ.get("SOURCE_DATE_EPOCH")
    seconds = int(epoch) if epoch and epoch.isdigit() else int(time.time())
    return time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(seconds))


@dataclass(frozen=True)
class RunOutputs:
    """Every output file of a run except record.json, and the record's ingredients."""

    files: dict[str, bytes]
    results_sha256: str
    result: AnalysisResult
    inputs: tuple[InputFile, ...] = ()  # the spec's template, style sheet and logo
    # subjects.tables: parquet: the parts written (run-relative name -> entry)
    parts: dict[str, PartEntry] = field(default_factory=dict)

    @property
    def outputs(self) -> dict[str, str]:
        """SHA-256 of every file built so far (the parts as written)."""
        return {
            **{name: sha256_bytes(data) for name, data in self.files.items()},
            **{name: e.sha256 for name, e in self.parts.items()},
        }


class Timer:
    """Wall-clock seconds per step (for the benchmarks; never written into a run)."""

    def __init__(self) -> None:
        self.seconds: dict[str, float] = {}
        self._last = time.perf_counter()

    def lap(self, step: str) -> None:
        now = time.perf_counter()
        self.seconds[step] = self.seconds.get(step, 0.0) + now - self._last
        self._last = now


def build_outputs(
    spec: Spec,
    version: int,
    started: str,
    progress: Progress = lambda _: None,
    timer: Timer | None = None,
    render: bool = True,
    worker: RenderProcess | None = None,
    engine: Engine | None = None,
    parts_to: Path | None = None,
) -> RunOutputs:
    """Every output except record.json and report.pdf (which depend on the record).

    With ``render=False`` only the tables (and spec.yaml) are built: what ``verify``
    compares as numbers. With a ``worker``, it draws part of the figures. The fits' passes
    run on ``engine`` (here by default); the results do not depend on it. With
    ``subjects.tables: parquet`` the tables of subjects are written in parts under
    ``parts_to`` (the run directory being built) as they are made; ``files`` then holds
    their parts.json.
    """
    clock = timer or Timer()
    run_on = engine or local_engine()
    style = load_style(spec) if render else None  # a bad style file fails before the fit
    dataset = load_dataset(spec, run_on.executor, for_fit=True)
    require_passed(dataset)
    clock.lap("data")
    result = analyse(spec, dataset, progress, clock.lap)
    dataset = result.dataset  # without its readings, which the fit is done with
    frames = build_tables(result)
    parts: dict[str, PartEntry] = {}
    listed: dict[str, bytes] = {}
    if spec.subjects.tables == "parquet":
        if parts_to is None:
            raise ValueError("subjects.tables: parquet needs a folder to write the parts to")
        written: dict[str, list[PartEntry]] = {n: [] for n in subject_table_names(result)}
        for name, entry, data in subject_parts(result, run_on.executor):
            _write(parts_to / entry.file, data)
            written[name].append(entry)
        for name, entries in written.items():
            listed[part_list_file(name)] = part_list_bytes(name, entries)
            parts.update((e.file, e) for e in entries)
        clock.lap("tables of subjects")
    sums = {name: (e.csv_bytes, e.csv_sha256) for name, e in parts.items()}
    if style is None:
        tables = canonical_bytes(frames)
        return RunOutputs(
            {**tables, **listed, "spec.yaml": spec.raw},
            results_digest(tables, sums),
            result,
            parts=parts,
        )
    progress("figures")
    if worker is not None:  # the worker writes the large tables while figures are drawn
        collect = worker.tables(frames)
        figures = worker.figures(result)
        tables = collect()
    else:
        from ..report.figures import make_figures

        tables = canonical_bytes(frames)
        figures = make_figures(result)
    digest = results_digest(tables, sums)
    clock.lap("tables and figures")
    env = environment()
    packages = ", ".join(
        f"{name} {env['packages'][name]}"
        for name in ("numpy", "scipy", "pandas", "matplotlib", "weasyprint")
    )
    record_view = {
        "items": [
            ("tool", f"reportgen {__version__}"),
            ("run started (UTC)", started),
            ("environment", f"Python {env['python']} on {env['platform']}; {packages}"),
            ("spec sha256", spec.sha256),
            (
                f"data sha256 ({dataset.relpath})"
                if not dataset.files
                else f"data manifest sha256 ({dataset.relpath}, {len(dataset.files)} Parquet "
                "files; each file in record.json)",
                dataset.sha256,
            ),
            ("data bytes / rows", f"{dataset.n_bytes} / {dataset.rows_read}"),
            *((f"{f.role} sha256 ({f.path})", f.sha256) for f in style.inputs),
            ("results sha256 (tables)", digest),
        ],
        "commands": (
            f"reportgen run {spec.path.name} --out RUNS\n"
            f"reportgen verify RUNS/{spec.report_id}/v{version:03d}\n"
            "(RUNS: the folder that holds the runs; run from the spec's folder)"
        ),
    }
    progress("html")
    html = render_html(result, version, record_view, figures, style)
    clock.lap("html")
    files = {**tables, **listed}
    files["report.html"] = html
    files["spec.yaml"] = spec.raw
    for name, (svg, _, _) in figures.items():
        # The standalone file needs the namespace that the inline copy does without.
        standalone = svg.replace("<svg ", '<svg xmlns="http://www.w3.org/2000/svg" ', 1)
        files[f"figures/{name}.svg"] = standalone.encode("utf-8")
    return RunOutputs(files, digest, result, style.inputs, parts)


def previous_run(run_dir: Path) -> Path | None:
    """The latest completed version of the report below ``run_dir``'s (a visible ``vNNN``
    with its record; versions left unfinished or still being written are hidden), or None
    when there is none."""
    mine = int(run_dir.name.removeprefix("v"))
    done = [
        (int(m.group(1)), p)
        for p in run_dir.parent.iterdir()
        if (m := _VERSION.match(p.name))
        and not m.group(2)
        and not p.name.startswith(".")
        and int(m.group(1)) < mine
        and (p / "record.json").is_file()
    ]
    return max(done)[1] if done else None


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
    """Write and flush to the disk (fsync): the run is renamed to its visible name only
    when every byte of it is stored."""
    path.parent.mkdir(parents=True, exist_ok=True)
    with open(path, "wb") as fh:
        fh.write(data)
        fh.flush()
        os.fsync(fh.fileno())


def _sync_folder(folder: Path) -> None:
    """fsync a folder, so that the names in it are stored too (where the system allows)."""
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def _still_the_same(dataset: Dataset) -> None:
    """Refuse to publish a run whose data file (or any of its files) changed while the run
    read it: its record would vouch for bytes it did not analyse."""
    if current_sha256(dataset.path, dataset.relpath, bool(dataset.files)) != dataset.sha256:
        raise DataError(
            f"data.file {dataset.relpath!r} changed while the run read it (its "
            "SHA-256 differs from the bytes analysed); no run was written, run "
            "again when the data are complete"
        )


def run_spec(
    spec_path: str | Path,
    out: str | Path,
    progress: Progress = lambda _: None,
    timer: Timer | None = None,
    engine: str = "local",
    scheduler: str | None = None,
    sign_with: Path | None = None,
) -> Path:
    """Run a spec; returns the new run directory ``out/<id>/vNNN``.

    record.json lists the hash of every file except itself and report.pdf (the PDF carries
    record.json inside it); SHA256SUMS, written last, lists every other file of the run.
    ``engine`` and ``scheduler`` choose where the fits' passes run (``reportgen.analysis.engine``).
    With ``sign_with`` (an SSH key), SHA256SUMS is signed into SHA256SUMS.sig (``signature``).
    """
    spec = load_spec(spec_path)
    if sign_with is not None:
        check_signing_key(sign_with)
    with open_engine(engine, scheduler) as run_on:
        return _run(spec, out, progress, timer, run_on, sign_with)


def _run(
    spec: Spec,
    out: str | Path,
    progress: Progress,
    timer: Timer | None,
    engine: Engine,
    sign_with: Path | None = None,
) -> Path:
    if engine.description != "local":
        progress(f"the fits' passes run on {engine.description}")
    folder = Path(out) / spec.report_id
    try:
        folder.mkdir(parents=True, exist_ok=True)
        version, building = _reserve(folder)
    except OSError as e:
        raise OutputError(f"cannot create the run folder in {str(out)!r}: {e.strerror}") from e
    worker = RenderProcess()  # loads the rendering libraries while this process fits
    # Load matplotlib here too, in a thread: the fit's compiled steps release the GIL, so
    # most of the import overlaps them.
    threading.Thread(
        target=importlib.import_module, args=("reportgen.report.figures",), daemon=True
    ).start()
    try:
        final = folder / f"v{version:03d}"
        source = os.path.relpath(spec.path, final.resolve())
        started = _timestamp()
        built = build_outputs(
            spec, version, started, progress, timer, worker=worker, engine=engine, parts_to=building
        )
        for name, data in built.files.items():
            _write(building / name, data)
        outputs = built.outputs
        finished = _timestamp()
        record = dump_record(
            build_record(
                built.result,
                version,
                started,
                finished,
                source,
                built.results_sha256,
                outputs,
                built.inputs,
                engine.description,
            )
        )
        progress("pdf")
        pdf = worker.pdf(built.files["report.html"], spec.raw, record, finished)
        if timer is not None:
            timer.lap("pdf")
        _write(building / "report.pdf", pdf)
        _write(building / "record.json", record)
        listed = {**outputs, "report.pdf": sha256_bytes(pdf), "record.json": sha256_bytes(record)}
        sums = checksum_list(listed)
        _write(building / SUMS, sums)
        if sign_with is not None:
            progress("signing SHA256SUMS")
            _write(building / SIGNATURE, sign(sums, sign_with))
        _still_the_same(built.result.dataset)
        for folder in sorted({p for p in building.rglob("*") if p.is_dir()} | {building}):
            _sync_folder(folder)
        os.rename(building, final)
        _sync_folder(final.parent)
        return final
    except OSError as e:
        shutil.rmtree(building, ignore_errors=True)
        reason = "the disk is full" if e.errno == errno.ENOSPC else (e.strerror or str(e))
        raise OutputError(f"cannot write the run into {str(folder)!r}: {reason}") from e
    except BaseException:
        shutil.rmtree(building, ignore_errors=True)
        raise
    finally:
        worker.close()
