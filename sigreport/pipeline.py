"""The main job, end to end: a study and a case file in, a report folder out.

    study index -> series roles -> volumes -> ROIs -> alignment -> measurements
                -> characterization -> report files

Each stage lives in its own subpackage and hands plain data (``sigreport.model``) to the next;
this module only chooses what to measure, wires the stages together and collects the ``qc``
notes that decisions along the way produce. Nothing is guessed silently: a doubtful role, a
large registration, a missing series each leave a note.
"""

from __future__ import annotations

import datetime as _dt
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np
import SimpleITK as sitk

from sigreport import __version__, lexicon
from sigreport.errors import InputError
from sigreport.ingest.explain import why_absent
from sigreport.model import (
    Alignment,
    Case,
    KeySlice,
    MeasuredRoi,
    MeasuredStudy,
    QcLevel,
    QcNote,
    RoiKind,
    Role,
    SeriesMeasurement,
    Stack,
    StudyIndex,
)

Progress = Callable[[str], None]

FINDINGS_SCHEMA = "sigreport-findings/1"
# Roles listed in the order a radiologist reads them (also the order of the report's table).
ROLE_ORDER = (
    Role.T1, Role.T1FS, Role.T2, Role.T2FS, Role.PD, Role.FLAIR, Role.STIR, Role.T2STAR,
    Role.DWI, Role.ADC, Role.T1POST, Role.T1POSTFS,
)  # fmt: skip
# Below this confidence an inferred role is reported as doubtful in qc.
DOUBTFUL_ROLE_CONFIDENCE = 0.6


@dataclass(frozen=True)
class ReportRun:
    """What ``run_report`` did: where the report is, and what it concluded."""

    out_dir: Path
    report_html: Path
    findings: dict[str, Any]


def _say(progress: Progress | None, message: str) -> None:
    if progress is not None:
        progress(message)


# --------------------------------------------------------------------------------------------
# Choosing series


def apply_role_overrides(
    index: StudyIndex, overrides: Mapping[Role, int | str], *, case_name: str = "case.toml"
) -> tuple[StudyIndex, dict[Role, str]]:
    """Give the stacks the case file's ``[roles]`` names; return the new index and, per
    overridden role, the key of the stack that must be measured for it."""
    chosen: dict[Role, str] = {}
    stacks = list(index.stacks)
    for role, target in overrides.items():
        matches = [
            i
            for i, s in enumerate(stacks)
            if (isinstance(target, int) and s.series_number == target)
            or (isinstance(target, str) and target in (s.series_instance_uid, s.key))
        ]
        if not matches:
            what = f"series number {target}" if isinstance(target, int) else f"series {target}"
            raise InputError(
                f"{case_name}: [roles] {role.value} = {target!r}: no {what} in the study"
                + why_absent(index, target)
            )
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
    return replace(index, stacks=tuple(stacks)), chosen


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
    for role in ROLE_ORDER:
        candidates = by_role.get(role, [])
        if not candidates:
            continue
        if role in forced:
            pick = next(s for s in candidates if s.key == forced[role])
        else:
            pick = min(candidates, key=lambda s: (s.voxel_volume_mm3, s.series_number or 0))
        measured[role] = pick
        others = [s for s in candidates if s.key != pick.key]
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
        elif stack.role_source == "inferred" and stack.confidence < DOUBTFUL_ROLE_CONFIDENCE:
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


def _series_name(stack: Stack) -> str:
    number = f"series {stack.series_number}" if stack.series_number is not None else "series"
    name = f"{number} ({stack.description})" if stack.description else number
    return f"{name} stack {stack.stack}" if stack.stack else name


def choose_anchor(
    case: Case, measured: Mapping[Role, Stack], regions: Sequence[Any]
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
# The job


def run_report(
    case_path: Path,
    out_dir: Path,
    *,
    study_dir: Path | None = None,
    register: bool | None = None,
    force: bool = False,
    site_lexicon: Path | None = None,
    progress: Progress | None = None,
) -> ReportRun:
    """Place the case's ROIs on every series of the study, measure, characterize and write the
    report folder.

    Parameters
    ----------
    case_path
        The case file (interface.md, The case file).
    out_dir
        The report folder; written atomically, refused when it exists unless ``force``.
    study_dir
        The study folder; wins over the case file's ``study``.
    register
        Rigid alignment of every series to the anchor; ``None`` takes the case file's
        ``[options] register``, whose default is True.
    site_lexicon
        A site's lexicon folder; wins over the case file's ``lexicon``.
    """
    from sigreport.align import identity_alignment, register_rigid
    from sigreport.ingest import index_study, load_stack
    from sigreport.ingest.explain import skipped_series_summary
    from sigreport.measure import characterize, load_rules, measure_roi, noise_sigma
    from sigreport.report import write_report
    from sigreport.rois import (
        build_region,
        load_case,
        max_diameter_mm,
        sample_region,
        union_bounds,
        volume_ml,
    )
    from sigreport.rois.masks import mask_reference_notes

    case = load_case(Path(case_path))
    site = site_lexicon if site_lexicon is not None else case.lexicon
    lexicon.site_dir(site)  # a missing site folder is an input error before any work
    rules = load_rules(site)
    study_dir = study_dir if study_dir is not None else case.study
    if study_dir is None:
        raise InputError(
            f'{case.path.name}: no study folder: give STUDY_DIR or set study = "..." in the case file'
        )
    out_dir = Path(out_dir)
    if out_dir.exists() and not force:
        raise InputError(f"{out_dir} exists; use --force to replace it")
    if _inside(out_dir, Path(study_dir)):
        raise InputError(
            f"{out_dir} is inside the study folder {study_dir}; the input is never written to"
        )

    _say(progress, f"indexing {study_dir}")
    index = index_study(
        Path(study_dir), site_lexicon=site, study_uid=case.study_uid, require_one_study=True
    )
    if not index.stacks:
        reasons = skipped_series_summary(index) or "; ".join(
            f"{_relative(s.path, index.study_dir)}: {s.reason}" for s in index.skipped[:5]
        )
        raise InputError(
            f"no usable MR series under {study_dir}" + (f" ({reasons})" if reasons else "")
        )
    index, forced = apply_role_overrides(index, case.roles, case_name=case.path.name)
    measured, qc = choose_measured(index, forced)
    qc = [QcNote(QcLevel.WARNING, "study", w) for w in index.warnings] + qc
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

    regions = [build_region(spec) for spec in case.rois]
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
    anchor = measured[anchor_role]
    do_register = (
        register if register is not None else (case.register if case.register is not None else True)
    )

    images: dict[Role, sitk.Image] = {}
    for role, stack in measured.items():
        _say(progress, f"loading {role.value}: {_series_name(stack)}")
        images[role] = load_stack(stack, study_dir=index.study_dir)

    # The ROIs' box; register_rigid adds the lexicon's margin of anatomy around it.
    box = union_bounds(regions)
    alignments: dict[Role, Alignment] = {}
    for role, stack in measured.items():
        if role is anchor_role:
            alignments[role] = identity_alignment("identity")
            continue
        other_frame = (
            stack.frame_of_reference_uid is not None
            and anchor.frame_of_reference_uid is not None
            and stack.frame_of_reference_uid != anchor.frame_of_reference_uid
        )
        if do_register or other_frame:
            _say(progress, f"registering {role.value} to {anchor_role.value}")
            alignment = register_rigid(
                images[anchor_role], images[role], box_mm=box, site_lexicon=site
            )
            if other_frame and not do_register:
                qc.append(
                    QcNote(
                        QcLevel.INFO,
                        "registered-other-frame",
                        f"{role.value} is in another frame of reference than the anchor; registered despite --no-register",
                    )
                )
        else:
            alignment = identity_alignment("frame-of-reference")
        alignments[role] = alignment
        qc.extend(
            QcNote(QcLevel.WARNING, "registration", f"{role.value}: {w}")
            for w in alignment.warnings
        )

    min_voxels = int(rules.min_voxels)
    samples: dict[tuple[str, Role], Any] = {}
    measured_rois: list[MeasuredRoi] = []
    finest_role = min(measured, key=lambda r: measured[r].voxel_volume_mm3)
    noise: dict[Role, float | None] = {}
    for role, image in images.items():
        noise[role] = noise_sigma(sitk.GetArrayViewFromImage(image))
    for spec, region in zip(case.rois, regions, strict=True):
        _say(progress, f"measuring {spec.id}")
        by_role: dict[Role, SeriesMeasurement] = {}
        for role, image in images.items():
            transform = alignments[role].transform
            sample = sample_region(
                region,
                image,
                to_region_space=transform.GetInverse() if transform is not None else None,
            )
            samples[(spec.id, role)] = sample
            by_role[role] = measure_roi(
                sitk.GetArrayViewFromImage(image),
                sample.mask,
                sample.weights,
                image.GetSpacing(),
                lesion=spec.kind is RoiKind.LESION,
                min_voxels=min_voxels,
                rules=rules,
                roi_id=spec.id,
                role=role,
            )
        finest = samples[(spec.id, finest_role)]
        has_voxels = finest.n_voxels > 0
        measured_rois.append(
            MeasuredRoi(
                spec=spec,
                volume_ml=volume_ml(finest, images[finest_role]) if has_voxels else None,
                max_diameter_mm=max_diameter_mm(finest, images[finest_role])
                if has_voxels
                else None,
                by_role=by_role,
            )
        )
    qc.extend(_overlap_notes(case, samples, anchor_role))

    _say(progress, "characterizing")
    result = characterize(
        MeasuredStudy(rois=tuple(measured_rois), stacks=dict(measured), noise_sigma=noise), rules
    )
    qc.extend(result.qc)
    qc.append(
        QcNote(
            QcLevel.INFO,
            "anchor",
            f"ROIs are placed in the patient space of {anchor_role.value} ({_series_name(anchor)}): {anchor_reason}"
            + (
                ""
                if do_register
                else "; registration off, the scanner's frame of reference is trusted"
            ),
        )
    )

    findings = build_findings(index, measured, alignments, anchor_role, result, qc, site=site)
    key_slices = build_key_slices(case, images, samples, measured)
    _say(progress, f"writing {out_dir}")
    html = write_report(
        out_dir,
        findings,
        key_slices,
        {r.value: s for r, s in measured.items()},
        site_lexicon=site,
        force=force,
    )
    return ReportRun(out_dir=out_dir, report_html=html, findings=findings)


def _relative(path: Path, folder: Path) -> str:
    try:
        return str(path.relative_to(folder))
    except ValueError:
        return str(path)


def _inside(path: Path, folder: Path) -> bool:
    try:
        path.resolve().relative_to(folder.resolve())
    except ValueError:
        return False
    return True


def _overlap_notes(case: Case, samples: Mapping[tuple[str, Role], Any], role: Role) -> list[QcNote]:
    """A reference or control ROI that shares voxels with a lesion ROI (on the anchor grid)."""
    notes = []
    lesions = [s for s in case.rois if s.kind is RoiKind.LESION]
    for spec in case.rois:
        if spec.kind is RoiKind.LESION:
            continue
        own = samples[(spec.id, role)].mask
        for lesion in lesions:
            shared = int(np.count_nonzero(own & samples[(lesion.id, role)].mask))
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


# --------------------------------------------------------------------------------------------
# Report inputs


def build_findings(
    index: StudyIndex,
    measured: Mapping[Role, Stack],
    alignments: Mapping[Role, Alignment],
    anchor_role: Role,
    result: Any,
    qc: Sequence[QcNote],
    *,
    site: Path | None = None,
) -> dict[str, Any]:
    """The findings.json object (interface.md, schema sigreport-findings/1)."""
    measured_keys = {s.key: r for r, s in measured.items()}
    series = []
    for stack in sorted(index.stacks, key=lambda s: (s.series_number or 0, s.stack or "")):
        role = measured_keys.get(stack.key)
        entry: dict[str, Any] = {
            "role": stack.role.value,
            "series_instance_uid": stack.series_instance_uid,
            "series_number": stack.series_number,
            "stack": stack.stack,
            "description": stack.description,
            "role_reason": stack.role_reason,
            "confidence": round(float(stack.confidence), 3),
            "measured": role is not None,
        }
        if role is not None:
            entry["alignment"] = alignments[role].to_json()
            entry["anchor"] = role is anchor_role
        series.append(entry)
    cautions = lexicon.read_table("cautions.toml", site).get("cautions")
    if (
        not isinstance(cautions, list)
        or not cautions
        or not all(isinstance(c, str) for c in cautions)
    ):
        raise InputError("lexicon cautions.toml: 'cautions' must be a non-empty list of strings")
    study = index.study
    return {
        "schema": FINDINGS_SCHEMA,
        "tool": {"name": "sigreport", "version": __version__},
        "generated": _dt.datetime.now(_dt.UTC).replace(microsecond=0).isoformat(),
        "study": {
            "study_instance_uid": study.study_instance_uid,
            "study_date": study.study_date,
            "accession_number": study.accession_number,
        },
        "series": series,
        "rois": [dict(r) for r in result.rois],
        "lesions": [lesion.to_json() for lesion in result.lesions],
        "qc": [note.to_json() for note in _dedupe(qc)],
        "cautions": list(cautions),
    }


def _dedupe(notes: Sequence[QcNote]) -> list[QcNote]:
    seen: set[QcNote] = set()
    out = []
    for note in notes:
        if note not in seen:
            seen.add(note)
            out.append(note)
    # Warnings first, so that they are the first thing a reader sees.
    order = {QcLevel.ERROR: 0, QcLevel.WARNING: 1, QcLevel.INFO: 2}
    return sorted(out, key=lambda n: order[n.level])


def build_key_slices(
    case: Case,
    images: Mapping[Role, sitk.Image],
    samples: Mapping[tuple[str, Role], Any],
    measured: Mapping[Role, Stack],
) -> list[KeySlice]:
    """The slice through each lesion's centre on every measured series, with the outlines of
    the lesion ROI and of its reference ROI on that slice."""
    slices = []
    for spec in case.rois:
        if spec.kind is not RoiKind.LESION:
            continue
        for role in ROLE_ORDER:
            if role not in images:
                continue
            sample = samples[(spec.id, role)]
            if sample.n_voxels == 0:
                continue
            weights = np.where(sample.mask, sample.weights, 0.0)
            per_slice = weights.sum(axis=(1, 2))
            # The weighted centre along the stack, snapped to a slice that holds ROI voxels.
            centre = float(np.dot(np.arange(per_slice.size), per_slice) / per_slice.sum())
            holding = np.flatnonzero(per_slice > 0)
            z = int(holding[np.argmin(np.abs(holding - centre))])
            array = sitk.GetArrayViewFromImage(images[role])
            reference = samples.get((spec.reference, role)) if spec.reference else None
            ref_mask = (
                reference.mask[z].copy()
                if reference is not None and reference.mask[z].any()
                else None
            )
            spacing = images[role].GetSpacing()
            stack = measured[role]
            slices.append(
                KeySlice(
                    roi_id=spec.id,
                    role=role,
                    image=np.array(array[z], dtype=np.float32),
                    lesion_mask=sample.mask[z].copy(),
                    reference_mask=ref_mask,
                    pixel_spacing_mm=(float(spacing[1]), float(spacing[0])),
                    slice_index=z,
                    sop_instance_uid=stack.instances[z].sop_instance_uid
                    if z < len(stack.instances)
                    else None,
                )
            )
    return slices
