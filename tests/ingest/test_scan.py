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
    assert "SERIES 3" in text and "T2 (0.90)" in text and "coronal" in text
    assert "5x4x3" in text
    assert "Skipped 1 file(s):" in text and "readme.txt: not a DICOM file" in text
