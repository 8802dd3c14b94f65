"""sr_content builds, byte for byte, the content items highdicom's template classes build from the
same arguments (highdicom is the reference: its templates implement PS3.16 TID 300, 1501 and
4108); the SR's groups are built with sr_content for speed only."""

from __future__ import annotations

import highdicom as hd
import pytest
from pydicom.dataset import Dataset
from pydicom.filebase import DicomBytesIO
from pydicom.filewriter import write_dataset
from pydicom.sr.codedict import codes
from pydicom.sr.coding import Code
from pydicom.uid import MRImageStorage, generate_uid

from sigreport.report import sr_content
from sigreport.report.sr import UNIT_NONE, UNIT_PERCENT, grade_name, private

SOP = generate_uid()
ENHANCED_MR = "1.2.840.10008.5.1.4.1.1.4.1"  # Enhanced MR Image Storage (PS3.4 B.5)


def encoded(items) -> bytes:
    """The items as a Content Sequence in Explicit VR Little Endian (PS3.5 7.1.2)."""
    ds = Dataset()
    ds.ContentSequence = list(items)
    fp = DicomBytesIO()
    fp.is_little_endian, fp.is_implicit_VR = True, False
    write_dataset(fp, ds)
    return fp.getvalue()


@pytest.mark.parametrize(
    "value, derivation, method, images",
    [
        (523.8096, codes.cid7464.Mean, None, [(MRImageStorage, SOP, None)]),
        (1 / 3, codes.SCT.FifthPercentile, None, [(MRImageStorage, SOP, None)]),
        (-11.1, None, private("PAIR-FAT", "T1FS against T1"), []),
        (42, None, None, []),  # an int: no Floating Point Value, as highdicom writes it
        (
            2.0e-9,
            codes.cid7464.Median,
            None,
            [(ENHANCED_MR, SOP, [3]), (MRImageStorage, SOP, None)],
        ),
    ],
)
def test_a_measurement_is_highdicoms_tid_300(value, derivation, method, images):
    ours = sr_content.measurement(
        codes.DCM.MRSignalIntensity,
        value,
        UNIT_NONE,
        derivation=derivation,
        method=method,
        images=[sr_content.image_content(c, i, f) for c, i, f in images],
    )
    theirs = hd.sr.Measurement(
        name=codes.DCM.MRSignalIntensity,
        value=value,
        unit=UNIT_NONE,
        derivation=derivation,
        method=method,
        referenced_images=[
            hd.sr.SourceImageForMeasurement(c, i, referenced_frame_numbers=f) for c, i, f in images
        ]
        or None,
    )
    assert encoded([ours]) == encoded(theirs)


def test_evaluations_sites_and_tracking_are_highdicoms():
    assert encoded(
        [sr_content.code_content(grade_name("T2"), codes.cid6343.Hyperintense, "CONTAINS")]
    ) == encoded(hd.sr.QualitativeEvaluation(grade_name("T2"), codes.cid6343.Hyperintense))
    white_matter = Code("389080008", "SCT", "White Matter")
    for side in (None, codes.SCT.Right):
        assert encoded([sr_content.finding_site(white_matter, side)]) == encoded(
            [hd.sr.FindingSite(anatomic_location=white_matter, laterality=side)]
        )
    uid = generate_uid()
    assert encoded(sr_content.tracking_identifier(uid, "L1 (région frontale)")) == encoded(
        hd.sr.TrackingIdentifier(uid=uid, identifier="L1 (région frontale)")
    )


def test_long_code_values_are_written_as_highdicom_writes_them():
    # PS3.3 8.8: a code value over 16 characters is a Long Code Value, a URN a URN Code Value.
    long = private("B-" + "x" * 20, "a long behaviour key")
    urn = Code("urn:oid:2.16.840.1.113883.6.1", "LN", "LOINC by URN")
    for code in (long, urn):
        assert encoded([sr_content.code_content(long, code, "CONTAINS")]) == encoded(
            hd.sr.QualitativeEvaluation(long, code)
        )
    written = sr_content.code_content(long, urn, "CONTAINS")
    assert "LongCodeValue" in written.ConceptNameCodeSequence[0]
    assert "URNCodeValue" in written.ConceptCodeSequence[0]


def test_a_measurement_group_is_highdicoms_tid_1501():
    uid = generate_uid()
    site = Code("389080008", "SCT", "White Matter")
    image = (MRImageStorage, SOP)
    ours = sr_content.measurement_group(
        sr_content.tracking_identifier(uid, "L1 (right frontal white matter)"),
        finding_type=codes.SCT.Lesion,
        finding_sites=[sr_content.finding_site(site, codes.SCT.Right)],
        measurements=[
            sr_content.measurement(codes.SCT.Volume, 0.9, Code("ml", "UCUM", "milliliter")),
            sr_content.measurement(
                private("ENH-PCT", "Reference-normalized enhancement"), 84.0, UNIT_PERCENT
            ),
        ],
        evaluations=[
            sr_content.code_content(private("FLOW-VOID", "Flow void"), codes.SCT.Absent, "CONTAINS")
        ],
        source_images=[sr_content.image_content(*image, relationship="CONTAINS")],
    )
    theirs = hd.sr.MeasurementsAndQualitativeEvaluations(
        tracking_identifier=hd.sr.TrackingIdentifier(
            uid=uid, identifier="L1 (right frontal white matter)"
        ),
        finding_type=codes.SCT.Lesion,
        finding_sites=[hd.sr.FindingSite(anatomic_location=site, laterality=codes.SCT.Right)],
        measurements=[
            hd.sr.Measurement(
                name=codes.SCT.Volume, value=0.9, unit=Code("ml", "UCUM", "milliliter")
            ),
            hd.sr.Measurement(
                name=private("ENH-PCT", "Reference-normalized enhancement"),
                value=84.0,
                unit=UNIT_PERCENT,
            ),
        ],
        qualitative_evaluations=[
            hd.sr.QualitativeEvaluation(private("FLOW-VOID", "Flow void"), codes.SCT.Absent)
        ],
        source_images=[hd.sr.SourceImageForMeasurementGroup(*image)],
    )
    assert encoded([ours]) == encoded(theirs)
    # Read back by highdicom as its own template.
    [group] = hd.sr.MeasurementsAndQualitativeEvaluations.from_sequence([ours])
    assert group.ContentTemplateSequence[0].TemplateIdentifier == "1501"


def test_bad_arguments_are_refused_as_highdicom_refuses_them():
    with pytest.raises(ValueError, match="Code meaning can have maximally 64 characters"):
        sr_content.code_content(Code("X", "99SIGRPT", "m" * 65), codes.SCT.Yes, "CONTAINS")
    with pytest.raises(ValueError, match="Referenced frame numbers must be >= 1"):
        sr_content.image_content(ENHANCED_MR, SOP, [0])
    with pytest.raises(TypeError, match='Argument "value" must have type'):
        sr_content.measurement(codes.SCT.Volume, "0.9", UNIT_NONE)  # type: ignore[arg-type]
    with pytest.raises(ValueError, match="tracking unique identifier"):
        sr_content.measurement_group(sr_content.tracking_identifier(SOP, "L1")[:1])
    with pytest.raises(ValueError):
        sr_content.measurement(codes.SCT.Volume, float("nan"), UNIT_NONE)  # not a DS (PS3.5)


def _sequence_bytes(items) -> bytes:
    """pydicom's encoding of ``items`` as a Content Sequence, without the element's header."""
    return encoded(items)[12:]  # tag (4), VR and reserved (4), 32-bit length (4): PS3.5 7.1.2


def test_encode_items_writes_what_pydicom_writes():
    group = sr_content.measurement_group(
        sr_content.tracking_identifier(generate_uid(), "L1 (région frontale, 3 mm)"),
        finding_type=codes.SCT.Lesion,
        measurements=[
            sr_content.measurement(
                codes.DCM.MRSignalIntensity,
                value,
                UNIT_NONE,
                derivation=codes.cid7464.Mean,
                images=[sr_content.image_content(ENHANCED_MR, SOP, [1, 12])],
            )
            for value in (1 / 3, 523.8096, 7, -0.0, 1e20)
        ],
        evaluations=[
            sr_content.code_content(
                private("B-" + "x" * 20, "long"), Code("urn:oid:1.2.3", "X", "urn"), "CONTAINS"
            )
        ],
    )
    # No Specific Character Set: pydicom's default, ISO 8859-1 ("iso8859", PS3.5 6.1.2.1).
    assert sr_content.encode_items([group], "iso8859") == _sequence_bytes([group])
    # The document's character set (inherited by every item, PS3.5 7.5.3) encodes the text.
    utf8 = Dataset()
    utf8.SpecificCharacterSet = "ISO_IR 192"
    utf8.ContentSequence = [group]
    fp = DicomBytesIO()
    fp.is_little_endian, fp.is_implicit_VR = True, False
    write_dataset(fp, utf8)
    assert fp.getvalue().endswith(sr_content.encode_items([group], "UTF8"))


def test_encode_items_leaves_what_it_does_not_know_to_pydicom():
    text = sr_content.text_content(codes.DCM.Comment, "漢字", "CONTAINS")
    with pytest.raises(sr_content.NotEncodable):
        sr_content.encode_items([text], "latin_1")  # not in ISO 8859-1: pydicom decides
    person = Dataset()
    person.PersonName = "Doe^Jane"  # PN: not a VR this module writes
    with pytest.raises(sr_content.NotEncodable):
        sr_content.encode_items([person], "latin_1")
    own_charset = sr_content.text_content(codes.DCM.Comment, "x", "CONTAINS")
    own_charset.SpecificCharacterSet = "ISO_IR 100"
    with pytest.raises(sr_content.NotEncodable):
        sr_content.encode_items([own_charset], "latin_1")
