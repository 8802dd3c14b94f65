"""The outputs of the demo scenarios and of the end-to-end variants are those stored in
tests/pipeline/golden: findings.json value for value at full precision (apart from the run's
timestamp ``generated``), table.csv, report.md, report.txt and report.html byte for byte (apart
from the timestamp and with each embedded PNG compared by its decoded pixels; see
``builders.golden``). A change that is meant to alter an output regenerates them with
``python tests/builders/golden.py`` and says why in its commit."""

from __future__ import annotations

import math

import pytest

from builders.golden import SCENARIOS, TEXT_FILES, digest, run_scenario, stored

pytestmark = pytest.mark.slow


def _differences(want, got, where="findings") -> list[str]:
    """Every place where two JSON values differ; floats must be the same double (a float and an
    int of equal value differ too: JSON prints them differently)."""
    if type(want) is not type(got):
        return [f"{where}: {want!r} != {got!r}"]
    if isinstance(want, dict):
        out = [f"{where}: keys {sorted(want)} != {sorted(got)}"] if list(want) != list(got) else []
        for key in want.keys() & got.keys():
            out += _differences(want[key], got[key], f"{where}.{key}")
        return out
    if isinstance(want, list):
        if len(want) != len(got):
            return [f"{where}: {len(want)} items != {len(got)}"]
        return [
            d
            for i, (a, b) in enumerate(zip(want, got, strict=True))
            for d in _differences(a, b, f"{where}[{i}]")
        ]
    if isinstance(want, float) and math.isnan(want) and math.isnan(got):
        return []
    return [] if want == got else [f"{where}: {want!r} != {got!r}"]


def test_differences_sees_the_last_bit_and_the_key_order():
    assert _differences({"a": 0.1 + 0.2}, {"a": 0.3}) == ["findings.a: 0.30000000000000004 != 0.3"]
    assert _differences({"a": 1.0}, {"a": 1}) != []
    assert _differences({"a": 1, "b": 2}, {"b": 2, "a": 1}) != []
    assert _differences({"a": [1, {"b": None}]}, {"a": [1, {"b": None}]}) == []


@pytest.mark.parametrize("name", sorted(SCENARIOS))
def test_outputs_equal_the_stored_ones(name, tmp_path):
    findings, digests = stored(name)
    outputs = run_scenario(name, tmp_path)
    assert _differences(findings, outputs["findings.json"]) == []
    for file in TEXT_FILES:
        assert digest(outputs[file]) == digests[file], f"{name}: {file} changed"
