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


def run_files(run: Path) -> list[str]:
    """Every regular file of a run directory, as sorted relative paths with '/'."""
    return sorted(p.relative_to(run).as_posix() for p in run.rglob("*") if p.is_file())


def integrity_findings(
    run: Path, recorded_outputs: dict[str, str] | None
) -> tuple[int, list[FileFinding]]:
    """Check every file of ``run`` against its SHA256SUMS; returns (files checked, findings).

    Where the record's own list of outputs agrees with the file and disagrees with
    SHA256SUMS, the list itself was altered, and the finding names SHA256SUMS.
    """
    path = run / SUMS
    if not path.is_file():
        return 0, [FileFinding(SUMS, "missing", "the run has no checksum list")]
    entries, bad = parse_checksum_list(path.read_bytes())
    findings = [FileFinding(SUMS, "changed", f"line {n} is not '<sha256>  <file>'") for n in bad]
    present = set(run_files(run)) - {SUMS}
    recorded = recorded_outputs or {}
    for name in sorted(set(entries) | present):
        if name not in present:
            findings.append(FileFinding(name, "missing", "listed in SHA256SUMS"))
            continue
        if name not in entries:
            findings.append(FileFinding(name, "extra", "not listed in SHA256SUMS"))
            continue
        now = sha256_file(run / name)
        if now == entries[name]:
            continue
        if recorded.get(name) == now:
            findings.append(FileFinding(SUMS, "changed", f"its line for {name} was altered"))
        else:
            findings.append(FileFinding(name, "changed", "differs from SHA256SUMS"))
    return len(entries), findings
