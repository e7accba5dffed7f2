"""Verify a run: integrity (no re-run), inputs, numbers (re-run), rendering (optional).

Each part has its own verdict, so that an auditor can tell a changed file from a changed
input, a changed result, or only a different rendering environment:

- integrity: every file of the run against SHA256SUMS (``integrity.integrity_findings``);
- signature (with ``allowed_signers``): SHA256SUMS.sig against the allowed signers
  (``signature``);
- inputs: the spec and each recorded input file against the record's hashes; an input is
  found beside the recorded spec, or by name in ``--inputs DIR``;
- numbers: the recorded spec re-run on the inputs; the results digest compared exactly and
  every table compared as numbers within ``RTOL`` (a different BLAS or CPU moves the last
  digits, which is not a change of the analysis);
- rendering (``render=True``): HTML, figures and PDF rebuilt and compared byte for byte;
  where the bytes differ, their words (``rendered_text``) are compared exactly: a changed
  word is always a finding; the same words in other bytes, while the numbers match and the
  recorded environment differs from the current one, is said, and is not a finding unless
  ``strict``.
"""

from __future__ import annotations

import io
import tempfile
from collections.abc import Callable
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any, Literal

import numpy as np
import pandas as pd

from ..analysis.subjects import subject_table_names
from ..errors import ReportgenError
from ..inputs.files import current_sha256, sha256_bytes, sha256_file
from ..inputs.spec import spec_from_bytes
from ..report.pdf import render_pdf
from ..report.subject_parts import PART_LIST, csv_of_part, read_part_list
from .integrity import SIGNATURE, SUMS, integrity_findings
from .record import environment, load_record
from .rendered_text import first_difference, words_of
from .signature import check
from .writer import RunOutputs, build_outputs

Progress = Callable[[str], None]
RTOL = 1e-6  # relative tolerance for numbers re-computed on another machine


@dataclass(frozen=True)
class Row:
    part: str
    item: str
    recorded: str
    now: str
    ok: bool


Outcome = Literal["ok", "explained", "finding", "not checked"]


@dataclass(frozen=True)
class Verdict:
    """A part's verdict: ``ok``; ``explained`` (rendered bytes differ and the recorded
    environment explains it); ``finding`` (a difference); ``not checked`` (and why)."""

    outcome: Outcome
    text: str


@dataclass
class Verification:
    rows: list[Row] = field(default_factory=list)
    verdicts: dict[str, Verdict] = field(default_factory=dict)
    problems: list[str] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    could_not_check: bool = False  # the inputs were not found: nothing wrong was seen
    rebuilt: RunOutputs | None = None

    def add(self, part: str, item: str, recorded: str, now: str, ok: bool) -> None:
        self.rows.append(Row(part, item, recorded, now, ok))
        if not ok:
            self.problems.append(item)


def _spec_places(run: Path, record: dict[str, Any], inputs: Path | None) -> list[tuple[Path, str]]:
    """Where the run's spec (beside which its inputs lie) may be, in the order tried, each
    with the words that say where the place comes from: ``--inputs`` DIR; else the
    recorded path from the run folder (a copy at the same depth), then the spec's recorded
    location (a copy anywhere on the same machine). A copy at another depth turns the
    first into a folder the user never named (even the root), hence the words."""
    if inputs is not None:
        return [(inputs / "spec.yaml", f"{inputs}, given as --inputs")]
    relative = str(record["spec"]["source"])
    first = (run / relative).resolve()
    places = [
        (first, f"{first.parent}, the run's recorded path {relative} taken from {run.resolve()}")
    ]
    location = record["spec"].get("location")
    if isinstance(location, str) and Path(location) != first:
        places.append((Path(location), f"{Path(location).parent}, the spec's recorded location"))
    return places


def _locate_input(entry: dict[str, Any], source: Path, inputs: Path | None) -> Path:
    if inputs is not None:
        return inputs / Path(str(entry["path"])).name
    return (source.parent / str(entry["path"])).resolve()


def tables_match(a: bytes, b: bytes) -> tuple[bool, str]:
    """Tables equal as numbers within RTOL (text cells exactly); and what differs."""
    if a == b:
        return True, "identical"
    try:
        fa = pd.read_csv(io.BytesIO(a), dtype=str, keep_default_na=False)
        fb = pd.read_csv(io.BytesIO(b), dtype=str, keep_default_na=False)
    except (ValueError, pd.errors.ParserError):
        return False, "not a readable table"
    if list(fa.columns) != list(fb.columns) or fa.shape != fb.shape:
        return False, f"shape {fa.shape} vs {fb.shape}"
    worst, cells = 0.0, 0
    for col in fa.columns:
        xa = pd.to_numeric(fa[col], errors="coerce").to_numpy(dtype=float)
        xb = pd.to_numeric(fb[col], errors="coerce").to_numpy(dtype=float)
        numeric = ~np.isnan(xa) & ~np.isnan(xb)
        text_diff = ~numeric & (fa[col].to_numpy() != fb[col].to_numpy())
        scale = max(float(np.max(np.abs(xa[numeric]), initial=0.0)), 1e-300)
        rel = np.abs(xa[numeric] - xb[numeric]) / np.maximum(np.abs(xa[numeric]), 1e-9 * scale)
        cells += int(np.sum(rel > RTOL)) + int(np.sum(text_diff))
        worst = max(worst, float(np.max(rel, initial=0.0)))
    if cells:
        return False, f"{cells} cell(s) differ (largest relative difference {worst:.2g})"
    return True, f"equal within {RTOL:g} (largest relative difference {worst:.2g})"


def _compare_parts(run: Path, table: str, built: RunOutputs, scratch: Path) -> tuple[bool, str]:
    """A table in parts against its re-run: the parts' canonical CSV digests, and where one
    differs, the two parts as numbers (``tables_match``)."""
    try:
        recorded = read_part_list(run, table)
    except ValueError as e:
        return False, str(e)
    now = [e for name, e in sorted(built.parts.items()) if name.startswith(f"tables/{table}/")]
    if [e.file for e in recorded] != [e.file for e in now]:
        return False, f"{len(recorded)} part(s) recorded, {len(now)} now"
    if all(a.csv_sha256 == b.csv_sha256 for a, b in zip(recorded, now, strict=True)):
        return True, f"identical ({len(now)} part(s))"
    worst = ""
    for a, b in zip(recorded, now, strict=True):
        if a.csv_sha256 == b.csv_sha256:
            continue
        try:
            ok, detail = tables_match(csv_of_part(run / a.file), csv_of_part(scratch / b.file))
        except OSError as e:
            return False, f"{Path(a.file).name}: cannot be read ({e.strerror or e})"
        if not ok:
            return False, f"{Path(a.file).name}: {detail}"
        worst = detail
    return True, f"{len(now)} part(s); {worst}"


def environment_diff(recorded: dict[str, Any]) -> list[str]:
    now = environment()
    out = []
    for key in ("python", "platform", "blas"):
        if recorded.get(key) != now[key]:
            out.append(f"{key} {recorded.get(key)} -> {now[key]}")
    rec_p, now_p = recorded.get("packages", {}), now["packages"]
    for name in sorted(set(rec_p) | set(now_p)):
        if rec_p.get(name) != now_p.get(name):
            out.append(f"{name} {rec_p.get(name, 'absent')} -> {now_p.get(name, 'absent')}")
    return out


def verify_run(
    run_dir: str | Path,
    inputs: str | Path | None = None,
    render: bool = False,
    strict: bool = False,
    progress: Progress = lambda _: None,
    allowed_signers: str | Path | None = None,
) -> Verification:
    """Check a run directory; see the module docstring. Raises RecordError (exit 2) when
    the run has no usable record and nothing else shows tampering."""
    run = Path(run_dir)
    out = Verification()
    damage: ReportgenError | None = None
    try:
        record: dict[str, Any] | None = load_record(run)
    except ReportgenError as e:
        if not (run / "SHA256SUMS").is_file() or not run.is_dir():
            raise
        record, damage = None, e
    checked, findings = integrity_findings(run, record["outputs"] if record else None)
    for f in findings:
        out.add(
            "integrity",
            f"file {f.name}",
            "listed" if f.kind != "extra" else "-",
            f"{f.kind}: {f.detail}",
            False,
        )
    out.verdicts["integrity"] = (
        Verdict("ok", f"ok: all {checked} files match SHA256SUMS and record.json")
        if not findings
        else Verdict("finding", f"FAILED: {len(findings)} file problem(s)")
    )
    _signature(run, out, None if allowed_signers is None else Path(allowed_signers))
    if damage is not None:
        if not findings:  # the checksum list vouches for an unreadable record: exit 2
            raise damage
        for part in ("inputs", "numbers"):
            out.verdicts[part] = Verdict("not checked", f"not checked: {damage}")
        return out
    assert record is not None
    _inputs_and_numbers(
        run, record, out, None if inputs is None else Path(inputs), render, progress
    )
    _rendering(run, record, out, render, strict)
    return out


def _signature(run: Path, out: Verification, allowed_signers: Path | None) -> None:
    """SHA256SUMS.sig against the allowed signers: a run whose list was written again
    after signing (or that lost its signature) fails, whatever the list says."""
    signed = (run / SIGNATURE).is_file()
    if allowed_signers is None:
        out.verdicts["signature"] = Verdict(
            "not checked",
            "not checked: the run is signed; give --allowed-signers FILE to check it"
            if signed
            else "not checked: the run is not signed",
        )
        return
    if not signed:
        out.add("signature", SIGNATURE, "asked for", "absent", False)
        out.verdicts["signature"] = Verdict(
            "finding", f"FAILED: the run is not signed ({SIGNATURE} absent)"
        )
        return
    sums = run / SUMS
    found = check(
        sums.read_bytes() if sums.is_file() else b"",
        (run / SIGNATURE).read_bytes(),
        allowed_signers,
    )
    out.add("signature", SIGNATURE, "signed", found.signer or "-", found.ok)
    out.verdicts["signature"] = (
        Verdict("ok", f"ok: SHA256SUMS signed by {found.signer} ({allowed_signers.name})")
        if found.ok
        else Verdict("finding", f"FAILED: {found.why}")
    )


def _inputs_and_numbers(
    run: Path,
    record: dict[str, Any],
    out: Verification,
    inputs: Path | None,
    render: bool,
    progress: Progress,
) -> None:
    spec_file = run / "spec.yaml"
    spec_bytes = spec_file.read_bytes() if spec_file.is_file() else b""
    spec_ok = record["spec"]["sha256"] == sha256_bytes(spec_bytes)
    out.add(
        "inputs",
        "spec sha256",
        record["spec"]["sha256"][:16],
        sha256_bytes(spec_bytes)[:16],
        spec_ok,
    )
    places = _spec_places(run, record, inputs)
    for source, _ in places:  # the first place where every input is found
        found = [
            (entry, path, current_sha256(path, str(entry["path"]), "manifest" in entry))
            for entry in record["inputs"]
            for path in [_locate_input(entry, source, inputs)]
        ]  # a folder or pattern of files (it has a manifest): the digest of all of them
        if all(now != "absent" for _, _, now in found):
            break
    located: list[tuple[str, Path]] = []
    changed: list[tuple[str, Path]] = []
    missing: list[tuple[str, Path]] = []
    for entry, path, now in found:
        row = Row(
            "inputs",
            f"input {entry['path']}",
            entry["sha256"][:16],
            now[:16],
            now == entry["sha256"],
        )
        out.rows.append(row)
        if now != "absent" and not row.ok:
            out.problems.append(row.item)
        (missing if now == "absent" else changed if now != entry["sha256"] else located).append(
            (str(entry["path"]), path)
        )
    if not missing and len(places) > 1 and source != places[0][0]:
        out.notes.append(
            f"inputs found at the spec's recorded location ({source.parent}), "
            "not beside the run's recorded path to it"
        )
    if missing:
        looked = "; ".join(words for _, words in places)
        out.could_not_check = True
        out.verdicts["inputs"] = Verdict(
            "not checked",
            f"COULD NOT CHECK: {', '.join(str(m[0]) for m in missing)} not found (looked in "
            f"{looked}); "
            + ("check the folder given as --inputs" if inputs is not None else "give --inputs DIR"),
        )
    elif changed:
        out.verdicts["inputs"] = Verdict(
            "finding",
            (
                f"CHANGED: input files differ from those the run used "
                f"({', '.join(str(c[0]) for c in changed)}): refreshed or "
                "edited since the run"
            ),
        )
    elif spec_ok:
        out.verdicts["inputs"] = Verdict("ok", "ok: the spec and every input file match the record")
    else:
        out.verdicts["inputs"] = Verdict(
            "finding", "CHANGED: spec.yaml differs from the recorded spec"
        )
    if missing or changed or not spec_ok:
        out.verdicts["numbers"] = Verdict(
            "not checked", "not checked: the inputs are not those of the run"
        )
        return
    try:
        spec = spec_from_bytes(spec_bytes, source)
    except ReportgenError as e:
        out.add("numbers", "recorded spec", "valid", f"invalid: {e}", False)
        out.verdicts["numbers"] = Verdict(
            "finding", "FAILED: the recorded spec no longer validates"
        )
        return
    if inputs is not None:
        spec = replace(spec, locations=dict(located))
    progress("re-running the recorded spec")
    with tempfile.TemporaryDirectory(prefix="reportgen-verify-") as scratch:
        built = build_outputs(
            spec,
            int(record["run"]["version"]),
            str(record["run"]["started"]),
            progress,
            render=render,
            parts_to=Path(scratch),
        )
        out.rebuilt = built
        _numbers(run, record, out, built, Path(scratch))


def _numbers(
    run: Path, record: dict[str, Any], out: Verification, built: RunOutputs, scratch: Path
) -> None:
    """The re-run's tables against the run's (its parts re-written under ``scratch``)."""
    same_digest = built.results_sha256 == record["results_sha256"]
    out.add(
        "numbers",
        "results sha256 (exact)",
        record["results_sha256"][:16],
        built.results_sha256[:16],
        True,
    )
    bad = 0
    data = built.result.dataset
    entry = record["inputs"][0] if record["inputs"] else {}
    counts = 0  # what record.json says of the data against what the re-run read
    for what, now in (("rows", data.rows_read), ("bytes", data.n_bytes)):
        ok = str(entry.get(what)) == str(now)
        counts += not ok
        out.add("numbers", f"data {what} read", str(entry.get(what)), str(now), ok)
    for name in sorted(n for n in built.files if n.startswith("tables/")):
        if name.endswith("/" + PART_LIST):  # a table in parts: compared part by part below
            continue
        stored = run / name
        ok, detail = tables_match(
            stored.read_bytes() if stored.is_file() else b"", built.files[name]
        )
        bad += not ok
        out.add("numbers", f"table {name.removeprefix('tables/')}", "recorded", detail, ok)
    if built.parts:
        for table in subject_table_names(built.result):
            ok, detail = _compare_parts(run, table, built, scratch)
            bad += not ok
            out.add("numbers", f"table {table} (parts)", "recorded", detail, ok)
    if counts:
        out.verdicts["numbers"] = Verdict(
            "finding",
            "CHANGED: record.json's count of the data's rows or bytes is not what the data hold",
        )
    elif bad:
        out.verdicts["numbers"] = Verdict(
            "finding", f"CHANGED: {bad} table(s) differ beyond {RTOL:g}"
        )
    elif same_digest:
        out.verdicts["numbers"] = Verdict(
            "ok", "ok: re-run gives byte-identical tables (same results digest)"
        )
    else:
        out.verdicts["numbers"] = Verdict(
            "ok",
            (
                f"ok: re-run tables equal within relative {RTOL:g}; the "
                "digest differs in the last digits (another machine or "
                "library)"
            ),
        )


def _rendering(
    run: Path, record: dict[str, Any], out: Verification, render: bool, strict: bool
) -> None:
    built = out.rebuilt
    if not render or built is None:
        out.verdicts["rendering"] = Verdict(
            "not checked",
            (
                "not checked (add --render to rebuild the HTML, figures and PDF)"
                if not render
                else "not checked"
            ),
        )
        return
    pdf = render_pdf(
        built.files["report.html"],
        (run / "spec.yaml").read_bytes(),
        (run / "record.json").read_bytes(),
        str(record["run"]["finished"]),
    )
    rebuilt = {
        **{n: d for n, d in built.files.items() if not n.startswith("tables/")},
        "report.pdf": pdf,
    }
    differing, reworded = [], []
    for name in sorted(rebuilt):
        stored = run / name
        now = sha256_bytes(rebuilt[name])
        before = sha256_file(stored) if stored.is_file() else "absent"
        if now != before:
            differing.append(name)
            where = (
                first_difference(words_of(name, stored.read_bytes()), words_of(name, rebuilt[name]))
                if stored.is_file()
                else "absent"
            )
            if where is not None:  # a changed word is a finding on any machine
                reworded.append(name)
                out.add("rendering", f"text of {name}", "recorded", "other words", False)
                out.notes.append(f"the text of {name} differs {where}")
        out.rows.append(
            Row("rendering", f"re-rendered {name}", before[:16], now[:16], now == before)
        )
    if not differing:
        out.verdicts["rendering"] = Verdict(
            "ok", "ok: HTML, figures and PDF re-render byte-identical"
        )
        return
    if reworded:
        out.verdicts["rendering"] = Verdict(
            "finding",
            f"CHANGED: the text of {len(reworded)} file(s) differs from a re-render "
            f"({', '.join(reworded[:3])}{', ...' if len(reworded) > 3 else ''})",
        )
        out.problems.extend(f"re-rendered {n}" for n in differing if n not in reworded)
        return
    env = environment_diff(record.get("environment", {}))
    numbers = out.verdicts.get("numbers")
    numbers_ok = numbers is not None and numbers.outcome == "ok"
    if env and numbers_ok:
        out.verdicts["rendering"] = Verdict(
            "explained",
            (
                f"differs only in rendering ({len(differing)} file(s), the same words); "
                "the environment differs from the recorded one: " + "; ".join(env)
            ),
        )
        out.notes.append(
            "rendered bytes depend on the fonts and library versions; the words and the "
            "numbers match" + ("" if not strict else " (--strict: counted as a finding)")
        )
        if strict:
            out.problems.extend(f"re-rendered {n}" for n in differing)
    else:
        out.verdicts["rendering"] = Verdict(
            "finding",
            (
                f"CHANGED: {len(differing)} file(s) re-render differently "
                "in the recorded environment (the same words)"
            ),
        )
        out.problems.extend(f"re-rendered {n}" for n in differing)
