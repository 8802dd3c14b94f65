"""Carry a physical-space ROI onto the voxel grid of any series.

Membership follows docs/usage.md: a voxel belongs to an ROI when its centre lies inside it.
Partial-volume weights come from supersampling each voxel on a regular sub-grid and counting
the fraction of sub-samples inside (or averaging the region's own ``fraction`` when it has one,
e.g. a fractional DICOM SEG); they refine statistics, never membership.

Voxel centres follow DICOM PS3.3 C.7.6.2.1.1 as SimpleITK stores it:
``p = origin + D @ (spacing * index)``, index in (x, y, z) order (columns, rows, slices); the
arrays handed back are in numpy order ``(z, y, x)``, like ``sitk.GetArrayFromImage``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import SimpleITK as sitk

from sigreport.rois.space import Region

__all__ = [
    "RoiSample",
    "sample_region",
    "volume_ml",
    "max_diameter_mm",
    "voxel_centres_mm",
    "affine_of_transform",
]

# Automatic supersampling aims at sub-samples no coarser than this (mm) along each axis; it is
# a sampling resolution of the method, not a clinical threshold, so it lives here.
_TARGET_SUBSAMPLE_MM = 1.0
_MAX_SUBSAMPLE = 8
# Points evaluated per chunk (bounds memory: chunk x sub-samples x 3 float64).
_CHUNK_POINTS = 1_000_000


@dataclass(frozen=True, eq=False)
class RoiSample:
    """An ROI on one series' voxel grid, kept to its box.

    Only the box of voxels that can hold the ROI is stored (an ROI of a few millilitres on a
    1 mm head series is a few thousand voxels of a ten-million-voxel grid); ``mask`` and
    ``weights`` expand it to the whole grid on demand.

    Attributes
    ----------
    roi_id : str
    box_mask : numpy.ndarray
        bool ``(z, y, x)`` over the box: True where the voxel centre is inside the region.
    box_weights : numpy.ndarray
        float32, the box's shape: partial-volume fraction in [0, 1]; > 0 wherever
        ``box_mask`` is True (at least one sub-sample's worth there), possibly > 0 at edge
        voxels outside it.
    n_voxels : int
        ``box_mask.sum()``.
    offset : tuple of int
        ``(z, y, x)`` index of the box's first voxel in the series' grid.
    grid_shape : tuple of int
        ``(z, y, x)`` shape of the series' whole grid.
    """

    roi_id: str
    box_mask: np.ndarray
    box_weights: np.ndarray
    n_voxels: int
    offset: tuple[int, int, int] = (0, 0, 0)
    grid_shape: tuple[int, int, int] = (0, 0, 0)

    @property
    def box(self) -> tuple[slice, slice, slice]:
        """Slices of the series' ``(z, y, x)`` array covered by the box."""
        return tuple(  # type: ignore[return-value]
            slice(o, o + n) for o, n in zip(self.offset, self.box_mask.shape, strict=True)
        )

    @property
    def mask(self) -> np.ndarray:
        """The membership over the whole grid (allocated on each call)."""
        full = np.zeros(self.grid_shape, dtype=bool)
        full[self.box] = self.box_mask
        return full

    @property
    def weights(self) -> np.ndarray:
        """The weights over the whole grid (allocated on each call)."""
        full = np.zeros(self.grid_shape, dtype=np.float32)
        full[self.box] = self.box_weights
        return full

    def slice_mask(self, z: int) -> np.ndarray:
        """The membership on slice ``z`` of the grid, ``(y, x)``, whole slice."""
        full = np.zeros(self.grid_shape[1:], dtype=bool)
        local = z - self.offset[0]
        if 0 <= local < self.box_mask.shape[0]:
            full[self.box[1:]] = self.box_mask[local]
        return full

    def overlap(self, other: RoiSample) -> int:
        """Voxels inside both samples (both on the same grid)."""
        lo = np.maximum(self.offset, other.offset)
        hi = np.minimum(
            np.add(self.offset, self.box_mask.shape), np.add(other.offset, other.box_mask.shape)
        )
        if np.any(hi <= lo):
            return 0
        mine = self.box_mask[
            tuple(slice(a - o, b - o) for a, b, o in zip(lo, hi, self.offset, strict=True))
        ]
        theirs = other.box_mask[
            tuple(slice(a - o, b - o) for a, b, o in zip(lo, hi, other.offset, strict=True))
        ]
        return int(np.count_nonzero(mine & theirs))


def _geometry(image: sitk.Image) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    if image.GetDimension() != 3:
        raise ValueError(
            f'Argument "image" must be a 3D SimpleITK image, got {image.GetDimension()}D.'
        )
    origin = np.asarray(image.GetOrigin(), dtype=np.float64)
    spacing = np.asarray(image.GetSpacing(), dtype=np.float64)
    direction = np.asarray(image.GetDirection(), dtype=np.float64).reshape(3, 3)
    size = np.asarray(image.GetSize(), dtype=np.int64)
    return origin, spacing, direction, size


def voxel_centres_mm(image: sitk.Image, index_xyz: np.ndarray) -> np.ndarray:
    """Physical (LPS) centres of voxels given as ``(N, 3)`` continuous (x, y, z) indices."""
    origin, spacing, direction, _ = _geometry(image)
    idx = np.asarray(index_xyz, dtype=np.float64)
    return origin + (idx * spacing) @ direction.T


def affine_of_transform(
    transform: sitk.Transform, probe_points: np.ndarray | None = None, *, atol_mm: float = 1e-6
) -> tuple[np.ndarray, np.ndarray] | None:
    """``(A, b)`` with ``transform(p) == A @ p + b`` when the transform is affine, else None.

    Found by transforming the origin and the unit vectors, then checked on ``probe_points``
    (and a few fixed far points) to within ``atol_mm``; a deformable transform fails the check,
    and the caller falls back to transforming point by point.
    """
    b = np.asarray(transform.TransformPoint((0.0, 0.0, 0.0)), dtype=np.float64)
    cols = [
        np.asarray(transform.TransformPoint(tuple(float(v) for v in e)), dtype=np.float64) - b
        for e in np.eye(3)
    ]
    a = np.stack(cols, axis=1)
    checks = [np.array([100.0, -200.0, 300.0]), np.array([-250.0, 120.0, -80.0])]
    if probe_points is not None and len(probe_points):
        pts = np.asarray(probe_points, dtype=np.float64)
        checks.extend(pts[np.linspace(0, len(pts) - 1, min(len(pts), 8)).astype(int)])
    for p in checks:
        got = np.asarray(transform.TransformPoint(tuple(float(v) for v in p)))
        if not np.allclose(got, a @ p + b, rtol=0.0, atol=atol_mm):
            return None
    return a, b


def _map_points(transform: sitk.Transform | None, affine, points: np.ndarray) -> np.ndarray:
    if transform is None:
        return points
    if affine is not None:
        a, b = affine
        return points @ a.T + b
    return np.array([transform.TransformPoint(tuple(p)) for p in points.tolist()])


def _auto_supersample(spacing: np.ndarray) -> np.ndarray:
    factors = np.ceil(spacing / _TARGET_SUBSAMPLE_MM - 1e-6).astype(np.int64)
    return np.clip(factors, 1, _MAX_SUBSAMPLE)


def _index_box(
    region: Region,
    image: sitk.Image,
    to_region_space: sitk.Transform | None,
) -> tuple[np.ndarray, np.ndarray] | None:
    """(lo, hi) inclusive (x, y, z) voxel index range that can hold region voxels, or None."""
    origin, spacing, direction, size = _geometry(image)
    lo, hi = (np.asarray(v, dtype=np.float64) for v in region.bounds_mm())
    if not (np.all(np.isfinite(lo)) and np.all(np.isfinite(hi))):
        return None  # an empty region has no box
    corners = np.array(
        [
            [(lo, hi)[i][0], (lo, hi)[j][1], (lo, hi)[k][2]]
            for i in (0, 1)
            for j in (0, 1)
            for k in (0, 1)
        ]
    )
    if to_region_space is not None:
        try:
            inverse = to_region_space.GetInverse()
        except RuntimeError:
            # Not invertible: search the whole image.
            return np.zeros(3, dtype=np.int64), size - 1
        corners = _map_points(inverse, affine_of_transform(inverse, corners), corners)
    cont = ((corners - origin) @ np.linalg.inv(direction).T) / spacing
    first = np.floor(cont.min(axis=0)).astype(np.int64) - 1
    last = np.ceil(cont.max(axis=0)).astype(np.int64) + 1
    first = np.maximum(first, 0)
    last = np.minimum(last, size - 1)
    if np.any(first > last):
        return None
    return first, last


def sample_region(
    region: Region,
    image: sitk.Image,
    *,
    to_region_space: sitk.Transform | None = None,
    supersample: int | None = None,
) -> RoiSample:
    """Sample a region onto the voxel grid of ``image``.

    Parameters
    ----------
    region : Region
        A physical-space ROI (:func:`sigreport.rois.build_region`).
    image : SimpleITK.Image
        Any 3D series in patient space (oblique and thick-slice grids are fine).
    to_region_space : SimpleITK.Transform, optional
        Maps this image's physical points into the region's space (the anchor's), e.g.
        ``alignment.transform.GetInverse()``. None: the two spaces are the same.
    supersample : int, optional
        Sub-samples per voxel along each axis for the partial-volume weights. None (default):
        automatic, ``ceil(spacing / 1 mm)`` per axis (at most 8), so a 5 mm slice is split in 5
        along z and a 0.9 mm pixel is not split.

    Returns
    -------
    RoiSample
        Membership by voxel centre, weights from supersampling, kept to the region's bounding
        box mapped onto this grid (the rest of the grid is outside).
    """
    origin, spacing, direction, size = _geometry(image)
    if supersample is None:
        factors = _auto_supersample(spacing)
    else:
        if isinstance(supersample, bool) or not isinstance(supersample, int) or supersample < 1:
            raise ValueError(
                f'Argument "supersample" must be a positive integer or None, got {supersample!r}.'
            )
        factors = np.array([supersample] * 3, dtype=np.int64)

    shape_zyx = (int(size[2]), int(size[1]), int(size[0]))
    box = _index_box(region, image, to_region_space)
    if box is None:
        empty = np.zeros((0, 0, 0), dtype=bool)
        return RoiSample(region.id, empty, empty.astype(np.float32), 0, (0, 0, 0), shape_zyx)
    first, last = box
    offset = (int(first[2]), int(first[1]), int(first[0]))
    box_shape = tuple(int(v) for v in (last - first + 1)[::-1])
    mask = np.zeros(box_shape, dtype=bool)
    weights = np.zeros(box_shape, dtype=np.float32)

    affine = None
    if to_region_space is not None:
        probe = voxel_centres_mm(image, np.stack([first, last]).astype(np.float64))
        affine = affine_of_transform(to_region_space, probe)

    # Sub-sample offsets in index units, centred on the voxel centre.
    offsets_1d = [((np.arange(f) + 0.5) / f) - 0.5 for f in factors]
    sub = np.stack(np.meshgrid(*offsets_1d, indexing="ij"), axis=-1).reshape(-1, 3)
    n_sub = len(sub)
    fraction = getattr(region, "fraction", None)

    xs = np.arange(first[0], last[0] + 1)
    ys = np.arange(first[1], last[1] + 1)
    per_slice = len(xs) * len(ys)
    slices_per_chunk = max(1, _CHUNK_POINTS // max(1, per_slice * (n_sub + 1)))
    for z0 in range(int(first[2]), int(last[2]) + 1, slices_per_chunk):
        zs = np.arange(z0, min(z0 + slices_per_chunk, int(last[2]) + 1))
        zz, yy, xx = np.meshgrid(zs, ys, xs, indexing="ij")
        idx = np.stack([xx.ravel(), yy.ravel(), zz.ravel()], axis=1).astype(np.float64)
        centres = _map_points(to_region_space, affine, voxel_centres_mm(image, idx))
        inside = np.asarray(region.contains(centres), dtype=bool)
        subs = (idx[:, None, :] + sub[None, :, :]).reshape(-1, 3)
        subs_mm = _map_points(to_region_space, affine, voxel_centres_mm(image, subs))
        if fraction is not None:
            values = np.asarray(fraction(subs_mm), dtype=np.float64)
        else:
            values = np.asarray(region.contains(subs_mm), dtype=np.float64)
        w = values.reshape(-1, n_sub).mean(axis=1)
        w = np.where(inside & (w <= 0.0), 1.0 / n_sub, w)
        cube = (len(zs), len(ys), len(xs))
        sl = slice(int(zs[0]) - offset[0], int(zs[-1]) + 1 - offset[0])
        mask[sl] = inside.reshape(cube)
        weights[sl] = np.clip(w, 0.0, 1.0).reshape(cube).astype(np.float32)
    return RoiSample(region.id, mask, weights, int(mask.sum()), offset, shape_zyx)


def volume_ml(sample: RoiSample, image: sitk.Image) -> float:
    """ROI volume in millilitres: ``sum(weights) * voxel volume`` (1 ml = 1000 mm^3)."""
    _, spacing, _, _ = _geometry(image)
    return float(np.sum(sample.box_weights, dtype=np.float64) * float(np.prod(spacing)) / 1000.0)


def _boundary(mask: np.ndarray) -> np.ndarray:
    """ROI voxels with at least one 6-neighbour outside (the extremes lie among them)."""
    padded = np.pad(mask, 1, constant_values=False)
    interior = padded[1:-1, 1:-1, 1:-1].copy()
    for axis in range(3):
        for step in (-1, 1):
            interior &= np.roll(padded, step, axis=axis)[1:-1, 1:-1, 1:-1]
    return mask & ~interior


def _fibonacci_directions(n: int) -> np.ndarray:
    i = np.arange(n) + 0.5
    z = 1.0 - 2.0 * i / n
    r = np.sqrt(1.0 - z * z)
    phi = np.pi * (1.0 + 5.0**0.5) * i
    return np.stack([r * np.cos(phi), r * np.sin(phi), z], axis=1)


def max_diameter_mm(sample: RoiSample, image: sitk.Image, *, max_exact_points: int = 4000) -> float:
    """Largest extent of the ROI on this grid, in mm.

    The largest distance between the centres of two ROI voxels, plus one voxel: the length of
    the chord of a voxel through its centre along that line (``min_i spacing_i / |u . e_i|``,
    e_i the grid axes), so that a row of n voxels measures n voxel widths along any grid axis.
    A single voxel measures its largest spacing.
    The farthest pair lies on the ROI's boundary; when the boundary has more than
    ``max_exact_points`` voxels, the candidates are reduced to the points extreme along 2000
    evenly spread directions (the convex hull's vertices, to within a fraction of a voxel).
    Returns 0.0 for an empty ROI.
    """
    _, spacing, direction, _ = _geometry(image)
    if sample.n_voxels == 0:
        return 0.0
    edge = _boundary(sample.box_mask)
    zyx = np.argwhere(edge) + np.asarray(sample.offset)
    points = voxel_centres_mm(image, zyx[:, ::-1].astype(np.float64))
    if len(points) > max_exact_points:
        dirs = _fibonacci_directions(2000)
        proj = points @ dirs.T
        keep = np.unique(np.concatenate([proj.argmax(axis=0), proj.argmin(axis=0)]))
        points = points[keep]
    best, pair = 0.0, (0, 0)
    chunk = max(1, 2_000_000 // max(1, len(points)))
    for start in range(0, len(points), chunk):
        block = points[start : start + chunk]
        d2 = np.sum((block[:, None, :] - points[None, :, :]) ** 2, axis=-1)
        k = int(np.argmax(d2))
        i, j = divmod(k, len(points))
        if d2[i, j] > best:
            best, pair = float(d2[i, j]), (start + i, j)
    if best <= 0.0:
        return float(spacing.max())
    u = points[pair[1]] - points[pair[0]]
    u /= np.linalg.norm(u)
    cosines = np.abs(direction.T @ u)
    chord = float(np.min(spacing[cosines > 1e-12] / cosines[cosines > 1e-12]))
    return math.sqrt(best) + chord


def axial_diameters_mm(sample: RoiSample, image: sitk.Image) -> tuple[float, float, float]:
    """(long, short, craniocaudal) size of the ROI in the patient's axial plane, in mm.

    Voxel centres are taken to patient coordinates (LPS; DICOM PS3.3 C.7.6.2.1.1) and binned
    into axial slabs one voxel-footprint thick along patient z. On the slab with the most voxels
    (the best slice; ties: the one nearest the ROI's centre), ``long`` is the largest distance
    between two voxel centres plus the voxel's width along that line, and ``short`` the ROI's
    width perpendicular to it in the axial plane (extent of the projections plus one voxel
    width); ``craniocaudal`` is the extent of the centres along patient z plus one voxel's
    footprint. This follows the common practice of reporting a lesion by its longest axial axis,
    its longest perpendicular and its craniocaudal extent, whatever the series' orientation.
    Returns zeros for an empty ROI.
    """
    _, spacing, direction, _ = _geometry(image)
    if sample.n_voxels == 0:
        return 0.0, 0.0, 0.0
    # The box's voxels, in the grid's index order (as over the whole grid, without its mask).
    zyx = np.argwhere(sample.box_mask) + np.asarray(sample.offset)
    points = voxel_centres_mm(image, zyx[:, ::-1].astype(np.float64))
    # A voxel's footprint along each patient axis (the box of its three edge vectors).
    footprint = np.abs(direction) @ spacing
    z = points[:, 2]
    craniocaudal = float(z.max() - z.min() + footprint[2])
    slab = np.round((z - z.min()) / max(footprint[2], 1e-6)).astype(np.int64)
    counts = np.bincount(slab)
    best_count = counts.max()
    centre = np.round((z.mean() - z.min()) / max(footprint[2], 1e-6))
    candidates = np.flatnonzero(counts == best_count)
    best = int(candidates[np.argmin(np.abs(candidates - centre))])
    plane = points[slab == best][:, :2]
    if len(plane) > 4000:  # the farthest pair lies among the points extreme along a direction
        angles = np.linspace(0.0, np.pi, 720, endpoint=False)
        dirs = np.stack([np.cos(angles), np.sin(angles)], axis=1)
        proj = plane @ dirs.T
        keep = np.unique(np.concatenate([proj.argmax(axis=0), proj.argmin(axis=0)]))
        plane = plane[keep]
    d = plane[:, None, :] - plane[None, :, :]
    dist = np.einsum("ijk,ijk->ij", d, d)
    i, j = np.unravel_index(int(np.argmax(dist)), dist.shape)
    axis = plane[i] - plane[j]
    length = float(np.linalg.norm(axis))
    u = axis / length if length > 0 else np.array([1.0, 0.0])
    v = np.array([-u[1], u[0]])
    width_u = abs(u[0]) * footprint[0] + abs(u[1]) * footprint[1]
    width_v = abs(v[0]) * footprint[0] + abs(v[1]) * footprint[1]
    slab_points = points[slab == best][:, :2]
    across = slab_points @ v
    long = length + float(width_u)
    short = float(across.max() - across.min()) + float(width_v)
    return long, short, craniocaudal
