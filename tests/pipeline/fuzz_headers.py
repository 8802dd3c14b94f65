"""The body of the header fuzz test, run in a child process under a memory ceiling.

Hypothesis mutates the headers of the small valid series (``builders.hostile``): values of the
wrong type or length, NaN and infinities, huge and negative sizes, missing geometry, other VRs
with raw bytes, truncated pixel data, on one file or on every file. Each example runs
``sigreport scan`` and ``sigreport report`` in-process (typer's ``CliRunner``) and asserts exit
0 or 2, never 1, and no traceback. ``main`` prints the child's peak resident memory last.

Run by ``test_fuzz.py``; by hand: ``PYTHONPATH=tests:tests/pipeline python -c
"import fuzz_headers; fuzz_headers.main()"``.
"""

from __future__ import annotations

import os
import resource
import shutil
import struct
import sys
import tempfile
import warnings
from pathlib import Path

import pydicom
from hypothesis import HealthCheck, given, seed, settings
from hypothesis import strategies as st
from pydicom import config
from pydicom.datadict import dictionary_VR, tag_for_keyword
from pydicom.dataelem import RawDataElement
from pydicom.tag import Tag
from typer.testing import CliRunner

from sigreport.cli import app

from builders.hostile import write_small_study

KEYWORDS = (
    "Rows", "Columns", "NumberOfFrames", "BitsAllocated", "BitsStored", "HighBit",
    "PixelRepresentation", "SamplesPerPixel", "PixelSpacing", "ImageOrientationPatient",
    "ImagePositionPatient", "RescaleSlope", "RescaleIntercept", "SliceThickness",
    "SpacingBetweenSlices", "SOPInstanceUID", "SOPClassUID", "SeriesInstanceUID",
    "StudyInstanceUID", "FrameOfReferenceUID", "SpecificCharacterSet", "RepetitionTime",
    "EchoTime", "InversionTime", "ScanningSequence", "ScanOptions", "ImageType",
    "SeriesNumber", "InstanceNumber", "PatientName", "PatientID", "SeriesDescription",
    "Modality", "PixelData",
)  # fmt: skip
NUMBER_TEXT = st.sampled_from(
    ["nan", "-nan", "inf", "-inf", "1e308", "1e-308", "-1", "0", "", " ", "abc", "1\\2\\3",
     "65535", "4294967295", "2147483648", "1000000", "3.5", "\x00", "ISO_IR 999", "1.2.3..4"]
)  # fmt: skip
VALUES = st.one_of(
    NUMBER_TEXT,
    st.lists(NUMBER_TEXT, min_size=0, max_size=7).map("\\".join),
    st.integers(min_value=-(2**31), max_value=2**32),
    st.floats(allow_nan=True, allow_infinity=True).map(repr),
    st.binary(max_size=48),
)
MUTATION = st.tuples(
    st.sampled_from(KEYWORDS),
    st.sampled_from(("set", "delete", "raw")),
    VALUES,
    st.sampled_from(("one", "all")),
)


def _apply(ds: pydicom.Dataset, keyword: str, action: str, value: object) -> None:
    """Put ``value`` into ``ds`` as raw bytes, so that pydicom writes it unchecked: under the
    dictionary VR (``set``), or as UN / OB (``raw``: an odd VR)."""
    tag = Tag(tag_for_keyword(keyword))
    if action == "delete":
        if tag in ds:
            del ds[tag]
        return
    vr = dictionary_VR(tag)
    if action == "raw" or keyword == "PixelData":
        vr = "OB" if keyword == "PixelData" else "UN"
    raw = value if isinstance(value, bytes) else str(value).encode("latin-1", "replace")
    if vr in _BINARY and isinstance(value, int):
        code, size = _BINARY[vr]
        try:
            raw = struct.pack("<" + code, value)
        except struct.error:  # out of range: the low bytes, as a careless writer would
            raw = (value & ((1 << (8 * size)) - 1)).to_bytes(size, "little")
    elif vr not in ("UN", "OB") and len(raw) % 2:
        raw += b" "  # even length (PS3.5 7.1.1)
    ds._dict[tag] = RawDataElement(tag, vr, len(raw), raw, 0, False, True)


_BINARY = {"US": ("H", 2), "SS": ("h", 2), "UL": ("I", 4), "SL": ("i", 4)}


def _run(args: list[str], out: Path | None = None) -> None:
    result = CliRunner().invoke(app, args)
    log = out / "error.log" if out is not None else None
    trace = log.read_text()[-3000:] if log is not None and log.is_file() else ""
    assert result.exit_code in (0, 2), (args[0], result.exit_code, result.output[-3000:], trace)
    assert "Traceback" not in result.output, result.output[-3000:]


def _fuzz(template: Path, max_examples: int) -> None:
    @seed(int(os.environ.get("SIGREPORT_FUZZ_SEED", "20261202")))
    @settings(
        max_examples=max_examples,
        deadline=None,
        database=None,
        suppress_health_check=list(HealthCheck),
    )
    @given(st.lists(MUTATION, min_size=1, max_size=4))
    def example(mutations: list[tuple[str, str, object, str]]) -> None:
        work = Path(tempfile.mkdtemp(dir=template.parent))
        try:
            shutil.copytree(template, work / "case")
            study, case = work / "case" / "study", work / "case" / "case.toml"
            files = sorted(study.rglob("IM*"))
            for keyword, action, value, where in mutations:
                for path in files if where == "all" else files[:1]:
                    ds = pydicom.dcmread(path)
                    _apply(ds, keyword, action, value)
                    try:
                        ds.save_as(path)
                    except Exception:  # pydicom cannot write this value: the file keeps the last
                        continue
            _run(["scan", str(study), "--json"])
            out = work / "out"
            _run(
                ["report", str(study), "--case", str(case), "--out", str(out), "--no-register"], out
            )
        finally:
            shutil.rmtree(work, ignore_errors=True)

    example()


def main(max_examples: int = 40) -> None:
    """Fuzz, then print ``maxrss_kb <n>`` (this process' peak resident memory)."""
    config.settings.writing_validation_mode = config.IGNORE
    config.settings.reading_validation_mode = config.IGNORE
    warnings.simplefilter("ignore")
    with tempfile.TemporaryDirectory() as tmp:
        write_small_study(Path(tmp) / "template")
        _fuzz(Path(tmp) / "template", max_examples)
    print(f"maxrss_kb {resource.getrusage(resource.RUSAGE_SELF).ru_maxrss}", flush=True)


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 40)
