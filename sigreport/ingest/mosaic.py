"""Siemens mosaics: one classic image tiling every slice of a 2-D multi-slice acquisition.

Diffusion, functional and perfusion series of one vendor store each volume as a single image
whose pixel matrix is a square grid of slices ("mosaic", ImageType value MOSAIC). Read as one
image it would be a single slice several times too large. The vendor's private CSA image header
(element (0029,xx10) of the private creator "SIEMENS CSA HEADER") gives the number of slices
(NumberOfImagesInMosaic) and the slice normal (SliceNormalVector); nibabel's parser of that
header (``nibabel.nicom.csareader``) reads it, and the geometry below follows the published
description of the format (nibabel documentation, "Siemens mosaic format"):

- the grid is ``ceil(sqrt(n))`` tiles on a side, tiles filled row by row from the top left; the
  tile size is Rows / grid by Columns / grid;
- ImagePositionPatient is the top-left voxel of the whole mosaic as if it were one image centred
  on the slice group, so the first tile's top-left voxel lies at
  ``IPP + r * dc * (Columns - tile columns) / 2 + c * dr * (Rows - tile rows) / 2`` (r, c the
  row and column direction cosines, dc, dr the column and row spacing; PS3.3 C.7.6.2.1.1);
- tile k lies ``k * SpacingBetweenSlices`` (else SliceThickness) along SliceNormalVector, whose
  sign (not always row x column) orders the tiles.

A mosaic that cannot be unpacked (no CSA header, no slice count, a grid that does not divide the
matrix, a slice normal that is missing or not perpendicular to the image plane, no positive slice
step) is skipped with the reason: its geometry would be wrong, and nothing is measured on a wrong
geometry. The checks against nibabel's own ``MosaicWrapper`` are in tests/ingest.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import replace
from typing import Any

import numpy as np
from pydicom.dataset import Dataset

from sigreport.ingest.attributes import FrameRecord, SkipFile

CSA_CREATOR = "SIEMENS CSA HEADER"
CSA_GROUP = 0x0029
CSA_IMAGE_OFFSET = 0x10  # (0029,xx10): CSA image header info


def is_mosaic(image_type: tuple[str, ...]) -> bool:
    """True when ImageType carries the vendor's MOSAIC value (any position, any case)."""
    return any(v.upper() == "MOSAIC" for v in image_type)


def csa_image_header(ds: Dataset) -> dict[str, Any] | None:
    """The CSA image header (0029,xx10) parsed by nibabel, or None when absent or unreadable."""
    if not any(tag >> 16 == CSA_GROUP for tag in ds.keys()):
        return None
    try:
        element = ds.private_block(CSA_GROUP, CSA_CREATOR)[CSA_IMAGE_OFFSET]
        raw = element.value
    except Exception:  # no such private block or element
        return None
    if isinstance(raw, str):
        raw = raw.encode("latin-1")
    if not isinstance(raw, bytes | bytearray) or not raw:
        return None
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # nibabel.nicom warns on import that it is young
            from nibabel.nicom import csareader

            parsed: dict[str, Any] = csareader.read(bytes(raw))
    except Exception:  # a corrupt private header
        return None
    return parsed


def csa_value(csa: dict[str, Any] | None, name: str) -> Any:
    """First item of a CSA tag's values, or None (nibabel's ``get_scalar`` without raising)."""
    if csa is None:
        return None
    tag = csa.get("tags", {}).get(name)
    if not tag or not tag.get("items"):
        return None
    return tag["items"][0]


def csa_vector(csa: dict[str, Any] | None, name: str, n: int) -> tuple[float, ...] | None:
    if csa is None:
        return None
    tag = csa.get("tags", {}).get(name)
    items = tag.get("items") if tag else None
    if not items or len(items) != n:
        return None
    try:
        return tuple(float(v) for v in items)
    except (TypeError, ValueError):
        return None


def with_csa_diffusion(record: FrameRecord, ds: Dataset) -> FrameRecord:
    """A diffusion image's DiffusionDirectionality from the CSA image header when the standard
    attribute is absent (the vendor writes "DIRECTIONAL" for one gradient direction; a trace
    image has none: common practice, read with nibabel's CSA parser)."""
    acq = record.acquisition
    if acq.b_value is None or acq.diffusion_directionality is not None:
        return record
    value = csa_value(csa_image_header(ds), "DiffusionDirectionality")
    if not isinstance(value, str) or not value.strip():
        return record
    return replace(record, acquisition=replace(acq, diffusion_directionality=value.strip().upper()))


def mosaic_frames(
    record: FrameRecord, ds: Dataset, *, normal_tol: float = 1e-2
) -> list[FrameRecord]:
    """Unpack the frame record of a whole mosaic into one record per slice (tile).

    Parameters
    ----------
    record
        The record ``classic_frame`` made of the mosaic image as a whole.
    ds
        The file's header (with the CSA private elements).
    normal_tol
        Largest difference between the CSA slice normal and +-(row x column) per component.

    Raises
    ------
    SkipFile
        Naming what prevents unpacking (see the module docstring).
    """
    csa = csa_image_header(ds)
    if csa is None:
        raise SkipFile(
            "mosaic (ImageType MOSAIC) without a readable CSA image header (0029,xx10) "
            f"'{CSA_CREATOR}': the slice count and order are unknown, not unpacked"
        )
    count = csa_value(csa, "NumberOfImagesInMosaic")
    try:
        n = int(count)
    except (TypeError, ValueError):
        n = 0
    if n < 1:
        raise SkipFile("mosaic whose CSA header gives no NumberOfImagesInMosaic: not unpacked")
    grid = math.ceil(math.sqrt(n))
    if record.rows % grid or record.columns % grid:
        raise SkipFile(
            f"mosaic of {n} slices needs a {grid}x{grid} grid, but the image is "
            f"{record.rows}x{record.columns} (not divisible): not unpacked"
        )
    tile_rows, tile_cols = record.rows // grid, record.columns // grid
    row_dir = np.asarray(record.orientation[:3], float)
    col_dir = np.asarray(record.orientation[3:], float)
    plane_normal = np.cross(row_dir, col_dir)
    csa_normal = csa_vector(csa, "SliceNormalVector", 3)
    if csa_normal is None:
        raise SkipFile("mosaic whose CSA header gives no SliceNormalVector: not unpacked")
    normal = np.asarray(csa_normal, float)
    if not (
        np.allclose(normal, plane_normal, atol=normal_tol)
        or np.allclose(normal, -plane_normal, atol=normal_tol)
    ):
        raise SkipFile(
            f"mosaic whose CSA SliceNormalVector {list(np.round(normal, 4))} is not "
            f"perpendicular to ImageOrientationPatient (normal {list(np.round(plane_normal, 4))})"
            ": not unpacked"
        )
    # The slice normal keeps its CSA sign (tile order) with the plane's exact direction.
    normal = plane_normal if float(np.dot(normal, plane_normal)) > 0 else -plane_normal
    step = record.spacing_between_slices
    step_source = "SpacingBetweenSlices"
    if step is None or step <= 0:
        step, step_source = record.acquisition.slice_thickness_mm, "SliceThickness"
    if step is None or step <= 0:
        raise SkipFile("mosaic without a positive SpacingBetweenSlices or SliceThickness")
    row_spacing, col_spacing = record.pixel_spacing
    first = (
        np.asarray(record.position, float)
        + row_dir * col_spacing * (record.columns - tile_cols) / 2.0
        + col_dir * row_spacing * (record.rows - tile_rows) / 2.0
    )
    note = (
        f"mosaic of {n} slices ({grid}x{grid} tiles of {tile_rows}x{tile_cols}) unpacked from "
        f"the CSA header; slice step {step:g} mm from {step_source}"
    )
    tiles = []
    for k in range(n):
        position = first + k * step * normal
        tiles.append(
            replace(
                record,
                rows=tile_rows,
                columns=tile_cols,
                position=tuple(float(v) for v in position),  # type: ignore[arg-type]
                tile=k,
                warnings=(*record.warnings, note),
            )
        )
    return tiles


def cut_tile(mosaic: np.ndarray, tile: int, rows: int, columns: int) -> np.ndarray:
    """Tile ``tile`` (0-based, row by row from the top left) of a mosaic pixel matrix.

    Raises
    ------
    ValueError
        When the matrix is not a whole grid of ``rows`` x ``columns`` tiles holding ``tile``.
    """
    if mosaic.ndim != 2 or mosaic.shape[0] % rows or mosaic.shape[1] % columns:
        raise ValueError(
            f"a {mosaic.shape} pixel matrix is not a grid of {rows}x{columns} mosaic tiles"
        )
    per_row = mosaic.shape[1] // columns
    r, c = divmod(tile, per_row)
    if r >= mosaic.shape[0] // rows:
        raise ValueError(f"mosaic tile {tile} lies outside a {mosaic.shape} pixel matrix")
    return mosaic[r * rows : (r + 1) * rows, c * columns : (c + 1) * columns]
