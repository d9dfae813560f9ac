"""The monthly HTML report in a real headless browser (Chromium).

Chromium is found on the machine, or installed with apt-get when the test runs as root on CI
(``CI`` set) or with ``KIDNEYSURV_INSTALL_BROWSER=1``; otherwise the tests are skipped with the
reason. Checked:

1. the page loads and its charts render: the SVG charts are in the DOM Chromium builds
   (``--dump-dom``), and a screenshot (``--screenshot``) is a real picture: tens of KB, many
   colours, and the colours the report draws with (its bars and its demo banner);
2. it makes no network request: the page is opened through the DevTools protocol (over
   ``--remote-debugging-pipe``, standard library only) and every request the browser reports is
   the report file itself; a control page with an external image shows the monitor does see an
   outside request. All runs block the network (a resolver that resolves nothing, a proxy on a
   closed port), and with the network blocked the page still renders every chart.
"""

from __future__ import annotations

import base64
import fcntl
import json
import os
import select
import shutil
import struct
import subprocess
import sys
import time
import zlib
from html.parser import HTMLParser
from pathlib import Path

import duckdb
import pytest

from pipeline.report.page import write_report

pytestmark = pytest.mark.slow

PERIOD = "2026-10"
CHARTS = ("chart-ckd-share", "chart-coverage-trend", "chart-rejected-share", "chart-egfr-agreement")
#: Flags of every run: headless, as root in a container, and nothing the browser does by itself
#: (component updates, sync, background fetches) that would need the network.
BASE_FLAGS = ("--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
              "--disable-background-networking", "--disable-component-update", "--disable-sync",
              "--disable-dev-shm-usage", "--hide-scrollbars")  # fmt: skip
#: No name resolves and every connection goes to a closed port (9, discard): nothing leaves.
NO_NETWORK = ("--host-resolver-rules=MAP * ~NOTFOUND", "--proxy-server=127.0.0.1:9")
#: Okabe-Ito blue of the bars and the vermillion of the demo banner border (pipeline/report/page.py).
BAR_BLUE, BANNER_RED = (0x00, 0x72, 0xB2), (0xD5, 0x5E, 0x00)


# --------------------------------------------------------------------------- the browser


def _find_chromium() -> str | None:
    found = shutil.which("chromium")
    if found:
        return found
    return "/usr/bin/chromium" if os.access("/usr/bin/chromium", os.X_OK) else None


def _may_install() -> bool:
    is_root = hasattr(os, "geteuid") and os.geteuid() == 0
    on_ci = os.environ.get("CI", "").strip().lower() not in ("", "0", "false", "no")
    return is_root and (on_ci or os.environ.get("KIDNEYSURV_INSTALL_BROWSER") == "1")


@pytest.fixture(scope="module")
def chromium() -> str:
    found = _find_chromium()
    if found:
        return found
    if not _may_install():
        pytest.skip("chromium not found (looked for `chromium` on PATH and /usr/bin/chromium); it is installed "
                    "with apt-get only as root with CI set or KIDNEYSURV_INSTALL_BROWSER=1")  # fmt: skip
    env = {**os.environ, "DEBIAN_FRONTEND": "noninteractive"}
    for command in (["apt-get", "update"], ["apt-get", "install", "-y", "chromium"]):
        done = subprocess.run(command, env=env, capture_output=True, text=True, timeout=1200)
        if done.returncode:
            pytest.fail(f"{' '.join(command)} failed ({done.returncode}):\n{done.stderr[-3000:]}")
    found = _find_chromium()
    if not found:
        pytest.fail("apt-get installed chromium but no chromium binary was found")
    return found


def _run(
    binary: str, profile: Path, *args: str, timeout: float = 60
) -> subprocess.CompletedProcess:
    return subprocess.run([binary, *BASE_FLAGS, f"--user-data-dir={profile}", *args],
                          capture_output=True, timeout=timeout, check=False)  # fmt: skip


def _high_fd(fd: int) -> int:
    high = fcntl.fcntl(fd, fcntl.F_DUPFD, 10)
    os.close(fd)
    return high


class DevTools:
    """The DevTools protocol over ``--remote-debugging-pipe``: JSON messages ending in NUL, read
    by the browser from fd 3 and written to fd 4."""

    def __init__(self, binary: str, profile: Path, *args: str, timeout: float = 20):
        to_browser_r, self._w = os.pipe()
        self._r, from_browser_w = os.pipe()
        # move the browser's ends above 9, so that putting them on 3 and 4 cannot overwrite them
        to_browser_r, from_browser_w = (_high_fd(to_browser_r), _high_fd(from_browser_w))
        # a small Python shim puts our pipe ends on fds 3 and 4 and becomes the browser
        shim = (
            "import os, sys; r, w = int(sys.argv[1]), int(sys.argv[2]); os.dup2(r, 3); os.dup2(w, 4); "
            "os.close(r); os.close(w); os.execv(sys.argv[3], sys.argv[3:])"
        )
        self.proc = subprocess.Popen(
            [sys.executable, "-c", shim, str(to_browser_r), str(from_browser_w), binary, *BASE_FLAGS,
             f"--user-data-dir={profile}", "--remote-debugging-pipe", *args, "about:blank"],
            pass_fds=(to_browser_r, from_browser_w), stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
        )  # fmt: skip
        os.close(to_browser_r)
        os.close(from_browser_w)
        self._buffer, self._id, self.events = b"", 0, []
        self._deadline = time.monotonic() + timeout
        self.session = ""

    def _message(self) -> dict:
        while b"\0" not in self._buffer:
            left = self._deadline - time.monotonic()
            if left <= 0:
                raise TimeoutError("the browser did not answer in time")
            ready, _, _ = select.select([self._r], [], [], left)
            if ready:
                chunk = os.read(self._r, 1 << 16)
                if not chunk:
                    raise EOFError("the browser closed the DevTools pipe")
                self._buffer += chunk
        raw, self._buffer = self._buffer.split(b"\0", 1)
        return json.loads(raw)

    def call(self, method: str, params: dict | None = None, session: bool = True) -> dict:
        self._id += 1
        message = {"id": self._id, "method": method, "params": params or {}}
        if session and self.session:
            message["sessionId"] = self.session
        os.write(self._w, json.dumps(message).encode() + b"\0")
        while True:
            reply = self._message()
            if reply.get("id") == self._id:
                if "error" in reply:
                    raise RuntimeError(f"{method}: {reply['error']}")
                return reply.get("result", {})
            self.events.append(reply)

    def wait_for(self, method: str) -> dict:
        for i, event in enumerate(self.events):
            if event.get("method") == method:
                return self.events.pop(i)
        while True:
            event = self._message()
            if event.get("method") == method:
                return event
            self.events.append(event)

    def open_page(self, url: str) -> None:
        """Attach to the first tab, record its network, load ``url`` and wait for its load event."""
        target = next(
            t
            for t in self.call("Target.getTargets", session=False)["targetInfos"]
            if t["type"] == "page"
        )
        self.session = self.call("Target.attachToTarget", {"targetId": target["targetId"], "flatten": True},
                                 session=False)["sessionId"]  # fmt: skip
        self.call("Network.enable")
        self.call("Page.enable")
        self.call("Page.navigate", {"url": url})
        self.wait_for("Page.loadEventFired")

    def requested_urls(self) -> list[str]:
        return [
            e["params"]["request"]["url"]
            for e in self.events
            if e.get("method") == "Network.requestWillBeSent"
        ]

    def evaluate(self, expression: str):
        return self.call("Runtime.evaluate", {"expression": expression, "returnByValue": True})[
            "result"
        ]["value"]

    def close(self) -> None:
        try:
            self.call("Browser.close", session=False)
        except (OSError, EOFError, TimeoutError, RuntimeError):
            pass
        try:
            self.proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait()
        os.close(self._w)
        os.close(self._r)


# --------------------------------------------------------------------------- PNG (standard library)


def decode_png(data: bytes, max_rows: int | None = None) -> tuple[int, int, int, list[bytes]]:
    """Width, height, bytes per pixel and the first ``max_rows`` unfiltered rows of an 8-bit,
    non-interlaced RGB or RGBA PNG (PNG specification, W3C 2003: chunks, filter types 0-4)."""
    assert data[:8] == b"\x89PNG\r\n\x1a\n", "not a PNG"
    pos, idat, header = 8, [], None
    while pos < len(data):
        (length,), kind = struct.unpack(">I", data[pos : pos + 4]), data[pos + 4 : pos + 8]
        body = data[pos + 8 : pos + 8 + length]
        if kind == b"IHDR":
            header = struct.unpack(">IIBBBBB", body)
        elif kind == b"IDAT":
            idat.append(body)
        pos += 12 + length
    width, height, depth, colour, _, _, interlace = header
    assert depth == 8 and colour in (2, 6) and interlace == 0, header
    bpp = 3 if colour == 2 else 4
    raw = zlib.decompress(b"".join(idat))
    stride = width * bpp
    previous, rows = bytearray(stride), []
    for y in range(min(height, max_rows or height)):
        kind, line = (
            raw[y * (stride + 1)],
            bytearray(raw[y * (stride + 1) + 1 : (y + 1) * (stride + 1)]),
        )
        for x in range(stride):
            left = line[x - bpp] if x >= bpp else 0
            up, corner = previous[x], previous[x - bpp] if x >= bpp else 0
            if kind == 1:
                line[x] = (line[x] + left) & 0xFF
            elif kind == 2:
                line[x] = (line[x] + up) & 0xFF
            elif kind == 3:
                line[x] = (line[x] + (left + up) // 2) & 0xFF
            elif kind == 4:
                p = left + up - corner
                pa, pb, pc = abs(p - left), abs(p - up), abs(p - corner)
                line[x] = (
                    line[x] + (left if pa <= pb and pa <= pc else up if pb <= pc else corner)
                ) & 0xFF
        rows.append(bytes(line))
        previous = line
    return width, height, bpp, rows


def colours(rows: list[bytes], bpp: int) -> dict[tuple[int, int, int], int]:
    out: dict[tuple[int, int, int], int] = {}
    for row in rows:
        for x in range(0, len(row), bpp):
            rgb = (row[x], row[x + 1], row[x + 2])
            out[rgb] = out.get(rgb, 0) + 1
    return out


def near(
    seen: dict[tuple[int, int, int], int], target: tuple[int, int, int], tolerance: int = 6
) -> int:
    """Pixels within ``tolerance`` per channel of ``target`` (room for colour management)."""
    return sum(
        n
        for rgb, n in seen.items()
        if all(abs(a - b) <= tolerance for a, b in zip(rgb, target, strict=False))
    )


# --------------------------------------------------------------------------- the report


@pytest.fixture(scope="module")
def report(sample_warehouse, tmp_path_factory) -> Path:
    """The report of the shipped samples' latest month, from the session's sample warehouse
    (tests/conftest.py; Great Expectations off: not under test)."""
    base = tmp_path_factory.mktemp("browser")
    (base / "out").symlink_to(sample_warehouse.parent)  # report.parent / "out": the warehouse
    with duckdb.connect(str(sample_warehouse), read_only=True) as con:
        return write_report(con, PERIOD, base / "report.html")


class _Elements(HTMLParser):
    def __init__(self):
        super().__init__()
        self.found: list[tuple[str, dict]] = []

    def handle_starttag(self, tag, attrs):
        self.found.append((tag, dict(attrs)))


def elements(text: str) -> list[tuple[str, dict]]:
    parser = _Elements()
    parser.feed(text)
    parser.close()
    return parser.found


def chart_ids(dom: str) -> list[str]:
    return [
        a.get("id")
        for tag, a in elements(dom)
        if tag == "svg" and "chart" in (a.get("class") or "")
    ]


# --------------------------------------------------------------------------- tests


def test_charts_are_in_the_rendered_dom(chromium, report, tmp_path):
    done = _run(chromium, tmp_path / "profile", *NO_NETWORK, "--dump-dom", report.as_uri())
    dom = done.stdout.decode("utf-8")
    assert done.returncode == 0, done.stderr.decode(errors="replace")[-2000:]
    assert chart_ids(dom) == list(CHARTS)
    found = elements(dom)
    # matplotlib draws the charts; the report gives each line and bar an id (gid) to find it by
    lines = [a for tag, a in found if tag == "g" and "-series-" in (a.get("id") or "")]
    assert len(lines) >= 1
    # one bar per district whose confirmed-CKD share is published (a blanked share has a note,
    # not a bar): the count the published table gives, not a fixed number
    bars = sum(
        1
        for tag, a in found
        if tag == "g" and (a.get("id") or "").startswith("chart-ckd-share-bar-")
    )
    with duckdb.connect(str(report.parent / "out" / "surveillance.duckdb"), read_only=True) as con:
        [(published,)] = con.execute(
            "select count(*) from published.district_ckd_prevalence where period = ? and sex = 'ALL' "
            "and age_band = 'ALL' and district_code not in ('ALL', 'unknown') "
            "and ckd_share_of_tested is not null", [PERIOD]).fetchall()  # fmt: skip
    assert published >= 3 and bars == published
    assert "Made with the public demo key" in dom and 'id="table-prevalence"' in dom


def test_screenshot_is_a_real_picture(chromium, report, tmp_path):
    shot = tmp_path / "report.png"
    done = _run(chromium, tmp_path / "profile", *NO_NETWORK, f"--screenshot={shot}", "--window-size=1000,1400",
                report.as_uri())  # fmt: skip
    assert done.returncode == 0 and shot.exists(), done.stderr.decode(errors="replace")[-2000:]
    data = shot.read_bytes()
    assert len(data) > 30_000  # a blank or near-blank page compresses to a few KB
    width, height, bpp, rows = decode_png(data, max_rows=1000)
    assert (width, height) == (1000, 1400)
    seen = colours(rows, bpp)
    assert len(seen) > 50  # text antialiasing, bars, banner: many colours
    white = seen.get((255, 255, 255), 0)
    assert white < 0.97 * width * len(rows)
    assert near(seen, BAR_BLUE) > 500, "the bars of the first chart are drawn"
    assert near(seen, BANNER_RED) > 200, "the demo banner is drawn"


def test_no_network_request_and_full_render_offline(chromium, report, tmp_path):
    browser = DevTools(chromium, tmp_path / "profile", *NO_NETWORK)
    try:
        browser.open_page(report.as_uri())
        state = browser.evaluate(
            "JSON.stringify({charts: [...document.querySelectorAll('svg.chart')].map(s => s.id),"
            " drawn: [...document.querySelectorAll('svg.chart')].map(s => s.getBBox().width > 100),"
            " resources: performance.getEntriesByType('resource').map(e => e.name),"
            " sheets: [...document.styleSheets].map(s => s.href)})"
        )
        requested = browser.requested_urls()
    finally:
        browser.close()
    state = json.loads(state)
    assert requested == [report.as_uri()]  # the document, nothing else
    assert state["resources"] == [] and state["sheets"] == [None]  # one inline style sheet
    assert state["charts"] == list(CHARTS) and all(state["drawn"])
    for tag, attrs in elements(report.read_text(encoding="utf-8")):
        for name in ("src", "href", "xlink:href", "action", "data", "poster"):
            value = (attrs.get(name) or "").strip().lower()
            assert not value.startswith(("http:", "https:", "//")), (tag, name, value)


def test_the_monitor_sees_an_outside_request(chromium, tmp_path):
    """Control: a page that does ask for an outside image shows up in the request log (so an
    empty log above means no request, not a deaf monitor). The .invalid domain never resolves
    (RFC 2606) and the network is blocked anyway."""
    page = tmp_path / "control.html"
    page.write_text('<!DOCTYPE html><html><body><img src="https://kidneysurv.invalid/pixel.png"></body></html>',
                    encoding="utf-8")  # fmt: skip
    browser = DevTools(chromium, tmp_path / "profile", *NO_NETWORK)
    try:
        browser.open_page(page.as_uri())
        requested = browser.requested_urls()
    finally:
        browser.close()
    assert "https://kidneysurv.invalid/pixel.png" in requested


def test_screenshot_for_review(chromium, report, tmp_path):
    """A full-page screenshot kept beside the report for a person to look at (DevTools capture
    beyond the viewport); checked only for being a large PNG."""
    browser = DevTools(chromium, tmp_path / "profile", *NO_NETWORK, "--window-size=1000,1000")
    try:
        browser.open_page(report.as_uri())
        height = browser.evaluate("document.documentElement.scrollHeight")
        shot = browser.call("Page.captureScreenshot", {"format": "png", "captureBeyondViewport": True,
                                                       "clip": {"x": 0, "y": 0, "width": 1000, "height": height,
                                                                "scale": 1}})  # fmt: skip
    finally:
        browser.close()
    data = base64.b64decode(shot["data"])
    target = report.with_suffix(".png")
    target.write_bytes(data)
    assert data[:8] == b"\x89PNG\r\n\x1a\n" and len(data) > 200_000 and height > 3000


NEW_TABLES = (
    "table-undetected",
    "table-sensitivity",
    "table-equation-ckd_epi_2009_creatinine",
    "table-equation-districts",
)


@pytest.mark.parametrize("media", ["screen", "print"])
def test_new_sections_render_and_every_table_fits_the_page(chromium, report, tmp_path, media):
    """The sections added beside coverage (expected cases not yet found, estimated albuminuria)
    and the equation-change section are drawn; no table runs past the page (the data-quality
    table's reasons column used to be cut off), on screen and in print."""
    browser = DevTools(chromium, tmp_path / "profile", *NO_NETWORK, "--window-size=1000,1000")
    try:
        browser.open_page(report.as_uri())
        browser.call("Emulation.setEmulatedMedia", {"media": media})
        if media == "print":  # an A4 page less its margins is about 680 CSS px wide
            browser.call(
                "Emulation.setDeviceMetricsOverride",
                {"width": 680, "height": 1000, "deviceScaleFactor": 1, "mobile": False},
            )
        state = json.loads(
            browser.evaluate(
                "JSON.stringify({"
                " tables: Object.fromEntries([...document.querySelectorAll('table')].map(t => [t.id,"
                "   {width: t.getBoundingClientRect().width, right: t.getBoundingClientRect().right,"
                "    rows: t.rows.length}])),"
                " page: document.querySelector('main').getBoundingClientRect().right,"
                " reasons: [...document.querySelectorAll('td.reasons')].map(c => c.getBoundingClientRect().right),"
                " headings: [...document.querySelectorAll('h2, h3')].map(h => h.textContent),"
                " maps: [...document.querySelectorAll('svg.map')].map(m => [m.id, m.getBBox().width,"
                "   m.querySelectorAll(`g[id^='${m.id}-district-'], g[id^='${m.id}-blanked-']`).length,"
                "   m.querySelectorAll(`g[id^='${m.id}-blanked-']`).length])})"
            )
        )
    finally:
        browser.close()
    for table in NEW_TABLES:
        assert table in state["tables"] and state["tables"][table]["rows"] > 2, table
    assert "Expected cases not yet found" in state["headings"]
    assert "If the eGFR equation changed" in state["headings"]
    # three maps of the 12 districts, drawn, with hatched (blanked) districts among them
    assert [m[0] for m in state["maps"]] == [
        "map-ckd-standardised",
        "map-coverage",
        "map-undetected",
    ]
    assert all(
        width > 200 and districts == 12 and blanked >= 1
        for _, width, districts, blanked in state["maps"]
    )
    for table, box in state["tables"].items():
        assert box["right"] <= state["page"] + 1, (media, table, box, state["page"])
    assert state["reasons"] and max(state["reasons"]) <= state["page"] + 1
