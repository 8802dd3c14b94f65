"""The measurement groups of sr.dcm as plain pydicom datasets (SR content items, PS3.3 C.17.3).

A demo report's groups hold over a thousand content items (each NUM of TID 300 with its unit,
derivation and source image is ten nested datasets). highdicom's template classes build each
item through pydicom's attribute machinery and check every argument on the way, which made
building the SR take longer than measuring the lesions. The functions here build, item for
item, what the highdicom class named in each docstring builds from the same arguments
(tests/report/test_sr_content.py encodes both and compares the bytes): the concept codes are
checked once each (pydicom's value checks for their VRs, highdicom's 64-character limit on
meanings) and kept, numbers are formatted as highdicom formats them (``DS(value,
auto_format=True)`` beside the float), and each element is set without pydicom converting and
re-checking values that are already in their final form.

Each dataset made here is marked as encoded in Explicit VR Little Endian
(``Dataset.set_original_encoding``): it holds no element of ambiguous VR (the VRs are set
explicitly below), so pydicom's writer need not walk it again to resolve such VRs for every
level of nesting; the document's root, written in that transfer syntax, is still walked once.

Writing the groups with pydicom costs about 10 microseconds per element (a demo SR has some
14,000); :func:`encode_items` encodes such a tree directly in Explicit VR Little Endian (PS3.5
7.1.2 and 7.5), byte for byte as pydicom's writer does (defined lengths, elements in tag order,
values padded to even length), for the VRs this module writes; anything else is left to pydicom
(:class:`NotEncodable`).
"""

from __future__ import annotations

import struct
from collections.abc import Iterable, Sequence
from functools import lru_cache
from typing import Any

from pydicom import config
from pydicom.charset import default_encoding
from pydicom.dataelem import DataElement
from pydicom.dataset import Dataset
from pydicom.multival import MultiValue
from pydicom.sequence import Sequence as DicomSequence
from pydicom.sr.coding import Code
from pydicom.valuerep import EXPLICIT_VR_LENGTH_32, DSfloat, validate_value

__all__ = [
    "NotEncodable",
    "code_content",
    "encode_items",
    "image_content",
    "measurement",
    "measurement_group",
    "text_content",
    "tracking_identifier",
    "finding_site",
    "uidref_content",
]


#: Anything with a code's four fields: pydicom's ``Code``, highdicom's ``CodedConcept``.
CodeLike = Any

# Relationship types (PS3.3 C.17.3.2.4).
CONTAINS = "CONTAINS"
HAS_CONCEPT_MOD = "HAS CONCEPT MOD"
HAS_OBS_CONTEXT = "HAS OBS CONTEXT"
INFERRED_FROM = "INFERRED FROM"

# Tags of the SR Document Content Module (PS3.3 C.17.3) and the Code Sequence Macro.
_CODE_VALUE = 0x00080100
_CODING_SCHEME_DESIGNATOR = 0x00080102
_CODING_SCHEME_VERSION = 0x00080103
_CODE_MEANING = 0x00080104
_LONG_CODE_VALUE = 0x00080119
_URN_CODE_VALUE = 0x00080120
_REFERENCED_SOP_CLASS_UID = 0x00081150
_REFERENCED_SOP_INSTANCE_UID = 0x00081155
_REFERENCED_FRAME_NUMBER = 0x00081160
_REFERENCED_SOP_SEQUENCE = 0x00081199
_MEASUREMENT_UNITS_CODE_SEQUENCE = 0x004008EA
_RELATIONSHIP_TYPE = 0x0040A010
_VALUE_TYPE = 0x0040A040
_CONCEPT_NAME_CODE_SEQUENCE = 0x0040A043
_CONTINUITY_OF_CONTENT = 0x0040A050
_UID = 0x0040A124
_TEXT_VALUE = 0x0040A160
_FLOATING_POINT_VALUE = 0x0040A161
_CONCEPT_CODE_SEQUENCE = 0x0040A168
_MEASURED_VALUE_SEQUENCE = 0x0040A300
_NUMERIC_VALUE = 0x0040A30A
_CONTENT_TEMPLATE_SEQUENCE = 0x0040A504
_CONTENT_SEQUENCE = 0x0040A730
_MAPPING_RESOURCE = 0x00080105
_TEMPLATE_IDENTIFIER = 0x0040DB00

# The concept names highdicom's templates use for these rows (PS3.16).
TRACKING_IDENTIFIER = Code("112039", "DCM", "Tracking Identifier")  # TID 4108
TRACKING_UID = Code("112040", "DCM", "Tracking Unique Identifier")  # TID 4108
MEASUREMENT_GROUP = Code("125007", "DCM", "Measurement Group")  # TID 1501
FINDING = Code("121071", "DCM", "Finding")  # TID 1501
FINDING_SITE = Code("363698007", "SCT", "Finding Site")  # TID 1501
LATERALITY = Code("272741003", "SCT", "Laterality")  # TID 1501
MEASUREMENT_METHOD = Code("370129005", "SCT", "Measurement Method")  # TID 300
DERIVATION = Code("121401", "DCM", "Derivation")  # TID 300
SOURCE_OF_MEASUREMENT = Code("121112", "DCM", "Source of Measurement")  # TID 300 / 1501


def _new() -> Dataset:
    ds = Dataset()
    # No ambiguous VR in these items (module docstring): the writer need not resolve any.
    ds.set_original_encoding(False, True, default_encoding)
    return ds


def _put(ds: Dataset, tag: int, vr: str, value: Any) -> None:
    """Set an element whose value is already in its final form (checked where it came in)."""
    ds[tag] = DataElement(tag, vr, value, already_converted=True, validation_mode=config.IGNORE)


def _sequence(items: Iterable[Dataset]) -> DicomSequence:
    return DicomSequence(list(items))


@lru_cache(maxsize=4096)
def _checked_code(
    code: tuple[str, str, str, str | None],
) -> tuple[tuple[int, str, str], ...]:
    """The Code Sequence Macro elements of ``code``, checked once: a value longer than 16
    characters becomes a Long Code Value (or URN Code Value), as highdicom's ``CodedConcept``
    writes it (PS3.3 8.8); a meaning longer than 64 characters is refused, as highdicom does."""
    value, scheme, meaning, version = (str(code[0]), str(code[1]), str(code[2]), code[3])
    if len(meaning) > 64:
        raise ValueError("Code meaning can have maximally 64 characters.")
    if len(value) > 16:
        if value.startswith("urn") or "://" in value:
            first = (_URN_CODE_VALUE, "UR", value)
        else:
            first = (_LONG_CODE_VALUE, "UC", value)
    else:
        first = (_CODE_VALUE, "SH", value)
    elements = [first, (_CODE_MEANING, "LO", meaning), (_CODING_SCHEME_DESIGNATOR, "SH", scheme)]
    if version is not None:
        elements.append((_CODING_SCHEME_VERSION, "SH", str(version)))
    mode = config.settings.writing_validation_mode
    for _, vr, text in elements:
        validate_value(vr, text, mode)
    return tuple(elements)


def _code_item(code: CodeLike) -> Dataset:
    """A Code Sequence item for ``code`` (PS3.3 Table 8.8-1)."""
    # A plain tuple as the key: pydicom's Code compares and hashes without its meaning.
    key = (code.value, code.scheme_designator, code.meaning, code.scheme_version)
    ds = _new()
    for tag, vr, text in _checked_code(key):
        _put(ds, tag, vr, text)
    return ds


@lru_cache(maxsize=65536)
def _checked(vr: str, value: str) -> str:
    """``value`` checked once per distinct value for ``vr`` (pydicom's writing checks)."""
    validate_value(vr, value, config.settings.writing_validation_mode)
    return value


def _content_item(value_type: str, name: CodeLike, relationship: str | None) -> Dataset:
    """highdicom ``ContentItem``: value type, concept name and relationship (PS3.3 C.17.3)."""
    ds = _new()
    _put(ds, _VALUE_TYPE, "CS", value_type)
    _put(ds, _CONCEPT_NAME_CODE_SEQUENCE, "SQ", _sequence([_code_item(name)]))
    if relationship is not None:
        _put(ds, _RELATIONSHIP_TYPE, "CS", relationship)
    return ds


def _set_content(ds: Dataset, children: Sequence[Dataset]) -> Dataset:
    if children:
        _put(ds, _CONTENT_SEQUENCE, "SQ", _sequence(children))
    return ds


def code_content(name: CodeLike, value: CodeLike, relationship: str) -> Dataset:
    """A CODE content item: highdicom ``CodeContentItem`` (and ``QualitativeEvaluation``,
    TID 1501, with ``relationship`` CONTAINS)."""
    ds = _content_item("CODE", name, relationship)
    _put(ds, _CONCEPT_CODE_SEQUENCE, "SQ", _sequence([_code_item(value)]))
    return ds


def text_content(name: CodeLike, value: str, relationship: str) -> Dataset:
    """A TEXT content item: highdicom ``TextContentItem`` (UT, PS3.5 6.2)."""
    ds = _content_item("TEXT", name, relationship)
    _put(ds, _TEXT_VALUE, "UT", _checked("UT", str(value)))
    return ds


def uidref_content(name: CodeLike, uid: str, relationship: str) -> Dataset:
    """A UIDREF content item: highdicom ``UIDRefContentItem``."""
    ds = _content_item("UIDREF", name, relationship)
    _put(ds, _UID, "UI", _checked("UI", str(uid)))
    return ds


def image_content(
    sop_class_uid: str,
    sop_instance_uid: str,
    frames: Sequence[int] | None = None,
    *,
    relationship: str = INFERRED_FROM,
) -> Dataset:
    """An IMAGE content item named Source of Measurement (DCM 121112): highdicom
    ``SourceImageForMeasurement`` (TID 300, INFERRED FROM) or, with ``relationship``
    CONTAINS, ``SourceImageForMeasurementGroup`` (TID 1501).

    Raises
    ------
    ValueError
        When a frame number is below 1 (frames are numbered from 1, PS3.3 C.7.6.16).
    """
    if frames is not None and any(f < 1 for f in frames):
        raise ValueError("Referenced frame numbers must be >= 1. Frame indexing is 1-based.")
    ds = _content_item("IMAGE", SOURCE_OF_MEASUREMENT, relationship)
    ref = _new()
    _put(ref, _REFERENCED_SOP_CLASS_UID, "UI", _checked("UI", str(sop_class_uid)))
    _put(ref, _REFERENCED_SOP_INSTANCE_UID, "UI", _checked("UI", str(sop_instance_uid)))
    if frames is not None:
        ref[_REFERENCED_FRAME_NUMBER] = DataElement(_REFERENCED_FRAME_NUMBER, "IS", list(frames))
    _put(ds, _REFERENCED_SOP_SEQUENCE, "SQ", _sequence([ref]))
    return ds


def measurement(
    name: CodeLike,
    value: float,
    unit: CodeLike,
    *,
    derivation: CodeLike | None = None,
    method: CodeLike | None = None,
    images: Sequence[Dataset] = (),
) -> Dataset:
    """A TID 300 Measurement: the NUM content item of highdicom ``Measurement`` with its
    method, derivation and source images (``image_content``) in highdicom's order.

    Raises
    ------
    TypeError
        When ``value`` is not a number.
    ValueError
        When ``value`` is not finite (a Decimal String cannot hold it, PS3.5 6.2).
    """
    if not isinstance(value, int | float):
        raise TypeError('Argument "value" must have type "int" or "float".')
    ds = _content_item("NUM", name, CONTAINS)
    measured = _new()
    _put(measured, _NUMERIC_VALUE, "DS", DSfloat(value, auto_format=True))
    if isinstance(value, float):
        _put(measured, _FLOATING_POINT_VALUE, "FD", value)
    _put(measured, _MEASUREMENT_UNITS_CODE_SEQUENCE, "SQ", _sequence([_code_item(unit)]))
    _put(ds, _MEASURED_VALUE_SEQUENCE, "SQ", _sequence([measured]))
    children = []
    if method is not None:
        children.append(code_content(MEASUREMENT_METHOD, method, HAS_CONCEPT_MOD))
    if derivation is not None:
        children.append(code_content(DERIVATION, derivation, HAS_CONCEPT_MOD))
    children.extend(images)
    return _set_content(ds, children)


def tracking_identifier(uid: str, identifier: str) -> list[Dataset]:
    """TID 4108 Tracking Identifier: highdicom ``TrackingIdentifier`` (text, then UID)."""
    return [
        text_content(TRACKING_IDENTIFIER, identifier, HAS_OBS_CONTEXT),
        uidref_content(TRACKING_UID, uid, HAS_OBS_CONTEXT),
    ]


def finding_site(location: CodeLike, laterality: CodeLike | None = None) -> Dataset:
    """A Finding Site with its laterality: highdicom ``FindingSite``."""
    ds = code_content(FINDING_SITE, location, HAS_CONCEPT_MOD)
    if laterality is not None:
        _set_content(ds, [code_content(LATERALITY, laterality, HAS_CONCEPT_MOD)])
    return ds


def measurement_group(
    tracking: Sequence[Dataset],
    *,
    finding_type: CodeLike | None = None,
    finding_sites: Sequence[Dataset] = (),
    measurements: Sequence[Dataset] = (),
    evaluations: Sequence[Dataset] = (),
    source_images: Sequence[Dataset] = (),
) -> Dataset:
    """TID 1501 Measurement and Qualitative Evaluation Group: highdicom
    ``MeasurementsAndQualitativeEvaluations`` with the same arguments, its rows in highdicom's
    order (tracking identifier, finding, finding sites, measurements, evaluations, source
    images).

    Raises
    ------
    ValueError
        When ``tracking`` is not a human-readable identifier and a UID (TID 4108), as
        highdicom requires.
    """
    if len(tracking) != 2:
        raise ValueError(
            'Argument "tracking" must include a human readable tracking identifier and a '
            "tracking unique identifier."
        )
    ds = _content_item("CONTAINER", MEASUREMENT_GROUP, CONTAINS)
    _put(ds, _CONTINUITY_OF_CONTENT, "CS", "CONTINUOUS")
    template = _new()
    _put(template, _MAPPING_RESOURCE, "CS", "DCMR")
    _put(template, _TEMPLATE_IDENTIFIER, "CS", "1501")
    _put(ds, _CONTENT_TEMPLATE_SEQUENCE, "SQ", _sequence([template]))
    children = list(tracking)
    if finding_type is not None:
        children.append(code_content(FINDING, finding_type, CONTAINS))
    children += finding_sites
    children += measurements
    children += evaluations
    children += source_images
    return _set_content(ds, children)


# --------------------------------------------------------------------------------------------
# Encoding a content tree (PS3.5 7.1.2 Explicit VR Little Endian, 7.5 nested data sets)


class NotEncodable(Exception):
    """An element :func:`encode_items` leaves to pydicom's writer."""


_ITEM_TAG = struct.pack("<HH", 0xFFFE, 0xE000)  # Item (PS3.5 7.5)
# VRs whose values are text in the Specific Character Set (PS3.5 6.1.2.3), of those written here.
_CHARSET_VRS = frozenset({"SH", "LO", "UC", "UT"})
# VRs of the default repertoire written as pydicom writes strings (PS3.5 6.1.2.2).
_ASCII_VRS = frozenset({"CS", "UR"})


def encode_items(items: Iterable[Dataset], encoding: str) -> bytes:
    """The value of a Sequence of ``items`` in Explicit VR Little Endian, as pydicom writes it.

    Parameters
    ----------
    items:
        Sequence items built by this module (their elements' VRs among SQ, CS, SH, LO, UC,
        UR, UT, UI, DS, IS and FD).
    encoding:
        The Python codec of the document's Specific Character Set (a single, stateless one:
        no ISO 2022 code extensions), for SH, LO, UC and UT values.

    Raises
    ------
    NotEncodable
        For an element or item outside that (another VR, a raw or undefined-length element, an
        item with its own character set, text the codec cannot encode): pydicom writes those.
    """
    out = bytearray()
    for ds in items:
        _encode_item(out, ds, encoding)
    return bytes(out)


def _encode_item(out: bytearray, ds: Dataset, encoding: str) -> None:
    if ds.is_undefined_length_sequence_item or 0x00080005 in ds:
        raise NotEncodable("an undefined-length item, or an item with its own character set")
    out += _ITEM_TAG
    length_at = len(out)
    out += b"\0\0\0\0"
    for tag in sorted(ds.keys()):
        if tag.element == 0 and tag.group > 6:
            continue  # retired group lengths, which pydicom does not write (PS3.5 7.2)
        elem = ds.get_item(tag)
        if elem is None or elem.is_raw or elem.is_undefined_length:
            raise NotEncodable(f"element {tag} is raw or of undefined length")
        vr = str(elem.VR)
        if vr == "SQ":
            out += struct.pack("<HH2sHI", tag.group, tag.element, b"SQ", 0, 0)
            start = len(out)
            for child in elem.value or ():
                _encode_item(out, child, encoding)
            struct.pack_into("<I", out, start - 4, len(out) - start)
            continue
        data = _value_bytes(vr, elem.value, encoding) if not elem.is_empty else b""
        if vr in EXPLICIT_VR_LENGTH_32:
            out += struct.pack("<HH2sHI", tag.group, tag.element, vr.encode(), 0, len(data))
        elif len(data) <= 0xFFFF:
            out += struct.pack("<HH2sH", tag.group, tag.element, vr.encode(), len(data))
        else:
            raise NotEncodable(f"element {tag} is too long for a 16-bit length")
        out += data
    struct.pack_into("<I", out, length_at, len(out) - length_at - 4)


def _value_bytes(vr: str, value: Any, encoding: str) -> bytes:
    multi = isinstance(value, MultiValue | list | tuple)
    try:
        if vr == "FD" and not multi:
            return struct.pack("<d", value)
        if vr in ("DS", "IS"):
            values = value if multi else [value]
            text = "\\".join(
                v.original_string if hasattr(v, "original_string") else str(v) for v in values
            )
            return _padded(text.encode(default_encoding), b" ")
        if vr == "UI" and not multi:
            return _padded(str(value).encode(default_encoding), b"\0")
        if vr in _ASCII_VRS:
            text = "\\".join(value) if multi else str(value)
            return _padded(text.encode(default_encoding), b" ")
        if vr in _CHARSET_VRS and not multi:
            return _padded(str(value).encode(encoding), b" ")
    except UnicodeError as exc:
        raise NotEncodable(f"a {vr} value the character set cannot encode") from exc
    raise NotEncodable(f"VR {vr} (multi-valued: {multi})")


def _padded(data: bytes, pad: bytes) -> bytes:
    return data + pad if len(data) % 2 else data
