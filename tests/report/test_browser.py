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


def _load(page: bytes, tmp_path: Path) -> tuple[list[str], str, Path]:
    """Chromium loads ``page`` through the logging proxy: (requests seen, the browser's
    log, the screenshot)."""
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
    return (
        [r for r in seen if "favicon.ico" not in r and not _is_browser_service(r)],
        proc.stderr,
        shot,
    )


needs_chromium = pytest.mark.skipif(
    CHROMIUM is None,
    reason="chromium is not installed (.ci/run installs the "
    "Debian package; locally: apt-get install chromium)",
)


@needs_chromium
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
    requests, log, shot = _load(page, tmp_path)
    assert shot.is_file() and shot.stat().st_size > 50_000, log[-2000:]
    assert len(requests) == 1 and "/report.html referer=" in requests[0], requests
    console = [line for line in log.splitlines() if ":CONSOLE(" in line]
    assert console == [], console


# What a template could smuggle in had the markup check missed it (each is refused by that
# check: tests/report/test_styles.py): script, handlers, javascript: URLs, remote and
# same-site fetches from elements and style sheets. The page's Content-Security-Policy must
# make the browser refuse every one. (A meta refresh is outside what a CSP governs; the
# check refuses it.)
SLIPPED_THROUGH = """
<script>console.log('SCRIPT-RAN'); fetch('/pwned-script');</script>
<img alt=">" src="/pwned-img" onerror="console.log('SCRIPT-RAN'); fetch('/pwned-onerror')">
<img alt="x" src="http://example.org/pwned-remote.png">
<style>@import url(/pwned-import.css);</style>
<style>
@font-face { font-family: smuggled; src: url(/pwned-font.woff); }
body { font-family: smuggled; background-image: url(/pwned-background.png); }
p { background-image: image-set('/pwned-image-set.png' 1x); }
</style>
<link rel="stylesheet" href="/pwned-link.css">
<iframe src="javascript:console.log('SCRIPT-RAN')"></iframe>
<iframe src="/pwned-frame.html"></iframe>
<object data="/pwned-object"></object>
<svg width="10" height="10"><image href="/pwned-svg-image.png"/></svg>
"""


@needs_chromium
def test_what_slips_past_the_check_is_refused_by_the_browser(
    regenerated: dict[str, Path], tmp_path: Path
) -> None:
    # Reference: the Content-Security-Policy Level 3 specification (W3C): with
    # default-src 'none' no script runs and nothing is fetched but what img-src and
    # style-src allow. Chromium is the browser a reader would open the report in.
    page = (regenerated["clinic_visits"] / "report.html").read_bytes()
    assert page.count(b"</body>") == 1
    hostile = page.replace(b"</body>", SLIPPED_THROUGH.encode() + b"</body>")
    requests, log, shot = _load(hostile, tmp_path)
    assert shot.is_file(), log[-2000:]
    assert len(requests) == 1 and "/report.html referer=" in requests[0], requests
    assert "SCRIPT-RAN" not in "".join(
        line for line in log.splitlines() if ":CONSOLE(" in line and "Refused" not in line
    )
    refused = [line for line in log.splitlines() if "Content Security Policy" in line]
    assert len(refused) >= 5, log[-3000:]  # the payloads were there, and were refused
