"""ROIs drawn as masks: label images (NIfTI, NRRD, MHA), DICOM SEG and DICOM RTSTRUCT.

Every mask becomes a physical-space region (:class:`sigreport.rois.space.Region`):

* a **voxel grid** (:class:`GridRegion`) for label images and SEG: a point is inside when the
  mask voxel nearest to it (the one whose cell holds it, as SimpleITK's nearest-neighbour
  interpolator picks it) is set. Label images are read with SimpleITK in their own physical
  space (SimpleITK converts NIfTI's RAS to DICOM's LPS); SEG with highdicom (PS3.3 C.8.20),
  whose volume affine maps array indices to the frame of reference (LPS).
* a **stack of planar polygons** (:class:`ContourRegion`) for RTSTRUCT (PS3.3 C.8.8.6): contour
  points are patient coordinates, so no image is needed. A point is inside a contour's plane
  slab (half the slab thickness either side, PS3.3 C.8.8.6.2 Contour Slab Thickness, else the
  spacing of the contour planes) when it is inside the polygon by the even-odd rule, so an inner
  contour in the same plane cuts a hole.
"""

from __future__ import annotations

import re
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import SimpleITK as sitk

from sigreport import limits
from sigreport.errors import InputError
from sigreport.model import Stack
from sigreport.rois.space import as_points

__all__ = [
    "GridRegion",
    "ContourRegion",
    "PlanarContour",
    "load_mask_region",
    "load_label_image",
    "load_seg",
    "load_rtstruct",
]

# Fractional SEG (PS3.3 C.8.20.2.3, PROBABILITY or OCCUPANCY): a voxel centre is inside when the
# fraction there is at least one half, the usual reading of both kinds.
FRACTION_THRESHOLD = 0.5
# RTSTRUCT with contours on a single plane and no Contour Slab Thickness: the slab is this thick.
SINGLE_PLANE_SLAB_MM = 1.0


@dataclass(frozen=True, eq=False)
class GridRegion:
    """A region given by a voxel grid: ``values`` (in [0, 1]) over ``affine`` (4x4).

    ``affine`` maps array indices ``(i0, i1, i2)`` of ``values`` (homogeneous) to LPS mm.
    """

    id: str
    values: np.ndarray  # float32, 3D, fraction inside (1.0 / 0.0 for binary masks)
    affine: np.ndarray
    threshold: float = FRACTION_THRESHOLD
    source_series_uid: str | None = None
    frame_of_reference_uid: str | None = None
    source: str = ""  # the file it came from, for messages
    study_instance_uid: str | None = None  # SEG: the study it was drawn on

    def _nearest(self, points_lps: np.ndarray) -> np.ndarray:
        points = as_points(points_lps)
        inverse = np.linalg.inv(self.affine)
        cont = points @ inverse[:3, :3].T + inverse[:3, 3]
        # Round half up, as ITK's nearest-neighbour interpolator does (RoundHalfIntegerUp).
        idx = np.floor(cont + 0.5).astype(np.int64)
        shape = np.asarray(self.values.shape)
        ok = np.all((idx >= 0) & (idx < shape), axis=1)
        out = np.zeros(len(points), dtype=np.float32)
        good = idx[ok]
        out[ok] = self.values[good[:, 0], good[:, 1], good[:, 2]]
        return out

    def contains(self, points_lps: np.ndarray) -> np.ndarray:
        return self._nearest(points_lps) >= self.threshold

    def fraction(self, points_lps: np.ndarray) -> np.ndarray:
        """The mask value of the voxel nearest each point (0 outside the grid)."""
        return self._nearest(points_lps)

    def bounds_mm(self) -> tuple[np.ndarray, np.ndarray]:
        inside = np.argwhere(self.values > 0)
        if len(inside) == 0:
            nan = np.full(3, np.nan)
            return nan, nan
        lo = inside.min(axis=0) - 0.5
        hi = inside.max(axis=0) + 0.5
        corners = np.array(
            [
                [(lo, hi)[a][0], (lo, hi)[b][1], (lo, hi)[c][2]]
                for a in (0, 1)
                for b in (0, 1)
                for c in (0, 1)
            ]
        )
        mm = corners @ self.affine[:3, :3].T + self.affine[:3, 3]
        return mm.min(axis=0), mm.max(axis=0)

    @property
    def n_voxels(self) -> int:
        return int(np.count_nonzero(self.values >= self.threshold))


def affine_of_image(image: sitk.Image) -> np.ndarray:
    """4x4 affine from numpy array indices ``(z, y, x)`` of a SimpleITK image to LPS mm."""
    spacing = np.asarray(image.GetSpacing(), dtype=np.float64)
    direction = np.asarray(image.GetDirection(), dtype=np.float64).reshape(3, 3)
    affine = np.eye(4)
    # Column k of D (scaled by spacing k) is the step for SimpleITK index k; numpy reverses axes.
    affine[:3, :3] = (direction * spacing)[:, ::-1]
    affine[:3, 3] = image.GetOrigin()
    return affine


@dataclass(frozen=True, eq=False)
class PlanarContour:
    """One closed planar polygon of an RTSTRUCT, in its own plane."""

    normal: np.ndarray  # unit normal
    offset_mm: float  # normal . point, for every point of the plane
    u: np.ndarray  # in-plane basis
    v: np.ndarray
    polygon_uv: np.ndarray  # (M, 2)
    points_mm: np.ndarray  # (M, 3)
    slab_mm: float | None  # Contour Slab Thickness, when the file gives it

    @property
    def area_mm2(self) -> float:
        """The polygon's area by the shoelace formula."""
        x, y = self.polygon_uv[:, 0], self.polygon_uv[:, 1]
        return 0.5 * abs(float(np.dot(x, np.roll(y, -1)) - np.dot(y, np.roll(x, -1))))


def _inside_polygon(points_uv: np.ndarray, polygon: np.ndarray) -> np.ndarray:
    """Even-odd (crossing number) point-in-polygon test, vectorized over points."""
    px, py = points_uv[:, 0], points_uv[:, 1]
    inside = np.zeros(len(points_uv), dtype=bool)
    x1, y1 = polygon[:, 0], polygon[:, 1]
    x2, y2 = np.roll(x1, -1), np.roll(y1, -1)
    for a, b, c, d in zip(x1, y1, x2, y2, strict=True):
        if b == d:
            continue
        crosses = (b > py) != (d > py)
        x_at = a + (py - b) * (c - a) / (d - b)
        inside ^= crosses & (px < x_at)
    return inside


@dataclass(frozen=True, eq=False)
class ContourRegion:
    """A region given by closed planar contours (DICOM RTSTRUCT), in patient coordinates."""

    id: str
    contours: tuple[PlanarContour, ...]
    slab_mm: float  # default slab thickness for contours without their own
    source_series_uid: str | None = None
    frame_of_reference_uid: str | None = None
    source: str = ""
    study_instance_uid: str | None = None  # the study the structure set was drawn on
    _planes: list = field(default_factory=list, repr=False)

    def __post_init__(self) -> None:
        # Contours sharing a plane are combined by the even-odd rule (holes); planes by union.
        planes: dict[tuple, list[PlanarContour]] = {}
        for c in self.contours:
            key = (tuple(np.round(c.normal, 3)), round(c.offset_mm, 3))
            planes.setdefault(key, []).append(c)
        self._planes.extend(planes.values())

    def contains(self, points_lps: np.ndarray) -> np.ndarray:
        points = as_points(points_lps)
        result = np.zeros(len(points), dtype=bool)
        for group in self._planes:
            first = group[0]
            half = (first.slab_mm if first.slab_mm is not None else self.slab_mm) / 2.0
            distance = points @ first.normal - first.offset_mm
            near = (distance >= -half) & (distance < half)
            if not near.any():
                continue
            sel = points[near]
            uv = np.stack([sel @ first.u, sel @ first.v], axis=1)
            parity = np.zeros(len(sel), dtype=bool)
            for c in group:
                parity ^= _inside_polygon(uv, c.polygon_uv)
            result[np.flatnonzero(near)[parity]] = True
        return result

    def bounds_mm(self) -> tuple[np.ndarray, np.ndarray]:
        los, his = [], []
        for c in self.contours:
            half = (c.slab_mm if c.slab_mm is not None else self.slab_mm) / 2.0
            pad = np.abs(c.normal) * half
            los.append(c.points_mm.min(axis=0) - pad)
            his.append(c.points_mm.max(axis=0) + pad)
        return np.min(los, axis=0), np.max(his, axis=0)


# ------------------------------------------------------------------------------------------
# Readers


def _is_dicom(path: Path) -> bool:
    try:
        with path.open("rb") as handle:
            handle.seek(128)
            return handle.read(4) == b"DICM"
    except OSError:
        return False


def load_mask_region(
    path: Path,
    *,
    roi_id: str,
    segment: str | int | None = None,
    label: int | None = None,
) -> GridRegion | ContourRegion:
    """The region held by a mask file, whatever its format.

    Parameters
    ----------
    path : pathlib.Path
        NIfTI / NRRD / MHA label image, DICOM SEG or DICOM RTSTRUCT.
    roi_id : str
        The ROI's id (carried by the region).
    segment : str or int, optional
        SEG: segment label or number; RTSTRUCT: ROI name or number. Default: the only one.
    label : int, optional
        Label images: the label value (default: any non-zero voxel). SEG: a segment number
        when ``segment`` is not given.

    Raises
    ------
    sigreport.errors.InputError
        Naming the file and the problem.
    """
    path = Path(path)
    if not path.is_file():
        raise InputError(f"mask file {path} not found")
    if _is_dicom(path):
        import pydicom

        try:
            header = pydicom.dcmread(path, stop_before_pixels=True)
        except Exception as exc:  # pydicom raises many kinds on a broken file
            raise InputError(f"mask file {path}: not readable as DICOM: {exc}") from None
        modality = str(header.get("Modality", ""))
        if modality == "SEG":
            _check_seg_size(header, path)
            return load_seg(path, roi_id=roi_id, segment=segment if segment is not None else label)
        if modality == "RTSTRUCT":
            return load_rtstruct(path, roi_id=roi_id, roi=segment)
        if modality in ("PR", "SR"):
            # Outlines on images: placed with the study's geometry (rois.annotations).
            raise InputError(
                f"mask file {path}: a presentation state or SR outline needs the study's "
                "images (sigreport.rois.annotations.load_annotation_region)"
            )
        raise InputError(
            f"mask file {path}: DICOM Modality {modality or '(none)'} is not SEG, RTSTRUCT, PR "
            "or SR; a DICOM mask must be a Segmentation, an RT Structure Set, a presentation "
            "state or a measurement report"
        )
    return load_label_image(path, roi_id=roi_id, label=label)


def _check_seg_size(header: Any, path: Path) -> None:
    """Rows x Columns x NumberOfFrames of a SEG against ``limits.MAX_MASK_VOXELS``, before
    highdicom decodes it (an encapsulated SEG can inflate far beyond its file)."""
    try:
        rows, columns = int(header.get("Rows") or 0), int(header.get("Columns") or 0)
        frames = int(header.get("NumberOfFrames") or 1)
    except (TypeError, ValueError):
        raise InputError(
            f"mask file {path}: Rows, Columns or NumberOfFrames is not a number"
        ) from None
    if not rows or not columns:
        return  # highdicom's reader says what is missing
    voxels = rows * columns * frames
    if rows < 1 or columns < 1 or frames < 1 or voxels > limits.MAX_MASK_VOXELS:
        raise InputError(
            f"mask file {path}: the SEG declares {rows} x {columns} pixels x {frames} frames; "
            f"at most {limits.MAX_MASK_VOXELS} voxels are read (sigreport.limits)"
        )


def _gzip_inflated_size(path: Path, cap: int) -> int | None:
    """The inflated size of a gzip file, streamed 1 MiB at a time and discarded; None as soon
    as it passes ``cap`` (a small file can inflate to gigabytes)."""
    import gzip

    total = 0
    try:
        with gzip.open(path, "rb") as stream:
            while chunk := stream.read(1 << 20):
                total += len(chunk)
                if total > cap:
                    return None
    except (OSError, EOFError):
        return total  # a corrupt stream: SimpleITK's reader reports it
    return total


def _check_label_image_size(path: Path, roi_id: str) -> None:
    """The dimensions a label image declares (its header only, read by SimpleITK), and for a
    gzip file (``.nii.gz``) the inflated length, against the ceilings of
    :mod:`sigreport.limits`, before the image is read."""
    reader = sitk.ImageFileReader()
    reader.SetFileName(str(path))
    try:
        reader.ReadImageInformation()
    except RuntimeError as exc:
        raise InputError(
            f"ROI {roi_id}: mask file {path} is not an image SimpleITK can read as a label "
            f"image (NIfTI, NRRD, MHA...): {_reader_reason(exc)}"
        ) from None
    size = [int(v) for v in reader.GetSize()]
    voxels = int(np.prod(size, dtype=np.float64)) * max(1, reader.GetNumberOfComponents())
    if voxels > limits.MAX_MASK_VOXELS:
        raise InputError(
            f"mask file {path}: the label image declares {' x '.join(map(str, size))} voxels; "
            f"at most {limits.MAX_MASK_VOXELS} are read (sigreport.limits)"
        )
    with path.open("rb") as handle:
        gzipped = handle.read(2) == b"\x1f\x8b"  # RFC 1952 member header
    if gzipped:
        # The voxels it declares (8 bytes each at most) plus room for a header and extensions.
        cap = min(limits.MAX_INFLATED_BYTES, voxels * 8 + 16 * 1024**2)
        if _gzip_inflated_size(path, cap) is None:
            raise InputError(
                f"mask file {path}: the gzip stream inflates beyond {cap} bytes, more than its "
                f"{' x '.join(map(str, size))} voxels need; refused before decompressing it"
            )


def load_label_image(path: Path, *, roi_id: str, label: int | None = None) -> GridRegion:
    """A label image (NIfTI, NRRD, MHA...) read by SimpleITK, in its physical (LPS) space.

    Its declared size and (gzip) inflated length are checked first (``_check_label_image_size``).
    """
    _check_label_image_size(path, roi_id)
    try:
        image = sitk.ReadImage(str(path))
    except RuntimeError as exc:
        raise InputError(
            f"ROI {roi_id}: mask file {path} is not an image SimpleITK can read as a label "
            f"image (NIfTI, NRRD, MHA...): {_reader_reason(exc)}"
        ) from None
    if image.GetDimension() != 3 or image.GetNumberOfComponentsPerPixel() != 1:
        raise InputError(
            f"mask file {path}: a label image must be 3D with one value per voxel, got "
            f"{image.GetDimension()}D with {image.GetNumberOfComponentsPerPixel()} components"
        )
    array = sitk.GetArrayFromImage(image)
    if label is None:
        values = (array != 0).astype(np.float32)
        if not values.any():
            raise InputError(f"mask file {path}: the label image is empty (no non-zero voxel)")
    else:
        values = (array == label).astype(np.float32)
        if not values.any():
            present = np.unique(array[array != 0])[:20]
            raise InputError(
                f"mask file {path}: no voxel has label {label}; labels present: "
                f"{', '.join(str(int(v)) for v in present) or 'none'}"
            )
    return GridRegion(id=roi_id, values=values, affine=affine_of_image(image), source=str(path))


def load_seg(path: Path, *, roi_id: str, segment: str | int | None = None) -> GridRegion:
    """One segment of a DICOM Segmentation (binary or fractional), read with highdicom."""
    import highdicom as hd

    try:
        seg = hd.seg.segread(path)
    except Exception as exc:  # highdicom / pydicom raise many kinds on a broken file
        raise InputError(f"mask file {path}: not a readable DICOM SEG: {exc}") from None
    labels = {
        int(item.SegmentNumber): str(item.get("SegmentLabel", "")) for item in seg.SegmentSequence
    }
    number = _pick_number(
        labels,
        segment,
        f"mask file {path}",
        many=f"the SEG has {len(labels)} segments",
        noun=("segment", "segments"),
        number_suffix="",
        verb="labelled",
    )
    try:
        volume = seg.get_volume(
            segment_numbers=[number], combine_segments=False, rescale_fractional=True
        )
    except Exception as exc:  # highdicom raises ValueError / RuntimeError on irregular frames
        raise InputError(
            f"mask file {path}: segment {number} does not form a regular 3D volume: {exc}"
        ) from None
    array = np.asarray(volume.array)
    if array.ndim == 4:
        array = array[..., 0]
    values = np.clip(array.astype(np.float32), 0.0, 1.0)
    if not (values > 0).any():
        raise InputError(f"mask file {path}: segment {number} is empty")
    source_series = None
    refs = seg.get("ReferencedSeriesSequence")
    if refs:
        source_series = str(refs[0].SeriesInstanceUID)
    return GridRegion(
        id=roi_id,
        values=values,
        affine=np.asarray(volume.affine, dtype=np.float64),
        source_series_uid=source_series,
        frame_of_reference_uid=str(seg.get("FrameOfReferenceUID", "")) or None,
        source=str(path),
        study_instance_uid=str(seg.get("StudyInstanceUID", "")) or None,
    )


def _plane_of(points: np.ndarray, where: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Unit normal (Newell's method) and an orthonormal in-plane basis of a polygon."""
    normal = np.zeros(3)
    nxt = np.roll(points, -1, axis=0)
    normal[0] = np.sum((points[:, 1] - nxt[:, 1]) * (points[:, 2] + nxt[:, 2]))
    normal[1] = np.sum((points[:, 2] - nxt[:, 2]) * (points[:, 0] + nxt[:, 0]))
    normal[2] = np.sum((points[:, 0] - nxt[:, 0]) * (points[:, 1] + nxt[:, 1]))
    length = np.linalg.norm(normal)
    if length == 0:
        raise InputError(f"{where}: the contour encloses no area (degenerate polygon)")
    normal /= length
    # Orient normals consistently (largest component positive) so parallel planes group.
    if normal[np.argmax(np.abs(normal))] < 0:
        normal = -normal
    helper = np.array([1.0, 0.0, 0.0]) if abs(normal[0]) < 0.9 else np.array([0.0, 1.0, 0.0])
    u = np.cross(normal, helper)
    u /= np.linalg.norm(u)
    v = np.cross(normal, u)
    return normal, u, v


def load_rtstruct(
    path: Path,
    *,
    roi_id: str,
    roi: str | int | None = None,
    planar_tol_mm: float = 0.05,
) -> ContourRegion:
    """One ROI of a DICOM RT Structure Set, from its closed planar contours.

    Parameters
    ----------
    path : pathlib.Path
    roi_id : str
    roi : str or int, optional
        ROI Name (3006,0026) or ROI Number (3006,0022); default: the only ROI with contours.
    planar_tol_mm : float, keyword-only
        How far (mm) a contour point may lie off the contour's plane (default 0.05 mm).
    """
    import pydicom

    try:
        ds = pydicom.dcmread(path)
    except Exception as exc:  # pydicom raises many kinds on a broken file
        raise InputError(f"mask file {path}: not readable as DICOM: {exc}") from None
    where = f"mask file {path}"
    names = {int(item.ROINumber): item for item in ds.get("StructureSetROISequence", [])}
    contours_of = {
        int(item.ReferencedROINumber): item
        for item in ds.get("ROIContourSequence", [])
        if item.get("ContourSequence")
    }
    if not contours_of:
        raise InputError(f"{where}: the RTSTRUCT holds no contours")
    number = _pick_number(
        {n: str(names[n].get("ROIName", "")) if n in names else "" for n in contours_of},
        roi,
        where,
        many=f"the RTSTRUCT has {len(contours_of)} ROIs with contours",
        noun=("ROI", "ROIs"),
        number_suffix=" with contours",
        verb="named",
    )

    planar: list[PlanarContour] = []
    for k, item in enumerate(contours_of[number].ContourSequence, start=1):
        kind = str(item.get("ContourGeometricType", ""))
        if kind != "CLOSED_PLANAR":
            continue  # points and open contours enclose nothing
        data = np.asarray([float(v) for v in item.ContourData], dtype=np.float64)
        if data.size % 3 or data.size < 9:
            raise InputError(
                f"{where}: contour {k} of ROI {number} has {data.size} coordinates; "
                "Contour Data needs at least 3 (x, y, z) points"
            )
        points = data.reshape(-1, 3)
        offset_vector = item.get("ContourOffsetVector")
        if offset_vector is not None:
            points = points + np.asarray([float(v) for v in offset_vector])
        normal, u, v = _plane_of(points, f"{where}: contour {k} of ROI {number}")
        offsets = points @ normal
        off_plane = float(np.max(np.abs(offsets - offsets.mean())))
        if off_plane > planar_tol_mm:
            raise InputError(
                f"{where}: contour {k} of ROI {number} is CLOSED_PLANAR but its points lie up "
                f"to {off_plane:.3f} mm off its plane (tolerance {planar_tol_mm} mm)"
            )
        slab = item.get("ContourSlabThickness")
        planar.append(
            PlanarContour(
                normal=normal,
                offset_mm=float(offsets.mean()),
                u=u,
                v=v,
                polygon_uv=np.stack([points @ u, points @ v], axis=1),
                points_mm=points,
                slab_mm=float(slab) if slab is not None and float(slab) > 0 else None,
            )
        )
    if not planar:
        raise InputError(f"{where}: ROI {number} has no CLOSED_PLANAR contour")

    # Default slab: the spacing of the contour planes (along the first contour's normal).
    normal = planar[0].normal
    levels = np.unique(np.round([c.points_mm.mean(axis=0) @ normal for c in planar], 3))
    gaps = np.diff(levels)
    gaps = gaps[gaps > 1e-3]
    slab_mm = float(np.median(gaps)) if len(gaps) else SINGLE_PLANE_SLAB_MM

    frame = None
    series = None
    for ref in ds.get("ReferencedFrameOfReferenceSequence", []):
        frame = frame or str(ref.get("FrameOfReferenceUID", "")) or None
        for study in ref.get("RTReferencedStudySequence", []):
            for ser in study.get("RTReferencedSeriesSequence", []):
                series = series or str(ser.get("SeriesInstanceUID", "")) or None
    if number in names:
        frame = str(names[number].get("ReferencedFrameOfReferenceUID", "")) or frame
    return ContourRegion(
        id=roi_id,
        contours=tuple(planar),
        slab_mm=slab_mm,
        source_series_uid=series,
        frame_of_reference_uid=frame,
        source=str(path),
        study_instance_uid=str(ds.get("StudyInstanceUID", "")) or None,
    )


def _pick_number(
    labels: dict[int, str],
    wanted: str | int | None,
    where: str,
    *,
    many: str,
    noun: tuple[str, str],
    number_suffix: str,
    verb: str,
) -> int:
    """The segment / ROI number the case file asks for: the only one when ``wanted`` is None,
    a number, or a label (exact, else case-insensitive); an ``InputError`` listing what the
    file holds otherwise."""
    listing = ", ".join(f"{n} {lab!r}" for n, lab in sorted(labels.items()))
    if wanted is None:
        if len(labels) != 1:
            raise InputError(f"{where}: {many} ({listing}); name one with segment = ...")
        return next(iter(labels))
    if isinstance(wanted, int):
        if wanted not in labels:
            raise InputError(f"{where}: no {noun[0]} number {wanted}{number_suffix}; has {listing}")
        return wanted
    matches = [n for n, lab in labels.items() if lab == wanted] or [
        n for n, lab in labels.items() if lab.casefold() == wanted.casefold()
    ]
    if len(matches) != 1:
        problem = f"no {noun[0]}" if not matches else f"several {noun[1]}"
        raise InputError(f"{where}: {problem} {verb} {wanted!r}; has {listing}")
    return matches[0]


def _reader_reason(exc: Exception) -> str:
    """The reader's reason without SimpleITK's C++ source location ("...sitkImageReaderBase.cxx:97:
    sitk::ERROR: Unable to determine ImageIO reader for ...")."""
    text = " ".join(str(exc).split())
    if "sitk::ERROR:" in text:
        text = text.split("sitk::ERROR:", 1)[1].strip()
    text = re.sub(r"\S+\.(cxx|cpp|hxx|h|txx)(:\d+)?:?", "", text).strip()
    return text or "unknown format"


def mask_reference_notes(
    region: Any, stacks: Sequence[Stack], *, study_uid: str | None
) -> list[str]:
    """Check that a SEG / RTSTRUCT region belongs to the study it is measured on.

    A mask's coordinates mean something only in its own frame of reference (PS3.3 C.7.4.1):
    one drawn in a frame of reference no series of the study has is refused. A mask of
    another study that shares a frame of reference, or that names a series absent from the
    study, is measured, and the returned notes (one line each, for ``qc``) say so.

    Raises
    ------
    sigreport.errors.InputError
        When the region's frame of reference is none of the study's.
    """
    notes: list[str] = []
    frame = getattr(region, "frame_of_reference_uid", None)
    source = getattr(region, "source", "") or "mask"
    frames = {s.frame_of_reference_uid for s in stacks if s.frame_of_reference_uid}
    if frame and frames and frame not in frames:
        raise InputError(
            f"mask file {source} (ROI {region.id}) was drawn in frame of reference {frame}, "
            f"which no series of the study has ({', '.join(sorted(frames))}); it belongs to "
            "another study or acquisition"
        )
    drawn_on = getattr(region, "study_instance_uid", None)
    if drawn_on and study_uid and drawn_on != study_uid:
        notes.append(
            f"ROI {region.id}: mask file {source} names study {drawn_on}, not this study "
            f"({study_uid}); it shares the frame of reference, check that it belongs here"
        )
    series = getattr(region, "source_series_uid", None)
    if series and series not in {s.series_instance_uid for s in stacks}:
        notes.append(
            f"ROI {region.id}: mask file {source} was drawn on series {series}, which is not "
            "in the study folder"
        )
    return notes
