"""Which series is measured for each role, and which is the anchor (docs/usage.md, Series roles;
the case file's [roles] and [options] anchor)."""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path

import pytest

from sigreport.errors import InputError
from sigreport.model import Acquisition, Case, Role, Stack, StudyIndex, StudyInfo
from sigreport.pipeline import (
    apply_role_overrides,
    choose_anchor,
    choose_measured,
    choose_phases,
)


def _stack(
    number: int,
    role: Role,
    spacing=(1.0, 1.0, 1.0),
    *,
    mode="2D",
    confidence=0.9,
    uid: str | None = None,
    warnings=(),
) -> Stack:
    uid = uid or f"1.2.3.{number}"
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
        spacing_mm=spacing,
        origin_mm=(0.0, 0.0, 0.0),
        direction=(1, 0, 0, 0, 1, 0, 0, 0, 1),
        acquisition=Acquisition(mr_acquisition_type=mode),
        warnings=tuple(warnings),
        role=role,
        role_reason="test",
        confidence=confidence,
    )


def _index(*stacks: Stack) -> StudyIndex:
    return StudyIndex(study_dir=Path("."), study=StudyInfo(), stacks=stacks)


def _case(**kwargs) -> Case:
    return Case(path=Path("case.toml"), study=None, **kwargs)


def test_two_series_of_one_role_measure_the_finest_and_name_the_other():
    # docs/usage.md: "the one with the smallest voxel volume is measured and qc names the other"
    coarse = _stack(3, Role.T2, (0.9, 0.9, 5.0))
    fine = _stack(7, Role.T2, (1.0, 1.0, 1.0))
    measured, notes = choose_measured(_index(coarse, fine), {})
    assert measured[Role.T2].series_number == 7
    shared = [n for n in notes if n.code == "role-shared"]
    assert len(shared) == 1 and "series 3" in shared[0].message


def test_case_file_role_override_by_series_number_wins():
    coarse = _stack(3, Role.T2, (0.9, 0.9, 5.0))
    fine = _stack(7, Role.T2)
    flair_like = _stack(6, Role.UNKNOWN)
    index, forced = apply_role_overrides(
        _index(coarse, fine, flair_like), {Role.T2: 3, Role.FLAIR: 6}
    )
    measured, _ = choose_measured(index, forced)
    assert measured[Role.T2].series_number == 3
    assert measured[Role.FLAIR].series_number == 6
    assert measured[Role.FLAIR].role_source == "case file"


def test_role_override_by_uid_and_missing_series_is_an_input_error():
    t1 = _stack(2, Role.UNKNOWN, uid="1.2.840.5")
    index, forced = apply_role_overrides(_index(t1), {Role.T1: "1.2.840.5"})
    assert forced == {Role.T1: "1.2.840.5"}
    with pytest.raises(InputError, match=r"\[roles\] FLAIR = 9: no series number 9"):
        apply_role_overrides(_index(t1), {Role.FLAIR: 9})


def test_unknown_and_doubtful_roles_are_never_silent():
    unknown = _stack(1, Role.UNKNOWN)
    doubtful = _stack(4, Role.FLAIR, confidence=0.3)
    measured, notes = choose_measured(
        _index(unknown, doubtful, _stack(2, Role.T2, warnings=["gap"])), {}
    )
    assert Role.UNKNOWN not in measured
    codes = {n.code for n in notes}
    assert {"role-unknown", "role-doubtful", "series-geometry"} <= codes


def test_anchor_defaults_to_the_finest_3d_series():
    measured = {
        Role.T2: _stack(3, Role.T2, (0.5, 0.5, 5.0)),  # finer voxels in-plane but 2D
        Role.T1POST: _stack(8, Role.T1POST, (1.0, 1.0, 1.0), mode="3D"),
        Role.T1: _stack(2, Role.T1, (1.2, 1.2, 1.2), mode="3D"),
    }
    role, reason = choose_anchor(_case(), measured, [])
    assert role is Role.T1POST and "3D" in reason


def test_anchor_is_the_series_a_mask_was_drawn_on_unless_the_case_names_one():
    class Drawn:
        id = "L1"
        source_series_uid = "1.2.3.3"

    measured = {Role.T2: _stack(3, Role.T2), Role.T1: _stack(2, Role.T1, mode="3D")}
    assert choose_anchor(_case(), measured, [Drawn()])[0] is Role.T2
    assert choose_anchor(_case(anchor="T1"), measured, [Drawn()])[0] is Role.T1
    assert choose_anchor(_case(anchor="2"), measured, [])[0] is Role.T1
    with pytest.raises(InputError, match="anchor = 'FLAIR' names no measured series"):
        choose_anchor(_case(anchor="FLAIR"), measured, [])


def _phase(number: int, phase: int, delay: float, role: Role = Role.T1POSTFS) -> Stack:
    return replace(
        _stack(number, role, mode="3D"),
        dynamic_group="1.2.3.7",
        dynamic_phase=phase,
        dynamic_delay_s=delay,
    )


def test_dynamic_phases_measure_the_last_and_keep_every_phase():
    # docs/usage.md, dynamic: the role's signal is the last phase; every phase gives the curve
    phases = [_phase(8 + k, k + 1, d) for k, d in enumerate((0.0, 60.0, 120.0))]
    other = _stack(20, Role.T1POSTFS, (0.5, 0.5, 0.5))  # a finer single post series elsewhere
    pre = replace(_stack(7, Role.T1FS, mode="3D"), dynamic_group="1.2.3.7")
    index = _index(pre, *phases, other)
    measured, notes = choose_measured(index, {})
    assert measured[Role.T1POSTFS].series_number == 10
    shared = [n for n in notes if n.code == "role-shared"]
    assert len(shared) == 1 and "series 20" in shared[0].message
    assert "series 8" not in shared[0].message  # the phases are not "other series"
    chosen, phase_notes = choose_phases(index, measured)
    assert [s.series_number for s in chosen[Role.T1POSTFS]] == [8, 9, 10]
    assert [n.code for n in phase_notes] == ["dynamic-phases"]
    # a pre-contrast series from another acquisition is named
    alone = _index(_stack(7, Role.T1FS, mode="3D"), *phases)
    chosen, phase_notes = choose_phases(alone, choose_measured(alone, {})[0])
    assert "dynamic-pre-other-acquisition" in [n.code for n in phase_notes]
    # the case file's [roles] may name another phase: its signal, the curve still from all
    forced = {Role.T1POSTFS: phases[0].key}
    measured, _ = choose_measured(index, forced)
    assert measured[Role.T1POSTFS].series_number == 8
    chosen, _ = choose_phases(index, measured)
    assert [s.series_number for s in chosen[Role.T1POSTFS]] == [8, 9, 10]
