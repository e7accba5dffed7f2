"""Commands that fit nothing load nothing numerical: they answer at interpreter speed."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

from tests.helpers import ROOT

HEAVY = ("numba", "scipy", "matplotlib", "weasyprint", "reportgen.fpca.fit")
PROBE = """
import json, sys
from reportgen.cli import main
code = main(sys.argv[1:])
print(json.dumps({"code": code, "loaded": sorted(m for m in HEAVY if m in sys.modules)}))
""".replace("HEAVY", repr(HEAVY))


def _loaded(*args: str, cwd: Path) -> dict[str, object]:
    out = subprocess.run(
        [sys.executable, "-c", PROBE, *args], cwd=cwd, capture_output=True, text=True, timeout=300
    )
    return json.loads(out.stdout.strip().splitlines()[-1])


@pytest.mark.parametrize(
    "args",
    [
        ("schema",),
        ("check", "clinic_visits.yaml"),
        ("compare", "RUN", "RUN"),
        ("init", "clinic_visits.csv", "new.yaml"),
    ],
)
def test_light_commands_import_no_numerical_library(args: tuple[str, ...], study: Path) -> None:
    # The module list of the interpreter itself (sys.modules) after the command ran.
    run = ROOT / "sample_runs" / "clinic-visits" / "v001"
    argv = [str(run) if a == "RUN" else a for a in args]
    result = _loaded(*argv, cwd=study.parent)
    assert result == {"code": 0, "loaded": []}


def test_checking_a_folder_of_files_imports_no_numerical_library(tmp_path: Path) -> None:
    # The files are read and checked as passes over files; nothing is fitted.
    import pandas as pd

    data = pd.read_csv(ROOT / "specs" / "clinic_visits.csv", dtype={"patient": str})
    (tmp_path / "readings").mkdir()
    for k, part in data.groupby(data.patient.str[-1]):
        part.to_parquet(tmp_path / "readings" / f"part-{k}.parquet", index=False)
    (tmp_path / "folder.yaml").write_text(
        (ROOT / "specs" / "clinic_visits.yaml")
        .read_text()
        .replace("file: clinic_visits.csv", "file: readings")
    )
    assert _loaded("check", "folder.yaml", cwd=tmp_path) == {"code": 0, "loaded": []}
