"""Hostile specs: object tags, alias bombs, huge strings, markup everywhere, devices,
and values that look like URLs or paths, which must never be fetched."""

from __future__ import annotations

import shutil
import threading
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path

import pytest

from reportgen.cli import main
from reportgen.inputs.spec import load_spec
from reportgen.report.pdf import render_pdf
from reportgen.runs.writer import build_outputs

pytestmark = pytest.mark.render

ROOT = Path(__file__).resolve().parents[2]
SPEC = (ROOT / "specs" / "clinic_visits.yaml").read_text()


@pytest.fixture
def workdir(tmp_path: Path) -> Path:
    shutil.copy(ROOT / "specs" / "clinic_visits.csv", tmp_path / "clinic_visits.csv")
    return tmp_path


def _run(workdir: Path, text: str, capsys: pytest.CaptureFixture[str]) -> tuple[int, str]:
    (workdir / "s.yaml").write_text(text)
    code = main(["run", str(workdir / "s.yaml"), "--out", str(workdir / "runs")])
    err = capsys.readouterr().err
    assert "Traceback" not in err
    return code, err


def test_object_constructing_tags_are_refused(
    workdir: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    marker = workdir / "pwned"
    for tag in (
        "!!python/object/apply:os.system",
        "!!python/object/new:os.system",
        "!!python/name:os.system",
    ):
        code, err = _run(workdir, SPEC + f"extra: {tag} ['touch {marker}']\n", capsys)
        assert code == 2 and "not valid YAML" in err
    assert not marker.exists()


def test_alias_bomb_is_refused_quickly(workdir: Path, capsys: pytest.CaptureFixture[str]) -> None:
    bomb = "a: &a [x, x, x, x, x, x, x, x, x]\n" + "".join(
        f"{c}: &{c} [*{p}, *{p}, *{p}, *{p}, *{p}, *{p}, *{p}, *{p}, *{p}]\n"
        for p, c in zip("abcdefgh", "bcdefghi", strict=True)
    )
    code, err = _run(workdir, bomb, capsys)
    assert code == 2 and ("anchors" in err or "aliases" in err)


def test_very_long_strings(workdir: Path, capsys: pytest.CaptureFixture[str]) -> None:
    long_title = SPEC.replace(
        "Marker trajectories after enrolment (fictional cohort)", "x" * 100_000
    )
    code, err = _run(workdir, long_title, capsys)
    assert code == 2 and "report.title must be a text of 1 to 300 characters" in err
    assert len(err) < 1000  # the value is shortened in the message
    code, err = _run(workdir, SPEC + "# " + "y" * 2_000_000 + "\n", capsys)
    assert code == 2 and "a spec may be at most" in err


@pytest.mark.parametrize("device", ["/dev/zero", "/dev/urandom", "/dev/stdin"])
def test_devices_as_data_are_refused(
    workdir: Path, capsys: pytest.CaptureFixture[str], device: str
) -> None:
    code, err = _run(workdir, SPEC.replace("file: clinic_visits.csv", f"file: {device}"), capsys)
    assert code == 2 and "not a regular file" in err


def test_markup_in_every_free_text_field_is_inert(workdir: Path) -> None:
    evil = "<script>alert(1)</script><img src=x onerror=alert(2)>"
    text = (
        SPEC.replace(
            "Marker trajectories after enrolment (fictional cohort)", evil.replace('"', "'")
        )
        .replace('["Example Analyst"]', f'["{evil}"]')
        .replace('"Demonstration appendix on invented data; not a real study."', f'"{evil}"')
        .replace("time_unit: weeks", f"time_unit: '{evil[:40]}'")
        .replace("value_unit: units", "value_unit: '<b>u</b>'")
        .replace("subject: patient", "subject: '<i>patient</i>'")
    )
    data = (workdir / "clinic_visits.csv").read_text()
    data = data.replace("patient,", "<i>patient</i>,", 1).replace("P004,", "<script>P4,")
    (workdir / "clinic_visits.csv").write_text(data)
    (workdir / "s.yaml").write_text(text)
    built = build_outputs(load_spec(workdir / "s.yaml"), 1, "2026-01-01T00:00:00Z")
    html = built.files["report.html"].decode()
    for raw in ("<script", "<img", "<i>", "<b>u", "onerror=alert(2)>"):
        assert raw not in html, raw
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in html
    assert "&lt;i&gt;patient&lt;/i&gt;" in html


class _Counter:
    def __init__(self) -> None:
        self.requests: list[str] = []
        counter = self

        class Handler(BaseHTTPRequestHandler):
            def do_GET(self) -> None:
                counter.requests.append(self.path)
                self.send_error(404)

            def log_message(self, *args: object) -> None:
                pass

        self.server = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
        self.port = self.server.server_address[1]
        threading.Thread(target=self.server.serve_forever, daemon=True).start()

    def close(self) -> None:
        self.server.shutdown()
        self.server.server_close()


def test_url_and_path_values_are_never_fetched(
    workdir: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    counter = _Counter()
    secret = workdir / "secret.txt"
    secret.write_text("do not read me")
    url = f"http://127.0.0.1:{counter.port}"
    try:
        # A spec whose free text and data path look like URLs and file paths.
        text = SPEC.replace(
            "Marker trajectories after enrolment (fictional cohort)", f"{url}/title.png"
        ).replace(
            '"Demonstration appendix on invented data; not a real study."',
            f'"file://{secret} {url}/describe"',
        )
        code, _ = _run(workdir, text, capsys)
        assert code == 0
        html = next((workdir / "runs").rglob("report.html")).read_text()
        assert "do not read me" not in html
        code, err = _run(
            workdir, SPEC.replace("file: clinic_visits.csv", f"file: {url}/data.csv"), capsys
        )
        assert code == 2 and "does not exist" in err
        # The renderer itself refuses: markup that would load resources is not fetched.
        hostile = (
            f'<html><head><link rel="stylesheet" href="{url}/a.css">'
            f'<link rel="stylesheet" href="file://{secret}"></head><body>'
            f'<img src="{url}/b.png"><img src="file://{secret}">'
            f'<p style="background: url({url}/c.png)">x</p></body></html>'
        )
        pdf = render_pdf(hostile.encode(), b"a: 1\n", b"{}\n", "2025-01-01T00:00:00Z")
        assert pdf.startswith(b"%PDF") and b"do not read me" not in pdf
    finally:
        counter.close()
    assert counter.requests == []
