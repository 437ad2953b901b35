"""The demo report in headless Chromium: loads from disk, no console message, no network.

Needs the Debian packages ``chromium`` and ``chromium-driver`` (``/usr/bin/chromium``); skipped
with a message when they are not installed. Chromium is driven from its command line
(``--screenshot``), without a driver library: console messages are read from its log on
stderr, and the requests the page makes from a network log (``--log-net-log``). A probe page
that does log and does reach for an address first shows that both channels are heard.
"""

from __future__ import annotations

import json
import re
import subprocess
from dataclasses import dataclass
from pathlib import Path

import pytest
from PIL import Image
from test_report import ACETIC, PNG_SIGNATURE, demo_report

from pipeline import report

CHROMIUM = Path("/usr/bin/chromium")
# Chromium's log line for a console message: "...:INFO:CONSOLE(12)] ..." or "...:INFO:CONSOLE:12] ..."
_CONSOLE = re.compile(r"\bCONSOLE\b[^\]]*\]\s?(.*)")

pytestmark = pytest.mark.skipif(
    not CHROMIUM.is_file(),
    reason=(
        "headless browser check skipped: /usr/bin/chromium is missing; install the Debian "
        "packages with 'apt-get install -y chromium chromium-driver'"
    ),
)


@dataclass
class Visit:
    console: list[str]  # console messages the page produced
    requests: list[str]  # non-file URLs the page asked for
    screenshot: Path


def _page_requests(net_log: Path) -> list[str]:
    """URLs requested on behalf of a file:// page (not Chromium's own background requests)."""
    text = net_log.read_text(encoding="utf-8")
    try:
        log = json.loads(text)
    except json.JSONDecodeError:  # a log cut short lacks its closing brackets
        log = json.loads(text.rstrip().rstrip(",") + "]}")
    types = {v: k for k, v in log["constants"]["logEventTypes"].items()}
    urls = []
    for event in log.get("events", []):
        params = event.get("params") or {}
        if types.get(event["type"]) != "URL_REQUEST_START_JOB" or "url" not in params:
            continue
        from_page = str(params.get("network_isolation_key", "")).startswith("file://") or str(
            params.get("initiator", "")
        ) in ("null", "file://")
        if from_page and not str(params["url"]).startswith(("file:", "data:")):
            urls.append(str(params["url"]))
    return urls


def _visit(page: Path, work: Path) -> Visit:
    work.mkdir(parents=True, exist_ok=True)
    shot, net_log = work / "screenshot.png", work / "net-log.json"
    cmd = [
        str(CHROMIUM), "--headless", "--no-sandbox", "--disable-gpu",
        "--disable-background-networking", "--disable-component-update", "--disable-sync",
        "--no-first-run", "--hide-scrollbars", f"--user-data-dir={work / 'profile'}",
        "--window-size=1280,1600", f"--screenshot={shot}", f"--log-net-log={net_log}",
        "--enable-logging=stderr", "--v=0", page.resolve().as_uri(),
    ]
    done = subprocess.run(cmd, capture_output=True, text=True, timeout=90, check=False)
    assert done.returncode == 0, f"chromium exited with {done.returncode}:\n{done.stderr[-2000:]}"
    console = [m.group(1) for line in done.stderr.splitlines() if (m := _CONSOLE.search(line))]
    return Visit(console, _page_requests(net_log), shot)


def _assert_screenshot(path: Path) -> None:
    assert path.read_bytes()[:8] == PNG_SIGNATURE
    with Image.open(path) as im:
        assert im.size == (1280, 1600)
        colours = im.convert("RGB").resize((64, 80)).getcolors(maxcolors=64 * 80)
        assert colours is not None and len(colours) > 10  # a rendered page, not a blank one


@pytest.fixture(scope="module")
def demo(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path]:
    return demo_report(tmp_path_factory)


def test_probe_page_is_heard(tmp_path: Path) -> None:
    # a page that logs to the console and asks for an image on the loopback discard port
    # (127.0.0.1:9, nothing leaves the machine): both must be seen, else the checks below
    # would pass for the wrong reason
    probe = tmp_path / "probe.html"
    probe.write_text(
        '<!DOCTYPE html><html><head><meta charset="utf-8"><link rel="icon" href="data:,">'
        "<title>probe</title></head><body><p>probe</p>"
        '<img src="http://127.0.0.1:9/probe.png" alt="">'
        '<script>console.error("kaledger-probe")</script></body></html>',
        encoding="utf-8",
    )
    visit = _visit(probe, tmp_path / "chromium")
    assert any("kaledger-probe" in m for m in visit.console), visit.console
    assert any(u.startswith("http://127.0.0.1:9/") for u in visit.requests), visit.requests


def test_index_loads_offline_without_console_messages(demo: tuple[Path, Path], tmp_path: Path) -> None:
    _, out = demo
    visit = _visit(out / "index.html", tmp_path / "chromium")
    assert visit.console == []
    assert visit.requests == []
    _assert_screenshot(visit.screenshot)


def test_compound_page_loads_offline_without_console_messages(
    demo: tuple[Path, Path], tmp_path: Path
) -> None:
    _, out = demo
    visit = _visit(out / "compound" / report.compound_page(ACETIC), tmp_path / "chromium")
    assert visit.console == []
    assert visit.requests == []
    _assert_screenshot(visit.screenshot)
