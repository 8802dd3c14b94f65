"""The ROI forms that need the study: viewer positions, seeds, automatic references, laterality.

Two steps around the alignment stage (docs/rois.md):

* :func:`provisional_regions`, before the series are aligned: every ROI's region, with a seed
  standing in as the sphere it may grow into (the anchor choice and the registration box only
  need where the ROIs are);
* :func:`place_roi_forms`, once the anchor is loaded and every series aligned: ``at`` points
  carried into the anchor's space, seeds grown, mirror references placed, laterality checked.
  It returns plain data: the final case and regions, ``qc`` notes and the review files.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np
import SimpleITK as sitk

from sigreport.errors import InputError
from sigreport.model import (
    AUTO_REFERENCE,
    Alignment,
    Case,
    QcLevel,
    QcNote,
    RoiKind,
    RoiShape,
    Stack,
    StudyIndex,
)
from sigreport.rois.regions import Region, SphereRegion, build_region
from sigreport.rois.settings import RoiSettings
from sigreport.rois.viewer import carry_viewer_positions

__all__ = ["PlacedRois", "provisional_regions", "place_roi_forms", "ROI_FILES_DIR"]

# OUTDIR's folder for the grown lesions' review files.
ROI_FILES_DIR = "rois"


@dataclass(frozen=True)
class PlacedRois:
    """The case and regions to measure (auto references appended), their notes and files.

    ``files`` maps OUTDIR-relative paths (``rois/<id>.nii.gz``, ``rois/<id>-seg.dcm``) to bytes.
    """

    case: Case
    regions: list[Region]
    qc: list[QcNote] = field(default_factory=list)
    files: dict[str, bytes] = field(default_factory=dict)


def _dicom_modality(path: Path) -> str | None:
    import pydicom

    try:
        with path.open("rb") as handle:
            handle.seek(128)
            if handle.read(4) != b"DICM":
                return None
        return str(pydicom.dcmread(path, stop_before_pixels=True).get("Modality", ""))
    except Exception:  # unreadable: build_region reports it
        return None


def provisional_regions(
    case: Case, settings: RoiSettings, index: StudyIndex | None = None
) -> tuple[list[Region], list[QcNote]]:
    """Each ROI's region before alignment, and notes.

    A seed is the sphere of ``max_radius_mm``; a presentation state or SR outline is placed on
    its referenced images' geometry (``index``, :mod:`sigreport.rois.annotations`).
    """
    from sigreport.rois.annotations import is_annotation_file, load_annotation_region

    regions: list[Region] = []
    notes: list[QcNote] = []
    for spec in case.rois:
        if spec.shape is RoiShape.SEED:
            radius = spec.max_radius_mm or settings.seed_max_radius_mm
            regions.append(SphereRegion.of(spec.id, spec.center_mm, radius))  # type: ignore[arg-type]
            continue
        modality = _dicom_modality(spec.mask) if spec.mask is not None else None
        if index is not None and spec.mask is not None and is_annotation_file(modality or ""):
            region, texts = load_annotation_region(
                spec.mask, index, roi_id=spec.id, pick=spec.segment
            )
            regions.append(region)
            notes.extend(QcNote(QcLevel.INFO, "annotation", t) for t in texts)
        else:
            regions.append(build_region(spec))
    return regions, notes


def _free_id(wanted: str, taken: set[str]) -> str:
    candidate, n = wanted, 1
    while candidate in taken:
        n += 1
        candidate = f"{wanted}{n}"
    return candidate


def place_roi_forms(
    case: Case,
    regions: Sequence[Region],
    *,
    viewer_keys: Mapping[str, str],
    alignments: Mapping[str, Alignment],
    anchor: Stack,
    anchor_image: sitk.Image,
    settings: RoiSettings,
    max_cv: float,
    min_voxels: int = 1,
) -> PlacedRois:
    """Finish the ROIs in the anchor's space.

    Parameters
    ----------
    case, regions
        The case (``at`` centres still in their series' space, from
        :func:`sigreport.rois.viewer.resolve_viewer_positions`) and :func:`provisional_regions`.
    viewer_keys
        ROI id -> the key of the stack its ``at`` names.
    alignments
        Stack key -> that stack's alignment to the anchor (every key of ``viewer_keys``).
    anchor, anchor_image
        The anchor stack and its image (seeds grow on it; mirror references are checked on it).
    settings
        ``lexicon/rois.toml``.
    max_cv
        The reference homogeneity limit (``thresholds.toml [reference] max_cv``).
    min_voxels
        Fewest anchor voxels a mirror reference must hold.

    Raises
    ------
    sigreport.errors.InputError
        A seed that cannot grow (leak, too small: :class:`sigreport.rois.grow.GrowError`), or a
        rejected mirror reference when the case names no reference ROI to fall back on.
    """
    from sigreport.report.images import safe_name
    from sigreport.rois.export import nifti_bytes, seg_bytes
    from sigreport.rois.grow import grow_from_seed
    from sigreport.rois.laterality import laterality_note
    from sigreport.rois.mirror import estimate_midsagittal_plane, mirror_reference

    qc: list[QcNote] = []
    files: dict[str, bytes] = {}
    case = carry_viewer_positions(case, viewer_keys, alignments)
    out_regions: list[Region] = []
    for number, (spec, region) in enumerate(zip(case.rois, regions, strict=True), start=1):
        if spec.shape is RoiShape.SEED:
            radius = spec.max_radius_mm or settings.seed_max_radius_mm
            grown = grow_from_seed(
                anchor_image,
                spec.center_mm,  # type: ignore[arg-type]
                roi_id=spec.id,
                max_radius_mm=radius,
                seed_radius_mm=settings.seed_radius_mm,
                smoothing_iterations=settings.smoothing_iterations,
                leak_margin_mm=settings.leak_margin_mm,
                min_voxels=settings.seed_min_voxels,
            )
            out_regions.append(replace(grown.region, source_series_uid=anchor.series_instance_uid))
            stem = f"{ROI_FILES_DIR}/{safe_name(spec.id)}"  # file names from sanitized ids
            files[f"{stem}.nii.gz"] = nifti_bytes(grown.mask)
            files[f"{stem}-seg.dcm"] = seg_bytes(
                grown.mask, anchor, roi_id=spec.id, instance_number=number
            )
            qc.append(
                QcNote(
                    QcLevel.INFO,
                    "seed-grown",
                    f"{spec.id}: grown from the seed on the anchor ({grown.n_voxels} voxels, "
                    f"reaching {grown.reach_mm:.1f} of {radius:g} mm; edge half-way between "
                    f"{grown.lesion_level:.4g} and {grown.surround_level:.4g}); review "
                    f"{stem}.nii.gz or {stem}-seg.dcm",
                )
            )
        elif spec.id in viewer_keys:
            out_regions.append(build_region(spec))
        else:
            out_regions.append(region)

    rois = list(case.rois)
    autos = [s for s in rois if s.kind is RoiKind.LESION and s.reference == AUTO_REFERENCE]
    if autos:
        plane = estimate_midsagittal_plane(anchor_image, spacing_mm=settings.mirror_spacing_mm)
        lesion_regions = {
            s.id: r for s, r in zip(rois, out_regions, strict=True) if s.kind is RoiKind.LESION
        }
        named = [s.id for s in rois if s.kind is RoiKind.REFERENCE]
        taken = {s.id for s in rois}
        problems = []
        for lesion in autos:
            new_id = _free_id(f"{lesion.id}-mirror", taken)
            result = mirror_reference(
                lesion,
                lesion_regions[lesion.id],
                plane,
                anchor_image,
                lesion_regions,
                reference_id=new_id,
                max_cv=max_cv,
                min_voxels=min_voxels,
            )
            qc.extend(result.notes)
            index = rois.index(lesion)
            if result.spec is not None and result.region is not None:
                taken.add(new_id)
                rois.append(result.spec)
                out_regions.append(result.region)
                rois[index] = replace(lesion, reference=new_id)
            elif named:
                rois[index] = replace(lesion, reference=named[0])
                qc.append(
                    QcNote(
                        QcLevel.WARNING,
                        "auto-reference-rejected",
                        f"{lesion.id}: normalized by the case file's first reference ROI "
                        f"{named[0]} instead of its rejected mirror",
                    )
                )
            else:
                problems.append(
                    f'{case.path.name}: {lesion.id}: reference = "auto": the mirror position '
                    f"{result.rejected_because}; name a reference ROI for it "
                    '(a [[roi]] with kind = "reference", and reference = "<its id>")'
                )
        if problems:
            raise InputError("\n".join(problems))
    case = replace(case, rois=tuple(rois))

    for spec, region in zip(case.rois, out_regions, strict=True):
        lo, hi = (np.asarray(v, dtype=np.float64) for v in region.bounds_mm())
        if np.all(np.isfinite(lo)) and np.all(np.isfinite(hi)):
            note = laterality_note(
                spec.id,
                spec.site,
                tuple(float(v) for v in (lo + hi) / 2.0),
                midline_margin_mm=settings.midline_margin_mm,
            )
            if note is not None:
                qc.append(note)
    return PlacedRois(case=case, regions=out_regions, qc=qc, files=files)
