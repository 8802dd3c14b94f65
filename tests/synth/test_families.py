"""The Version 2 sequence families of the synthetic studies: diffusion, susceptibility, chemical
shift (in/opposed phase, Dixon) and dynamic contrast, checked against physics and published
values, and the two scenarios built to show them."""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pydicom
import pytest

from sigreport.synth import generate_study, physics
from sigreport.synth.tissues import load_tissues

# --------------------------------------------------------------------------------------------
# Physics against outside references


@pytest.mark.parametrize(
    ("field", "shift_hz", "opposed_ms", "in_ms"),
    # 3.4 ppm x 42.577 MHz/T x B0 (CODATA 2018 gamma); opposed/in-phase echo times of about
    # 2.3/4.6 ms at 1.5 T and 1.15/2.3 ms at 3 T are the textbook values (common practice).
    [(1.5, 217.1, 2.30, 4.60), (3.0, 434.3, 1.15, 2.30)],
)
def test_fat_water_shift_and_echo_times(field, shift_hz, opposed_ms, in_ms):
    assert physics.fat_water_shift_hz(field) == pytest.approx(shift_hz, abs=0.2)
    assert physics.opposed_phase_te_ms(field) == pytest.approx(opposed_ms, abs=0.01)
    assert physics.in_phase_te_ms(field) == pytest.approx(in_ms, abs=0.01)
    assert physics.fat_water_phase(physics.opposed_phase_te_ms(field), field) == pytest.approx(
        math.pi
    )
    assert physics.fat_water_phase(physics.in_phase_te_ms(field), field) == pytest.approx(
        0.0, abs=1e-9
    ) or physics.fat_water_phase(physics.in_phase_te_ms(field), field) == pytest.approx(2 * math.pi)


def test_two_component_magnitude_cancels_at_opposed_phase():
    # |W + F e^{i pi}| = |W - F|; in phase the parts add.
    assert physics.two_component_magnitude(0.7, 0.3, math.pi) == pytest.approx(0.4)
    assert physics.two_component_magnitude(0.7, 0.3, 0.0) == pytest.approx(1.0)
    assert physics.two_component_magnitude(0.0, 0.9, math.pi) == pytest.approx(0.9)


def test_free_water_attenuation_and_adc_round_trip():
    # Free water at 37 C: D about 3.0 x 10^-3 mm^2/s (Mills 1973, from memory): at b = 1000
    # s/mm^2 the signal falls to exp(-3).
    assert physics.diffusion_weighting(3000.0, 1000.0) == pytest.approx(math.exp(-3.0))
    adc = np.array([380.0, 720.0, 3000.0])
    sb = 900.0 * physics.diffusion_weighting(adc, 1000.0)
    assert physics.apparent_diffusion(np.full(3, 900.0), sb, 1000.0) == pytest.approx(adc)


def _curve(percent_by_delay: list[tuple[float, float]]) -> str:
    """The published three-type classification as our docs define it: the early peak among
    phases <= 120 s after the first post phase, the last phase within +-10 % of it."""
    first = percent_by_delay[0][0]
    early = max(p for d, p in percent_by_delay if d - first <= 120)
    last = percent_by_delay[-1][1]
    if last > early * 1.1:
        return "persistent"
    return "washout" if last < early * 0.9 else "plateau"


@pytest.mark.parametrize("name", ["persistent", "plateau", "washout"])
def test_uptake_curves_fall_into_their_published_type(name):
    # Kuhl CK et al. Radiology 1999;211:101-110: type I persistent, II plateau, III washout.
    curve = load_tissues(1.5).uptake[name]
    delays = [30.0, 90.0, 150.0, 270.0, 390.0]
    values = physics.uptake_fraction(delays, rise_s=curve.rise_s, washout_s=curve.washout_s)
    assert (
        float(
            np.max(
                physics.uptake_fraction(
                    np.arange(0, 3000.0), rise_s=curve.rise_s, washout_s=curve.washout_s
                )
            )
        )
        <= 1.0 + 1e-9
    )
    assert _curve(list(zip(delays, values, strict=True))) == name


# --------------------------------------------------------------------------------------------
# The scenarios


@pytest.fixture(scope="module")
def diffusion(tmp_path_factory):
    out = tmp_path_factory.mktemp("diffusion") / "out"
    study = generate_study("diffusion", out, motion=False)
    return study, json.loads(study.truth_path.read_text())


@pytest.fixture(scope="module")
def kinetics(tmp_path_factory):
    out = tmp_path_factory.mktemp("kinetics") / "out"
    study = generate_study("kinetics", out, motion=False)
    return study, json.loads(study.truth_path.read_text())


def _series(study_dir: Path, number: int) -> list[pydicom.Dataset]:
    return [pydicom.dcmread(p) for p in sorted((study_dir / f"S{number:02d}").glob("*.dcm"))]


def _volume(datasets: list[pydicom.Dataset]) -> tuple[np.ndarray, list[pydicom.Dataset]]:
    """Rescaled pixels (PS3.3 C.11.1.1.2) sorted along the slice normal (PS3.3 C.7.6.2.1.1)."""
    normal = np.cross(*np.reshape(np.asarray(datasets[0].ImageOrientationPatient, float), (2, 3)))
    ordered = sorted(datasets, key=lambda d: float(np.dot(normal, d.ImagePositionPatient)))
    stack = np.stack(
        [d.pixel_array * float(d.RescaleSlope) + float(d.RescaleIntercept) for d in ordered]
    )
    return stack, ordered


def _roi_values(stack, ordered, center, radius):
    """Values of the voxels whose centres lie inside a sphere (PS3.3 C.7.6.2.1.1 positions)."""
    first = ordered[0]
    iop = np.asarray(first.ImageOrientationPatient, float)
    row, col = iop[:3], iop[3:]
    dr, dc = (float(v) for v in first.PixelSpacing)
    out = []
    for k, d in enumerate(ordered):
        origin = np.asarray(d.ImagePositionPatient, float)
        j, i = np.mgrid[0 : d.Rows, 0 : d.Columns]
        pts = origin + i[..., None] * dc * row + j[..., None] * dr * col
        inside = np.linalg.norm(pts - np.asarray(center), axis=-1) <= radius
        out.append(stack[k][inside])
    return np.concatenate(out)


def test_dwi_writes_one_series_with_a_stack_per_b_value(diffusion):
    study, truth = diffusion
    dwi = _series(study.study_dir, truth["series"]["DWI"]["series_number"])
    b_values = sorted({float(d.DiffusionBValue) for d in dwi})
    assert b_values == [0.0, 1000.0]
    assert len({d.SeriesInstanceUID for d in dwi}) == 1
    assert len({d.SOPInstanceUID for d in dwi}) == len(dwi)
    assert sorted(int(d.InstanceNumber) for d in dwi) == list(range(1, len(dwi) + 1))
    assert {tuple(d.ImageType) for d in dwi} == {("ORIGINAL", "PRIMARY", "DIFFUSION", "TRACEW")}
    assert list(dwi[0].ScanningSequence) == ["SE", "EP"]


def test_adc_map_holds_physical_values(diffusion):
    study, truth = diffusion
    adc = _series(study.study_dir, truth["series"]["ADC"]["series_number"])
    assert tuple(adc[0].ImageType)[:2] == ("DERIVED", "PRIMARY") and "ADC" in adc[0].ImageType
    stack, ordered = _volume(adc)
    case = {r["id"]: r for r in _case(study)["roi"]}
    # Published ADCs (10^-6 mm^2/s): normal white matter 650-800 (Helenius 2002), acute
    # infarct about half of it (Schlaug 1997), CSF near free water 3000 (Mills 1973); all from
    # memory. The map is computed from noisy b=0 and b=1000 images, so medians within 10 %.
    for roi_id, low, high in [("R1", 650, 800), ("L5", 300, 450), ("C1", 2700, 3300)]:
        values = _roi_values(stack, ordered, case[roi_id]["center_mm"], 3.0)
        assert low <= float(np.median(values)) <= high, roi_id
        expected = truth["rois"][roi_id]["diffusion"]["adc_1e-6_mm2_s"]
        assert float(np.median(values)) == pytest.approx(expected, rel=0.10), roi_id


def _case(study):
    import tomllib

    return tomllib.loads(study.case_path.read_text())


def test_diffusion_scenario_flags_follow_the_teaching_cases(diffusion):
    _, truth = diffusion
    rois = truth["rois"]
    exp = {k: v["expected"] for k, v in rois.items()}
    # Common practice: pus and acute infarcts restrict diffusion; a necrotic tumour core is
    # bright on DWI from its long T2 with a high ADC (shine-through); a simple cyst is dark on
    # DWI; haemosiderin blooms on gradient echo and SWI.
    assert exp["L1"]["restricted"] and not exp["L1"]["shine_through"]
    assert exp["L5"]["restricted"]
    assert exp["L2"]["shine_through"] and not exp["L2"]["restricted"]
    assert not exp["L3"]["restricted"] and not exp["L3"]["shine_through"]
    assert exp["L4"]["blooming"] and rois["L4"]["susceptibility"]["to"] == "SWI"
    assert not any(exp[k]["blooming"] for k in ("L1", "L2", "L3", "L5"))
    # CSF is bright on T2 and suppressed on FLAIR (common practice).
    assert rois["C1"]["ratio"]["T2"] > 2 and rois["C1"]["expected"]["fluid_suppressed"]


def test_chemical_shift_headers_and_flags(kinetics):
    study, truth = kinetics
    ip = _series(study.study_dir, truth["series"]["IP"]["series_number"])[0]
    op = _series(study.study_dir, truth["series"]["OP"]["series_number"])[0]
    assert float(ip.EchoTime) == pytest.approx(physics.in_phase_te_ms(1.5), abs=0.01)
    assert float(op.EchoTime) == pytest.approx(physics.opposed_phase_te_ms(1.5), abs=0.01)
    assert "IN_PHASE" in ip.ImageType and "OUT_PHASE" in op.ImageType
    exp = {k: v["expected"] for k, v in truth["rois"].items()}
    # Intracellular fat drops on opposed phase; macroscopic fat (no water in the voxel) does
    # not (common practice).
    assert exp["L1"]["microscopic_fat"] and not exp["L2"]["microscopic_fat"]
    assert not exp["L3"]["microscopic_fat"]


def test_dixon_fat_fraction_from_the_images_matches_truth(kinetics):
    study, truth = kinetics
    case = {r["id"]: r for r in _case(study)["roi"]}
    water, w_sorted = _volume(_series(study.study_dir, truth["series"]["WATER"]["series_number"]))
    fat, f_sorted = _volume(_series(study.study_dir, truth["series"]["FAT"]["series_number"]))
    for roi_id in ("L1", "L2", "L3"):
        centre, radius = case[roi_id]["center_mm"], 3.5
        w = float(np.median(_roi_values(water, w_sorted, centre, radius)))
        f = float(np.median(_roi_values(fat, f_sorted, centre, radius)))
        expected = truth["rois"][roi_id]["chemical_shift"]["fat_fraction_percent"]
        assert 100 * f / (w + f) == pytest.approx(expected, abs=3.0), roi_id


def test_dynamic_phases_are_timed_and_typed(kinetics):
    study, truth = kinetics
    phases = truth["rois"]["L3"]["dynamic"]["phases"]
    numbers = [p["series_number"] for p in phases]
    first = [_series(study.study_dir, n)[0] for n in numbers]
    pre = _series(study.study_dir, truth["rois"]["L3"]["dynamic"]["pre_series_number"])[0]
    times = [float(d.AcquisitionTime) for d in first]
    assert times == sorted(times) and float(pre.AcquisitionTime) < times[0]
    assert [int(d.TemporalPositionIdentifier) for d in [pre, *first]] == list(range(1, 7))
    assert {d.ContrastBolusStartTime for d in first} == {first[0].ContrastBolusStartTime}
    assert "ContrastBolusAgent" in first[0] and "ContrastBolusAgent" not in pre
    assert [p["delay_s"] for p in phases] == [0.0, 60.0, 120.0, 240.0, 360.0]
    curves = {k: truth["rois"][k]["expected"]["curve"] for k in ("L3", "L4", "L5")}
    assert curves == {"L3": "washout", "L4": "plateau", "L5": "persistent"}
