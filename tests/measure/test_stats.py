"""ROI statistics against SimpleITK and numpy, weighted statistics against slow references, and
the shell / core split against scipy's Euclidean distance transform."""

from __future__ import annotations

import numpy as np
import pytest
import SimpleITK as sitk
from scipy import ndimage

from sigreport.measure import (
    inner_depth_mm,
    measure_roi,
    roi_stats,
    shell_core_masks,
    weighted_percentile,
)
from sigreport.model import Role


def _ball(shape, center, radius_vox, spacing_zyx=(1.0, 1.0, 1.0)) -> np.ndarray:
    zz, yy, xx = np.indices(shape, dtype=float)
    sz, sy, sx = spacing_zyx
    d2 = ((zz - center[0]) * sz) ** 2 + ((yy - center[1]) * sy) ** 2 + ((xx - center[2]) * sx) ** 2
    return d2 <= radius_vox**2


def _slow_weighted_percentile(values, weights, q):
    """Obviously-correct reference: the C = 1 weighted percentile (Wikipedia "Percentile",
    "Weighted percentile"), written with plain loops."""
    pairs = sorted((float(v), float(w)) for v, w in zip(values, weights, strict=True) if w > 0)
    if len(pairs) == 1:
        return pairs[0][0]
    total = sum(w for _, w in pairs)
    last = pairs[-1][1]
    positions = []
    running = 0.0
    for _, w in pairs:
        running += w
        positions.append((running - w) / (total - last))
    target = q / 100.0
    for k in range(len(pairs) - 1):
        if positions[k] <= target <= positions[k + 1]:
            if positions[k + 1] == positions[k]:
                return pairs[k + 1][0]
            t = (target - positions[k]) / (positions[k + 1] - positions[k])
            return pairs[k][0] + t * (pairs[k + 1][0] - pairs[k][0])
    return pairs[-1][0]


@pytest.fixture
def volume():
    rng = np.random.default_rng(7)
    values = rng.normal(500.0, 40.0, size=(12, 20, 24)).astype(np.float32)
    mask = _ball(values.shape, (6, 10, 12), 5.0)
    return values, mask


def test_unweighted_stats_match_simpleitk_label_statistics(volume):
    values, mask = volume
    got = roi_stats(values, mask)
    # Oracle: SimpleITK LabelStatisticsImageFilter (mean; sigma is the sample sd, n - 1).
    f = sitk.LabelStatisticsImageFilter()
    f.Execute(sitk.GetImageFromArray(values), sitk.GetImageFromArray(mask.astype(np.uint8)))
    assert got.n_voxels == f.GetCount(1) == int(mask.sum())
    assert got.mean == pytest.approx(f.GetMean(1), rel=1e-6)
    assert got.sd == pytest.approx(f.GetSigma(1), rel=1e-5)
    # SimpleITK's median is histogram-based (binned), so the exact median comes from numpy.
    inside = values[mask].astype(np.float64)
    assert got.median == pytest.approx(float(np.median(inside)), rel=1e-12)
    assert got.p05 == pytest.approx(float(np.percentile(inside, 5)), rel=1e-12)
    assert got.p95 == pytest.approx(float(np.percentile(inside, 95)), rel=1e-12)
    # ... and SimpleITK's binned median agrees to within its bin width.
    assert abs(f.GetMedian(1) - got.median) < (inside.max() - inside.min()) / 50


def test_empty_mask_gives_none(volume):
    values, _ = volume
    assert roi_stats(values, np.zeros(values.shape, bool)) is None


def test_shape_mismatch_names_the_argument(volume):
    values, mask = volume
    with pytest.raises(ValueError, match='"mask" must have shape'):
        roi_stats(values, mask[:-1])


def test_weighted_mean_and_sd_match_numpy(volume):
    values, mask = volume
    weights = np.random.default_rng(3).uniform(0.05, 1.0, size=values.shape)
    got = roi_stats(values, mask, weights)
    x, w = values[mask].astype(np.float64), weights[mask]
    # Oracle: numpy.average, and numpy.cov with aweights (its unbiased reliability-weights sd).
    assert got.mean == pytest.approx(float(np.average(x, weights=w)), rel=1e-12)
    assert got.sd == pytest.approx(float(np.sqrt(np.cov(x, aweights=w))), rel=1e-10)
    assert got.n_voxels == int(mask.sum())


@pytest.mark.parametrize("q", [0.0, 5.0, 37.5, 50.0, 95.0, 100.0])
def test_weighted_percentile_matches_slow_reference(q):
    rng = np.random.default_rng(11)
    values = rng.normal(0, 1, 57)
    weights = rng.uniform(0, 2, 57)
    weights[::9] = 0.0
    assert weighted_percentile(values, weights, q) == pytest.approx(
        _slow_weighted_percentile(values, weights, q), rel=1e-12, abs=1e-12
    )


def test_equal_weights_reduce_to_numpy_percentile():
    values = np.random.default_rng(5).normal(size=40)
    for q in (5, 50, 95):
        # Oracle: numpy.percentile's default linear method.
        assert weighted_percentile(values, np.full(40, 0.3), q) == pytest.approx(
            float(np.percentile(values, q)), rel=1e-12
        )


def test_zero_weight_voxels_do_not_count():
    values = np.array([1.0, 2.0, 3.0, 100.0])
    weights = np.array([1.0, 1.0, 1.0, 0.0])
    assert weighted_percentile(values, weights, 50) == pytest.approx(2.0)
    assert weighted_percentile(values, weights, 100) == pytest.approx(3.0)


def test_inner_depth_equals_scipy_euclidean_distance_transform():
    spacing_xyz = (0.9, 1.1, 2.5)
    mask = _ball((10, 24, 22), (5, 12, 11), 9.0, spacing_zyx=spacing_xyz[::-1])
    mask[:, :, :3] = True  # touches the array edge: the edge counts as outside
    got = inner_depth_mm(mask, spacing_xyz)
    # Oracle: scipy.ndimage.distance_transform_edt on the padded mask, spacing in (z, y, x).
    padded = np.pad(mask, 1)
    want = ndimage.distance_transform_edt(padded, sampling=spacing_xyz[::-1])[1:-1, 1:-1, 1:-1]
    np.testing.assert_allclose(got, want, rtol=1e-5, atol=1e-5)


def test_shell_is_outer_third_of_radius_and_core_the_rest():
    mask = _ball((21, 21, 21), (10, 10, 10), 9.0)
    shell, core = shell_core_masks(mask, (1.0, 1.0, 1.0), shell_fraction=1 / 3)
    assert not (shell & core).any() and ((shell | core) == mask).all()
    depth = ndimage.distance_transform_edt(np.pad(mask, 1))[1:-1, 1:-1, 1:-1]
    thickness = depth.max() / 3
    assert (depth[shell] <= thickness + 1e-9).all() and (depth[core] > thickness).all()
    # The surface layer is always shell, even for a thin fraction.
    thin_shell, _ = shell_core_masks(mask, (1.0, 1.0, 1.0), shell_fraction=0.01)
    assert thin_shell[depth == 1.0].all() and thin_shell.sum() == (depth[mask] <= 1.0).sum()


def test_measure_roi_below_min_voxels_is_null_with_a_note():
    values = np.ones((4, 4, 4))
    mask = np.zeros_like(values, bool)
    mask[0, 0, :3] = True
    got = measure_roi(
        values, mask, None, (1, 1, 1), lesion=True, min_voxels=20, roi_id="L2", role=Role.T2
    )
    assert got.stats is None and got.shell is None and got.core is None
    assert got.note == "only 3 voxels of L2 on T2 (minimum 20)"


def test_measure_roi_lesion_shell_and_core_stats():
    mask = _ball((19, 19, 19), (9, 9, 9), 8.0)
    depth = ndimage.distance_transform_edt(np.pad(mask, 1))[1:-1, 1:-1, 1:-1]
    values = np.where(mask, 400.0, 10.0)
    values[mask & (depth <= depth.max() / 3)] = 900.0  # a bright rim
    got = measure_roi(
        values, mask, None, (1.0, 1.0, 1.0), lesion=True, min_voxels=20, shell_fraction=1 / 3
    )
    assert got.stats.n_voxels == int(mask.sum())
    assert got.shell.median == 900.0 and got.core.median == 400.0
    assert got.shell.n_voxels + got.core.n_voxels == got.stats.n_voxels
    # Reference ROIs get no shell / core.
    ref = measure_roi(values, mask, None, (1.0, 1.0, 1.0), lesion=False, min_voxels=20)
    assert ref.shell is None and ref.core is None


def test_measure_roi_small_lesion_has_no_shell_core():
    mask = _ball((9, 9, 9), (4, 4, 4), 1.8)  # 33 voxels, nearly all on the surface
    got = measure_roi(np.ones(mask.shape), mask, None, (1, 1, 1), lesion=True, min_voxels=20)
    assert got.stats is not None and got.shell is None and got.core is None


def test_measure_roi_leaves_out_voxels_outside_the_field_of_view():
    values = np.full((6, 6, 6), 5.0)
    values[0] = np.nan
    mask = np.ones(values.shape, bool)
    got = measure_roi(values, mask, None, (1, 1, 1), lesion=False, min_voxels=20)
    assert got.stats.n_voxels == 180 and got.stats.median == 5.0
    assert "36 voxels outside the field of view" in got.note


@pytest.mark.parametrize("corner", [(2, 3, 4), (0, 0, 0), (9, 20, 30)])
def test_shell_and_core_from_the_rois_box_equal_those_of_the_whole_array(corner):
    # shell_core_masks computes depths only over the ROI's bounding box; the oracle is the
    # depth over the whole array (SimpleITK's distance map on all of it), thresholded the same.
    rng = np.random.default_rng(sum(corner))
    mask = np.zeros((14, 32, 40), dtype=bool)
    z, y, x = np.ogrid[:5, :12, :10]
    blob = (z - 2) ** 2 / 6.0 + (y - 5.5) ** 2 / 30.0 + (x - 4.5) ** 2 / 20.0 <= 1.0
    blob &= rng.random(blob.shape) > 0.05
    mask[corner[0] : corner[0] + 5, corner[1] : corner[1] + 12, corner[2] : corner[2] + 10] = blob
    spacing = (0.9, 0.9, 3.0)
    depth = inner_depth_mm(mask, spacing)
    thickness = max(depth[mask].max() / 3.0, min(spacing))
    want_shell = mask & (depth <= thickness * (1.0 + 1e-9))
    shell, core = shell_core_masks(mask, spacing, shell_fraction=1.0 / 3.0)
    assert np.array_equal(shell, want_shell)
    assert np.array_equal(core, mask & ~want_shell)
