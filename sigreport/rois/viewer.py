"""Viewer positions: ``at = {series, image, row, column[, frame]}`` (docs/rois.md).

A reader sees a series number, an image number and a cursor position. The point is converted
on that image's own geometry (DICOM PS3.3 C.7.6.2.1.1)::

    P = S + X * delta_col * column + Y * delta_row * row

with ``S`` the Image Position (Patient) of the image (of the frame, for a multi-frame file), ``X``
the row direction cosine (the direction in which the column index grows), ``Y`` the column
direction cosine, ``delta_col`` the spacing between columns and ``delta_row`` between rows, and
``row`` / ``column`` 0-based at the centre of the top left pixel. That point lies in the
referenced series' patient space; :func:`carry_to_anchor` brings it through the series'
alignment into the anchor's space, like every ROI.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import replace

import numpy as np

from sigreport.errors import InputError
from sigreport.model import Alignment, Case, InstanceRef, RoiSpec, Stack, StudyIndex, ViewerPosition

__all__ = ["find_image", "viewer_point_mm", "resolve_viewer_positions", "carry_to_anchor"]


def _describe_numbers(values: list[int]) -> str:
    values = sorted(set(values))
    if not values:
        return "none"
    if values == list(range(values[0], values[-1] + 1)) and len(values) > 2:
        return f"{values[0]}-{values[-1]}"
    shown = ", ".join(str(v) for v in values[:20])
    return shown + (", ..." if len(values) > 20 else "")


def find_image(index: StudyIndex, at: ViewerPosition) -> tuple[Stack, InstanceRef]:
    """The stack and image (frame) a viewer position names.

    Raises
    ------
    sigreport.errors.InputError
        Naming the series, image or frame that does not exist, and what does.
    """
    stacks = [s for s in index.stacks if s.series_number == at.series]
    if not stacks:
        present = [s.series_number for s in index.stacks if s.series_number is not None]
        raise InputError(
            f"at: no series {at.series} in the study (series: {_describe_numbers(present)})"
        )
    matches = [
        (stack, inst)
        for stack in stacks
        for inst in stack.instances
        if inst.instance_number == at.image
    ]
    if not matches:
        present = [i.instance_number for s in stacks for i in s.instances if i.instance_number]
        raise InputError(
            f"at: series {at.series} has no image {at.image} "
            f"(images: {_describe_numbers([p for p in present if p is not None])})"
        )
    multi = [m for m in matches if m[1].frame is not None]
    if multi:
        frames = [m[1].frame for m in multi if m[1].frame is not None]
        if at.frame is None:
            if len(multi) == 1:
                return multi[0]
            raise InputError(
                f"at: image {at.image} of series {at.series} is a multi-frame file; give frame "
                f"= n (frames: {_describe_numbers(frames)})"
            )
        chosen = [m for m in multi if m[1].frame == at.frame]
        if not chosen:
            raise InputError(
                f"at: image {at.image} of series {at.series} has no frame {at.frame} "
                f"(frames: {_describe_numbers(frames)})"
            )
        return chosen[0]
    if at.frame is not None and at.frame != 1:
        raise InputError(
            f"at: image {at.image} of series {at.series} is a single-frame image; frame "
            f"{at.frame} does not exist"
        )
    if len(matches) > 1:
        raise InputError(
            f"at: series {at.series} has {len(matches)} images numbered {at.image}; "
            "InstanceNumber does not name one image"
        )
    return matches[0]


def viewer_point_mm(index: StudyIndex, at: ViewerPosition) -> tuple[np.ndarray, Stack]:
    """The patient-space point (LPS mm, that series' space) of a viewer position, and its stack.

    DICOM PS3.3 C.7.6.2.1.1: ``P = S + X * delta_col * column + Y * delta_row * row``.

    Raises
    ------
    sigreport.errors.InputError
        When the series, image or frame does not exist, or the row / column is outside it.
    """
    stack, inst = find_image(index, at)
    columns, rows = stack.size[0], stack.size[1]
    if not (at.row <= rows - 1 and at.column <= columns - 1):
        raise InputError(
            f"at: row {at.row:g}, column {at.column:g} is outside image {at.image} of series "
            f"{at.series} ({rows} rows, {columns} columns, numbered from 0)"
        )
    direction = np.asarray(stack.direction, dtype=np.float64).reshape(3, 3)
    row_dir, col_dir = direction[:, 0], direction[:, 1]
    col_spacing, row_spacing = float(stack.spacing_mm[0]), float(stack.spacing_mm[1])
    origin = np.asarray(inst.position_mm, dtype=np.float64)
    point = origin + row_dir * col_spacing * at.column + col_dir * row_spacing * at.row
    return point, stack


def resolve_viewer_positions(case: Case, index: StudyIndex) -> tuple[Case, dict[str, str]]:
    """Fill ``center_mm`` of every ROI given by ``at`` with its point in that series' space.

    Returns
    -------
    (Case, dict)
        The case with centres filled (still in the referenced series' patient space) and, per
        ROI id, the key of the stack the point was read on; :func:`carry_to_anchor` finishes
        the job once the series are aligned.

    Raises
    ------
    sigreport.errors.InputError
        Listing every ROI whose position names no image, one per line.
    """
    problems: list[str] = []
    rois: list[RoiSpec] = []
    keys: dict[str, str] = {}
    for number, spec in enumerate(case.rois, start=1):
        if spec.at is None:
            rois.append(spec)
            continue
        try:
            point, stack = viewer_point_mm(index, spec.at)
        except InputError as exc:
            problems.append(f"{case.path.name}: roi[{number}] ({spec.id}): {exc}")
            rois.append(spec)
            continue
        keys[spec.id] = stack.key
        rois.append(replace(spec, center_mm=tuple(float(v) for v in point)))  # type: ignore[arg-type]
    if problems:
        raise InputError("\n".join(problems))
    return replace(case, rois=tuple(rois)), keys


def carry_to_anchor(point_mm: np.ndarray, alignment: Alignment) -> np.ndarray:
    """A point of a series' patient space in the anchor's patient space.

    ``alignment.transform`` maps anchor points to the series' points (fixed = anchor, moving =
    the series, SimpleITK's registration convention), so a point seen on the series goes
    through its inverse.
    """
    point = np.asarray(point_mm, dtype=np.float64)
    if alignment.transform is None:
        return point
    inverse = alignment.transform.GetInverse()
    return np.asarray(inverse.TransformPoint(tuple(float(v) for v in point)), dtype=np.float64)


def carry_viewer_positions(
    case: Case, keys: Mapping[str, str], alignments: Mapping[str, Alignment]
) -> Case:
    """Bring the centres read by :func:`resolve_viewer_positions` into the anchor's space.

    ``alignments`` maps a stack key to that stack's alignment to the anchor.
    """
    rois = []
    for spec in case.rois:
        key = keys.get(spec.id)
        if key is None or spec.center_mm is None:
            rois.append(spec)
            continue
        moved = carry_to_anchor(np.asarray(spec.center_mm), alignments[key])
        rois.append(replace(spec, center_mm=tuple(float(v) for v in moved)))  # type: ignore[arg-type]
    return replace(case, rois=tuple(rois))
