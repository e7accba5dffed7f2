"""Commands that fit nothing load nothing numerical: they answer at interpreter speed."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

from .conftest import ROOT

HEAVY = ("numba", "scipy", "matplotlib", "weasyprint", "reportgen.fpca.fit")
PROBE = """
import json, sys
from reportgen.cli import main
code = main(sys.argv[1:])
print(json.dumps({"code": code, "loaded": sorted(m for m in HEAVY if m in sys.modules)}))
""".replace("HEAVY", repr(HEAVY))


def _loaded(*args: str, cwd: Path) -> dict[str, object]:
    out = subprocess.run([sys.executable, "-c", PROBE, *args], cwd=cwd, capture_output=True,
                         text=True, timeout=300)
    return json.loads(out.stdout.strip().splitlines()[-1])


@pytest.mark.parametrize("args", [
    ("schema",),
    ("check", "clinic_visits.yaml"),
    ("compare", "RUN", "RUN"),
    ("init", "clinic_visits.csv", "new.yaml"),
])
def test_light_commands_import_no_numerical_library(args: tuple[str, ...], study: Path) -> None:
    # The module list of the interpreter itself (sys.modules) after the command ran.
    run = ROOT / "sample_runs" / "clinic-visits" / "v001"
    argv = [str(run) if a == "RUN" else a for a in args]
    result = _loaded(*argv, cwd=study.parent)
    assert result == {"code": 0, "loaded": []}
