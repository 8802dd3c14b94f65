"""An archive report fetches every phase of a dynamic acquisition, not only the measured one
(the report measures them all for the dynamic curve; docs/usage.md, dynamic)."""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path

from sigreport.archive.fetch import _phase_stacks, needed_stacks
from sigreport.model import Acquisition, Role, Stack, StudyIndex, StudyInfo


def _stack(number: int, role: Role, phase: int | None = None) -> Stack:
    uid = f"1.2.3.{number}"
    return Stack(
        key=uid,
        series_instance_uid=uid,
        series_number=number,
        stack=None,
        description=f"SERIES {number}",
        modality="MR",
        frame_of_reference_uid="1.2.3.99",
        instances=(),
        size=(64, 64, 20),
        spacing_mm=(1.0, 1.0, 1.0),
        origin_mm=(0.0, 0.0, 0.0),
        direction=(1, 0, 0, 0, 1, 0, 0, 0, 1),
        acquisition=Acquisition(mr_acquisition_type="3D"),
        role=role,
        role_reason="test",
        confidence=0.9,
        dynamic_group="1.2.3.7" if phase is not None or role is Role.T1FS else None,
        dynamic_phase=phase,
        dynamic_delay_s=None if phase is None else 60.0 * (phase - 1),
    )


def test_every_dynamic_phase_is_fetched():
    stacks = (
        _stack(7, Role.T1FS),
        *(_stack(7 + k, Role.T1POSTFS, phase=k) for k in (1, 2, 3)),
        _stack(3, Role.T2),
    )
    index = StudyIndex(study_dir=Path("."), study=StudyInfo(), stacks=stacks)
    measured = needed_stacks(index, {})
    assert measured[Role.T1POSTFS].series_number == 10
    extra = _phase_stacks(index, measured, {}, "case.toml")
    assert sorted(s.series_number for s in extra.values()) == [8, 9]
    assert sorted(extra) == ["T1POSTFS phase 1", "T1POSTFS phase 2"]
    # the case file may pick a phase: the others are still fetched
    forced = needed_stacks(index, {Role.T1POSTFS: 8})
    extra = _phase_stacks(index, forced, {Role.T1POSTFS: 8}, "case.toml")
    assert sorted(s.series_number for s in extra.values()) == [9, 10]
    # without a dynamic acquisition nothing more is fetched
    single = replace(index, stacks=(_stack(3, Role.T2),))
    assert _phase_stacks(single, needed_stacks(single, {}), {}, "case.toml") == {}
