"""Rigid alignment recovers known motions (synthetic volumes built here with numpy).

Oracle: the motion is applied with SimpleITK's own ``Resample`` and a known ``Euler3DTransform``;
``Resample(src, ref, A)`` gives ``out(y) = src(A(y))``, so the registered transform mapping anchor
points to moving points must equal ``A^-1``.
"""

from __future__ import annotations

import math
import shutil
from pathlib import Path

import numpy as np
import pytest
import SimpleITK as sitk

from sigreport.align import (
    identity_alignment,
    load_settings,
    register_rigid,
    register_series,
    rigid,
)
from sigreport.errors import InputError
from sigreport.lexicon import bundled_dir

BOX = (np.array([-20.0, -20.0, -20.0]), np.array([20.0, 20.0, 20.0]))
TOL_MM = 0.5
TOL_DEG = 0.5


def phantom(n: int = 64, spacing: float = 2.0) -> tuple[sitk.Image, sitk.Image]:
    """A smooth, structured, asymmetric head-like object and its inverted-contrast twin."""
    ax = (np.arange(n) - (n - 1) / 2) * spacing
    z, y, x = np.meshgrid(ax, ax, ax, indexing="ij")
    head = 1.0 / (1.0 + np.exp(((x / 50) ** 2 + (y / 58) ** 2 + (z / 45) ** 2 - 1) * 20))
    rng = np.random.default_rng(7)
    tissue = np.zeros_like(x)
    for _ in range(14):
        c = rng.uniform(-35, 35, 3)
        s = rng.uniform(4, 12)
        tissue += rng.uniform(0.4, 1.0) * np.exp(
            -((x - c[0]) ** 2 + (y - c[1]) ** 2 + (z - c[2]) ** 2) / (2 * s * s)
        )
    tissue /= tissue.max()
    t1 = sitk.GetImageFromArray((head * (0.3 + tissue)).astype(np.float32))
    t1.SetSpacing((spacing,) * 3)
    t1.SetOrigin((float(ax[0]),) * 3)
    t2 = sitk.GetImageFromArray((head * (1.4 - tissue)).astype(np.float32))
    t2.CopyInformation(t1)
    return t1, t2


@pytest.fixture(scope="module")
def images() -> tuple[sitk.Image, sitk.Image]:
    return phantom()


def motion(rx: float, ry: float, rz: float, t: tuple[float, float, float]) -> sitk.Transform:
    a = sitk.Euler3DTransform()
    a.SetCenter((0.0, 0.0, 0.0))
    a.SetRotation(*(math.radians(v) for v in (rx, ry, rz)))
    a.SetTranslation(t)
    return a


def box_corners() -> np.ndarray:
    lo, hi = BOX
    return np.array(
        [[a, b, c] for a in (lo[0], hi[0]) for b in (lo[1], hi[1]) for c in (lo[2], hi[2])]
    )


def max_point_error(found: sitk.Transform, truth: sitk.Transform) -> float:
    return max(
        float(
            np.linalg.norm(
                np.subtract(found.TransformPoint(tuple(p)), truth.TransformPoint(tuple(p)))
            )
        )
        for p in box_corners()
    )


def rotation_error_deg(found: sitk.Transform, truth: sitk.Transform) -> float:
    r1 = np.asarray(found.GetMatrix()).reshape(3, 3)
    r2 = np.asarray(truth.GetMatrix()).reshape(3, 3)
    cos = (np.trace(r1 @ r2.T) - 1) / 2  # angle of the residual rotation (Rodrigues)
    return math.degrees(math.acos(min(1.0, max(-1.0, cos))))


@pytest.mark.parametrize("contrast", ["same", "inverted"])
def test_known_rotation_and_translation_are_recovered(images, contrast):
    t1, t2 = images
    a = motion(3.0, -2.0, 4.0, (3.0, -2.0, 1.5))
    moving = sitk.Resample(t1 if contrast == "same" else t2, t1, a, sitk.sitkLinear, 0.0)
    found = register_rigid(t1, moving, box_mm=BOX)
    truth = a.GetInverse()
    assert found.method == "rigid"
    assert max_point_error(found.transform, truth) < TOL_MM
    assert rotation_error_deg(found.transform, truth) < TOL_DEG
    # Total angle of the Euler rotation (3, -2, 4) degrees, by Rodrigues' trace formula.
    r = np.asarray(a.GetMatrix()).reshape(3, 3)
    assert found.rotation_deg == pytest.approx(
        math.degrees(math.acos((np.trace(r) - 1) / 2)), abs=TOL_DEG
    )
    # The transform's centre is the box centre, so its translation is the centre's motion.
    assert np.allclose(found.translation_mm, truth.TransformPoint((0.0, 0.0, 0.0)), atol=TOL_MM)
    # 5.4 degrees total is above the bundled 5-degree QC threshold: the warning must say so.
    assert any("rotated the series by 5." in w for w in found.warnings)
    assert found.metric is not None and found.metric < load_settings().poor_metric


@pytest.mark.parametrize("contrast", ["same", "inverted"])
def test_motion_free_pair_comes_out_as_identity(images, contrast):
    t1, t2 = images
    found = register_rigid(t1, t1 if contrast == "same" else t2, box_mm=BOX)
    assert max_point_error(found.transform, sitk.Transform()) < TOL_MM
    assert found.rotation_deg < TOL_DEG
    assert found.warnings == ()


def test_small_motion_on_a_thick_slice_series(images):
    t1, t2 = images
    # The moving series: 1 mm in-plane, 4 mm slices (a 2D T2-like acquisition).
    ref = sitk.Image(96, 96, 24, sitk.sitkFloat32)
    ref.SetSpacing((1.0, 1.0, 4.0))
    ref.SetOrigin((-47.5, -47.5, -46.0))
    a = motion(0.0, 0.0, 2.0, (1.5, 1.0, -1.0))
    moving = sitk.Resample(t2, ref, a, sitk.sitkLinear, 0.0)
    found = register_rigid(t1, moving, box_mm=BOX)
    assert max_point_error(found.transform, a.GetInverse()) < 1.0  # 4 mm slices: 1/4 slice
    assert rotation_error_deg(found.transform, a.GetInverse()) < 1.0
    assert found.warnings == ()


def test_known_motion_on_a_thick_slice_oblique_series(images):
    t1, t2 = images
    # A 2D oblique series: 1 mm in-plane, 5 mm slices, its slice plane tilted 15 degrees about
    # the patient's left-right axis (direction cosines as in DICOM PS3.3 C.7.6.2.1.1: columns
    # of the direction matrix are the row, column and slice directions in LPS).
    tilt = math.radians(15.0)
    direction = (
        1.0,
        0.0,
        0.0,
        0.0,
        math.cos(tilt),
        -math.sin(tilt),
        0.0,
        math.sin(tilt),
        math.cos(tilt),
    )
    ref = sitk.Image(100, 100, 19, sitk.sitkFloat32)
    ref.SetSpacing((1.0, 1.0, 5.0))
    ref.SetDirection(direction)
    # Centred on the phantom: origin = -(R @ half extent).
    half = np.array([99 * 1.0, 99 * 1.0, 18 * 5.0]) / 2.0
    ref.SetOrigin(tuple(float(v) for v in -(np.reshape(direction, (3, 3)) @ half)))
    a = motion(1.5, -1.0, 2.0, (1.0, -1.5, 1.0))
    moving = sitk.Resample(t2, ref, a, sitk.sitkLinear, 0.0)
    found = register_rigid(t1, moving, box_mm=BOX)
    assert found.method == "rigid" and found.notes == ()
    assert max_point_error(found.transform, a.GetInverse()) < TOL_MM
    assert rotation_error_deg(found.transform, a.GetInverse()) < TOL_DEG
    assert found.warnings == ()


def test_deterministic(images):
    t1, t2 = images
    moving = sitk.Resample(t2, t1, motion(1.0, 0.0, -1.0, (1.0, 0.5, 0.0)), sitk.sitkLinear, 0.0)
    first = register_rigid(t1, moving, box_mm=BOX)
    second = register_rigid(t1, moving, box_mm=BOX)
    assert first.transform.GetParameters() == second.transform.GetParameters()
    assert first.metric == second.metric


def test_unrelated_images_are_not_silent(images):
    t1, _ = images
    noise = sitk.GetImageFromArray(np.random.default_rng(1).random((64, 64, 64)).astype(np.float32))
    noise.CopyInformation(t1)
    found = register_rigid(t1, noise, box_mm=BOX)
    assert any("poor match" in w for w in found.warnings)


def test_no_overlap_keeps_the_frame_of_reference_and_says_so(images):
    t1, _ = images
    far = (np.array([500.0, 500, 500]), np.array([510.0, 510, 510]))
    found = register_rigid(t1, t1, box_mm=far)
    assert found.method == "identity" and found.transform is None
    assert found.warnings and "outside the anchor" in found.warnings[0]


def test_bad_box_is_rejected(images):
    t1, _ = images
    with pytest.raises(ValueError, match='Argument "box_mm"'):
        register_rigid(t1, t1, box_mm=(np.array([1.0, 1, 1]), np.array([0.0, 0, 0])))


def test_identity_alignment():
    found = identity_alignment()
    assert found.method == "identity" and found.transform is None
    assert found.to_json() == {
        "method": "identity",
        "translation_mm": [0.0, 0.0, 0.0],
        "rotation_deg": 0.0,
    }


def test_site_lexicon_thresholds_apply_and_are_validated(images, tmp_path: Path):
    t1, _ = images
    shutil.copy(bundled_dir() / "alignment.toml", tmp_path / "alignment.toml")
    text = (tmp_path / "alignment.toml").read_text()
    (tmp_path / "alignment.toml").write_text(
        text.replace("max_rotation_deg = 5.0", "max_rotation_deg = 0.5")
    )
    moving = sitk.Resample(t1, t1, motion(0.0, 0.0, 2.0, (0.0, 0.0, 0.0)), sitk.sitkLinear, 0.0)
    found = register_rigid(t1, moving, box_mm=BOX, site_lexicon=tmp_path)
    assert any("more than 0.5" in w for w in found.warnings)
    (tmp_path / "alignment.toml").write_text(text.replace("margin_mm", "margn_mm"))
    with pytest.raises(
        InputError, match=r"alignment\.toml \[registration\]: unknown key\(s\) margn_mm"
    ):
        load_settings(tmp_path)


# --------------------------------------------------------------------------------------------
# Several series at once (register_series): shared anchor pyramid, skip check, threads


def test_motion_free_pair_skips_the_optimizer_and_says_so(images):
    t1, _ = images
    # The same contrast with its own noise (a repeat acquisition that did not move).
    repeat = sitk.AdditiveGaussianNoise(t1, standardDeviation=0.02, mean=0.0, seed=3)
    found = register_rigid(t1, repeat, box_mm=BOX)
    assert found.method == "rigid" and found.rotation_deg == 0.0
    assert found.translation_mm == (0.0, 0.0, 0.0)
    assert found.notes and "optimizer was skipped" in found.notes[0]


@pytest.mark.parametrize("shift_mm", [0.6, 1.0])
def test_small_motion_above_the_tolerance_is_still_registered(images, shift_mm):
    t1, t2 = images
    a = motion(0.0, 0.0, 0.0, (shift_mm, 0.0, 0.0))
    moving = sitk.Resample(t2, t1, a, sitk.sitkLinear, 0.0)
    found = register_rigid(t1, moving, box_mm=BOX)
    assert found.notes == ()  # the check sees the motion: the optimizer ran
    assert max_point_error(found.transform, a.GetInverse()) < TOL_MM


def test_register_series_matches_one_by_one_and_does_not_depend_on_threads(images):
    t1, t2 = images
    movings = {
        "moved": sitk.Resample(t2, t1, motion(2.0, 0.0, -1.0, (1.5, -1.0, 0.5)), sitk.sitkLinear),
        "still": t2,
        "rotated": sitk.Resample(t1, t1, motion(0.0, 3.0, 0.0, (0.0, 0.0, 0.0)), sitk.sitkLinear),
    }
    one_thread = register_series(t1, movings, box_mm=BOX, max_workers=1)
    two_threads = register_series(t1, movings, box_mm=BOX, max_workers=2)
    assert list(two_threads) == list(movings)
    for key, image in movings.items():
        single = register_rigid(t1, image, box_mm=BOX)
        for found in (one_thread[key], two_threads[key]):
            assert found.transform.GetParameters() == single.transform.GetParameters()
            assert found.metric == single.metric and found.notes == single.notes


def test_register_series_outside_the_anchor_keeps_every_frame(images):
    t1, t2 = images
    far = (np.array([500.0, 500, 500]), np.array([510.0, 510, 510]))
    found = register_series(t1, {"a": t1, "b": t2}, box_mm=far)
    assert all(
        a.method == "identity" and "outside the anchor" in a.warnings[0] for a in found.values()
    )


def test_series_one_at_a_time_match_all_at_once_and_share_the_anchor(images, monkeypatch):
    t1, t2 = images
    movings = {
        "moved": sitk.Resample(t2, t1, motion(1.0, 0.0, -2.0, (1.0, 1.0, -0.5)), sitk.sitkLinear),
        "rotated": sitk.Resample(t1, t1, motion(0.0, 2.0, 0.0, (0.0, 0.5, 0.0)), sitk.sitkLinear),
    }
    together = register_series(t1, movings, box_mm=BOX)
    built = []
    real = rigid._anchor_pyramid
    monkeypatch.setattr(
        rigid, "_anchor_pyramid", lambda *args, **kwargs: built.append(1) or real(*args, **kwargs)
    )
    rigid.clear_anchor_cache()
    # A fresh copy of the anchor (same voxels, another object) still hits the cache.
    one_by_one = {
        key: register_series(sitk.Image(t1), {key: image}, box_mm=BOX)[key]
        for key, image in movings.items()
    }
    assert len(built) == 1
    for key in movings:
        assert one_by_one[key].transform.GetParameters() == together[key].transform.GetParameters()
        assert one_by_one[key].metric == together[key].metric
    # A change of the anchor outside the part registration uses (the box, its margin and the
    # smoothing's apron) hits; a change inside it, or another box, misses.
    far = sitk.Image(t1)
    far[0, 0, 0] = 5.0  # a corner, 63 mm from the box centre on each axis
    register_series(far, {"moved": movings["moved"]}, box_mm=BOX)
    assert len(built) == 1
    near = sitk.Image(t1)
    near[32, 32, 32] = 5.0
    register_series(near, {"moved": movings["moved"]}, box_mm=BOX)
    register_series(t1, {"moved": movings["moved"]}, box_mm=(BOX[0] - 1.0, BOX[1]))
    assert len(built) == 3


# --------------------------------------------------------------------------------------------
# Sub-millimetre anchors: binned to the finest level's spacing (alignment.toml)


def test_binning_averages_whole_voxels_and_keeps_the_geometry():
    rng = np.random.default_rng(11)
    # (z, y, x) = 40 slices of 3 mm, 64 x 64 of 0.5 mm: x and y bin by 2, z is kept.
    voxels = rng.normal(size=(40, 64, 64)).astype(np.float32)
    image = sitk.GetImageFromArray(voxels)
    image.SetSpacing((0.5, 0.5, 3.0))
    image.SetOrigin((-10.0, 5.0, 2.0))
    tilt = math.radians(10.0)
    image.SetDirection(
        (1, 0, 0, 0, math.cos(tilt), -math.sin(tilt), 0, math.sin(tilt), math.cos(tilt))
    )
    binned = rigid._binned(image, 1.0, 1)
    assert binned.GetSize() == (32, 32, 40)
    assert binned.GetSpacing() == pytest.approx((1.0, 1.0, 3.0))
    assert binned.GetDirection() == pytest.approx(image.GetDirection())
    # Each bin's centre, in patient space (PS3.3 C.7.6.2.1.1 geometry through SimpleITK's own
    # index-to-point mapping), is the centre of the voxels it averages.
    assert binned.GetOrigin() == pytest.approx(
        image.TransformContinuousIndexToPhysicalPoint((0.5, 0.5, 0.0))
    )
    assert binned.TransformIndexToPhysicalPoint((7, 3, 9)) == pytest.approx(
        image.TransformContinuousIndexToPhysicalPoint((14.5, 6.5, 9.0))
    )
    # Oracle: numpy's mean over each 2 x 2 block of x and y.
    expected = voxels.reshape(40, 32, 2, 32, 2).mean(axis=(2, 4))
    assert np.allclose(sitk.GetArrayFromImage(binned), expected, atol=1e-6)
    # Voxels at or above the spacing (and 0.8 mm, which 2 voxels would take past 1 mm) stay.
    assert rigid._binned(image, 0.0, 1) is image
    coarse = sitk.Image(40, 40, 40, sitk.sitkFloat32)
    coarse.SetSpacing((0.8, 1.0, 5.0))
    assert rigid._binned(coarse, 1.0, 1) is coarse


def test_a_sub_millimetre_anchor_costs_a_1_mm_one_and_recovers_the_motion(images):
    t1, t2 = images
    # A 0.5 mm anchor (a 3 T 3D series) covering the ROIs' box and the margin.
    fine = sitk.Image(216, 216, 216, sitk.sitkFloat32)
    fine.SetSpacing((0.5, 0.5, 0.5))
    fine.SetOrigin((-53.75, -53.75, -53.75))
    anchor = sitk.Resample(t1, fine, sitk.Transform(), sitk.sitkLinear, 0.0)
    a = motion(1.5, -1.0, 2.0, (1.0, -1.5, 1.0))
    moving = sitk.Resample(t2, t1, a, sitk.sitkLinear, 0.0)
    rigid.clear_anchor_cache()
    found = register_rigid(anchor, moving, box_mm=BOX)
    assert found.method == "rigid"
    assert max_point_error(found.transform, a.GetInverse()) < TOL_MM
    assert rotation_error_deg(found.transform, a.GetInverse()) < TOL_DEG
    # The pyramid was built on 1 mm voxels (the bundled finest_spacing_mm), not 0.5 mm.
    (pyramid,) = rigid._ANCHOR_CACHE.values()
    assert pyramid.base.GetSpacing() == pytest.approx((1.0, 1.0, 1.0))
    rigid.clear_anchor_cache()


def test_finest_spacing_is_optional_in_a_site_file_and_validated(tmp_path: Path):
    text = (bundled_dir() / "alignment.toml").read_text()
    assert load_settings().finest_spacing_mm == 1.0
    lines = [line for line in text.splitlines() if not line.startswith("finest_spacing_mm")]
    (tmp_path / "alignment.toml").write_text("\n".join(lines) + "\n")
    assert load_settings(tmp_path).finest_spacing_mm == 0.0  # the anchor's own voxels
    (tmp_path / "alignment.toml").write_text(
        text.replace("finest_spacing_mm = 1.0", "finest_spacing_mm = -1.0")
    )
    with pytest.raises(InputError, match="finest_spacing_mm must be positive"):
        load_settings(tmp_path)
