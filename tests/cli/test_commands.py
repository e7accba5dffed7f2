"""Every command through its real entry point: exit codes and the key lines printed."""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import jsonschema
import pytest
import yaml

from tests.helpers import ROOT, cli

pytestmark = pytest.mark.slow


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
    assert sorted(r1) == [
        "environment",
        "inputs",
        "outputs",
        "results_sha256",
        "run",
        "spec",
        "tool",
    ]
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


def test_data_refresh_recipe_fails_on_drift(study: Path, tmp_path: Path) -> None:
    # The README's CI recipe: run --against-previous after a data refresh; the new version
    # is written, the comparison printed, and exit 1 when a gate is crossed.
    out = tmp_path / "runs"
    first = cli("run", str(study), "--out", str(out), "--against-previous")
    assert first.returncode == 0, first.stderr
    assert "against previous: this is the first version" in first.stdout
    data = study.parent / "clinic_visits.csv"
    lines = data.read_text().splitlines()
    data.write_text("\n".join(lines[: len(lines) // 2]) + "\n")  # half the readings
    study.write_text(study.read_text().replace("max_mean_change: 0.1", "max_mean_change: 0.0"))
    res = cli("run", str(study), "--out", str(out), "--against-previous")
    assert res.returncode == 1, res.stdout + res.stderr
    assert (out / "clinic-visits" / "v002" / "SHA256SUMS").is_file()
    assert "against previous: v001 -> v002" in res.stdout
    assert "CROSSED" in res.stdout and "(changed)" in res.stdout
    assert "compare: " in res.stdout and "gate crossed: largest mean change" in res.stdout


def test_compare_refuses_runs_of_different_reports(regenerated: dict[str, Path]) -> None:
    # the session's runs of the two examples: other report ids, time and value units
    res = cli("compare", str(regenerated["clinic_visits"]), str(regenerated["pump_service"]))
    assert res.returncode == 2
    assert (
        "cannot be compared: they differ in report ids" in res.stderr
        and "'weeks' and 'months'" in res.stderr
    )


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
    parquet_spec.write_text(
        study.read_text().replace("file: clinic_visits.csv", "file: clinic_visits.parquet")
    )
    res = cli("check", str(parquet_spec))
    assert res.returncode == 0, res.stderr
    assert "160 subjects, 742 readings" in res.stdout


def test_installed_entry_point_keeps_exit_codes_and_output(study: Path) -> None:
    # The console script ends with os._exit after flushing (cli.entry): the exit code and
    # everything printed must survive that.
    import shutil
    import subprocess
    import sys

    exe = shutil.which("reportgen", path=str(Path(sys.executable).parent))
    assert exe is not None
    ok = subprocess.run(
        [exe, "check", study.name], cwd=study.parent, capture_output=True, text=True, timeout=300
    )
    assert ok.returncode == 0 and ok.stdout.rstrip().endswith("spec and data are usable")
    bad = subprocess.run(
        [exe, "check", "missing.yaml"],
        cwd=study.parent,
        capture_output=True,
        text=True,
        timeout=300,
    )
    assert bad.returncode == 2 and "reportgen check: error:" in bad.stderr


def test_the_gate_compares_with_the_latest_completed_version(
    study: Path, tmp_path: Path, regenerated: dict[str, Path], capsys: pytest.CaptureFixture[str]
) -> None:
    # An interrupted run left a hidden .v002.building; the new run is v003, and the gate
    # compares it with v001 (never skipped as if it were the first).
    from reportgen.cli import main

    out = tmp_path / "runs"
    (out / "clinic-visits").mkdir(parents=True)
    shutil.copytree(regenerated["clinic_visits"], out / "clinic-visits" / "v001")
    (out / "clinic-visits" / ".v002.building").mkdir()
    assert main(["run", str(study), "--out", str(out), "--against-previous", "--quiet"]) == 0
    said = capsys.readouterr().out
    assert "against previous: v001 -> v003" in said and "compare: within the gates" in said
