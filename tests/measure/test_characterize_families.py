"""Characterization of the other sequence families on hand-built measurements: the flags follow
docs/measurements.md, the ADC map's scaling is checked against published tissue values, a
mismatched pair is flagged unreliable, Dixon images are not graded, and every phase of a
dynamic acquisition gives the curve."""

from __future__ import annotations

from dataclasses import replace

from sigreport.measure import characterize
from sigreport.measure.families import load_family_thresholds
from sigreport.model import Acquisition, QcLevel, Role

ADC, DWI, T2, SWI, IP, OP = Role.ADC, Role.DWI, Role.T2, Role.SWI, Role.IP, Role.OP
WATER, FAT, T1FS, POST = Role.WATER, Role.FAT, Role.T1FS, Role.T1POSTFS
TH = load_family_thresholds()


def _codes(result) -> list[str]:
    return [n.code for n in result.qc]


def test_restricted_diffusion_and_the_adc_value(build, rules):
    # Normal white matter ADC about 0.7-0.8 x 10^-3 mm^2/s (Helenius et al. AJNR 2002, from
    # memory); an abscess about 0.4 (common practice).
    lesion = build.lesion({DWI: 300.0, ADC: 420.0})
    ref = build.reference({DWI: 100.0, ADC: 760.0})
    result = characterize(build.study([lesion, ref]), rules, families=TH)
    d = result.lesions[0].to_json()["diffusion"]
    assert d["restricted"] is True and d["shine_through"] is False
    assert d["adc_1e-6_mm2_s"] == 420.0 and d["adc_ratio"] == round(420 / 760, 4)
    assert result.adc_units_ok is True
    assert "restricted-diffusion" in result.lesions[0].behaviour


def test_an_adc_map_without_its_vendor_scaling_is_flagged_and_its_values_not_reported(build, rules):
    # The same tissues stored in 10^-3 mm^2/s (a scale of 1000 not applied): ratios are
    # unchanged, the reference's white matter at 0.76 is far outside its 550-1000 range.
    lesion = build.lesion({DWI: 300.0, ADC: 0.42})
    ref = build.reference({DWI: 100.0, ADC: 0.76})
    result = characterize(build.study([lesion, ref]), rules, families=TH)
    d = result.lesions[0].to_json()["diffusion"]
    assert result.adc_units_ok is False
    assert d["adc_1e-6_mm2_s"] is None and d["restricted"] is True
    note = next(n for n in result.qc if n.code == "adc-units-implausible")
    assert note.level is QcLevel.WARNING and "R1" in note.message and "0.76" in note.message


def test_shine_through_when_dwi_is_bright_and_adc_is_not_dark(build, rules):
    lesion = build.lesion({DWI: 160.0, ADC: 1500.0})
    ref = build.reference({DWI: 100.0, ADC: 760.0})
    lesion_json = characterize(build.study([lesion, ref]), rules, families=TH).lesions[0]
    assert lesion_json.diffusion.shine_through is True and lesion_json.diffusion.restricted is False
    assert "t2-shine-through" in lesion_json.behaviour


def test_blooming_needs_the_drop_and_a_dark_susceptibility_series(build, rules):
    ref = build.reference({T2: 100.0, SWI: 100.0})
    dark = build.lesion({T2: 150.0, SWI: 30.0})  # drop 80 %, hypointense
    bright = build.lesion({T2: 300.0, SWI: 150.0})  # drop 50 %, still hyperintense
    for lesion, want in ((dark, True), (bright, False)):
        out = characterize(build.study([lesion, ref]), rules, families=TH).lesions[0]
        assert out.susceptibility is not None and out.susceptibility.blooming is want
        assert ("blooming" in out.behaviour) is want


def test_chemical_shift_uses_the_core_and_dixon_is_not_graded(build, rules):
    # Whole ROI drops 40 % (the dark fat-water border on opposed phase), the core only 5 %.
    lesion = build.lesion(
        {
            IP: build.series(100.0, core=100.0),
            OP: build.series(60.0, core=95.0),
            WATER: 800.0,
            FAT: 200.0,
        }
    )
    ref = build.reference({IP: 100.0, OP: 100.0, WATER: 900.0, FAT: 20.0})
    result = characterize(build.study([lesion, ref]), rules, families=TH)
    cs = result.lesions[0].to_json()["chemical_shift"]
    assert cs["drop_percent"] == 5.0 and cs["microscopic_fat"] is False
    assert cs["fat_fraction_percent"] == 20.0  # 100 F / (W + F) = 200 / 1000
    signal = result.lesions[0].to_json()["signal"]
    assert signal["FAT"]["ratio"] is None and signal["FAT"]["grade"] is None
    assert signal["WATER"]["median"] == 800.0


def test_a_mismatched_in_opposed_phase_pair_is_unreliable(build, rules):
    gre = Acquisition(repetition_time_ms=150.0, echo_time_ms=2.3, scanning_sequence=("GR",))
    stacks = {
        IP: build.stack(IP, replace(gre, echo_time_ms=4.6)),
        # a 2-D spin-echo "opposed-phase" series cannot be compared with a gradient echo
        OP: build.stack(OP, Acquisition(repetition_time_ms=500.0, scanning_sequence=("SE",))),
    }
    lesion = build.lesion({IP: build.series(100.0, core=100.0), OP: build.series(50.0, core=50.0)})
    ref = build.reference({IP: 100.0, OP: 100.0})
    result = characterize(build.study([lesion, ref], stacks=stacks), rules, families=TH)
    cs = result.lesions[0].to_json()["chemical_shift"]
    assert cs["reliable"] is False and cs["microscopic_fat"] is True
    assert "microscopic-fat" not in result.lesions[0].behaviour  # unknown to the rules
    note = next(n for n in result.qc if n.code == "pair-mismatched")
    assert "series 13" in note.message and "series 14" in note.message
    assert "spin echo" in note.message
    # the in/opposed-phase echo times differ by design: not a mismatch by themselves
    same = {IP: stacks[IP], OP: build.stack(OP, gre)}
    again = characterize(build.study([lesion, ref], stacks=same), rules, families=TH)
    assert "pair-mismatched" not in _codes(again)


def test_every_dynamic_phase_gives_the_curve_and_the_last_one_the_signal(build, rules):
    # A textbook washout curve (Kuhl et al. Radiology 1999, type III): +100 % early, +60 % late.
    acq = Acquisition(repetition_time_ms=4.5, echo_time_ms=2.0, scanning_sequence=("GR",))
    phases = tuple(
        replace(
            build.stack(POST, replace(acq, acquisition_time_s=36000.0 + delay)),
            key=f"phase{n}",
            series_number=20 + n,
            dynamic_group="g",
            dynamic_phase=n,
            dynamic_delay_s=float(delay),
        )
        for n, delay in ((1, 0), (2, 60), (3, 300))
    )
    lesion = build.lesion({T1FS: 100.0, POST: 160.0})
    ref = build.reference({T1FS: 100.0, POST: 100.0})
    for roi, values in ((lesion, (200.0, 190.0, 160.0)), (ref, (100.0, 100.0, 100.0))):
        roi.by_phase.update({p.key: build.series(v) for p, v in zip(phases, values, strict=True)})
    measured = replace(
        build.study([lesion, ref], stacks={T1FS: build.stack(T1FS, acq), POST: phases[-1]}),
        phases={POST: phases},
    )
    out = characterize(measured, rules, families=TH).lesions[0]
    dynamic = out.to_json()["dynamic"]
    assert [p["delay_s"] for p in dynamic["phases"]] == [0.0, 60.0, 300.0]
    assert [p["percent"] for p in dynamic["phases"]] == [100.0, 90.0, 60.0]
    assert dynamic["curve"] == "washout" and dynamic["peak_phase"] == 1 and dynamic["pre"] == "T1FS"
    assert out.to_json()["enhancement"]["percent"] == 60.0  # version 1: from the last phase
    assert "curve-washout" in out.behaviour
