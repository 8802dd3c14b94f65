"""The ``scan`` outputs: the docs/usage.md ``scan --json`` object and the rich table."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
from pydicom.uid import generate_uid
from rich.console import Console

from sigreport.ingest import index_study, print_scan_table, scan_to_json

from builders.dicom import CORONAL, write_classic_series

SERIES_KEYS = {  # docs/usage.md, "scan --json"
    "series_instance_uid", "series_number", "stack", "description", "modality", "role",
    "role_reason", "confidence", "n_instances", "size", "spacing_mm", "frame_of_reference_uid",
    "warnings",
}  # fmt: skip


def _study(tmp_path: Path) -> Path:
    stored = np.arange(3 * 4 * 5, dtype=np.int16).reshape(3, 4, 5)
    t2 = {"RepetitionTime": "4000", "EchoTime": "100", "ScanningSequence": "SE"}
    write_classic_series(tmp_path / "s3", stored, series_number=3, description="SERIES 3",
                         spacing=(0.5, 0.5, 4.0), extra=t2)  # fmt: skip
    uid = generate_uid()
    write_classic_series(tmp_path / "s4a", stored, series_number=4, series_uid=uid)
    write_classic_series(tmp_path / "s4b", stored, series_number=4, series_uid=uid,
                         direction=CORONAL)  # fmt: skip
    (tmp_path / "readme.txt").write_text("study notes")
    return tmp_path


def test_scan_json_object(tmp_path: Path) -> None:
    out = scan_to_json(index_study(_study(tmp_path)))
    json.dumps(out)  # serialisable as is
    assert set(out) == {"schema", "study_dir", "series", "skipped"}
    assert out["schema"] == "sigreport-scan/1"
    assert len(out["series"]) == 3
    for series in out["series"]:
        assert set(series) == SERIES_KEYS
    t2 = out["series"][0]
    assert t2["series_number"] == 3 and t2["stack"] is None and t2["role"] == "T2"
    assert t2["size"] == [5, 4, 3] and t2["spacing_mm"] == [0.5, 0.5, 4.0]
    assert t2["n_instances"] == 3 and t2["modality"] == "MR" and t2["warnings"] == []
    assert [s["stack"] for s in out["series"][1:]] == ["axial", "coronal"]
    assert out["skipped"] == [
        {"path": str(tmp_path / "readme.txt"), "reason": "not a DICOM file (no DICM prefix)"}
    ]


def test_scan_table_lists_stacks_and_skipped_files(tmp_path: Path) -> None:
    console = Console(record=True, width=200)
    print_scan_table(index_study(_study(tmp_path)), console)
    text = console.export_text()
    assert "SERIES 3" in text and "coronal" in text
    [t2_line] = [line for line in text.splitlines() if "SERIES 3" in line]
    assert t2_line.split()[3:5] == ["T2", "0.90"]  # role, then its confidence
    assert "5x4x3" in text
    assert "Skipped 1 file(s):" in text and "readme.txt: not a DICOM file" in text


def _words_study(tmp_path: Path) -> Path:
    """Series whose descriptions and reasons are long: a T2 (reason about 60 characters), a
    series of no role (UNKNOWN, no confidence) and a long protocol name."""
    stored = np.arange(3 * 4 * 5, dtype=np.int16).reshape(3, 4, 5)
    t2 = {"RepetitionTime": "4000", "EchoTime": "100", "ScanningSequence": "SE"}
    write_classic_series(tmp_path / "s3", stored, series_number=3,
                         description="AX T2 TSE FS high resolution brain protocol 3 mm",
                         extra={**t2, "ScanOptions": "FS"})  # fmt: skip
    write_classic_series(tmp_path / "s5", stored, series_number=5,
                         description="ssfp", extra={"RepetitionTime": "4", "EchoTime": "2",
                                                    "ScanningSequence": "GR",
                                                    "SequenceVariant": "SS"})  # fmt: skip
    return tmp_path


def test_scan_table_fits_80_columns_with_words_whole_and_empty_columns_dropped(tmp_path):
    index = index_study(_words_study(tmp_path))
    console = Console(record=True, width=80)
    print_scan_table(index, console)
    text = console.export_text()
    lines = text.splitlines()
    assert all(len(line) <= 80 for line in lines), max(lines, key=len)
    # Every word of every description and reason appears whole on one line.
    tokens = {w for line in lines for w in line.split()}
    for stack in index.stacks:
        for word in (stack.description + " " + stack.role_reason).split():
            assert word in tokens, word
    header = lines[1].split()
    # No split series and no warnings: those columns are dropped; the confidence is kept.
    assert "stack" not in header and "warn" not in header and "conf" in header


def test_unknown_has_no_confidence_in_json_or_table(tmp_path):
    index = index_study(_words_study(tmp_path))
    out = {s["series_number"]: s for s in scan_to_json(index)["series"]}
    assert out[5]["role"] == "UNKNOWN" and out[5]["confidence"] is None
    assert out[3]["role"] == "T2FS" and out[3]["confidence"] == 0.9
    console = Console(record=True, width=80)
    print_scan_table(index, console)
    lines = console.export_text().splitlines()
    at = lines[1].index("conf")
    [row] = [line for line in lines if line.startswith("5 ")]
    [t2] = [line for line in lines if line.startswith("3 ")]
    assert "UNKNOWN" in row and row[at : at + 4].strip() == ""
    assert t2[at : at + 4] == "0.90"
