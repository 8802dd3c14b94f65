"""The de-identification steps on small hand-built data: the PS3.15 actions on a dataset, the
UID map, the forms of names and dates, and the search for leftovers."""

from __future__ import annotations

import pydicom
from pydicom.dataset import Dataset
from pydicom.sequence import Sequence
from pydicom.uid import ComprehensiveSRStorage, ExplicitVRLittleEndian

from sigreport.export import Identifiers, UidMap, deidentify_sr, find_identifiers
from sigreport.export.deidentify import date_variants, name_variants
from sigreport.export.profile import BASIC_PROFILE

STUDY_UID = "1.2.826.0.1.3680043.8.498.10"
IMAGE_UID = "1.2.826.0.1.3680043.8.498.11"


def _sr() -> Dataset:
    ds = Dataset()
    ds.file_meta = pydicom.dataset.FileMetaDataset()
    ds.file_meta.TransferSyntaxUID = ExplicitVRLittleEndian
    ds.SOPClassUID = ComprehensiveSRStorage
    ds.SOPInstanceUID = "1.2.826.0.1.3680043.8.498.12"
    ds.StudyInstanceUID = STUDY_UID
    ds.PatientName = "DOE^JANE"
    ds.PatientID = "MRN-0042"
    ds.PatientBirthDate = "19600229"
    ds.StudyDate = "20250101"
    ds.ContentDate = "20250102"
    ds.ContentTime = "101010"
    ds.InstitutionName = "Example General"
    ds.add_new(0x00091010, "LO", "private vendor value")
    item = Dataset()
    item.ReferencedSOPClassUID = "1.2.840.10008.5.1.4.1.1.4"
    item.ReferencedSOPInstanceUID = IMAGE_UID
    text = Dataset()
    text.ValueType = "TEXT"
    text.TextValue = "lesion near the vertex, see Doe Jane MRN-0042"
    code = Dataset()
    code.CodeValue = "1"
    code.CodingSchemeDesignator = "UCUM"
    code.CodeMeaning = "no units"
    text.ConceptNameCodeSequence = Sequence([code])
    ds.ContentSequence = Sequence([text])
    ds.CurrentRequestedProcedureEvidenceSequence = Sequence([Dataset()])
    ds.CurrentRequestedProcedureEvidenceSequence[0].StudyInstanceUID = STUDY_UID
    ds.CurrentRequestedProcedureEvidenceSequence[0].ReferencedSOPSequence = Sequence([item])
    return ds


def test_the_profile_names_real_attributes_once():
    from pydicom.datadict import tag_for_keyword

    keywords = [k for k, _basic, _applied in BASIC_PROFILE]
    assert len(keywords) == len(set(keywords))
    assert all(tag_for_keyword(k) is not None for k in keywords)
    # The applied action is one the standard's code allows (C only with Clean Structured
    # Content, PS3.15 E.3.9).
    for keyword, basic, applied in BASIC_PROFILE:
        assert applied in basic.split("/") or applied == "C", keyword


def test_deidentify_sr_applies_the_basic_profile():
    original = _sr()
    uids = UidMap()
    ids = Identifiers.collect(original, {"study": {}})
    out = deidentify_sr(original, uids, ids)
    assert str(out.PatientName) == "" and out.PatientID == "" and out.PatientBirthDate == ""
    assert out.StudyDate == ""  # Z
    assert out.ContentDate == "19000101" and out.ContentTime == "000000"  # D (Type 1)
    assert "InstitutionName" not in out  # X
    assert not [e for e in out.iterall() if e.tag.is_private]
    assert out.SOPClassUID == ComprehensiveSRStorage  # a standard UID is kept
    assert out.StudyInstanceUID == uids(STUDY_UID) != STUDY_UID
    evidence = out.CurrentRequestedProcedureEvidenceSequence[0]
    assert evidence.StudyInstanceUID == out.StudyInstanceUID  # the same map everywhere
    ref = evidence.ReferencedSOPSequence[0]
    assert ref.ReferencedSOPInstanceUID == uids(IMAGE_UID)
    assert ref.ReferencedSOPClassUID == "1.2.840.10008.5.1.4.1.1.4"
    text = out.ContentSequence[0]
    assert text.TextValue == "lesion near the vertex, see [removed] [removed]"
    assert text.ConceptNameCodeSequence[0].CodeValue == "1"  # codes are never cleaned
    assert out.file_meta.MediaStorageSOPInstanceUID == out.SOPInstanceUID
    # The input is not changed.
    assert original.PatientID == "MRN-0042" and original.StudyInstanceUID == STUDY_UID


def test_the_uid_map_is_consistent_and_makes_2_25_uids():
    uids = UidMap()
    new = uids(STUDY_UID)
    assert new == uids(STUDY_UID) and new.startswith("2.25.")  # PS3.5 B.2
    assert len(new) <= 64
    assert uids("1.2.840.10008.1.2.1") == "1.2.840.10008.1.2.1"
    assert uids.in_text(f"study {STUDY_UID}, version 0.1.0") == f"study {new}, version 0.1.0"


def test_names_and_dates_in_the_forms_reports_print_them():
    assert set(name_variants("DOE^JANE^Q")) >= {
        "DOE^JANE^Q",
        "DOE JANE Q",
        "JANE Q DOE",
        "DOE, JANE Q",
    }
    assert date_variants("19600229") == [
        "19600229", "1960-02-29", "29.02.1960", "29/02/1960", "02/29/1960",
    ]  # fmt: skip
    assert date_variants("2026-12-02T13:24:56+00:00")[:2] == ["20261202", "2026-12-02"]
    assert date_variants("not a date") == []


def test_find_identifiers_sees_an_identifier_in_any_file():
    ids = Identifiers((("patient id", "PID-7741-QX"),))
    files = {"a.txt": b"nothing", "b.png": b"\x89PNG...tEXtComment\x00pid-7741-qx"}
    assert find_identifiers(files, ids, {}) == [("b.png", "patient id")]
    assert find_identifiers({"c": b"1.2.3.4.5"}, ids, {"1.2.3.4.5": "2.25.1"}) == [
        ("c", "original UID")
    ]


def test_a_numeric_identifier_is_not_found_inside_a_measured_value():
    ids = Identifiers((("patient id", "1571"), ("patient name", "DOE^JANE")))
    assert (
        ids.clean("median 1571.8, ratio 3.57; id 1571") == "median 1571.8, ratio 3.57; id [removed]"
    )
    assert find_identifiers({"t.csv": b"L1,T2,1571.8"}, ids, {}) == []
    assert find_identifiers({"t.txt": b"patient 1571 seen"}, ids, {}) == [("t.txt", "patient id")]
    assert ids.clean("seen by doe^jane.") == "seen by [removed]."


def test_the_shipped_table_pairs_each_tag_with_the_name_pydicoms_dictionary_gives():
    """The copy of PS3.15 Table E.1-1 against an outside source: pydicom's data dictionary
    (PS3.6) names each tag as the table does, so no row was shifted in transcription."""
    from pydicom.datadict import dictionary_description

    from sigreport.export.profile import TABLE

    assert len(TABLE) == 460
    assert len({row.tag for row in TABLE}) == len(TABLE)
    # pydicom's dictionary writes "GenerationMode" as one word in these two names.
    spelled = {0x300A067D, 0x300A067C}
    for row in TABLE:
        codes = set(row.basic.split("/"))
        assert codes <= {"D", "Z", "X", "K", "C", "U", "U*"}, row
        assert row.clean_structured_content in (None, "C"), row
        value = row.tag_value
        if value is None:
            assert row.tag in ("(50XX,XXXX)", "(60XX,3000)", "(60XX,4000)", "(GGGG,EEEE)"), row
            continue
        if value in spelled:
            continue
        assert dictionary_description(value).lower() == row.name.lower(), row


def test_compound_codes_are_resolved_by_the_attributes_type_in_the_sr():
    from pydicom.tag import Tag

    from sigreport.export.profile import ACTIONS_BY_TAG, action_for

    def action(keyword: str) -> str:
        from pydicom.datadict import dictionary_VR, tag_for_keyword

        tag = tag_for_keyword(keyword)
        return action_for(Tag(tag), keyword, dictionary_VR(tag))

    assert action("ContentDate") == "D"  # Z/D, Type 1 (PS3.3 C.17.2)
    assert action("ReferencedPerformedProcedureStepSequence") == "Z"  # X/Z/D, Type 2
    assert action("InstitutionName") == "X"  # X/Z/D, Type 3
    assert action("AcquisitionDateTime") == "X"  # X/Z/D, not in the SR IOD
    assert action("ContentSequence") == "C"  # D, cleaned under the option
    assert action("PatientName") == "Z" and action("StudyInstanceUID") == "U"
    # Not rows: the rule by VR for what a source header may carry.
    assert action("PatientSpeciesDescription") == "C"  # LO: free text, cleaned
    assert action("ReferencedSOPClassUID") == "K"
    assert action_for(Tag(0x00091010), "", "LO") == "X"  # private
    assert action_for(Tag(0x60003000), "OverlayData", "OW") == "X"
    assert len(ACTIONS_BY_TAG) == 456  # every row naming one tag


def test_patient_and_study_attributes_a_source_header_carries_are_handled_by_the_table(
    profile_checker,
):
    """highdicom copies the Patient, Clinical Trial Subject, General Study and Patient Study
    modules of the source images into the SR (PS3.3 C.7.1.1, C.7.1.3, C.7.2.1, C.7.2.2): each
    of their attributes a scanner may fill is handled as its row says."""
    original = _sr()
    original.PatientSex = "F"
    original.OtherPatientIDs = "OLD-7781"
    original.OtherPatientNames = "DOE^JANINE"
    original.IssuerOfPatientID = "Example General MRN"
    original.PatientBirthTime = "101500"
    original.PatientAge = "064Y"
    original.PatientSize = "1.62"
    original.PatientWeight = "58"
    original.EthnicGroup = "EXAMPLE"
    original.PatientComments = "call Jane Doe's daughter"
    original.AdditionalPatientHistory = "MRN-0042 seen before"
    original.Occupation = "teacher"
    original.PatientSexNeutered = "UNALTERED"
    original.ResponsiblePerson = "DOE^JOHN"
    original.PatientSpeciesDescription = "Homo sapiens"
    original.ClinicalTrialSponsorName = "Example Sponsor"
    original.ClinicalTrialSubjectID = "SUBJ-12"
    original.ClinicalTrialSiteName = "Example General"
    original.StudyTime = "093000"
    original.StudyID = "S-1042"
    original.AccessionNumber = "ACC-5521"
    original.StudyDescription = "MR brain for Jane Doe"
    original.ReferringPhysicianName = "HOUSE^GREGORY"
    original.PhysiciansOfRecord = "HOUSE^GREGORY"
    original.NameOfPhysiciansReadingStudy = "WILSON^JAMES"
    original.ConsultingPhysicianName = "CUDDY^LISA"
    original.AdmittingDiagnosesDescription = "headache"
    original.ReasonForVisit = "headache"
    original.ServiceEpisodeID = "EP-9"
    original.InstitutionAddress = "1 Example Road"
    original.ReferencedPatientSequence = Sequence([Dataset()])
    original.ReferencedPatientSequence[0].ReferencedSOPInstanceUID = "1.2.826.0.1.3680043.8.498.99"
    uids = UidMap()
    ids = Identifiers.collect(original, {"study": {}})
    out = deidentify_sr(original, uids, ids)
    seen = profile_checker(original, out, [t for _what, t in ids.values])
    assert seen[STUDY_UID] == out.StudyInstanceUID
    # A few rows read off the table by eye (PS3.15 Table E.1-1, Basic Profile column).
    assert out.PatientSex == "" and out.StudyTime == "" and out.StudyID == ""  # Z
    assert out.ClinicalTrialSubjectID == "REMOVED"  # D
    assert out.ClinicalTrialSiteName == ""  # Z
    for removed in (
        "OtherPatientIDs", "OtherPatientNames", "IssuerOfPatientID", "PatientBirthTime",
        "PatientAge", "PatientSize", "PatientWeight", "EthnicGroup", "PatientComments",
        "AdditionalPatientHistory", "Occupation", "PatientSexNeutered", "ResponsiblePerson",
        "StudyDescription", "PhysiciansOfRecord", "NameOfPhysiciansReadingStudy",
        "AdmittingDiagnosesDescription", "ReasonForVisit", "ServiceEpisodeID",
        "InstitutionAddress", "ReferencedPatientSequence",
    ):  # fmt: skip
        assert removed not in out, removed
    assert out.ConsultingPhysicianName == ""  # Z
    assert out.PatientSpeciesDescription == "Homo sapiens"  # not a row: text, nothing to clean
