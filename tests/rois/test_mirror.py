"""The mid-sagittal plane and the automatic mirror reference.

The synthetic head (sigreport.synth.phantom) is built symmetric about x = 0 apart from its
lesions; turned and shifted by a known rigid motion, its plane must come back within 2 mm and
2 degrees (docs/rois.md)."""

from __future__ import annotations

import math

import numpy as np
import pytest
import SimpleITK as sitk

from sigreport.ingest import load_stack
from sigreport.model import RoiKind, RoiShape, RoiSpec, Role
from sigreport.rois.mirror import MidSagittalPlane, estimate_midsagittal_plane, mirror_reference
from sigreport.rois.regions import SphereRegion
from sigreport.synth.study import Motion

ANGLE_TOL_DEG = 2.0
DISTANCE_TOL_MM = 2.0


@pytest.fixture(scope="module")
def anchor(neuro):
    return load_stack(neuro.stack(Role.T1POSTFS))


def _moved(
    image: sitk.Image, axis, degrees: float, translation
) -> tuple[sitk.Image, sitk.Transform]:
    """The head moved by p -> R (p - c) + c + t (c the model centre, 0), on a padded grid."""
    motion = sitk.VersorRigid3DTransform()
    motion.SetRotation(tuple(axis), math.radians(degrees))
    motion.SetTranslation(tuple(translation))
    pad = 20
    grid = sitk.Image([n + 2 * pad for n in image.GetSize()], sitk.sitkFloat32)
    grid.SetSpacing(image.GetSpacing())
    grid.SetDirection(image.GetDirection())
    grid.SetOrigin(image.TransformIndexToPhysicalPoint([-pad] * 3))
    # Resample maps output points to input points: the inverse of the motion.
    return sitk.Resample(image, grid, motion.GetInverse(), sitk.sitkLinear, 0.0), motion


def _check(plane: MidSagittalPlane, motion: sitk.Transform | None) -> None:
    rotation = np.eye(3) if motion is None else np.asarray(motion.GetMatrix()).reshape(3, 3)
    true_normal = rotation @ np.array([1.0, 0.0, 0.0])
    origin = (0.0, 0.0, 0.0) if motion is None else motion.TransformPoint((0.0, 0.0, 0.0))
    assert plane.angle_deg(true_normal) <= ANGLE_TOL_DEG
    # Distance from the estimated plane of the true plane's points across the head.
    for dy, dz in ((0, 0), (-60, 0), (60, 0), (0, -30), (0, 30)):
        on_true = np.asarray(origin) + rotation @ np.array([0.0, dy, dz])
        assert abs(plane.distance_mm(on_true)) <= DISTANCE_TOL_MM, (dy, dz)


def test_the_plane_of_the_unmoved_head_is_x_equals_zero(anchor):
    _check(estimate_midsagittal_plane(anchor), None)


@pytest.mark.parametrize(
    ("axis", "degrees", "translation"),
    [((0, 0, 1), 8.0, (6.0, -4.0, 2.0)), ((0.3, 0.2, 1.0), -6.0, (-5.0, 3.0, -2.0))],
)
def test_the_plane_of_a_turned_head_is_recovered(anchor, axis, degrees, translation):
    axis = tuple(np.asarray(axis) / np.linalg.norm(axis))
    moved, motion = _moved(anchor, axis, degrees, translation)
    plane = estimate_midsagittal_plane(moved)
    _check(plane, motion)
    # Far from the default: the unturned plane x = 0 is outside the tolerance.
    assert (
        plane.angle_deg((1.0, 0.0, 0.0)) > ANGLE_TOL_DEG or abs(plane.offset_mm) > DISTANCE_TOL_MM
    )


def test_the_estimate_is_deterministic(anchor):
    assert estimate_midsagittal_plane(anchor) == estimate_midsagittal_plane(anchor)


def _lesion(roi_id: str, centre, radius: float, site: str) -> tuple[RoiSpec, SphereRegion]:
    spec = RoiSpec(
        roi_id, RoiKind.LESION, RoiShape.SPHERE, site=site, center_mm=centre, radius_mm=radius
    )
    return spec, SphereRegion.of(roi_id, centre, radius)


PLANE = MidSagittalPlane((1.0, 0.0, 0.0), 0.0)


def test_a_homogeneous_mirror_is_the_reference(anchor):
    """L5 (solid lesion, right temporal) mirrors into left temporal white matter."""
    spec, region = _lesion("L5", (-20.0, 2.0, -20.0), 5.0, "right temporal white matter")
    result = mirror_reference(
        spec, region, PLANE, anchor, {"L5": region}, reference_id="L5-mirror", max_cv=0.2
    )
    assert result.spec is not None and result.region is not None
    assert result.spec.kind is RoiKind.REFERENCE
    assert result.spec.site == "left temporal white matter (mirror of L5)"
    lo, hi = result.region.bounds_mm()
    np.testing.assert_allclose((lo + hi) / 2, (20.0, 2.0, -20.0), atol=1e-9)
    np.testing.assert_allclose(hi - lo, (10.0, 10.0, 10.0), atol=1e-9)
    assert result.notes[0].code == "auto-reference" and result.notes[0].message.startswith("L5: ")


def test_a_mirror_onto_another_lesion_is_rejected(anchor):
    """L3 (fat, right) and L4 (haematoma, left) are near mirror images of each other."""
    l3, r3 = _lesion("L3", (-26.0, 26.0, 2.0), 4.5, "right parietal")
    l4, r4 = _lesion("L4", (27.0, 28.0, 2.0), 4.5, "left parietal")
    result = mirror_reference(
        l3, r3, PLANE, anchor, {"L3": r3, "L4": r4}, reference_id="L3-mirror", max_cv=0.5
    )
    assert result.spec is None
    assert result.notes[0].code == "auto-reference-rejected"
    assert "L3: " in result.notes[0].message and "overlaps lesion L4" in result.notes[0].message


def test_a_heterogeneous_mirror_is_rejected(anchor):
    """At the edge of the head: scalp, skull and brain in one ROI."""
    spec, region = _lesion("L9", (-62.0, 0.0, 0.0), 6.0, "right temporal scalp")
    result = mirror_reference(
        spec, region, PLANE, anchor, {"L9": region}, reference_id="L9-mirror", max_cv=0.2
    )
    assert result.spec is None and "not homogeneous" in (result.rejected_because or "")


@pytest.mark.parametrize("role", [Role.T1FS, Role.T2])
def test_the_plane_of_a_series_the_synthetic_head_moved_in(neuro, role):
    """The synthetic study moves the head between series (truth.json: anchor point p appears
    at R (p - c) + c + t); the 3D sagittal T1FS and the oblique 2D T2 (5 mm slices) each show
    the moved head's plane."""
    m = neuro.truth["motion"][role.value]
    motion = Motion(
        tuple(m["translation_mm"]), m["rotation_deg"], tuple(m["axis"]), tuple(m["center_mm"])
    )
    assert motion.rotation_deg > 1.0
    plane = estimate_midsagittal_plane(load_stack(neuro.stack(role)))
    _check(plane, motion.transform())
