"""report.html's reading-room layout: header block, summary table first, references and controls,
how far each series moved, key image captions with series and image numbers, no ``-0 %``."""

from __future__ import annotations

from html.parser import HTMLParser

import pytest

from sigreport.lexicon_tables import load_lexicon
from sigreport.model import LesionPhrases
from sigreport.report.html import render_html
from sigreport.report.images import png_bytes
from sigreport.report.layout import (
    alignment_moved,
    dicom_date,
    header_block,
    percent,
    person_name,
    summary_table,
)
from sigreport.report.text import report_context

XSS = "<script>alert(1)</script>"


class Text(HTMLParser):
    """Python's html.parser: the page's text, and the text of each element with an id."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.parts: list[str] = []
        self.tags: list[str] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)

    def handle_data(self, data):
        self.parts.append(data)

    @property
    def text(self) -> str:
        return " ".join(" ".join(self.parts).split())


def test_percent_never_reads_minus_zero():
    assert percent(-0.4) == "0 %" and percent(0.4) == "0 %" and percent(-0.0) == "0 %"
    assert percent(-0.6) == "-1 %" and percent(84.0) == "+84 %"
    assert percent(-11.1, signed=False) == "-11 %" and percent(None) == ""


def test_dates_and_names_read_as_a_reader_expects():
    # DICOM PS3.5 6.2: DA is YYYYMMDD; PN is family^given^middle^prefix^suffix.
    assert dicom_date("20261201") == ("1 Dec 2026", "2026-12-01")
    assert dicom_date("2026-12") == ("2026-12", "")  # not a DA: shown as it is
    assert person_name("Doe^Jane^Q") == "Doe, Jane Q"
    assert person_name("Doe") == "Doe"


def _v2(findings):
    """The findings with the schema-2 fields the layout renders when present."""
    findings["study"].update(
        patient_name=f"Doe^Jane {XSS}",
        patient_id="PID-42",
        birth_date="19700315",
        sex="F",
    )
    findings["rois"][0].update(site="left frontal white matter", medians={"T2": 678.5, "T1": -0.02})
    findings["rois"][1].update(
        site="right lateral ventricle",
        check={"kind": "fluid", "from": "T2", "to": "FLAIR", "reference": "R1",
               "drop_percent": 92.0, "passed": True},
    )  # fmt: skip
    findings["series"][0]["alignment"] = {
        "method": "rigid",
        "translation_mm": [3.0, 4.0, 0.0],
        "rotation_deg": 1.26,
        "displacement_mm": 6.24,
    }
    findings["lesions"][0]["enhancement"]["percent"] = -0.3
    return findings


@pytest.fixture
def page(findings):
    lexicon = load_lexicon()
    findings = _v2(findings)
    phrases = {"L1": LesionPhrases(grades={"T2": "markedly hyperintense"})}
    context = report_context(findings, lexicon.wording, phrases)
    tiny = png_bytes(__import__("numpy").zeros((4, 4, 3), dtype="uint8"))
    images = {
        "L1": [{"png": tiny, "role": "T2", "file": "L1_T2.png", "instance_number": 17}],
        "R1": [{"png": tiny, "role": "T2", "file": "R1_T2.png", "instance_number": 2}],
    }
    html = render_html(
        context, findings, images, lexicon.wording, iso_band=lexicon.iso_band, phrases=phrases
    )
    parser = Text()
    parser.feed(html)
    return html, parser.text


def test_header_block_names_the_patient_escaped_and_formats_dates(page):
    html, text = page
    assert "Patient Doe, Jane " + XSS in text and XSS not in html
    assert "Patient ID PID-42" in text and "Birth date 15 Mar 1970" in text
    assert "Sex female" in text and "Accession ACC123" in text
    assert "Study date 1 Dec 2026" in text and '<time datetime="2026-12-01">' in html
    assert "Series used T1 (series 2), T1FS (series 3), T2 (series 4)" in text


def test_header_without_patient_fields_says_not_given(findings):
    study = {
        k: v
        for k, v in findings["study"].items()
        if k not in ("patient_name", "patient_id", "birth_date", "sex")
    }
    rows = {r["label"]: r["value"] for r in header_block({**findings, "study": study})}
    assert rows["Patient"] == rows["Sex"] == rows["Birth date"] == "not given"
    assert rows["Accession"] == "ACC123"


def test_order_is_summary_text_images_then_details(page):
    html, _ = page
    order = [
        html.index('id="header-block"'),
        html.index('id="cautions-top"'),
        html.index('id="summary"'),
        html.index('class="lesion"'),
        html.index('class="strip"'),
        html.index('id="references"'),
        html.index('class="signal"'),
        html.index('class="series"'),
        html.index('id="cautions-end"'),
    ]
    assert order == sorted(order)


def test_summary_has_one_row_per_lesion_and_a_column_per_role(findings):
    phrases = {"L1": LesionPhrases(grades={"T2": "markedly hyperintense"})}
    table = summary_table(findings, phrases)
    assert table["roles"] == ["T1", "T1FS", "T2", "FLAIR", "T1POST"]  # reading order
    assert [r["id"] for r in table["rows"]] == ["L1", "L2", "L3"]
    l1 = dict(zip(table["roles"], table["rows"][0]["cells"], strict=True))
    assert l1["T2"]["words"] == "markedly hyperintense" and l1["T2"]["ratio"] == "2.80"
    l2 = dict(zip(table["roles"], table["rows"][1]["cells"], strict=True))
    assert l2["T1POST"]["words"] == "not assessed"  # the study has it, the lesion no value
    assert table["rows"][1]["enhancement"]["words"] == "not assessed"
    assert table["rows"][2]["enhancement"] == {"value": "+84 %", "words": "enhancing (rim)"}
    drops = {d["kind"]: d for d in table["rows"][1]["drops"]}
    assert drops["fat"]["value"] == "80 %" and drops["fat"]["words"] == "suppressed, unreliable"


def test_references_and_controls_are_shown_with_values_checks_and_images(page):
    html, text = page
    assert "R1: reference, white matter · left frontal white matter" in text
    assert "C1: control, CSF · right lateral ventricle" in text
    assert "fluid suppression T2 → FLAIR: drop 92 %, passed" in text
    section = html[html.index('id="references"') : html.index('class="signal"')]
    assert "678.5" in section and ">0.0<" in section  # a median that rounds to 0 has no sign
    assert "R1 on T2 · series 4 · image 2" in text


def test_key_image_captions_carry_series_and_image_numbers(page):
    _, text = page
    assert "T2 · series 4 · image 17" in text


def test_series_table_shows_how_far_each_series_moved(page):
    # |(3, 4, 0)| = 5 mm (numpy would agree); the corner displacement as given.
    # Numbers stay with their units (no-break spaces in the page); the cell wraps between parts.
    html, text = page
    assert "5.0 mm, 1.3°; corners up to 6.2 mm" in " ".join(text.split())
    assert "corners up to 6.2\u00a0mm" in html
    assert alignment_moved({"method": "identity", "translation_mm": [0, 0, 0],
                            "rotation_deg": 0.0}) == "none (0.0\u00a0mm, 0.0°)"  # fmt: skip


def test_minus_zero_percent_never_appears(page):
    html, text = page
    assert "-0 %" not in text and "-0 %" not in html and "-0.0" not in text


def test_reference_medians_read_from_either_schema_2_shape():
    from sigreport.report.tables import roi_medians

    assert roi_medians({"medians": {"T2": 700.0}}) == {"T2": 700.0}
    assert roi_medians({"signal": {"T2": {"median": 700.0}, "T1": None}}) == {
        "T2": 700.0,
        "T1": None,
    }
    assert roi_medians({"snr": {"T2": 40.0}}) == {}


def test_summary_says_not_assessed_for_a_flow_void(findings):
    # A flow void holds only noise (common practice: fast-flowing blood is dark on every
    # series): its enhancement and drops are not findings, in the summary as in the text.
    import copy

    voided = copy.deepcopy(findings)
    lesion = voided["lesions"][0]
    lesion["flow_void"] = True
    lesion["enhancement"] = {**(lesion.get("enhancement") or {}), "pre": "T1", "post": "T1POST",
                             "percent": -2.0, "enhancing": False}  # fmt: skip
    row = summary_table(voided, {})["rows"][0]
    assert row["enhancement"] == {"value": "", "words": "not assessed"}
    assert row["drops"] and all(
        d["value"] == "" and d["words"] == "not assessed" for d in row["drops"]
    )
    plain = summary_table(findings, {})["rows"][0]
    assert (
        plain["enhancement"]["value"] != ""
        or findings["lesions"][0]["enhancement"]["percent"] is None
    )


def test_a_borderline_cell_says_borderline_once(findings):
    # Characterization's wording already says "borderline hypointense"; the bare grade (no
    # phrase for that role) gets the word added once.
    t2 = findings["lesions"][0]["signal"]["T2"]
    t2["borderline"] = True
    t1 = findings["lesions"][0]["signal"]["T1"]
    t1["borderline"] = True
    phrases = {"L1": LesionPhrases(grades={"T2": "borderline hyperintense"})}
    table = summary_table(findings, phrases)
    l1 = dict(zip(table["roles"], table["rows"][0]["cells"], strict=True))
    assert l1["T2"]["words"] == "borderline hyperintense"
    assert l1["T1"]["words"] == f"{t1['grade']} (borderline)"
    for cell in l1.values():
        assert cell["words"].count("borderline") <= 1
