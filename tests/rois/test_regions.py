"""Analytic ROI shapes: volumes, voxel counts and diameters against geometry worked by hand."""

from __future__ import annotations

import math

import numpy as np
import pytest
import SimpleITK as sitk

from sigreport.model import RoiKind, RoiShape, RoiSpec
from sigreport.rois import (
    BoxRegion,
    EllipsoidRegion,
    Region,
    SphereRegion,
    build_region,
    max_diameter_mm,
    sample_region,
    union_bounds,
    volume_ml,
)


def grid(spacing: float, extent_mm: float = 40.0, origin: float | None = None) -> sitk.Image:
    n = int(round(2 * extent_mm / spacing))
    image = sitk.Image(n, n, n, sitk.sitkFloat32)
    image.SetSpacing((spacing,) * 3)
    image.SetOrigin(((-extent_mm + spacing / 2) if origin is None else origin,) * 3)
    return image


CENTRES = [(0.0, 0.0, 0.0), (0.31, -0.27, 0.13), (-1.7, 2.2, 0.9)]


@pytest.mark.parametrize("spacing", [2.0, 1.0, 0.5])
@pytest.mark.parametrize("centre", CENTRES)
@pytest.mark.parametrize("semi_axes", [(6.0, 6.0, 6.0), (8.0, 6.0, 5.0)])
def test_ellipsoid_volume_converges_to_four_thirds_pi_abc(spacing, centre, semi_axes):
    region = EllipsoidRegion("L1", centre, semi_axes)
    image = grid(spacing)
    sample = sample_region(region, image)
    exact = 4.0 / 3.0 * math.pi * np.prod(semi_axes)  # volume of an ellipsoid, 4/3 pi a b c
    a_min = min(semi_axes)
    by_centres = sample.n_voxels * spacing**3
    # Rigorous: each counted voxel's cube lies within d = h sqrt(3) / 2 of the ellipsoid E, and
    # B_d is inside (d / a_min) E, so the counted volume lies between (1 -+ d / a_min)^3 |E|.
    t = spacing * math.sqrt(3) / 2 / a_min
    assert (1 - t) ** 3 * exact <= by_centres <= (1 + t) ** 3 * exact
    # Tighter and shrinking with the voxel: relative error below 0.7 h / a_min (the worst case
    # measured, 0.6 h / a_min, is a 2 mm grid with the centre on a lattice corner).
    assert abs(by_centres - exact) / exact < 0.7 * spacing / a_min
    # Supersampled weights (sub-samples of at most 1 mm) are far closer: below 0.1 h_sub / a_min.
    h_sub = spacing / math.ceil(spacing - 1e-6) if spacing > 1 else spacing
    assert abs(volume_ml(sample, image) * 1000.0 - exact) / exact < 0.1 * h_sub / a_min
    assert region.volume_mm3 == pytest.approx(exact)


def test_sphere_is_an_ellipsoid_with_equal_axes():
    sphere = build_region(
        RoiSpec("L1", RoiKind.LESION, RoiShape.SPHERE, center_mm=(1, 2, 3), radius_mm=4.0)
    )
    assert isinstance(sphere, SphereRegion) and sphere.radius_mm == 4.0
    assert isinstance(sphere, Region)
    points = np.array([[1, 2, 7.0], [1, 2, 7.001], [5, 2, 3.0], [1, 2, 3.0]])
    assert sphere.contains(points).tolist() == [True, False, True, True]  # boundary inside
    lo, hi = sphere.bounds_mm()
    assert lo.tolist() == [-3.0, -2.0, -1.0] and hi.tolist() == [5.0, 6.0, 7.0]


def test_box_voxel_count_by_hand():
    box = build_region(
        RoiSpec(
            "R1", RoiKind.REFERENCE, RoiShape.BOX, center_mm=(0.25, -0.25, 0.5), size_mm=(10, 6, 4)
        )
    )
    assert isinstance(box, BoxRegion)
    # 1 mm grid with centres on integers: x in [-4.75, 5.25] -> -4..5 (10 centres),
    # y in [-3.25, 2.75] -> -3..2 (6), z in [-1.5, 2.5] -> -1..2 (4): 240 voxels.
    assert sample_region(box, grid(1.0, origin=-20.0)).n_voxels == 10 * 6 * 4
    # 2 mm grid with centres on even numbers: x -> -4, -2, 0, 2, 4 (5), y -> -2, 0, 2 (3),
    # z -> 0, 2 (2): 30 voxels.
    assert sample_region(box, grid(2.0, origin=-20.0)).n_voxels == 5 * 3 * 2


def test_box_faces_through_voxel_centres_count_as_inside():
    box = BoxRegion("R1", (0.0, 0.0, 0.0), (4.0, 2.0, 0.0001))
    # Faces at x = +-2 and y = +-1 pass through centres: x -2..2 (5), y -1..1 (3), z 0 (1).
    assert sample_region(box, grid(1.0, origin=-20.0)).n_voxels == 15


def test_box_diameter_is_the_centre_diagonal_plus_one_voxel_chord():
    box = BoxRegion("R1", (0.0, 0.0, 0.0), (9.0, 5.0, 3.0))
    image = grid(1.0, origin=-20.0)
    sample = sample_region(box, image)
    assert sample.n_voxels == 9 * 5 * 3  # centres -4..4, -2..2, -1..1
    # Farthest centres: (-4,-2,-1) to (4,2,1), sqrt(8^2+4^2+2^2); a unit voxel's chord through
    # its centre along that line is 1 / (largest direction cosine) = |d| / 8.
    d = math.sqrt(8**2 + 4**2 + 2**2)
    assert max_diameter_mm(sample, image) == pytest.approx(d + d / 8)


def test_a_row_of_voxels_measures_its_length():
    row = BoxRegion("L1", (0.0, 0.0, 0.0), (6.0, 0.1, 0.1))  # centres x = -3..3: 7 voxels
    image = grid(1.0, origin=-20.0)
    sample = sample_region(row, image)
    assert sample.n_voxels == 7
    assert max_diameter_mm(sample, image) == pytest.approx(7.0)


@pytest.mark.parametrize("spacing", [1.0, 0.5])
def test_sphere_diameter_close_to_twice_the_radius(spacing):
    region = SphereRegion.of("L1", (0.2, -0.1, 0.3), 6.0)
    image = grid(spacing, extent_mm=10.0)
    measured = max_diameter_mm(sample_region(region, image), image)
    # Centres reach at most 2r apart and the added chord is at most sqrt(3) voxels.
    assert 12.0 - 2 * spacing <= measured <= 12.0 + math.sqrt(3) * spacing


def test_empty_sample_has_zero_size():
    region = SphereRegion.of("L1", (500.0, 0.0, 0.0), 3.0)  # outside the field of view
    image = grid(1.0)
    sample = sample_region(region, image)
    assert sample.n_voxels == 0 and not sample.mask.any() and not sample.weights.any()
    assert volume_ml(sample, image) == 0.0 and max_diameter_mm(sample, image) == 0.0


def test_contains_rejects_a_wrong_shape():
    with pytest.raises(ValueError, match=r'"points_lps" must have shape \(N, 3\), got \(3,\)'):
        SphereRegion.of("L1", (0, 0, 0), 1.0).contains(np.zeros(3))


def test_union_bounds_encloses_every_region():
    lo, hi = union_bounds(
        [SphereRegion.of("L1", (0, 0, 0), 2.0), BoxRegion("R1", (10.0, -5.0, 1.0), (2.0, 4.0, 6.0))]
    )
    assert lo.tolist() == [-2.0, -7.0, -2.0] and hi.tolist() == [11.0, 2.0, 4.0]
    with pytest.raises(ValueError, match='"regions" must hold at least one region'):
        union_bounds([])
