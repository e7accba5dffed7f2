"""The input files: reading one file's bytes (once, read-only), hashing them, and, for data
given as many Parquet files, which files in which order, with one digest for all.

``data.file`` may name a folder (every ``*.parquet`` file under it) or a glob pattern
(``parts/*.parquet``, relative to the spec). The files are taken in the order of their
paths relative to the folder (or to the pattern's fixed part), compared as UTF-8 bytes, so
that the order never depends on how the file system lists them.

The manifest lists each file's relative path, size and SHA-256 in that order; its digest
is the SHA-256 of the text ``reportgen-manifest-v1`` followed by one line
``path<TAB>bytes<TAB>sha256`` per file, each line ending in a newline. A file added,
removed, renamed or changed changes the digest; listing order does not.
"""

from __future__ import annotations

import glob
import hashlib
import os
import stat
from dataclasses import dataclass
from pathlib import Path

from ..errors import DataError

HEADER = "reportgen-manifest-v1\n"


def sha256_bytes(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def sha256_file(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def read_path(path: Path, shown: str, what: str = "data.file") -> bytes:
    """The bytes of ``path``, read once (``shown`` is how the user named it, ``what`` the
    field or argument that named it); refuses folders, devices, pipes and sockets."""
    try:
        st = os.stat(path)
    except FileNotFoundError:
        raise DataError(f"{what} {shown!r} does not exist (looked for {str(path)!r})") from None
    except (OSError, ValueError) as e:  # ValueError: an embedded NUL byte in the path
        reason = getattr(e, "strerror", None) or str(e)
        raise DataError(f"{what} {shown!r} cannot be read: {reason}") from e
    if stat.S_ISDIR(st.st_mode):
        raise DataError(f"{what} {shown!r} is a directory; give a data file")
    if not stat.S_ISREG(st.st_mode):
        raise DataError(f"{what} {shown!r} is not a regular file (device, pipe or socket)")
    try:
        with open(path, "rb") as fh:
            return fh.read()
    except OSError as e:
        raise DataError(f"{what} {shown!r} cannot be read: {e.strerror}") from e


@dataclass(frozen=True)
class DataFile:
    """One data file of many, as the manifest lists it."""

    path: str  # relative to the folder (or the pattern's fixed part), with "/" separators
    n_bytes: int
    sha256: str


def is_many(named: str, path: Path) -> bool:
    """Whether ``data.file`` names many files (a folder or a glob pattern)."""
    return glob.has_magic(named) or path.is_dir()


def _base(path: Path) -> Path:
    """The folder the pattern's relative paths start from: its parts before the first
    one with a wildcard."""
    fixed = []
    for part in path.parts:
        if glob.has_magic(part):
            break
        fixed.append(part)
    return Path(*fixed)


def list_files(path: Path, named: str, what: str = "data.file") -> list[tuple[str, Path]]:
    """(relative path, absolute path) of every file named, in manifest order."""
    # pathlib's globbing never descends into a symbolic link to a folder (a link loop or a
    # link to a system folder is not walked); glob.glob(recursive=True) would
    if path.is_dir():
        base, found = path, [p for p in path.rglob("*.parquet") if p.is_file()]
    else:
        base = _base(path)
        pattern = path.relative_to(base).as_posix() if path != base else "*"
        found = [p for p in base.glob(pattern) if p.is_file()] if base.is_dir() else []
    home = base.resolve()
    leaving = [p for p in found if not p.resolve().is_relative_to(home)]
    if leaving:
        raise DataError(
            f"{what} {named!r}: {leaving[0].relative_to(base).as_posix()!r} is a "
            f"link to a file outside {str(base)!r}; give the files themselves"
        )
    if not found and path.is_dir():
        raise DataError(
            f"{what} {named!r} is a folder with no Parquet files in it (looked in "
            f"{str(base)!r}); give a data file, or a folder of Parquet files"
        )
    if not found:
        raise DataError(f"{what} {named!r} names no Parquet files (looked in {str(base)!r})")
    odd = [p for p in found if p.suffix.lower() != ".parquet"]
    if odd:
        raise DataError(
            f"{what} {named!r}: every file of a folder or pattern must be Parquet; "
            f"{odd[0].name!r} is not"
        )
    listed = [(p.relative_to(base).as_posix(), p) for p in found]
    return sorted(listed, key=lambda item: item[0].encode("utf-8"))


def digest(files: list[DataFile] | tuple[DataFile, ...]) -> str:
    h = hashlib.sha256(HEADER.encode())
    for f in sorted(files, key=lambda f: f.path.encode("utf-8")):
        h.update(f"{f.path}\t{f.n_bytes}\t{f.sha256}\n".encode())
    return h.hexdigest()


def current_sha256(path: Path, named: str, many: bool) -> str:
    """What a run records as the data's SHA-256, computed from the disk now: the file's
    own, or the manifest digest of the files named ("absent" when there is nothing)."""
    if many:
        return current_digest(path, named)
    return sha256_file(path) if path.is_file() else "absent"


def current_digest(path: Path, named: str) -> str:
    """The digest of the files ``data.file`` names now ("absent" when it names none)."""
    try:
        files = list_files(path, named)
    except DataError:
        return "absent"
    return digest([DataFile(rel, full.stat().st_size, sha256_file(full)) for rel, full in files])
