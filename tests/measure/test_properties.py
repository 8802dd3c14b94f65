"""Properties of the characterization (hypothesis).

Every conclusion is a ratio of medians on one series, so the arbitrary scaling that each MR
series carries must cancel (docs/usage.md, enhancement.percent: "Normalizing by the reference
cancels the arbitrary scaling that each series carries"): multiplying any one series by a
positive factor changes no ratio, grade, percent or flag. Swapping lesion and reference inverts
the ratio.

Medians are drawn as whole numbers up to 4000 (like stored pixel values): then no ratio can sit
on a rounding boundary next to a grade threshold, so the grades compare exactly.
"""

from __future__ import annotations

import dataclasses

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from sigreport.measure import characterize
from sigreport.model import MeasuredStudy, RoiStats, Role, SeriesMeasurement

ROLES = [Role.T1, Role.T2, Role.FLAIR, Role.T1FS, Role.T1POST, Role.STIR, Role.T2FS]

median = st.integers(min_value=1, max_value=4000).map(float)


def _scaled(stats: RoiStats | None, f: float) -> RoiStats | None:
    if stats is None:
        return None
    return dataclasses.replace(
        stats,
        mean=stats.mean * f,
        median=stats.median * f,
        sd=stats.sd * f,
        p05=stats.p05 * f,
        p95=stats.p95 * f,
    )


def _scale_role(study: MeasuredStudy, role: Role, f: float) -> MeasuredStudy:
    rois = []
    for roi in study.rois:
        by_role = dict(roi.by_role)
        m = by_role[role]
        by_role[role] = SeriesMeasurement(
            stats=_scaled(m.stats, f), shell=_scaled(m.shell, f), core=_scaled(m.core, f)
        )
        rois.append(dataclasses.replace(roi, by_role=by_role))
    sigma = dict(study.noise_sigma)
    if sigma.get(role) is not None:
        sigma[role] = sigma[role] * f
    return dataclasses.replace(study, rois=tuple(rois), noise_sigma=sigma)


@st.composite
def studies(draw, build):
    roles = draw(st.lists(st.sampled_from(ROLES), min_size=1, max_size=len(ROLES), unique=True))

    def values(with_parts: bool):
        out = {}
        for role in roles:
            if with_parts and draw(st.booleans()):
                out[role] = SeriesMeasurement(
                    stats=build.stats(draw(median)),
                    shell=build.stats(draw(median)),
                    core=build.stats(draw(median)),
                )
            else:
                out[role] = draw(median)
        return out

    lesion = build.lesion(values(True))
    ref = build.reference(values(False), cv=draw(st.sampled_from([0.05, 0.3])))
    rois = [lesion, ref]
    if draw(st.booleans()):
        rois.append(build.control("C1", draw(st.sampled_from(["CSF", "fat"])), values(False)))
    noise = {r: draw(st.one_of(st.none(), st.integers(1, 60).map(float))) for r in roles}
    return build.study(rois, noise=noise)


def _summary(result):
    lesion = result.lesions[0]
    e = lesion.enhancement
    return {
        "grades": {r: (s.grade, s.phrase) if s else None for r, s in lesion.signal.items()},
        "enhancing": e.enhancing,
        "pattern": e.pattern,
        "suppressed": {k: (s.suppressed, s.reliable) for k, s in lesion.suppression.items()},
        "flow_void": lesion.flow_void,
        "behaviour": lesion.behaviour,
        "qc": sorted(n.code for n in result.qc),
        "checks": [r.get("check", {}).get("passed") for r in result.rois],
    }


def _numbers(result):
    lesion = result.lesions[0]
    e = lesion.enhancement
    out = [s.ratio if s else None for s in lesion.signal.values()]
    out += [e.percent, e.shell_percent, e.core_percent]
    out += [s.drop_percent for s in lesion.suppression.values()]
    out += [r.get("check", {}).get("drop_percent") for r in result.rois]
    return out


def _close(a, b):
    assert len(a) == len(b)
    for x, y in zip(a, b, strict=True):
        if x is None or y is None:
            assert x is y
        else:
            assert x == pytest.approx(y, rel=1e-9, abs=1e-9)


@settings(max_examples=150, deadline=None)
@given(data=st.data(), factor=st.floats(min_value=1e-3, max_value=1e3))
def test_scaling_one_series_changes_no_conclusion(build, rules, data, factor):
    study = data.draw(studies(build))
    role = data.draw(st.sampled_from(sorted(study.stacks)))
    before = characterize(study, rules)
    after = characterize(_scale_role(study, role, factor), rules)
    assert _summary(after) == _summary(before)
    _close(_numbers(after), _numbers(before))


@settings(max_examples=100, deadline=None)
@given(data=st.data())
def test_swapping_lesion_and_reference_inverts_the_ratio(build, rules, data):
    roles = data.draw(st.lists(st.sampled_from(ROLES), min_size=1, unique=True))
    a = {r: data.draw(median) for r in roles}
    b = {r: data.draw(median) for r in roles}
    forward = characterize(build.study([build.lesion(a), build.reference(b)]), rules)
    swapped = characterize(build.study([build.lesion(b), build.reference(a)]), rules)
    for role in roles:
        r1 = forward.lesions[0].signal[role].ratio
        r2 = swapped.lesions[0].signal[role].ratio
        assert r1 * r2 == pytest.approx(1.0, rel=1e-12)
        assert r1 == pytest.approx(a[role] / b[role], rel=1e-12)
