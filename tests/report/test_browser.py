"""Headless Chromium loads the report, makes no network request and logs no error.

Every request of the browser goes through a local logging proxy (loopback included), so
any fetch the page triggers is seen. The page is served by the same local server. Chromium
itself calls home (clock, updates, accounts) even with background networking disabled;
those requests carry no Referer and go to its own service domains, and are set aside.
"""

from __future__ import annotations

import shutil
import subprocess
import tempfile
import threading
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path
from urllib.parse import urlsplit

import pytest

pytestmark = pytest.mark.render

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")
BROWSER_SERVICES = (".google.com", ".googleapis.com", ".gvt1.com", ".gstatic.com")


def _is_browser_service(request: str) -> bool:
    """A request of Chromium's own: no Referer, to one of its service domains."""
    _, target, *rest = request.split(" ")
    referer = rest[0].removeprefix("referer=") if rest else ""
    host = (urlsplit(target).hostname if "://" in target else target.split(":")[0]) or ""
    return not referer and host.endswith(BROWSER_SERVICES)


def _server(page: bytes, seen: list[str]) -> ThreadingHTTPServer:
    class Handler(BaseHTTPRequestHandler):
        def do_GET(self) -> None:
            seen.append(f"GET {self.path} referer={self.headers.get('Referer', '')}")
            if urlsplit(self.path).path == "/report.html":
                self.send_response(200)
                self.send_header("Content-Type", "text/html; charset=utf-8")
                self.send_header("Content-Length", str(len(page)))
                self.end_headers()
                self.wfile.write(page)
            else:
                self.send_error(404)

        def do_CONNECT(self) -> None:
            seen.append(f"CONNECT {self.path}")
            self.send_error(403)

        def log_message(self, *args: object) -> None:
            pass

    server = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
    threading.Thread(target=server.serve_forever, daemon=True).start()
    return server


@pytest.mark.skipif(
    CHROMIUM is None,
    reason="chromium is not installed (.ci/run installs the "
    "Debian package; locally: apt-get install chromium)",
)
@pytest.mark.parametrize("style", ["run", "default", "journal", "submission"])
def test_report_loads_offline_without_errors(
    regenerated: dict[str, Path],
    styled: dict[tuple[str, str], tuple[bytes, bytes]],
    tmp_path: Path,
    style: str,
) -> None:
    # "run": the committed example as run; the others: each shipped style
    page = (
        (regenerated["clinic_visits"] / "report.html").read_bytes()
        if style == "run"
        else styled[("clinic_visits", style)][0]
    )
    seen: list[str] = []
    server = _server(page, seen)
    port = server.server_address[1]
    shot = tmp_path / "report.png"
    try:
        with tempfile.TemporaryDirectory() as profile:
            proc = subprocess.run(
                [
                    str(CHROMIUM),
                    "--headless",
                    "--no-sandbox",
                    "--disable-gpu",
                    "--disable-quic",
                    "--no-first-run",
                    "--disable-background-networking",
                    "--disable-component-update",
                    "--disable-sync",
                    f"--user-data-dir={profile}",
                    f"--proxy-server=http://127.0.0.1:{port}",
                    "--proxy-bypass-list=<-loopback>",
                    "--enable-logging=stderr",
                    "--v=0",
                    "--window-size=1000,3000",
                    f"--screenshot={shot}",
                    f"http://127.0.0.1:{port}/report.html",
                ],
                capture_output=True,
                text=True,
                timeout=180,
            )
    finally:
        server.shutdown()
        server.server_close()
    assert shot.is_file() and shot.stat().st_size > 50_000, proc.stderr[-2000:]
    page_requests = [r for r in seen if "favicon.ico" not in r and not _is_browser_service(r)]
    assert len(page_requests) == 1 and "/report.html referer=" in page_requests[0], seen
    console = [line for line in proc.stderr.splitlines() if ":CONSOLE(" in line]
    assert console == [], console
