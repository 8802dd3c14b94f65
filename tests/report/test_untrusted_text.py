"""Lexicon files and header values are untrusted data: a site template cannot reach Python,
a wording placeholder cannot read attributes, and a header value cannot add lines to the text
reports or control characters to the page."""

from __future__ import annotations

import re
import shutil

import pytest

from sigreport import lexicon
from sigreport.errors import InputError
from sigreport.measure import load_rules
from sigreport.report import write_report
from sigreport.report.findings import phrases_from_findings
from sigreport.report.html import render_html
from sigreport.report.text import render_text, report_context
from sigreport.report.wording import fill, load_wording

# Classic server-side template injection payloads (jinja2's own sandbox documentation names
# attribute access to __class__/__globals__ as what the SandboxedEnvironment blocks).
ESCAPES = [
    "{{ cycler.__init__.__globals__.os.system('touch PWNED') }}",
    "{{ ''.__class__.__mro__[1].__subclasses__() }}",
    "{{ lipsum.__globals__['os'].popen('touch PWNED').read() }}",
    "{% for c in [].__class__.__base__.__subclasses__() %}{{ c }}{% endfor %}",
    "{{ titles.__class__.__init__.__globals__ }}",
]


@pytest.fixture
def site(tmp_path):
    folder = tmp_path / "site"
    (folder / "templates").mkdir(parents=True)
    return folder


@pytest.mark.parametrize("payload", ESCAPES)
@pytest.mark.parametrize("name", ["report.md.j2", "report.txt.j2"])
def test_a_text_template_cannot_reach_python(site, findings, payload, name, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    (site / "templates" / name).write_text(payload + "\n", encoding="utf-8")
    context = report_context(
        findings, load_wording(), phrases_from_findings(findings, load_rules())
    )
    with pytest.raises(InputError, match=rf"lexicon template {re.escape(name)}"):
        render_text(context, site)
    assert not (tmp_path / "PWNED").exists()


@pytest.mark.parametrize("payload", ESCAPES)
def test_the_html_template_cannot_reach_python(
    site, findings, payload, tmp_path, monkeypatch, key_slices, study
):
    monkeypatch.chdir(tmp_path)
    (site / "templates" / "report.html.j2").write_text(payload + "\n", encoding="utf-8")
    out = tmp_path / "report"
    with pytest.raises(InputError, match=r"lexicon template report\.html\.j2"):
        write_report(out, findings, key_slices[:1], study, site_lexicon=site)
    assert not (tmp_path / "PWNED").exists()
    assert not out.exists()


def test_the_sandbox_still_renders_the_bundled_templates(report_dir):
    html = (report_dir / "report.html").read_text(encoding="utf-8")
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in html and "<script>" not in html


def test_the_html_template_is_autoescaped_even_from_a_site_folder(site, findings):
    (site / "templates" / "report.html.j2").write_text(
        "{% for n in qc %}<p>{{ n.message }}</p>{% endfor %}", encoding="utf-8"
    )
    context = report_context(
        findings, load_wording(), phrases_from_findings(findings, load_rules())
    )
    html = render_html(context, findings, {}, load_wording(), site, iso_band=(0.9, 1.1))
    assert "<script>" not in html and "&lt;script&gt;" in html


def test_a_broken_site_template_names_the_template(site, findings):
    (site / "templates" / "report.txt.j2").write_text("{% for x in %}\n", encoding="utf-8")
    context = report_context(
        findings, load_wording(), phrases_from_findings(findings, load_rules())
    )
    with pytest.raises(InputError, match=r"lexicon template report\.txt\.j2"):
        render_text(context, site)


@pytest.mark.parametrize(
    "template",
    ["{size.__class__}", "{size.__class__.__mro__}", "{size[0]}", "{size!r}", "{size:>999999999}"],
)
def test_a_wording_placeholder_is_a_plain_name(template):
    with pytest.raises(InputError, match="placeholder"):
        fill(template, "size", size="12 ml")


def test_a_site_wording_with_attribute_access_is_refused_on_load(tmp_path):
    site = tmp_path / "site"
    site.mkdir()
    wording = (lexicon.bundled_dir() / "wording.toml").read_text(encoding="utf-8")
    hostile = re.sub(r"\{volume_ml\}", "{volume_ml.__class__.__mro__}", wording, count=1)
    assert hostile != wording
    (site / "wording.toml").write_text(hostile, encoding="utf-8")
    with pytest.raises(InputError, match=r"wording\.toml.*placeholder"):
        load_wording(site)


# ---- header values --------------------------------------------------------------------------

CONTROL = "ACC\r\n!! WARNING: fabricated line\x00\x1b[31m\x07\x85\u2028end"


def _lines_with(text: str, needle: str) -> list[str]:
    return [line for line in text.splitlines() if needle in line]


def test_cr_lf_in_a_header_value_adds_no_line_to_the_text_reports(findings):
    findings["study"]["accession_number"] = CONTROL
    findings["series"][0]["description"] = "t1\nFAKE SERIES LINE"
    context = report_context(
        findings, load_wording(), phrases_from_findings(findings, load_rules())
    )
    markdown, plain = render_text(context)
    for text in (markdown, plain):
        assert not any(line.startswith("!! WARNING: fabricated") for line in text.splitlines())
        assert not any(line.startswith("FAKE SERIES LINE") for line in text.splitlines())
        [line] = _lines_with(text, "fabricated line")  # the value stays on its own line
        assert "accession" in line.lower()
        assert not re.search(r"[\x00-\x08\x0b-\x1f\x7f-\x9f\u2028\u2029]", text)


def test_no_control_character_reaches_the_page(findings, tmp_path, key_slices, study):
    findings["study"]["accession_number"] = CONTROL
    findings["series"][0]["description"] = "t1\x00\x1b]0;title\x07"
    findings["qc"][0]["message"] = "note\x00with NUL"
    findings["lesions"][0]["site"] = "right\rfrontal"
    out = tmp_path / "report"
    write_report(out, findings, key_slices[:1], study)
    html = (out / "report.html").read_text(encoding="utf-8")
    assert not re.search(r"[\x00-\x08\x0b\x0c\x0e-\x1f\x7f-\x9f]", html)
    assert "note with NUL" in html or "notewith NUL" in html
    assert "right frontal" in html
    # findings.json keeps the value as read (JSON escapes it); only the human views clean it.
    assert "\\r\\n" in (out / "findings.json").read_text(encoding="utf-8")


def test_a_lone_surrogate_in_a_header_value_does_not_break_the_writer(findings, tmp_path):
    findings["series"][0]["description"] = "bad \udce9 byte"
    context = report_context(
        findings, load_wording(), phrases_from_findings(findings, load_rules())
    )
    markdown, plain = render_text(context)
    assert "bad \ufffd byte" in plain


def test_site_templates_still_work_after_cleaning(site, findings):
    shutil.copy(lexicon.bundled_dir() / "templates" / "report.txt.j2", site / "templates")
    context = report_context(
        findings, load_wording(), phrases_from_findings(findings, load_rules())
    )
    assert render_text(context, site)[1] == render_text(context)[1]


@pytest.mark.parametrize(
    "template",
    [
        "{% autoescape false %}{{ qc[0].message }}{% endautoescape %}",
        "{{ qc[0].message|safe }}",
        "{% filter safe %}{{ qc[0].message }}{% endfilter %}",
    ],
)
def test_a_site_html_template_cannot_turn_escaping_off(site, findings, template):
    (site / "templates" / "report.html.j2").write_text(template, encoding="utf-8")
    context = report_context(
        findings, load_wording(), phrases_from_findings(findings, load_rules())
    )
    with pytest.raises(InputError, match=r"lexicon template report\.html\.j2.*autoescaping"):
        render_html(context, findings, {}, load_wording(), site, iso_band=(0.9, 1.1))
