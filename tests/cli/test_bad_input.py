"""A catalogue of bad specs and bad data: exit code 2, a message naming the field or row,
no traceback and no run directory left behind."""

from __future__ import annotations

from pathlib import Path

import pytest

from reportgen.cli import main

BASE = """\
report:
  id: bad-case
  title: "Bad input"
data:
  file: d.csv
  subject: id
  time: t
  value: y
checks:
  min_subjects: 2
"""

GOOD_DATA = "id,t,y\n" + "".join(
    f"s{i},{t},{(i % 5) + t * 0.1 + (t * i % 3) * 0.2}\n" for i in range(30) for t in (0, 2, 5, 9)
)

# (name, spec text or None for BASE, data text or None for GOOD_DATA, expected fragment)
CASES = [
    ("top-level unknown key", BASE + "modle: {}\n", None, "did you mean 'model'"),
    (
        "model unknown key",
        BASE + "model:\n  mean_bandwith: 1\n",
        None,
        "did you mean 'mean_bandwidth'",
    ),
    (
        "negative bandwidth",
        BASE + "model:\n  mean_bandwidth: -1\n",
        None,
        'model.mean_bandwidth must be a number > 0 (at most 1e15) or "auto"; got -1.',
    ),
    (
        "text bandwidth",
        BASE + "model:\n  covariance_bandwidth: fast\n",
        None,
        "model.covariance_bandwidth must be",
    ),
    (
        "unknown rule",
        BASE + "model:\n  component_rule: elbow\n",
        None,
        "model.component_rule must be one of fve, aic, bic, cv, fixed; got 'elbow'",
    ),
    ("fixed without n", BASE + "model:\n  component_rule: fixed\n", None, "model.n_components"),
    ("bad id", BASE.replace("bad-case", "bad case"), None, "report.id must be"),
    ("missing title", BASE.replace('  title: "Bad input"\n', ""), None, "report.title is required"),
    ("missing data file key", BASE.replace("  file: d.csv\n", ""), None, "data.file is required"),
    (
        "band level",
        BASE.replace('  title: "Bad input"\n', '  title: "Bad input"\n  band_level: 1.5\n'),
        None,
        "report.band_level must be",
    ),
    ("zero factor", BASE + "sensitivity:\n  factors: [0]\n", None, "sensitivity.factors[0]"),
    ("reversed domain", BASE + "  domain: [5, 1]\n", None, "checks.domain"),
    ("wrong type n_grid", BASE + "model:\n  n_grid: 10.5\n", None, "model.n_grid must be"),
    ("list instead of mapping", "- a\n- b\n", None, "must be a YAML mapping"),
    ("invalid yaml", "report: [unclosed\n", None, "not valid YAML at line"),
    ("yaml alias", BASE + "gates: &g {}\nsubjects: *g\n", None, "anchors"),
    (
        "python tag",
        BASE + "extra: !!python/object/apply:os.system ['true']\n",
        None,
        "not valid YAML",
    ),
    # an unquoted date is read as its ISO text (YAML would make it a date object)
    (
        "unquoted date",
        BASE.replace('title: "Bad input"', 'title: "Bad input"\n  band_level: 2024-01-31'),
        None,
        "report.band_level must be a number between 0 and 1 (exclusive); got '2024-01-31'",
    ),
    (
        "missing data file",
        BASE.replace("d.csv", "nope.csv"),
        None,
        "data.file 'nope.csv' does not exist",
    ),
    (
        "directory as data",
        BASE.replace("d.csv", "."),
        None,
        "is a folder with no Parquet files in it",
    ),
    ("device as data", BASE.replace("d.csv", "/dev/null"), None, "not a regular file"),
    ("empty data", None, "", "is empty"),
    ("header only", None, "id,t,y\n", "no rows"),
    ("missing column", None, "id,t,z\na,1,2\n", "column(s) 'y' not found"),
    (
        "text in time",
        None,
        GOOD_DATA + "s1,soon,3\n",
        "time value(s) are not numbers, first at row 122",
    ),
    (
        "all nan values",
        None,
        "id,t,y\n" + "".join(f"s{i},{i},\n" for i in range(20)),
        "missing values",
    ),
    (
        "one subject",
        None,
        "id,t,y\n" + "".join(f"a,{i},{i}\n" for i in range(9)),
        "enough subjects: 1 subjects",
    ),
    (
        "duplicates fail",
        BASE + "  duplicates: fail\n",
        GOOD_DATA + "s1,0,7\n",
        "duplicate readings",
    ),
    (
        "log of negatives",
        BASE.replace("  value: y\n", "  value: y\n  transform: log\n"),
        GOOD_DATA + "s1,3,-2\n",
        "zero or negative",
    ),
    (
        "out of range fail",
        BASE + "  value_range: [0, 1]\n  out_of_range: fail\n",
        None,
        "values outside [0, 1]",
    ),
    ("times outside domain", BASE + "  domain: [0, 5]\n", None, "outside [0, 5]"),
    (
        "shown subject not in the data",
        BASE + "subjects:\n  show: [s1, nobody, s2]\n",
        None,
        "subjects.show names subjects not in the data: ['nobody']",
    ),
    (
        "every trajectory with the corrected band",
        BASE + "model:\n  band: corrected\nsubjects:\n  all_trajectories: true\n",
        None,
        "subjects.all_trajectories writes every subject's trajectory with the plug-in band",
    ),
    (
        "single readings only",
        None,
        "id,t,y\n" + "".join(f"s{i},{i},{i}\n" for i in range(20)),
        "have two or more",
    ),
]


@pytest.mark.parametrize(
    ("name", "spec_text", "data_text", "expected"), CASES, ids=[c[0] for c in CASES]
)
def test_bad_input(
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
    name: str,
    spec_text: str | None,
    data_text: str | None,
    expected: str,
) -> None:
    spec = tmp_path / "spec.yaml"
    spec.write_text(BASE if spec_text is None else spec_text)
    (tmp_path / "d.csv").write_text(GOOD_DATA if data_text is None else data_text)
    out = tmp_path / "runs"
    code = main(["run", str(spec), "--out", str(out)])
    err = capsys.readouterr().err
    assert code == 2, err
    assert expected in err, err
    assert "Traceback" not in err
    assert not any(p.name.startswith("v") for p in out.rglob("*")), "a run version was left"


def test_catalogue_is_large_enough() -> None:
    assert len(CASES) >= 25


def test_missing_spec_and_directory_spec(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    assert main(["check", str(tmp_path / "none.yaml")]) == 2
    assert "does not exist" in capsys.readouterr().err
    assert main(["check", str(tmp_path)]) == 2
    assert "not a regular file" in capsys.readouterr().err
