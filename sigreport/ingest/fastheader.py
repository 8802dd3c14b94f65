"""A small, strict header reader for the common case, several times faster than pydicom's.

It walks the byte stream of a Part 10 file (PS3.10 7.1: 128-byte preamble, ``DICM``, File Meta
group 0002 in Explicit VR Little Endian) whose Transfer Syntax is Implicit VR Little Endian,
Explicit VR Little Endian or an encapsulated (compressed) little-endian syntax, keeps only the
wanted top-level elements as pydicom ``RawDataElement``s (exactly the raw elements pydicom's own
reader yields, so every value converts the same way downstream), skips everything else
(undefined-length sequences item by item to their delimiters, PS3.5 7.5), and stops at the
Pixel Data element, recording its offset and declared length.

Anything it does not understand returns ``None`` so the caller uses pydicom instead: no preamble,
no Transfer Syntax, big endian or deflated syntaxes, a command set, an unknown VR, a VR that
contradicts the Transfer Syntax, an undefined-length element that is not a sequence, a wanted
undefined-length sequence (pydicom parses those eagerly), a value running past the end of the
file, or any exception.
"""

from __future__ import annotations

import struct
from dataclasses import dataclass
from functools import cache
from typing import BinaryIO, cast

from pydicom.datadict import dictionary_VR
from pydicom.dataelem import DataElement, RawDataElement
from pydicom.dataset import Dataset, FileMetaDataset
from pydicom.tag import BaseTag
from pydicom.values import empty_value_for_VR

IMPLICIT_VR_LE = "1.2.840.10008.1.2"
EXPLICIT_VR_LE = "1.2.840.10008.1.2.1"
# Encapsulated syntaxes whose data set is Explicit VR Little Endian (PS3.5 A.4): JPEG, JPEG-LS,
# JPEG 2000, HTJ2K, RLE. Video, JPIP and private syntaxes go to pydicom.
ENCAPSULATED = frozenset(
    {
        "1.2.840.10008.1.2.4.50",
        "1.2.840.10008.1.2.4.51",
        "1.2.840.10008.1.2.4.57",
        "1.2.840.10008.1.2.4.70",
        "1.2.840.10008.1.2.4.80",
        "1.2.840.10008.1.2.4.81",
        "1.2.840.10008.1.2.4.90",
        "1.2.840.10008.1.2.4.91",
        "1.2.840.10008.1.2.4.92",
        "1.2.840.10008.1.2.4.93",
        "1.2.840.10008.1.2.4.201",
        "1.2.840.10008.1.2.4.202",
        "1.2.840.10008.1.2.4.203",
        "1.2.840.10008.1.2.5",
    }
)

PIXEL_TAGS = frozenset({0x7FE00010, 0x7FE00008, 0x7FE00009})  # Pixel, Float, Double Float
_ITEM = 0xFFFEE000
_ITEM_END = 0xFFFEE00D
_SEQUENCE_END = 0xFFFEE0DD
_CHARSET = 0x00080005

# VRs with a 2-byte reserved field and a 4-byte length in Explicit VR (PS3.5 7.1.2).
_LONG_VRS = frozenset(
    {b"OB", b"OD", b"OF", b"OL", b"OV", b"OW", b"SQ", b"SV", b"UC", b"UN", b"UR", b"UT", b"UV"}
)
_SHORT_VRS = frozenset(
    {
        b"AE", b"AS", b"AT", b"CS", b"DA", b"DS", b"DT", b"FD", b"FL", b"IS", b"LO", b"LT",
        b"PN", b"SH", b"SL", b"SS", b"ST", b"TM", b"UI", b"UL", b"US",
    }
)  # fmt: skip
_VR_TEXT = {vr: vr.decode("ascii") for vr in _LONG_VRS | _SHORT_VRS}

_FIRST_CHUNK = 4096  # most headers fit; a larger one costs one more read per 16 kB
_CHUNK = 16384
_U16 = struct.Struct("<H").unpack_from
_U32 = struct.Struct("<I").unpack_from
_TAG = struct.Struct("<HH").unpack_from
_TAG_LEN = struct.Struct("<HHI").unpack_from


class _Unsupported(Exception):
    """Internal: the fast path does not handle this file."""


@dataclass(frozen=True)
class FastHeader:
    """The wanted top-level elements of one file and where its pixel data element starts.

    ``pixel_offset`` is the file offset of the pixel data element's tag, or None when the data
    set ends without one. ``dataset`` holds ``RawDataElement``s (converted lazily by pydicom)
    and carries ``file_meta`` and the original encoding as pydicom's reader sets them.
    """

    dataset: Dataset
    transfer_syntax: str
    implicit_vr: bool
    pixel_offset: int | None
    pixel_tag: int | None
    pixel_value_offset: int | None
    pixel_length: int | None  # declared length; 0xFFFFFFFF when undefined (encapsulated)
    file_size: int


@cache
def _is_sequence(tag: int) -> bool:
    try:
        return dictionary_VR(tag) == "SQ"
    except KeyError:
        return False


class _Buffer:
    """Bytes of a file, read in chunks on demand (headers are usually a few kB)."""

    __slots__ = ("fp", "data", "base", "size")

    def __init__(self, fp: BinaryIO, size: int) -> None:
        self.fp = fp
        self.size = size
        fp.seek(0)
        self.data = fp.read(_FIRST_CHUNK)
        self.base = 0

    def window(self, pos: int, n: int) -> tuple[bytes, int]:
        """The buffer and the index of file offset ``pos`` in it, holding at least ``n`` bytes
        from there; raise ``_Unsupported`` when the file ends first."""
        at = pos - self.base
        if at < 0 or at + n > len(self.data):
            if pos + n > self.size:
                raise _Unsupported("past end of file")
            self.fp.seek(pos)
            self.data = self.fp.read(max(n, _CHUNK))
            self.base = pos
            at = 0
            if len(self.data) < n:
                raise _Unsupported("short read")
        return self.data, at


def _element_header(buf: _Buffer, pos: int, implicit: bool) -> tuple[int, bytes | None, int, int]:
    """(tag, VR bytes or None, value length, header length) of the element at ``pos``."""
    data, at = buf.window(pos, 8)
    group, element = _TAG(data, at)
    tag = (group << 16) | element
    if implicit or group == 0xFFFE:  # items and delimiters carry no VR (PS3.5 7.5)
        return tag, None, _U32(data, at + 4)[0], 8
    vr = data[at + 4 : at + 6]
    if vr in _SHORT_VRS:
        return tag, vr, _U16(data, at + 6)[0], 8
    if vr in _LONG_VRS:
        data, at = buf.window(pos, 12)
        return tag, vr, _U32(data, at + 8)[0], 12
    raise _Unsupported(f"unknown VR {vr!r}")


def _skip_sequence(buf: _Buffer, pos: int, implicit: bool, depth: int) -> int:
    """Skip the items of an undefined-length sequence (or encapsulated pixel data fragments)
    starting at ``pos``; return the offset after its Sequence Delimitation Item."""
    if depth > 64:
        raise _Unsupported("sequences nested too deep")
    while True:
        data, at = buf.window(pos, 8)
        group, element, length = _TAG_LEN(data, at)
        tag = (group << 16) | element
        pos += 8
        if tag == _SEQUENCE_END:
            return pos
        if tag != _ITEM:
            raise _Unsupported("sequence holds something other than items")
        if length == 0xFFFFFFFF:
            pos = _skip_item(buf, pos, implicit, depth + 1)
        else:
            pos += length


def _skip_item(buf: _Buffer, pos: int, implicit: bool, depth: int) -> int:
    """Skip an undefined-length item's data set; return the offset after its delimiter."""
    while True:
        tag, vr, length, header = _element_header(buf, pos, implicit)
        if tag == _ITEM_END:
            return pos + 8
        pos += header
        if length == 0xFFFFFFFF:
            if (
                vr == b"SQ"
                or (vr is None and _is_sequence(tag))
                or (tag in PIXEL_TAGS and vr in (b"OB", b"OW"))
            ):
                pos = _skip_sequence(buf, pos, implicit, depth + 1)
            else:
                raise _Unsupported("undefined length element that is not a sequence")
        else:
            pos += length


def _empty(vr: str | None) -> bytes | None:
    """The raw value pydicom's reader gives a zero-length element."""
    return cast(bytes | None, empty_value_for_VR(vr, raw=True))


@cache
def _with_charset(wanted: frozenset[int]) -> frozenset[int]:
    return wanted | {_CHARSET}


def _looks_explicit(data: bytes, at: int) -> bool:
    """pydicom's test of a data set's first element (filereader._is_implicit_vr): two upper-case
    letters where an explicit VR would be."""
    return 0x40 < data[at + 4] < 0x5B and 0x40 < data[at + 5] < 0x5B


def _uid(raw: bytes | None) -> str:
    return raw.rstrip(b"\x00 ").decode("ascii") if raw else ""


def read_header(fp: BinaryIO, file_size: int, wanted: frozenset[int]) -> FastHeader | None:
    """Read the wanted top-level elements of an open Part 10 file, or None when the fast path
    does not apply (the caller then reads the file with pydicom).

    Parameters
    ----------
    fp
        The file, opened in binary mode (its position is changed).
    file_size
        Its size in bytes.
    wanted
        Tags to keep (as ``specific_tags`` in ``pydicom.dcmread``); Specific Character Set is
        always kept, as pydicom does.
    """
    try:
        return _read(fp, file_size, wanted)
    except Exception:  # anything unusual: pydicom decides
        return None


def _read(fp: BinaryIO, file_size: int, wanted: frozenset[int]) -> FastHeader | None:
    buf = _Buffer(fp, file_size)
    data = buf.data
    if len(data) < 132 + 12 or data[128:132] != b"DICM":
        return None
    # File Meta Information: Explicit VR Little Endian, group 0002 (PS3.10 7.1).
    meta: dict[BaseTag, DataElement | RawDataElement] = {}
    pos = 132
    while True:
        data, at = buf.window(pos, 8)
        tag = (_TAG(data, at)[0] << 16) | _TAG(data, at)[1]
        if tag >> 16 != 0x0002:
            break
        tag, vr, length, header = _element_header(buf, pos, False)
        if length == 0xFFFFFFFF or vr is None:
            return None
        data, at = buf.window(pos + header, length)
        value = data[at : at + length] if length else _empty(_VR_TEXT[vr])
        meta[BaseTag(tag)] = RawDataElement(
            BaseTag(tag), _VR_TEXT[vr], length, value, pos + header, False, True
        )
        pos += header + length
    ts_element = meta.get(BaseTag(0x00020010))
    if not meta or ts_element is None:
        return None
    syntax = _uid(ts_element.value)
    if syntax == IMPLICIT_VR_LE:
        implicit = True
    elif syntax == EXPLICIT_VR_LE or syntax in ENCAPSULATED:
        implicit = False
    else:
        return None
    if tag >> 16 == 0x0000:  # a command set: pydicom merges it specially
        return None
    data, at = buf.window(pos, 8)
    if _looks_explicit(data, at) == implicit:  # pydicom would switch VR encoding (and warn)
        return None

    elements: dict[BaseTag, DataElement | RawDataElement] = {}
    pixel_offset = pixel_tag = pixel_value_offset = pixel_length = None
    keep = _with_charset(wanted)
    data, base = buf.data, buf.base
    n = len(data)
    # The element loop is inlined (this is the hot path: ~50 elements per file).
    while pos + 8 <= file_size:
        at = pos - base
        if at < 0 or at + 12 > n:
            data, at = buf.window(pos, min(12, file_size - pos))
            base, n = buf.base, len(data)
        if implicit:
            group, element, length = _TAG_LEN(data, at)
            vr = None
            header = 8
        else:
            group, element = _TAG(data, at)
            vr = data[at + 4 : at + 6]
            if vr in _SHORT_VRS:
                length = _U16(data, at + 6)[0]
                header = 8
            elif vr in _LONG_VRS:
                length = _U32(data, at + 8)[0]
                header = 12
            else:
                return None  # an unknown VR, or an item tag at the top level
        tag = (group << 16) | element
        if tag in PIXEL_TAGS:
            pixel_offset, pixel_tag, pixel_length = pos, tag, length
            pixel_value_offset = pos + header
            break
        if group == 0xFFFE:  # an item or delimiter at the top level
            return None
        value_offset = pos + header
        if length == 0xFFFFFFFF:
            if tag in keep:
                return None  # pydicom parses a wanted undefined-length sequence eagerly
            if vr == b"SQ" or (vr is None and _is_sequence(tag)):
                pos = _skip_sequence(buf, value_offset, implicit, 0)
                continue
            return None
        end = value_offset + length
        if end > file_size:
            return None
        if tag in keep:
            vr_text = _VR_TEXT[vr] if vr is not None else None
            if not length:
                value = _empty(vr_text)
            elif end - base <= n and value_offset >= base:
                value = data[value_offset - base : end - base]
            else:
                data, at = buf.window(value_offset, length)
                base, n = buf.base, len(data)
                value = data[at : at + length]
            # Plain int keys: hash and compare as the BaseTag pydicom uses, without
            # BaseTag.__eq__ (Python code) on every look-up by int.
            elements[tag] = RawDataElement(  # type: ignore[index]
                BaseTag(tag), vr_text, length, value, value_offset, implicit, True
            )
        pos = end

    dataset = Dataset(elements)
    # As pydicom's read_partial: the data set's own character set, else its default.
    dataset.set_original_encoding(implicit, True, dataset._character_set)
    file_meta = FileMetaDataset(meta)
    file_meta.set_original_encoding(False, True, "iso8859")
    dataset.file_meta = file_meta
    return FastHeader(
        dataset=dataset,
        transfer_syntax=syntax,
        implicit_vr=implicit,
        pixel_offset=pixel_offset,
        pixel_tag=pixel_tag,
        pixel_value_offset=pixel_value_offset,
        pixel_length=pixel_length,
        file_size=file_size,
    )
