"""The checksum list of a run (SHA256SUMS) and the integrity check that needs no re-run.

Format: that of GNU coreutils ``sha256sum`` (coreutils manual, "sha2 utilities" and
"md5sum invocation"): one line per file, the lowercase hex digest, two spaces (text mode,
where binary and text are the same on POSIX), the path relative to the run directory, a
newline; sorted by path. ``cd RUN && sha256sum -c SHA256SUMS`` checks it without reportgen.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from pathlib import Path

from ..inputs.files import sha256_file

SUMS = "SHA256SUMS"
SIGNATURE = "SHA256SUMS.sig"  # optional: the list signed (``signature``)
_LINE = re.compile(r"^([0-9a-f]{64}) [ *](.+)$")


def checksum_list(hashes: dict[str, str]) -> bytes:
    """SHA256SUMS bytes for ``{relative path: sha256}`` (paths with '/' separators)."""
    for name in hashes:
        if "\n" in name or "\\" in name:
            raise ValueError(f"file name {name!r} cannot be listed in {SUMS}")
    return "".join(f"{hashes[n]}  {n}\n" for n in sorted(hashes)).encode("utf-8")


def parse_checksum_list(data: bytes) -> tuple[dict[str, str], list[int]]:
    """Entries ``{path: sha256}`` and the numbers of lines that do not parse."""
    entries: dict[str, str] = {}
    bad: list[int] = []
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError:
        return {}, [0]
    for number, line in enumerate(text.splitlines(), start=1):
        m = _LINE.match(line)
        if m is None:
            bad.append(number)
        else:
            entries[m.group(2)] = m.group(1)
    return entries, bad


@dataclass(frozen=True)
class FileFinding:
    """One file whose integrity failed: ``kind`` is changed, missing, extra or the list."""

    name: str
    kind: str
    detail: str = ""


# The files of a run that record.json does not list: itself, and the PDF that carries it.
UNRECORDED = ("record.json", "report.pdf")


def run_files(run: Path) -> list[str]:
    """Every regular file of a run directory (symbolic links left out), as sorted relative
    paths with '/'."""
    return sorted(
        p.relative_to(run).as_posix() for p in run.rglob("*") if p.is_file() and not p.is_symlink()
    )


def odd_entries(run: Path) -> list[FileFinding]:
    """What a run should not hold: symbolic links, pipes, sockets, devices, empty folders
    (a run is regular files in folders; nothing is followed or opened)."""
    out = []
    for p in sorted(run.rglob("*")):
        name = p.relative_to(run).as_posix()
        if p.is_symlink():
            out.append(FileFinding(name, "not a file", "a symbolic link"))
        elif p.is_dir():
            if not any(p.iterdir()):
                out.append(FileFinding(name, "not a file", "an empty folder"))
        elif not p.is_file():
            out.append(FileFinding(name, "not a file", "a pipe, socket or device"))
    return out


def integrity_findings(
    run: Path, recorded_outputs: dict[str, str] | None
) -> tuple[int, list[FileFinding]]:
    """Check every file of ``run`` against its SHA256SUMS and against the hashes record.json
    lists for the outputs (every file but the record and the PDF); returns (files checked,
    findings), one finding per file.

    A file edited and SHA256SUMS written again for it still differs from record.json; where
    the record agrees with the file and SHA256SUMS does not, the list itself was altered,
    and the finding names SHA256SUMS. Anything in the run that is not a regular file is a
    finding too.
    """
    path = run / SUMS
    if not path.is_file():
        return 0, [FileFinding(SUMS, "missing", "the run has no checksum list")]
    entries, bad = parse_checksum_list(path.read_bytes())
    findings = [FileFinding(SUMS, "changed", f"line {n} is not '<sha256>  <file>'") for n in bad]
    findings += odd_entries(run)
    present = set(run_files(run)) - {SUMS, SIGNATURE}  # the signature signs the list
    recorded = recorded_outputs or {}  # what record.json lists (nothing when it is damaged)
    for name in sorted(set(entries) | present | set(recorded)):
        if name not in present:
            where = " and ".join(
                w
                for w, listed in (
                    ("SHA256SUMS", name in entries),
                    ("record.json", name in recorded),
                )
                if listed
            )
            findings.append(FileFinding(name, "missing", f"listed in {where}"))
            continue
        if name not in entries:
            findings.append(FileFinding(name, "extra", "not listed in SHA256SUMS"))
            continue
        now = sha256_file(run / name)
        in_record = recorded_outputs is not None and name not in UNRECORDED
        if in_record and name not in recorded:
            findings.append(FileFinding(name, "extra", "not listed in record.json"))
        elif now != entries[name]:
            if in_record and recorded[name] == now:
                findings.append(FileFinding(SUMS, "changed", f"its line for {name} was altered"))
            else:
                findings.append(FileFinding(name, "changed", "differs from SHA256SUMS"))
        elif in_record and recorded[name] != now:
            findings.append(
                FileFinding(
                    name,
                    "changed",
                    "differs from record.json (SHA256SUMS was written again after an edit)",
                )
            )
    return len(entries), findings
