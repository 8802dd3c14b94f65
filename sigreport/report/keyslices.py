"""The key images' slices: each lesion's central slice on every measured series, with the
outlines of the lesion ROI and of its reference ROI (docs/outputs.md, images/)."""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np
import SimpleITK as sitk

from sigreport.model import ROLE_ORDER, Case, KeySlice, RoiKind, Role, Stack
from sigreport.rois.propagate import RoiSample

__all__ = ["build_key_slices"]


def build_key_slices(
    case: Case,
    images: Mapping[Role, sitk.Image],
    samples: Mapping[tuple[str, Role], RoiSample],
    measured: Mapping[Role, Stack],
) -> list[KeySlice]:
    """The slice through each lesion's centre on every measured series (roles in reading order),
    with the outlines of the lesion ROI and of its reference ROI on that slice.

    Parameters
    ----------
    case
        The case file; its lesion ROIs, in order, get key slices.
    images
        The loaded series per role.
    samples
        Each ROI's voxels on each series, keyed ``(roi id, role)``.
    measured
        The stack measured for each role (for the slice's SOP Instance UID).
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
            # Within the sample's box (it is kept to the ROI's box).
            weights = np.where(sample.box_mask, sample.box_weights, 0.0)
            per_slice = weights.sum(axis=(1, 2))
            # The weighted centre along the stack, snapped to a slice that holds ROI voxels.
            centre = float(np.dot(np.arange(per_slice.size), per_slice) / per_slice.sum())
            holding = np.flatnonzero(per_slice > 0)
            z = int(holding[np.argmin(np.abs(holding - centre))]) + sample.offset[0]
            array = sitk.GetArrayViewFromImage(images[role])
            reference = samples.get((spec.reference, role)) if spec.reference else None
            ref_slice = reference.slice_mask(z) if reference is not None else None
            ref_mask = ref_slice if ref_slice is not None and ref_slice.any() else None
            spacing = images[role].GetSpacing()
            stack = measured[role]
            slices.append(
                KeySlice(
                    roi_id=spec.id,
                    role=role,
                    image=np.array(array[z], dtype=np.float32),
                    lesion_mask=sample.slice_mask(z),
                    reference_mask=ref_mask,
                    pixel_spacing_mm=(float(spacing[1]), float(spacing[0])),
                    slice_index=z,
                    sop_instance_uid=stack.instances[z].sop_instance_uid
                    if z < len(stack.instances)
                    else None,
                )
            )
    return slices
