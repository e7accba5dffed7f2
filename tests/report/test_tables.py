"""The canonical CSV writer writes what pandas' own to_csv writes, byte for byte.

Reference: pandas ``DataFrame.to_csv(index=False, float_format="%.10g",
lineterminator="\\n")``, the definition of the canonical tables before the faster writer.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
from hypothesis import given, settings
from hypothesis import strategies as st

from reportgen.report import tables
from reportgen.report.tables import FLOAT_FORMAT, to_csv_bytes

ROOT = Path(__file__).resolve().parents[1]


def _pandas(frame: pd.DataFrame) -> bytes:
    return frame.to_csv(index=False, float_format=FLOAT_FORMAT, lineterminator="\n").encode("utf-8")


TEXT = st.text(alphabet=st.sampled_from(list('ab,"\n\r x;é')), max_size=6)
COLUMN = st.one_of(
    st.lists(st.floats(allow_nan=True, allow_infinity=True), min_size=3, max_size=3),
    st.lists(st.integers(-(10**12), 10**12), min_size=3, max_size=3),
    st.lists(st.booleans(), min_size=3, max_size=3),
    st.lists(st.one_of(TEXT, st.none()), min_size=3, max_size=3),
)


@settings(max_examples=300, deadline=None)
@given(st.lists(st.tuples(TEXT, COLUMN), min_size=1, max_size=4, unique_by=lambda c: c[0]))
def test_any_frame_of_the_usual_kinds(columns: list[tuple[str, list[object]]]) -> None:
    frame = pd.DataFrame({name: values for name, values in columns})
    assert to_csv_bytes(frame) == _pandas(frame)


def test_edge_values_and_extension_kinds() -> None:
    frames = [
        pd.DataFrame({"a": [1.0, np.nan, -0.0, np.inf, -np.inf, 1e-300, 1.234567890123e11]}),
        pd.DataFrame({"s": pd.array(["a", None, "b,c"], dtype="string")}),
        pd.DataFrame({"n": pd.array([1, None, 3], dtype="Int64")}),
        pd.DataFrame({"d": pd.to_datetime(["2024-01-01", None])}),
        pd.DataFrame({"c": pd.Categorical(["x", "y"])}),
        pd.DataFrame({"a": pd.Series([], dtype=float)}),
        pd.DataFrame(),
    ]
    for frame in frames:
        assert to_csv_bytes(frame) == _pandas(frame)


def test_the_committed_tables_are_written_back_identically() -> None:
    for path in sorted((ROOT / "sample_runs").glob("*/v001/tables/*.csv")):
        frame = pd.read_csv(path, keep_default_na=False, na_values=[""])
        assert to_csv_bytes(frame) == _pandas(frame), path.name


@settings(max_examples=100, deadline=None)
@given(
    st.lists(st.tuples(TEXT, COLUMN), min_size=1, max_size=3, unique_by=lambda c: c[0]),
    st.integers(1, 4),
)
def test_rows_written_in_blocks(columns: list[tuple[str, list[object]]], block: int) -> None:
    # three rows in blocks of 1 to 4 rows: every way a block boundary can fall
    frame = pd.DataFrame({name: values for name, values in columns})
    saved = tables.CSV_BLOCK_ROWS
    tables.CSV_BLOCK_ROWS = block
    try:
        assert to_csv_bytes(frame) == _pandas(frame)
    finally:
        tables.CSV_BLOCK_ROWS = saved


def test_cells_a_spreadsheet_would_run_are_written_as_text() -> None:
    # The usual neutralisation (common practice, no source): a text cell starting with =,
    # +, -, @, a tab or a carriage return gets a leading apostrophe; numbers, negative ones
    # included, and other text stay as they are.
    from reportgen.report.tables import canonical_bytes, neutralised

    frame = pd.DataFrame(
        {
            "subject": [
                '=HYPERLINK("http://example.org","x")',
                "=cmd|' /C calc'!A0",
                "+1",
                "@SUM(A1)",
                "-7",
                "\tx",
                "P001",
                None,
            ],
            "value": [-1.5, 2.0, -3.0, 4.0, 5.0, 6.0, 7.0, 8.0],
        }
    )
    out = neutralised(frame)
    assert out.subject.tolist()[:6] == ["'" + s for s in frame.subject.tolist()[:6]]
    assert out.subject.tolist()[6] == "P001" and out.subject.isna().tolist()[7]
    assert out.value.tolist() == frame.value.tolist()
    assert frame.subject.tolist()[0].startswith("=")  # the caller's frame is not changed
    text = canonical_bytes({"t": frame})["tables/t.csv"].decode()
    assert "\n'=cmd|' /C calc'!A0,2\n" in text and "\n'-7,5\n" in text
    assert "\nP001,7\n" in text and "\n'+1,-3\n" in text
