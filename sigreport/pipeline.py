"""The main job, end to end: a study and a case file in, a report folder out.

The job is a short sequence of stages, each a function of this module (or of a stage's
subpackage) that takes the plain data (``sigreport.model``) of the stages before it::

    plan_report    case file + lexicon -> study index, roles, measured series, ROIs, anchor
    load_series    the measured series' pixels (SimpleITK images, patient space)
    align_series   each series' rigid alignment to the anchor
    place_rois     viewer positions, seeds, mirror references placed on the anchor
    measure_study  every ROI sampled and measured on every series (+ noise floor)
    characterize   ratios, grades, pairs, controls, behaviour       (sigreport.measure)
    build_findings, build_key_slices   findings.json object and key images   (sigreport.report)
    write_report   the report folder, atomically                     (sigreport.report)

:func:`analyze_case` runs every stage up to the findings and writes nothing (for a batch runner,
a comparison with a prior study, a server); :func:`run_report` adds the report folder. It does
not hold every series at once: the anchor stays loaded, and the other series stream through
(:func:`stream_series`), each loaded, aligned, measured and cut into its key slices
(:func:`measure_series`) and released before the next; the stage functions above, which take
every series at once, give the same results. This module also chooses what to measure and
collects the ``qc`` notes those choices produce. Nothing is guessed silently: a doubtful role,
a large registration, a missing series each leave a note. The contract is docs/usage.md.
"""

from __future__ import annotations

import os
from collections import deque
from collections.abc import Callable, Container, Mapping, Sequence
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np
import SimpleITK as sitk

from sigreport import limits
from sigreport.align import (
    clear_anchor_cache,
    identity_alignment,
    register_rigid,
    register_series,
)
from sigreport.errors import InputError
from sigreport.ingest import index_study, load_stack
from sigreport.ingest.explain import skipped_series_summary, why_absent
from sigreport.lexicon_tables import Lexicon, load_lexicon
from sigreport.measure import Characterization, characterize, measure_roi, noise_sigma
from sigreport.measure.change import interval_change, with_interval_change
from sigreport.memory import release_free_memory
from sigreport.model import (
    PRE_CONTRAST_OF,
    ROLE_ORDER,
    AlignedStudy,
    Alignment,
    Analysis,
    Case,
    MeasuredRoi,
    MeasuredSeries,
    MeasuredStudy,
    Progress,
    QcLevel,
    QcNote,
    ReportPlan,
    RoiKind,
    RoiShape,
    Role,
    SeriesJob,
    SeriesMeasurement,
    Stack,
    StudyIndex,
    StudyMeasurement,
    say,
)
from sigreport.report import (
    FINDINGS_SCHEMA,
    build_findings,
    lesion_phrases,
    write_report,
)
from sigreport.report.keyslices import arrange_key_slices, display_order, series_key_slices
from sigreport.report.outdir import check_outdir, report_inputs
from sigreport.rois import (
    RoiSample,
    axial_diameters_mm,
    load_case,
    max_diameter_mm,
    sample_region,
    union_bounds,
    volume_ml,
)
from sigreport.rois.forms import PlacedRois, place_roi_forms, provisional_regions
from sigreport.rois.masks import mask_reference_notes
from sigreport.rois.settings import load_roi_settings
from sigreport.rois.space import Region
from sigreport.rois.viewer import resolve_viewer_positions

__all__ = [
    "DOUBTFUL_ROLE_CONFIDENCE",
    "FINDINGS_SCHEMA",
    "ROLE_ORDER",
    "Progress",
    "ReportRun",
    "align_series",
    "analyze_case",
    "apply_role_overrides",
    "characterize_study",
    "check_roi_extent",
    "choose_anchor",
    "choose_measured",
    "choose_phases",
    "load_phases",
    "load_series",
    "measure_series",
    "measure_study",
    "override_notes",
    "place_rois",
    "plan_report",
    "resolve_study_dir",
    "run_report",
    "series_jobs",
    "stream_series",
]

# Below this confidence an inferred role is reported as doubtful in qc.
DOUBTFUL_ROLE_CONFIDENCE = 0.6


@dataclass(frozen=True)
class ReportRun:
    """What ``run_report`` did: where the report is, and what it concluded."""

    out_dir: Path
    report_html: Path
    findings: dict[str, Any]


# --------------------------------------------------------------------------------------------
# Choosing series


def apply_role_overrides(
    index: StudyIndex, overrides: Mapping[Role, int | str], *, case_name: str = "case.toml"
) -> tuple[StudyIndex, dict[Role, str]]:
    """Give the stacks the case file's ``[roles]`` names; return the new index and, per
    overridden role, the key of the stack that must be measured for it."""
    chosen: dict[Role, str] = {}
    stacks = list(index.stacks)
    problems: list[str] = []
    numbers = sorted({s.series_number for s in stacks if s.series_number is not None})
    for role, target in overrides.items():
        matches = [
            i
            for i, s in enumerate(stacks)
            if (isinstance(target, int) and s.series_number == target)
            or (isinstance(target, str) and target in (s.series_instance_uid, s.key))
        ]
        if not matches:
            what = f"series number {target}" if isinstance(target, int) else f"series {target}"
            problems.append(
                f"[roles] {role.value} = {target!r}: no {what} in the study"
                + why_absent(index, target)
            )
            continue
        # A split series: the finest of its stacks carries the role.
        best = min(matches, key=lambda i: stacks[i].voxel_volume_mm3)
        stacks[best] = replace(
            stacks[best],
            role=role,
            role_reason=f"set by the case file ([roles] {role.value} = {target!r}); "
            f"inferred: {stacks[best].role.value} ({stacks[best].role_reason})",
            confidence=1.0,
            role_source="case file",
        )
        chosen[role] = stacks[best].key
    if problems:
        # Every [roles] problem at once, so that one edit of the case file fixes them all.
        raise InputError(
            f"{case_name}: "
            + "; ".join(problems)
            + f" (the study's series numbers: {', '.join(map(str, numbers)) or 'none'})"
        )
    return replace(index, stacks=tuple(stacks)), chosen


def override_notes(before: StudyIndex, after: StudyIndex) -> list[QcNote]:
    """A warning for each ``[roles]`` override that contradicts the role the acquisition physics
    gave the series (confidently: not UNKNOWN, not doubtful): "FLAIR = 3" naming a T2 series."""
    notes = []
    old = {s.key: s for s in before.stacks}
    for stack in after.stacks:
        was = old.get(stack.key)
        if (
            was is None
            or stack.role_source != "case file"
            or was.role in (Role.UNKNOWN, stack.role)
            or (was.confidence or 0.0) < DOUBTFUL_ROLE_CONFIDENCE
        ):
            continue
        notes.append(
            QcNote(
                QcLevel.WARNING,
                "role-override-contradicts",
                f"the case file's [roles] makes {_series_name(stack)} {stack.role.value}, but its "
                f"acquisition reads as {was.role.value} ({was.role_reason}); check [roles]",
            )
        )
    return notes


def check_roi_extent(
    plan_regions: Sequence[Region],
    anchor: Stack,
    measured: Mapping[Role, Stack],
    *,
    case_name: str = "case.toml",
) -> None:
    """Refuse, before any pixel is read, an ROI that lies wholly outside the anchor's field of
    view or is larger than every measured series' field of view along a patient axis.

    Raises
    ------
    InputError
        Naming every such ROI, its box and the field of view (mm, patient LPS coordinates).
    """
    anchor_lo, anchor_hi = stack_box_mm(anchor)
    boxes = [stack_box_mm(s) for s in measured.values()]
    all_lo = np.min([b[0] for b in boxes], axis=0)
    all_hi = np.max([b[1] for b in boxes], axis=0)
    problems = []
    for region in plan_regions:
        lo, hi = (np.asarray(v, dtype=np.float64) for v in region.bounds_mm())
        if np.any(hi < anchor_lo) or np.any(lo > anchor_hi):
            problems.append(
                f"ROI {region.id} ({_box_text(lo, hi)}) lies outside the field of view of the "
                f"anchor {_series_name(anchor)} ({_box_text(anchor_lo, anchor_hi)})"
            )
        elif np.any(hi - lo > all_hi - all_lo):
            axis = "xyz"[int(np.argmax((hi - lo) - (all_hi - all_lo)))]
            problems.append(
                f"ROI {region.id} is larger than the imaged anatomy along patient {axis}: "
                f"{_box_text(lo, hi)} against the series' {_box_text(all_lo, all_hi)}"
            )
    if problems:
        raise InputError(f"{case_name}: " + "; ".join(problems) + " (check center_mm and sizes)")


def stack_box_mm(stack: Stack) -> tuple[np.ndarray, np.ndarray]:
    """The LPS box enclosing a stack's voxels (their outer faces; DICOM PS3.3 C.7.6.2.1.1)."""
    direction = np.asarray(stack.direction, dtype=np.float64).reshape(3, 3)
    spacing = np.asarray(stack.spacing_mm, dtype=np.float64)
    size = np.asarray(stack.size, dtype=np.float64)
    corners = np.array(
        [(i, j, k) for i in (-0.5, size[0] - 0.5) for j in (-0.5, size[1] - 0.5)
         for k in (-0.5, size[2] - 0.5)]
    )  # fmt: skip
    points = np.asarray(stack.origin_mm) + (corners * spacing) @ direction.T
    return points.min(axis=0), points.max(axis=0)


def _box_text(lo: np.ndarray, hi: np.ndarray) -> str:
    return f"x {lo[0]:.0f} to {hi[0]:.0f}, y {lo[1]:.0f} to {hi[1]:.0f}, z {lo[2]:.0f} to {hi[2]:.0f} mm"


def choose_measured(
    index: StudyIndex, forced: Mapping[Role, str]
) -> tuple[dict[Role, Stack], list[QcNote]]:
    """One stack per role: the case file's choice, else the smallest voxel volume."""
    notes: list[QcNote] = []
    by_role: dict[Role, list[Stack]] = {}
    for stack in index.stacks:
        if stack.role is not Role.UNKNOWN:
            by_role.setdefault(stack.role, []).append(stack)
    measured: dict[Role, Stack] = {}
    for role in ROLE_ORDER:  # reading order, so the measured series are listed in it
        candidates = by_role.get(role, [])
        if not candidates:
            continue
        if role in forced:
            pick = next(s for s in candidates if s.key == forced[role])
        elif any(s.dynamic_phase is not None for s in candidates):
            pick = _last_phase(candidates)
        else:
            pick = min(candidates, key=lambda s: (s.voxel_volume_mm3, s.series_number or 0))
        measured[role] = pick
        # The other phases of a dynamic acquisition are measured too (choose_phases).
        others = [
            s
            for s in candidates
            if s.key != pick.key
            and (pick.dynamic_group is None or s.dynamic_group != pick.dynamic_group)
        ]
        if others:
            names = ", ".join(_series_name(s) for s in others)
            notes.append(
                QcNote(
                    QcLevel.INFO,
                    "role-shared",
                    f"{len(candidates)} series have the role {role.value}; measured "
                    f"{_series_name(pick)}, not {names} (the case file's [roles] can pick another)",
                )
            )
    for stack in index.stacks:
        if stack.role is Role.UNKNOWN:
            notes.append(
                QcNote(
                    QcLevel.INFO,
                    "role-unknown",
                    f"{_series_name(stack)} not measured: role unknown ({stack.role_reason})",
                )
            )
        elif (
            stack.role_source == "inferred"
            and stack.confidence is not None
            and stack.confidence < DOUBTFUL_ROLE_CONFIDENCE
        ):
            notes.append(
                QcNote(
                    QcLevel.WARNING,
                    "role-doubtful",
                    f"{_series_name(stack)} taken as {stack.role.value} with low confidence "
                    f"({stack.confidence:.2f}): {stack.role_reason}; check it, or set it in the "
                    "case file's [roles]",
                )
            )
    for stack in measured.values():
        for warning in stack.warnings:
            notes.append(
                QcNote(QcLevel.WARNING, "series-geometry", f"{_series_name(stack)}: {warning}")
            )
    return measured, notes


def _last_phase(candidates: Sequence[Stack]) -> Stack:
    """The last phase of the dynamic acquisition with the most phases (ties: finest voxels):
    the post-contrast series a single-phase study would have (docs/usage.md, dynamic)."""
    groups: dict[str, list[Stack]] = {}
    for stack in candidates:
        if stack.dynamic_group is not None and stack.dynamic_phase is not None:
            groups.setdefault(stack.dynamic_group, []).append(stack)
    members = max(groups.values(), key=lambda g: (len(g), -min(s.voxel_volume_mm3 for s in g)))
    return max(members, key=lambda s: s.dynamic_phase or 0)


def choose_phases(
    index: StudyIndex, measured: Mapping[Role, Stack]
) -> tuple[dict[Role, tuple[Stack, ...]], list[QcNote]]:
    """Every phase of the dynamic acquisition each measured post-contrast stack belongs to, in
    phase order (acquisition time; ``sigreport.ingest.dynamic``), and a note naming them.

    A role gets phases only when its measured stack is a phase of a dynamic acquisition with at
    least two post-contrast phases of that role; the case file's ``[roles]`` may pick any phase
    as the measured one (its signal and the version-1 enhancement), the dynamic curve still
    uses them all.
    """
    phases: dict[Role, tuple[Stack, ...]] = {}
    notes: list[QcNote] = []
    for role in PRE_CONTRAST_OF:
        pick = measured.get(role)
        if pick is None or pick.dynamic_group is None or pick.dynamic_phase is None:
            continue
        members = sorted(
            (
                s
                for s in index.stacks
                if s.role is role
                and s.dynamic_group == pick.dynamic_group
                and s.dynamic_phase is not None
            ),
            key=lambda s: s.dynamic_phase or 0,
        )
        if len(members) < 2:
            continue
        phases[role] = tuple(members)
        pre = measured.get(PRE_CONTRAST_OF[role])
        if pre is not None and pre.dynamic_group != pick.dynamic_group:
            notes.append(
                QcNote(
                    QcLevel.WARNING,
                    "dynamic-pre-other-acquisition",
                    f"{role.value}: the measured {pre.role.value} ({_series_name(pre)}) is not "
                    "the dynamic acquisition's own pre-contrast phase; the dynamic percentages "
                    f"compare two acquisitions (the case file's [roles] {pre.role.value} can "
                    "pick the pre-contrast phase)",
                )
            )
        delays = ", ".join(
            f"{_series_name(s)} at {s.dynamic_delay_s:g} s"
            if s.dynamic_delay_s is not None
            else f"{_series_name(s)} (time unknown)"
            for s in members
        )
        notes.append(
            QcNote(
                QcLevel.INFO,
                "dynamic-phases",
                f"{role.value}: {len(members)} phases of one dynamic acquisition ({delays}); "
                f"every phase is measured for the dynamic curve, {_series_name(pick)} gives "
                f"the {role.value} signal and enhancement",
            )
        )
    return phases, notes


def _series_name(stack: Stack) -> str:
    number = f"series {stack.series_number}" if stack.series_number is not None else "series"
    name = f"{number} ({stack.description})" if stack.description else number
    return f"{name} stack {stack.stack}" if stack.stack else name


def choose_anchor(
    case: Case, measured: Mapping[Role, Stack], regions: Sequence[Region]
) -> tuple[Role, str]:
    """The series ROIs are defined against: the case file's ``anchor``, else the series a mask
    ROI was drawn on, else the finest 3D series, else the finest series. Returns the role and
    the reason."""
    if case.anchor is not None:
        wanted = case.anchor.strip()
        for role, stack in measured.items():
            if wanted.upper() == role.value or wanted in (
                str(stack.series_number),
                stack.series_instance_uid,
                stack.key,
            ):
                return role, f"the case file's anchor = {case.anchor!r}"
        raise InputError(
            f"{case.path.name}: [options] anchor = {case.anchor!r} names no measured series "
            f"(measured: {', '.join(r.value for r in measured)})"
        )
    for region in regions:
        uid = getattr(region, "source_series_uid", None)
        if uid:
            for role, stack in measured.items():
                if stack.series_instance_uid == uid:
                    return role, f"ROI {region.id} was drawn on it"
    three_d = [r for r, s in measured.items() if s.is_3d]
    pool = three_d or list(measured)
    role = min(pool, key=lambda r: measured[r].voxel_volume_mm3)
    return role, "the finest 3D series" if three_d else "the finest series (no 3D series)"


# --------------------------------------------------------------------------------------------
# The stages


def resolve_study_dir(case: Case, study_dir: Path | None = None) -> Path:
    """The study folder: ``study_dir`` when given, else the case file's ``study``.

    Raises
    ------
    InputError
        When neither names one.
    """
    chosen = study_dir if study_dir is not None else case.study
    if chosen is None:
        raise InputError(
            f'{case.path.name}: no study folder: give STUDY_DIR or set study = "..." in the case file'
        )
    return Path(chosen)


def plan_report(
    case: Case,
    lexicon: Lexicon,
    study_dir: Path,
    *,
    register: bool | None = None,
    progress: Progress | None = None,
    study_index: StudyIndex | None = None,
    use_cache: bool = True,
) -> ReportPlan:
    """Index the study and decide what to measure: roles (the case file's ``[roles]`` first),
    one series per role, the ROIs in patient space, the anchor series and whether to register.

    Parameters
    ----------
    case
        The case file (:func:`sigreport.rois.load_case`).
    lexicon
        The run's lexicon (its role bands infer the roles).
    study_dir
        The study folder (:func:`resolve_study_dir`).
    register
        Rigid alignment of every series to the anchor; ``None`` takes the case file's
        ``[options] register``, whose default is True.
    progress
        Told about each indexed file.
    study_index
        The study's index when it was built elsewhere (``sigreport.archive`` builds it from an
        archive's metadata, with the fetched series' instances under ``study_dir``); the study
        folder is then not indexed again.
    use_cache
        Reuse the header index cache (``sigreport.ingest.cache``); False reads every header.

    Raises
    ------
    InputError
        When the study holds no usable MR series, none with a measurable role, the case file's
        ``[roles]`` or ``anchor`` name no series, or a mask ROI cannot be read.
    """
    if study_index is None:
        say(progress, f"indexing {study_dir}")
        index = index_study(
            Path(study_dir),
            progress=progress,
            bands=lexicon.role_bands,
            use_cache=use_cache,
            study_uid=case.study_uid,
            require_one_study=True,
        )
    else:
        index = study_index
    if not index.stacks:
        reasons = skipped_series_summary(index) or "; ".join(
            f"{_relative(s.path, index.study_dir)}: {s.reason}" for s in index.skipped[:5]
        )
        raise InputError(
            f"no usable MR series under {study_dir}" + (f" ({reasons})" if reasons else "")
        )
    inferred = index
    index, forced = apply_role_overrides(index, case.roles, case_name=case.path.name)
    measured, notes = choose_measured(index, forced)
    phases, phase_notes = choose_phases(index, measured)
    notes += phase_notes
    qc = [QcNote(QcLevel.WARNING, "study", w) for w in index.warnings]
    qc += override_notes(inferred, index) + notes
    if index.skipped:
        qc.append(
            QcNote(
                QcLevel.INFO,
                "files-skipped",
                f"{len(index.skipped)} file(s) skipped while indexing (see scan)",
            )
        )
    if not measured:
        raise InputError(
            f"no series under {study_dir} has a role that can be measured (all UNKNOWN)"
            + (
                f"; skipped while indexing: {summary}"
                if (summary := skipped_series_summary(index))
                else ""
            )
        )
    # ROI forms (docs/rois.md): `at` read on its own series; a seed stands in as its sphere.
    roi_settings = load_roi_settings(lexicon.site)
    case, viewer_keys = resolve_viewer_positions(case, index)
    regions_list, roi_notes = provisional_regions(case, roi_settings, index)
    qc.extend(roi_notes)
    regions = tuple(regions_list)
    for region in regions:
        qc.extend(
            QcNote(QcLevel.WARNING, "mask-reference", note)
            for note in mask_reference_notes(
                region, index.stacks, study_uid=index.study.study_instance_uid
            )
        )
    try:
        anchor_role, anchor_reason = choose_anchor(case, measured, regions)
    except InputError as exc:  # say why the series is not there, not only that it is not
        raise InputError(f"{exc}{why_absent(index, case.anchor)}") from None
    check_roi_extent(regions, measured[anchor_role], measured, case_name=case.path.name)
    do_register = (
        register if register is not None else (case.register if case.register is not None else True)
    )
    anchor_note = QcNote(
        QcLevel.INFO,
        "anchor",
        f"ROIs are placed in the patient space of {anchor_role.value} "
        f"({_series_name(measured[anchor_role])}): {anchor_reason}"
        + (
            "" if do_register else "; registration off, the scanner's frame of reference is trusted"
        ),
    )
    return ReportPlan(
        case=case,
        lexicon=lexicon,
        study_dir=Path(study_dir),
        index=index,
        measured=measured,
        anchor_role=anchor_role,
        anchor_reason=anchor_reason,
        register=do_register,
        regions=regions,
        qc=tuple(qc),
        anchor_note=anchor_note,
        viewer_keys=dict(viewer_keys),
        roi_settings=roi_settings,
        phases=phases,
    )


def load_series(plan: ReportPlan, *, progress: Progress | None = None) -> dict[Role, sitk.Image]:
    """The pixels of each measured series: float32, rescaled, in DICOM patient space (LPS)
    (:func:`sigreport.ingest.load_stack`), in the plan's role order.

    Every series at once: for the stages run one by one (tests, tools). :func:`analyze_case`
    streams the series instead (:func:`stream_series`)."""
    images: dict[Role, sitk.Image] = {}
    total = len(plan.measured)
    for done, (role, stack) in enumerate(plan.measured.items()):
        say(progress, f"loading {role.value}: {_series_name(stack)}", done, total)
        images[role] = load_stack(stack, study_dir=plan.index.study_dir)
    return images


def load_phases(plan: ReportPlan, *, progress: Progress | None = None) -> dict[str, sitk.Image]:
    """The pixels of every dynamic phase other than the measured stack of its role, keyed by
    ``Stack.key`` (as :func:`load_series`)."""
    extra = _extra_phases(plan)
    images: dict[str, sitk.Image] = {}
    for done, stack in enumerate(extra):
        say(
            progress,
            f"loading phase {stack.dynamic_phase}: {_series_name(stack)}",
            done,
            len(extra),
        )
        images[stack.key] = load_stack(stack, study_dir=plan.index.study_dir)
    return images


def _extra_phases(plan: ReportPlan) -> list[Stack]:
    measured = {s.key for s in plan.measured.values()}
    return [s for group in plan.phases.values() for s in group if s.key not in measured]


def _loading_message(job: SeriesJob) -> str:
    if isinstance(job.key, Role):
        return f"loading {job.key.value}: {_series_name(job.stack)}"
    return f"loading phase {job.stack.dynamic_phase}: {_series_name(job.stack)}"


def series_jobs(plan: ReportPlan, phase_keys: Container[str] | None = None) -> list[SeriesJob]:
    """Every series a run aligns and measures: the measured series (the plan's reading order),
    then the dynamic phases other than their role's measured one (phase order); ``phase_keys``
    keeps only the phases named."""
    jobs = [SeriesJob(role, stack, role, role.value) for role, stack in plan.measured.items()]
    jobs += [
        SeriesJob(s.key, s, s.role, f"{s.role.value} phase {s.dynamic_phase}")
        for s in _extra_phases(plan)
        if phase_keys is None or s.key in phase_keys
    ]
    return jobs


def _scanner_alignment(plan: ReportPlan, job: SeriesJob) -> tuple[Alignment | None, bool]:
    """The alignment a series gets without registration (identity for the anchor; the frame of
    reference when registration is off and the series shares the anchor's), or None when it
    must be registered; and whether it is in another frame of reference than the anchor."""
    if job.key is plan.anchor_role:
        return identity_alignment("identity"), False
    anchor = plan.anchor
    other_frame = (
        job.stack.frame_of_reference_uid is not None
        and anchor.frame_of_reference_uid is not None
        and job.stack.frame_of_reference_uid != anchor.frame_of_reference_uid
    )
    if plan.register or other_frame:
        return None, other_frame
    return identity_alignment("frame-of-reference"), False


def _aligned_study(
    plan: ReportPlan,
    jobs: Sequence[SeriesJob],
    found: Mapping[Role | str, Alignment],
    box: tuple[np.ndarray, np.ndarray],
) -> AlignedStudy:
    """Each series' alignment with its displacement at the ROIs, and the notes registration
    left, in the order of ``jobs``."""
    alignments: dict[Role, Alignment] = {}
    phase_alignments: dict[str, Alignment] = {}
    qc: list[QcNote] = []
    for job in jobs:
        # How far each series moved at the ROIs (docs/measurements.md, displacement_mm).
        alignment = replace(found[job.key], displacement_mm=_box_displacement(found[job.key], box))
        if isinstance(job.key, Role):
            alignments[job.key] = alignment
        else:
            phase_alignments[job.key] = alignment
        if _scanner_alignment(plan, job)[1] and not plan.register:
            qc.append(
                QcNote(
                    QcLevel.INFO,
                    "registered-other-frame",
                    f"{job.name} is in another frame of reference than the anchor; registered despite --no-register",
                )
            )
        qc.extend(
            QcNote(QcLevel.WARNING, "registration", f"{job.name}: {w}") for w in alignment.warnings
        )
        qc.extend(
            QcNote(QcLevel.INFO, "registration-skipped", f"{job.name}: {n}")
            for n in alignment.notes
        )
    return AlignedStudy(alignments=alignments, qc=tuple(qc), phase_alignments=phase_alignments)


def align_series(
    plan: ReportPlan,
    images: Mapping[Role, sitk.Image],
    *,
    progress: Progress | None = None,
    phase_images: Mapping[str, sitk.Image] | None = None,
) -> AlignedStudy:
    """Each measured series' alignment to the anchor: identity for the anchor; a rigid
    registration on the ROIs' neighbourhood when the plan registers, or when the series is in
    another frame of reference than the anchor (always, with a note when registration is off);
    else the scanner's frame of reference. Registration warnings become qc notes.

    ``phase_images`` (:func:`load_phases`) are aligned the same way, each on its own: a
    patient may move between the phases of a dynamic acquisition. Every series to register goes
    to one :func:`sigreport.align.register_series` call (the anchor's pyramid built once, the
    series in parallel). :func:`stream_series` aligns the same series a window at a time, with
    the same results."""
    phase_images = phase_images or {}
    # The ROIs' box; register_series adds the lexicon's margin of anatomy around it.
    box = union_bounds(plan.regions)
    jobs = series_jobs(plan, phase_keys=phase_images.keys())
    found: dict[Role | str, Alignment] = {}
    to_register: dict[Role | str, sitk.Image] = {}
    for job in jobs:
        alignment, _ = _scanner_alignment(plan, job)
        if alignment is not None:
            found[job.key] = alignment
        else:
            to_register[job.key] = (
                images[job.key] if isinstance(job.key, Role) else phase_images[job.key]
            )
    if to_register:
        names = {job.key: job.name for job in jobs}
        say(
            progress,
            f"registering {', '.join(names[k] for k in to_register)} to {plan.anchor_role.value}",
        )
        # One call: the anchor's pyramid is built once and the series run in parallel.
        found.update(
            register_series(
                images[plan.anchor_role],
                to_register,
                box_mm=box,
                settings=plan.lexicon.alignment,
            )
        )
    return _aligned_study(plan, jobs, found, box)


def _series_bytes(stack: Stack) -> int:
    """The loaded size of a stack's pixels (float32, :func:`sigreport.ingest.load_stack`)."""
    columns, rows, slices = stack.size
    return 4 * int(columns) * int(rows) * int(slices)


@dataclass
class _InFlight:
    """A series :func:`stream_series` holds: loaded, and registering or already aligned."""

    job: SeriesJob
    image: sitk.Image
    size: int  # its pixels' bytes (0 for the anchor, which is held anyway)
    alignment: Alignment | None  # known without registration
    registering: Future[dict[Role | str, Alignment]] | None


def _joins(in_flight: Sequence[_InFlight], job: SeriesJob, registers: bool, slots: int) -> bool:
    """May ``job`` be loaded beside the series already held? Alone, always; else only when it
    is to be registered, every series held is registering (or registered and waiting for its
    turn to be measured), fewer than ``slots`` are held and their pixels together fit
    ``limits.SERIES_WINDOW_BYTES``. So a series that needs no registration, or a large one, is
    held alone beside the anchor."""
    if not in_flight:
        return True
    return (
        registers
        and len(in_flight) < slots
        and all(held.registering is not None for held in in_flight)
        and sum(held.size for held in in_flight) + _series_bytes(job.stack)
        <= limits.SERIES_WINDOW_BYTES
    )


def stream_series(
    plan: ReportPlan,
    anchor_image: sitk.Image,
    jobs: Sequence[SeriesJob],
    visit: Callable[[SeriesJob, sitk.Image, Alignment], None] | None = None,
    *,
    box_mm: tuple[np.ndarray, np.ndarray],
    known: Mapping[Role | str, Alignment] | None = None,
    progress: Progress | None = None,
) -> dict[Role | str, Alignment]:
    """Load, align and visit the series of ``jobs`` in order, releasing each before the next
    are loaded: memory holds the anchor and at most ``limits.SERIES_IN_FLIGHT`` series (one
    per core) whose pixels together fit ``limits.SERIES_WINDOW_BYTES``, else one, whatever
    the number of series or slices.

    The series held at once are registered in worker threads (one per core; each registration
    on one ITK thread, :func:`sigreport.align.register_series`) while this thread visits the
    first of them as soon as its registration is done, then releases it and loads the next:
    the cores do not wait for the slowest series of a group, and measuring one series overlaps
    registering the next. Series are visited in the order of ``jobs`` whatever order their
    registrations end in, and every registration's answer does not depend on the scheduling,
    so the result is the same as one series at a time.

    Parameters
    ----------
    plan
        The plan (:func:`plan_report`); its ``regions`` are not read (see ``box_mm``).
    anchor_image
        The anchor series, loaded once by the caller; the anchor's job is visited with it.
    jobs
        The series to visit, in order (:func:`series_jobs`).
    visit
        Called once per series, in order, on this thread, while the series is loaded, with
        its alignment to the anchor (without its ``displacement_mm``); it must keep no
        reference to the image. None: align only.
    box_mm
        The ROIs' box registration works in (:func:`sigreport.align.register_series`): that
        of the plan before the ROIs are placed, as :func:`align_series` takes it.
    known
        Alignments found earlier, by job key: those series are loaded and visited but not
        registered again.
    progress
        Told about each series loaded and each registration.

    Returns
    -------
    dict
        Each job's alignment, by job key.
    """
    known = dict(known or {})
    # Each series' alignment when it needs no registration (found earlier, or the scanner's
    # frame of reference); None: to be registered.
    given: dict[Role | str, Alignment | None] = {
        job.key: known[job.key] if job.key in known else _scanner_alignment(plan, job)[0]
        for job in jobs
    }
    found: dict[Role | str, Alignment] = {}
    slots = max(1, min(limits.SERIES_IN_FLIGHT, os.cpu_count() or 1))
    waiting = deque(jobs)
    in_flight: deque[_InFlight] = deque()
    total, done = len(jobs), 0
    with ThreadPoolExecutor(max_workers=slots, thread_name_prefix="sigreport-align") as pool:
        try:
            while waiting or in_flight:
                while waiting:
                    job = waiting[0]
                    alignment = given[job.key]
                    if not _joins(in_flight, job, alignment is None, slots):
                        break
                    waiting.popleft()
                    if job.key is plan.anchor_role:
                        image, size = anchor_image, 0
                    else:
                        say(progress, _loading_message(job), done, total)
                        image = load_stack(job.stack, study_dir=plan.index.study_dir)
                        size = _series_bytes(job.stack)
                    done += 1
                    registering = None
                    if alignment is None:
                        say(progress, f"registering {job.name} to {plan.anchor_role.value}")
                        # Calls share the anchor's prepared pyramid (sigreport.align).
                        registering = pool.submit(
                            register_series,
                            anchor_image,
                            {job.key: image},
                            box_mm=box_mm,
                            settings=plan.lexicon.alignment,
                            max_workers=1,
                        )
                    in_flight.append(_InFlight(job, image, size, alignment, registering))
                    del image
                first = in_flight.popleft()
                key = first.job.key
                if first.registering is not None:
                    found[key] = first.registering.result()[key]
                else:
                    assert first.alignment is not None
                    found[key] = first.alignment
                if visit is not None:
                    visit(first.job, first.image, found[key])
                del first
                # What the series and its registration freed goes back to the system before
                # the next series is read (sigreport.memory).
                release_free_memory()
        finally:
            # On an error, registrations not yet started are dropped; running ones end
            # before the pool is closed.
            for held in in_flight:
                if held.registering is not None:
                    held.registering.cancel()
            in_flight.clear()
    return found


def place_rois(
    plan: ReportPlan,
    images: Mapping[Role, sitk.Image],
    aligned: AlignedStudy,
    *,
    progress: Progress | None = None,
) -> tuple[ReportPlan, PlacedRois]:
    """Finish the ROIs in the anchor's space once the series are aligned (docs/rois.md): viewer
    positions carried through their series' alignment, seeds grown on the anchor, mirror
    references placed, laterality checked. Returns the plan with the final case and regions,
    and what was placed (its qc notes and the grown lesions' files for OUTDIR).

    Only the anchor of ``images`` is read, and of ``aligned`` only the series named by an
    ``at`` (a series it lacks is loaded and aligned here)."""
    say(progress, "placing the ROIs")
    anchor_image = images[plan.anchor_role]
    rules = plan.lexicon.rules
    placed = place_roi_forms(
        plan.case,
        plan.regions,
        viewer_keys=plan.viewer_keys,
        alignments=_alignments_by_key(plan, aligned, anchor_image),
        anchor=plan.anchor,
        anchor_image=anchor_image,
        settings=plan.roi_settings,
        max_cv=float(rules.thresholds.reference.max_cv),
        min_voxels=int(rules.min_voxels),
    )
    return replace(plan, case=placed.case, regions=tuple(placed.regions)), placed


def _box_displacement(alignment: Alignment, box: tuple[np.ndarray, np.ndarray]) -> float:
    """Largest displacement (mm) of the 8 corners of the ROIs' box under the alignment's
    transform (anchor space to the series' space); 0 for identity."""
    if alignment.transform is None:
        return 0.0
    lo, hi = box
    corners = [(x, y, z) for x in (lo[0], hi[0]) for y in (lo[1], hi[1]) for z in (lo[2], hi[2])]
    moved = [alignment.transform.TransformPoint(tuple(float(c) for c in p)) for p in corners]
    return float(
        max(np.linalg.norm(np.subtract(m, p)) for m, p in zip(moved, corners, strict=True))
    )


def measure_series(
    plan: ReportPlan,
    job: SeriesJob,
    image: sitk.Image,
    alignment: Alignment,
    *,
    key_slices: bool = False,
    skip: Container[str] = (),
) -> MeasuredSeries:
    """Every ROI sampled and measured on one series, through its alignment; and, for a
    measured series, what later stages need of its pixels, so that they may be released: the
    noise floor, the samples, the ROIs' size on the finest series and their axial diameters on
    the anchor, and (``key_slices``) the key slices it gives (``skip``: as
    :func:`sigreport.report.keyslices.series_key_slices`).

    The ROIs are the plan's final ones (:func:`place_rois`). Measurement reads each ROI's box
    only (the sample is kept to it).
    """
    rules = plan.lexicon.rules
    min_voxels = int(rules.min_voxels)
    measured = isinstance(job.key, Role)
    finest_role = min(plan.measured, key=lambda r: plan.measured[r].voxel_volume_mm3)
    transform = alignment.transform
    to_region_space = transform.GetInverse() if transform is not None else None
    values = sitk.GetArrayViewFromImage(image)
    rois: dict[str, SeriesMeasurement] = {}
    samples: dict[str, RoiSample] = {}
    sizes: dict[str, tuple[float, float]] = {}
    diameters: dict[str, tuple[float, float, float]] = {}
    for spec, region in zip(plan.case.rois, plan.regions, strict=True):
        sample = sample_region(region, image, to_region_space=to_region_space)
        rois[spec.id] = measure_roi(
            values[sample.box],
            sample.box_mask,
            sample.box_weights,
            image.GetSpacing(),
            lesion=spec.kind is RoiKind.LESION,
            min_voxels=min_voxels,
            rules=rules,
            roi_id=spec.id,
            role=job.role,
        )
        if not measured:
            continue
        samples[spec.id] = sample
        if sample.n_voxels > 0 and job.key is finest_role:
            sizes[spec.id] = (volume_ml(sample, image), max_diameter_mm(sample, image))
        if sample.n_voxels > 0 and job.key is plan.anchor_role:
            diameters[spec.id] = axial_diameters_mm(sample, image)
    return MeasuredSeries(
        key=job.key,
        rois=rois,
        samples=samples,
        noise_sigma=noise_sigma(values) if measured else None,
        sizes=sizes,
        diameters=diameters,
        key_slices=series_key_slices(plan.case, job.role, image, samples, job.stack, skip=skip)
        if measured and key_slices
        else {},
    )


def _study_measurement(
    plan: ReportPlan, parts: Mapping[Role | str, MeasuredSeries], roles: Sequence[Role]
) -> StudyMeasurement:
    """The measured study from what each series left (:func:`measure_series`): each ROI on
    every measured series (``roles``, in order) and every dynamic phase measured."""
    finest_role = min(plan.measured, key=lambda r: plan.measured[r].voxel_volume_mm3)
    samples: dict[tuple[str, Role], RoiSample] = {}
    measured_rois: list[MeasuredRoi] = []
    for spec in plan.case.rois:
        by_role = {role: parts[role].rois[spec.id] for role in roles}
        samples.update({(spec.id, role): parts[role].samples[spec.id] for role in roles})
        by_phase: dict[str, SeriesMeasurement] = {}
        for role, group in plan.phases.items():
            for stack in group:
                if stack.key == plan.measured[role].key:
                    by_phase[stack.key] = by_role[role]
                elif stack.key in parts:
                    by_phase[stack.key] = parts[stack.key].rois[spec.id]
        size = parts[finest_role].sizes.get(spec.id)
        measured_rois.append(
            MeasuredRoi(
                spec=spec,
                volume_ml=size[0] if size is not None else None,
                max_diameter_mm=size[1] if size is not None else None,
                by_role=by_role,
                diameters_mm=parts[plan.anchor_role].diameters.get(spec.id),
                by_phase=by_phase,
            )
        )
    study = MeasuredStudy(
        rois=tuple(measured_rois),
        stacks=dict(plan.measured),
        noise_sigma={role: parts[role].noise_sigma for role in roles},
        phases=dict(plan.phases),
    )
    overlaps = _overlap_notes(plan.case, samples, plan.anchor_role)
    return StudyMeasurement(study=study, samples=samples, qc=tuple(overlaps))


def measure_study(
    plan: ReportPlan,
    images: Mapping[Role, sitk.Image],
    aligned: AlignedStudy,
    *,
    progress: Progress | None = None,
    phase_images: Mapping[str, sitk.Image] | None = None,
) -> StudyMeasurement:
    """Sample every ROI on every series (through its alignment) and measure it; the noise floor
    of each series; each ROI's volume and largest diameter on the finest series. Every phase of
    a dynamic acquisition is measured too (``phase_images``, :func:`load_phases`; the measured
    phase of a role is re-used, not sampled twice).

    Every series at once (:func:`measure_series` on each); :func:`analyze_case` measures each
    series while it streams through instead.

    Returns the measured study (the input of characterization), the samples (for the key
    images) and the qc notes of ROIs that share voxels with a lesion.
    """
    phase_images = phase_images or {}
    jobs = [SeriesJob(role, plan.measured[role], role, role.value) for role in images]
    jobs += [
        job
        for job in series_jobs(plan, phase_keys=phase_images.keys())
        if not isinstance(job.key, Role) and job.key in aligned.phase_alignments
    ]
    parts: dict[Role | str, MeasuredSeries] = {}
    for done, job in enumerate(jobs):
        say(progress, f"measuring {job.name}", done, len(jobs))
        if isinstance(job.key, Role):
            image, alignment = images[job.key], aligned.alignments[job.key]
        else:
            image, alignment = phase_images[job.key], aligned.phase_alignments[job.key]
        parts[job.key] = measure_series(plan, job, image, alignment)
    return _study_measurement(plan, parts, list(images))


def characterize_study(
    plan: ReportPlan, measurement: StudyMeasurement, *, progress: Progress | None = None
) -> Characterization:
    """Ratios, grades, enhancement, suppression, flow void, controls and behaviour, with the
    run's lexicon (:func:`sigreport.measure.characterize`)."""
    say(progress, "characterizing")
    return characterize(measurement.study, plan.lexicon.rules, families=plan.lexicon.families)


def analyze_case(
    case: Case | Path,
    *,
    study_dir: Path | None = None,
    register: bool | None = None,
    site_lexicon: Path | None = None,
    lexicon: Lexicon | None = None,
    progress: Progress | None = None,
    study_index: StudyIndex | None = None,
    use_cache: bool = True,
) -> Analysis:
    """Every stage up to the findings: plan, load, align, measure, characterize, then the
    findings.json object and the key slices. Writes nothing.

    Parameters
    ----------
    case
        The case file, loaded (:func:`sigreport.rois.load_case`) or its path.
    study_dir
        The study folder; wins over the case file's ``study``.
    register
        As :func:`plan_report`.
    site_lexicon
        A site's lexicon folder; wins over the case file's ``lexicon``. Ignored when
        ``lexicon`` is given.
    lexicon
        The lexicon, already loaded (:func:`sigreport.lexicon_tables.load_lexicon`), e.g. once
        for a batch of cases.
    progress
        Told about each step (:class:`sigreport.model.Progress`).
    study_index, use_cache
        As :func:`plan_report`.

    Returns
    -------
    Analysis
        The findings, key slices and the words chosen per lesion, with every stage's output.
    """
    if not isinstance(case, Case):
        case = load_case(Path(case))
    if lexicon is None:
        lexicon = load_lexicon(site_lexicon if site_lexicon is not None else case.lexicon)
    plan = plan_report(
        case,
        lexicon,
        resolve_study_dir(case, study_dir),
        register=register,
        progress=progress,
        study_index=study_index,
        use_cache=use_cache,
    )
    # The series stream through one at a time (stream_series): the anchor stays loaded, each
    # other series is loaded, aligned, measured, its key slices cut, and released.
    jobs = series_jobs(plan)
    by_key = {job.key: job for job in jobs}
    say(progress, _loading_message(by_key[plan.anchor_role]), 0, len(jobs))
    anchor_image = load_stack(plan.anchor, study_dir=plan.index.study_dir)
    # Registration works in the ROIs' box before placement, as align_series does.
    box = union_bounds(plan.regions)
    # The anchor first, then reading order: the order a reference's key slice is looked for.
    ordered = [by_key[role] for role in display_order(plan.measured, plan.anchor_role)]
    ordered += [job for job in jobs if job not in ordered]
    # Series named by an `at` are aligned before the ROIs are placed (docs/rois.md), then
    # streamed again for measurement with the alignment found.
    named = set(plan.viewer_keys.values())
    early = stream_series(
        plan,
        anchor_image,
        [j for j in ordered if j.stack.key in named and j.key is not plan.anchor_role],
        box_mm=box,
        progress=progress,
    )
    early[plan.anchor_role] = identity_alignment("identity")
    plan, placed = place_rois(
        plan, {plan.anchor_role: anchor_image}, _split_alignments(early), progress=progress
    )
    parts: dict[Role | str, MeasuredSeries] = {}
    shown: set[str] = set()  # reference and control ROIs that have their key slice

    def measure(job: SeriesJob, image: sitk.Image, alignment: Alignment) -> None:
        say(progress, f"measuring {job.name}", len(parts), len(ordered))
        part = measure_series(plan, job, image, alignment, key_slices=True, skip=shown)
        shown.update(k for k, v in part.key_slices.items() if v.kind != RoiKind.LESION.value)
        parts[job.key] = part

    found = stream_series(
        plan, anchor_image, ordered, measure, box_mm=box, known=early, progress=progress
    )
    del anchor_image
    # The anchor's pyramids kept between register_series calls are not needed to write the
    # report (docs/performance.md, Memory).
    clear_anchor_cache()
    release_free_memory()
    aligned = _aligned_study(plan, jobs, found, box)
    measurement = _study_measurement(plan, parts, list(plan.measured))
    result = characterize_study(plan, measurement, progress=progress)
    qc = [*plan.qc, *aligned.qc, *placed.qc, *measurement.qc, *result.qc]
    if plan.anchor_note is not None:
        qc.append(plan.anchor_note)
    findings = build_findings(
        plan.index,
        plan.measured,
        aligned.alignments,
        plan.anchor_role,
        result,
        qc,
        cautions=lexicon.cautions,
        phase_alignments=aligned.phase_alignments,
    )
    key_slices = arrange_key_slices(
        plan.case, {role: parts[role].key_slices for role in plan.measured}, anchor=plan.anchor_role
    )
    return Analysis(
        findings=findings,
        key_slices=tuple(key_slices),
        phrases=lesion_phrases(result),
        plan=plan,
        aligned=aligned,
        measurement=measurement,
        files=dict(placed.files),
    )


def _split_alignments(found: Mapping[Role | str, Alignment]) -> AlignedStudy:
    """Alignments by job key as an :class:`AlignedStudy` (no displacement, no notes)."""
    return AlignedStudy(
        alignments={k: a for k, a in found.items() if isinstance(k, Role)},
        phase_alignments={k: a for k, a in found.items() if not isinstance(k, Role)},
    )


def run_report(
    case_path: Path,
    out_dir: Path,
    *,
    study_dir: Path | None = None,
    register: bool | None = None,
    force: bool = False,
    site_lexicon: Path | None = None,
    progress: Progress | None = None,
    study_index: StudyIndex | None = None,
    prior_study: Path | None = None,
    prior_case: Path | None = None,
    use_cache: bool = True,
) -> ReportRun:
    """Place the case's ROIs on every series of the study, measure, characterize and write the
    report folder (:func:`analyze_case`, then :func:`sigreport.report.write_report`).

    Parameters
    ----------
    case_path
        The case file (docs/usage.md, The case file).
    out_dir
        The report folder; written atomically, refused when it exists unless ``force``.
    study_dir
        The study folder; wins over the case file's ``study``.
    register
        Rigid alignment of every series to the anchor; ``None`` takes the case file's
        ``[options] register``, whose default is True.
    site_lexicon
        A site's lexicon folder; wins over the case file's ``lexicon``.
    progress
        Told about each step (:class:`sigreport.model.Progress`).
    study_index
        As :func:`plan_report` (an archive's study, fetched into ``study_dir``).
    prior_study, prior_case
        A prior study of the same patient and its case file: each lesion gets ``change``
        against the prior's lesion of the same id (docs/measurements.md, Interval change). The
        prior is measured with the same stages, options and lexicon, and nothing of it is
        written. ``prior_study`` defaults to the prior case file's ``study``.
    use_cache
        Reuse the header index cache (``sigreport.ingest.cache``); False reads every header.
    """
    case = load_case(Path(case_path))
    # Every lexicon table is validated here, before any work (a missing site folder too).
    lexicon = load_lexicon(site_lexicon if site_lexicon is not None else case.lexicon)
    study = resolve_study_dir(case, study_dir)
    if prior_study is not None and prior_case is None:
        raise InputError(
            "--prior needs --prior-case: the prior study's ROIs come from its case file"
        )
    inputs = report_inputs(case, study, lexicon.site)
    if prior_case is not None:
        inputs.append(("the prior case file", Path(prior_case)))
    if prior_study is not None:
        inputs.append(("the prior study folder", Path(prior_study)))
    out_dir = check_outdir(out_dir, inputs=inputs, force=force)
    analysis = analyze_case(
        case,
        study_dir=study,
        register=register,
        lexicon=lexicon,
        progress=progress,
        study_index=study_index,
        use_cache=use_cache,
    )
    findings = analysis.findings
    if prior_case is not None:
        findings = _with_prior(
            findings, analysis.plan.case, Path(prior_case), prior_study, register, lexicon, progress
        )
    say(progress, f"writing {out_dir}")
    html = write_report(
        out_dir,
        findings,
        analysis.key_slices,
        {r.value: s for r, s in analysis.stacks.items()},
        force=force,
        lexicon=lexicon,
        phrases=analysis.phrases,
        progress=progress,
        extra_files=analysis.files,
    )
    return ReportRun(out_dir=out_dir, report_html=html, findings=findings)


def _relative(path: Path, folder: Path) -> str:
    try:
        return str(path.relative_to(folder))
    except ValueError:
        return str(path)


def _with_prior(
    findings: dict[str, Any],
    case: Case,
    prior_case: Path,
    prior_study: Path | None,
    register: bool | None,
    lexicon: Lexicon,
    progress: Progress | None,
) -> dict[str, Any]:
    """``findings`` with the interval change against the prior, measured by the same stages
    with the same options and lexicon (the prior case file's own ``lexicon =`` is not used)."""
    say(progress, f"measuring the prior study ({prior_case})")
    try:
        prior = load_case(prior_case)
        prior_findings = analyze_case(
            prior,
            study_dir=prior_study,
            register=register,
            lexicon=lexicon,
            progress=progress,
        ).findings
    except InputError as exc:
        raise InputError(f"prior study: {exc}") from None
    change = interval_change(
        findings,
        prior_findings,
        current_outlined=_outlined(case),
        prior_outlined=_outlined(prior),
    )
    return with_interval_change(findings, change)


def _outlined(case: Case) -> set[str]:
    """Ids of the case's ROIs drawn as outlines (mask, SEG, RTSTRUCT, annotation) or grown from
    a seed, not typed shapes: only these give a lesion's size."""
    return {spec.id for spec in case.rois if spec.shape in (RoiShape.MASK, RoiShape.SEED)}


def _alignments_by_key(
    plan: ReportPlan, aligned: AlignedStudy, anchor_image: sitk.Image
) -> dict[str, Alignment]:
    """Each stack's alignment to the anchor by stack key: those ``aligned`` holds, and each
    stack named by an ``at`` that it lacks (a series not measured, or not aligned yet),
    registered here like the measured ones."""
    by_key = {
        stack.key: aligned.alignments[role]
        for role, stack in plan.measured.items()
        if role in aligned.alignments
    }
    by_key.update(aligned.phase_alignments)
    for key in sorted(set(plan.viewer_keys.values()) - set(by_key)):
        stack = next(s for s in plan.index.stacks if s.key == key)
        other_frame = stack.frame_of_reference_uid != plan.anchor.frame_of_reference_uid
        by_key[key] = (
            register_rigid(
                anchor_image,
                load_stack(stack, study_dir=plan.index.study_dir),
                box_mm=union_bounds(plan.regions),
                settings=plan.lexicon.alignment,
            )
            if plan.register or other_frame
            else identity_alignment("frame-of-reference")
        )
    return by_key


def _overlap_notes(
    case: Case, samples: Mapping[tuple[str, Role], RoiSample], role: Role
) -> list[QcNote]:
    """A reference or control ROI that shares voxels with a lesion ROI (on the anchor grid)."""
    notes = []
    lesions = [s for s in case.rois if s.kind is RoiKind.LESION]
    for spec in case.rois:
        if spec.kind is RoiKind.LESION:
            continue
        own = samples[(spec.id, role)]
        for lesion in lesions:
            shared = own.overlap(samples[(lesion.id, role)])
            if shared:
                notes.append(
                    QcNote(
                        QcLevel.WARNING,
                        "reference-overlaps-lesion"
                        if spec.kind is RoiKind.REFERENCE
                        else "control-overlaps-lesion",
                        f"{spec.kind.value} ROI {spec.id} shares {shared} voxels with lesion {lesion.id} on "
                        f"{role.value}; its values are not independent of the lesion",
                    )
                )
    return notes
