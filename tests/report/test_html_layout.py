"""report.html in the reading room, measured in headless Chromium: at 800 and 1280 px no
horizontal overflow, no word broken mid-word, no number wrapped inside its cell; printed, a
compact PDF with the cautions and the summary table on page 1 (pages counted and read by pypdf).

The layout is measured on a copy of the page carrying a probe script (the report itself has
none and its CSP forbids one; the probe's copy drops that meta, which changes no layout) that
writes what it measured into the DOM, read back with ``--dump-dom``.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
from html import unescape
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

pytestmark = pytest.mark.browser

# Runs in the probe copy only. Words are runs of non-space, non-hyphen characters: a line may
# break after a hyphen ("post-|contrast"), never inside a word. Tokens longer than 24 characters
# are no words of the report (UIDs, a hostile header value): those may break, rather than widen
# the page.
PROBE = r"""<script>
(function () {
  const root = document.documentElement;
  const out = {innerWidth: window.innerWidth, clientWidth: root.clientWidth,
               scrollWidth: root.scrollWidth,
               wrappedNumbers: [], brokenWords: [], numbers: 0};
  const lines = (range) => new Set([...range.getClientRects()].filter((r) => r.width > 0)
                                   .map((r) => Math.round(r.bottom))).size;
  for (const el of document.querySelectorAll('.num')) {
    out.numbers += 1;
    const range = document.createRange();
    range.selectNodeContents(el);
    if (lines(range) > 1) out.wrappedNumbers.push(el.textContent);
  }
  const walker = document.createTreeWalker(document.body, NodeFilter.SHOW_TEXT);
  let node;
  while ((node = walker.nextNode())) {
    if (node.parentElement.closest('svg, style, script, pre')) continue;
    const word = /[^\s\-\u2010-\u2014]+/g;
    let m;
    while ((m = word.exec(node.data))) {
      const range = document.createRange();
      range.setStart(node, m.index);
      range.setEnd(node, m.index + m[0].length);
      if (m[0].length <= 24 && lines(range) > 1) out.brokenWords.push(m[0]);
    }
  }
  const pre = document.createElement('pre');
  pre.id = 'layout-probe';
  pre.textContent = JSON.stringify(out);
  document.body.appendChild(pre);
})();
</script>"""

FLAGS = (
    "--headless", "--no-sandbox", "--disable-gpu", "--no-first-run",
    "--disable-background-networking", "--disable-component-update", "--disable-sync",
)  # fmt: skip


def _chromium() -> str:
    found = shutil.which("chromium") or shutil.which("chromium-browser")
    if found is None:
        if os.environ.get("CI"):
            pytest.fail("chromium is required when CI is set")
        pytest.skip("headless Chromium (Debian package chromium) is not installed")
    return found


def _run(args: list[str], work: Path, name: str) -> subprocess.CompletedProcess[str]:
    cmd = [_chromium(), *FLAGS, f"--user-data-dir={work / ('profile-' + name)}", *args]
    return subprocess.run(cmd, cwd=work, capture_output=True, text=True, timeout=180, check=False)


def measure_layout(html: Path, work: Path, width: int) -> dict:
    """The probe's measurements of ``html`` in a ``width`` px wide window."""
    page = html.read_text(encoding="utf-8")
    page = re.sub(r'<meta http-equiv="Content-Security-Policy"[^>]*>', "", page)
    probe = work / f"probe-{width}.html"
    probe.write_text(page.replace("</body>", PROBE + "</body>"), encoding="utf-8")
    result = _run([f"--window-size={width},1000", "--dump-dom", str(probe)], work, f"dom{width}")
    found = re.search(r'<pre id="layout-probe">(.*?)</pre>', result.stdout, re.S)
    assert found, result.stderr[-2000:]
    return json.loads(unescape(found.group(1)))


def screenshot(html: Path, work: Path, width: int) -> Image.Image:
    shot = work / f"shot-{width}.png"
    _run([f"--window-size={width},1400", f"--screenshot={shot}", str(html)], work, f"s{width}")
    return Image.open(shot).convert("RGB")


def print_pdf(html: Path, work: Path):
    import pypdf

    pdf = work / "report.pdf"
    _run(["--no-pdf-header-footer", f"--print-to-pdf={pdf}", str(html)], work, "pdf")
    return pypdf.PdfReader(str(pdf))


def test_probe_sees_overflow_broken_words_and_wrapped_numbers(tmp_path):
    # Positive control: a page that overflows, breaks a word and wraps a number is seen doing so.
    bad = tmp_path / "bad.html"
    bad.write_text(
        '<html><body style="margin:0"><div style="width:1500px">wide</div>'
        '<p style="width:40px;overflow-wrap:anywhere">hyperintensity</p>'
        '<p style="width:30px"><span class="num">+84 %</span></p></body></html>',
        encoding="utf-8",
    )
    found = measure_layout(bad, tmp_path, 800)
    assert found["innerWidth"] == 800 and found["scrollWidth"] >= 1500 > found["clientWidth"]
    assert "hyperintensity" in found["brokenWords"]
    assert found["wrappedNumbers"] == ["+84 %"]


@pytest.mark.parametrize("width", [800, 1280])
def test_page_reads_at_width_without_overflow_or_broken_words(report_dir, tmp_path, width):
    found = measure_layout(report_dir / "report.html", tmp_path, width)
    assert found["innerWidth"] == width
    # No horizontal scrolling: the page is no wider than the window less its scroll bar.
    assert found["scrollWidth"] <= found["clientWidth"] <= width
    assert found["brokenWords"] == []
    assert found["numbers"] > 50 and found["wrappedNumbers"] == []
    shot = screenshot(report_dir / "report.html", tmp_path, width)
    assert shot.size[0] == width
    # Something was drawn across the page, not a blank window: the summary table's grid lines and
    # the key images' dark strip give many distinct grey levels.
    assert len(np.unique(np.asarray(shot.convert("L")))) > 50


def test_print_is_compact_with_cautions_and_summary_on_page_one(report_dir, findings, tmp_path):
    reader = print_pdf(report_dir / "report.html", tmp_path)
    pages = [page.extract_text() or "" for page in reader.pages]
    first = " ".join(pages[0].split())
    for caution in findings["cautions"]:
        assert " ".join(caution.split()) in first
    assert "Summary" in first
    for lesion in findings["lesions"]:
        assert lesion["id"] in first  # one summary row per lesion on page 1
    # Three lesions on five series: the fixture's report fits in 3 A4 pages; no page but the last
    # is near-empty (a page holding only a heading or a caution).
    assert len(pages) <= 3
    assert all(len(text.strip()) > 200 for text in pages[:-1])
    assert not any("-0 %" in text for text in pages)


@pytest.fixture(scope="module")
def demo_report(tmp_path_factory) -> Path:
    """The bundled neuro demo's report (six lesions on seven series), as ``sigreport demo``
    writes it."""
    from typer.testing import CliRunner

    from sigreport.cli import app

    out = tmp_path_factory.mktemp("demo") / "demo"
    result = CliRunner().invoke(app, ["demo", "--out", str(out)])
    assert result.exit_code == 0, result.output
    return out / "report" / "report.html"


@pytest.mark.slow
def test_demo_report_reads_at_800_px_and_prints_compactly(demo_report, tmp_path):
    found = measure_layout(demo_report, tmp_path, 800)
    assert found["scrollWidth"] <= found["clientWidth"] <= 800
    assert found["brokenWords"] == [] and found["wrappedNumbers"] == []
    reader = print_pdf(demo_report, tmp_path)
    pages = [page.extract_text() or "" for page in reader.pages]
    first = " ".join(pages[0].split())
    assert "Draft for review by the reporting radiologist; not a diagnosis." in first
    assert "Summary" in first and all(f"L{k}" in first for k in range(1, 7))
    # Six lesions, seven series, key images and plots, the references and controls with their
    # own images, the time-intensity section: at most 6 A4 pages (measured 6 once the
    # reference and control sections joined the page; 5 before), none but the last near-empty.
    assert len(pages) <= 6
    assert all(len(text.strip()) > 600 for text in pages[:-1])
    assert not any("-0 %" in text for text in pages)
