"""Characterization of hand-built studies: the classic signal behaviours of MR reading.

Signal values below are relative to white matter and chosen to show each behaviour the way it is
taught (common practice; the relaxation behaviour is from memory): free fluid is dark on T1,
bright on T2 and nulled on FLAIR; edema is T2 bright but not nulled; macroscopic fat is T1 bright
and loses its signal on fat suppression; methemoglobin (subacute blood) is T1 bright and keeps
its signal on fat suppression; a flow void is dark on every series.
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest
from scipy import ndimage

from sigreport.measure import characterize, measure_roi
from sigreport.model import (
    Acquisition,
    EnhancementPattern,
    Grade,
    MeasuredRoi,
    QcLevel,
    RoiKind,
    RoiShape,
    RoiSpec,
    Role,
)

T1, T2, FLAIR = Role.T1, Role.T2, Role.FLAIR
WM = {T1: 600.0, T2: 600.0, FLAIR: 500.0, Role.T1FS: 550.0, Role.T1POST: 620.0, Role.STIR: 400.0}


def _codes(result):
    return [n.code for n in result.qc]


def _one(result):
    assert len(result.lesions) == 1
    return result.lesions[0]


def _wm(build, roles, **kw):
    return build.reference({r: WM[r] for r in roles}, **kw)


def test_cyst_follows_fluid_and_is_suppressed_on_flair(build, rules):
    lesion = build.lesion({T1: 200.0, T2: 1800.0, FLAIR: 100.0})
    result = characterize(build.study([lesion, _wm(build, [T1, T2, FLAIR])]), rules)
    got = _one(result)
    assert got.signal[T1].grade is Grade.HYPOINTENSE
    assert got.signal[T2].grade is Grade.HYPERINTENSE
    assert got.signal[T2].ratio == pytest.approx(3.0)
    fluid = got.suppression["fluid"]
    assert (fluid.source, fluid.target) == (T2, FLAIR)
    # drop = 100 (1 - (100/500) / (1800/600)) = 93.33 % (docs/usage.md definition)
    assert fluid.drop_percent == pytest.approx(100 * (1 - 0.2 / 3.0))
    assert fluid.suppressed is True
    assert "follows-fluid" in got.behaviour and "t2-bright-not-fluid" not in got.behaviour


def test_edema_is_t2_bright_and_not_suppressed(build, rules):
    lesion = build.lesion({T1: 450.0, T2: 1200.0, FLAIR: 900.0})
    got = _one(characterize(build.study([lesion, _wm(build, [T1, T2, FLAIR])]), rules))
    assert got.suppression["fluid"].drop_percent == pytest.approx(100 * (1 - 1.8 / 2.0))
    assert got.suppression["fluid"].suppressed is False
    assert "t2-bright-not-fluid" in got.behaviour and "follows-fluid" not in got.behaviour


def test_fat_lesion_is_suppressed_and_contains_macroscopic_fat(build, rules):
    roles = [T1, Role.T1FS, T2]
    lesion = build.lesion({T1: 1500.0, Role.T1FS: 150.0, T2: 1100.0})
    got = _one(characterize(build.study([lesion, _wm(build, roles)]), rules))
    fat = got.suppression["fat"]
    assert (fat.source, fat.target) == (T1, Role.T1FS)
    assert fat.drop_percent == pytest.approx(100 * (1 - (150 / 550) / (1500 / 600)))
    assert fat.suppressed is True and fat.specific
    assert "macroscopic-fat" in got.behaviour and "t1-bright-not-fat" not in got.behaviour


def test_subacute_blood_is_t1_bright_without_fat_suppression(build, rules):
    roles = [T1, Role.T1FS, T2]
    lesion = build.lesion({T1: 1200.0, Role.T1FS: 1100.0, T2: 1300.0})
    got = _one(characterize(build.study([lesion, _wm(build, roles)]), rules))
    assert got.suppression["fat"].suppressed is False
    assert "t1-bright-not-fat" in got.behaviour and "macroscopic-fat" not in got.behaviour
    considerations = " ".join(rules.behaviour["t1-bright-not-fat"].considerations)
    for word in ("blood", "protein", "melanin", "mineral"):
        assert word in considerations


def test_stir_only_fat_pair_gets_a_not_specific_note(build, rules):
    roles = [T1, T2, Role.STIR]
    lesion = build.lesion({T1: 1500.0, T2: 1100.0, Role.STIR: 60.0})
    result = characterize(build.study([lesion, _wm(build, roles)]), rules)
    got = _one(result)
    fat = got.suppression["fat"]
    assert (fat.source, fat.target) == (T2, Role.STIR) and fat.suppressed is True
    assert fat.specific is False
    note = next(n for n in result.qc if n.code == "stir-fat-not-specific")
    assert note.level is QcLevel.INFO and "not" in note.message and "specific" in note.message
    # STIR nulls subacute blood too (common practice), so no "macroscopic fat" claim.
    assert "macroscopic-fat" not in got.behaviour
    assert "short-t1-nulled-on-stir" in got.behaviour


def test_first_fat_pair_the_study_has_wins(build, rules):
    roles = [T1, Role.T1FS, T2, Role.STIR]
    lesion = build.lesion({T1: 1500.0, Role.T1FS: 150.0, T2: 1100.0, Role.STIR: 60.0})
    result = characterize(build.study([lesion, _wm(build, roles)]), rules)
    assert _one(result).suppression["fat"].target is Role.T1FS
    assert "stir-fat-not-specific" not in _codes(result)


def test_missing_pairs_give_null_fields(build, rules):
    lesion = build.lesion({T2: 1800.0})
    got = _one(characterize(build.study([lesion, _wm(build, [T2])]), rules))
    out = got.to_json()
    assert out["enhancement"] == {
        "pre": None,
        "post": None,
        "percent": None,
        "enhancing": None,
        "pattern": None,
    }
    for kind in ("fluid", "fat"):
        assert out["suppression"][kind] == {
            "from": None,
            "to": None,
            "drop_percent": None,
            "suppressed": None,
        }
    assert list(out["signal"]) == ["T2"]  # a key absent: that role is not in the study
    assert out["flow_void"] is None  # one series: a flow void is not assessed
    assert "follows-fluid" not in out["behaviour"] and "non-enhancing" not in out["behaviour"]


def test_lesion_json_has_exactly_the_contract_keys(build, rules):
    lesion = build.lesion({T1: 200.0, T2: 1800.0, FLAIR: 100.0})
    out = _one(characterize(build.study([lesion, _wm(build, [T1, T2, FLAIR])]), rules)).to_json()
    # docs/usage.md findings.json lesion object
    assert set(out) == {
        "id",
        "site",
        "reference",
        "volume_ml",
        "max_diameter_mm",
        "signal",
        "enhancement",
        "suppression",
        "flow_void",
        # version 2: the other sequence families, null without their series
        "diffusion",
        "susceptibility",
        "chemical_shift",
        "dynamic",
        "behaviour",
        "size",  # sigreport-findings/2 (docs/CHANGES.md)
        "behaviour_not_applied",
    }
    assert [out[k] for k in ("diffusion", "susceptibility", "chemical_shift", "dynamic")] == [
        None
    ] * 4
    assert set(out["signal"]["T2"]) == {
        "n_voxels",
        "mean",
        "median",
        "sd",
        "p05",
        "p95",
        "ratio",
        "grade",
        "borderline",
    }
    assert out["signal"]["T2"]["grade"] == "hyperintense" and out["signal"]["T2"]["ratio"] == 3.0
    assert out["reference"] == "R1"
    assert set(out["suppression"]) == {"fluid", "fat"}


def test_unmeasurable_series_is_null_with_a_qc_note(build, rules):
    values = np.ones((5, 5, 5))
    mask = np.zeros(values.shape, bool)
    mask[2, 2, 1:4] = True
    small = measure_roi(
        values,
        mask,
        None,
        (1, 1, 1),
        lesion=True,
        min_voxels=rules.min_voxels,
        roi_id="L1",
        role=T2,
    )
    lesion = build.lesion({T1: 200.0, T2: small})
    result = characterize(build.study([lesion, _wm(build, [T1, T2])]), rules)
    got = _one(result)
    assert got.signal[T2] is None and got.to_json()["signal"]["T2"] is None
    note = next(n for n in result.qc if n.code == "roi-not-measured")
    assert note.message == "L1 on T2: only 3 voxels of L1 on T2 (minimum 20)"


def test_heterogeneous_reference_gets_a_warning(build, rules):
    lesion = build.lesion({T1: 200.0, T2: 1800.0})
    ref = build.reference({T1: 600.0, T2: 600.0}, cv=0.4)
    result = characterize(build.study([lesion, ref]), rules)
    note = next(n for n in result.qc if n.code == "reference-heterogeneous")
    assert note.level is QcLevel.WARNING and "R1" in note.message and "0.40" in note.message
    homogeneous = characterize(build.study([lesion, _wm(build, [T1, T2])]), rules)
    assert "reference-heterogeneous" not in _codes(homogeneous)


# --------------------------------------------------------------------------------------------
# Controls


def test_failed_csf_control_warns_and_marks_fluid_flags_unreliable(build, rules):
    lesion = build.lesion({T1: 200.0, T2: 1800.0, FLAIR: 100.0})
    # CSF keeps its signal on FLAIR: 1 - (1400/500)/(1800/600) = 6.7 % drop, far below 70 %.
    csf = build.control("C1", "CSF", {T1: 150.0, T2: 1800.0, FLAIR: 1400.0})
    result = characterize(build.study([lesion, _wm(build, [T1, T2, FLAIR]), csf]), rules)
    note = next(n for n in result.qc if n.code == "fluid-suppression-failed")
    assert note.level is QcLevel.WARNING and "failed" in note.message and "C1" in note.message
    got = _one(result)
    assert got.suppression["fluid"].reliable is False
    assert got.to_json()["suppression"]["fluid"]["reliable"] is False
    assert "reliable" not in got.to_json()["suppression"]["fat"]
    # An unreliable flag is unknown to the behaviour rules.
    assert "follows-fluid" not in got.behaviour
    entry = next(r for r in result.rois if r["id"] == "C1")
    assert entry["check"]["passed"] is False
    assert entry["check"]["drop_percent"] == pytest.approx(100 * (1 - 2.8 / 3.0), abs=0.01)


def test_passing_csf_control_keeps_flags_reliable(build, rules):
    lesion = build.lesion({T1: 200.0, T2: 1800.0, FLAIR: 100.0})
    csf = build.control("C1", "cerebrospinal fluid", {T1: 150.0, T2: 1800.0, FLAIR: 60.0})
    result = characterize(build.study([lesion, _wm(build, [T1, T2, FLAIR]), csf]), rules)
    assert "fluid-suppression-failed" not in _codes(result)
    got = _one(result)
    assert got.suppression["fluid"].reliable and "follows-fluid" in got.behaviour
    entry = next(r for r in result.rois if r["id"] == "C1")
    assert entry["tissue"] == "CSF" and entry["check"]["passed"] is True


def test_failed_fat_control_warns_and_marks_fat_flags_unreliable(build, rules):
    roles = [T1, Role.T1FS, T2]
    lesion = build.lesion({T1: 1500.0, Role.T1FS: 150.0, T2: 1100.0})
    fat = build.control("C2", "subcutaneous fat", {T1: 1600.0, Role.T1FS: 1400.0, T2: 1200.0})
    result = characterize(build.study([lesion, _wm(build, roles), fat]), rules)
    assert "fat-suppression-failed" in _codes(result)
    got = _one(result)
    assert got.suppression["fat"].reliable is False
    assert got.to_json()["suppression"]["fat"]["reliable"] is False
    assert "macroscopic-fat" not in got.behaviour and "t1-bright-not-fat" not in got.behaviour


def test_rois_entries_carry_site_medians_and_snr(build, rules):
    lesion = build.lesion({T1: 200.0, T2: 1800.0})
    study = build.study([lesion, _wm(build, [T1, T2])], noise={T1: 12.0, T2: None})
    result = characterize(study, rules)
    assert result.rois == (
        {
            "id": "R1",
            "kind": "reference",
            "site": None,
            "tissue": "white matter",
            "volume_ml": 0.5,
            "medians": {"T1": 600.0, "T2": 600.0},  # per series (sigreport-findings/2)
            # snr = reference median / Gaussian noise sigma: 600 / 12
            "snr": {"T1": 50.0, "T2": None},
        },
    )


# --------------------------------------------------------------------------------------------
# Flow void


def test_flow_void_is_dark_on_every_series_near_the_noise_floor(build, rules):
    lesion = build.lesion({T1: 40.0, T2: 30.0, FLAIR: 25.0})
    # Rayleigh mean of the background = sigma sqrt(pi/2) = 18.8; 3 x that = 56 > every median.
    noise = {T1: 15.0, T2: 15.0, FLAIR: 15.0, Role.UNKNOWN: 15.0}
    ref = _wm(build, [T1, T2, FLAIR])
    study = build.study([lesion, ref], noise=noise)
    got = _one(characterize(study, rules))
    assert got.flow_void is True
    assert "flow-void" in got.behaviour and "t2-dark" not in got.behaviour
    assert 40.0 <= rules.thresholds.flow_void.noise_factor * 15.0 * math.sqrt(math.pi / 2)


def test_a_flow_void_neither_enhances_nor_suppresses_from_noise(build, rules):
    # Common practice: fast-flowing arterial blood is dark before and after contrast; the
    # percent changes of two noise-floor medians say nothing about enhancement or suppression.
    T1POST = Role.T1POST
    lesion = build.lesion({T1: 20.0, T2: 40.0, FLAIR: 15.0, T1POST: 45.0})
    ref = _wm(build, [T1, T2, FLAIR, T1POST])
    noise = {T1: 15.0, T2: 15.0, FLAIR: 15.0, T1POST: 15.0}
    result = characterize(build.study([lesion, ref], noise=noise), rules)
    got = _one(result)
    assert got.flow_void is True
    assert got.enhancement.enhancing is False and got.enhancement.pattern.value == "none"
    assert got.suppression["fluid"].suppressed is None
    assert "flow-void-not-assessed" in _codes(result)
    assert "rim-enhancement" not in got.behaviour and "solid-enhancement" not in got.behaviour


def test_dark_tissue_far_above_the_noise_is_not_a_flow_void(build, rules):
    lesion = build.lesion({T1: 150.0, T2: 150.0, FLAIR: 120.0})
    study = build.study([lesion, _wm(build, [T1, T2, FLAIR])], noise={T1: 5.0, T2: 5.0, FLAIR: 5.0})
    got = _one(characterize(study, rules))
    assert got.flow_void is False
    assert "t2-dark" in got.behaviour  # T2 ratio 0.25: hypointense, not a flow void


def test_flow_void_needs_two_series_and_ignores_unknown(build, rules):
    one = build.lesion({T2: 30.0})
    got = _one(characterize(build.study([one, _wm(build, [T2])], noise={T2: 15.0}), rules))
    assert got.flow_void is None  # not assessed on one series: nothing is asserted
    # An UNKNOWN series (a localizer, say) where the lesion is bright does not count.
    lesion = build.lesion({T1: 40.0, T2: 30.0, Role.UNKNOWN: 900.0})
    ref = build.reference({T1: 600.0, T2: 600.0, Role.UNKNOWN: 300.0})
    study = build.study([lesion, ref], noise={T1: 15.0, T2: 15.0, Role.UNKNOWN: 15.0})
    got = _one(characterize(study, rules))
    assert got.flow_void is True and Role.UNKNOWN not in got.signal


def test_flow_void_without_any_noise_estimate_is_not_claimed(build, rules):
    lesion = build.lesion({T1: 40.0, T2: 30.0})
    result = characterize(build.study([lesion, _wm(build, [T1, T2])]), rules)
    assert _one(result).flow_void is False
    assert "flow-void-unverified" in _codes(result)


# --------------------------------------------------------------------------------------------
# Enhancement, with small volumes pushed through measure_roi


def _ball(shape, center, radius):
    zz, yy, xx = np.indices(shape, dtype=float)
    return (zz - center[0]) ** 2 + (yy - center[1]) ** 2 + (xx - center[2]) ** 2 <= radius**2


def _measured(kind, roi_id, role_images, mask, rules, **spec):
    by_role = {
        role: measure_roi(
            image,
            mask,
            None,
            (1.0, 1.0, 1.0),
            lesion=kind is RoiKind.LESION,
            min_voxels=rules.min_voxels,
            rules=rules,
        )
        for role, image in role_images.items()
    }
    return MeasuredRoi(
        spec=RoiSpec(id=roi_id, kind=kind, shape=RoiShape.MASK, **spec),
        volume_ml=float(mask.sum()) / 1000.0,
        max_diameter_mm=None,
        by_role=by_role,
    )


def _enhancing_study(build, rules, shell_post: float, core_post: float, *, post_gain=1.0):
    shape = (24, 24, 40)
    lesion_mask = _ball(shape, (12, 12, 12), 8.0)
    ref_mask = np.zeros(shape, bool)
    ref_mask[6:18, 6:18, 28:36] = True
    depth = ndimage.distance_transform_edt(np.pad(lesion_mask, 1))[1:-1, 1:-1, 1:-1]
    shell = lesion_mask & (depth <= depth.max() * rules.thresholds.measure.shell_fraction)
    rng = np.random.default_rng(0)
    pre = np.full(shape, 600.0)  # white matter 600 on the pre-contrast T1
    pre[lesion_mask] = 400.0
    post = np.full(shape, 620.0)  # white matter enhances slightly (common practice: ~3 %)
    post[lesion_mask] = core_post
    post[shell] = shell_post
    pre += rng.normal(0, 5, shape)
    post += rng.normal(0, 5, shape)
    images = {T1: pre, Role.T1POST: post * post_gain}
    lesion = _measured(RoiKind.LESION, "L1", images, lesion_mask, rules, site="left parietal")
    ref = _measured(RoiKind.REFERENCE, "R1", images, ref_mask, rules, tissue="white matter")
    return build.study([lesion, ref])


def test_necrotic_rim_enhancing_mass_has_pattern_rim(build, rules):
    study = _enhancing_study(build, rules, shell_post=1000.0, core_post=410.0)
    got = _one(characterize(study, rules))
    e = got.enhancement
    assert (e.pre, e.post) == (T1, Role.T1POST)
    # shell: 100 ((1000/620) / (400/600) - 1) = 142 %; core: 100 ((410/620) / (400/600) - 1) = -0.8 %
    assert e.shell_percent == pytest.approx(100 * ((1000 / 620) / (400 / 600) - 1), abs=2.0)
    assert e.core_percent == pytest.approx(100 * ((410 / 620) / (400 / 600) - 1), abs=2.0)
    assert e.pattern is EnhancementPattern.RIM and e.enhancing is True
    assert "rim-enhancement" in got.behaviour and "non-enhancing" not in got.behaviour


def test_solid_enhancing_lesion_has_pattern_solid(build, rules):
    study = _enhancing_study(build, rules, shell_post=900.0, core_post=880.0)
    got = _one(characterize(study, rules))
    assert got.enhancement.pattern is EnhancementPattern.SOLID
    # whole lesion: 100 ((median post / 620) / (400 / 600) - 1), the median in 880..900
    assert 100 * ((880 / 620) / (400 / 600) - 1) - 2 <= got.enhancement.percent
    assert got.enhancement.percent <= 100 * ((900 / 620) / (400 / 600) - 1) + 2
    assert "solid-enhancement" in got.behaviour


def test_non_enhancing_lesion_has_pattern_none(build, rules):
    study = _enhancing_study(build, rules, shell_post=410.0, core_post=410.0)
    got = _one(characterize(study, rules))
    assert got.enhancement.enhancing is False
    assert got.enhancement.pattern is EnhancementPattern.NONE
    assert "non-enhancing" in got.behaviour


def test_enhancement_percent_ignores_a_series_scaling(build, rules):
    plain = _one(characterize(_enhancing_study(build, rules, 1000.0, 410.0), rules))
    scaled = _one(characterize(_enhancing_study(build, rules, 1000.0, 410.0, post_gain=7.3), rules))
    assert scaled.enhancement.percent == pytest.approx(plain.enhancement.percent, rel=1e-9)
    assert scaled.enhancement.pattern is plain.enhancement.pattern


def _acq(**kw):
    base = dict(
        repetition_time_ms=500.0,
        echo_time_ms=10.0,
        flip_angle_deg=90.0,
        scanning_sequence=("SE",),
        sequence_variant=("SK",),
    )
    base.update(kw)
    return Acquisition(**base)


def test_raw_percent_only_when_settings_and_scaling_match(build, rules):
    lesion = build.lesion({T1: 400.0, Role.T1POST: 800.0})
    ref = build.reference({T1: 600.0, Role.T1POST: 600.0})
    same = {
        T1: build.stack(T1, _acq(), scaling_key="s1"),
        Role.T1POST: build.stack(Role.T1POST, _acq(contrast_agent="gadobutrol"), scaling_key="s1"),
    }
    got = _one(characterize(build.study([lesion, ref], stacks=same), rules))
    # raw = 100 (800 / 400 - 1) = 100 %; normalized = 100 ((800/600) / (400/600) - 1) = 100 %
    assert got.enhancement.raw_percent == pytest.approx(100.0)
    assert got.to_json()["enhancement"]["raw_percent"] == 100.0
    other_tr = dict(same)
    other_tr[Role.T1POST] = build.stack(Role.T1POST, _acq(repetition_time_ms=550.0), "s1")
    got = _one(characterize(build.study([lesion, ref], stacks=other_tr), rules))
    assert got.enhancement.raw_percent is None and "raw_percent" not in got.to_json()["enhancement"]
    other_scale = dict(same)
    other_scale[Role.T1POST] = build.stack(Role.T1POST, _acq(), scaling_key="s2")
    got = _one(characterize(build.study([lesion, ref], stacks=other_scale), rules))
    assert got.enhancement.raw_percent is None


def test_raw_and_normalized_enhancement_disagreeing_is_a_warning(build, rules):
    lesion = build.lesion({T1: 400.0, Role.T1POST: 800.0})
    ref = build.reference({T1: 600.0, Role.T1POST: 900.0})  # the reference "enhanced" 50 %
    stacks = {
        T1: build.stack(T1, _acq(), scaling_key="s1"),
        Role.T1POST: build.stack(Role.T1POST, _acq(), scaling_key="s1"),
    }
    result = characterize(build.study([lesion, ref], stacks=stacks), rules)
    got = _one(result)
    assert got.enhancement.percent == pytest.approx(100 * ((800 / 900) / (400 / 600) - 1))
    assert got.enhancement.raw_percent == pytest.approx(100.0)
    assert "enhancement-normalization-disagrees" in _codes(result)


def test_second_enhancement_pair_when_the_first_is_missing(build, rules):
    lesion = build.lesion({Role.T1FS: 300.0, Role.T1POSTFS: 600.0})
    ref = build.reference({Role.T1FS: 500.0, Role.T1POSTFS: 500.0})
    got = _one(characterize(build.study([lesion, ref]), rules))
    assert (got.enhancement.pre, got.enhancement.post) == (Role.T1FS, Role.T1POSTFS)
    assert got.enhancement.percent == pytest.approx(100.0)
    # Too small a hand-built lesion to split into shell and core: pattern not determined.
    assert got.enhancement.pattern is None


def test_named_reference_normalizes_the_lesion(build, rules):
    lesion = build.lesion({T2: 1800.0}, reference="R2")
    r1 = build.reference({T2: 600.0}, roi_id="R1")
    r2 = build.reference({T2: 900.0}, roi_id="R2", tissue="muscle")
    got = _one(characterize(build.study([lesion, r1, r2]), rules))
    assert got.reference == "R2" and got.signal[T2].ratio == pytest.approx(2.0)


def test_no_reference_gives_null_ratios_and_a_warning(build, rules):
    lesion = build.lesion({T1: 200.0, T2: 1800.0})
    result = characterize(build.study([lesion]), rules)
    got = _one(result)
    assert got.reference is None and got.signal[T2].ratio is None and got.signal[T2].grade is None
    assert got.signal[T2].stats.median == 1800.0
    assert "no-reference" in _codes(result)


def _thick(build, role):
    return dataclasses.replace(build.stack(role), spacing_mm=(1.1, 1.1, 6.0))


def test_pattern_comes_from_the_pair_with_the_finest_voxels(build, rules):
    # On 6 mm slices the rim is averaged into the core (solid-looking); the 1 mm pair shows the
    # rim. The percent still comes from the first pair, T1 -> T1POST (docs/usage.md).
    lesion = build.lesion(
        {
            T1: build.series(400.0, shell=400.0, core=400.0),
            Role.T1POST: build.series(800.0, shell=820.0, core=760.0),
            Role.T1FS: build.series(380.0, shell=380.0, core=380.0),
            Role.T1POSTFS: build.series(700.0, shell=800.0, core=390.0),
        }
    )
    ref = build.reference({T1: 600.0, Role.T1POST: 600.0, Role.T1FS: 550.0, Role.T1POSTFS: 550.0})
    stacks = {T1: _thick(build, T1), Role.T1POST: _thick(build, Role.T1POST)}
    result = characterize(build.study([lesion, ref], stacks=stacks), rules)
    e = _one(result).enhancement
    assert (e.pre, e.post) == (T1, Role.T1POST)
    assert e.percent == pytest.approx(100.0)
    assert (e.pattern_pre, e.pattern_post) == (Role.T1FS, Role.T1POSTFS)
    assert e.pattern is EnhancementPattern.RIM
    assert e.core_percent == pytest.approx(100 * (390 / 380 - 1))
    note = next(n for n in result.qc if n.code == "enhancement-pattern-pair")
    assert "L1" in note.message and "T1FS -> T1POSTFS" in note.message
    # With equal voxels, the first pair gives the pattern too (solid here) and no note.
    same = characterize(build.study([lesion, ref]), rules)
    assert _one(same).enhancement.pattern is EnhancementPattern.SOLID
    assert "enhancement-pattern-pair" not in _codes(same)


@pytest.mark.parametrize(
    ("shell", "core", "pattern"),
    [
        (89.0, 16.0, EnhancementPattern.RIM),  # core <= 0.25 x shell: a few % of rim in the core
        (40.0, 16.0, EnhancementPattern.HETEROGENEOUS),  # core 0.4 x shell: neither rim nor solid
        (40.0, 30.0, EnhancementPattern.SOLID),
        (40.0, 10.0, EnhancementPattern.RIM),
        (5.0, 40.0, EnhancementPattern.HETEROGENEOUS),  # centre enhancing, not the wall
        (5.0, 3.0, EnhancementPattern.NONE),
    ],
)
def test_pattern_thresholds(build, rules, shell, core, pattern):
    # pre: everything 100 (reference 100); post: reference 100, parts raised by their percent.
    lesion = build.lesion(
        {
            T1: build.series(100.0, shell=100.0, core=100.0),
            Role.T1POST: build.series(100.0 + shell, shell=100.0 + shell, core=100.0 + core),
        }
    )
    ref = build.reference({T1: 100.0, Role.T1POST: 100.0})
    got = _one(characterize(build.study([lesion, ref]), rules))
    assert got.enhancement.shell_percent == pytest.approx(shell)
    assert got.enhancement.pattern is pattern


def test_a_lesion_too_small_for_the_first_pair_falls_back_to_the_next(build, rules):
    # A thin muscle holds too few voxels on thick 2D T1 slices but is measured on the 3D
    # fat-suppressed pair: its enhancement comes from T1FS -> T1POSTFS, and qc says so.
    T1POST, T1FS, T1POSTFS = Role.T1POST, Role.T1FS, Role.T1POSTFS
    lesion = build.lesion({T1: None, T1POST: None, T1FS: 300.0, T1POSTFS: 600.0})
    ref = build.reference({T1: 500.0, T1POST: 500.0, T1FS: 400.0, T1POSTFS: 400.0})
    result = characterize(build.study([lesion, ref]), rules)
    got = _one(result)
    assert (got.enhancement.pre, got.enhancement.post) == (T1FS, T1POSTFS)
    assert got.enhancement.percent == pytest.approx(100.0) and got.enhancement.enhancing is True
    assert "pair-fallback" in _codes(result)
