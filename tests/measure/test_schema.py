"""The characterization's JSON against the project's findings.json schema (docs/), when present."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from sigreport.measure import characterize
from sigreport.model import Role

SCHEMA = Path(__file__).resolve().parents[2] / "docs" / "findings.schema.json"


@pytest.fixture
def validator():
    jsonschema = pytest.importorskip("jsonschema")
    if not SCHEMA.is_file():
        pytest.skip("docs/findings.schema.json not present")
    schema = json.loads(SCHEMA.read_text(encoding="utf-8"))

    def check(kind: str, obj) -> None:
        sub = {"$schema": schema["$schema"], "$defs": schema["$defs"], "$ref": f"#/$defs/{kind}"}
        jsonschema.Draft202012Validator(sub).validate(obj)

    return check


def test_lesions_rois_and_qc_match_the_schema(build, rules, validator):
    roles = [Role.T1, Role.T2, Role.FLAIR, Role.T1FS, Role.T1POST, Role.STIR]
    lesion = build.lesion(
        {
            Role.T1: 200.0,
            Role.T2: 1800.0,
            Role.FLAIR: 100.0,
            Role.T1FS: None,
            Role.T1POST: 250.0,
            Role.STIR: 1500.0,
        }
    )
    ref = build.reference({r: 600.0 for r in roles}, cv=0.4)
    csf = build.control("C1", "CSF", {r: 900.0 for r in roles})
    fat = build.control("C2", "fat", {r: 1500.0 for r in roles})
    muscle = build.control("C3", "muscle", {r: 400.0 for r in roles})
    result = characterize(
        build.study([lesion, ref, csf, fat, muscle], noise={Role.T1: 10.0}), rules
    )
    for item in result.lesions:
        validator("lesion", json.loads(json.dumps(item.to_json())))
    for entry in result.rois:
        validator("roi", json.loads(json.dumps(entry)))
    for note in result.qc:
        validator("qc", note.to_json())
    assert {n.code for n in result.qc} >= {"fluid-suppression-failed", "reference-heterogeneous"}
