"""verify catches every kind of tampering and names it; a damaged record is reported."""

from __future__ import annotations

import json
import shutil
from collections.abc import Callable
from pathlib import Path

import pytest

from reportgen.cli import main
from reportgen.runner import run_spec

ROOT = Path(__file__).resolve().parents[2]


@pytest.fixture(scope="module")
def pristine(tmp_path_factory: pytest.TempPathFactory) -> Path:
    base = tmp_path_factory.mktemp("tamper")
    for name in ("clinic_visits.yaml", "clinic_visits.csv"):
        shutil.copy(ROOT / "specs" / name, base / name)
    return run_spec(base / "clinic_visits.yaml", base / "runs")


def _copy(pristine: Path, name: str) -> Path:
    target = pristine.parent / name  # a sibling, so the recorded spec source still resolves
    shutil.copytree(pristine, target)
    return target


def _edit_bytes(path: Path, old: bytes, new: bytes) -> None:
    data = path.read_bytes()
    assert old in data
    path.write_bytes(data.replace(old, new, 1))


def _figure(run: Path) -> None:
    _edit_bytes(run / "figures" / "mean.svg", b"<g ", b"<g data-x='1' ")


def _pdf(run: Path) -> None:
    data = bytearray((run / "report.pdf").read_bytes())
    data[len(data) // 2] ^= 0xFF
    (run / "report.pdf").write_bytes(bytes(data))


def _record_value(run: Path) -> None:
    record = json.loads((run / "record.json").read_text())
    record["results_sha256"] = "0" * 64
    (run / "record.json").write_text(json.dumps(record, indent=2))


@pytest.mark.parametrize(("name", "tamper", "named"), [
    ("figure", _figure, "file figures/mean.svg"),
    ("pdf", _pdf, "file report.pdf"),
    ("record value", _record_value, "results sha256"),
])
def test_verify_names_the_tampered_item(pristine: Path, capsys: pytest.CaptureFixture[str],
                                        name: str, tamper: Callable[[Path], None],
                                        named: str) -> None:
    run = _copy(pristine, f"v9{len(name)}")
    tamper(run)
    assert main(["verify", str(run)]) == 1
    out = capsys.readouterr().out
    assert named in out.split("verify:")[-1], out[-600:]


@pytest.mark.parametrize(("damage", "message"), [
    (lambda r: r.pop("outputs"), "missing key(s) outputs"),
    (lambda r: r.update(outputs=["a"]), "wrong structure"),
    (lambda r: r["run"].pop("version"), "wrong structure"),
    (lambda r: r.update(inputs=[{"path": 3}]), "wrong structure"),
])
def test_damaged_record_structure_is_reported(pristine: Path,
                                              capsys: pytest.CaptureFixture[str],
                                              damage: Callable[[dict], object],
                                              message: str) -> None:
    run = _copy(pristine, f"damaged-{abs(hash(message)) % 10**6}-{id(damage) % 10**6}")
    record = json.loads((run / "record.json").read_text())
    damage(record)
    (run / "record.json").write_text(json.dumps(record))
    assert main(["verify", str(run)]) == 2
    err = capsys.readouterr().err
    assert "record.json is damaged" in err and message in err and "Traceback" not in err


def test_verify_passes_on_the_untouched_run(pristine: Path,
                                            capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["verify", str(pristine)]) == 0
    assert "verify: everything matches" in capsys.readouterr().out
