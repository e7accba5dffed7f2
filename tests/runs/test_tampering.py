"""verify: integrity, inputs, numbers and rendering each get a verdict; every kind of
tampering is found and named; an untouched run made without SOURCE_DATE_EPOCH verifies."""

from __future__ import annotations

import json
import shutil
import subprocess
from collections.abc import Callable
from pathlib import Path

import pytest

from reportgen.cli import main
from reportgen.inputs.files import sha256_file
from reportgen.runs.integrity import checksum_list, parse_checksum_list
from reportgen.runs.writer import run_spec

pytestmark = pytest.mark.slow

ROOT = Path(__file__).resolve().parents[2]


@pytest.fixture(scope="module")
def pristine(tmp_path_factory: pytest.TempPathFactory) -> Path:
    # Made WITHOUT SOURCE_DATE_EPOCH: the path a user takes with defaults.
    mp = pytest.MonkeyPatch()
    mp.delenv("SOURCE_DATE_EPOCH", raising=False)
    base = tmp_path_factory.mktemp("tamper")
    for name in ("clinic_visits.yaml", "clinic_visits.csv"):
        shutil.copy(ROOT / "specs" / name, base / name)
    try:
        return run_spec(base / "clinic_visits.yaml", base / "runs")
    finally:
        mp.undo()


def _copy(pristine: Path, name: str) -> Path:
    target = pristine.parent / name  # a sibling, so the recorded spec source still resolves
    shutil.copytree(pristine, target)
    return target


def _flip(path: Path, at: float = 0.5) -> None:
    data = bytearray(path.read_bytes())
    i = int(len(data) * at)
    data[i] = ord("0") if data[i] != ord("0") else ord("1")
    path.write_bytes(bytes(data))


def _verify(capsys: pytest.CaptureFixture[str], *args: str) -> tuple[int, str]:
    code = main(["verify", *args])
    return code, capsys.readouterr().out


def test_untouched_run_verifies_with_and_without_render(
    pristine: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.delenv("SOURCE_DATE_EPOCH", raising=False)
    code, out = _verify(capsys, str(pristine))
    assert code == 0, out[-1500:]
    assert "integrity: ok: all" in out and "inputs: ok" in out
    assert "numbers: ok: re-run gives byte-identical tables" in out
    assert out.rstrip().endswith("verify: everything matches")
    code, out = _verify(capsys, str(pristine), "--render")
    assert code == 0, out[-1500:]
    assert "rendering: ok: HTML, figures and PDF re-render byte-identical" in out


@pytest.mark.skipif(shutil.which("sha256sum") is None, reason="GNU coreutils sha256sum absent")
def test_sha256sum_checks_every_run_without_reportgen(pristine: Path) -> None:
    # Reference: GNU coreutils manual, "md5sum invocation" (sha256sum shares it): with -c the
    # list's "<hex>  <name>" lines are read and each file is checked; exit 0 when all match.
    for run in [pristine, *sorted((ROOT / "sample_runs").glob("*/v*"))]:
        res = subprocess.run(
            ["sha256sum", "--strict", "-c", "SHA256SUMS"], cwd=run, capture_output=True, text=True
        )
        assert res.returncode == 0, (run, res.stdout[-500:], res.stderr[-500:])
        listed, bad = parse_checksum_list((run / "SHA256SUMS").read_bytes())
        assert not bad and "report.pdf" in listed and "record.json" in listed
        files = {p.relative_to(run).as_posix() for p in run.rglob("*") if p.is_file()}
        assert set(listed) == files - {"SHA256SUMS"}


def _input(run: Path) -> None:
    _flip(run.parent.parent.parent / "clinic_visits.csv", 0.7)


def _sums(run: Path) -> None:
    text = (run / "SHA256SUMS").read_text()
    line = next(x for x in text.splitlines() if x.endswith("tables/mean.csv"))
    (run / "SHA256SUMS").write_text(text.replace(line, ("0" if line[0] != "0" else "1") + line[1:]))


@pytest.mark.parametrize(
    ("kind", "tamper", "named"),
    [
        ("table", lambda r: _flip(r / "tables" / "components.csv"), "file tables/components.csv"),
        ("figure", lambda r: _flip(r / "figures" / "mean.svg"), "file figures/mean.svg"),
        ("html", lambda r: _flip(r / "report.html"), "file report.html"),
        ("pdf", lambda r: _flip(r / "report.pdf"), "file report.pdf"),
        ("record", lambda r: _flip(r / "record.json", 0.3), "file record.json"),
        (
            "spec",
            lambda r: (r / "spec.yaml").write_bytes((r / "spec.yaml").read_bytes() + b"#\n"),
            "file spec.yaml",
        ),
        ("sums", _sums, "file SHA256SUMS"),
        ("extra", lambda r: (r / "notes.txt").write_text("x"), "file notes.txt"),
    ],
)
def test_each_kind_of_tampering_is_named(
    pristine: Path,
    capsys: pytest.CaptureFixture[str],
    kind: str,
    tamper: Callable[[Path], None],
    named: str,
) -> None:
    run = _copy(pristine, f"t-{kind}")
    tamper(run)
    code, out = _verify(capsys, str(run))
    assert code == 1, out[-1500:]
    summary = out.split("verify:")[-1]
    assert named in summary, out[-1500:]
    assert "integrity: FAILED" in out


def test_changed_input_is_said_in_words(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    for name in ("clinic_visits.yaml", "clinic_visits.csv"):
        shutil.copy(ROOT / "specs" / name, tmp_path / name)
    run = run_spec(tmp_path / "clinic_visits.yaml", tmp_path / "runs")
    _input(run)
    code, out = _verify(capsys, str(run))
    assert code == 1
    assert "inputs: CHANGED: input files differ from those the run used" in out
    assert "numbers: not checked" in out and "input clinic_visits.csv" in out.split("verify:")[-1]


def test_run_copied_elsewhere_verifies_with_inputs(
    pristine: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # A copy at another depth finds its inputs at the spec's recorded location.
    moved = tmp_path / "audit" / "deeper" / "run"
    shutil.copytree(pristine, moved)
    code, out = _verify(capsys, str(moved))
    assert code == 0 and "inputs found at the spec's recorded location" in out, out[-1500:]
    # Where the inputs cannot be found, verify says it could not check (exit 3: no
    # difference was seen), where it looked, and how to help it.
    record = json.loads((moved / "record.json").read_text())
    record["spec"]["location"] = str(tmp_path / "gone" / "clinic_visits.yaml")
    (moved / "record.json").write_text(json.dumps(record, indent=2) + "\n")
    listed, _ = parse_checksum_list((moved / "SHA256SUMS").read_bytes())
    listed["record.json"] = sha256_file(moved / "record.json")
    (moved / "SHA256SUMS").write_bytes(checksum_list(listed))
    code, out = _verify(capsys, str(moved))
    assert code == 3, out[-1500:]
    assert "COULD NOT CHECK: clinic_visits.csv not found (looked in" in out
    assert str(tmp_path / "gone") in out and "give --inputs DIR" in out
    # Each place says where it comes from: the run's relative path to its spec, taken from
    # a copy at another depth, names a folder the user never chose (it can be the root).
    source = record["spec"]["source"]
    assert f"the run's recorded path {source} taken from {moved}" in out, out[-1500:]
    assert "the spec's recorded location" in out
    code, out = _verify(capsys, str(moved), "--inputs", str(tmp_path / "empty"))
    assert code == 3 and f"{tmp_path / 'empty'}, given as --inputs" in out, out[-1500:]
    assert "check the folder given as --inputs" in out
    data = tmp_path / "handed-over"
    data.mkdir()
    shutil.copy(ROOT / "specs" / "clinic_visits.csv", data / "clinic_visits.csv")
    code, out = _verify(capsys, str(moved), "--inputs", str(data))
    assert code == 0, out[-1500:]


def test_other_environment_explains_rendering_difference(
    pristine: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    run = _copy(pristine, "other-env")
    record = json.loads((run / "record.json").read_text())
    record["environment"]["packages"]["weasyprint"] = "0.0-recorded-elsewhere"
    (run / "record.json").write_text(json.dumps(record, indent=2) + "\n")
    listed, _ = parse_checksum_list((run / "SHA256SUMS").read_bytes())
    listed["record.json"] = sha256_file(run / "record.json")  # a consistent record
    (run / "SHA256SUMS").write_bytes(checksum_list(listed))
    code, out = _verify(capsys, str(run), "--render")
    # The PDF carries the (edited) record, so it re-renders differently; the numbers match.
    assert code == 0, out[-1500:]
    assert "differs only in rendering" in out and "weasyprint 0.0-recorded-elsewhere ->" in out
    code, out = _verify(capsys, str(run), "--render", "--strict")
    assert code == 1 and "re-rendered report.pdf" in out.split("verify:")[-1]


def test_damaged_record_is_reported(pristine: Path, capsys: pytest.CaptureFixture[str]) -> None:
    run = _copy(pristine, "damaged")
    (run / "record.json").write_text("{not json")
    code, out = _verify(capsys, str(run))
    assert code == 1 and "file record.json" in out
    (run / "SHA256SUMS").unlink()
    assert main(["verify", str(run)]) == 2
    err = capsys.readouterr().err
    assert "record.json" in err and "damaged" in err and "Traceback" not in err


def test_a_folder_of_versions_names_its_runs(
    pristine: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # A user who gives the report's folder rather than one version is told which to give.
    shutil.copytree(pristine, tmp_path / "study" / "v001")
    shutil.copytree(pristine, tmp_path / "study" / "v002")
    assert main(["verify", str(tmp_path / "study")]) == 2
    err = capsys.readouterr().err
    assert "holds runs (v001, v002)" in err and str(tmp_path / "study" / "v002") in err, err


def _rehash(run: Path) -> None:
    """SHA256SUMS written again over the run as it now is: what `sha256sum` would write
    (coreutils format), the list a tamperer controls."""
    from reportgen.runs.integrity import run_files

    names = [n for n in run_files(run) if n != "SHA256SUMS"]
    (run / "SHA256SUMS").write_bytes(checksum_list({n: sha256_file(run / n) for n in names}))


def test_an_edit_with_the_checksum_list_written_again_is_caught(pristine: Path) -> None:
    # common practice, no source: a list the tamperer can rewrite proves nothing alone; the
    # hashes record.json lists for the outputs are held against the files as well
    from reportgen.runs.integrity import integrity_findings
    from reportgen.runs.record import load_record

    edits: dict[str, Callable[[Path], None]] = {
        "tables/mean.csv": lambda run: _flip(run / "tables" / "mean.csv", 0.7),
        "report.html": lambda run: _flip(run / "report.html", 0.4),
        "figures/mean.svg": lambda run: _flip(run / "figures" / "mean.svg", 0.6),
        "tables/model.csv": lambda run: _flip(run / "tables" / "model.csv", 0.5),
        "figures/extra.html": lambda run: (run / "figures" / "extra.html").write_text("<p>x"),
    }
    for name, edit in edits.items():
        run = _copy(pristine, f"rehashed-{name.replace('/', '-')}")
        edit(run)
        _rehash(run)
        assert (
            subprocess.run(
                ["sha256sum", "-c", "--quiet", "SHA256SUMS"], cwd=run, capture_output=True
            ).returncode
            == 0
        )  # the list is fooled
        _, found = integrity_findings(run, load_record(run)["outputs"])
        assert [(f.name, f.kind) for f in found] == [
            (name, "extra" if name.endswith("extra.html") else "changed")
        ], found
        assert "record.json" in found[0].detail


def test_a_rewritten_record_and_list_are_caught_by_the_re_run(
    pristine: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # record.json's own count of the data's rows, edited, and the list written again: the
    # re-run reads the data and says the record is wrong (exit 1).
    run = _copy(pristine, "rows-edited")
    record = json.loads((run / "record.json").read_text())
    record["inputs"][0]["rows"] += 1
    (run / "record.json").write_text(json.dumps(record, indent=2))
    _rehash(run)
    code, out = _verify(capsys, str(run), "--quiet")
    assert code == 1
    assert "record.json's count of the data's rows or bytes is not what the data hold" in out


def test_what_a_run_should_not_hold_is_named(pristine: Path) -> None:
    import os

    from reportgen.runs.integrity import integrity_findings
    from reportgen.runs.record import load_record

    run = _copy(pristine, "odd-entries")
    os.mkfifo(run / "figures" / "pipe")
    (run / "tables" / "link.csv").symlink_to(run / "tables" / "mean.csv")
    (run / "figures" / "folder").symlink_to("/etc")
    (run / "empty").mkdir()
    _, found = integrity_findings(run, load_record(run)["outputs"])
    assert {(f.name, f.detail) for f in found} == {
        ("figures/pipe", "a pipe, socket or device"),
        ("tables/link.csv", "a symbolic link"),
        ("figures/folder", "a symbolic link"),
        ("empty", "an empty folder"),
    }


def test_compare_and_predict_refuse_a_run_that_fails_its_integrity_check(
    pristine: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    from reportgen.errors import RecordError
    from reportgen.runs.stored_fit import load_fit

    run = _copy(pristine, "model-shifted")
    _flip(run / "tables" / "model.csv", 0.5)
    _rehash(run)
    assert main(["compare", str(pristine), str(run)]) == 2
    err = capsys.readouterr().err
    assert "fails its integrity check" in err and "tables/model.csv" in err
    with pytest.raises(RecordError, match=r"tables/model\.csv"):
        load_fit(run)


def _forge(run: Path, name: str, data: bytes) -> None:
    """``name`` replaced by ``data`` with every list that vouches for it written again: the
    hash in record.json, a recorded environment that would explain other bytes, SHA256SUMS."""
    (run / name).write_bytes(data)
    record = json.loads((run / "record.json").read_text())
    record["outputs"][name] = sha256_file(run / name)
    record["environment"]["packages"]["weasyprint"] = "0.0-recorded-elsewhere"
    (run / "record.json").write_text(json.dumps(record, indent=2) + "\n")
    _rehash(run)


def test_a_changed_word_is_a_finding_even_where_rendering_may_differ(
    pristine: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # The words of the HTML and the PDF are compared with a re-render, exactly: another
    # environment may explain other bytes, never another word (common practice, no source).
    from reportgen.report.pdf import render_pdf

    html = (pristine / "report.html").read_bytes()
    plain = b"Demonstration appendix on invented data; not a real study."
    assert plain in html
    forged = html.replace(plain, b"APPROVED FOR SUBMISSION.")
    run = _copy(pristine, "approved-html")
    _forge(run, "report.html", forged)
    code, out = _verify(capsys, str(run), "--render")
    assert code == 1, out[-1500:]
    assert "rendering: CHANGED: the text of 1 file(s) differs from a re-render" in out
    assert "note: the text of report.html differs from word" in out  # and where:
    assert "APPROVED FOR SUBMISSION." in out

    run = _copy(pristine, "approved-pdf")  # the HTML untouched, the PDF made from the forgery
    record = json.loads((run / "record.json").read_text())
    pdf = render_pdf(
        forged,
        (run / "spec.yaml").read_bytes(),
        (run / "record.json").read_bytes(),
        str(record["run"]["finished"]),
    )
    _forge(run, "report.pdf", pdf)
    code, out = _verify(capsys, str(run), "--render")
    assert code == 1, out[-1500:]
    assert "differs from a re-render (report.pdf)" in out and "APPROVED" in out


def test_page_furniture_is_not_a_word_that_changed() -> None:
    # The same words on more pages (another font breaks pages elsewhere) are the same text:
    # "page N of M" and the running lines depend on the page count. Reference: pypdf reads
    # the text of PDFs that weasyprint writes here from two page sizes.
    import weasyprint

    from reportgen.runs.rendered_text import first_difference, pdf_words

    body = "".join(f"<p>Paragraph {i} of the appendix, the same words.</p>" for i in range(120))
    style = (
        "<style>@page {{ size: {size}; @bottom-right {{ content: 'page ' counter(page) "
        "' of ' counter(pages) }} @top-right {{ content: 'study-x v001' }} }}</style>"
    )

    def pdf(size: str, extra: str = "") -> bytes:
        html = f"<html><head>{style.format(size=size)}</head><body>{body}{extra}</body></html>"
        return bytes(weasyprint.HTML(string=html).write_pdf())

    a4, a5 = pdf_words(pdf("A4")), pdf_words(pdf("A5"))
    assert a4.running == a5.running == frozenset({"study-x v001"})
    assert first_difference(a4, a5) is None
    changed = pdf_words(pdf("A5", "<p>One more sentence.</p>"))
    assert first_difference(a4, changed) is not None
