"""Synthetic headers in each vendor's style, for what no shipped real file covers.

Mosaics with a CSA header that nibabel parses (checked against nibabel's MosaicWrapper and the
volume written), localizer names, three-plane localizers, Enhanced MR standard attributes,
modern protocols, in-phase / opposed-phase pairs, Dixon and SWI images, diffusion traces and
maps, dynamic post-contrast phases, and vendor value quirks. Protocol settings are typical
clinical values (common practice); the standard attributes cite PS3.3.
"""

from __future__ import annotations

import warnings
from pathlib import Path

import numpy as np
import pydicom
import pytest
import SimpleITK as sitk
from pydicom.uid import generate_uid

from sigreport.ingest import index_study, infer_role, load_stack
from sigreport.model import Acquisition, Role

from builders.dicom import (
    CORONAL,
    SAGITTAL,
    enhanced_dataset,
    mosaic_dataset,
    rotation,
    save,
    write_classic_series,
)

with warnings.catch_warnings():
    warnings.simplefilter("ignore")  # nibabel.nicom warns on import that its readers are young
    from nibabel.nicom import dicomwrappers


def acq(**kw) -> Acquisition:
    for key in ("scanning_sequence", "sequence_variant", "scan_options", "image_type"):
        if key in kw and isinstance(kw[key], str):
            kw[key] = tuple(kw[key].split("\\"))
    return Acquisition(**kw)


def _volume(n: int = 10, rows: int = 6, cols: int = 5) -> np.ndarray:
    return (np.arange(n * rows * cols, dtype=np.uint16).reshape(n, rows, cols) * 7 + 3) % 4000


# --------------------------------------------------------------------------------------------
# Mosaics


@pytest.mark.parametrize("normal_sign", [1.0, -1.0])
def test_mosaic_unpacks_to_the_volume_written_and_to_nibabels_geometry(
    tmp_path: Path, normal_sign: float
) -> None:
    volume = _volume()  # 10 slices: a 4x4 grid with 6 empty tiles
    direction = rotation((0.2, 1.0, 0.3), 20.0)
    origin = np.array([10.0, -20.0, 30.0])
    spacing = (1.5, 1.25, 3.0)
    path = save(
        mosaic_dataset(volume, origin=origin, spacing=spacing, direction=direction,
                       normal_sign=normal_sign),
        tmp_path / "mosaic.dcm",
    )  # fmt: skip
    (stack,) = index_study(tmp_path).stacks
    assert stack.size == (5, 6, 10)
    assert stack.spacing_mm == pytest.approx(spacing)
    image = load_stack(stack)
    ours = sitk.GetArrayFromImage(image)
    # Truth: slice k of the volume lies at origin + k * 3 mm * sign * normal (PS3.3 C.7.6.2.1.1
    # for the in-plane axes; the sign is the CSA SliceNormalVector's).
    for k in range(10):
        point = origin + k * spacing[2] * normal_sign * direction[:, 2]
        i, j, kk = image.TransformPhysicalPointToIndex(tuple(point))
        assert (i, j) == (0, 0)
        np.testing.assert_array_equal(ours[kk], volume[k])
    # Oracle: nibabel's MosaicWrapper affine ((row, column, slice) -> LPS) and data.
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        wrapper = dicomwrappers.wrapper_from_data(pydicom.dcmread(path))
        theirs = wrapper.get_data()
    assert isinstance(wrapper, dicomwrappers.MosaicWrapper)
    for index in [(0, 0, 0), (5, 4, 9), (2, 3, 6)]:
        point = (wrapper.affine @ np.array([*index, 1.0]))[:3]
        i, j, k = image.TransformPhysicalPointToIndex(tuple(point))
        assert ours[k, j, i] == theirs[index]


def test_mosaic_without_csa_header_is_skipped_with_the_reason(tmp_path: Path) -> None:
    save(mosaic_dataset(_volume(), csa=False), tmp_path / "mosaic.dcm")
    index = index_study(tmp_path)
    assert index.stacks == ()
    assert "without a readable CSA image header" in index.skipped[0].reason


def test_mosaic_whose_slice_count_does_not_fit_the_matrix_is_skipped(tmp_path: Path) -> None:
    # 10 slices tile a 4x4 grid of 6x5; a header claiming 17 slices needs a 5x5 grid: 24 rows
    # do not divide into 5.
    save(mosaic_dataset(_volume(), n_in_csa=17), tmp_path / "mosaic.dcm")
    index = index_study(tmp_path)
    assert index.stacks == ()
    assert "needs a 5x5 grid" in index.skipped[0].reason


def test_mosaic_roles_trace_and_single_direction(tmp_path: Path) -> None:
    save(mosaic_dataset(_volume(), b_value=1000.0), tmp_path / "a" / "trace.dcm")
    save(mosaic_dataset(_volume(), b_value=1000.0, directionality="DIRECTIONAL"),
         tmp_path / "b" / "direction.dcm")  # fmt: skip
    roles = {s.instances[0].path.name: s for s in index_study(tmp_path).stacks}
    assert roles["trace.dcm"].role == Role.DWI
    assert roles["direction.dcm"].role == Role.UNKNOWN
    assert "not a trace" in roles["direction.dcm"].role_reason


@pytest.fixture(autouse=True)
def _folders(tmp_path: Path) -> None:
    for name in ("a", "b", "c", "d", "e"):
        (tmp_path / name).mkdir()


# --------------------------------------------------------------------------------------------
# Localizers

SCOUT_3D = dict(repetition_time_ms=3.15, echo_time_ms=1.37, flip_angle_deg=8,
                scanning_sequence="GR", sequence_variant="SP", mr_acquisition_type="3D")  # fmt: skip


@pytest.mark.parametrize(
    "description", ["anat-scout", "ses-localizer", "AAHead_Scout_64ch", "3-plane loc", "Pilot",
                    "T/S/C RF FAST PILOT", "survey_3D", "localiser_tra"],
)  # fmt: skip
def test_localizer_names_on_normalized_tokens(description: str) -> None:
    role, reason, _ = infer_role(acq(**SCOUT_3D), description)
    assert role == Role.UNKNOWN and "localizer" in reason
    # The same header under a plain name is a 3-D spoiled gradient echo T1 (common practice).
    assert infer_role(acq(**SCOUT_3D), "t1_vibe_tra")[0] == Role.T1


@pytest.mark.parametrize("description", ["AX T1+C", "ax t1 c+", "T1_post-contrast", "t1 +gd"])
def test_post_contrast_spellings(description: str) -> None:
    t1 = acq(repetition_time_ms=500, echo_time_ms=12, scanning_sequence="SE")
    role, reason, _ = infer_role(t1, description)
    assert role == Role.T1POST and "description says post-contrast" in reason


def test_tokens_do_not_match_inside_words() -> None:
    # "location" and "pilots" hold no localizer token; "scoutmaster" neither.
    assert infer_role(acq(**SCOUT_3D), "location scoutmaster")[0] == Role.T1


def test_three_plane_series_with_short_tr_is_a_localizer_whatever_its_name(tmp_path: Path) -> None:
    uid, study, frame = generate_uid(), generate_uid(), generate_uid()
    extra = {"RepetitionTime": "8.6", "EchoTime": "4.0", "FlipAngle": "20",
             "ScanningSequence": "GR", "SequenceVariant": "SP"}  # fmt: skip
    for folder, direction in (("a", np.eye(3)), ("b", CORONAL), ("c", SAGITTAL)):
        write_classic_series(tmp_path / folder, np.ones((3, 8, 8), np.uint16), series_uid=uid,
                             study_uid=study, for_uid=frame, description="Series 1",
                             spacing=(2.0, 2.0, 8.0), direction=direction, extra=extra)  # fmt: skip
    stacks = index_study(tmp_path).stacks
    assert sorted(s.stack for s in stacks) == ["axial", "coronal", "sagittal"]
    for stack in stacks:
        assert stack.role == Role.UNKNOWN
        assert "localizer: slices in 3 planes" in stack.role_reason


# --------------------------------------------------------------------------------------------
# Enhanced MR standard attributes (PS3.3 C.8.13)


def _enhanced_role(tmp_path: Path, **kwargs):
    save(enhanced_dataset(_volume(4, 5, 6), **kwargs), tmp_path / "enhanced.dcm")
    (stack,) = index_study(tmp_path).stacks
    return stack


def test_acquisition_contrast_decides_over_borderline_physics(tmp_path: Path) -> None:
    # TR 2500 / TE 50 spin echo is PD or T2 by physics; AcquisitionContrast T2 decides.
    stack = _enhanced_role(tmp_path, timing={"RepetitionTime": 2500.0, "FlipAngle": 90.0},
                           echo_time=50.0, frame_type={"AcquisitionContrast": "T2"})  # fmt: skip
    assert stack.role == Role.T2
    assert "AcquisitionContrast T2" in stack.role_reason


def test_fluid_attenuated_with_inversion_time_in_the_timing_group(tmp_path: Path) -> None:
    stack = _enhanced_role(
        tmp_path,
        timing={"RepetitionTime": 5000.0, "FlipAngle": 120.0, "InversionTimes": [1800.0]},
        echo_time=390.0,  # 3-D FLAIR with a long echo train (common practice)
        modifier={"InversionRecovery": "YES"},
        frame_type={"AcquisitionContrast": "FLUID_ATTENUATED"},
    )
    assert stack.acquisition.inversion_time_ms == 1800.0
    assert stack.role == Role.FLAIR, stack.role_reason


def test_water_excitation_is_fat_suppression(tmp_path: Path) -> None:
    stack = _enhanced_role(
        tmp_path,
        timing={"RepetitionTime": 8.0, "FlipAngle": 12.0},
        echo_time=3.5,
        pulse={"EchoPulseSequence": "GRADIENT", "Spoiling": "RF"},
        modifier={"InversionRecovery": "NO", "SpectrallySelectedExcitation": "WATER"},
    )
    assert stack.role == Role.T1FS
    assert "water excitation" in stack.role_reason


@pytest.mark.parametrize("component", ["PHASE", "REAL", "IMAGINARY"])
def test_non_magnitude_frames_are_unknown(tmp_path: Path, component: str) -> None:
    stack = _enhanced_role(tmp_path, frame_type={"ComplexImageComponent": component})
    assert stack.role == Role.UNKNOWN and component in stack.role_reason


def test_frame_type_adc_and_flow_encoded(tmp_path: Path) -> None:
    adc = _enhanced_role(
        tmp_path / "a",
        frame_type={"FrameType": ["DERIVED", "PRIMARY", "DIFFUSION", "ADC"]},
        pulse={"EchoPulseSequence": "SPIN", "EchoPlanarPulseSequence": "YES"},
    )
    assert adc.role == Role.ADC
    flow = _enhanced_role(tmp_path / "b", frame_type={"AcquisitionContrast": "FLOW_ENCODED"})
    assert flow.role == Role.UNKNOWN and "FLOW_ENCODED" in flow.role_reason


def test_enhanced_directional_diffusion_is_not_dwi(tmp_path: Path) -> None:
    stack = _enhanced_role(
        tmp_path,
        timing={"RepetitionTime": 5000.0, "FlipAngle": 90.0},
        echo_time=80.0,
        b_value=1000.0,
        diffusion={"DiffusionDirectionality": "DIRECTIONAL"},
        pulse={"EchoPulseSequence": "SPIN", "EchoPlanarPulseSequence": "YES"},
    )
    assert stack.role == Role.UNKNOWN and "not a trace" in stack.role_reason


# --------------------------------------------------------------------------------------------
# Modern protocols (common practice settings)

MODERN = [
    # 3-D inversion-prepared gradient echo T1 (MPRAGE-like), pre and post contrast
    (Role.T1, acq(repetition_time_ms=2000, inversion_time_ms=900, echo_time_ms=3, flip_angle_deg=8,
                  scanning_sequence="GR\\IR", sequence_variant="SK\\SP\\MP",
                  mr_acquisition_type="3D")),
    (Role.T1POST, acq(repetition_time_ms=2000, inversion_time_ms=900, echo_time_ms=3,
                      flip_angle_deg=8, scanning_sequence="GR\\IR", contrast_agent="gadoterate",
                      mr_acquisition_type="3D")),
    # 3-D FLAIR with a long echo train: effective TE of several hundred ms
    (Role.FLAIR, acq(repetition_time_ms=5000, inversion_time_ms=1800, echo_time_ms=390,
                     scanning_sequence="SE\\IR", sequence_variant="SK\\SP\\MP",
                     mr_acquisition_type="3D")),
    # T1-weighted FLAIR
    (Role.T1, acq(repetition_time_ms=2000, inversion_time_ms=800, echo_time_ms=12,
                  scanning_sequence="SE\\IR")),
    # turbo spin echo T2 of any echo-train length, 2-D and 3-D variable flip angle
    (Role.T2, acq(repetition_time_ms=4500, echo_time_ms=95, scanning_sequence="SE",
                  sequence_variant="SK")),
    (Role.T2, acq(repetition_time_ms=3200, echo_time_ms=560, scanning_sequence="SE",
                  sequence_variant="SK\\SP", mr_acquisition_type="3D")),
    # gradient-echo T2* and SWI
    (Role.T2STAR, acq(repetition_time_ms=650, echo_time_ms=20, flip_angle_deg=20,
                      scanning_sequence="GR", sequence_variant="SP")),
    (Role.SWI, acq(repetition_time_ms=28, echo_time_ms=20, flip_angle_deg=15,
                   scanning_sequence="GR", image_type="ORIGINAL\\PRIMARY\\M\\SWI\\ND")),
    (Role.SWI, acq(repetition_time_ms=28, echo_time_ms=20, flip_angle_deg=15,
                   scanning_sequence="GR", image_type="DERIVED\\PRIMARY\\SWI\\NORM")),
    # Dixon reconstructions (one vendor's DIXON\\WATER, another's single-letter W / F)
    (Role.WATER, acq(repetition_time_ms=4, echo_time_ms=1.3, flip_angle_deg=9,
                     scanning_sequence="GR", image_type="DERIVED\\PRIMARY\\DIXON\\WATER")),
    (Role.FAT, acq(repetition_time_ms=4, echo_time_ms=1.3, flip_angle_deg=9,
                   scanning_sequence="GR", image_type="DERIVED\\PRIMARY\\DIXON\\FAT")),
    (Role.WATER, acq(repetition_time_ms=6, echo_time_ms=1.8, flip_angle_deg=10,
                     scanning_sequence="GR", image_type="ORIGINAL\\PRIMARY\\W\\W")),
    (Role.IP, acq(repetition_time_ms=4, echo_time_ms=2.4, flip_angle_deg=9,
                  scanning_sequence="GR", image_type="DERIVED\\PRIMARY\\DIXON\\IN_PHASE")),
    (Role.OP, acq(repetition_time_ms=4, echo_time_ms=1.2, flip_angle_deg=9,
                  scanning_sequence="GR", image_type="DERIVED\\PRIMARY\\DIXON\\OPP_PHASE")),
    # diffusion: trace by b-value, ADC map
    (Role.DWI, acq(scanning_sequence="EP", image_type="DERIVED\\PRIMARY\\DIFFUSION\\TRACEW",
                   b_value=1000)),
    (Role.ADC, acq(scanning_sequence="EP", image_type="DERIVED\\PRIMARY\\DIFFUSION\\ADC")),
    # ImageType case and order are vendor quirks: values compare upper-case, any position
    (Role.ADC, acq(scanning_sequence="EP", image_type="derived\\primary\\adc\\diffusion")),
]  # fmt: skip


@pytest.mark.parametrize(("expected", "acquisition"), MODERN)
def test_modern_protocols(expected: Role, acquisition: Acquisition) -> None:
    role, reason, confidence = infer_role(acquisition, "SERIES 9")
    assert role == expected, reason
    assert confidence >= 0.5


NOT_MEASURED = [
    ("b 0 reference", acq(scanning_sequence="EP", b_value=0, repetition_time_ms=5000,
                          echo_time_ms=80, image_type="ORIGINAL\\PRIMARY\\DIFFUSION\\NONE")),
    ("eADC", acq(scanning_sequence="EP", image_type="DERIVED\\PRIMARY\\DIFFUSION\\EADC")),
    ("FA", acq(scanning_sequence="EP", image_type="DERIVED\\PRIMARY\\DIFFUSION\\FA")),
    ("MIP", acq(repetition_time_ms=22, echo_time_ms=3.6, flip_angle_deg=18, scanning_sequence="GR",
                image_type="DERIVED\\SECONDARY\\PROJECTION IMAGE\\CSA MIP")),
    ("minIP of SWI", acq(repetition_time_ms=28, echo_time_ms=20, flip_angle_deg=15,
                         scanning_sequence="GR", image_type="DERIVED\\PRIMARY\\SWI\\MNIP")),
    ("subtraction", acq(repetition_time_ms=4, echo_time_ms=1.5, flip_angle_deg=10,
                        scanning_sequence="GR", image_type="DERIVED\\PRIMARY\\SUB\\ND")),
    ("reformat", acq(repetition_time_ms=500, echo_time_ms=12, scanning_sequence="SE",
                     image_type="DERIVED\\SECONDARY\\MPR\\CSA MPR")),
    ("phase", acq(repetition_time_ms=28, echo_time_ms=20, flip_angle_deg=15,
                  scanning_sequence="GR", image_type="ORIGINAL\\PRIMARY\\P\\ND")),
]  # fmt: skip


@pytest.mark.parametrize(("what", "acquisition"), NOT_MEASURED, ids=[w for w, _ in NOT_MEASURED])
def test_derived_and_reference_images_are_unknown(what: str, acquisition: Acquisition) -> None:
    role, reason, _ = infer_role(acquisition, "SERIES 9")
    assert role == Role.UNKNOWN, (what, reason)


def test_swi_by_description_only_breaks_the_gradient_echo_tie() -> None:
    t2star = acq(repetition_time_ms=28, echo_time_ms=20, flip_angle_deg=15, scanning_sequence="GR",
                 mr_acquisition_type="3D")  # fmt: skip
    role, reason, confidence = infer_role(t2star, "SWI_Images")
    assert role == Role.SWI and "by description" in reason and confidence < 0.5
    assert infer_role(t2star, "t2_fl3d")[0] == Role.T2STAR


def test_adc_map_without_adc_in_image_type_by_description() -> None:
    role, reason, confidence = infer_role(
        acq(scanning_sequence="EP", image_type="DERIVED\\PRIMARY\\ND"), "Apparent Diffusion Coef"
    )
    assert role == Role.ADC and confidence < 0.5, reason


# --------------------------------------------------------------------------------------------
# In-phase / opposed-phase pairs from echo times


@pytest.mark.parametrize(
    ("field", "opposed", "in_phase"),
    # Fat-water shift 3.4 ppm x 42.577 MHz/T: period ~4.6 ms at 1.5 T, ~2.3 ms at 3 T (from memory)
    [(1.5, "2.3", "4.6"), (3.0, "1.15", "2.3")],
)
def test_dual_echo_gradient_echo_gives_op_and_ip(
    tmp_path: Path, field: float, opposed: str, in_phase: str
) -> None:
    uid = generate_uid()
    for folder, (echo, te) in zip("ab", ((1, opposed), (2, in_phase)), strict=True):
        write_classic_series(tmp_path / folder, np.ones((3, 6, 6), np.uint16), series_uid=uid,
                             description="t1_fl2d_opp-in",
                             extra={"EchoNumbers": str(echo), "EchoTime": te,
                                    "RepetitionTime": "150", "FlipAngle": "70",
                                    "ScanningSequence": "GR", "SequenceVariant": "SP",
                                    "MagneticFieldStrength": f"{field:g}"})  # fmt: skip
    roles = {s.stack: s.role for s in index_study(tmp_path).stacks}
    assert roles == {"echo 1": Role.OP, "echo 2": Role.IP}


def test_single_echo_gradient_echo_stays_t1(tmp_path: Path) -> None:
    write_classic_series(tmp_path / "a", np.ones((3, 6, 6), np.uint16),
                         extra={"EchoTime": "2.3", "RepetitionTime": "150", "FlipAngle": "70",
                                "ScanningSequence": "GR", "MagneticFieldStrength": "1.5"})  # fmt: skip
    (stack,) = index_study(tmp_path).stacks
    assert stack.role == Role.T1


# --------------------------------------------------------------------------------------------
# Diffusion: the highest-b trace is DWI


def test_highest_b_trace_is_dwi_lower_b_is_not(tmp_path: Path) -> None:
    uid = generate_uid()
    for folder, b in zip("abc", (0, 500, 1000), strict=True):
        write_classic_series(tmp_path / folder, np.ones((3, 6, 6), np.uint16), series_uid=uid,
                             extra={"DiffusionBValue": b, "ScanningSequence": "EP",
                                    "RepetitionTime": "5000", "EchoTime": "80",
                                    "ImageType": ["DERIVED", "PRIMARY", "DIFFUSION", "TRACEW"]})  # fmt: skip
    stacks = {s.stack: s for s in index_study(tmp_path).stacks}
    assert stacks["b 1000"].role == Role.DWI
    assert stacks["b 500"].role == Role.UNKNOWN
    assert "highest-b trace (b 1000)" in stacks["b 500"].role_reason
    assert stacks["b 0"].role == Role.UNKNOWN


# --------------------------------------------------------------------------------------------
# Dynamic post-contrast phases


def _dynamic_series(tmp_path: Path, folder: str, number: int, time: str, **extra) -> None:
    write_classic_series(
        tmp_path / folder, np.ones((3, 6, 6), np.uint16), series_number=number,
        study_uid="1.2.3.4", for_uid="1.2.3.5", description="t1_vibe_fs_dyn",
        extra={"RepetitionTime": "4.5", "EchoTime": "2.0", "FlipAngle": "12",
               "ScanningSequence": "GR", "SequenceVariant": "SP", "ScanOptions": "FS",
               "AcquisitionTime": time, **extra},
    )  # fmt: skip


def test_dynamic_phases_by_acquisition_time(tmp_path: Path) -> None:
    _dynamic_series(tmp_path, "a", 10, "101500")
    agent = {"ContrastBolusAgent": "gadobutrol"}
    # Written out of order: phase order comes from AcquisitionTime, not the series number.
    _dynamic_series(tmp_path, "b", 13, "102130.5", **agent)
    _dynamic_series(tmp_path, "c", 11, "101700", **agent)
    _dynamic_series(tmp_path, "d", 12, "101830", **agent)
    stacks = {s.series_number: s for s in index_study(tmp_path).stacks}
    assert stacks[10].role == Role.T1FS and stacks[10].dynamic_phase is None
    assert {stacks[n].role for n in (11, 12, 13)} == {Role.T1POSTFS}
    assert [stacks[n].dynamic_phase for n in (11, 12, 13)] == [1, 2, 3]
    assert [stacks[n].dynamic_delay_s for n in (11, 12, 13)] == [0.0, 90.0, 270.5]
    assert len({stacks[n].dynamic_group for n in (10, 11, 12, 13)}) == 1


def test_phase_before_contrast_bolus_start_is_pre_contrast(tmp_path: Path) -> None:
    bolus = {"ContrastBolusAgent": "gadobutrol", "ContrastBolusStartTime": "101600"}
    _dynamic_series(tmp_path, "a", 10, "101500", **bolus)
    _dynamic_series(tmp_path, "b", 11, "101700", **bolus)
    _dynamic_series(tmp_path, "c", 12, "101830", **bolus)
    stacks = {s.series_number: s for s in index_study(tmp_path).stacks}
    assert stacks[10].role == Role.T1FS
    assert "before ContrastBolusStartTime" in stacks[10].role_reason
    assert [stacks[n].dynamic_phase for n in (11, 12)] == [1, 2]


def test_single_post_contrast_series_has_no_phase(tmp_path: Path) -> None:
    _dynamic_series(tmp_path, "a", 10, "101500")
    _dynamic_series(tmp_path, "b", 11, "101700", ContrastBolusAgent="gadobutrol")
    stacks = {s.series_number: s for s in index_study(tmp_path).stacks}
    assert stacks[11].dynamic_phase is None and stacks[11].dynamic_delay_s is None


# --------------------------------------------------------------------------------------------
# Vendor value quirks


def test_missing_inversion_time_is_a_description_tie_break() -> None:
    ir = acq(repetition_time_ms=9000, echo_time_ms=110, scanning_sequence="SE\\IR")
    assert infer_role(ir, "SERIES 4")[0] == Role.UNKNOWN
    role, reason, confidence = infer_role(ir, "ax_t2_flair")
    assert role == Role.FLAIR and "inversion time not in the header" in reason
    assert confidence < 0.5
    assert infer_role(ir, "cor STIR")[0] == Role.STIR


@pytest.mark.parametrize("value", ["-5", "0"])
def test_zero_or_negative_spacing_between_slices_is_not_used(tmp_path: Path, value: str) -> None:
    write_classic_series(tmp_path / "a", np.ones((1, 4, 4), np.uint16), spacing=(1.0, 1.0, 4.0),
                         extra={"SpacingBetweenSlices": value})  # fmt: skip
    (stack,) = index_study(tmp_path).stacks
    assert stack.spacing_mm[2] == 4.0  # SliceThickness
    assert any("SpacingBetweenSlices" in w and "ignored" in w for w in stack.warnings)


def test_real_world_value_mapping_wins_over_rescale_in_a_classic_image(tmp_path: Path) -> None:
    """One vendor writes both a display rescale and a Real World Value Mapping to the physical
    values (PS3.3 C.7.6.16.2.11): the mapping is the measurement scale."""
    from pydicom.dataset import Dataset
    from pydicom.sequence import Sequence

    item = Dataset()
    item.RealWorldValueSlope = 0.5
    item.RealWorldValueIntercept = -10.0
    item.RealWorldValueFirstValueMapped = 0
    item.RealWorldValueLastValueMapped = 4095
    item.LUTLabel = "PHYS"
    stored = np.arange(2 * 4 * 4, dtype=np.uint16).reshape(2, 4, 4) * 11
    write_classic_series(tmp_path / "a", stored, rescale=(3.0, 7.0),
                         extra={"RealWorldValueMappingSequence": Sequence([item])})  # fmt: skip
    (stack,) = index_study(tmp_path).stacks
    values = sitk.GetArrayFromImage(load_stack(stack))
    np.testing.assert_allclose(values, stored * 0.5 - 10.0)


def test_twelve_bit_data_in_sixteen_bit_words(tmp_path: Path) -> None:
    """BitsStored 12 with garbage in the top four bits (overlay bits of old writers): the values
    are the low 12 bits, as pydicom's pixel_array reads them (PS3.5 8.1.1)."""
    stored = (np.arange(3 * 4 * 4, dtype=np.uint16).reshape(3, 4, 4) * 97) % 4096
    noisy = stored | np.uint16(0xF000)
    paths = write_classic_series(tmp_path / "a", noisy, shuffle=False)
    for path in paths:  # the builder writes 16 stored bits; declare 12 as such scanners do
        ds = pydicom.dcmread(path)
        ds.BitsStored, ds.HighBit = 12, 11
        ds.save_as(path)
    (stack,) = index_study(tmp_path).stacks
    values = sitk.GetArrayFromImage(load_stack(stack))
    np.testing.assert_array_equal(values, stored.astype(np.float32))
    np.testing.assert_array_equal(pydicom.dcmread(paths[0]).pixel_array, stored[0])


@pytest.mark.parametrize(
    ("value", "seconds"),
    [
        ("101530", 36930.0),  # TM HHMMSS (PS3.5 6.2)
        ("101530.25", 36930.25),
        ("1015", 36900.0),  # TM may stop after the minutes
        ("20120310163520.32", 59720.32),  # DT: the date is dropped
        ("20120310163520.32+0100", 59720.32),  # DT with a UTC offset
        ("10:15:30", 36930.0),  # ACR-NEMA style, still written by old software
        ("", None),
        ("2561", None),
        ("ab", None),
    ],
)
def test_acquisition_times_in_seconds_of_day(value: str, seconds: float | None) -> None:
    from sigreport.ingest.attributes import seconds_of_day

    assert seconds_of_day(value) == (None if seconds is None else pytest.approx(seconds))


def test_time_series_of_mosaics_splits_by_acquisition(tmp_path: Path) -> None:
    """An fMRI-style series: one mosaic per volume, same positions, AcquisitionNumber 1, 2."""
    uid = generate_uid()
    for number in (1, 2):
        ds = mosaic_dataset(_volume() + number, b_value=None, description="ep2d_bold",
                            extra={"AcquisitionNumber": number, "SeriesInstanceUID": uid,
                                   "ImageType": ["ORIGINAL", "PRIMARY", "M", "ND", "MOSAIC"]})  # fmt: skip
        save(ds, tmp_path / f"vol{number}.dcm")
    stacks = index_study(tmp_path).stacks
    assert [s.stack for s in stacks] == ["acq 1", "acq 2"]
    for stack, number in zip(stacks, (1, 2), strict=True):
        assert stack.role == Role.UNKNOWN  # echo planar without diffusion: functional
        values = sitk.GetArrayFromImage(load_stack(stack))
        np.testing.assert_array_equal(values, (_volume() + number).astype(np.float32))
