"""sigreport export REPORT --deidentify --out DIR on a report drafted from a synthetic study
whose identifiers are distinctive strings (data/board.toml): none of them, nor any UID of the
source study, survives anywhere in the export (every file's bytes, PNGs included); sr.dcm
carries the PS3.15 de-identification attributes and passes dciodvfy; the numbers are
unchanged."""

from __future__ import annotations

import hashlib
import html
import json
import os
import shutil
import struct
import subprocess
from pathlib import Path

import pydicom
import pytest
from typer.testing import CliRunner

from sigreport.cli import app
from sigreport.errors import InputError
from sigreport.export import export_report
from sigreport.pipeline import run_report
from sigreport.synth import generate_study

SCENARIO = Path(__file__).parent / "data" / "board.toml"
runner = CliRunner()
pytestmark = pytest.mark.slow  # one synthetic study and report (about 15 s)


@pytest.fixture(scope="module")
def made(tmp_path_factory):
    root = tmp_path_factory.mktemp("board")
    study = generate_study(SCENARIO, root / "case")
    run_report(study.case_path, root / "report", study_dir=study.study_dir)
    result = runner.invoke(
        app, ["export", str(root / "report"), "--deidentify", "--out", str(root / "export")]
    )
    assert result.exit_code == 0, result.output
    return {"study": study, "report": root / "report", "export": root / "export", "root": root}


def _original_identifiers(made) -> set[str]:
    """Read from the source DICOM files with pydicom (not by the tool): the patient's and the
    study's identifying values, the name's components, dates in the forms a report may print,
    and every UID of the source study and of the original SR."""
    found: set[str] = set()
    files = sorted(made["study"].study_dir.rglob("*.dcm")) + [made["report"] / "sr.dcm"]
    for path in files:
        ds = pydicom.dcmread(path, stop_before_pixels=True)
        name = str(ds.PatientName)
        found |= {name, *name.split("^"), name.replace("^", " ")}
        for keyword in ("PatientID", "AccessionNumber", "StudyDescription"):
            found.add(str(ds.get(keyword, "")))
        for keyword in ("PatientBirthDate", "StudyDate"):
            d = str(ds.get(keyword, ""))
            found |= {d, f"{d[:4]}-{d[4:6]}-{d[6:]}", f"{d[6:]}.{d[4:6]}.{d[:4]}"}
        for element in ds.iterall():
            if element.VR == "UI" and not str(element.value).startswith("1.2.840.10008"):
                if element.keyword not in ("ImplementationClassUID",):
                    found.add(str(element.value))
    generated = json.loads((made["report"] / "findings.json").read_text())["generated"]
    found |= {generated, generated[:10]}
    return {f for f in found if len(f) >= 4}


def test_the_source_identifiers_are_in_the_report_to_begin_with(made):
    """The check below would pass vacuously if the report held no identifiers."""
    text = b"".join(p.read_bytes() for p in made["report"].rglob("*") if p.is_file()).lower()
    for needle in ("QUILLFEATHER^ROSALIND^M", "PID-7741-QX", "19710203", "ACC99127X", "20251118"):
        assert needle.lower().encode() in text, needle


def test_no_original_identifier_appears_anywhere_in_the_export(made):
    needles = _original_identifiers(made)
    assert {"QUILLFEATHER", "ROSALIND", "PID-7741-QX", "1971-02-03", "ACC99127X"} <= needles
    exported = [p for p in made["export"].rglob("*") if p.is_file()]
    assert {p.name for p in exported} >= {
        "sr.dcm", "findings.json", "table.csv", "report.md", "report.txt", "report.html",
    }  # fmt: skip
    assert any(p.suffix == ".png" for p in exported)
    for path in exported:
        data = path.read_bytes().lower()
        for needle in needles:
            for form in {needle, html.escape(needle)}:
                assert form.lower().encode() not in data, (path.name, needle)


def _png_chunks(data: bytes) -> list[bytes]:
    """Chunk types of a PNG (PNG specification, 5.3: length, type, data, CRC)."""
    assert data[:8] == b"\x89PNG\r\n\x1a\n"
    chunks, at = [], 8
    while at < len(data):
        (length,) = struct.unpack(">I", data[at : at + 4])
        chunks.append(data[at + 4 : at + 8])
        at += 12 + length
    return chunks


def test_key_images_carry_no_text_chunks(made):
    for folder in (made["report"], made["export"]):
        pngs = sorted((folder / "images").glob("*.png"))
        assert pngs
        for png in pngs:
            chunks = _png_chunks(png.read_bytes())
            # Only critical chunks: no tEXt / zTXt / iTXt / eXIf / tIME metadata.
            assert set(chunks) <= {b"IHDR", b"PLTE", b"IDAT", b"IEND"}, (png.name, chunks)


def test_the_sr_carries_the_deidentification_attributes(made):
    sr = pydicom.dcmread(made["export"] / "sr.dcm")
    # PS3.3 C.7.1.1 Patient Identification; PS3.16 CID 7050.
    assert sr.PatientIdentityRemoved == "YES"
    codes = {(c.CodeValue, c.CodingSchemeDesignator) for c in sr.DeidentificationMethodCodeSequence}
    assert ("113100", "DCM") in codes
    assert sr.DeidentificationMethod
    assert str(sr.PatientName) == "" and sr.PatientID == "" and sr.PatientBirthDate == ""
    assert sr.AccessionNumber == "" and sr.StudyDate == ""
    assert not [e for e in sr.iterall() if e.tag.is_private]
    assert sr.file_meta.MediaStorageSOPInstanceUID == sr.SOPInstanceUID
    # The de-identifying equipment (PS3.16 CID 7005, 109104) is added after the source's
    # equipment items (acquisition 109101, processing 109102), which keep their purpose but
    # lose what Table E.1-1 removes (Institution Name, Device Serial Number, Contribution
    # Description) and their dates.
    items = list(sr.ContributingEquipmentSequence)
    purposes = [item.PurposeOfReferenceCodeSequence[0].CodeValue for item in items]
    assert purposes[-1] == "109104" and purposes[:-1] == ["109101", "109102"]
    for item in items:
        for keyword in (
            "InstitutionName", "DeviceSerialNumber", "ContributionDescription",
            "ContributionDateTime",
        ):  # fmt: skip
            assert keyword not in item, keyword


def test_highdicom_reads_the_same_measurement_groups_from_both_srs(made):
    import highdicom as hd

    def groups(path: Path) -> list[tuple[str, str, int]]:
        sr = hd.sr.srread(path)
        return [
            (g.tracking_identifier, g.tracking_uid, len(g.get_measurements()))
            for g in sr.content.get_image_measurement_groups()
        ]

    before, after = groups(made["report"] / "sr.dcm"), groups(made["export"] / "sr.dcm")
    assert [(t, n) for t, _u, n in after] == [(t, n) for t, _u, n in before]
    assert [u for _t, u, _n in after] != [u for _t, u, _n in before]  # tracking UIDs replaced
    assert after and after[0][2] > 0


def test_uids_are_replaced_consistently_across_the_sr_and_findings(made):
    original = pydicom.dcmread(made["report"] / "sr.dcm")
    sr = pydicom.dcmread(made["export"] / "sr.dcm")
    findings = json.loads((made["export"] / "findings.json").read_text())
    assert sr.StudyInstanceUID == findings["study"]["study_instance_uid"]
    assert sr.StudyInstanceUID != original.StudyInstanceUID
    evidence = {
        s.SeriesInstanceUID
        for s in sr.CurrentRequestedProcedureEvidenceSequence[0].ReferencedSeriesSequence
    }
    measured = {s["series_instance_uid"] for s in findings["series"] if s["measured"]}
    assert evidence == measured
    # The same source image is referenced by the same new UID wherever it occurs.
    refs = [e.value for e in original.iterall() if e.keyword == "ReferencedSOPInstanceUID"]
    new = [e.value for e in sr.iterall() if e.keyword == "ReferencedSOPInstanceUID"]
    assert len(refs) == len(new)
    assert len(set(zip(refs, new, strict=True))) == len(set(refs)) == len(set(new))
    html_text = (made["export"] / "report.html").read_text()
    assert findings["study"]["study_instance_uid"] in html_text


def test_the_measurements_are_unchanged(made):
    before = json.loads((made["report"] / "findings.json").read_text())
    after = json.loads((made["export"] / "findings.json").read_text())
    assert after["lesions"] == before["lesions"]
    assert after["rois"] == before["rois"]
    assert after["cautions"] == before["cautions"]
    assert "generated" not in after
    assert after["study"]["study_date"] is None and after["study"]["accession_number"] is None
    table_before = (made["report"] / "table.csv").read_text().splitlines()
    table_after = (made["export"] / "table.csv").read_text().splitlines()
    assert table_after == table_before  # the table holds no identifier to begin with


@pytest.mark.dciodvfy
def test_the_deidentified_sr_passes_dciodvfy(made):
    binary = shutil.which("dciodvfy")
    if binary is None:
        if os.environ.get("CI"):
            pytest.fail("dciodvfy (Debian dicom3tools) is required when CI is set")
        pytest.skip("dciodvfy (Debian dicom3tools) is not installed")

    def lines(path: Path) -> set[str]:
        result = subprocess.run([binary, str(path)], capture_output=True, text=True, timeout=60)
        return set((result.stdout + result.stderr).splitlines())

    before, after = lines(made["report"] / "sr.dcm"), lines(made["export"] / "sr.dcm")
    assert "Comprehensive3DSR" in after
    assert [line for line in after if line.startswith("Error")] == []
    # The only new warnings: a DICOMDIR could not be indexed by the attributes the profile
    # empties (Z: Patient ID, Study Date, Study Time, Study ID; Type 2 in the IOD).
    prefix = "Warning - Missing attribute or value that would be needed to build DICOMDIR - "
    assert after - before == {
        prefix + name for name in ("Patient ID", "Study Date", "Study Time", "Study ID")
    }


def _digest(folder: Path) -> dict[str, str]:
    return {
        str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
        for p in sorted(folder.rglob("*"))
        if p.is_file()
    }


def test_export_refuses_the_report_folder_itself_and_never_changes_it(made):
    before = _digest(made["report"])
    for target in (made["report"], made["report"] / "teaching"):
        with pytest.raises(InputError, match="never changed"):
            export_report(made["report"], target, force=True)
    with pytest.raises(InputError, match="--force"):
        export_report(made["report"], made["export"])
    assert _digest(made["report"]) == before


def test_export_without_deidentify_is_refused(made, tmp_path):
    result = runner.invoke(app, ["export", str(made["report"]), "--out", str(tmp_path / "x")])
    assert result.exit_code == 2
    assert "--deidentify" in result.output
    assert not (tmp_path / "x").exists()


def test_a_left_identifier_stops_the_export_with_nothing_written(made, tmp_path, monkeypatch):
    import sigreport.export.folder as folder

    monkeypatch.setattr(
        folder, "find_identifiers", lambda files, ids, uids: [("report.md", "patient id")]
    )
    with pytest.raises(InputError, match="report.md still holds the patient id"):
        export_report(made["report"], tmp_path / "out")
    assert list(tmp_path.iterdir()) == []


def test_free_text_holding_an_identifier_is_cleaned(tmp_path, made):
    """A lesion site typed with the patient's name in it: the export replaces it."""
    copy = tmp_path / "report"
    shutil.copytree(made["report"], copy)
    findings = json.loads((copy / "findings.json").read_text())
    findings["lesions"][0]["site"] = "right frontal (Quillfeather Rosalind, PID-7741-QX)"
    (copy / "findings.json").write_text(json.dumps(findings))
    export_report(copy, tmp_path / "out")
    text = (tmp_path / "out" / "report.txt").read_text()
    assert "right frontal ([removed], [removed])" in text
    assert "quillfeather" not in text.lower()


def test_the_exported_findings_still_follow_the_schema(made):
    import jsonschema

    schema = json.loads((Path(__file__).parents[2] / "docs" / "findings.schema.json").read_text())
    findings = json.loads((made["export"] / "findings.json").read_text())
    jsonschema.Draft202012Validator(schema).validate(findings)


def test_export_opens_no_network_connection(made, tmp_path, monkeypatch):
    import socket

    def refuse(*args: object, **kwargs: object) -> None:
        raise AssertionError("a network connection was opened")

    monkeypatch.setattr(socket.socket, "connect", refuse)
    monkeypatch.setattr(socket, "create_connection", refuse)
    export_report(made["report"], tmp_path / "out")
    assert (tmp_path / "out" / "sr.dcm").is_file()


def _keywords(ds) -> set[str]:
    return {e.keyword for e in ds.iterall() if e.keyword}


def test_every_attribute_of_our_sr_is_a_row_of_table_e1_1_or_has_a_stated_rule(made):
    """PS3.15 Table E.1-1 (shipped, sigreport/export/ps3_15_table_e1_1.tsv) or NOT_IN_TABLE
    covers each attribute the report's SR holds, at every level; none is left to the
    fallback by VR."""
    from sigreport.export.profile import ACTIONS_BY_TAG, NOT_IN_TABLE

    sr = pydicom.dcmread(made["report"] / "sr.dcm")
    uncovered = sorted(
        {
            e.keyword
            for e in sr.iterall()
            if int(e.tag) not in ACTIONS_BY_TAG and e.keyword not in NOT_IN_TABLE
        }
    )
    assert uncovered == []
    # The rows our SR meets, as the table gives them (the copy's rows, not our code's):
    # identifiers zeroed or replaced, the content tree cleaned.
    assert {"PatientName", "PatientID", "StudyInstanceUID", "ContentSequence"} <= _keywords(sr)


def test_every_attribute_is_handled_as_its_row_says_and_uids_map_one_to_one(made, profile_checker):
    original = pydicom.dcmread(made["report"] / "sr.dcm")
    out = pydicom.dcmread(made["export"] / "sr.dcm")
    identifiers = sorted(_original_identifiers(made)) + [
        str(e.value) for e in original.iterall() if e.keyword == "InstitutionName"
    ]
    uids = profile_checker(original, out, identifiers)
    # Study, series, instance, frame of reference and tracking UIDs all replaced.
    assert original.StudyInstanceUID in uids and original.SOPInstanceUID in uids
    assert len(uids) > 10
    # The same map in findings.json: every original UID it names has the SR's new UID.
    before = json.loads((made["report"] / "findings.json").read_text())
    after = json.loads((made["export"] / "findings.json").read_text())
    assert after["study"]["study_instance_uid"] == uids[before["study"]["study_instance_uid"]]
    pairs = [
        (a["series_instance_uid"], b["series_instance_uid"])
        for a, b in zip(before["series"], after["series"], strict=True)
    ]
    seen_in_sr = [(old, new) for old, new in pairs if old in uids]
    assert seen_in_sr  # the measured series are referenced by the SR
    assert all(uids[old] == new for old, new in seen_in_sr)
    assert all(new != old and new.startswith("2.25.") for old, new in pairs)
    # And in the text files: the series table and the page name the new UIDs only.
    page = (made["export"] / "report.html").read_text()
    assert uids[original.StudyInstanceUID] in page
