"""Frame records into geometrically regular stacks.

Series are grouped by SeriesInstanceUID, then split into stacks wherever frames differ in
orientation, image size, pixel spacing, echo, temporal position, b-value, image type or (Enhanced
MR) StackID. Slices are sorted by their position along the slice normal, n = row x column
(PS3.3 C.7.6.2.1.1), never by InstanceNumber or SliceLocation; the slice spacing comes from the
positions. Gaps, duplicates, missing slices, non-uniform spacing and stacking oblique to the
normal (gantry tilt) are reported in ``Stack.warnings``, never silently repaired.
"""

from __future__ import annotations

from collections import defaultdict
from collections.abc import Iterable

import numpy as np

from sigreport.ingest.attributes import FrameRecord
from sigreport.model import InstanceRef, Stack


def orientation_label(orientation: tuple[float, ...], *, oblique_tol: float = 0.1) -> str:
    """``axial``, ``coronal`` or ``sagittal`` when the slice normal lies within ``oblique_tol``
    (direction cosine) of a patient axis (LPS: x -> sagittal, y -> coronal, z -> axial), else
    ``oblique``."""
    n = np.cross(orientation[:3], orientation[3:])
    axis = int(np.argmax(np.abs(n)))
    if abs(abs(n[axis]) - 1.0) > oblique_tol:
        return "oblique"
    return ("sagittal", "coronal", "axial")[axis]


def _same_orientation(a: tuple[float, ...], b: tuple[float, ...], tol: float) -> bool:
    return max(abs(x - y) for x, y in zip(a, b, strict=True)) <= tol


def _split_key(record: FrameRecord, orientation_id: int, echo_id: int | None) -> tuple[object, ...]:
    acq = record.acquisition
    return (
        record.stack_id or "",
        orientation_id,
        (record.columns, record.rows),
        tuple(round(v, 4) for v in record.pixel_spacing),
        echo_id if echo_id is not None else -1,
        acq.temporal_position if acq.temporal_position is not None else -1,
        acq.b_value if acq.b_value is not None else -1.0,
        acq.image_type,
    )


def build_stacks(
    records: Iterable[FrameRecord],
    *,
    orientation_tol: float = 1e-3,
    spacing_rtol: float = 0.01,
    position_tol_mm: float = 1e-3,
    tilt_tol_deg: float = 0.5,
) -> list[Stack]:
    """Group frame records into stacks, one per series unless the series splits.

    Parameters
    ----------
    records
        Frame records from ``header.read_frames``.
    orientation_tol
        Largest difference of an ImageOrientationPatient component for two frames to share a
        stack (default 1e-3).
    spacing_rtol
        Relative deviation of a slice step from the median step above which the spacing is
        reported non-uniform (default 0.01).
    position_tol_mm
        Two slices closer than this along the normal are duplicates (default 1e-3 mm).
    tilt_tol_deg
        Angle between the stacking direction and the slice normal above which the stack is
        reported as tilted / sheared (default 0.5 degrees).
    """
    by_series: dict[str, list[FrameRecord]] = defaultdict(list)
    for record in records:
        by_series[record.series_instance_uid].append(record)
    stacks: list[Stack] = []
    for series_uid, frames in by_series.items():
        stacks.extend(
            _series_stacks(
                series_uid,
                frames,
                orientation_tol=orientation_tol,
                spacing_rtol=spacing_rtol,
                position_tol_mm=position_tol_mm,
                tilt_tol_deg=tilt_tol_deg,
            )
        )
    stacks.sort(key=lambda s: (s.series_number if s.series_number is not None else 1 << 30, s.key))
    return stacks


def _series_stacks(
    series_uid: str,
    frames: list[FrameRecord],
    *,
    orientation_tol: float,
    spacing_rtol: float,
    position_tol_mm: float,
    tilt_tol_deg: float,
) -> list[Stack]:
    orientations: list[tuple[float, ...]] = []
    echo_times: list[float] = []
    groups: dict[tuple[object, ...], list[FrameRecord]] = defaultdict(list)
    for record in frames:
        oid = next(
            (
                i
                for i, known in enumerate(orientations)
                if _same_orientation(known, record.orientation, orientation_tol)
            ),
            len(orientations),
        )
        if oid == len(orientations):
            orientations.append(record.orientation)
        echo = record.acquisition.echo_number
        if (
            echo is None
            and record.frame is not None
            and record.acquisition.echo_time_ms is not None
        ):
            te = record.acquisition.echo_time_ms  # Enhanced MR: one echo per distinct TE
            if all(abs(te - t) > 1e-3 for t in echo_times):
                echo_times.append(te)
            echo = (
                None
                if te is None
                else -2 - next(i for i, t in enumerate(echo_times) if abs(te - t) <= 1e-3)
            )
        groups[_split_key(record, oid, echo)].append(record)

    # Duplicated positions within a group that another acquisition number explains: split.
    refined: dict[tuple[object, ...], list[FrameRecord]] = {}
    for key, members in groups.items():
        numbers = {r.acquisition_number for r in members}
        if len(numbers) > 1 and _has_duplicates(members, position_tol_mm):
            for number in sorted(numbers, key=lambda n: -1 if n is None else n):
                refined[(*key, number)] = [r for r in members if r.acquisition_number == number]
        else:
            refined[(*key, None)] = members

    keys = sorted(refined, key=_sortable)
    names = _stack_names(keys, refined, orientations)
    series_echo_times = _distinct_echo_times(frames)
    stacks = []
    for key in keys:
        stack_name = names[key] if len(keys) > 1 else None
        stacks.append(
            _make_stack(
                series_uid,
                stack_name,
                refined[key],
                echo_index=_echo_index(key),
                series_echo_times=series_echo_times,
                spacing_rtol=spacing_rtol,
                position_tol_mm=position_tol_mm,
                tilt_tol_deg=tilt_tol_deg,
            )
        )
    return stacks


def _single_slice_spacing(record: FrameRecord) -> tuple[float, str]:
    """The slice spacing of a one-slice stack: SpacingBetweenSlices, else SliceThickness, else
    1 mm. Vendors write a zero or negative SpacingBetweenSlices (some write the signed step
    between slices; common practice): only a positive value is used, and the source says so."""
    between = record.spacing_between_slices
    thickness = record.acquisition.slice_thickness_mm
    if between is not None and between > 0:
        return between, "SpacingBetweenSlices"
    ignored = (
        f" (SpacingBetweenSlices {between:g} ignored: not positive)" if between is not None else ""
    )
    if thickness is not None and thickness > 0:
        return thickness, "SliceThickness" + ignored
    return 1.0, "a default of 1 mm" + ignored


def _distinct_echo_times(frames: list[FrameRecord], *, tol_ms: float = 1e-3) -> tuple[float, ...]:
    """Every distinct echo time of a series, ascending (two or more: a multi-echo series)."""
    found: list[float] = []
    for te in sorted(r.acquisition.echo_time_ms for r in frames if r.acquisition.echo_time_ms):
        if not found or te - found[-1] > tol_ms:
            found.append(float(te))
    return tuple(found)


def _echo_index(key: tuple[object, ...]) -> int | None:
    echo = key[4]
    assert isinstance(echo, int)
    if echo == -1:
        return None
    return echo if echo >= 0 else -2 - echo + 1


def _sortable(key: tuple[object, ...]) -> tuple[str, ...]:
    return tuple(repr(k) for k in key)


def _stack_names(
    keys: list[tuple[object, ...]],
    groups: dict[tuple[object, ...], list[FrameRecord]],
    orientations: list[tuple[float, ...]],
) -> dict[tuple[object, ...], str]:
    """Short names built from the attributes that differ between the stacks of one series."""
    labels = [
        lambda k: f"stack {k[0]}" if k[0] else "",
        lambda k: orientation_label(orientations[k[1]]),
        lambda k: f"{k[2][0]}x{k[2][1]}",
        lambda k: f"{k[3][0]:g}x{k[3][1]:g} mm",
        lambda k: "" if _echo_index(k) is None else f"echo {_echo_index(k)}",
        lambda k: "" if k[5] == -1 else f"t {k[5]}",
        lambda k: "" if k[6] == -1.0 else f"b {k[6]:g}",
        lambda k: "\\".join(k[7]),
        lambda k: "" if k[8] is None else f"acq {k[8]}",
    ]
    varying = [f for f in labels if len({f(k) for k in keys}) > 1]
    names: dict[tuple[object, ...], str] = {}
    used: set[str] = set()
    for key in keys:
        name = " ".join(p for p in (f(key) for f in varying) if p) or "stack"
        base, n = name, 2
        while name in used:
            name, n = f"{base} ({n})", n + 1
        used.add(name)
        names[key] = name
    return names


def _normal(orientation: tuple[float, ...]) -> np.ndarray:
    n = np.cross(np.asarray(orientation[:3], float), np.asarray(orientation[3:], float))
    return n / np.linalg.norm(n)


def _has_duplicates(members: list[FrameRecord], tol: float) -> bool:
    n = _normal(members[0].orientation)
    d = np.sort([float(np.dot(r.position, n)) for r in members])
    return bool(np.any(np.diff(d) <= tol))


def _make_stack(
    series_uid: str,
    name: str | None,
    members: list[FrameRecord],
    *,
    echo_index: int | None,
    series_echo_times: tuple[float, ...] = (),
    spacing_rtol: float,
    position_tol_mm: float,
    tilt_tol_deg: float,
) -> Stack:
    from dataclasses import replace

    first = members[0]
    row_dir = np.asarray(first.orientation[:3], float)
    col_dir = np.asarray(first.orientation[3:], float)
    row_dir /= np.linalg.norm(row_dir)
    col_dir /= np.linalg.norm(col_dir)
    normal = np.cross(row_dir, col_dir)
    warnings: list[str] = []
    for record in members:
        for w in record.warnings:
            if w not in warnings:
                warnings.append(w)

    # Sort by the position along the slice normal; ties by InstanceNumber then frame, so the
    # order is deterministic (never by SliceLocation, which vendors fill inconsistently).
    def along(r: FrameRecord) -> float:
        return float(np.dot(r.position, normal))

    ordered = sorted(
        members,
        key=lambda r: (along(r), r.instance_number or 0, r.frame or 0, r.tile or 0, str(r.path)),
    )
    kept: list[FrameRecord] = []
    duplicates = 0
    for record in ordered:
        if kept and abs(along(record) - along(kept[-1])) <= position_tol_mm:
            duplicates += 1
            continue
        kept.append(record)
    if duplicates:
        warnings.append(
            f"{duplicates} duplicate slice position(s) (within {position_tol_mm:g} mm); kept "
            "the first by InstanceNumber, the others are not loaded"
        )
    d = np.array([along(r) for r in kept])
    n_slices = len(kept)
    if n_slices >= 2:
        steps = np.diff(d)
        spacing_z = float(np.median(steps))
        deviation = np.abs(steps - spacing_z) / spacing_z
        if np.any(deviation > spacing_rtol):
            multiples = steps / spacing_z
            whole = np.abs(multiples - np.round(multiples)) <= spacing_rtol
            if np.all(whole):
                missing = int(np.sum(np.round(multiples) - 1))
                where = ", ".join(
                    f"{d[i]:.2f}-{d[i + 1]:.2f} mm"
                    for i in np.nonzero(np.round(multiples) > 1)[0][:5]
                )
                warnings.append(
                    f"{missing} missing slice(s) (gap at {where} along the normal); loaded "
                    "volume has empty (NaN) slices there"
                )
                n_slices = int(round((d[-1] - d[0]) / spacing_z)) + 1
            else:
                warnings.append(
                    "non-uniform slice spacing: steps "
                    f"{float(steps.min()):.3f}-{float(steps.max()):.3f} mm (median "
                    f"{spacing_z:.3f}, largest deviation {100 * float(deviation.max()):.1f}% > "
                    f"{100 * spacing_rtol:g}%); volume uses the median spacing"
                )
        span = np.asarray(kept[-1].position, float) - np.asarray(kept[0].position, float)
        length = float(np.linalg.norm(span))
        if length > 0:
            cosine = min(1.0, abs(float(np.dot(span, normal))) / length)
            angle = float(np.degrees(np.arccos(cosine)))
            if angle > tilt_tol_deg:
                warnings.append(
                    f"slices are stacked {angle:.1f} deg off the slice normal (gantry tilt or "
                    "sheared stack); the volume geometry assumes orthogonal stacking"
                )
    else:
        spacing_z, source = _single_slice_spacing(first)
        warnings.append(f"single slice: slice spacing {spacing_z:g} mm taken from {source}")

    scaling_keys = {r.scaling.key() for r in kept}
    scaling_key = next(iter(scaling_keys)) if len(scaling_keys) == 1 else None
    if scaling_key is None:
        warnings.append("frames have different pixel scaling (rescale / real world value mapping)")

    acquisition = first.acquisition
    if echo_index is not None and acquisition.echo_number is None:
        acquisition = replace(acquisition, echo_number=echo_index)
    times = [r.acquisition.acquisition_time_s for r in kept]
    acquisition = replace(
        acquisition,
        series_echo_times_ms=series_echo_times,
        acquisition_time_s=min((s for s in times if s is not None), default=None),
    )
    sources = {r.series_number for r in kept}
    if len(sources) > 1:
        warnings.append(f"instances carry different SeriesNumbers {sorted(map(str, sources))}")
    direction = (
        row_dir[0], col_dir[0], normal[0],
        row_dir[1], col_dir[1], normal[1],
        row_dir[2], col_dir[2], normal[2],
    )  # fmt: skip
    instances = tuple(
        InstanceRef(
            path=r.path,
            sop_instance_uid=r.sop_instance_uid,
            sop_class_uid=r.sop_class_uid,
            position_mm=tuple(float(v) for v in r.position),  # type: ignore[arg-type]
            frame=r.frame,
            instance_number=r.instance_number,
            tile=r.tile,
        )
        for r in kept
    )
    return Stack(
        key=series_uid if name is None else f"{series_uid}#{name}",
        series_instance_uid=series_uid,
        series_number=first.series_number,
        stack=name,
        description=first.description,
        modality=first.modality,
        frame_of_reference_uid=first.frame_of_reference_uid,
        instances=instances,
        size=(first.columns, first.rows, n_slices),
        spacing_mm=(float(first.pixel_spacing[1]), float(first.pixel_spacing[0]), spacing_z),
        origin_mm=tuple(float(v) for v in kept[0].position),  # type: ignore[arg-type]
        direction=tuple(float(v) for v in direction),
        acquisition=acquisition,
        warnings=tuple(warnings),
        scaling_key=scaling_key,
    )
