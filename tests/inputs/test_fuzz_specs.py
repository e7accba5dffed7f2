"""Property-based fuzzing of the spec loader and `reportgen check`.

The only outcomes allowed are success (exit 0) or a clear error (exit 2): never a
traceback, a hang or a run directory.
"""

from __future__ import annotations

import copy
import shutil
from pathlib import Path
from typing import Any

import pytest
import yaml
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from reportgen.cli import main

ROOT = Path(__file__).resolve().parents[2]
BASE_SPEC = yaml.safe_load((ROOT / "specs" / "clinic_visits.yaml").read_text())

scalars = st.one_of(
    st.none(),
    st.booleans(),
    st.integers(-(10**6), 10**6),
    st.floats(allow_nan=True, allow_infinity=True),
    st.text(max_size=30),
)
documents = st.recursive(
    scalars,
    lambda inner: st.one_of(
        st.lists(inner, max_size=4), st.dictionaries(st.text(max_size=12), inner, max_size=4)
    ),
    max_leaves=20,
)

FUZZ = settings(
    max_examples=60,
    deadline=None,
    suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow],
)


@pytest.fixture
def workdir(tmp_path: Path) -> Path:
    shutil.copy(ROOT / "specs" / "clinic_visits.csv", tmp_path / "clinic_visits.csv")
    return tmp_path


def _check(workdir: Path, text: str | bytes, capsys: pytest.CaptureFixture[str]) -> None:
    spec = workdir / "fuzz.yaml"
    spec.write_bytes(text if isinstance(text, bytes) else text.encode("utf-8", "surrogatepass"))
    code = main(["check", str(spec)])
    captured = capsys.readouterr()
    assert code in (0, 2), captured
    assert "Traceback" not in captured.err + captured.out
    if code == 2:
        assert captured.err.startswith("reportgen check: error:") and len(captured.err) < 4000
    assert not any(p.name.startswith(("v0", ".v0")) for p in workdir.rglob("*"))


@FUZZ
@given(doc=documents)
def test_random_yaml_documents(workdir: Path, capsys: pytest.CaptureFixture[str], doc: Any) -> None:
    _check(workdir, yaml.safe_dump(doc, allow_unicode=True), capsys)


@FUZZ
@given(raw=st.binary(max_size=200))
def test_random_bytes(workdir: Path, capsys: pytest.CaptureFixture[str], raw: bytes) -> None:
    _check(workdir, raw, capsys)


def _paths(doc: Any, prefix: tuple[Any, ...] = ()) -> list[tuple[Any, ...]]:
    out = [prefix]
    if isinstance(doc, dict):
        for k, v in doc.items():
            out += _paths(v, (*prefix, k))
    elif isinstance(doc, list):
        for i, v in enumerate(doc):
            out += _paths(v, (*prefix, i))
    return out


@FUZZ
@given(data=st.data())
def test_mutations_of_the_example_spec(
    workdir: Path, capsys: pytest.CaptureFixture[str], data: st.DataObject
) -> None:
    doc = copy.deepcopy(BASE_SPEC)
    for _ in range(data.draw(st.integers(1, 3))):
        paths = [p for p in _paths(doc) if p]
        if not paths:
            break
        path = data.draw(st.sampled_from(paths))
        parent = doc
        for key in path[:-1]:
            parent = parent[key]
        action = data.draw(st.sampled_from(["delete", "replace", "add"]))
        if action == "delete":
            del parent[path[-1]]
        elif action == "replace":
            parent[path[-1]] = data.draw(documents)
        elif isinstance(parent, dict):
            parent[data.draw(st.text(max_size=12))] = data.draw(scalars)
    _check(workdir, yaml.safe_dump(doc, allow_unicode=True), capsys)
