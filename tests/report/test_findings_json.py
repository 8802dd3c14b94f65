"""findings.json: written as given, and described exactly by docs/findings.schema.json."""

from __future__ import annotations

import copy
import json
import math
from pathlib import Path

import jsonschema
import pytest

from sigreport.report.writer import findings_json

SCHEMA_PATH = Path(__file__).resolve().parents[2] / "docs" / "findings.schema.json"


@pytest.fixture(scope="module")
def validator() -> jsonschema.Draft202012Validator:
    schema = json.loads(SCHEMA_PATH.read_text(encoding="utf-8"))
    # jsonschema's own meta-schema check: the schema itself is valid draft 2020-12.
    jsonschema.Draft202012Validator.check_schema(schema)
    return jsonschema.Draft202012Validator(schema)


def test_written_findings_validate_and_equal_the_input(report_dir, findings, validator):
    # report_dir was written from the same (deterministic) fixture findings.
    written = json.loads((report_dir / "findings.json").read_text(encoding="utf-8"))
    validator.validate(written)
    assert written == findings


def test_findings_json_round_trips_exactly(findings):
    text = findings_json(findings)
    assert json.loads(text) == findings
    assert text.endswith("\n") and text.startswith('{\n  "schema"')  # indent 2


def test_signal_roles_are_written_in_reading_order(findings):
    lesion = json.loads(findings_json(findings))["lesions"][0]
    assert list(lesion["signal"]) == ["T1", "T1FS", "T2", "FLAIR", "T1POST"]
    assert list(findings["lesions"][0]["signal"])[0] == "T2"  # the input is left untouched


def test_nan_is_refused_not_written(findings):
    findings["lesions"][0]["volume_ml"] = math.nan
    with pytest.raises(ValueError, match="Out of range float values"):
        findings_json(findings)


def test_the_contract_example_validates(validator):
    # The findings.json example of the contract (docs/usage.md), verbatim in its values.
    example = {
        "schema": "sigreport-findings/2",
        "tool": {"name": "sigreport", "version": "0.1.0"},
        "study": {"study_instance_uid": "1.2.3", "study_date": "20261201", "accession_number": "A1"},
        "series": [
            {
                "role": "T2", "series_instance_uid": "1.2.3.4", "series_number": 3,
                "description": "...", "role_reason": "TR 4000 ms, TE 100 ms, no inversion",
                "alignment": {"method": "identity", "translation_mm": [0, 0, 0], "rotation_deg": 0.0},
            }
        ],
        "rois": [{"id": "R1", "kind": "reference", "tissue": "white matter", "volume_ml": 0.52}],
        "lesions": [
            {
                "id": "L1", "site": "right frontal white matter", "reference": "R1",
                "volume_ml": 0.9, "max_diameter_mm": 12.0,
                "signal": {
                    "T2": {"n_voxels": 412, "mean": 812.3, "median": 809.0, "sd": 40.1,
                           "p05": 745.0, "p95": 880.0, "ratio": 2.41, "grade": "hyperintense"}
                },
                "enhancement": {"pre": "T1", "post": "T1POST", "percent": 84.0,
                                "enhancing": True, "pattern": "rim"},
                "suppression": {
                    "fluid": {"from": "T2", "to": "FLAIR", "drop_percent": 91.0, "suppressed": True},
                    "fat": {"from": "T1", "to": "T1FS", "drop_percent": 4.0, "suppressed": False},
                },
                "flow_void": False,
                "behaviour": ["follows-fluid"],
            }
        ],
        "qc": [{"level": "warning", "code": "fat-suppression-failed", "message": "..."}],
        "cautions": ["Draft for review by the reporting radiologist; not a diagnosis."],
    }  # fmt: skip
    validator.validate(example)


@pytest.mark.parametrize(
    ("path", "value"),
    [
        (("lesions", 0, "signal", "T3"), None),  # not a Role value
        (("lesions", 0, "signal", "T2", "grade"), "bright"),
        (("lesions", 0, "enhancement", "pattern"), "ring"),
        (("lesions", 0, "suppression", "water"), None),
        (("qc", 0, "level"), "fatal"),
        (("schema",), "sigreport-findings/1"),
        (("cautions",), []),
        (("unexpected",), 1),
    ],
)
def test_schema_rejects_what_the_contract_does_not_allow(findings, validator, path, value):
    validator.validate(findings)  # valid before the change
    broken = copy.deepcopy(findings)
    target = broken
    for key in path[:-1]:
        target = target[key]
    target[path[-1]] = value
    with pytest.raises(jsonschema.ValidationError):
        validator.validate(broken)


def test_schema_allows_the_optional_fields(findings, validator):
    findings["lesions"][0]["suppression"]["fat"] = None
    findings["lesions"][0]["enhancement"]["raw_percent"] = 12.5
    findings["rois"][0]["snr"]["FLAIR"] = None
    findings["rois"][1]["drop_percent"] = None
    findings["series"][0]["anchor"] = True
    findings["generated"] = "2026-12-01T10:00:00+00:00"
    validator.validate(findings)
