"""report.md / report.txt: the draft paragraphs in the lexicon's wording, cautions once on top,
QC warnings prominent, unreliable flags said to be unreliable."""

from __future__ import annotations

import re
import shutil

import pytest

from sigreport import lexicon
from sigreport.errors import InputError
from sigreport.measure import load_rules
from sigreport.model import BehaviourPhrase, LesionPhrases
from sigreport.report.findings import phrases_from_findings
from sigreport.report.text import md_escape, render_text, report_context
from sigreport.report.wording import load_wording

XSS = "<script>alert(1)</script>"


def _lesion_block(text: str, lesion_id: str) -> str:
    start = text.index(f"{lesion_id}: ")
    nxt = re.search(r"\n(#+ )?L\d: ", text[start + 1 :])
    return text[start : start + 1 + nxt.start()] if nxt else text[start:]


def _phrases(findings, site=None):
    """The words characterization would have chosen for the fixture's lesions."""
    return phrases_from_findings(findings, load_rules(site))


@pytest.fixture(scope="module")
def texts(report_dir):
    return {
        "md": (report_dir / "report.md").read_text(encoding="utf-8"),
        "txt": (report_dir / "report.txt").read_text(encoding="utf-8"),
    }


@pytest.mark.parametrize("kind", ["md", "txt"])
def test_cyst_like_lesion_suppresses_on_flair(texts, kind):
    block = _lesion_block(texts[kind], "L1")
    assert "suppresses on FLAIR" in block
    assert "to white matter on" in block  # signal is relative to the named reference tissue
    assert "91 %" in block


@pytest.mark.parametrize("kind", ["md", "txt"])
def test_fat_lesion_loses_signal_on_fat_suppressed_t1_and_flag_is_unreliable(texts, kind):
    block = " ".join(_lesion_block(texts[kind], "L2").split())
    assert "loses signal on fat-suppressed T1" in block
    assert "unreliable" in block
    assert "could not be measured on post-contrast T1" in block


@pytest.mark.parametrize("kind", ["md", "txt"])
def test_rim_lesion_reports_rim_enhancement_with_percent(texts, kind):
    block = " ".join(_lesion_block(texts[kind], "L3").split())
    assert "Rim enhancement (+84 %)" in block
    assert "does not suppress on FLAIR" in block


@pytest.mark.parametrize("kind", ["md", "txt"])
def test_cautions_appear_once_on_top(texts, findings, kind):
    text = " ".join(texts[kind].split())
    first_lesion = text.index("L1: ")
    for caution in findings["cautions"]:
        caution = md_escape(caution) if kind == "md" else caution
        assert text.index(caution) < first_lesion
        assert text.count(caution) == 1


def test_markdown_cautions_are_a_list(texts, findings):
    lines = texts["md"].splitlines()
    for caution in findings["cautions"]:
        assert f"- {md_escape(caution)}" in lines


@pytest.mark.parametrize("kind", ["md", "txt"])
def test_qc_warning_is_shown_before_the_findings(texts, kind):
    text = " ".join(texts[kind].split())
    assert text.index("fat control F1 did not drop on T1FS") < text.index("L1: ")
    assert "WARNING" in text


def test_plain_text_wraps_at_100_columns_and_has_no_markup(texts):
    lines = texts["txt"].splitlines()
    assert max(len(line) for line in lines) <= 100, [line for line in lines if len(line) > 100]
    assert "**" not in texts["txt"] and "| ---" not in texts["txt"] and "###" not in texts["txt"]


def test_markdown_escapes_header_and_case_file_values(texts):
    assert XSS not in texts["md"]
    # Backslash escapes (CommonMark): the file reads as text, with no HTML entity in it.
    assert "\\<script>alert(1)\\</script>" in texts["md"]
    assert "&lt;" not in texts["md"] and "&gt;" not in texts["md"]
    # One table row per lesion and role, after the header and the rule.
    table = texts["md"].split("## Signal-behaviour table", 1)[1].split("## ", 1)[0]
    assert len([ln for ln in table.splitlines() if re.match(r"\| L\d ", ln)]) == 15


def test_behaviour_phrases_are_listed(findings):
    wording = load_wording()
    context = report_context(findings, wording, phrases_from_findings(findings, load_rules()))
    for lesion, source in zip(context["lesions"], findings["lesions"], strict=True):
        assert len(lesion["behaviours"]) == len(source["behaviour"])
    rule = load_rules().behaviour[findings["lesions"][0]["behaviour"][0]]
    line = context["lesions"][0]["behaviours"][0]
    assert line.startswith(rule.phrase[:1].upper() + rule.phrase[1:])
    assert "consider" in line and rule.considerations[0] in line


def test_the_report_renders_the_words_it_is_given_and_computes_none(findings):
    lesion = findings["lesions"][0]
    role = next(r for r, s in lesion["signal"].items() if s is not None and s["ratio"] is not None)
    carried = LesionPhrases(
        grades={role: "strangely graded"},
        behaviour=(BehaviourPhrase(lesion["behaviour"][0], "a carried phrase", ("x-thing",)),),
    )
    context = report_context(findings, load_wording(), {lesion["id"]: carried})
    first = context["lesions"][0]
    assert "strangely graded" in first["paragraph"]
    assert (
        first["behaviours"][0].startswith("A carried phrase")
        and "x-thing" in first["behaviours"][0]
    )
    # Without words for a key, the key itself is read, hyphens as spaces.
    bare = report_context(findings, load_wording(), {})["lesions"][0]
    key = lesion["behaviour"][0]
    assert bare["behaviours"][0].startswith((key[:1].upper() + key[1:]).replace("-", " "))


def test_a_site_can_reword_without_code(tmp_path, findings):
    site = tmp_path / "site"
    (site / "templates").mkdir(parents=True)
    wording = (lexicon.bundled_dir() / "wording.toml").read_text(encoding="utf-8")
    site_wording = wording.replace(
        'fluid_suppressed = "It suppresses on {to}', 'fluid_suppressed = "Signal is nulled on {to}'
    )
    assert site_wording != wording
    (site / "wording.toml").write_text(site_wording, encoding="utf-8")
    (site / "templates" / "report.txt.j2").write_text(
        "SITE {% for l in lesions %}{{ l.paragraph }}{% endfor %}\n", encoding="utf-8"
    )
    context = report_context(findings, load_wording(site), _phrases(findings, site))
    markdown, plain = render_text(context, site)
    assert plain.startswith("SITE ") and "Signal is nulled on FLAIR" in plain
    assert "Signal is nulled on FLAIR" in markdown  # bundled md template, site wording


def test_templates_are_strict_about_undefined_names(tmp_path, findings):
    site = tmp_path / "site"
    (site / "templates").mkdir(parents=True)
    (site / "templates" / "report.md.j2").write_text("{{ no_such_name }}\n", encoding="utf-8")
    context = report_context(findings, load_wording(), _phrases(findings))
    with pytest.raises(InputError, match="report.md.j2 .*UndefinedError.*no_such_name"):
        render_text(context, site)


def test_wording_with_a_missing_key_is_an_input_error(tmp_path):
    site = tmp_path / "site"
    site.mkdir()
    wording = (lexicon.bundled_dir() / "wording.toml").read_text(encoding="utf-8")
    (site / "wording.toml").write_text(
        re.sub(r"(?m)^flow_void = .*$", "", wording), encoding="utf-8"
    )
    with pytest.raises(InputError, match=r"\[sentences\]: missing key\(s\) flow_void"):
        load_wording(site)


def test_wording_with_an_unknown_placeholder_names_the_key(tmp_path, findings):
    site = tmp_path / "site"
    site.mkdir()
    shutil.copy(lexicon.bundled_dir() / "wording.toml", site / "wording.toml")
    text = (site / "wording.toml").read_text(encoding="utf-8")
    (site / "wording.toml").write_text(
        text.replace('no_flow_void = "No flow void."', 'no_flow_void = "No flow void."').replace(
            'size = "It measures {volume_ml} ml', 'size = "It measures {volume} ml'
        ),
        encoding="utf-8",
    )
    with pytest.raises(InputError, match=r"\[sentences\] size: cannot fill"):
        report_context(findings, load_wording(site), _phrases(findings, site))


def test_wrapping_keeps_a_number_with_its_unit():
    from sigreport.report.text import wrap

    # 49 two-character words fill 98 columns: "+1" fits on line one only if split from "%".
    lines = wrap("a " * 49 + "+1 % and 5 ml y", 100).splitlines()
    assert lines[1].startswith("+1 % and 5 ml")
    assert all(len(line) <= 100 for line in lines)


def test_a_negative_drop_reads_as_brighter_not_as_a_negative_drop(findings):
    # A haematoma is brighter on FLAIR than on T2 relative to white matter: "signal drop -42 %"
    # would read as a typo to a radiologist.
    lesion = findings["lesions"][0]
    lesion["suppression"]["fluid"].update(drop_percent=-42.0, suppressed=False)
    context = report_context(findings, load_wording(), _phrases(findings))
    markdown, plain = render_text(context)
    block = " ".join(_lesion_block(plain, lesion["id"]).split())
    assert "relatively 42 % brighter than on T2" in block
    assert "drop -42" not in block


@pytest.mark.parametrize("kind", ["md", "txt"])
def test_a_header_block_opens_the_report(texts, kind):
    head = texts[kind].split("Draft findings".upper() if kind == "txt" else "## Draft findings")[0]
    # DICOM PN "Test^Report" reads "Test, Report"; dates in the lexicon's format ("%d %b %Y").
    for line in (
        "Patient: Test, Report",
        "Patient ID: SIGRPT-001",
        "Born: 01 Jan 1970",
        "Sex: O",
        "Accession: ACC123",
        "Study date: 01 Dec 2026",
        "Series used: T1 (series 2), T1FS (series 3), T2 (series 4), FLAIR (series 5), T1POST",
    ):
        assert line in " ".join(head.split())
    assert head.index("Patient:") < head.index("Draft for review")


@pytest.mark.parametrize("kind", ["md", "txt"])
def test_references_and_controls_are_shown_with_site_medians_and_check(texts, kind):
    text = " ".join(texts[kind].split())
    assert (
        "R1 (reference): white matter, left frontal white matter; median T1 666.7, T2 678.6, FLAIR not measured."
        in text
    )
    assert "C1 (control): CSF, right lateral ventricle; median T2 2500.0, FLAIR 200.0." in text
    assert "Its fluid suppression check passed (drop 92 % from T2 to FLAIR)." in text


def test_the_series_table_shows_how_far_each_series_moved(texts):
    md_rows = [line for line in texts["md"].splitlines() if line.startswith("| T1 | 2 |")]
    assert md_rows and "| rigid | 2.8 | 1.2 |" in md_rows[0]  # 2.75 mm, 1.25 deg (one decimal)
    txt_rows = [line.split() for line in texts["txt"].splitlines() if line.startswith("T1   ")]
    assert ["T1", "2", "yes", "rigid", "2.8", "1.2", "t1_se_tra"] in txt_rows


def test_dates_follow_the_lexicon_format(tmp_path, findings):
    site = tmp_path / "site"
    site.mkdir()
    text = (lexicon.bundled_dir() / "wording.toml").read_text(encoding="utf-8")
    (site / "wording.toml").write_text(text.replace('date = "%d %b %Y"', 'date = "%d.%m.%Y"'))
    context = report_context(findings, load_wording(site), _phrases(findings))
    assert "Study date: 01.12.2026" in context["header_lines"]
    assert "Born: 01.01.1970" in context["header_lines"]


def test_a_site_wording_copy_without_the_later_keys_still_loads(tmp_path):
    # Keys added after site copies existed fall back to the bundled wording.
    site = tmp_path / "site"
    site.mkdir()
    text = (lexicon.bundled_dir() / "wording.toml").read_text(encoding="utf-8")
    kept = [
        line
        for line in text.splitlines()
        if not line.startswith(("size_axes", "size_roi", "signal_unnormalized", "references ="))
    ]
    text = "\n".join(kept).split("# Formats:")[0] + "\n[qc]" + text.split("[qc]")[1]
    (site / "wording.toml").write_text(text)
    local = load_wording(site)
    bundled = load_wording()
    assert local.sentences["size_axes"] == bundled.sentences["size_axes"]
    assert local.formats == bundled.formats and local.header == bundled.header
