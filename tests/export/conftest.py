"""The check that a de-identified SR follows the profile, attribute by attribute.

``check_profile(original, out, identifiers)`` walks the original SR and its de-identified copy
side by side, into every sequence item, and checks each original attribute against the action
of its row of PS3.15 Table E.1-1 (or the tool's rule for attributes the table does not list,
``sigreport.export.profile.action_for``): X absent, Z zero length, D the VR's dummy, U a new
``2.25.`` UID (the same new UID for the same original everywhere), C kept with no identifier
left, K unchanged. It returns the original -> new UID map it saw.
"""

from __future__ import annotations

import pytest
from pydicom.dataset import Dataset

from sigreport.export.profile import DICOM_UID_ROOT, DUMMY, action_for

# What the de-identification adds (PS3.3 C.7.1.1 Patient Identification Module).
ADDED = {"PatientIdentityRemoved", "DeidentificationMethod", "DeidentificationMethodCodeSequence"}


def _values(element) -> list[str]:
    value = element.value
    if value is None:
        return []
    return [str(v) for v in value] if element.VM > 1 else [str(value)]


def _walk(
    original: Dataset,
    out: Dataset,
    identifiers: list[str],
    uids: dict[str, str],
    path: str,
    top: bool,
) -> None:
    for element in original:
        action = action_for(element.tag, element.keyword, element.VR)
        where = f"{path}{element.keyword or element.tag}"
        if action == "X" or (action == "D" and element.VR == "SQ"):
            assert element.tag not in out, f"{where}: {action}, still present"
            continue
        assert element.tag in out, f"{where}: {action}, missing"
        new = out[element.tag]
        if action == "Z":
            assert new.is_empty, f"{where}: Z, holds {new.value!r}"
        elif action == "D":
            assert new.value == DUMMY[element.VR], f"{where}: D, holds {new.value!r}"
        elif element.VR == "SQ":
            items = list(new.value)
            if element.keyword == "ContributingEquipmentSequence" and top:
                items = items[:-1]  # the de-identifying equipment's item is added last
            assert len(items) == len(element.value), where
            for k, (a, b) in enumerate(zip(element.value, items, strict=True)):
                _walk(a, b, identifiers, uids, f"{where}[{k}].", False)
        elif action == "U":
            for old, value in zip(_values(element), _values(new), strict=True):
                if old.startswith(DICOM_UID_ROOT):
                    assert value == old, where
                    continue
                assert value.startswith("2.25.") and value != old, f"{where}: U, {value}"
                assert uids.setdefault(old, value) == value, f"{where}: another new UID"
        elif action == "C":
            text = " ".join(_values(new)).lower()
            left = [i for i in identifiers if i.lower() in text]
            assert not left, f"{where}: C, still holds {left}"
            if not any(i.lower() in " ".join(_values(element)).lower() for i in identifiers):
                assert new.value == element.value, f"{where}: C changed text without cause"
        else:
            assert action == "K", (where, action)
            assert new.value == element.value, f"{where}: K, changed"
    extra = {e.keyword for e in out} - {e.keyword for e in original}
    allowed = ADDED | {"ContributingEquipmentSequence"} if top else set()
    assert extra <= allowed, f"{path or 'top level'}: added {sorted(extra - allowed)}"


def check_profile(original: Dataset, out: Dataset, identifiers: list[str]) -> dict[str, str]:
    uids: dict[str, str] = {}
    _walk(original, out, [i for i in identifiers if len(i) >= 4], uids, "", True)
    # A replacement UID stands for one original only.
    assert len(set(uids.values())) == len(uids)
    return uids


@pytest.fixture
def profile_checker():
    return check_profile
