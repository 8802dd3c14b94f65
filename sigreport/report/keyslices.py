"""The key images' slices (docs/outputs.md, images/): each lesion's central slice on every
measured series, with the outlines of the lesion ROI and of its reference ROI; and one slice
through each reference and control ROI, with its own outline, so that a reader sees where the
report's yardsticks were placed."""

from __future__ import annotations

from collections.abc import Container, Iterable, Mapping

import numpy as np
import SimpleITK as sitk

from sigreport.model import ROLE_ORDER, Case, KeySlice, RoiKind, Role, Stack
from sigreport.rois.propagate import RoiSample

__all__ = [
    "arrange_key_slices",
    "build_key_slices",
    "display_order",
    "series_key_slices",
]


def _central_slice(sample: RoiSample) -> int:
    """The weighted centre of the ROI along the stack, snapped to a slice that holds voxels
    (computed within the sample's box, which it is kept to)."""
    weights = np.where(sample.box_mask, sample.box_weights, 0.0)
    per_slice = weights.sum(axis=(1, 2))
    centre = float(np.dot(np.arange(per_slice.size), per_slice) / per_slice.sum())
    holding = np.flatnonzero(per_slice > 0)
    return int(holding[np.argmin(np.abs(holding - centre))]) + sample.offset[0]


def _key_slice(
    roi_id: str,
    kind: RoiKind,
    role: Role,
    image: sitk.Image,
    sample: RoiSample,
    reference: RoiSample | None,
    stack: Stack,
) -> KeySlice:
    z = _central_slice(sample)
    array = sitk.GetArrayViewFromImage(image)
    ref_slice = reference.slice_mask(z) if reference is not None else None
    ref_mask = ref_slice if ref_slice is not None and ref_slice.any() else None
    spacing = image.GetSpacing()
    instance = stack.instances[z] if z < len(stack.instances) else None
    return KeySlice(
        roi_id=roi_id,
        role=role,
        image=np.array(array[z], dtype=np.float32),
        lesion_mask=sample.slice_mask(z),
        reference_mask=ref_mask,
        pixel_spacing_mm=(float(spacing[1]), float(spacing[0])),
        slice_index=z,
        sop_instance_uid=None if instance is None else instance.sop_instance_uid,
        instance_number=None if instance is None else instance.instance_number,
        kind=kind.value,
    )


def series_key_slices(
    case: Case,
    role: Role,
    image: sitk.Image,
    samples: Mapping[str, RoiSample],
    stack: Stack,
    *,
    skip: Container[str] = (),
) -> dict[str, KeySlice]:
    """The key slices one series gives, by ROI id: each lesion's central slice (with its
    reference's outline), and each reference and control ROI's own slice unless its id is in
    ``skip`` (it has one on a series shown before this one). ROIs without a voxel on this series
    give none. The slices are copies: the series' pixels may be released afterwards.

    Parameters
    ----------
    case
        The case file; its ROIs get key slices.
    role, image, stack
        The series: its role, its loaded pixels, and its stack (for the slice's SOP Instance
        UID and InstanceNumber).
    samples
        Each ROI's voxels on this series, by ROI id.
    skip
        Ids of reference and control ROIs that need no slice here.
    """
    out: dict[str, KeySlice] = {}
    for spec in case.rois:
        sample = samples.get(spec.id)
        if sample is None or sample.n_voxels == 0:
            continue
        if spec.kind is RoiKind.LESION:
            reference = samples.get(spec.reference) if spec.reference else None
            out[spec.id] = _key_slice(spec.id, spec.kind, role, image, sample, reference, stack)
        elif spec.id not in skip:
            out[spec.id] = _key_slice(spec.id, spec.kind, role, image, sample, None, stack)
    return out


def display_order(roles: Iterable[Role], anchor: Role | None = None) -> list[Role]:
    """The order series are searched for a reference or control ROI's slice: ``anchor`` first,
    then reading order (:data:`sigreport.model.ROLE_ORDER`)."""
    present = set(roles)
    order = [r for r in ROLE_ORDER if r in present]
    if anchor is not None and anchor in present:
        order.remove(anchor)
        order.insert(0, anchor)
    return order


def arrange_key_slices(
    case: Case, by_role: Mapping[Role, Mapping[str, KeySlice]], *, anchor: Role | None = None
) -> list[KeySlice]:
    """The report's key slices from what each series gave (:func:`series_key_slices`): each
    lesion on every series (case-file order, then reading order), then each reference and
    control ROI once, on the first series of :func:`display_order` that gave it a slice."""
    slices = []
    for spec in case.rois:
        if spec.kind is not RoiKind.LESION:
            continue
        for role in ROLE_ORDER:
            key = by_role.get(role, {}).get(spec.id)
            if key is not None:
                slices.append(key)
    order = display_order(by_role, anchor)
    for spec in case.rois:
        if spec.kind is RoiKind.LESION:
            continue
        for role in order:
            key = by_role[role].get(spec.id)
            if key is not None:
                slices.append(key)
                break
    return slices


def build_key_slices(
    case: Case,
    images: Mapping[Role, sitk.Image],
    samples: Mapping[tuple[str, Role], RoiSample],
    measured: Mapping[Role, Stack],
    *,
    anchor: Role | None = None,
) -> list[KeySlice]:
    """The slice through each lesion's centre on every measured series (roles in reading order),
    with the outlines of the lesion ROI and of its reference ROI on that slice; then one slice
    through each reference and control ROI, on ``anchor``, with its own outline.

    Every series is handed at once; a run that loads one series at a time calls
    :func:`series_key_slices` on each while it is loaded, then :func:`arrange_key_slices`.

    Parameters
    ----------
    case
        The case file; its ROIs, in order, get key slices.
    images
        The loaded series per role.
    samples
        Each ROI's voxels on each series, keyed ``(roi id, role)``.
    measured
        The stack measured for each role (for the slice's SOP Instance UID and InstanceNumber).
    anchor
        The series the reference and control ROIs are shown on (the one the ROIs are placed
        on); ``None``: the first measured series in reading order. When the ROI has no voxel
        there, the first series in reading order where it has some.
    """
    by_role: dict[Role, dict[str, KeySlice]] = {}
    shown: set[str] = set()
    for role in display_order(images, anchor):
        on_role = {roi_id: s for (roi_id, r), s in samples.items() if r is role}
        by_role[role] = series_key_slices(
            case, role, images[role], on_role, measured[role], skip=shown
        )
        shown.update(k for k, v in by_role[role].items() if v.kind != RoiKind.LESION.value)
    return arrange_key_slices(case, by_role, anchor=anchor)
