"""The key images' slices (docs/outputs.md, images/): each lesion's central slice on every
measured series, with the outlines of the lesion ROI and of its reference ROI; and one slice
through each reference and control ROI, with its own outline, so that a reader sees where the
report's yardsticks were placed."""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np
import SimpleITK as sitk

from sigreport.model import ROLE_ORDER, Case, KeySlice, RoiKind, Role, Stack
from sigreport.rois.propagate import RoiSample

__all__ = ["build_key_slices"]


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
            reference = samples.get((spec.reference, role)) if spec.reference else None
            slices.append(
                _key_slice(
                    spec.id, spec.kind, role, images[role], sample, reference, measured[role]
                )
            )
    order = [r for r in ROLE_ORDER if r in images]
    if anchor is not None and anchor in images:
        order.remove(anchor)
        order.insert(0, anchor)
    for spec in case.rois:
        if spec.kind is RoiKind.LESION:
            continue
        for role in order:
            own = samples.get((spec.id, role))
            if own is None or own.n_voxels == 0:
                continue
            slices.append(
                _key_slice(spec.id, spec.kind, role, images[role], own, None, measured[role])
            )
            break
    return slices
