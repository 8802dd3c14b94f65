"""Vendor private elements and value quirks: private inversion times, one vendor's private
floating-point scale, several echo times in one image, single-plane 3-D scouts, and the value
quirks of docs/ingestion.md that had no test.

Private elements are written the way PS3.5 7.8.1 reserves them: a private creator element
(gggg,00xx) names the block xx, and the element is (gggg,xxEE). The tests reserve blocks other
than 0x10 and put a decoy creator at 0x10, so a reader that hard-codes (gggg,10EE) fails.
Element names are those of the private dictionaries available here (dicom3tools' ``dcdump``
names, pydicom's ``_private_dict``); independent oracles: nibabel's ``find_private_section``
(locates a creator's block), nibabel's PAR/REC scaling formulas (``parrec.py``: DV = PV x RS +
RI, FP = DV / (RS x SS)), pydicom's ``pixel_array`` and SimpleITK's series reader.
"""

from __future__ import annotations

import gzip
import warnings
from pathlib import Path

import numpy as np
import pydicom
import pytest
import SimpleITK as sitk
from pydicom.dataset import Dataset
from pydicom.sequence import Sequence
from pydicom.uid import generate_uid

from sigreport.ingest import index_study, infer_role, load_stack
from sigreport.ingest.roles import load_role_bands, scout_reason
from sigreport.model import Acquisition, Role, Stack

from builders.dicom import classic_slices, enhanced_dataset, save, write_classic_series

with warnings.catch_warnings():
    warnings.simplefilter("ignore")  # nibabel.nicom warns on import that its readers are young
    import nibabel
    from nibabel.nicom.utils import find_private_section

NIBABEL = Path(nibabel.__file__).parent


def _reserve(ds: Dataset, group: int, creator: str, block: int) -> int:
    """Reserve ``block`` of ``group`` for ``creator`` (PS3.5 7.8.1); return the element base."""
    ds.add_new((group << 16) | block, "LO", creator)
    return (group << 16) | (block << 8)


def _decoy(ds: Dataset, group: int) -> None:
    """Another creator's block 0x10 holding every element offset the readers look at, with
    values that would change the result if read."""
    base = _reserve(ds, group, "SOME OTHER CREATOR", 0x10)
    for offset in (0x0D, 0x0E, 0x84, 0xA8):
        ds.add_new(base | offset, "DS", "777")


def _philips(ds: Dataset, *, scale: float | None = None, scale_intercept: float | None = None,
             ti_2001: str | None = None, ti_2005: str | None = None) -> Dataset:  # fmt: skip
    ds.Manufacturer = "Philips Medical Systems"
    _decoy(ds, 0x2005)
    _decoy(ds, 0x2001)
    base = _reserve(ds, 0x2005, "Philips MR Imaging DD 001", 0x13)
    if scale is not None:
        ds.add_new(base | 0x0E, "FL", scale)  # "Scale Slope" (dicom3tools)
    if scale_intercept is not None:
        ds.add_new(base | 0x0D, "FL", scale_intercept)  # "Scale Intercept" (dicom3tools)
    if ti_2005 is not None:
        ds.add_new(base | 0xA8, "DS", ti_2005)  # "Inversion Time" (dicom3tools)
    if ti_2001 is not None:
        imaging = _reserve(ds, 0x2001, "Philips Imaging DD 001", 0x12)
        ds.add_new(imaging | 0x84, "DS", ti_2001)  # "Inversion Time" (pydicom, dicom3tools)
    return ds


def _write(folder: Path, stored: np.ndarray, *, series_number: int = 1, description: str = "",
           rescale: tuple[float, float] | None = (2.5, 10.0), **philips) -> list[Path]:  # fmt: skip
    folder.mkdir(parents=True, exist_ok=True)
    uid = generate_uid()
    slices = classic_slices(stored, series_uid=uid, series_number=series_number,
                            description=description, rescale=rescale,
                            spacing=(1.0, 1.0, 3.0),
                            extra={"RepetitionTime": "500", "EchoTime": "12",
                                   "ScanningSequence": "SE", "MRAcquisitionType": "2D"})  # fmt: skip
    paths = []
    for k, ds in enumerate(slices):
        paths.append(save(_philips(ds, **philips), folder / f"IM{k}"))
    return paths


def _stored(n: int = 3, seed: int = 0) -> np.ndarray:
    return np.random.default_rng(seed).integers(0, 4000, (n, 6, 5)).astype(np.uint16)


def _fp_oracle(path: Path) -> np.ndarray:
    """FP = DV / (RS x SS), DV = SV x RS + RI (nibabel parrec.py), from pydicom's pixel_array
    and the scale slope found through nibabel's private-section search."""
    ds = pydicom.dcmread(path)
    offset = find_private_section(ds, 0x2005, "Philips MR Imaging DD 001")
    ss = float(ds[(0x2005 << 16) | offset | 0x0E].value)
    rs, ri = float(ds.RescaleSlope), float(ds.RescaleIntercept)
    return (ds.pixel_array * rs + ri) / (rs * ss)


# --------------------------------------------------------------------------------------------
# Philips private floating-point scale


def test_private_scale_gives_floating_point_values_in_any_private_block(tmp_path: Path) -> None:
    stored = _stored()
    paths = _write(tmp_path / "a", stored, scale=0.0625)
    (stack,) = index_study(tmp_path).stacks
    assert stack.scaling_key == "philips floating point"
    assert any("FP = DV / (RS x SS)" in w for w in stack.warnings)
    ours = sitk.GetArrayFromImage(load_stack(stack))
    expected = np.stack([_fp_oracle(p) for p in paths])
    np.testing.assert_allclose(ours, expected, rtol=1e-5)
    # Not the display values (DV = SV x 2.5 + 10) and not the decoy's 777.
    assert not np.allclose(ours, stored * 2.5 + 10.0)


def test_ratios_within_a_series_are_the_same_on_display_and_floating_point_values(
    tmp_path: Path,
) -> None:
    """A ratio to a reference voxel of the same series does not depend on the per-series
    scaling (FP is DV divided by one number), which is why normalized percentages are
    unaffected (docs/ingestion.md)."""
    paths = _write(tmp_path / "a", _stored(), scale=0.2)
    (stack,) = index_study(tmp_path).stacks
    ours = sitk.GetArrayFromImage(load_stack(stack)).astype(np.float64)
    ds = pydicom.dcmread(paths[0])
    display = ds.pixel_array * float(ds.RescaleSlope) + float(ds.RescaleIntercept)
    np.testing.assert_allclose(ours[0] / ours[0][2, 3], display / display[2, 3], rtol=1e-5)


def test_private_scale_with_a_nonzero_scale_intercept_is_not_applied(tmp_path: Path) -> None:
    stored = _stored()
    _write(tmp_path / "a", stored, scale=0.5, scale_intercept=3.0)
    (stack,) = index_study(tmp_path).stacks
    assert stack.scaling_key is not None and stack.scaling_key.startswith("rescale")
    assert any("not applied" in w for w in stack.warnings)
    np.testing.assert_allclose(
        sitk.GetArrayFromImage(load_stack(stack)), stored * 2.5 + 10.0, rtol=1e-6
    )


def test_real_world_value_mapping_wins_over_the_private_scale(tmp_path: Path) -> None:
    item = Dataset()
    item.RealWorldValueSlope = 0.5
    item.RealWorldValueIntercept = -10.0
    stored = _stored()
    folder = tmp_path / "a"
    folder.mkdir()
    for k, ds in enumerate(classic_slices(stored, rescale=(2.5, 10.0),
                                          extra={"RealWorldValueMappingSequence": Sequence([item])})):  # fmt: skip
        save(_philips(ds, scale=0.0625), folder / f"IM{k}")
    (stack,) = index_study(tmp_path).stacks
    np.testing.assert_allclose(sitk.GetArrayFromImage(load_stack(stack)), stored * 0.5 - 10.0)
    assert not any("private scale" in w for w in stack.warnings)


def test_series_pairs_with_and_without_the_private_scale(tmp_path: Path) -> None:
    """Two series with private scales (different, as the scanner chooses per series) share the
    floating-point scaling key, so un-normalized values compare; a series without one does not
    share it, and each side says so (a qc note when measured)."""
    _write(tmp_path / "pre", _stored(seed=1), series_number=3, description="pre", scale=0.25)
    _write(tmp_path / "post", _stored(seed=2), series_number=4, description="post", scale=0.5,
           rescale=(4.0, 0.0))  # fmt: skip
    _write(tmp_path / "other", _stored(seed=3), series_number=5, description="plain")
    stacks = {s.series_number: s for s in index_study(tmp_path).stacks}
    assert stacks[3].scaling_key == stacks[4].scaling_key == "philips floating point"
    assert stacks[5].scaling_key != stacks[3].scaling_key
    assert any("series 5 (plain) carry no private scale" in w for w in stacks[3].warnings)
    assert any("differs from other series' (0.5)" in w for w in stacks[3].warnings)
    assert any("differs from other series' (0.25)" in w for w in stacks[4].warnings)
    assert any("no private scale slope (display values)" in w for w in stacks[5].warnings)


def test_enhanced_per_frame_private_item_scale(tmp_path: Path) -> None:
    """The vendor's Enhanced MR keeps each frame's private scale in a private per-frame item,
    (2005,xx0F) of "Philips MR Imaging DD 005" (as nibabel's philips_mprage.dcm.gz does)."""
    stored = _stored(n=4)
    ds = enhanced_dataset(stored, rescale=(2.0, 0.0), frame_order=range(4))
    scales = (0.5, 0.5, 0.25, 0.25)
    for frame, scale in zip(ds.PerFrameFunctionalGroupsSequence, scales, strict=True):
        base = _reserve(frame, 0x2005, "Philips MR Imaging DD 005", 0x15)
        inner = Dataset()
        _decoy(inner, 0x2005)
        inner_base = _reserve(inner, 0x2005, "Philips MR Imaging DD 001", 0x11)
        inner.add_new(inner_base | 0x0E, "FL", scale)
        frame.add_new(base | 0x0F, "SQ", Sequence([inner]))
    save(ds, tmp_path / "enh.dcm")
    (stack,) = index_study(tmp_path).stacks
    assert stack.scaling_key == "philips floating point"
    values = sitk.GetArrayFromImage(load_stack(stack))
    for k in range(4):  # FP = (SV x 2) / (2 x SS) = SV / SS (nibabel parrec.py)
        np.testing.assert_allclose(values[k], stored[k] / scales[k], rtol=1e-6)


def test_real_philips_enhanced_file_private_scale(tmp_path: Path) -> None:
    """nibabel's philips_mprage.dcm.gz (a real Enhanced MR file; its pixel data are zeroed in
    the shipped copy, so known values are written into a copy): every frame is scaled by the
    scale slope of its own private item, as the formula says."""
    ds = pydicom.dcmread(gzip.open(NIBABEL / "nicom/tests/data/philips_mprage.dcm.gz"))
    frames = int(ds.NumberOfFrames)
    values = (np.arange(frames * ds.Rows * ds.Columns) % 1000).astype(np.uint16)
    ds.PixelData = values.tobytes()
    ds.save_as(tmp_path / "mprage.dcm")
    (stack,) = index_study(tmp_path).stacks
    assert stack.role == Role.T1FS and stack.scaling_key == "philips floating point"
    ours = sitk.GetArrayFromImage(load_stack(stack))
    ref = pydicom.dcmread(tmp_path / "mprage.dcm")
    stored = ref.pixel_array.astype(np.float64)
    for f in (0, frames - 1):
        item = ref.PerFrameFunctionalGroupsSequence[f]
        private = item[(0x2005 << 16) | find_private_section(item, 0x2005, "Philips MR Imaging DD 005") | 0x0F][0]  # fmt: skip
        ss = float(private[(0x2005 << 16) | find_private_section(private, 0x2005, "Philips MR Imaging DD 001") | 0x0E].value)  # fmt: skip
        pvt = item.PixelValueTransformationSequence[0]
        rs, ri = float(pvt.RescaleSlope), float(pvt.RescaleIntercept)
        position = [float(v) for v in item.PlanePositionSequence[0].ImagePositionPatient]
        k = int(round(load_stack(stack).TransformPhysicalPointToContinuousIndex(position)[2]))
        np.testing.assert_allclose(ours[k], (stored[f] * rs + ri) / (rs * ss), rtol=1e-5)


# --------------------------------------------------------------------------------------------
# Vendor private inversion times


def _ir_series(tmp_path: Path, **philips) -> Stack:
    uid = generate_uid()
    folder = tmp_path / "ir"
    folder.mkdir()
    for k, ds in enumerate(classic_slices(_stored(), series_uid=uid, description="SERIES 4",
                                          extra={"RepetitionTime": "9000", "EchoTime": "110",
                                                 "ScanningSequence": ["SE", "IR"]})):  # fmt: skip
        save(_philips(ds, **philips), folder / f"IM{k}")
    (stack,) = index_study(tmp_path).stacks
    return stack


def test_philips_imaging_private_inversion_time_decides_flair(tmp_path: Path) -> None:
    stack = _ir_series(tmp_path, ti_2001="2500")
    assert stack.role == Role.FLAIR
    assert "TI 2500 ms (private (2001,xx84) of 'Philips Imaging DD 001')" in stack.role_reason
    assert stack.acquisition.inversion_time_source is not None


def test_philips_mr_imaging_private_inversion_time_decides_stir(tmp_path: Path) -> None:
    stack = _ir_series(tmp_path, ti_2005="160")
    assert stack.role == Role.STIR
    assert "(2005,xxA8) of 'Philips MR Imaging DD 001'" in stack.role_reason


def test_zero_private_inversion_time_is_no_time(tmp_path: Path) -> None:
    """This vendor writes 0 when there is no inversion: not a TI (the description must decide,
    and "SERIES 4" does not)."""
    stack = _ir_series(tmp_path, ti_2001="0")
    assert stack.role == Role.UNKNOWN
    assert "inversion time not in the header" in stack.role_reason


def test_ge_private_elements_are_not_read_as_an_inversion_time(tmp_path: Path) -> None:
    """No dictionary available here names a GE private inversion time (docs/ingestion.md), so
    a GE-style header without InversionTime stays without TI."""
    ds = classic_slices(_stored(n=1), description="SERIES 4",
                        extra={"RepetitionTime": "9000", "EchoTime": "110",
                               "ScanningSequence": ["SE", "IR"]})[0]  # fmt: skip
    base = _reserve(ds, 0x0019, "GEMS_ACQU_01", 0x10)
    for offset in range(0x80, 0xA0):
        ds.add_new(base | offset, "DS", "2500")
    save(ds, tmp_path / "ge.dcm")
    (stack,) = index_study(tmp_path).stacks
    assert stack.acquisition.inversion_time_ms is None and stack.role == Role.UNKNOWN


def test_standard_inversion_time_wins_over_the_private_one(tmp_path: Path) -> None:
    uid = generate_uid()
    ds = classic_slices(_stored(n=1), series_uid=uid,
                        extra={"RepetitionTime": "9000", "EchoTime": "110", "InversionTime": "170",
                               "ScanningSequence": ["SE", "IR"]})[0]  # fmt: skip
    save(_philips(ds, ti_2001="2500"), tmp_path / "a.dcm")
    (stack,) = index_study(tmp_path).stacks
    assert stack.role == Role.STIR and stack.acquisition.inversion_time_source is None


def test_enhanced_private_per_frame_inversion_time(tmp_path: Path) -> None:
    ds = enhanced_dataset(_stored(n=3), echo_time=110.0,
                          timing={"RepetitionTime": 9000.0},
                          modifier={"InversionRecovery": "YES"})  # fmt: skip
    ds.EchoPulseSequence = "SPIN"
    for frame in ds.PerFrameFunctionalGroupsSequence:
        base = _reserve(frame, 0x2005, "Philips MR Imaging DD 005", 0x14)
        inner = Dataset()
        inner.InversionTime = "2400"
        frame.add_new(base | 0x0F, "SQ", Sequence([inner]))
    save(ds, tmp_path / "enh.dcm")
    (stack,) = index_study(tmp_path).stacks
    assert stack.role == Role.FLAIR, stack.role_reason
    assert "private per-frame item" in stack.role_reason


@pytest.mark.parametrize(
    ("name", "expected"), [("*tir2d1_16", Role.FLAIR), ("*tse2d1_16", Role.T2)]
)
def test_sequence_name_marks_inversion(name: str, expected: Role) -> None:
    """One vendor's sequence names say inversion recovery ("tir") when ScanningSequence does
    not (lexicon [inversion] sequence_name_prefixes, common practice)."""
    a = Acquisition(repetition_time_ms=9000, echo_time_ms=110, inversion_time_ms=2500,
                    scanning_sequence=("SE",), sequence_name=name)  # fmt: skip
    assert infer_role(a, "SERIES 4")[0] == expected


# --------------------------------------------------------------------------------------------
# Several echo times in one image


def _multi_echo(tmp_path: Path, te: str, echo_number: int | None = None, **extra) -> Stack:
    fields = {"RepetitionTime": "4000", "EchoTime": te, "ScanningSequence": "SE", **extra}
    if echo_number is not None:
        fields["EchoNumbers"] = str(echo_number)
    write_classic_series(tmp_path / "a", _stored(), extra=fields)
    (stack,) = index_study(tmp_path).stacks
    return stack


def test_dual_echo_values_without_echo_number_are_not_one_weighting(tmp_path: Path) -> None:
    stack = _multi_echo(tmp_path, "15\\90")
    assert stack.role == Role.UNKNOWN
    assert "PD at TE 15 ms, T2 at TE 90 ms" in stack.role_reason
    assert any("EchoTime (0018,0081) holds several values (15\\90 ms)" in w
               for w in stack.warnings)  # fmt: skip


def test_echo_number_picks_the_images_own_echo_from_the_list(tmp_path: Path) -> None:
    stack = _multi_echo(tmp_path, "15\\90", echo_number=2)
    assert stack.role == Role.T2 and stack.acquisition.echo_time_ms == 90.0
    assert "EchoTime lists 15\\90 ms, echo 2 taken" in stack.role_reason
    assert any("echo 2 (90 ms) taken" in w for w in stack.warnings)


def test_combined_echoes_within_one_band_keep_the_role(tmp_path: Path) -> None:
    """A summed multi-echo gradient echo (echoes 18-32 ms, flip 20): T2* over the whole range."""
    stack = _multi_echo(tmp_path, "18\\25\\32", RepetitionTime="600", ScanningSequence="GR",
                        FlipAngle="20")  # fmt: skip
    assert stack.role == Role.T2STAR
    assert "T2STAR over the whole range" in stack.role_reason
    assert stack.confidence is not None and stack.confidence <= 0.6


# --------------------------------------------------------------------------------------------
# Single-plane 3-D scouts


def _stack(*, tr: float, te: float, pixel: float, matrix: int, slices: int, step: float,
           description: str = "SERIES 2", **acq) -> Stack:  # fmt: skip
    acquisition = Acquisition(repetition_time_ms=tr, echo_time_ms=te, flip_angle_deg=10.0,
                              scanning_sequence=("GR",), mr_acquisition_type="3D", **acq)  # fmt: skip
    role, reason, confidence = infer_role(acquisition, description)
    return Stack(key="k", series_instance_uid="1.2", series_number=2, stack=None,
                 description=description, modality="MR", frame_of_reference_uid="1.3",
                 instances=(), size=(matrix, matrix, slices), spacing_mm=(pixel, pixel, step),
                 origin_mm=(0.0, 0.0, 0.0), direction=(1, 0, 0, 0, 1, 0, 0, 0, 1),
                 acquisition=acquisition, role=role, role_reason=reason,
                 confidence=confidence)  # fmt: skip


SCOUT = {"tr": 4.0, "te": 1.5, "pixel": 2.0, "matrix": 128, "slices": 32, "step": 5.0}


def test_single_plane_3d_scout_gets_no_measurable_role() -> None:
    bands = load_role_bands()
    stack = _stack(**SCOUT)
    assert stack.role == Role.T1  # the physics alone
    reason = scout_reason(stack, bands)
    assert reason is not None and reason.startswith("3-D scout")


@pytest.mark.parametrize(
    ("what", "changes"),
    [
        (
            "1 mm spoiled gradient echo T1",
            {"pixel": 1.0, "matrix": 256, "slices": 176, "step": 1.0},
        ),
        ("MPRAGE-like, inversion prepared", {"tr": 7.5, "te": 3.0, "inversion_time_ms": 900.0}),
        ("abdominal 3-D T1, 256 matrix", {"matrix": 256, "pixel": 1.5, "slices": 72, "step": 3.0}),
        ("many thin partitions", {"slices": 120, "step": 1.5}),
        ("named by its description", {"description": "t1_vibe_tra"}),
        ("post-contrast", {"contrast_agent": "gadobutrol"}),
        ("a dynamic phase", {"temporal_position": 3}),
        ("declared 2-D", {"mr_acquisition_type": "2D"}),
        ("longer TE", {"te": 4.0}),
    ],
)
def test_true_3d_t1_keeps_its_role(what: str, changes: dict) -> None:
    bands = load_role_bands()
    settings = {**SCOUT, **changes}
    acq_keys = {"inversion_time_ms", "contrast_agent", "temporal_position"}
    extra = {k: settings.pop(k) for k in list(settings) if k in acq_keys}
    acquisition_type = settings.pop("mr_acquisition_type", None)
    stack = _stack(**settings, **extra)
    if acquisition_type:
        from dataclasses import replace

        stack = replace(stack, acquisition=replace(stack.acquisition,
                                                   mr_acquisition_type=acquisition_type))  # fmt: skip
    assert stack.role in (Role.T1, Role.T1POST), (what, stack.role_reason)
    assert scout_reason(stack, bands) is None, what


def test_scout_is_unknown_through_index_study(tmp_path: Path) -> None:
    fields = {"RepetitionTime": "4", "EchoTime": "1.5", "FlipAngle": "10", "ScanningSequence": "GR",
              "MRAcquisitionType": "3D"}  # fmt: skip
    write_classic_series(tmp_path / "scout", np.ones((8, 16, 16), np.uint16),
                         spacing=(2.0, 2.0, 5.0), series_number=1, extra=fields)  # fmt: skip
    write_classic_series(tmp_path / "t1", np.ones((48, 16, 16), np.uint16),
                         spacing=(1.0, 1.0, 1.0), series_number=2, extra=fields)  # fmt: skip
    stacks = {s.series_number: s for s in index_study(tmp_path).stacks}
    assert stacks[1].role == Role.UNKNOWN and stacks[1].confidence is None
    assert "3-D scout" in stacks[1].role_reason
    assert stacks[2].role == Role.T1


# --------------------------------------------------------------------------------------------
# Value quirks without a test elsewhere


@pytest.mark.parametrize(
    ("image_type", "expected"),
    [
        ("derived\\primary\\adc\\diffusion", Role.ADC),  # lower case
        ("DERIVED\\PRIMARY\\DIFFUSION\\ADC", Role.ADC),
        ("derived\\primary\\m\\dixon\\water", Role.WATER),  # flavour value in 5th position
        ("original\\primary\\in_phase\\m", Role.IP),
    ],
)
def test_image_type_case_and_order(image_type: str, expected: Role) -> None:
    a = Acquisition(repetition_time_ms=5.0, echo_time_ms=2.3, flip_angle_deg=10.0,
                    scanning_sequence=("EP",) if expected == Role.ADC else ("GR",),
                    image_type=tuple(image_type.split("\\")))  # fmt: skip
    assert infer_role(a)[0] == expected


def test_spacing_between_slices_disagreeing_with_positions(tmp_path: Path) -> None:
    """SpacingBetweenSlices 6 and SliceThickness 5 while the slices lie 3.5 mm apart: the
    positions win, as in SimpleITK's reader (PS3.3 C.7.6.2.1.1)."""
    stored = _stored(n=4)
    paths = write_classic_series(tmp_path / "a", stored, spacing=(1.0, 1.0, 3.5), shuffle=False,
                                 extra={"SliceThickness": "5", "SpacingBetweenSlices": "6"})  # fmt: skip
    (stack,) = index_study(tmp_path).stacks
    reader = sitk.ImageSeriesReader()
    reader.SetFileNames([str(p) for p in paths])
    theirs = reader.Execute()
    assert stack.spacing_mm == pytest.approx(theirs.GetSpacing())
    assert stack.spacing_mm[2] == pytest.approx(3.5)


def test_signed_twelve_bit_pixels_with_rescale(tmp_path: Path) -> None:
    """PixelRepresentation 1 with BitsStored 12: values sign-extended from bit 11 (PS3.5 8.1.1)
    and rescaled, as pydicom's pixel_array and the rescale give."""
    values = np.random.default_rng(3).integers(-2048, 2048, (2, 6, 5)).astype(np.int16)
    paths = write_classic_series(tmp_path / "a", values, shuffle=False, rescale=(2.0, -100.0))
    for path in paths:
        ds = pydicom.dcmread(path)
        raw = ds.pixel_array.astype(np.uint16) & np.uint16(0x0FFF)  # 12-bit two's complement
        ds.PixelData = raw.tobytes()
        ds.BitsStored, ds.HighBit = 12, 11
        ds.save_as(path)
    (stack,) = index_study(tmp_path).stacks
    ours = sitk.GetArrayFromImage(load_stack(stack))
    for k, path in enumerate(paths):
        expected = pydicom.dcmread(path).pixel_array * 2.0 - 100.0
        np.testing.assert_array_equal(ours[k], expected)
    np.testing.assert_array_equal(ours, values * 2.0 - 100.0)


@pytest.mark.parametrize("syntax", ["1.2.840.10008.1.2", "1.2.840.10008.1.2.1"])
def test_fast_header_path_reads_the_private_elements_as_pydicom_does(
    tmp_path: Path, syntax: str
) -> None:
    """The scan's own header walk keeps the private creators and elements of every block it
    lists; pydicom's reader is the oracle (implicit VR: pydicom's private dictionary gives the
    VRs)."""
    from sigreport.ingest.header import read_frames

    ds = classic_slices(_stored(n=1), extra={"RepetitionTime": "9000", "EchoTime": "110",
                                              "ScanningSequence": ["SE", "IR"]})[0]  # fmt: skip
    path = save(_philips(ds, scale=0.125, ti_2001="2450"), tmp_path / "p.dcm", syntax)
    (fast,) = read_frames(path)
    (slow,) = read_frames(path, fast=False)
    assert fast.scaling == slow.scaling and fast.scaling.private_scale_slope == 0.125
    assert fast.acquisition == slow.acquisition
    assert fast.acquisition.inversion_time_ms == 2450.0
