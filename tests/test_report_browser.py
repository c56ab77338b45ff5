"""The run report in a real browser: headless Chromium (Debian package ``chromium``) opens
report.html from disk with the network disabled, logs nothing to its console, decodes every
embedded image, and draws the page with its style.

CI installs chromium when it is missing (.ci/run); elsewhere these tests skip, saying so.
"""

from __future__ import annotations

import html
import json
import re
import shutil
import subprocess

import numpy as np
import pytest

import simbench
from simbench.report.run_report import write_report
from report_builders import Page, synthetic_run

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")
pytestmark = pytest.mark.skipif(
    CHROMIUM is None, reason="chromium is not installed (Debian: apt-get install chromium; "
                             ".ci/run installs it before the tests)")

# headless, no sandbox (containers run as root), and nothing that reaches a network
FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync",
         "--disable-extensions", "--disable-default-apps", "--mute-audio",
         "--enable-logging=stderr", "--v=0"]

# Chromium writes each console message of the page to its log as INFO:CONSOLE (a content
# security policy violation is one); checked below against a page that logs on purpose
CONSOLE = re.compile(r":CONSOLE(?:\(\d+\)|:\d+)\]\s*(.*)")


def _chromium(tmp_path, *args, timeout: float = 240.0) -> subprocess.CompletedProcess:
    profile = tmp_path / "profile"
    profile.mkdir(exist_ok=True)
    return subprocess.run([CHROMIUM, *FLAGS, f"--user-data-dir={profile}", *args],
                          capture_output=True, text=True, timeout=timeout, check=False,
                          stdin=subprocess.DEVNULL)


def _console(stderr: str) -> list[str]:
    return [m.group(1) for line in stderr.splitlines() if (m := CONSOLE.search(line))]


@pytest.fixture(scope="module")
def report(tmp_path_factory):
    folder = tmp_path_factory.mktemp("report")
    metrics = synthetic_run(folder)
    return write_report(folder, metrics)


def test_console_messages_are_seen(tmp_path):
    # the check below is not empty: a page that logs an error and breaks its policy is caught
    page = tmp_path / "control.html"
    page.write_text("<!DOCTYPE html><html><head><meta charset='utf-8'>"
                    "<meta http-equiv='Content-Security-Policy' content=\"default-src 'none'; "
                    "img-src data:; script-src 'unsafe-inline'\"><title>c</title></head><body>"
                    "<img src='http://example.invalid/x.png' alt='x'>"
                    "<script>console.error('control message')</script></body></html>",
                    encoding="utf-8")
    result = _chromium(tmp_path, "--dump-dom", page.as_uri())
    messages = _console(result.stderr)
    assert any("control message" in m for m in messages), result.stderr[-2000:]
    assert any("Content Security Policy" in m for m in messages), result.stderr[-2000:]


def test_report_opens_with_no_console_message(report, tmp_path):
    result = _chromium(tmp_path, "--dump-dom", report.as_uri())
    assert result.returncode == 0, result.stderr[-2000:]
    assert _console(result.stderr) == []
    dom = Page(result.stdout)
    source = Page(report.read_text(encoding="utf-8"))
    assert len(dom.images) == len(source.images) == 5
    assert " ".join(simbench.CAUTION.split()) in dom.text


def test_every_image_decodes_in_the_browser(report, tmp_path):
    # The report has no script; a test page of its own holds the report's <img> elements
    # (same data URIs) and, once loaded, writes each image's decoded size into the DOM.
    source = Page(report.read_text(encoding="utf-8"))
    tags = "".join(f'<img alt="{i}" src="{html.escape(img["src"])}">'
                   for i, img in enumerate(source.images))
    probe = tmp_path / "probe.html"
    probe.write_text(
        "<!DOCTYPE html><html><head><meta charset='utf-8'><title>probe</title></head><body>"
        f"{tags}<script>window.addEventListener('load', () => {{"
        "const p = document.createElement('pre'); p.id = 'decoded';"
        "p.textContent = JSON.stringify([...document.images].map("
        "i => [i.complete, i.naturalWidth, i.naturalHeight]));"
        "document.body.appendChild(p); });</script></body></html>", encoding="utf-8")
    result = _chromium(tmp_path, "--dump-dom", probe.as_uri())
    found = re.search(r'<pre id="decoded">(.*?)</pre>', result.stdout, re.S)
    assert found, result.stdout[-500:]
    decoded = json.loads(html.unescape(found.group(1)))
    assert len(decoded) == len(source.images) == 5
    import base64
    import struct

    for (complete, width, height), img in zip(decoded, source.images):
        data = base64.b64decode(img["src"].split(",", 1)[1])
        # the browser's size is the PNG header's (PNG specification, IHDR)
        assert complete and (width, height) == struct.unpack(">II", data[16:24])
    assert _console(result.stderr) == []


def test_screenshot_shows_the_styled_page(report, tmp_path):
    import matplotlib.image

    shot = tmp_path / "report.png"
    result = _chromium(tmp_path, f"--screenshot={shot}", "--window-size=1400,3000",
                       "--hide-scrollbars", report.as_uri())
    assert shot.is_file(), result.stderr[-2000:]
    pixels = matplotlib.image.imread(shot)
    assert pixels.shape[:2] == (3000, 1400)
    rgb = np.round(pixels[..., :3] * 255).astype(int)
    # the caution box's background (#fff4e5 in the page's style) is drawn near the top
    caution = np.all(rgb[:600] == (0xff, 0xf4, 0xe5), axis=-1)
    assert caution.sum() > 5000
    # and the page is more than text on white: the embedded figures are painted
    assert len(np.unique(rgb.reshape(-1, 3)[::7], axis=0)) > 200
