"""The board sheet: index.html self-contained and escaped, summary.csv safe for spreadsheets."""

from __future__ import annotations

import csv
import io
from html.parser import HTMLParser

from sigreport.batch import summary_csv, write_sheet
from sigreport.batch.run import failed_summary

EVIL = '<script>alert("x")</script>'


def _cases() -> list[dict]:
    return [
        {
            "id": "board-01",
            "status": "done",
            "reason": "",
            "patient_name": f"DOE, {EVIL}",
            "patient_id": '=HYPERLINK("http://example.invalid")',
            "study_date": "2026-12-03",
            "lesions": 2,
            "behaviour": ["L1: follows fluid", f"L2: {EVIL}"],
            "change": ["L1: Since the prior study of 2026-06-03 (183 days): larger by 35 %."],
            "has_prior": True,
            "qc_warnings": ["registration: T2: moved 6 mm"],
            "report": "board-01/report.html",
        },
        failed_summary("board-02", "case.toml: roi[0] (L1): radius_mm is missing"),
    ]


class _Collect(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.tags: list[str] = []
        self.links: list[str] = []
        self.meta: list[dict] = []
        self.rows = 0

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        values = dict(attrs)
        if tag == "a":
            self.links.append(values.get("href", ""))
        if tag == "meta":
            self.meta.append(values)
        if tag == "tr" and "id" in values:
            self.rows += 1


def test_index_is_self_contained_escaped_and_linked(tmp_path):
    index, summary = write_sheet(tmp_path, _cases(), title=f"Board {EVIL}")
    html = index.read_text(encoding="utf-8")
    page = _Collect()
    page.feed(html)
    assert "script" not in page.tags  # the header values arrived as text, not as elements
    assert "&lt;script&gt;" in html
    csp = next(m for m in page.meta if m.get("http-equiv") == "Content-Security-Policy")
    assert "default-src 'none'" in csp["content"]
    assert page.rows == 2
    # Only the finished case is linked, by a relative path inside OUTDIR.
    assert page.links == ["board-01/report.html"]
    assert "failed: case.toml: roi[0] (L1): radius_mm is missing" in html
    assert "Draft for review" in html  # the cautions (lexicon/cautions.toml)
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".")]  # no temporary left
    assert summary.name == "summary.csv"


def test_summary_csv_neutralizes_formulas_and_round_trips():
    rows = list(csv.DictReader(io.StringIO(summary_csv(_cases()))))
    assert [r["id"] for r in rows] == ["board-01", "board-02"]
    # OWASP "CSV injection": a cell starting with = + - @ is prefixed with an apostrophe.
    assert rows[0]["patient_id"] == '\'=HYPERLINK("http://example.invalid")'
    assert rows[0]["lesions"] == "2"
    assert rows[0]["qc_warnings"] == "1" and rows[0]["qc_codes"] == "registration"
    assert rows[0]["behaviour"] == f"L1: follows fluid | L2: {EVIL}"
    assert rows[1]["status"] == "failed"
    assert rows[1]["reason"] == "case.toml: roi[0] (L1): radius_mm is missing"
    assert rows[1]["report"] == "" and rows[1]["qc_warnings"] == ""
