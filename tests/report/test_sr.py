"""sr.dcm: valid per dicom3tools' dciodvfy, and read back by highdicom with the same values."""

from __future__ import annotations

import os
import shutil
import subprocess
from dataclasses import replace

import highdicom as hd
import pytest
from pydicom import dcmread
from pydicom.sr.codedict import codes
from report.conftest import make_key_slices

from sigreport.report import sr as sr_module
from sigreport.report import sr_content
from sigreport.report.sr import PRIVATE_SCHEME, build_sr, grade_name, write_sr


@pytest.fixture(scope="module")
def sr_path(report_dir):
    return report_dir / "sr.dcm"


@pytest.fixture(scope="module")
def sr(sr_path):
    return hd.sr.srread(sr_path)


@pytest.mark.dciodvfy
def test_sr_passes_dciodvfy(sr_path):
    binary = shutil.which("dciodvfy")
    if binary is None:
        if os.environ.get("CI"):
            pytest.fail("dciodvfy (Debian dicom3tools) is required when CI is set")
        pytest.skip("dciodvfy (Debian dicom3tools) is not installed")
    result = subprocess.run([binary, str(sr_path)], capture_output=True, text=True, timeout=60)
    output = result.stdout + result.stderr
    assert "Comprehensive3DSR" in output  # dciodvfy recognised the IOD it checks against
    errors = [line for line in output.splitlines() if line.startswith("Error")]
    assert errors == []


def test_sr_is_a_draft_comprehensive_3d_sr(sr):
    # PS3.4 / PS3.6: Comprehensive 3D SR Storage SOP class.
    assert sr.SOPClassUID == "1.2.840.10008.5.1.4.1.1.88.34"
    assert sr.CompletionFlag == "PARTIAL" and sr.VerificationFlag == "UNVERIFIED"
    assert sr.ContentTemplateSequence[0].TemplateIdentifier == "1500"
    scheme = sr.CodingSchemeIdentificationSequence[0]
    assert scheme.CodingSchemeDesignator == PRIVATE_SCHEME


def test_patient_and_study_come_from_the_source_images(sr, study):
    source = dcmread(study["T2"].instances[1].path, stop_before_pixels=True)
    for keyword in ("PatientID", "PatientName", "StudyInstanceUID", "AccessionNumber", "StudyDate"):
        assert sr.get(keyword) == source.get(keyword), keyword


@pytest.fixture(scope="module")
def groups(sr):
    """Each measurement group read once by highdicom: (group, measurements, evaluations)."""
    return {
        g.tracking_identifier.split(" ")[0]: (
            g,
            g.get_measurements(),
            g.get_qualitative_evaluations(),
        )
        for g in sr.content.get_image_measurement_groups()
    }


def test_one_measurement_group_per_lesion_and_roi_tracked_by_id(groups, findings):
    ids = [lesion["id"] for lesion in findings["lesions"]] + [r["id"] for r in findings["rois"]]
    assert sorted(groups) == sorted(ids)
    assert groups["L1"][0].tracking_identifier == "L1 (right frontal white matter)"
    assert groups["R1"][0].tracking_identifier == "R1 (reference: white matter)"


def _series_of(measurement, study) -> str | None:
    """The role of the series whose image a measurement references (TID 300 Source of
    Measurement), the standard way to say which series a value was measured on."""
    uids = {r.referenced_sop_instance_uid for r in measurement.referenced_images or ()}
    for role, stack in study.items():
        if uids & {i.sop_instance_uid for i in stack.instances}:
            return role
    return None


def _value(measurements, name, role=None, derivation=None, study=None):
    found = [
        m
        for m in measurements
        if m.name == name
        and (role is None or _series_of(m, study) == role)
        and (derivation is None or m.derivation == derivation)
    ]
    assert len(found) == 1, (name, role, derivation, len(found))
    return found[0]


def test_measurement_values_read_back(groups, findings, study):
    for lesion in findings["lesions"]:
        _, measurements, _ = groups[lesion["id"]]
        volume = _value(measurements, codes.SCT.Volume)
        assert volume.value == pytest.approx(lesion["volume_ml"])
        assert volume.unit.value == "ml"
        for role, stats in lesion["signal"].items():
            if stats is None:
                continue
            signal = codes.DCM.MRSignalIntensity
            mean = _value(measurements, signal, role, codes.cid7464.Mean, study)
            assert mean.value == pytest.approx(stats["mean"])
            median = _value(measurements, signal, role, codes.cid7464.Median, study)
            assert median.value == pytest.approx(stats["median"])
            ratio = _value(measurements, codes.SCT.Ratio, role, study=study)
            assert ratio.value == pytest.approx(stats["ratio"])
            assert ratio.unit.value == "{ratio}"
            # Which series: the referenced image, not a private concept.
            assert ratio.method is None


def test_enhancement_and_suppression_read_back(groups):
    [enh] = [m for m in groups["L3"][1] if m.name.value == "ENH-PCT"]
    assert enh.value == pytest.approx(84.0) and enh.unit.value == "%"
    [fluid] = [m for m in groups["L1"][1] if m.name.value == "DROP-FLUID"]
    assert fluid.value == pytest.approx(91.1)


def test_grade_codes_are_cid_6343(groups, findings):
    expected = {
        "hyperintense": codes.cid6343.Hyperintense,
        "isointense": codes.cid6343.Isointense,
        "hypointense": codes.cid6343.Hypointense,
    }
    for lesion in findings["lesions"]:
        _, _, all_evaluations = groups[lesion["id"]]
        for role, stats in lesion["signal"].items():
            evaluations = [e for e in all_evaluations if e.name == grade_name(role)]
            if stats is None:
                assert evaluations == []
                continue
            assert len(evaluations) == 1
            assert evaluations[0].value == expected[stats["grade"]]
    # RADLEX RID35805 "Hyperintense" (PS3.16 CID 6343).
    assert expected["hyperintense"].value == "RID35805"


def test_flags_are_coded(groups):
    [pattern] = [e for e in groups["L3"][2] if e.name == codes.RADLEX.EnhancementPattern]
    assert pattern.value.meaning == "Rim enhancement"
    reliable = [e for e in groups["L2"][2] if e.name.value == "RELIABLE-FAT"]
    assert len(reliable) == 1 and reliable[0].value == codes.SCT.No


def test_measurements_reference_their_source_images(sr, groups, study):
    measurements = groups["L1"][1]
    mean = _value(measurements, codes.DCM.MRSignalIntensity, "T2", codes.cid7464.Mean, study)
    [ref] = mean.referenced_images
    assert ref.referenced_sop_instance_uid == study["T2"].instances[1].sop_instance_uid
    evidence = {
        item.ReferencedSOPInstanceUID
        for study_item in sr.CurrentRequestedProcedureEvidenceSequence
        for series in study_item.ReferencedSeriesSequence
        for item in series.ReferencedSOPSequence
    }
    assert evidence == {s.instances[1].sop_instance_uid for s in study.values()}


def test_cautions_travel_with_the_sr(sr, findings):
    texts = [item.TextValue for item in sr.ContentSequence if item.ValueType == "TEXT"]
    for caution in findings["cautions"]:
        assert caution in texts
    assert any("fat-suppression-failed" in t for t in texts)


def test_sr_without_any_source_instance_is_refused(findings):
    with pytest.raises(ValueError, match='Argument "stacks" holds no source instance'):
        build_sr(findings, [], {})


def test_the_document_content_view_is_the_whole_tree(findings, study, key_slices):
    # build_sr attaches the content tree without highdicom's deep copy: highdicom's content
    # view of the new document must be the same full tree as its dataset (a group per lesion
    # and per reference or control ROI, not the placeholder the document was built around).
    document = build_sr(findings, key_slices, study)
    root = document.content[0]
    assert root.ContentSequence is document.ContentSequence
    imaging = [
        item
        for item in document.ContentSequence
        if item.ValueType == "CONTAINER"
        and item.ConceptNameCodeSequence[0].CodeValue == "126010"  # Imaging Measurements, PS3.16
    ]
    [measurements] = imaging
    ids = [
        item.TextValue
        for group in measurements.ContentSequence
        for item in group.ContentSequence
        if item.ValueType == "TEXT" and item.ConceptNameCodeSequence[0].CodeValue == "112039"
    ]
    expected = len(findings["lesions"]) + len(findings.get("rois", []))
    assert len(ids) == expected and "placeholder" not in ids


def test_image_library_describes_each_series_once(sr, study):
    # TID 1600: Image Library > Image Library Group > image entries (PS3.16); one per series.
    [library] = [
        item
        for item in sr.ContentSequence
        if item.ValueType == "CONTAINER"
        and item.ConceptNameCodeSequence[0].CodeValue == "111028"  # Image Library, PS3.16
    ]
    entries = [
        entry.ReferencedSOPSequence[0].ReferencedSOPInstanceUID
        for group in library.ContentSequence
        for entry in group.ContentSequence
        if entry.ValueType == "IMAGE"
    ]
    series_of = {
        i.sop_instance_uid: s.series_instance_uid for s in study.values() for i in s.instances
    }
    assert len(entries) == len(set(entries))
    assert sorted(series_of[uid] for uid in entries) == sorted({series_of[uid] for uid in entries})
    assert len(entries) == len(study)


def test_library_is_per_series_when_lesions_lie_on_different_slices(
    findings, study, tmp_path, monkeypatch
):
    # Each lesion's key slice on its own slice of every series: the image library (TID 1600)
    # still holds one entry per series, while each lesion's values reference its own slice;
    # every key slice is in the evidence, though one header is read per series.
    slice_of = {"L1": 0, "L2": 1, "L3": 2}
    keys = [
        replace(key, slice_index=slice_of[key.roi_id], sop_instance_uid=None)
        for key in make_key_slices(study)
    ]
    read = []
    monkeypatch.setattr(
        sr_module, "dcmread", lambda path, **kw: read.append(path) or dcmread(path, **kw)
    )
    write_sr(tmp_path / "sr.dcm", build_sr(findings, keys, study))
    assert len(read) == len(study)
    document = hd.sr.srread(tmp_path / "sr.dcm")
    evidence = {
        item.ReferencedSOPInstanceUID
        for study_item in document.CurrentRequestedProcedureEvidenceSequence
        for series in study_item.ReferencedSeriesSequence
        for item in series.ReferencedSOPSequence
    }
    assert evidence == {s.instances[i].sop_instance_uid for s in study.values() for i in (0, 1, 2)}
    [library] = [
        item
        for item in document.ContentSequence
        if item.ConceptNameCodeSequence[0].CodeValue == "111028"  # Image Library, PS3.16
    ]
    entries = [
        entry.ReferencedSOPSequence[0].ReferencedSOPInstanceUID
        for group in library.ContentSequence
        for entry in group.ContentSequence
        if entry.ValueType == "IMAGE"
    ]
    series_of = {
        i.sop_instance_uid: s.series_instance_uid for s in study.values() for i in s.instances
    }
    assert len(entries) == len(study)
    assert len({series_of[uid] for uid in entries}) == len(study)
    groups = {
        g.tracking_identifier.split(" ")[0]: g.get_measurements()
        for g in document.content.get_image_measurement_groups()
    }
    for lesion, index in slice_of.items():
        mean = _value(groups[lesion], codes.DCM.MRSignalIntensity, "T2", codes.cid7464.Mean, study)
        [ref] = mean.referenced_images
        assert ref.referenced_sop_instance_uid == study["T2"].instances[index].sop_instance_uid


@pytest.mark.parametrize(
    "charset, site", [("ISO_IR 100", "région frontale"), ("ISO_IR 192", "额叶")]
)
def test_write_sr_writes_what_pydicom_writes(
    findings, study, key_slices, tmp_path, monkeypatch, charset, site
):
    # write_sr encodes the measurement groups itself (sr_content.encode_items); the file must be
    # byte for byte what pydicom writes for the same document.
    encoded = []
    encode = sr_content.encode_items
    monkeypatch.setattr(
        sr_content, "encode_items", lambda *a: encoded.append(encode(*a)) or encoded[-1]
    )
    findings["lesions"][0]["site"] = site
    document = build_sr(findings, key_slices, study)
    document.SpecificCharacterSet = charset
    write_sr(tmp_path / "fast.dcm", document)
    assert len(encoded) == 1  # the groups took the fast path
    document.save_as(tmp_path / "pydicom.dcm", enforce_file_format=True)
    assert (tmp_path / "fast.dcm").read_bytes() == (tmp_path / "pydicom.dcm").read_bytes()
    groups = hd.sr.srread(tmp_path / "fast.dcm").content.get_image_measurement_groups()
    assert any(site in group.tracking_identifier for group in groups)
