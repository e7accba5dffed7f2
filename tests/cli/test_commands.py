"""Every command through its real entry point: exit codes and the key lines printed."""

from __future__ import annotations

import json
from pathlib import Path

import jsonschema
import yaml

from .conftest import ROOT, cli


def test_run_twice_is_reproducible_and_verify_passes(study: Path, tmp_path: Path) -> None:
    out = tmp_path / "runs"
    first = cli("run", str(study), "--out", str(out))
    assert first.returncode == 0, first.stderr
    assert "run written:" in first.stdout
    second = cli("run", str(study), "--out", str(out))
    assert second.returncode == 0, second.stderr
    v1, v2 = out / "clinic-visits" / "v001", out / "clinic-visits" / "v002"
    r1 = json.loads((v1 / "record.json").read_text())
    r2 = json.loads((v2 / "record.json").read_text())
    assert r1["results_sha256"] == r2["results_sha256"]
    assert r1["run"]["version"] == 1 and r2["run"]["version"] == 2
    for table in sorted((v1 / "tables").iterdir()):
        assert table.read_bytes() == (v2 / "tables" / table.name).read_bytes(), table.name
    assert sorted(r1) == ["environment", "inputs", "outputs", "results_sha256", "run", "spec",
                          "tool"]
    assert r1["spec"]["settings"]["n_components"] >= 1
    assert r1["inputs"][0]["path"] == "clinic_visits.csv"
    verify = cli("verify", str(v1))
    assert verify.returncode == 0, verify.stdout + verify.stderr
    assert "verify: everything matches" in verify.stdout
    compare = cli("compare", str(v1), str(v2))
    assert compare.returncode == 0, compare.stdout
    assert "compare: within the gates" in compare.stdout
    assert "eigenfunction 1 similarity" in compare.stdout


def _run(study: Path, out: Path) -> Path:
    result = cli("run", str(study), "--out", str(out))
    assert result.returncode == 0, result.stderr
    return out / "clinic-visits" / "v001"


def test_verify_names_each_kind_of_tampering(study: Path, tmp_path: Path) -> None:
    run = _run(study, tmp_path / "runs")
    table = run / "tables" / "mean.csv"
    original = table.read_bytes()
    table.write_bytes(original.replace(b"1", b"2", 1))
    res = cli("verify", str(run))
    assert res.returncode == 1 and "file tables/mean.csv" in res.stdout.split("verify:")[-1]
    table.write_bytes(original)

    spec_copy = run / "spec.yaml"
    spec_bytes = spec_copy.read_bytes()
    spec_copy.write_bytes(spec_bytes + b"\n# edited\n")
    res = cli("verify", str(run))
    assert res.returncode == 1 and "spec sha256" in res.stdout.split("verify:")[-1]
    spec_copy.write_bytes(spec_bytes)

    data = study.parent / "clinic_visits.csv"
    data_bytes = data.read_bytes()
    data.write_bytes(data_bytes.replace(b"44.91", b"44.92"))
    res = cli("verify", str(run))
    assert res.returncode == 1
    assert "input clinic_visits.csv" in res.stdout.split("verify:")[-1]
    data.write_bytes(data_bytes)

    (run / "record.json").write_text("{not json")
    res = cli("verify", str(run))
    assert res.returncode == 2 and "record.json" in res.stderr and "damaged" in res.stderr


def test_compare_gate_crossed(study: Path, tmp_path: Path) -> None:
    out = tmp_path / "runs"
    first = _run(study, out)
    data = study.parent / "clinic_visits.csv"
    lines = data.read_text().splitlines()
    data.write_text("\n".join(lines[: len(lines) // 2]) + "\n")  # half the readings
    text = study.read_text().replace("max_mean_change: 0.1", "max_mean_change: 0.0")
    study.write_text(text)
    assert cli("run", str(study), "--out", str(out)).returncode == 0
    res = cli("compare", str(first), str(out / "clinic-visits" / "v002"))
    assert res.returncode == 1
    assert "CROSSED" in res.stdout and "largest mean change" in res.stdout
    assert "(changed)" in res.stdout


def test_check_init_and_schema(study: Path, tmp_path: Path) -> None:
    res = cli("check", str(study))
    assert res.returncode == 0
    assert "check: spec and data are usable" in res.stdout
    assert res.stdout.splitlines()[0].startswith("columns present")
    starter = tmp_path / "starter.yaml"
    res = cli("init", str(study.parent / "clinic_visits.csv"), str(starter))
    assert res.returncode == 0 and starter.is_file()
    assert cli("check", str(starter)).returncode == 0
    assert cli("init", str(study.parent / "clinic_visits.csv"), str(starter)).returncode == 2
    res = cli("schema")
    schema = json.loads(res.stdout)
    # Reference: the general-purpose jsonschema validator checks every example spec.
    for spec in sorted((ROOT / "specs").glob("*.yaml")):
        jsonschema.Draft202012Validator(schema).validate(yaml.safe_load(spec.read_text()))
    jsonschema.Draft202012Validator(schema).validate(yaml.safe_load(starter.read_text()))


def test_demo_prints_where_the_report_is(tmp_path: Path) -> None:
    res = cli("demo", "--out", str(tmp_path / "runs"))
    assert res.returncode == 0, res.stderr
    html = res.stdout.splitlines()[0].removeprefix("demo report: ")
    pdf = res.stdout.splitlines()[1].removeprefix("demo pdf: ")
    assert Path(html).is_file() and Path(pdf).is_file()
    assert html.endswith("clinic-visits/v001/report.html")


def test_parquet_data_file(study: Path) -> None:
    import pandas as pd

    frame = pd.read_csv(study.parent / "clinic_visits.csv")
    frame.to_parquet(study.parent / "clinic_visits.parquet")
    parquet_spec = study.parent / "parquet.yaml"
    parquet_spec.write_text(study.read_text().replace("file: clinic_visits.csv",
                                                      "file: clinic_visits.parquet"))
    res = cli("check", str(parquet_spec))
    assert res.returncode == 0, res.stderr
    assert "160 subjects, 742 readings" in res.stdout
