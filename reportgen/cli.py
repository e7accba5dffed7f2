"""Command line: a thin adapter from arguments to the library, errors to exit codes.

Exit codes: 0 success / everything matched; 1 a verify or compare finding; 2 bad input or
usage (one clear paragraph, no traceback).
"""

from __future__ import annotations

import argparse
import json
import os
import signal
import sys
import threading
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from ._version import __version__
from .errors import ReportgenError

STARTER = """\
# reportgen spec: edit the values, then run `reportgen check {name}` and `reportgen run {name}`.
# The columns of {data_name} (type, stored label, and the role guessed for it):
{listing}
report:
  id: {rid}                 # folder name of the runs: letters, digits, . _ -
  title: "{title}"
  authors: []
  band_level: 0.95          # level of the pointwise bands
data:
  file: {file}              # relative to this spec: .csv .parquet .xpt .sas7bdat .dta .sav
  subject: {subject}        # column that identifies the subject
  time: {time}              # time of the reading: numbers, or dates with time_origin
{time_lines}  value: {value}            # the measurement
  # group: ARM              # optional: arm, cohort or site (one value per subject)
  # keep_rows:              # optional: keep only rows that meet every condition
  #   - {{column: PARAMCD, equals: ALB}}
  #   - {{column: ANL01FL, in: ["Y"]}}
  time_unit: "{time_unit}"
  value_unit: ""
  transform: none           # none, log or log10
checks:
  missing: drop             # drop or fail
  duplicates: average       # average, keep or fail
  min_subjects: 10
model:
  mean_bandwidth: auto      # a number, or auto (chosen by bandwidth_method)
  covariance_bandwidth: auto
  bandwidth_method: cv      # cv (K-fold over subjects) or gcv
  component_rule: fve       # fve, aic, bic, cv or fixed (then set n_components)
  fve_threshold: 0.95
sensitivity:
  # factors: [0.5, 0.75, 1.5, 2.0]   # the default; factors written here are used as given
  similarity_threshold: 0.9
subjects:
  count: 6                  # trajectories shown; or list ids under show: [...]
gates:                      # what `reportgen compare` treats as a failure
  max_mean_change: 0.1
  max_eigenvalue_change: 0.5
  max_error_variance_change: 0.5
  min_eigenfunction_similarity: 0.9
  same_components: true
"""


def _progress(quiet: bool):  # type: ignore[no-untyped-def]
    show = not quiet and sys.stderr.isatty() and not os.environ.get("CI")

    def report(step: str) -> None:
        if show:
            print(f"... {step}", file=sys.stderr, flush=True)

    return report


def _cmd_run(args: argparse.Namespace) -> int:
    from .runs.writer import run_spec

    run_dir = run_spec(
        args.spec,
        args.out,
        _progress(args.quiet),
        engine=args.engine,
        scheduler=args.scheduler,
        sign_with=None if args.sign is None else Path(args.sign),
    )
    print(f"run written: {run_dir}")
    print(f"report: {run_dir / 'report.html'}")
    print(f"pdf: {run_dir / 'report.pdf'}")
    if not args.against_previous:
        return 0
    from .runs.writer import previous_run

    previous = previous_run(run_dir)
    if previous is None:
        print(
            "against previous: this is the first version (no earlier completed one); nothing to "
            "compare"
        )
        return 0
    print(f"against previous: {previous.name} -> {run_dir.name}")
    return _compare(previous, run_dir)


def _cmd_check(args: argparse.Namespace) -> int:
    from .inputs.loader import load_dataset
    from .inputs.spec import load_spec

    spec = load_spec(args.spec)
    ds = load_dataset(spec)
    width = max(len(c.name) for c in ds.checks)
    for c in ds.checks:
        print(f"{c.name:<{width}}  {c.status:<4}  {c.detail}")
    if ds.failed:
        print(f"check: {len(ds.failed)} check(s) failed", file=sys.stderr)
        return 2
    print("check: spec and data are usable")
    return 0


def _print_rows(header: tuple[str, ...], rows: list[tuple[str, ...]]) -> None:
    widths = [max(len(h), *(len(r[i]) for r in rows)) for i, h in enumerate(header)]
    for row in (header, *rows):
        print("  ".join(c.ljust(w) for c, w in zip(row, widths, strict=True)).rstrip())


def _summary(command: str, problems: list[str], ok_text: str) -> int:
    """One closing line naming every problem (or the first 10 and how many more)."""
    if not problems:
        print(f"{command}: {ok_text}")
        return 0
    shown = ", ".join(problems[:10])
    more = f" and {len(problems) - 10} more" if len(problems) > 10 else ""
    print(f"{command}: {len(problems)} problem(s): {shown}{more}")
    return 1


def _cmd_verify(args: argparse.Namespace) -> int:
    from .runs.verify import verify_run

    result = verify_run(
        args.run_dir,
        args.inputs,
        args.render,
        args.strict,
        _progress(args.quiet),
        args.allowed_signers,
    )
    _print_rows(
        ("part", "item", "recorded", "now", "match"),
        [(r.part, r.item, r.recorded, r.now, "yes" if r.ok else "NO") for r in result.rows],
    )
    print()
    for part in ("integrity", "signature", "inputs", "numbers", "rendering"):
        verdict = result.verdicts.get(part)
        print(f"{part}: {verdict.text if verdict is not None else 'not checked'}")
    for note in result.notes:
        print(f"note: {note}")
    if result.could_not_check and not result.problems:
        print(
            "verify: could not check the inputs and numbers (the inputs were not found); "
            "nothing else differs"
        )
        return 3
    return _summary("verify", result.problems, "everything matches")


def _compare(run_a: Path, run_b: Path, as_json: bool = False, out: Path | None = None) -> int:
    """Print what changed from run A to run B under B's gates (or the findings as JSON);
    with ``out``, write the change report there. 1 when a gate is crossed."""
    from .inputs.spec import GatesSection, spec_from_bytes
    from .runs.compare import compare

    spec_file = run_b / "spec.yaml"
    gates = (
        spec_from_bytes(spec_file.read_bytes(), spec_file).gates
        if spec_file.is_file()
        else GatesSection()
    )
    found = compare(run_a, run_b, gates)
    written = None
    if out is not None:
        from .runs.change_report import write_change_report

        written = write_change_report(found, gates, out)
    crossed = found.crossed
    if as_json:
        import json

        print(json.dumps(found.as_dict(), indent=2, ensure_ascii=False, default=str))
        return 1 if crossed else 0
    _print_rows(
        ("item", "A", "B", "gate", "against the runs' uncertainty"),
        [(f.item, f.a, f.b, "CROSSED" if f.crossed else "", f.noise) for f in found.findings],
    )
    print(f"uncertainty: {found.overlap.words}")
    print(f"subjects moved: {found.moved_beyond} beyond the rule ({found.move_rule})")
    if written is not None:
        print(f"change report: {written / 'change.html'}")
    return _summary("compare", [f"gate crossed: {c}" for c in crossed], "within the gates")


def _cmd_compare(args: argparse.Namespace) -> int:
    return _compare(
        Path(args.run_a),
        Path(args.run_b),
        as_json=args.json,
        out=None if args.out is None else Path(args.out),
    )


DATE_LINES = """\
  time_origin: first        # first (each subject's first date), an ISO date or a column
  time_scale: days          # days, weeks, months, years or hours
"""
NUMBER_LINES = """\
  # time_origin: first      # optional: count time from each subject's first reading
"""


def _cmd_init(args: argparse.Namespace) -> int:
    from .errors import DataError
    from .inputs.readers import detect_format, parse_table
    from .inputs.starter import column_listing, guess_columns

    data = Path(args.data)
    if not data.is_file():
        raise DataError(f"data file {str(data)!r} does not exist or is not a file")
    target = Path(args.spec)
    if target.exists():
        raise DataError(f"{str(target)!r} exists already; choose another name")
    try:
        raw = data.read_bytes()
    except OSError as e:
        raise DataError(f"cannot read {str(data)!r}: {e.strerror}") from e
    fmt = detect_format(data.name)
    table = parse_table(raw, fmt, str(data), nrows=500)
    cols = [str(c) for c in table.frame.columns]
    if len(cols) < 3:
        sep = (
            " (CSV fields are read as separated by "
            f"{table.describe_delimiter()}; is another separator used?)"
            if fmt == "csv"
            else ""
        )
        raise DataError(
            f"{str(data)!r} has {len(cols)} column(s){sep}; a subject, a time and "
            "a value column are needed"
        )
    try:
        guess = guess_columns(table)
    except ValueError as e:
        raise DataError(f"{str(data)!r}: {e}; the columns are {', '.join(cols)}") from e
    rel = os.path.relpath(data.resolve(), target.resolve().parent)
    rid = "".join(ch if ch.isalnum() or ch in "._-" else "-" for ch in data.stem)[:60] or "study"
    text = STARTER.format(
        name=target.name,
        rid=rid,
        title=f"Appendix: {data.stem}",
        file=rel,
        subject=guess.subject,
        time=guess.time,
        value=guess.value,
        data_name=data.name,
        listing=column_listing(guess),
        time_lines=DATE_LINES if guess.time_is_date else NUMBER_LINES,
        time_unit="days" if guess.time_is_date else "",  # as time_scale, for units.csv
    )
    target.write_text(text, encoding="utf-8")
    print(f"starter spec written: {target}")
    print(
        f"guessed: subject {guess.subject!r}, time {guess.time!r}"
        + (" (dates: time_origin first, in days)" if guess.time_is_date else "")
        + f", value {guess.value!r}"
    )
    print(f"columns: {', '.join(cols)}")
    return 0


def _cmd_predict(args: argparse.Namespace) -> int:
    from .runs.stored_fit import load_fit, prediction_size, write_table

    fit = load_fit(args.run_dir)
    frame = fit.predict_file(args.data)
    path = write_table(frame, args.out)
    subjects, rows = prediction_size(frame)
    transform = fit.spec.data.transform
    scale = "" if transform == "none" else f", on the {transform} scale the run analysed"
    print(
        f"predictions written: {path} ({subjects} subjects, {rows} rows; scores and "
        f"trajectories with {fit.predictor.band_level:.0%} bands on the run's grid{scale})"
    )
    return 0


def _cmd_schema(args: argparse.Namespace) -> int:
    from .inputs.schema import spec_schema

    print(json.dumps(spec_schema(), indent=2))
    return 0


def _cmd_demo(args: argparse.Namespace) -> int:
    from .runs.writer import run_spec

    spec = Path(__file__).resolve().parent.parent / "specs" / "clinic_visits.yaml"
    if not spec.is_file():
        raise ReportgenError(f"the demo spec {str(spec)!r} is missing (run from a checkout)")
    run_dir = run_spec(spec, args.out, _progress(args.quiet))
    print(f"demo report: {run_dir / 'report.html'}")
    print(f"demo pdf: {run_dir / 'report.pdf'}")
    return 0


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="reportgen",
        description="Study appendices for sparse longitudinal data from one YAML spec.",
    )
    p.add_argument("--version", action="version", version=f"reportgen {__version__}")
    sub = p.add_subparsers(dest="command", required=True)

    def add(name: str, helptext: str) -> argparse.ArgumentParser:
        sp = sub.add_parser(name, help=helptext, description=helptext)
        sp.add_argument("--quiet", action="store_true", help="no progress messages")
        return sp

    sp = add("run", "fit, render and write a new run directory OUT/<report id>/vNNN")
    sp.add_argument("spec")
    sp.add_argument("--out", default="runs", help="folder of the runs (default: runs)")
    sp.add_argument(
        "--against-previous",
        action="store_true",
        help="after writing the run, "
        "compare it with the previous version under the spec's gates; exit 1 "
        "when a gate is crossed (for CI on a data refresh)",
    )
    sp.add_argument(
        "--engine",
        choices=("local", "dask"),
        default="local",
        help="where the fits' passes over the data run: in this process "
        "(default) or on a Dask cluster; the results are the same bits",
    )
    sp.add_argument(
        "--scheduler",
        metavar="ADDRESS",
        help="with --engine dask: the "
        "scheduler's address (default: DASK_SCHEDULER_ADDRESS, else a cluster "
        "started in this process)",
    )
    sp.add_argument(
        "--sign",
        metavar="KEY",
        help="sign SHA256SUMS with this SSH key (ssh-keygen -Y sign) into SHA256SUMS.sig",
    )
    sp.set_defaults(func=_cmd_run)
    sp = add("check", "validate the spec and the data; fit nothing")
    sp.add_argument("spec")
    sp.set_defaults(func=_cmd_check)
    sp = add(
        "verify",
        "check a run's files against SHA256SUMS, its inputs against the "
        "record, and re-run it; exit 1 on any mismatch",
    )
    sp.add_argument("run_dir")
    sp.add_argument(
        "--inputs",
        metavar="DIR",
        help="folder holding the run's input files "
        "(found by name); default: beside the recorded spec",
    )
    sp.add_argument(
        "--render",
        action="store_true",
        help="also rebuild the HTML, figures and PDF and compare their bytes",
    )
    sp.add_argument(
        "--strict",
        action="store_true",
        help="with --render: a rendering "
        "difference explained by another environment is a finding too",
    )
    sp.add_argument(
        "--allowed-signers",
        metavar="FILE",
        help="check SHA256SUMS.sig against this allowed-signers file (ssh-keygen -Y verify); "
        "a run without a good signature by a key in it is a finding",
    )
    sp.set_defaults(func=_cmd_verify)
    sp = add("compare", "what changed from RUN_A to RUN_B; exit 1 when a gate is crossed")
    sp.add_argument("run_a")
    sp.add_argument("run_b")
    sp.add_argument("--json", action="store_true", help="print the findings as JSON")
    sp.add_argument(
        "--out",
        metavar="DIR",
        help="also write the change report (change.html, change.pdf, tables, SHA256SUMS) "
        "to DIR, a new folder",
    )
    sp.set_defaults(func=_cmd_compare)
    sp = add("init", "write a commented starter spec for a data file")
    sp.add_argument("data")
    sp.add_argument("spec", nargs="?", default="spec.yaml")
    sp.set_defaults(func=_cmd_init)
    sp = add(
        "predict",
        "scores and trajectories for the subjects in DATA from the fit "
        "stored in RUN_DIR (checked against its SHA256SUMS first)",
    )
    sp.add_argument("run_dir")
    sp.add_argument(
        "data", help="a data file with the run's columns, read as the run's spec reads its data"
    )
    sp.add_argument("--out", required=True, help="output file: .csv or .parquet")
    sp.set_defaults(func=_cmd_predict)
    sp = add("schema", "print the JSON Schema of a spec")
    sp.set_defaults(func=_cmd_schema)
    sp = add("demo", "run the first example spec")
    sp.add_argument("--out", default="runs")
    sp.set_defaults(func=_cmd_demo)
    return p


# Commands that compute numbers; they run on one BLAS thread (see ``threads``).
NUMERIC_COMMANDS = ("run", "verify", "demo", "predict")


class Terminated(Exception):
    """SIGTERM arrived: raised in the main thread, so that a run being written is removed
    on the way out (the writer removes its hidden folder on any exception)."""


def _on_sigterm(signum: int, frame: object) -> None:
    raise Terminated


def _redeliver(previous: Any) -> Any:
    """An unraisable-exception hook that sends SIGTERM again when a Terminated was
    swallowed: a signal handler's exception raised inside a weakref callback or a
    ``__del__`` (an import lock's, say) is printed and dropped by Python, and the run went
    on; the signal again raises it at the main thread's next step."""

    def hook(unraisable: Any) -> None:
        if isinstance(unraisable.exc_value, Terminated):
            os.kill(os.getpid(), signal.SIGTERM)
            return
        previous(unraisable)

    return hook


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    here = threading.current_thread() is threading.main_thread()
    previous = signal.signal(signal.SIGTERM, _on_sigterm) if here else None
    unraisable = sys.unraisablehook
    if here:
        sys.unraisablehook = _redeliver(unraisable)
    try:
        if args.command in NUMERIC_COMMANDS:
            from ._threads import one_blas_thread

            with one_blas_thread():
                code = int(args.func(args))
        else:
            code = int(args.func(args))
    except ReportgenError as e:
        print(f"reportgen {args.command}: error: {e}", file=sys.stderr)
        code = 2
    except (KeyboardInterrupt, Terminated):
        print(f"reportgen {args.command}: interrupted; nothing was written", file=sys.stderr)
        code = 2
    finally:
        if here and previous is not None:
            signal.signal(signal.SIGTERM, previous)
        sys.unraisablehook = unraisable
    return code


def entry() -> None:
    """The installed ``reportgen`` command: ``main`` and a quick exit.

    After the command has finished and its output is flushed, the interpreter's own
    teardown (finalising numba, matplotlib and pandas) would add wall time; every file of
    a run is written and closed by then, so it is skipped.
    """
    code = main()
    sys.stdout.flush()
    sys.stderr.flush()
    os._exit(code)


if __name__ == "__main__":
    sys.exit(main())
