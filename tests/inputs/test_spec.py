"""What a spec may not say, refused with one line that names where and why (common
practice, no source): a key given twice, a number that is not finite or too large to mean
a bandwidth, text holding a NUL character. Before, the first three slipped through (the
second key silently won; inf reached the record as JSON's non-standard Infinity) and the
last ended in a traceback."""

from __future__ import annotations

from pathlib import Path

import pytest

from reportgen.cli import main
from reportgen.errors import SpecError
from reportgen.inputs.spec import spec_from_bytes

BASE = "report: {id: a, title: b}\ndata: {file: x.csv, subject: s, time: t, value: v}\n"


@pytest.mark.parametrize(
    ("text", "message"),
    [
        (
            BASE + "report: {id: c, title: d}\n",
            "line 3: the key 'report' is given twice in one mapping (first at line 1)",
        ),
        (
            "report:\n  id: a\n  title: b\n  title: c\ndata: {file: x.csv, subject: s, time: t, "
            "value: v}\n",
            "line 4: the key 'title' is given twice in one mapping (first at line 3)",
        ),
        (
            BASE + "checks: {domain: [-.inf, 104]}\n",
            "checks.domain[0] must be a finite number; got -inf.",
        ),
        (BASE + "model: {mean_bandwidth: .inf}\n", "model.mean_bandwidth must be a finite number"),
        (
            BASE + "model: {mean_bandwidth: 1.0e+308}\n",
            'model.mean_bandwidth must be a number > 0 (at most 1e15) or "auto"; got 1e+308.',
        ),
        (
            'report: {id: a, title: b}\ndata: {file: "a\\0b.csv", subject: s, time: t, value: v}\n',
            "data.file contains a NUL character",
        ),
    ],
)
def test_what_a_spec_may_not_say(
    text: str, message: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    with pytest.raises(SpecError) as refused:
        spec_from_bytes(text.encode(), tmp_path / "s.yaml")
    assert message in str(refused.value)
    (tmp_path / "s.yaml").write_text(text)
    assert main(["check", str(tmp_path / "s.yaml")]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and message in err and "Traceback" not in err
