"""DICOM output of a synthetic series: classic MR Image Storage (one file per slice) or Enhanced
MR Image Storage (one multi-frame file per series, with shared and per-frame functional groups).

Geometry follows DICOM PS3.3 C.7.6.2 (Image Plane) and, for Enhanced MR, the Pixel Measures,
Plane Orientation and Plane Position functional group macros (PS3.3 C.7.6.16.2.1-3). The
acquisition attributes are those of the MR Image module (PS3.3 C.8.3.1) and, for Enhanced MR,
the MR Pulse Sequence module and the MR functional groups (PS3.3 C.8.13).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from pydicom.dataelem import DataElement
from pydicom.dataset import Dataset, FileMetaDataset
from pydicom.filebase import DicomBytesIO
from pydicom.filewriter import write_data_element, write_file_meta_info
from pydicom.sequence import Sequence as DicomSequence
from pydicom.sr.codedict import codes
from pydicom.uid import (
    PYDICOM_IMPLEMENTATION_UID,
    UID,
    ExplicitVRLittleEndian,
    MRImageStorage,
)

from sigreport import __version__
from sigreport.synth.geometry import SeriesGeometry
from sigreport.synth.scenario import Patient, SeriesPlan, StudyMeta

ENHANCED_MR_IMAGE_STORAGE = "1.2.840.10008.5.1.4.1.1.4.1"
GYROMAGNETIC_MHZ_PER_T = 42.577478  # 1H, CODATA 2018
MANUFACTURER = "sigreport synthetic"


@dataclass(frozen=True)
class StudyHeader:
    patient: Patient
    study: StudyMeta
    study_instance_uid: str
    frame_of_reference_uid: str
    field_strength_t: float
    agent: str  # contrast agent name written on post-contrast series


@dataclass(frozen=True)
class SeriesTiming:
    """When a phase of a dynamic series was acquired (seconds after midnight) and its place in
    the time series (PS3.3 C.7.6.1: AcquisitionTime; C.8.3.1: TemporalPositionIdentifier)."""

    acquisition_s: float
    injection_s: float | None  # ContrastBolusStartTime, post-contrast phases only
    temporal_position: int
    temporal_positions: int


@dataclass(frozen=True)
class SeriesOutput:
    """One series ready to write: stored values ``pixels[slice, row, column]`` (uint16)."""

    plan: SeriesPlan
    ti_ms: float | None
    geometry: SeriesGeometry
    pixels: np.ndarray
    slope: float
    intercept: float
    series_instance_uid: str
    sop_instance_uids: tuple[str, ...]  # one per slice (classic) or one (enhanced)
    description: str
    b_value: float | None = None  # a diffusion-weighted image set
    first_instance: int = 0  # instances already written to the series (further b-values)
    timing: SeriesTiming | None = None  # a phase of a dynamic series


def _clock(seconds: float) -> str:
    """A TM value (PS3.5 6.2) for ``seconds`` after midnight."""
    whole = int(seconds) % 86400
    return f"{whole // 3600:02d}{whole // 60 % 60:02d}{whole % 60:02d}"


def _image_type(plan: SeriesPlan) -> list[str]:
    """ImageType (PS3.3 C.7.6.1.1.2; C.8.3.1.1.1 for MR): value 3 names what the image is for
    the images that are more than a plain magnitude (diffusion, maps, Dixon, SWI)."""
    if plan.localizer:
        return ["ORIGINAL", "PRIMARY", "LOCALIZER"]
    if plan.sequence == "DWI":
        return ["ORIGINAL", "PRIMARY", "DIFFUSION", "TRACEW"]
    if plan.sequence == "ADC":
        return ["DERIVED", "PRIMARY", "DIFFUSION", "ADC"]
    if plan.sequence == "DIXON":
        return ["DERIVED", "PRIMARY", "DIXON", "WATER" if plan.dixon == "water" else "FAT"]
    if plan.te_keyword is not None:
        return [
            "ORIGINAL",
            "PRIMARY",
            "M",
            "IN_PHASE" if plan.te_keyword == "in-phase" else "OUT_PHASE",
        ]
    if plan.role.value == "SWI":
        return ["ORIGINAL", "PRIMARY", "M", "SWI"]
    return ["ORIGINAL", "PRIMARY", "OTHER"]


def _ds(value: float) -> str:
    """A DS string of at most 16 characters (PS3.5 6.2)."""
    for digits in range(10, 4, -1):
        text = f"{value:.{digits}g}"
        if len(text) <= 16:
            return text
    return f"{value:.4e}"


def _scanning(plan: SeriesPlan) -> tuple[list[str], list[str], list[str], str]:
    """ScanningSequence, SequenceVariant, ScanOptions, SequenceName (PS3.3 C.8.3.1.1)."""
    options = ["FS"] if plan.fat_sat else []
    dim = plan.acquisition.lower()
    if plan.sequence == "SE":
        return ["SE"], ["SK", "SP"], options, f"se{dim}"
    if plan.sequence == "TSE":
        return ["SE"], ["SK", "SP"], options, f"tse{dim}_{plan.echo_train}"
    if plan.sequence == "IR":
        return ["SE", "IR"], ["SK", "SP", "MP"], options, f"irtse{dim}_{plan.echo_train}"
    if plan.sequence in ("DWI", "ADC"):
        return ["SE", "EP"], ["SK", "SP"], options, f"ep{dim}_diff"
    return ["GR"], ["SK", "SP"], options, f"gre{dim}_spoiled"


def _flip(plan: SeriesPlan) -> float:
    if plan.flip_deg is not None:
        return plan.flip_deg
    return 150.0 if plan.sequence in ("TSE", "IR") else 90.0


def _common(header: StudyHeader, out: SeriesOutput, sop_class: str) -> Dataset:
    plan, p, s = out.plan, header.patient, header.study
    ds = Dataset()
    ds.SpecificCharacterSet = "ISO_IR 100"
    ds.SOPClassUID = sop_class
    ds.StudyDate = ds.SeriesDate = ds.AcquisitionDate = ds.ContentDate = s.date
    # Each series starts a few minutes after the previous one (by series number).
    hh, mm, ss = int(s.time[0:2]), int(s.time[2:4]), int(s.time[4:6] or 0)
    start = (hh * 3600 + mm * 60 + ss + 240 * plan.number) % 86400
    series_time = f"{start // 3600:02d}{start // 60 % 60:02d}{start % 60:02d}"
    ds.StudyTime = s.time
    ds.SeriesTime = ds.AcquisitionTime = ds.ContentTime = series_time
    if out.timing is not None:
        ds.AcquisitionTime = ds.ContentTime = _clock(out.timing.acquisition_s)
        ds.TemporalPositionIdentifier = out.timing.temporal_position
        ds.NumberOfTemporalPositions = out.timing.temporal_positions
        if out.timing.injection_s is not None:
            ds.ContrastBolusStartTime = _clock(out.timing.injection_s)
    ds.AccessionNumber = s.accession
    ds.Modality = "MR"
    ds.Manufacturer = MANUFACTURER
    ds.ManufacturerModelName = "phantom"
    ds.DeviceSerialNumber = "0"
    ds.SoftwareVersions = __version__
    ds.InstitutionName = "Synthetic"
    ds.ReferringPhysicianName = s.referring_physician
    ds.StudyDescription = s.description
    ds.SeriesDescription = out.description
    ds.ProtocolName = out.description
    ds.PatientName = p.name
    ds.PatientID = p.id
    ds.PatientBirthDate = p.birth_date
    ds.PatientSex = p.sex
    ds.BodyPartExamined = "HEAD"
    ds.PatientPosition = "HFS"
    ds.StudyInstanceUID = header.study_instance_uid
    ds.SeriesInstanceUID = out.series_instance_uid
    ds.StudyID = "1"
    ds.SeriesNumber = plan.number
    ds.AcquisitionNumber = 1
    ds.FrameOfReferenceUID = header.frame_of_reference_uid
    ds.PositionReferenceIndicator = ""
    ds.MagneticFieldStrength = _ds(header.field_strength_t)
    ds.SamplesPerPixel = 1
    ds.PhotometricInterpretation = "MONOCHROME2"
    ds.Rows = out.geometry.size[1]
    ds.Columns = out.geometry.size[0]
    ds.BitsAllocated = 16
    ds.BitsStored = 16
    ds.HighBit = 15
    ds.PixelRepresentation = 0
    return ds


def _file_meta(sop_class: str, sop_instance: str) -> FileMetaDataset:
    meta = FileMetaDataset()
    meta.MediaStorageSOPClassUID = UID(sop_class)
    meta.MediaStorageSOPInstanceUID = UID(sop_instance)
    meta.TransferSyntaxUID = ExplicitVRLittleEndian
    meta.ImplementationClassUID = PYDICOM_IMPLEMENTATION_UID
    return meta


def _window(out: SeriesOutput) -> tuple[float, float]:
    values = out.pixels.astype(np.float64) * out.slope + out.intercept
    lo, hi = np.percentile(values, [1, 99.5])
    return (lo + hi) / 2, max(hi - lo, 1.0)


def write_classic(header: StudyHeader, out: SeriesOutput, folder: Path) -> list[Path]:
    """Write one MR Image Storage file per slice (explicit VR little endian) into ``folder``."""
    plan, geo = out.plan, out.geometry
    folder.mkdir(parents=True, exist_ok=True)
    scanning, variant, options, name = _scanning(plan)
    center, width = _window(out)
    template = _common(header, out, MRImageStorage)
    template.ImageType = _image_type(plan)
    if out.b_value is not None:
        template.DiffusionBValue = float(out.b_value)  # (0018,9087) FD, read by ingest
    template.ScanningSequence = scanning
    template.SequenceVariant = variant
    if options:
        template.ScanOptions = options
    else:
        template.ScanOptions = ""
    template.MRAcquisitionType = plan.acquisition
    template.SequenceName = name
    template.AngioFlag = "N"
    template.SliceThickness = _ds(geo.slice_thickness)
    template.SpacingBetweenSlices = _ds(geo.spacing[2])
    template.RepetitionTime = _ds(plan.tr_ms)
    template.EchoTime = _ds(plan.te_ms)
    if out.ti_ms is not None:
        template.InversionTime = _ds(round(out.ti_ms, 1))
    template.NumberOfAverages = "1"
    template.ImagingFrequency = _ds(GYROMAGNETIC_MHZ_PER_T * header.field_strength_t)
    template.ImagedNucleus = "1H"
    template.EchoNumbers = "1"
    template.EchoTrainLength = plan.echo_train
    template.PercentSampling = "100"
    template.PercentPhaseFieldOfView = "100"
    template.PixelBandwidth = "200"
    template.AcquisitionMatrix = [0, geo.size[0], geo.size[1], 0]
    template.InPlanePhaseEncodingDirection = "ROW"
    template.FlipAngle = _ds(_flip(plan))
    template.VariableFlipAngleFlag = "N"
    if plan.contrast:
        template.ContrastBolusAgent = header.agent
        template.ContrastBolusRoute = "IV"
        template.ContrastBolusVolume = "15"
    template.ImageOrientationPatient = [_ds(v) for v in (*geo.row, *geo.column)]
    template.PixelSpacing = [_ds(geo.spacing[1]), _ds(geo.spacing[0])]
    template.WindowCenter = _ds(center)
    template.WindowWidth = _ds(width)
    template.RescaleIntercept = _ds(out.intercept)
    template.RescaleSlope = _ds(out.slope)
    template.RescaleType = "US"
    varying = {0x00080018, 0x00200013, 0x00200032, 0x00201041, 0x7FE00010}
    shared = {tag: _encode(template[tag]) for tag in template.keys() if tag not in varying}
    paths = []
    for k in range(geo.size[2]):
        ds = Dataset()
        ds.SOPInstanceUID = out.sop_instance_uids[k]
        ds.InstanceNumber = out.first_instance + k + 1
        pos = geo.slice_position(k)
        ds.ImagePositionPatient = [_ds(v) for v in pos]
        ds.SliceLocation = _ds(float(np.dot(pos, geo.normal)))
        ds.add_new(0x7FE00010, "OW", np.ascontiguousarray(out.pixels[k], dtype="<u2").tobytes())
        chunks = dict(shared)
        chunks.update({tag: _encode(ds[tag]) for tag in ds.keys()})
        meta = DicomBytesIO()
        meta.is_little_endian, meta.is_implicit_VR = True, False
        write_file_meta_info(meta, _file_meta(MRImageStorage, ds.SOPInstanceUID))
        path = folder / f"IM{out.first_instance + k + 1:04d}.dcm"
        # Elements in ascending tag order (PS3.5 7.1); the shared ones are encoded once.
        body = b"".join(chunks[tag] for tag in sorted(chunks))
        path.write_bytes(b"\0" * 128 + b"DICM" + meta.getvalue() + body)
        paths.append(path)
    return paths


def _encode(elem: DataElement) -> bytes:
    """One data element in explicit VR little endian."""
    fp = DicomBytesIO()
    fp.is_little_endian, fp.is_implicit_VR = True, False
    write_data_element(fp, elem)
    return fp.getvalue()


def _item(**attrs: object) -> Dataset:
    ds = Dataset()
    for key, value in attrs.items():
        setattr(ds, key, value)
    return ds


def _code(code: object) -> Dataset:
    return _item(
        CodeValue=code.value,  # type: ignore[attr-defined]
        CodingSchemeDesignator=code.scheme_designator,  # type: ignore[attr-defined]
        CodeMeaning=code.meaning,  # type: ignore[attr-defined]
    )


def _acquisition_contrast(plan: SeriesPlan, ti_ms: float | None) -> str:
    """AcquisitionContrast (PS3.3 C.8.13.1.1.1) of the series."""
    if plan.sequence == "IR":
        # Short-TI inversion nulls fat (STIR); a long TI nulls fluid (FLAIR); common practice.
        return "STIR" if ti_ms is not None and ti_ms < 400 else "FLUID_ATTENUATED"
    if plan.sequence in ("DWI", "ADC"):
        return "DIFFUSION"
    if plan.sequence == "GRE" or plan.tr_ms < 1000:
        return "T1"
    return "T2"


def _enhanced_image_type(plan: SeriesPlan) -> list[str]:
    """ImageType / FrameType of Enhanced MR (PS3.3 C.8.13.1.1.1): value 3 is the image flavor."""
    flavor = _image_type(plan)
    if plan.localizer:
        return ["ORIGINAL", "PRIMARY", "LOCALIZER", "NONE"]
    if len(flavor) == 4 and flavor[2] != "OTHER":  # e.g. DIFFUSION ADC, DIXON WATER, M SWI
        return flavor[:2] + ([flavor[2], flavor[3]] if flavor[2] != "M" else ["VOLUME", flavor[3]])
    return [flavor[0], flavor[1], "VOLUME", "NONE"]


def write_enhanced(header: StudyHeader, out: SeriesOutput, path: Path) -> Path:
    """Write the series as one Enhanced MR Image Storage multi-frame file."""
    plan, geo = out.plan, out.geometry
    path.parent.mkdir(parents=True, exist_ok=True)
    ds = _common(header, out, ENHANCED_MR_IMAGE_STORAGE)
    ds.SOPInstanceUID = out.sop_instance_uids[0]
    ds.InstanceNumber = out.first_instance + 1
    ds.ContentQualification = "PRODUCT"
    ds.AcquisitionDateTime = f"{header.study.date}{ds.AcquisitionTime}"
    # Enhanced MR Image module (PS3.3 C.8.13.1)
    ds.ImageType = _enhanced_image_type(plan)
    ds.PixelPresentation = "MONOCHROME"
    ds.VolumetricProperties = "VOLUME"
    ds.VolumeBasedCalculationTechnique = "NONE"
    ds.ComplexImageComponent = "MAGNITUDE"
    ds.AcquisitionContrast = _acquisition_contrast(plan, out.ti_ms)
    ds.ResonantNucleus = "1H"
    ds.KSpaceFiltering = "NONE"
    ds.ImagingFrequency = GYROMAGNETIC_MHZ_PER_T * header.field_strength_t
    ds.BurnedInAnnotation = "NO"
    ds.LossyImageCompression = "00"
    ds.PresentationLUTShape = "IDENTITY"
    # MR Pulse Sequence module (PS3.3 C.8.13.4)
    _, _, _, name = _scanning(plan)
    ds.PulseSequenceName = name
    ds.MRAcquisitionType = plan.acquisition
    ds.EchoPulseSequence = "GRADIENT" if plan.sequence == "GRE" else "SPIN"
    ds.MultipleSpinEcho = "YES" if plan.echo_train > 1 else "NO"
    ds.MultiPlanarExcitation = "YES" if plan.acquisition == "2D" else "NO"
    ds.PhaseContrast = "NO"
    ds.TimeOfFlightContrast = "NO"
    ds.Spoiling = "RF_AND_GRADIENT" if plan.sequence == "GRE" else "NONE"
    ds.SteadyStatePulseSequence = "NONE"
    ds.EchoPlanarPulseSequence = "YES" if plan.sequence in ("DWI", "ADC") else "NO"
    ds.SaturationRecovery = "NO"
    ds.SpectrallySelectedSuppression = "FAT" if plan.fat_sat else "NONE"
    ds.OversamplingPhase = "NONE"
    ds.GeometryOfKSpaceTraversal = "RECTILINEAR"
    ds.SegmentedKSpaceTraversal = "PARTIAL" if plan.echo_train > 1 else "SINGLE"
    ds.RectilinearPhaseEncodeReordering = "LINEAR"
    ds.NumberOfKSpaceTrajectories = 1
    ds.CoverageOfKSpace = "FULL"
    # Acquisition Context module: type 2, empty
    ds.AcquisitionContextSequence = DicomSequence([])
    # Enhanced Contrast/Bolus module (PS3.3 C.7.4.2), post-contrast series only
    if plan.contrast:
        agent = _item(ContrastBolusAgentNumber=1, ContrastBolusVolume=15.0)
        agent.ContrastBolusAgentSequence = DicomSequence([_code(codes.SCT.Gadobutrol)])
        agent.ContrastBolusAdministrationRouteSequence = DicomSequence(
            [_code(codes.SCT.IntravenousRoute)]
        )
        agent.ContrastBolusIngredientCodeSequence = DicomSequence([_code(codes.SCT.Gadolinium)])
        agent.ContrastBolusIngredientConcentration = 604.72  # mg/mL of gadobutrol 1.0 M
        ds.ContrastBolusAgentSequence = DicomSequence([agent])
        ds.ContrastBolusAgent = header.agent
    # Multi-frame Dimension module (PS3.3 C.7.6.17): stack, position in stack
    dim_uid = out.series_instance_uid + ".1" if len(out.series_instance_uid) < 62 else ""
    ds.DimensionOrganizationSequence = DicomSequence(
        [_item(DimensionOrganizationUID=dim_uid or out.sop_instance_uids[0])]
    )
    ds.DimensionOrganizationType = "3D"
    ds.DimensionIndexSequence = DicomSequence(
        [
            _item(
                DimensionOrganizationUID=dim_uid or out.sop_instance_uids[0],
                DimensionIndexPointer=0x00209056,  # StackID
                FunctionalGroupPointer=0x00209111,  # FrameContentSequence
                DimensionDescriptionLabel="Stack ID",
            ),
            _item(
                DimensionOrganizationUID=dim_uid or out.sop_instance_uids[0],
                DimensionIndexPointer=0x00209057,  # InStackPositionNumber
                FunctionalGroupPointer=0x00209111,
                DimensionDescriptionLabel="In-Stack Position Number",
            ),
        ]
    )
    # Shared functional groups
    shared = Dataset()
    shared.PixelMeasuresSequence = DicomSequence(
        [
            _item(
                PixelSpacing=[geo.spacing[1], geo.spacing[0]],
                SliceThickness=geo.slice_thickness,
                SpacingBetweenSlices=geo.spacing[2],
            )
        ]
    )
    shared.PlaneOrientationSequence = DicomSequence(
        [_item(ImageOrientationPatient=[round(v, 8) for v in (*geo.row, *geo.column)])]
    )
    shared.PixelValueTransformationSequence = DicomSequence(
        [_item(RescaleIntercept=out.intercept, RescaleSlope=out.slope, RescaleType="US")]
    )
    center, width = _window(out)
    shared.FrameVOILUTSequence = DicomSequence(
        [_item(WindowCenter=round(center, 3), WindowWidth=round(width, 3))]
    )
    shared.MRImageFrameTypeSequence = DicomSequence(
        [
            _item(
                FrameType=_enhanced_image_type(plan),
                PixelPresentation="MONOCHROME",
                VolumetricProperties="VOLUME",
                VolumeBasedCalculationTechnique="NONE",
                ComplexImageComponent="MAGNITUDE",
                AcquisitionContrast=_acquisition_contrast(plan, out.ti_ms),
            )
        ]
    )
    shared.MRTimingAndRelatedParametersSequence = DicomSequence(
        [
            _item(
                RepetitionTime=plan.tr_ms,
                FlipAngle=_flip(plan),
                EchoTrainLength=plan.echo_train,
                RFEchoTrainLength=plan.echo_train if plan.sequence != "GRE" else 0,
                GradientEchoTrainLength=1 if plan.sequence == "GRE" else 0,
                OperatingModeSequence=DicomSequence([]),
                SpecificAbsorptionRateSequence=DicomSequence([]),
            )
        ]
    )
    shared.MREchoSequence = DicomSequence([_item(EffectiveEchoTime=plan.te_ms)])
    modifier = _item(
        InversionRecovery="YES" if out.ti_ms is not None else "NO",
        FlowCompensation="NONE",
        T2Preparation="NO",
        SpatialPresaturation="NONE",
        PartialFourier="NO",
    )
    if out.ti_ms is not None:
        modifier.InversionTimes = [round(out.ti_ms, 1)]
    shared.MRModifierSequence = DicomSequence([modifier])
    shared.MRImagingModifierSequence = DicomSequence(
        [
            _item(
                MagnetizationTransfer="NONE",
                BloodSignalNulling="NO",
                Tagging="NONE",
                TransmitterFrequency=GYROMAGNETIC_MHZ_PER_T * header.field_strength_t,
                PixelBandwidth=200.0,
            )
        ]
    )
    shared.MRFOVGeometrySequence = DicomSequence(
        [
            _item(
                InPlanePhaseEncodingDirection="ROW",
                MRAcquisitionFrequencyEncodingSteps=geo.size[1],
                MRAcquisitionPhaseEncodingStepsInPlane=geo.size[0],
                PercentSampling=100.0,
                PercentPhaseFieldOfView=100.0,
            )
        ]
    )
    shared.MRAveragesSequence = DicomSequence([_item(NumberOfAverages=1.0)])
    if out.b_value is not None:  # MR Diffusion macro (PS3.3 C.8.13.5.9)
        shared.MRDiffusionSequence = DicomSequence(
            [_item(DiffusionBValue=out.b_value, DiffusionDirectionality="ISOTROPIC")]
        )
    if plan.contrast:
        shared.ContrastBolusUsageSequence = DicomSequence(
            [
                _item(
                    ContrastBolusAgentNumber=1,
                    ContrastBolusAgentAdministered="YES",
                    ContrastBolusAgentDetected="YES",
                )
            ]
        )
    ds.SharedFunctionalGroupsSequence = DicomSequence([shared])
    # Per-frame functional groups: position and dimension indices
    frames = []
    for k in range(geo.size[2]):
        item = Dataset()
        item.FrameContentSequence = DicomSequence(
            [
                _item(
                    StackID="1",
                    InStackPositionNumber=k + 1,
                    DimensionIndexValues=[1, k + 1],
                    FrameAcquisitionDateTime=ds.AcquisitionDateTime,
                    FrameReferenceDateTime=ds.AcquisitionDateTime,
                    FrameAcquisitionDuration=1000.0,
                )
            ]
        )
        item.PlanePositionSequence = DicomSequence(
            [_item(ImagePositionPatient=[round(v, 6) for v in geo.slice_position(k)])]
        )
        frames.append(item)
    ds.PerFrameFunctionalGroupsSequence = DicomSequence(frames)
    ds.NumberOfFrames = geo.size[2]
    ds.PixelData = np.ascontiguousarray(out.pixels, dtype="<u2").tobytes()
    ds.file_meta = _file_meta(ENHANCED_MR_IMAGE_STORAGE, ds.SOPInstanceUID)
    ds.save_as(path, enforce_file_format=True)
    return path


def instance_count(plan_size: Sequence[int], enhanced: bool) -> int:
    """How many SOP instances a series of ``plan_size`` (columns, rows, slices) writes."""
    return 1 if enhanced else int(plan_size[2])
