"""Outlines a reader saved in the archive: presentation-state annotations and SR image regions.

``shape = "mask"`` also takes (docs/rois.md):

* a **Grayscale Softcopy Presentation State** (DICOM PS3.3 C.10.5 Graphic Annotation): closed
  graphics (CIRCLE, ELLIPSE, and POLYLINE / INTERPOLATED whose first and last points coincide)
  on the images of the Referenced Image Sequence (else on every image the presentation state
  references), in PIXEL or DISPLAY units (C.10.5.1.2);
* a **TID 1500 Measurement Report** (PS3.16): its image regions, ``SCOORD`` (PS3.3 C.18.6) on a
  referenced image, or ``SCOORD3D`` (C.18.9) in patient space.

Pixel coordinates (GSPS PIXEL units and SR SCOORD, PS3.3 C.10.5.1.2 / C.18.6.1.2) are
``column\\row`` pairs whose origin is the top left corner of the top left pixel, so the centre
of pixel (row r, column c) is ``(c + 0.5, r + 0.5)``. They are mapped to patient space on the
referenced image's geometry (C.7.6.2.1.1). DISPLAY units are fractions of the Displayed Area
(C.10.4, ``DisplayedAreaTopLeftHandCorner`` / ``BottomRightHandCorner``, 1-based pixels).

A 2-D outline becomes a slab of its image's slice thickness (half each side of the image plane);
outlines of one pick on several images are united, each in its own slab. An ``ELLIPSOID``
(SCOORD3D) is a solid ellipsoid with the three axes it gives.

When the file holds several outlines, ``segment`` picks one by its text (GSPS text objects,
SR tracking identifier or finding), its graphic layer, or its number in the listing; with no
pick and several outlines the error lists them.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from sigreport.errors import InputError
from sigreport.model import InstanceRef, Stack, StudyIndex
from sigreport.rois.masks import ContourRegion, PlanarContour
from sigreport.rois.regions import as_points

__all__ = [
    "Outline",
    "OrientedEllipsoidRegion",
    "read_gsps_outlines",
    "read_sr_outlines",
    "load_annotation_region",
    "is_annotation_file",
]

# Vertices of the polygon that stands for a circle or an ellipse (the chord error of a
# 128-gon is r (1 - cos(pi / 128)) = 0.0003 r).
_ELLIPSE_VERTICES = 128
# SR concepts "Image Region" (DCM 111030, TID 1410) and "Volume Surface" (DCM 121231, TID 1411).
_REGION_CONCEPTS = ("111030", "121231")
_TRACKING_IDENTIFIER = "112039"
_FINDING = "121071"


@dataclass(frozen=True, eq=False)
class OrientedEllipsoidRegion:
    """A solid ellipsoid with arbitrary axes: ``centre`` and ``axes`` (3x3, one semi-axis
    vector per row, mm)."""

    id: str
    centre: np.ndarray
    axes: np.ndarray
    source_series_uid: str | None = None
    frame_of_reference_uid: str | None = None

    def contains(self, points_lps: np.ndarray) -> np.ndarray:
        points = as_points(points_lps) - self.centre
        lengths = np.linalg.norm(self.axes, axis=1)
        units = self.axes / lengths[:, None]
        scaled = (points @ units.T) / lengths
        return np.einsum("ij,ij->i", scaled, scaled) <= 1.0

    def bounds_mm(self) -> tuple[np.ndarray, np.ndarray]:
        half = np.sqrt((self.axes**2).sum(axis=0))
        return self.centre - half, self.centre + half


@dataclass(frozen=True, eq=False)
class Outline:
    """One closed outline found in a file, with what a user can pick it by."""

    names: tuple[str, ...]  # texts, graphic layer, tracking identifier, finding
    group: str  # the graphic object or SR content item it came from
    description: str  # for listings: type, image, names
    image_key: str | None  # the referenced image (SOP instance UID + frame), None for 3D
    contour: PlanarContour | None = None
    slab_mm: float | None = None
    ellipsoid: tuple[np.ndarray, np.ndarray] | None = None  # (centre, axes) for ELLIPSOID
    series_uid: str | None = None
    frame_of_reference_uid: str | None = None
    notes: tuple[str, ...] = field(default_factory=tuple)


# ------------------------------------------------------------------------------------------
# Geometry


def _find_image(
    index: StudyIndex, sop_uid: str, frame: int | None
) -> tuple[Stack, InstanceRef] | None:
    """The image (frame) a reference names; a multi-frame file needs its frame number unless
    it has a single frame."""
    found = [(s, i) for s in index.stacks for i in s.instances if i.sop_instance_uid == sop_uid]
    for stack, inst in found:
        if inst.frame is None or inst.frame == frame or (frame is None and len(found) == 1):
            return stack, inst
    return None


def _slab_of(stack: Stack) -> float:
    thickness = stack.acquisition.slice_thickness_mm
    return float(thickness) if thickness else float(stack.spacing_mm[2])


def _pixel_to_patient(stack: Stack, inst: InstanceRef, xy: np.ndarray) -> np.ndarray:
    """``(N, 2)`` column\\row pixel coordinates (corner origin) -> ``(N, 3)`` LPS mm."""
    direction = np.asarray(stack.direction, dtype=np.float64).reshape(3, 3)
    row_dir, col_dir = direction[:, 0], direction[:, 1]
    col_spacing, row_spacing = float(stack.spacing_mm[0]), float(stack.spacing_mm[1])
    origin = np.asarray(inst.position_mm, dtype=np.float64)
    columns = xy[:, 0] - 0.5  # centre of the top left pixel is 0.5\0.5
    rows = xy[:, 1] - 0.5
    return origin + np.outer(columns * col_spacing, row_dir) + np.outer(rows * row_spacing, col_dir)


def _ellipse_polygon(p1: np.ndarray, p2: np.ndarray, p3: np.ndarray, p4: np.ndarray) -> np.ndarray:
    """An ellipse from its major axis end points (p1, p2) and minor axis end points (p3, p4)."""
    centre = (p1 + p2) / 2.0
    major, minor = (p2 - p1) / 2.0, (p4 - p3) / 2.0
    t = np.linspace(0.0, 2.0 * np.pi, _ELLIPSE_VERTICES, endpoint=False)
    return centre + np.outer(np.cos(t), major) + np.outer(np.sin(t), minor)


def _circle_polygon(centre: np.ndarray, edge: np.ndarray) -> np.ndarray:
    radius = float(np.linalg.norm(edge - centre))
    t = np.linspace(0.0, 2.0 * np.pi, _ELLIPSE_VERTICES, endpoint=False)
    return centre + radius * np.stack([np.cos(t), np.sin(t)], axis=1)


def _closed_2d(graphic_type: str, points: np.ndarray, where: str) -> np.ndarray | None:
    """The polygon (in the graphic's own 2-D coordinates) of a closed graphic, else None."""
    if graphic_type == "CIRCLE":
        if len(points) != 2:
            raise InputError(f"{where}: a CIRCLE needs 2 points, got {len(points)}")
        return _circle_polygon(points[0], points[1])
    if graphic_type == "ELLIPSE":
        if len(points) != 4:
            raise InputError(f"{where}: an ELLIPSE needs 4 points, got {len(points)}")
        return _ellipse_polygon(*points)
    if graphic_type in ("POLYLINE", "INTERPOLATED", "POLYGON"):
        if len(points) >= 4 and np.allclose(points[0], points[-1]):
            return points[:-1]
        if graphic_type == "POLYGON" and len(points) >= 3:
            return points
    return None


def _contour_on_image(stack: Stack, inst: InstanceRef, polygon_xy: np.ndarray) -> PlanarContour:
    direction = np.asarray(stack.direction, dtype=np.float64).reshape(3, 3)
    u, v, normal = direction[:, 0], direction[:, 1], direction[:, 2]
    normal = normal / np.linalg.norm(normal)
    points = _pixel_to_patient(stack, inst, polygon_xy)
    return PlanarContour(
        normal=normal,
        offset_mm=float(np.dot(normal, inst.position_mm)),
        u=u,
        v=v,
        polygon_uv=np.stack([points @ u, points @ v], axis=1),
        points_mm=points,
        slab_mm=_slab_of(stack),
    )


def _image_label(stack: Stack, inst: InstanceRef) -> str:
    frame = f" frame {inst.frame}" if inst.frame is not None else ""
    return f"series {stack.series_number} image {inst.instance_number}{frame}"


# ------------------------------------------------------------------------------------------
# GSPS (PS3.3 C.10.5)


def _displayed_area(ds: Any, sop_uid: str) -> tuple[np.ndarray, np.ndarray] | None:
    """(top left, bottom right) of the Displayed Area for an image, 1-based column\\row."""
    for item in ds.get("DisplayedAreaSelectionSequence", []):
        refs = item.get("ReferencedImageSequence")
        if refs and all(r.ReferencedSOPInstanceUID != sop_uid for r in refs):
            continue
        tl = np.asarray(item.DisplayedAreaTopLeftHandCorner, dtype=np.float64)
        br = np.asarray(item.DisplayedAreaBottomRightHandCorner, dtype=np.float64)
        return tl, br
    return None


def _gsps_images(ds: Any, item: Any) -> list[tuple[str, int | None]]:
    refs = item.get("ReferencedImageSequence")
    if not refs:  # PS3.3 C.10.5.1.1: absent, it applies to every image of the presentation
        refs = [
            r for s in ds.get("ReferencedSeriesSequence", []) for r in s.ReferencedImageSequence
        ]
    out: list[tuple[str, int | None]] = []
    for ref in refs:
        frames = ref.get("ReferencedFrameNumber")
        if frames is None:
            out.append((str(ref.ReferencedSOPInstanceUID), None))
        else:
            values = list(frames) if hasattr(frames, "__len__") else [frames]
            out.extend((str(ref.ReferencedSOPInstanceUID), int(f)) for f in values)
    return out


def read_gsps_outlines(ds: Any, index: StudyIndex, where: str) -> list[Outline]:
    """Every closed graphic of a presentation state, placed on its referenced images."""
    layers = {
        str(item.GraphicLayer): str(item.get("GraphicLayerDescription", "") or "")
        for item in ds.get("GraphicLayerSequence", [])
    }
    spatial = (
        int(ds.get("ImageRotation", 0) or 0) != 0 or str(ds.get("ImageHorizontalFlip", "N")) == "Y"
    )
    outlines: list[Outline] = []
    for number, item in enumerate(ds.get("GraphicAnnotationSequence", []), start=1):
        layer = str(item.get("GraphicLayer", ""))
        texts = [str(t.get("UnformattedTextValue", "")) for t in item.get("TextObjectSequence", [])]
        base_names = [t for t in texts if t] + [n for n in (layer, layers.get(layer, "")) if n]
        images = _gsps_images(ds, item)
        for graphic_number, graphic in enumerate(item.get("GraphicObjectSequence", []), start=1):
            graphic_type = str(graphic.GraphicType)
            units = str(graphic.GraphicAnnotationUnits)
            spot = f"{where}: graphic annotation {number} ({graphic_type})"
            if int(graphic.get("GraphicDimensions", 2)) != 2:
                raise InputError(f"{spot}: GraphicDimensions must be 2")
            points = np.asarray(graphic.GraphicData, dtype=np.float64).reshape(-1, 2)
            names = list(base_names)
            if graphic.get("TrackingID"):
                names.append(str(graphic.TrackingID))
            for sop_uid, frame in images:
                found = _find_image(index, sop_uid, frame)
                if found is None:
                    raise InputError(
                        f"{spot}: the referenced image {sop_uid}"
                        + (f" frame {frame}" if frame else "")
                        + " is not in the study"
                    )
                stack, inst = found
                xy = points
                if units == "DISPLAY":
                    if spatial:
                        raise InputError(
                            f"{spot}: DISPLAY units with an image rotation or flip are not "
                            "supported; save the outline in PIXEL units"
                        )
                    area = _displayed_area(ds, sop_uid)
                    if area is None:
                        raise InputError(
                            f"{spot}: DISPLAY units but no Displayed Area for the image"
                        )
                    tl, br = area
                    # 0.0\0.0 is the displayed area's top left corner (the corner of 1-based
                    # pixel tl, i.e. pixel coordinate tl - 1), 1.0\1.0 its bottom right corner.
                    xy = (tl - 1.0) + points * (br - tl + 1.0)
                elif units != "PIXEL":
                    raise InputError(
                        f"{spot}: GraphicAnnotationUnits {units!r} is not PIXEL or DISPLAY"
                    )
                polygon = _closed_2d(graphic_type, xy, spot)
                if polygon is None:
                    continue  # POINT, open polylines: no area
                outlines.append(
                    Outline(
                        names=tuple(names),
                        group=f"annotation {number} graphic {graphic_number}",
                        description=f"{graphic_type} on {_image_label(stack, inst)}"
                        + (f", layer {layer!r}" if layer else "")
                        + (
                            f", text {', '.join(repr(t) for t in texts if t)}" if any(texts) else ""
                        ),
                        image_key=f"{sop_uid}#{frame or inst.frame or ''}",
                        contour=_contour_on_image(stack, inst, polygon),
                        slab_mm=_slab_of(stack),
                        series_uid=stack.series_instance_uid,
                        frame_of_reference_uid=stack.frame_of_reference_uid,
                    )
                )
    return outlines


# ------------------------------------------------------------------------------------------
# TID 1500 SR (PS3.16), SCOORD (PS3.3 C.18.6) and SCOORD3D (C.18.9)


def _concept(item: Any) -> str:
    seq = item.get("ConceptNameCodeSequence")
    return str(seq[0].CodeValue) if seq else ""


def _plane_slab(
    index: StudyIndex, points: np.ndarray, frame_uid: str | None
) -> tuple[float, Stack | None]:
    """The slice thickness of a study image whose plane holds the points (else the thinnest
    parallel series' slice spacing), and that stack."""
    centred = points - points.mean(axis=0)
    _, _, vt = np.linalg.svd(centred)
    normal = vt[2]
    best: tuple[float, Stack] | None = None
    for stack in index.stacks:
        if frame_uid and stack.frame_of_reference_uid and stack.frame_of_reference_uid != frame_uid:
            continue
        direction = np.asarray(stack.direction, dtype=np.float64).reshape(3, 3)
        n = direction[:, 2] / np.linalg.norm(direction[:, 2])
        if abs(float(np.dot(n, normal))) < 0.999:
            continue
        offsets = np.array([np.dot(n, inst.position_mm) for inst in stack.instances])
        gap = float(np.min(np.abs(offsets - float(np.dot(n, points.mean(axis=0))))))
        if gap <= 0.5 * float(stack.spacing_mm[2]) + 1e-6:
            candidate = (_slab_of(stack), stack)
            if best is None or candidate[0] < best[0]:
                best = candidate
    if best is None:
        return 1.0, None
    return best


def _planar_contour_3d(points: np.ndarray, slab: float) -> PlanarContour:
    centred = points - points.mean(axis=0)
    _, _, vt = np.linalg.svd(centred)
    u, v, normal = vt[0], vt[1], vt[2]
    if normal[np.argmax(np.abs(normal))] < 0:
        normal = -normal
    return PlanarContour(
        normal=normal,
        offset_mm=float(np.dot(normal, points.mean(axis=0))),
        u=u,
        v=v,
        polygon_uv=np.stack([points @ u, points @ v], axis=1),
        points_mm=points,
        slab_mm=slab,
    )


def _sr_region(item: Any, names: list[str], index: StudyIndex, where: str) -> Outline | None:
    graphic_type = str(item.GraphicType)
    spot = f"{where}: image region {graphic_type}"
    if item.ValueType == "SCOORD":
        points = np.asarray(item.GraphicData, dtype=np.float64).reshape(-1, 2)
        images = [c for c in item.get("ContentSequence", []) if c.ValueType == "IMAGE"]
        if not images:
            raise InputError(f"{spot}: SCOORD without its IMAGE (the image it was drawn on)")
        ref = images[0].ReferencedSOPSequence[0]
        sop_uid = str(ref.ReferencedSOPInstanceUID)
        frames = ref.get("ReferencedFrameNumber")
        frame = int(frames[0] if isinstance(frames, list | tuple) else frames) if frames else None
        found = _find_image(index, sop_uid, frame)
        if found is None:
            raise InputError(f"{spot}: the referenced image {sop_uid} is not in the study")
        stack, inst = found
        polygon = _closed_2d(graphic_type, points, spot)
        if polygon is None:
            return None
        return Outline(
            names=tuple(names),
            group=f"region {id(item)}",
            description=f"SCOORD {graphic_type} on {_image_label(stack, inst)}"
            + (f", {', '.join(repr(n) for n in names)}" if names else ""),
            image_key=f"{sop_uid}#{frame or ''}",
            contour=_contour_on_image(stack, inst, polygon),
            slab_mm=_slab_of(stack),
            series_uid=stack.series_instance_uid,
            frame_of_reference_uid=stack.frame_of_reference_uid,
        )
    points = np.asarray(item.GraphicData, dtype=np.float64).reshape(-1, 3)
    frame_uid = str(item.get("ReferencedFrameOfReferenceUID", "")) or None
    label = f"SCOORD3D {graphic_type}" + (f", {', '.join(repr(n) for n in names)}" if names else "")
    if graphic_type == "ELLIPSOID":
        if len(points) != 6:
            raise InputError(f"{spot}: an ELLIPSOID needs 6 points, got {len(points)}")
        centre = (points[0] + points[1]) / 2.0
        axes = np.stack(
            [(points[1] - points[0]) / 2, (points[3] - points[2]) / 2, (points[5] - points[4]) / 2]
        )
        return Outline(
            tuple(names),
            f"region {id(item)}",
            label,
            None,
            ellipsoid=(centre, axes),
            frame_of_reference_uid=frame_uid,
        )
    if graphic_type == "ELLIPSE":
        if len(points) != 4:
            raise InputError(f"{spot}: an ELLIPSE needs 4 points, got {len(points)}")
        polygon = _ellipse_polygon(*points)
    else:
        closed = _closed_2d(graphic_type, points, spot)
        if closed is None:
            return None
        polygon = closed
    slab, plane_stack = _plane_slab(index, polygon, frame_uid)
    notes = (
        ()
        if plane_stack is not None
        else (f"{label}: on no image plane of the study; a 1 mm slab",)
    )
    return Outline(
        tuple(names),
        f"region {id(item)}",
        label,
        f"3d:{np.round(polygon.mean(axis=0), 1).tolist()}",
        contour=_planar_contour_3d(polygon, slab),
        slab_mm=slab,
        series_uid=plane_stack.series_instance_uid if plane_stack is not None else None,
        frame_of_reference_uid=frame_uid,
        notes=notes,
    )


def read_sr_outlines(ds: Any, index: StudyIndex, where: str) -> list[Outline]:
    """Every closed image region (TID 1410 "Image Region", TID 1411 "Volume Surface") of an SR,
    with its measurement group's names (tracking identifier, finding)."""
    outlines: list[Outline] = []

    def walk(items: Any) -> None:
        names: list[str] = []
        for item in items:
            concept = _concept(item)
            if item.ValueType == "TEXT" and concept == _TRACKING_IDENTIFIER:
                names.append(str(item.TextValue))
            elif item.ValueType == "CODE" and concept == _FINDING:
                names.append(str(item.ConceptCodeSequence[0].CodeMeaning))
        for item in items:
            if item.ValueType in ("SCOORD", "SCOORD3D") and _concept(item) in _REGION_CONCEPTS:
                outline = _sr_region(item, names, index, where)
                if outline is not None:
                    outlines.append(outline)
            elif item.ValueType == "CONTAINER":
                walk(item.get("ContentSequence", []))

    walk(ds.get("ContentSequence", []))
    return outlines


# ------------------------------------------------------------------------------------------
# Picking and the region


def _pick(outlines: list[Outline], pick: str | int | None, where: str) -> list[Outline]:
    listing = "; ".join(f"{k}: {o.description}" for k, o in enumerate(outlines, start=1))
    if not outlines:
        raise InputError(f"{where}: holds no closed outline (circle, ellipse, closed polyline)")
    if pick is None:
        # One graphic shown on several images is one outline per image: their union.
        if len({o.group for o in outlines}) > 1:
            raise InputError(
                f"{where}: holds {len(outlines)} outlines; pick one with segment = "
                f'"<text or layer>" or its number: {listing}'
            )
        return outlines
    if isinstance(pick, int):
        if not 1 <= pick <= len(outlines):
            raise InputError(f"{where}: no outline number {pick}; {listing}")
        return [outlines[pick - 1]]
    exact = [o for o in outlines if pick in o.names]
    chosen = exact or [o for o in outlines if pick.casefold() in {n.casefold() for n in o.names}]
    if not chosen:
        raise InputError(f"{where}: no outline has the text or layer {pick!r}; {listing}")
    if len({o.image_key for o in chosen}) < len(chosen):
        raise InputError(
            f"{where}: {len(chosen)} outlines on one image match {pick!r}; pick one by its "
            f"number: {listing}"
        )
    return chosen


def is_annotation_file(modality: str) -> bool:
    """Presentation states (PR) and structured reports (SR) hold outlines."""
    return modality in ("PR", "SR")


def load_annotation_region(
    path: Path, index: StudyIndex, *, roi_id: str, pick: str | int | None = None
) -> tuple[ContourRegion | OrientedEllipsoidRegion, list[str]]:
    """The region of the outline(s) picked from a GSPS or a TID 1500 SR, and notes.

    Parameters
    ----------
    path : pathlib.Path
        The presentation state or SR file.
    index : sigreport.model.StudyIndex
        The study: the referenced images' geometry.
    roi_id : str
    pick : str or int, optional
        The case file's ``segment``: a text, graphic layer, tracking identifier or finding, or
        the outline's number in the listing.

    Raises
    ------
    sigreport.errors.InputError
        Naming the file: unreadable, no outline, an ambiguous or unknown pick (the outlines are
        listed), a referenced image that is not in the study.
    """
    import pydicom

    where = f"mask file {path}"
    try:
        ds = pydicom.dcmread(path)
    except Exception as exc:  # pydicom raises many kinds on a broken file
        raise InputError(f"{where}: not readable as DICOM: {exc}") from None
    modality = str(ds.get("Modality", ""))
    if modality == "PR":
        outlines = read_gsps_outlines(ds, index, where)
    elif modality == "SR":
        outlines = read_sr_outlines(ds, index, where)
    else:
        raise InputError(f"{where}: Modality {modality!r} is not PR or SR")
    chosen = _pick(outlines, pick, where)
    notes = [f"{roi_id}: {n}" for o in chosen for n in o.notes]
    if any(o.ellipsoid is not None for o in chosen):
        if len(chosen) > 1:
            raise InputError(f"{where}: an ELLIPSOID cannot be united with other outlines")
        centre, axes = chosen[0].ellipsoid  # type: ignore[misc]
        return (
            OrientedEllipsoidRegion(
                roi_id, centre, axes, chosen[0].series_uid, chosen[0].frame_of_reference_uid
            ),
            notes,
        )
    contours = tuple(o.contour for o in chosen if o.contour is not None)
    return (
        ContourRegion(
            id=roi_id,
            contours=contours,
            slab_mm=float(min(o.slab_mm or 1.0 for o in chosen)),
            source_series_uid=chosen[0].series_uid,
            frame_of_reference_uid=chosen[0].frame_of_reference_uid,
            source=str(path),
        ),
        notes,
    )
