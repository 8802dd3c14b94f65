"""Diffusion, susceptibility, chemical shift and dynamic contrast (measure.families)."""

from __future__ import annotations

import pytest

from sigreport.errors import InputError
from sigreport.measure.families import (
    PhaseInput,
    adc_units_ok,
    chemical_shift_of,
    diffusion_of,
    drop_percent,
    dynamic_of,
    fat_fraction_percent,
    load_family_thresholds,
    pair_mismatch,
    susceptibility_of,
)
from sigreport.model import Acquisition, Grade, Role

TH = load_family_thresholds()


def test_bundled_thresholds_are_the_documented_defaults():
    assert TH.blooming_min_drop_percent == 40.0
    # Fujiyoshi et al. AJR 2003: signal-intensity index cut-off 16.5 % (from memory).
    assert TH.microscopic_fat_min_drop_percent == 16.5
    # Kuhl et al. Radiology 1999: plateau within +-10 % of the early peak (from memory).
    assert TH.curve_band_percent == 10.0
    assert TH.early_peak_max_delay_s == 120.0


@pytest.mark.parametrize(
    ("dwi", "adc", "restricted", "shine"),
    [
        (Grade.HYPERINTENSE, Grade.HYPOINTENSE, True, False),  # abscess, acute infarct
        (Grade.HYPERINTENSE, Grade.ISOINTENSE, False, True),  # T2 shine-through
        (Grade.HYPERINTENSE, Grade.HYPERINTENSE, False, True),
        (Grade.HYPOINTENSE, Grade.HYPERINTENSE, False, False),  # a simple cyst
        (Grade.ISOINTENSE, Grade.HYPOINTENSE, False, False),
    ],
)
def test_restriction_and_shine_through_follow_their_definitions(dwi, adc, restricted, shine):
    # Common practice: restricted diffusion is bright on DWI and dark on ADC; bright on DWI with
    # an ADC that is not dark is T2 shine-through.
    out = diffusion_of(dwi, adc, dwi_ratio=2.0, adc_ratio=0.5, adc_value=400.0, b_value=1000)
    assert (out.restricted, out.shine_through) == (restricted, shine)
    assert out.to_json()["dwi"] == "DWI" and out.to_json()["adc_1e-6_mm2_s"] == 400.0


def test_diffusion_flags_are_unknown_without_both_grades():
    out = diffusion_of(
        Grade.HYPERINTENSE, None, dwi_ratio=2.0, adc_ratio=None, adc_value=None, b_value=1000
    )
    assert out.restricted is None and out.shine_through is None


@pytest.mark.parametrize(
    ("tissue", "value", "ok"),
    # White matter ADC about 0.7 x 10^-3 mm^2/s (Helenius 2002, from memory); a map stored in
    # 10^-3 mm^2/s (0.7) or in 10^-5 (70) fails the check.
    [
        ("white matter", 720.0, True),
        ("White Matter", 0.72, False),
        ("white matter", 72.0, False),
        ("CSF", 3000.0, True),
        ("fat", 20.0, None),
        (None, 700.0, None),
    ],
)
def test_adc_units_are_checked_on_the_reference_tissue(tissue, value, ok):
    assert adc_units_ok(tissue, value, TH) is ok


def test_blooming_needs_the_drop_and_a_dark_lesion():
    ratios = {Role.T2: 0.5, Role.T2STAR: 0.1, Role.SWI: 0.05}
    grades = {Role.T2STAR: Grade.HYPOINTENSE, Role.SWI: Grade.HYPOINTENSE}
    out = susceptibility_of(ratios, grades, TH)
    assert out is not None and out.target is Role.SWI  # SWI wins over T2*
    assert out.drop_percent == pytest.approx(90.0) and out.blooming
    # A T2-bright lesion that is merely less bright on T2* does not bloom.
    bright = susceptibility_of(
        {Role.T2: 3.0, Role.T2STAR: 1.2}, {Role.T2STAR: Grade.HYPERINTENSE}, TH
    )
    assert bright is not None and bright.drop_percent == pytest.approx(60.0)
    assert bright.blooming is False
    assert susceptibility_of({Role.T2: 1.0}, {}, TH) is None


def test_chemical_shift_drop_and_fat_fraction():
    assert drop_percent(1.6, 0.8) == pytest.approx(50.0)
    assert drop_percent(0.0, 0.8) is None and drop_percent(None, 1.0) is None
    assert fat_fraction_percent(300.0, 100.0) == pytest.approx(25.0)
    assert fat_fraction_percent(-3.0, 0.0) is None
    out = chemical_shift_of(
        1.0, 0.8, water_median=300.0, fat_median=100.0, has_pair=True, has_dixon=True, thresholds=TH
    )
    assert out is not None and out.microscopic_fat and out.fat_fraction_percent == 25.0
    # At exactly the cut-off the flag fires (>=, compared as printed).
    edge = chemical_shift_of(
        1.0,
        0.835,
        water_median=None,
        fat_median=None,
        has_pair=True,
        has_dixon=False,
        thresholds=TH,
    )
    assert edge is not None and edge.drop_percent == pytest.approx(16.5) and edge.microscopic_fat
    assert (
        chemical_shift_of(
            None,
            None,
            water_median=None,
            fat_median=None,
            has_pair=False,
            has_dixon=False,
            thresholds=TH,
        )
        is None
    )


def _phases(percents, delays=(0, 60, 120, 240, 360), pre=1.0):
    return [
        PhaseInput(
            series_number=10 + k,
            time_s=1000.0 + d,
            temporal_position=k + 2,
            ratio=pre * (1 + p / 100),
        )
        for k, (p, d) in enumerate(zip(percents, delays, strict=True))
    ]


@pytest.mark.parametrize(
    ("percents", "curve"),
    # Textbook curves (Kuhl 1999): type I keeps rising, type II flattens, type III falls after
    # an early peak.
    [
        ((40, 70, 90, 110, 130), "persistent"),
        ((90, 100, 102, 101, 98), "plateau"),
        ((110, 130, 120, 100, 85), "washout"),
        ((100, 100, 100, 100, 110.0), "plateau"),  # exactly +10 %: still plateau
        ((100, 100, 100, 100, 110.02), "persistent"),
    ],
)
def test_curve_types_on_textbook_curves(percents, curve):
    out = dynamic_of(Role.T1FS, 1.0, list(reversed(_phases(percents))), TH)
    assert out is not None and out.curve == curve
    assert [p.delay_s for p in out.phases] == [0, 60, 120, 240, 360]  # ordered by time
    assert out.phases[0].percent == pytest.approx(percents[0])


def test_early_peak_only_counts_phases_up_to_the_delay():
    # A peak at 240 s is not "early": the early peak is 60, and 100 at the end is persistent.
    out = dynamic_of(Role.T1, 1.0, _phases((40, 60, 50, 140, 100)), TH)
    assert out is not None and out.peak_phase == 4 and out.curve == "persistent"


def test_phases_without_times_are_ordered_but_not_typed():
    phases = [PhaseInput(5, None, 3, 1.5), PhaseInput(4, None, 2, 1.2)]
    out = dynamic_of(Role.T1, 1.0, phases, TH)
    assert out is not None and [p.series_number for p in out.phases] == [4, 5]
    assert out.curve is None
    assert dynamic_of(Role.T1, 1.0, phases[:1], TH) is None


def test_pair_mismatch_names_what_differs():
    se = Acquisition(
        repetition_time_ms=4000,
        echo_time_ms=100,
        scanning_sequence=("SE",),
        mr_acquisition_type="2D",
    )
    gre = Acquisition(
        repetition_time_ms=700, echo_time_ms=20, scanning_sequence=("GR",), mr_acquisition_type="3D"
    )
    why = pair_mismatch(se, gre)
    assert why is not None and "spin echo vs gradient echo" in why and "2D vs 3D" in why
    assert "TR 4000 vs 700 ms" in why
    close = Acquisition(
        repetition_time_ms=4400,
        echo_time_ms=95,
        scanning_sequence=("SE",),
        mr_acquisition_type="2D",
    )
    assert pair_mismatch(se, close) is None


def test_a_site_file_with_a_bad_value_is_refused(tmp_path):
    text = (load_family_thresholds.__globals__["lexicon"].find_file("families.toml")).read_text()
    (tmp_path / "families.toml").write_text(
        text.replace("band_percent = 10.0", 'band_percent = "x"')
    )
    with pytest.raises(InputError, match=r"\[dynamic\] band_percent must be a float"):
        load_family_thresholds(tmp_path)
    (tmp_path / "families.toml").write_text(text.replace("CSF = [2400.0, 3600.0]", "CSF = [9, 1]"))
    with pytest.raises(InputError, match=r"'csf'|'CSF'"):
        load_family_thresholds(tmp_path)
