"""The report page in a real browser: headless Chromium, no network.

Chromium is started with every request routed to a trap proxy on a loopback
port (loopback included, so nothing bypasses it) and host names resolving
nowhere.  A copy of the page with a small probe script (and without the
page's content security policy, which would otherwise hide a request the
page's own markup makes) reports whether every image decoded; the trap
records any request that tried to leave.  A screenshot of the page as
written is taken too.
"""

from __future__ import annotations

import html
import json
import re
import shutil
import socket
import subprocess
import threading
from pathlib import Path

import _report_scene as scene
import pytest

from pipeline.report import FIGURES, NIGHTS_FIGURES, NightProducts
from pipeline.report._page import CONTENT_POLICY

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")

pytestmark = pytest.mark.skipif(
    CHROMIUM is None,
    reason="headless Chromium is not installed (Debian: apt-get install -y chromium; "
    ".ci/run installs it)",
)

#: Seconds a browser run may take: a cold start on a loaded 2-core machine takes ~5 s.
BROWSER_TIMEOUT = 120

PROBE = """<script>
window.addEventListener('load', function () {
  var images = Array.prototype.slice.call(document.images);
  var loaded = function (i) { return i.complete && i.naturalWidth > 0; };
  var broken = images.filter(function (i) { return !loaded(i); });
  var shown = images.filter(loaded).map(function (i) { return i.alt; });
  var fetched = performance.getEntriesByType('resource').map(function (e) { return e.name; });
  var out = document.createElement('pre');
  out.id = 'probe';
  out.textContent = JSON.stringify({images: images.length, broken: broken.length,
                                    shown: shown, fetched: fetched});
  document.body.appendChild(out);
});
</script>"""


#: Hosts of Chromium's own services (component updater, account and time
#: checks): the browser calls them whatever the page, even with background
#: networking disabled.  The trap keeps them apart; the page must call nothing.
#: Exact hosts, so that a page's web font or script from a Google CDN is caught.
BROWSER_SERVICES = re.compile(
    r"^\S+ (https?://)?(update\.googleapis\.com|accounts\.google\.com|clients\d*\.google\.com"
    r"|[\w-]+\.gvt1\.com)[:/ ]"
)


class TrapProxy:
    """A loopback 'proxy' that answers nothing and records each request line.

    ``requests`` holds every request except Chromium's own service calls
    (``background``).
    """

    def __init__(self) -> None:
        self.requests: list[str] = []
        self.background: list[str] = []
        self._server = socket.create_server(("127.0.0.1", 0))
        self._server.settimeout(0.2)
        self.port = self._server.getsockname()[1]
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._serve, daemon=True)

    def _serve(self) -> None:
        while not self._stop.is_set():
            try:
                connection, _ = self._server.accept()
            except TimeoutError:
                continue
            with connection:
                connection.settimeout(2.0)
                try:
                    first = connection.recv(4096).split(b"\r\n", 1)[0]
                except OSError:
                    first = b"<no request line>"
                line = first.decode("latin-1")
                (self.background if BROWSER_SERVICES.match(line) else self.requests).append(line)

    def __enter__(self) -> TrapProxy:
        self._thread.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self._stop.set()
        self._thread.join()
        self._server.close()


def _chromium(url: str, profile: Path, port: int, *extra: str) -> subprocess.CompletedProcess:
    command = [
        CHROMIUM,
        "--headless",
        "--no-sandbox",  # the tests may run as root in CI containers
        "--disable-gpu",
        "--no-first-run",
        "--disable-background-networking",
        "--disable-component-update",
        "--disable-default-apps",
        "--disable-extensions",
        "--disable-sync",
        f"--user-data-dir={profile}",
        f"--proxy-server=http://127.0.0.1:{port}",
        "--proxy-bypass-list=<-loopback>",  # loopback goes through the trap too
        "--host-resolver-rules=MAP * ~NOTFOUND, EXCLUDE 127.0.0.1",  # but reach the trap
        "--virtual-time-budget=10000",
        *extra,
        url,
    ]
    return subprocess.run(command, capture_output=True, text=True, timeout=BROWSER_TIMEOUT)


def _probe(page: str, tmp_path: Path) -> tuple[dict, list[str]]:
    """Load ``page`` with the probe in Chromium; the probe's result and the trapped requests."""
    policy = f'<meta http-equiv="Content-Security-Policy" content="{CONTENT_POLICY}">'
    probed = page.replace(policy, "").replace("</body>", PROBE + "\n</body>")
    path = tmp_path / "probe.html"
    path.write_text(probed, encoding="utf-8")
    with TrapProxy() as trap:
        result = _chromium(path.as_uri(), tmp_path / "profile", trap.port, "--dump-dom")
    match = re.search(r'<pre id="probe">(.*?)</pre>', result.stdout, re.S)
    assert match, f"the probe did not run; chromium said: {result.stderr[-2000:]}"
    return json.loads(html.unescape(match.group(1))), trap.requests


@pytest.fixture
def page(tmp_path: Path) -> str:
    return scene.page(NightProducts(products=scene.products()), scene.config(tmp_path))


def test_page_loads_every_image_and_requests_nothing(page: str, tmp_path: Path) -> None:
    probe, requests = _probe(page, tmp_path)
    assert probe["images"] == len(FIGURES)
    assert probe["broken"] == 0
    # Every figure decoded, those of the solved products (astrometry, zero point) included.
    assert probe["shown"] == [spec.title for spec in FIGURES]
    solved = {"zero_point", "star_flat", "residual_map", "residual_night", "focal_length"}
    assert solved <= {spec.name for spec in FIGURES}
    assert requests == []
    assert [name for name in probe["fetched"] if not name.startswith("data:")] == []


def test_the_trap_sees_a_page_that_reaches_out(page: str, tmp_path: Path) -> None:
    # The check above must be able to fail: one outside image is caught twice.
    leaky = page.replace("</body>", '<img src="http://example.invalid/x.png">\n</body>')
    probe, requests = _probe(leaky, tmp_path)
    assert probe["broken"] == 1
    assert any("example.invalid" in line for line in requests)


def test_screenshot_of_the_page(page: str, tmp_path: Path) -> None:
    path = tmp_path / "report.html"
    path.write_text(page, encoding="utf-8")
    shot = tmp_path / "report.png"
    with TrapProxy() as trap:
        _chromium(
            path.as_uri(),
            tmp_path / "profile",
            trap.port,
            f"--screenshot={shot}",
            "--window-size=1100,3000",
            "--hide-scrollbars",
        )
    assert shot.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert shot.stat().st_size > 50_000  # figures drawn, not a blank page (~6 kB)
    assert trap.requests == []


def test_page_across_the_nights_loads_every_image_and_requests_nothing(tmp_path: Path) -> None:
    probe, requests = _probe(scene.nights_page(), tmp_path)
    assert probe["images"] == len(NIGHTS_FIGURES)
    assert probe["broken"] == 0
    assert probe["shown"] == [spec.title for spec in NIGHTS_FIGURES]
    assert requests == []
    assert [name for name in probe["fetched"] if not name.startswith("data:")] == []
    # The links to the nights' pages are not followed on load.
    assert all("page.html" not in name for name in probe["fetched"])
