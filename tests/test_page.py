"""The incident page (tracewatch/service/page.py) served by the daemon's HTTP server: readable
without JavaScript, refreshing itself, every log-derived string escaped — checked in the
HTML, and in headless Chromium on a daemon that follows a real log file."""

from __future__ import annotations

import json
import re
import shutil
import subprocess
import tempfile
import threading
from datetime import datetime, timezone
from html.parser import HTMLParser

import pytest

from tracewatch.config import load_config
from tracewatch.demo.scenario import Step, generate, parcel_lockers
from tracewatch.service.daemon import Daemon
from tracewatch.service.page import CAUTION

from .conftest import wait_for
from .incident_data import Served, config, live_setup, request, scaled, toy_alert

SCRIPT = "<script>document.title='pwned';document.body.innerHTML+='<p id=pwned>'</script>"
EVIL_KEY = '"><img src=x onerror=alert(1)>'


class Dom(HTMLParser):
    """Tags, ids and text of an HTML document (Python's own parser, html.parser)."""

    def __init__(self, html: str) -> None:
        super().__init__(convert_charrefs=True)
        self.tags: list[str] = []
        self.ids: set[str] = set()
        self.hrefs: list[str] = []
        self.rects: list[dict] = []  # the attributes of every SVG <rect>
        self.text: list[str] = []
        self.title = ""
        self._in_title = False
        self.feed(html)

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        self.ids.update(v for k, v in attrs if k == "id")
        self.hrefs += [v for k, v in attrs if k == "href"]
        if tag == "rect":
            self.rects.append(dict(attrs))
        self._in_title = tag == "title"

    def handle_endtag(self, tag):
        self._in_title = False

    def handle_data(self, data):
        self.text.append(data)
        if self._in_title:
            self.title += data


@pytest.fixture
def served(tmp_path):
    s = Served(config(tmp_path))
    yield s
    s.close()


def test_pages_escape_everything_from_the_logs(served):
    iid = served.incidents.add(toy_alert("1", "A", session_key=EVIL_KEY, samples=[f"GET /x {SCRIPT}"],
                                         unseen_events=[{"template_id": "t1", "template": f"bad {SCRIPT}", "count": 1}]))
    for path in ("/", f"/incidents/{iid}"):
        status, headers, body = request(served.port, "GET", path)
        html = body.decode()
        assert status == 200 and headers["Content-Type"] == "text/html; charset=utf-8"
        assert "script-src" not in headers["Content-Security-Policy"]  # default-src 'none': no script at all
        assert '<meta http-equiv="refresh" content="30">' in html  # refreshes without JavaScript
        dom = Dom(html)
        assert "script" not in dom.tags and "img" not in dom.tags and "pwned" not in dom.ids
        text = "".join(dom.text)
        assert f"never-seen event 'bad {SCRIPT}'" in text  # shown as text, exactly
        assert CAUTION in text
    assert f"GET /x {SCRIPT}" in "".join(Dom(body.decode()).text) and EVIL_KEY in "".join(Dom(body.decode()).text)
    status, _, body = request(served.port, "GET", "/incidents/999")
    assert status == 404 and "No incident" in body.decode()
    # the JSON API carries the text as data, unchanged
    doc = json.loads(request(served.port, "GET", "/api/incidents")[2])
    assert doc["incidents"][0]["title"] == f"never-seen event 'bad {SCRIPT}'" and doc["counts"] == {"open": 1}
    detail = json.loads(request(served.port, "GET", f"/api/incidents/{iid}")[2])
    assert detail["samples"] == [f"GET /x {SCRIPT}"] and detail["alert_ids"] == ["1"]
    assert request(served.port, "GET", "/api/incidents?limit=0")[0] == 400
    assert request(served.port, "GET", "/api/incidents?status=sleeping")[0] == 400
    assert request(served.port, "GET", "/api/incidents/77")[0] == 404


# -- the browser test: a daemon following a real log, Chromium reading its page ---------------------------


def _chromium() -> str | None:
    return shutil.which("chromium") or shutil.which("chromium-browser")


def _run_chromium(*args: str) -> str:
    with tempfile.TemporaryDirectory() as profile:
        proc = subprocess.run([_chromium(), "--headless", "--no-sandbox", "--disable-gpu", "--no-first-run",
                               "--disable-background-networking", "--disable-component-update", "--disable-sync",
                               f"--user-data-dir={profile}", *args],
                              capture_output=True, text=True, timeout=60)
    assert proc.returncode == 0, proc.stderr[-2000:]
    return proc.stdout


def dump_dom(url: str) -> str:
    """The DOM after load (scripts, if any ran, have run), from headless Chromium."""
    return _run_chromium("--dump-dom", url)


SHOT = (1280, 2000)  # the screenshots' window: tall enough for the whole page of this test


def screenshot(url: str, path) -> "np.ndarray":
    """What headless Chromium draws of ``url`` (sRGB, no scrollbars), as an RGB(A) array."""
    from .png import read_png

    _run_chromium(f"--screenshot={path}", f"--window-size={SHOT[0]},{SHOT[1]}", "--hide-scrollbars",
                  "--force-color-profile=srgb", url)
    return read_png(path.read_bytes())


def bar_pixels(image) -> int:
    """Pixels of exactly the charts' bar colour."""
    import numpy as np

    from tracewatch.service.page import BAR

    rgb = np.array([int(BAR[i:i + 2], 16) for i in (1, 3, 5)], dtype=np.uint8)
    return int((image[:, :, :3] == rgb).all(axis=2).sum())


@pytest.mark.skipif(_chromium() is None, reason="Debian's chromium is not installed (make test installs it "
                                                "with apt-get when it can)")
def test_browser_shows_incidents_and_never_runs_log_markup(tmp_path):
    sc = parcel_lockers()
    cfg_path, port = live_setup(tmp_path, seed=41, top="redact = ['CR\\d{4}']\n")
    cfg = load_config(cfg_path)
    day = generate(sc, 40, 0, seed=42, start=datetime(2026, 11, 30, 4, tzinfo=timezone.utc), span_s=30)
    for sess in day[:6]:  # a log line carrying markup, never seen at fit
        sess.steps.insert(1, Step("markup", f"courier CR1234 sent {SCRIPT}", "ERROR"))
    daemon = Daemon(cfg)
    daemon.start()
    runner = threading.Thread(target=daemon.run)
    runner.start()
    try:
        (tmp_path / "logs" / "app.log").write_text("\n".join(scaled(day)) + "\n")
        # the title holds the markup's template (its quoted values masked) and a redacted example
        wait_for(lambda: any("<script>" in r["title"] for r in daemon.incidents.store.incidents()), 30,
                 what="the incident of the lines carrying markup")
        rows = daemon.incidents.store.incidents()
        iid = [r["id"] for r in rows if "<script>" in r["title"]][0]
        listing = Dom(dump_dom(f"http://127.0.0.1:{port}/"))
        detail = Dom(dump_dom(f"http://127.0.0.1:{port}/incidents/{iid}"))
        filtered = Dom(dump_dom(f"http://127.0.0.1:{port}/?status=open&source=locker-api"))
        shot = screenshot(f"http://127.0.0.1:{port}/", tmp_path / "list.png")
        empty_shot = screenshot(f"http://127.0.0.1:{port}/?source=nowhere", tmp_path / "empty.png")
    finally:
        daemon.stop()
        runner.join(15)
    for dom, title in ((listing, "tracewatch incidents"), (detail, None)):
        assert "script" not in dom.tags  # the markup never became an element …
        assert "pwned" not in dom.ids  # … never ran (it would have added <p id=pwned>) …
        assert dom.title != "pwned" and (title is None or dom.title == title)  # … nor renamed the page
    text = "".join(listing.text)
    assert all(r["title"] in text for r in rows)  # every incident's title is on the page
    sample = "".join(detail.text)
    assert f"courier «redacted» sent {SCRIPT}" in sample  # shown as text, after redaction
    assert "CR1234" not in sample
    # the charts: one for the page and one per incident, drawn as SVG; the filter links
    assert listing.tags.count("svg") == len(rows) + 1 and detail.tags.count("svg") == 1
    assert {"/?status=open", "/?source=locker-api", "/"} <= set(listing.hrefs)
    assert {"/?status=resolved&source=locker-api", "/?status=open"} <= set(filtered.hrefs)
    assert all(r["title"] in "".join(filtered.text) for r in rows if r["status"] == "open")
    # the screenshots: a page drawn (not blank), whose bars are exactly what its SVG says — every
    # pixel of the bar colour inside a bar, every bar's area in that colour (crisp edges) …
    assert len(set(map(tuple, shot.reshape(-1, shot.shape[2])[::97].tolist()))) > 20
    area = sum(int(r["width"]) * int(r["height"]) for r in listing.rects)
    assert area >= 102 * 3 and bar_pixels(shot) == area  # (the page chart's peak: full height, 3 px or more)
    # … and a page with no incident has no chart: none of that colour
    assert bar_pixels(empty_shot) == 0 and len(set(map(tuple, empty_shot.reshape(-1, 3)[::97].tolist()))) > 5


def test_page_filters_by_status_and_pages(served):
    from tracewatch.alerts.incidents import set_status
    from tracewatch.service.page import CSP

    ids = [served.incidents.add(toy_alert(f"p{n}", f"E{n}", t=1_800_000_000.0 + n)) for n in range(5)]
    set_status(served.incidents.store, ids[0], "resolve", by="test")
    set_status(served.incidents.store, ids[1], "resolve", by="test")

    def listed(query: str) -> list[str]:
        status, headers, body = request(served.port, "GET", "/" + query)
        assert status == 200 and headers["Content-Security-Policy"] == CSP
        return re.findall(r'href="/incidents/(\d+)"', body.decode())

    # the toy alerts each have their own never-seen event: five incidents
    assert len(set(ids)) == 5
    assert listed("") == [str(i) for i in reversed(ids)]  # newest first
    assert listed("?status=resolved") == [str(ids[1]), str(ids[0])]
    assert listed("?status=open") == [str(i) for i in reversed(ids[2:])]
    assert listed("?status=open&limit=2") == [str(ids[4]), str(ids[3])]
    _, _, body = request(served.port, "GET", "/?status=open&limit=2")
    assert 'href="/?status=open&amp;offset=2&amp;limit=2">older</a>' in body.decode()
    assert listed("?status=open&limit=2&offset=2") == [str(ids[2])]
    status, headers, body = request(served.port, "GET", "/?status=bogus")
    assert status == 400 and "status: use one of open" in body.decode()
    assert headers["Content-Security-Policy"] == CSP
    # another source; a resolved incident active later than every open one is still listed after them
    other = [served.incidents.add(toy_alert(f"q{n}", f"F{n}", t=1_800_000_100.0 + n, source="dock-api"))
             for n in range(2)]
    late = served.incidents.add(toy_alert("late", "G", t=1_800_000_200.0))
    set_status(served.incidents.store, late, "resolve", by="test")
    assert listed("") == [str(i) for i in (other[1], other[0], ids[4], ids[3], ids[2], late, ids[1], ids[0])]
    assert listed("?source=dock-api") == [str(other[1]), str(other[0])]
    assert listed("?source=api&status=resolved") == [str(late), str(ids[1]), str(ids[0])]
    assert listed("?source=nowhere") == []
    html_ = request(served.port, "GET", "/?source=dock-api&status=open")[2].decode()
    # the filter links keep the other filter
    assert 'href="/?status=resolved&amp;source=dock-api"' in html_ and 'href="/?status=open&amp;source=api"' in html_
    assert 'href="/?status=open"' in html_ and 'href="/?source=dock-api"' in html_
    assert "showing open of dock-api" in html_
    assert request(served.port, "GET", "/?source=" + "x" * 201)[0] == 400


def test_relative_times():
    from tracewatch.service.page import ago, list_page

    now = 1_800_000_000.0
    assert [ago(now - d, now) for d in (0.4, 59, 61, 7200, 3 * 86_400)] == [
        "just now", "59 s ago", "1 min ago", "2 h ago", "3 d ago"]
    assert ago(now + 120, now) == "in 2 min" and ago(None, now) == "–"
    from tracewatch.alerts.summary import brief

    html_ = list_page([brief({"id": 1, "status": "open", "count": 2, "first_seen": now - 600, "last_seen": now - 30,
                              "title": "t", "stats": {}})], {}, {}, refresh_s=30, now=now)
    assert '<span title="2027-01-15 07:59:30 UTC">30 s ago</span>' in html_  # date(1) -ud @1799999970


def test_detail_page_charts_alerts_over_time(served):
    t0 = 1_800_000_000.0  # 08:00:00 UTC: alerts in minutes 0, 0 and 2 → bars of 2, 0 and 1
    ids = {served.incidents.add(toy_alert(f"t{n}", "A", t=t0 + dt)) for n, dt in enumerate((0, 10, 130))}
    assert len(ids) == 1
    status, headers, body = request(served.port, "GET", f"/incidents/{ids.pop()}")
    html_ = body.decode()
    svg = re.findall(r"<svg .*?</svg>", html_)
    assert status == 200 and len(svg) == 1 and "script" not in headers["Content-Security-Policy"]
    # 720 px over three bars: 240 px slots, bars at most 48 px wide; 102 px of plot: the peak is full height
    assert re.findall(r'<rect x="(\d+)" y="(\d+)" width="(\d+)" height="(\d+)"/>', svg[0]) == [
        ("0", "0", "48", "102"), ("480", "51", "48", "51")]
    assert "2027-01-15 08:00:00 UTC" in svg[0] and "2027-01-15 08:02:00 UTC" in svg[0] and "peak 2 per 1 min" in svg[0]


def test_png_reader_on_a_hand_made_image():
    """The screenshots' reader (tests/png.py) on a 2×2 RGB image whose second row uses the
    Average filter, which Chromium's screenshots here happen not to (they use None, Sub, Up and
    Paeth, checked pixel-exactly in the browser test). PNG specification §9.2: Recon(x) =
    Filt(x) + floor((Recon(a) + Recon(b)) / 2), a the byte one pixel left, b the byte above."""
    import struct
    import zlib

    from .png import SIGNATURE, read_png

    def chunk(kind: bytes, body: bytes) -> bytes:
        return struct.pack(">I", len(body)) + kind + body + struct.pack(">I", zlib.crc32(kind + body))

    rows = bytes([0, 10, 20, 30, 40, 50, 60]) + bytes([3, 5, 5, 5, 5, 5, 5])
    png = (SIGNATURE + chunk(b"IHDR", struct.pack(">IIBBBBB", 2, 2, 8, 2, 0, 0, 0))
           + chunk(b"IDAT", zlib.compress(rows)) + chunk(b"IEND", b""))
    # by hand: 5 + (0 + 10) // 2 = 10, 15, 20; then 5 + (10 + 40) // 2 = 30, 5 + (15 + 50) // 2 = 37, 45
    assert read_png(png).tolist() == [[[10, 20, 30], [40, 50, 60]], [[10, 15, 20], [30, 37, 45]]]
