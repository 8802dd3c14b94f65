"""report.html: self-contained, escaped, one table row per lesion and role, key images as data:
URIs; rendered in headless Chromium with a net-log showing no request made by the page."""

from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import pytest

XSS = "<script>alert(1)</script>"
URL_ATTRS = {"src", "href", "action", "poster", "srcset", "data", "xlink:href", "formaction"}


class Page(HTMLParser):
    """Python's html.parser (the oracle): elements, URL attributes, table rows, text."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.tags: list[str] = []
        self.urls: list[str] = []
        self.images: list[str] = []
        self.styles: list[str] = []
        self.signal_rows = 0
        self._table: str | None = None
        self._in_tbody = False
        self._in_style = False
        self.text: list[str] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        values = dict(attrs)
        for name, value in attrs:
            if name in URL_ATTRS and value is not None:
                self.urls.append(value)
            if name == "style" and value:
                self.styles.append(value)
        if tag == "img":
            self.images.append(values.get("src") or "")
        if tag == "table":
            self._table = values.get("class")
        if tag == "tbody":
            self._in_tbody = True
        if tag == "tr" and self._in_tbody and self._table == "signal":
            self.signal_rows += 1
        if tag == "style":
            self._in_style = True

    def handle_endtag(self, tag):
        if tag == "tbody":
            self._in_tbody = False
        if tag == "table":
            self._table = None
        if tag == "style":
            self._in_style = False

    def handle_data(self, data):
        if self._in_style:
            self.styles.append(data)
        else:
            self.text.append(data)


@pytest.fixture(scope="module")
def page(report_dir) -> tuple[Page, str]:
    html = (report_dir / "report.html").read_text(encoding="utf-8")
    parser = Page()
    parser.feed(html)
    parser.close()
    return parser, html


def test_table_has_one_row_per_lesion_and_role(page, findings):
    parser, _ = page
    assert parser.signal_rows == sum(len(lesion["signal"]) for lesion in findings["lesions"])


def test_key_images_are_embedded_as_png_data_uris(page):
    parser, _ = page
    assert len(parser.images) == 15
    assert all(src.startswith("data:image/png;base64,") for src in parser.images)


def test_no_script_and_no_external_reference(page):
    parser, html = page
    assert "script" not in parser.tags and "link" not in parser.tags and "iframe" not in parser.tags
    for url in parser.urls:
        assert url.startswith("data:"), url
    css = " ".join(parser.styles)
    assert not re.search(r"url\(", css) and "@import" not in css and "@font-face" not in css
    # Any remote reference at all, in any attribute or text: none (the SVG namespace is a name,
    # not a fetched URL).
    without_data = re.sub(r"data:[^\"']*", "", html)
    remote = re.findall(r"(?:https?:)?//[\w.-]+", without_data)
    assert set(remote) <= {"http://www.w3.org"}
    assert without_data.count('xmlns="http://www.w3.org/2000/svg"') == len(remote)


def test_header_and_case_file_values_are_text_not_elements(page):
    parser, html = page
    text = "".join(parser.text)
    assert XSS in text  # the series description and the lesion site, shown as text
    assert XSS not in html and "&lt;script&gt;alert(1)&lt;/script&gt;" in html


def test_cautions_on_top_and_at_the_end_and_warning_prominent(page, findings):
    _, html = page
    top, end = html.index('id="cautions-top"'), html.index('id="cautions-end"')
    first = html.index('class="lesion"')
    for caution in findings["cautions"]:
        assert top < html.index(caution) < first and html.rindex(caution) > end
    assert html.index('id="warnings"') < first


def test_each_lesion_has_a_ratio_plot(page, findings):
    _, html = page
    assert html.count('class="ratio-plot"') == len(findings["lesions"])
    assert html.count('class="iso-band"') == len(findings["lesions"])


def _chromium() -> str | None:
    found = shutil.which("chromium") or shutil.which("chromium-browser")
    if found is None:
        if os.environ.get("CI"):
            pytest.fail("chromium is required when CI is set")
        pytest.skip("headless Chromium (Debian package chromium) is not installed")
    return found


def _render(binary: str, html: Path, work: Path) -> tuple[Path, list[dict]]:
    """Screenshot ``html`` and return the screenshot and the net-log's URL requests."""
    shot, netlog = work / "out.png", work / "net.json"
    cmd = [
        binary, "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
        "--disable-component-update", "--disable-sync", "--no-first-run",
        f"--user-data-dir={work / 'profile'}", f"--log-net-log={netlog}",
        f"--screenshot={shot}", "--window-size=1200,900", str(html),
    ]  # fmt: skip
    subprocess.run(cmd, cwd=work, capture_output=True, timeout=120, check=False)
    log = json.loads(netlog.read_text(encoding="utf-8"))
    names = {v: k for k, v in log["constants"]["logEventTypes"].items()}
    starts = [
        e["params"]
        for e in log["events"]
        if names.get(e["type"]) == "URL_REQUEST_START_JOB" and "url" in e.get("params", {})
    ]
    return shot, starts


def _page_requests(starts: list[dict]) -> list[str]:
    # Chromium's own background traffic (updates, time, accounts) has no initiating origin;
    # a request made by a page loaded from file:// has the page's (opaque) origin.
    return [p["url"] for p in starts if p.get("initiator") != "not an origin"]


@pytest.mark.browser
def test_renders_in_headless_chromium_without_network_requests(report_dir, tmp_path):
    binary = _chromium()
    # Positive control: the same net-log check sees a page's request to a closed local port.
    control_dir = tmp_path / "control"
    control_dir.mkdir()
    control = control_dir / "control.html"
    control.write_text('<img src="http://127.0.0.1:9/probe.png">', encoding="utf-8")
    _, starts = _render(binary, control, control_dir)
    assert any("127.0.0.1:9/probe.png" in url for url in _page_requests(starts))

    work = tmp_path / "report"
    work.mkdir()
    shot, starts = _render(binary, report_dir / "report.html", work)
    assert shot.is_file() and shot.stat().st_size > 10_000
    assert shot.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert _page_requests(starts) == []
