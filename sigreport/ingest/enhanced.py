"""Enhanced MR (multi-frame) headers: functional groups into per-frame records.

PS3.3 C.7.6.16 (Multi-frame Functional Groups): each functional group macro sits either in the
Shared Functional Groups Sequence (one item, valid for every frame) or in each item of the
Per-frame Functional Groups Sequence. A macro present in both is invalid; we use the per-frame
copy and record a warning on the stack (documented in docs/ingestion.md).

Macros read (PS3.3 C.7.6.16.2 and C.8.13.5): Pixel Measures, Plane Position (Patient), Plane
Orientation (Patient), Frame Content, MR Timing and Related Parameters, MR Echo, MR Modifier,
MR FOV/Geometry, MR Image Frame Type, Contrast/Bolus Usage, MR Diffusion, Frame Anatomy, Pixel
Value Transformation and Real World Value Mapping.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from pydicom.dataset import Dataset

from sigreport.ingest import checks
from sigreport.ingest.attributes import (
    FrameRecord,
    Scaling,
    SkipFile,
    _first_item,
    _float,
    _floats,
    _get,
    _int,
    _str,
    _strs,
    check_orientation,
    classic_acquisition,
    common_fields,
    philips_fp_scaling,
    philips_scale,
    private_value,
    rwvm_scaling,
    seconds_of_day,
    vendor_inversion_time,
)
from sigreport.model import Acquisition

GROUPS = (
    "PixelMeasuresSequence",
    "PlanePositionSequence",
    "PlaneOrientationSequence",
    "FrameContentSequence",
    "MRTimingAndRelatedParametersSequence",
    "MREchoSequence",
    "MRModifierSequence",
    "MRFOVGeometrySequence",
    "MRImageFrameTypeSequence",
    "ContrastBolusUsageSequence",
    "MRDiffusionSequence",
    "FrameAnatomySequence",
    "PixelValueTransformationSequence",
    "RealWorldValueMappingSequence",
)


class FunctionalGroups:
    """Look up a functional group macro of one frame, per-frame copy first."""

    def __init__(self, ds: Dataset) -> None:
        self.shared = _first_item(ds, "SharedFunctionalGroupsSequence") or Dataset()
        per_frame = _get(ds, "PerFrameFunctionalGroupsSequence")
        self.per_frame = list(per_frame) if per_frame is not None else []
        self.conflicts: set[str] = set()

    def item(self, frame_index: int, keyword: str) -> Dataset | None:
        own = (
            _first_item(self.per_frame[frame_index], keyword)
            if frame_index < len(self.per_frame)
            else None
        )
        shared = _first_item(self.shared, keyword)
        if own is not None and shared is not None:
            self.conflicts.add(keyword)
        return own if own is not None else shared

    def sequence(self, frame_index: int, keyword: str) -> list[Dataset]:
        if frame_index < len(self.per_frame):
            own = _get(self.per_frame[frame_index], keyword)
            if own is not None:
                return list(own)
        shared = _get(self.shared, keyword)
        return list(shared) if shared is not None else []

    def warnings(self) -> tuple[str, ...]:
        return tuple(
            f"{kw} is in both the shared and the per-frame functional groups (invalid, "
            f"PS3.3 C.7.6.16); per-frame values used"
            for kw in sorted(self.conflicts)
        )


def philips_frame_item(groups: FunctionalGroups, index: int) -> Dataset | None:
    """One vendor's per-frame private item: the first item of (2005,xx0F) of "Philips MR
    Imaging DD 005" in the frame's Per-frame Functional Groups item (a sequence in pydicom's
    private dictionary; the vendor keeps each frame's classic attributes and its private scale
    there, as nibabel's ``philips_mprage.dcm.gz`` shows), else None."""
    if index >= len(groups.per_frame):
        return None
    seq = private_value(groups.per_frame[index], 0x2005, "Philips MR Imaging DD 005", 0x0F)
    try:
        item = seq[0] if seq is not None and len(seq) > 0 else None
    except TypeError:
        return None
    return item if isinstance(item, Dataset) else None


def frame_scaling(groups: FunctionalGroups, index: int, ds: Dataset) -> Scaling:
    """Real World Value Mapping first, then Pixel Value Transformation, then top-level rescale
    (PS3.3 C.7.6.16.2.9 and C.7.6.16.2.11); the vendor's floating-point scaling over the
    rescale when the frame carries the Philips private scale slope (per-frame private item,
    the Per-frame Functional Groups item itself, or the top level; ``philips_fp_scaling``)."""
    for item in groups.sequence(index, "RealWorldValueMappingSequence"):
        mapped = rwvm_scaling(item)
        if mapped is not None:
            return mapped
    pvt = groups.item(index, "PixelValueTransformationSequence")
    source = pvt if pvt is not None else ds
    slope, intercept = _float(source, "RescaleSlope"), _float(source, "RescaleIntercept")
    display = Scaling()
    if slope is not None or intercept is not None:
        display = Scaling(
            slope=1.0 if slope is None else slope,
            intercept=0.0 if intercept is None else intercept,
            source="pixel value transformation" if pvt is not None else "rescale",
        )
    private = philips_frame_item(groups, index)
    frame = groups.per_frame[index] if index < len(groups.per_frame) else None
    for holder in (private, frame, ds):
        if holder is None:
            continue
        scale, scale_intercept = philips_scale(holder)
        if scale is not None:
            return philips_fp_scaling(display, scale, scale_intercept)
    return display


def _contrast(ds: Dataset, groups: FunctionalGroups, index: int) -> str | None:
    """The agent when the frame's Contrast/Bolus Usage says it was administered (PS3.3
    C.7.6.16.2.12 and the Enhanced Contrast/Bolus Module C.7.6.4b)."""
    usages = groups.sequence(index, "ContrastBolusUsageSequence")
    agents = {}
    for agent in _get(ds, "ContrastBolusAgentSequence") or []:
        name = _str(agent, "CodeMeaning") or _str(agent, "CodeValue") or "contrast agent"
        agents[_int(agent, "ContrastBolusAgentNumber")] = name
    for usage in usages:
        if (_str(usage, "ContrastBolusAgentAdministered") or "").upper() == "YES":
            number = _int(usage, "ContrastBolusAgentNumber")
            return agents.get(number) or next(iter(agents.values()), "contrast agent")
    if usages:
        return None
    return _str(ds, "ContrastBolusAgent")


def frame_acquisition(ds: Dataset, groups: FunctionalGroups, index: int) -> Acquisition:
    """Acquisition of one frame: per-frame MR macros over the image-level attributes.

    Enhanced MR has no ScanningSequence/SequenceVariant; they are derived from the MR Pulse
    Sequence Module (C.8.13.4): EchoPulseSequence SPIN -> SE, GRADIENT -> GR, BOTH -> SE+GR;
    EchoPlanarPulseSequence YES -> EP; InversionRecovery YES -> IR; Spoiling -> SP;
    SteadyStatePulseSequence -> SS (TIME_REVERSED -> TRSS).
    """
    base = classic_acquisition(ds)  # Legacy Converted Enhanced MR keeps classic attributes
    timing = groups.item(index, "MRTimingAndRelatedParametersSequence") or Dataset()
    echo = groups.item(index, "MREchoSequence") or Dataset()
    modifier = groups.item(index, "MRModifierSequence") or Dataset()
    diffusion = groups.item(index, "MRDiffusionSequence") or Dataset()
    frame_type = groups.item(index, "MRImageFrameTypeSequence") or Dataset()
    content = groups.item(index, "FrameContentSequence") or Dataset()
    measures = groups.item(index, "PixelMeasuresSequence") or Dataset()

    inversion_flag = _str(modifier, "InversionRecovery") or _str(ds, "InversionRecovery")
    inversion = None if inversion_flag is None else inversion_flag.upper() == "YES"
    pulse = (_str(ds, "EchoPulseSequence") or "").upper() or None
    seq = list(base.scanning_sequence)
    if not seq:
        seq = {"SPIN": ["SE"], "GRADIENT": ["GR"], "BOTH": ["SE", "GR"]}.get(pulse or "", [])
        if (_str(ds, "EchoPlanarPulseSequence") or "").upper() == "YES":
            seq.append("EP")
        if inversion:
            seq.append("IR")
    variant = list(base.sequence_variant)
    if not variant:
        if (_str(ds, "Spoiling") or "NONE").upper() != "NONE":
            variant.append("SP")
        steady = (_str(ds, "SteadyStatePulseSequence") or "NONE").upper()
        if steady == "TIME_REVERSED":
            variant.append("TRSS")
        elif steady != "NONE":
            variant.append("SS")
    suppression = _str(modifier, "SpectrallySelectedSuppression") or _str(
        ds, "SpectrallySelectedSuppression"
    )
    image_type = _strs(frame_type, "FrameType") or base.image_type
    # InversionTimes (0018,9079): MR Modifier macro; some writers put it in MR Timing.
    ti = _float(modifier, "InversionTimes")
    if ti is None:
        ti = _float(timing, "InversionTimes")
    ti_source = None if ti is not None else base.inversion_time_source
    if ti is None and base.inversion_time_ms is None:
        # The vendor's per-frame private item (classic InversionTime, or its private TI).
        private = philips_frame_item(groups, index)
        if private is not None:
            ti = _float(private, "InversionTime")
            if ti is not None and ti <= 0:
                ti = None  # this vendor writes 0 for "no inversion"
            if ti is not None:
                ti_source = "InversionTime in the private per-frame item (2005,xx0F)"
            else:
                found = vendor_inversion_time(private)
                if found is not None:
                    ti, ti_source = found
    b_value = _float(diffusion, "DiffusionBValue")
    standard = _frame_standard_fields(ds, base, frame_type, modifier, diffusion, content)
    return Acquisition(
        repetition_time_ms=_float(timing, "RepetitionTime") or base.repetition_time_ms,
        echo_time_ms=_float(echo, "EffectiveEchoTime") or base.echo_time_ms,
        echo_times_in_image_ms=()
        if _float(echo, "EffectiveEchoTime")
        else base.echo_times_in_image_ms,
        inversion_time_ms=ti if ti is not None else base.inversion_time_ms,
        inversion_time_source=ti_source,
        flip_angle_deg=_float(timing, "FlipAngle") or base.flip_angle_deg,
        scanning_sequence=tuple(seq),
        sequence_variant=tuple(variant),
        scan_options=base.scan_options,
        sequence_name=_str(ds, "PulseSequenceName") or base.sequence_name,
        mr_acquisition_type=base.mr_acquisition_type,
        magnetic_field_strength_t=base.magnetic_field_strength_t,
        contrast_agent=_contrast(ds, groups, index),
        image_type=image_type,
        b_value=b_value if b_value is not None else base.b_value,
        spectrally_selected_suppression=suppression.upper() if suppression else None,
        inversion_recovery=inversion,
        echo_pulse_sequence=pulse,
        slice_thickness_mm=_float(measures, "SliceThickness") or base.slice_thickness_mm,
        echo_number=None,  # assigned per distinct echo time when stacks are built
        temporal_position=_int(content, "TemporalPositionIndex") or base.temporal_position,
        **standard,
    )


def _frame_standard_fields(
    ds: Dataset,
    base: Acquisition,
    frame_type: Dataset,
    modifier: Dataset,
    diffusion: Dataset,
    content: Dataset,
) -> dict[str, Any]:
    """The Enhanced MR attributes that say what a frame is, per frame over the image level:
    AcquisitionContrast and ComplexImageComponent (MR Image Frame Type, PS3.3 C.8.13.5.1),
    SpectrallySelectedExcitation (MR Modifier, C.8.13.5.6, or the MR Pulse Sequence module),
    DiffusionDirectionality (MR Diffusion, C.8.13.5.9) and FrameAcquisitionDateTime (Frame
    Content, C.7.6.16.2.2)."""

    def upper(item: Dataset, keyword: str, fallback: str | None) -> str | None:
        value = _str(item, keyword)
        return value.strip().upper() if value and value.strip() else fallback

    frame_time = seconds_of_day(_str(content, "FrameAcquisitionDateTime"))
    return {
        "acquisition_contrast": upper(frame_type, "AcquisitionContrast", base.acquisition_contrast),
        "complex_image_component": upper(
            frame_type, "ComplexImageComponent", base.complex_image_component
        ),
        "spectrally_selected_excitation": upper(
            modifier, "SpectrallySelectedExcitation", base.spectrally_selected_excitation
        ),
        "diffusion_directionality": upper(
            diffusion, "DiffusionDirectionality", base.diffusion_directionality
        ),
        "acquisition_time_s": frame_time if frame_time is not None else base.acquisition_time_s,
        "contrast_start_time_s": base.contrast_start_time_s,
    }


def enhanced_frames(
    path: Path, ds: Dataset, sop_uid: str, sop_class: str, series_uid: str
) -> list[FrameRecord]:
    """Frame records of an Enhanced (or Legacy Converted Enhanced) MR image."""
    rows, columns = _int(ds, "Rows"), _int(ds, "Columns")
    if not rows or not columns:
        raise SkipFile("missing Rows (0028,0010) or Columns (0028,0011)")
    n_frames = _int(ds, "NumberOfFrames") or 1
    groups = FunctionalGroups(ds)
    if groups.per_frame and len(groups.per_frame) != n_frames:
        raise SkipFile(
            f"PerFrameFunctionalGroupsSequence has {len(groups.per_frame)} items for "
            f"NumberOfFrames {n_frames}"
        )
    common = common_fields(ds, series_uid)
    records = []
    for i in range(n_frames):
        pos_item = groups.item(i, "PlanePositionSequence")
        ori_item = groups.item(i, "PlaneOrientationSequence")
        pm_item = groups.item(i, "PixelMeasuresSequence")
        position = _floats(pos_item, "ImagePositionPatient", 3) if pos_item else None
        orientation = _floats(ori_item, "ImageOrientationPatient", 6) if ori_item else None
        spacing = _floats(pm_item, "PixelSpacing", 2) if pm_item else None
        missing = [
            name
            for name, value in (
                ("Plane Position (ImagePositionPatient)", position),
                ("Plane Orientation (ImageOrientationPatient)", orientation),
                ("Pixel Measures (PixelSpacing)", spacing),
            )
            if value is None
        ]
        if missing:
            raise SkipFile(f"frame {i + 1} without geometry: missing {', '.join(missing)}")
        assert position is not None and orientation is not None and spacing is not None
        assert pm_item is not None
        bad = checks.geometry_reason(
            position=position,
            orientation=orientation,
            spacing=spacing,
            slice_thickness=_float(pm_item, "SliceThickness"),
            spacing_between_slices=_float(pm_item, "SpacingBetweenSlices"),
            where=f"frame {i + 1}: ",
        )
        if bad is not None:
            raise SkipFile(bad)
        check_orientation(orientation)
        scaling = frame_scaling(groups, i, ds)
        bad = checks.scaling_reason(scaling.slope, scaling.intercept, scaling.lut)
        if bad is not None:
            raise SkipFile(f"frame {i + 1}: {bad}")
        content = groups.item(i, "FrameContentSequence") or Dataset()
        records.append(
            FrameRecord(
                path=path,
                frame=i + 1,
                sop_instance_uid=sop_uid,
                sop_class_uid=sop_class,
                rows=rows,
                columns=columns,
                position=position,  # type: ignore[arg-type]
                orientation=orientation,  # type: ignore[arg-type]
                pixel_spacing=spacing,  # type: ignore[arg-type]
                acquisition=frame_acquisition(ds, groups, i),
                scaling=scaling,
                stack_id=_str(content, "StackID"),
                in_stack_position=_int(content, "InStackPositionNumber"),
                spacing_between_slices=(
                    _float(pm_item, "SpacingBetweenSlices") if pm_item is not None else None
                ),
                **common,
            )
        )
    warnings = groups.warnings()
    if warnings:
        records = [_with_warnings(r, warnings) for r in records]
    return records


def _with_warnings(record: FrameRecord, warnings: tuple[str, ...]) -> FrameRecord:
    from dataclasses import replace

    return replace(record, warnings=record.warnings + warnings)
