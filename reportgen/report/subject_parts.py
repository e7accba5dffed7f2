"""Tables of one row per subject as folders of Parquet parts (``subjects.tables: parquet``).

``tables/<name>/part-00001.parquet``, ``part-00002.parquet``, ...: one part per part of the
data (per data file that holds readings, in the order of the input manifest), its subjects
in code order. ``tables/<name>/parts.json`` lists each part's rows, its bytes and their
SHA-256, and the length and SHA-256 of the part's canonical CSV (``tables.to_csv_bytes``
of the same rows, header included). The results digest takes the canonical CSV's, so that
it depends on the numbers, not on the Parquet writer's version; ``verify`` compares them.

With one data file there is one part, and its canonical CSV is byte for byte the table
``subjects.tables: csv`` writes. A part is made, formatted, hashed and turned into
Parquet by a task of the engine (on a cluster, by the workers), a batch of parts at a
time: from the part's scores, covariances and residual sums, which stay where the fit's
passes computed them, and the subjects' ids, groups and reading counts, which the
``reportgen`` process sends; it writes the bytes. It never holds a table of every subject,
nor every subject's scores.
"""

from __future__ import annotations

import hashlib
import io
import json
from collections.abc import Iterator
from dataclasses import asdict, dataclass, replace
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from ..analysis.subjects import subject_frames, subject_groups, subject_table_names
from .tables import neutralised, to_csv_bytes

if TYPE_CHECKING:
    from ..analysis.analyse import AnalysisResult
    from ..fpca.arrays import FloatArray
    from ..fpca.executor import Executor
    from ..fpca.result import FPCAFit

PART_LIST = "parts.json"
COMPRESSION = "zstd"


@dataclass(frozen=True)
class PartEntry:
    """One written part. ``file`` is relative to the run directory."""

    file: str
    rows: int
    bytes: int
    sha256: str
    csv_bytes: int
    csv_sha256: str


def part_file(table: str, index: int) -> str:
    """The run-relative name of part ``index`` (from 0) of ``table``."""
    return f"tables/{table}/part-{index + 1:05d}.parquet"


def part_list_file(table: str) -> str:
    """The run-relative name of a table's list of parts (parts.json)."""
    return f"tables/{table}/{PART_LIST}"


def parquet_bytes(frame: pd.DataFrame) -> bytes:
    """The frame as Parquet bytes: no index, no pandas metadata (it names the pandas
    version), a fixed compression; the same frame and pyarrow version give the same bytes."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    table = pa.Table.from_pandas(frame, preserve_index=False).replace_schema_metadata(None)
    sink = io.BytesIO()
    pq.write_table(table, sink, compression=COMPRESSION)
    return sink.getvalue()


def csv_of_part(path: Path) -> bytes:
    """The canonical CSV of a written part (what its ``csv_sha256`` digests)."""
    import pyarrow.parquet as pq

    return to_csv_bytes(pq.read_table(path).to_pandas())


@dataclass(frozen=True)
class PartInput:
    """What the ``reportgen`` process sends a task for one part's tables of subjects: the
    subjects' ids, groups and reading counts (their scores, covariances and residual sums
    are where the fit's passes left them)."""

    ids: Any
    groups: np.ndarray | None
    n_obs: np.ndarray


def made_part(
    given: PartInput,
    scores: tuple[FloatArray, FloatArray],
    sums: tuple[FloatArray, FloatArray],
    model: FPCAFit,
    cut: float,
    curves: bool,
) -> dict[str, tuple[bytes, int, int, str]]:
    """A task: one part's tables of subjects as Parquet bytes, with their rows and the
    length and SHA-256 of their canonical CSV (the text itself stays where it was made).
    ``scores``: the part's kept scores and covariances; ``sums``: its kept residual sums;
    ``model``: the fit without its subjects; ``cut``: the flagging distance."""
    frames = subject_frames(model, given.ids, given.groups, given.n_obs, *scores, sums, cut, curves)
    out = {}
    for name, frame in frames.items():
        frame = neutralised(frame)
        text = to_csv_bytes(frame)
        out[name] = (parquet_bytes(frame), len(frame), len(text), _sha256(text))
    return out


# Output rows made per call of the executor (at least two parts a call: two workers):
# their Parquet bytes come back together (sizes at 10^6 and 10^7 subjects in
# benchmarks/ENGINES.md).
BATCH_ROWS = 2_000_000


def _batches(sizes: list[int], per_subject: int) -> list[range]:
    """The parts (``sizes``: subjects each) in runs of consecutive parts, each of at most
    ``BATCH_ROWS`` output rows (``per_subject`` a subject) or else of two parts."""
    out: list[range] = []
    first = 0
    while first < len(sizes):
        last, rows = first, 0
        while last < len(sizes) and (
            last < first + 2 or rows + sizes[last] * per_subject <= BATCH_ROWS
        ):
            rows += sizes[last] * per_subject
            last += 1
        out.append(range(first, last))
        first = last
    return out


def subject_parts(
    result: AnalysisResult, run_on: Executor
) -> Iterator[tuple[str, PartEntry, bytes]]:
    """Every part of every table of subjects: its table, its entry (run-relative file, rows,
    sizes, digests) and its Parquet bytes, in batches of ``BATCH_ROWS`` output rows made by
    the tasks of ``run_on`` (the engine's executor, where the fit's results are kept); the
    caller writes each batch's bytes before the next is made."""
    names = subject_table_names(result)
    parts, fit = result.subject_parts, result.fit
    scores, sums = fit.kept_scores, result.residual_sums
    curves = result.spec.subjects.all_trajectories
    # the fit's population parts, about 0.2 MB, sent with every task (not its n_obs)
    model = replace(fit.without_subjects(), n_obs=fit.n_obs[:0])
    per_subject = 2 + (fit.grid.size if curves else 0)
    for indices in _batches([p.size for p in parts], per_subject):
        given = [
            PartInput(fit.subjects[parts[i]], subject_groups(result, parts[i]), fit.n_obs[parts[i]])
            for i in indices
        ]
        # placed first: arrays sent inside a task make a large task graph (Dask warns)
        placed = run_on.place(given)
        del given
        made = run_on.map(
            made_part,
            placed,
            [(scores.handles[i], sums.handles[i]) for i in indices],
            (model, result.subjects_view.cut, curves),
        )
        del placed
        for index, tables in zip(indices, made, strict=True):
            for name in names:
                data, rows, csv_bytes, csv_sha256 = tables[name]
                yield (
                    name,
                    PartEntry(
                        part_file(name, index),
                        rows,
                        len(data),
                        _sha256(data),
                        csv_bytes,
                        csv_sha256,
                    ),
                    data,
                )


def part_list_bytes(table: str, entries: list[PartEntry]) -> bytes:
    """A table's parts.json: its parts in order, with their sizes and digests."""
    content: dict[str, Any] = {
        "table": table,
        "format": f"Parquet ({COMPRESSION}); one part per data file holding readings, in "
        "the input manifest's order; subjects in code order within a part",
        "rows": sum(e.rows for e in entries),
        "parts": [{**asdict(e), "file": Path(e.file).name} for e in entries],
    }
    return (json.dumps(content, indent=1, sort_keys=True) + "\n").encode("utf-8")


def read_part_list(run: Path, table: str) -> list[PartEntry]:
    """The entries of a run's parts.json for ``table`` (ValueError when unreadable)."""
    try:
        content = json.loads((run / part_list_file(table)).read_text("utf-8"))
        return [PartEntry(**{**p, "file": f"tables/{table}/{p['file']}"}) for p in content["parts"]]
    except (OSError, KeyError, TypeError, json.JSONDecodeError) as e:
        raise ValueError(f"{part_list_file(table)} cannot be read: {e}") from e


def _sha256(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()
