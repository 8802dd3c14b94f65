"""Pixels of one stack as a SimpleITK image in DICOM patient space (LPS).

Uncompressed little-endian single-frame images are read with numpy from the Pixel Data offset
(``read_native_frame``); everything else is decoded by pydicom's pixel handlers, which use the pylibjpeg plugins for RLE,
JPEG lossless, JPEG-LS and JPEG 2000 (see docs/ingestion.md). Only the stack asked for is read.
"""

from __future__ import annotations

import os
import warnings
from collections import defaultdict
from pathlib import Path

import numpy as np
import pydicom
import SimpleITK as sitk
from pydicom.datadict import tag_for_keyword
from pydicom.dataset import Dataset

from sigreport import limits
from sigreport.errors import InputError
from sigreport.ingest.attributes import (
    MULTIFRAME_CLASSES,
    PHILIPS_TAGS,
    Scaling,
    _float,
    _str,
    classic_scaling,
)
from sigreport.ingest.enhanced import FunctionalGroups, frame_scaling
from sigreport.ingest.fastheader import EXPLICIT_VR_LE, IMPLICIT_VR_LE, read_header
from sigreport.ingest.mosaic import cut_tile
from sigreport.model import Stack


def _apply(stored: np.ndarray, scaling: Scaling) -> np.ndarray:
    if scaling.lut is not None:
        lut = np.asarray(scaling.lut, dtype=np.float64)
        index = np.clip(stored.astype(np.int64) - scaling.lut_first, 0, len(lut) - 1)
        return lut[index].astype(np.float32)
    out = stored.astype(np.float32)
    if scaling.slope != 1.0:
        out *= np.float32(scaling.slope)
    if scaling.intercept != 0.0:
        out += np.float32(scaling.intercept)
    return out


# What decoding and scaling need; other elements are skipped by dcmread (faster loading).
_LOAD_TAGS = [
    "SOPClassUID", "Rows", "Columns", "SamplesPerPixel", "PhotometricInterpretation",
    "PlanarConfiguration", "BitsAllocated", "BitsStored", "HighBit", "PixelRepresentation",
    "NumberOfFrames", "RescaleSlope", "RescaleIntercept", "RealWorldValueMappingSequence",
    "SharedFunctionalGroupsSequence", "PerFrameFunctionalGroupsSequence", "PixelData",
    "FloatPixelData", "DoubleFloatPixelData", "ExtendedOffsetTable",
    "ExtendedOffsetTableLengths", "SmallestImagePixelValue", "LargestImagePixelValue",
]  # fmt: skip


# The vendor's private scale (attributes.philips_scale) is part of the scaling.
_LOAD_TAG_SET = frozenset(
    [t for t in (tag_for_keyword(k) for k in _LOAD_TAGS) if t is not None] + PHILIPS_TAGS
)
_NATIVE = (IMPLICIT_VR_LE, EXPLICIT_VR_LE)


def _int_value(ds: Dataset, keyword: str) -> int | None:
    value = _float(ds, keyword)  # the scan's raw-value decoding: no pydicom conversion
    return int(value) if value is not None and value.is_integer() else None


def read_native_frame(path: Path) -> tuple[Dataset, np.ndarray] | None:
    """A single-frame, uncompressed little-endian image's header and stored values, read with
    numpy straight from the Pixel Data offset; None when the file is anything else (then
    pydicom decodes it).

    Only the plain case is taken: SamplesPerPixel 1, MONOCHROME1/2, BitsAllocated 8 or 16,
    PixelRepresentation 0/1, HighBit = BitsStored - 1, at most one frame, and a Pixel Data
    length of exactly Rows x Columns x bytes (plus one pad byte when odd, PS3.5 7.1.1).
    Values above BitsStored are masked (unsigned) or sign-extended (signed) as pydicom does.
    """
    try:
        with open(path, "rb") as fp, warnings.catch_warnings():
            warnings.simplefilter("ignore")  # odd header values: pydicom's path reports them
            header = read_header(fp, os.fstat(fp.fileno()).st_size, _LOAD_TAG_SET)
            if header is None or header.transfer_syntax not in _NATIVE:
                return None
            ds = header.dataset
            if header.pixel_tag != 0x7FE00010 or header.pixel_value_offset is None:
                return None
            if _str(ds, "SOPClassUID") in MULTIFRAME_CLASSES:
                return None
            rows, columns = _int_value(ds, "Rows"), _int_value(ds, "Columns")
            bits, stored = _int_value(ds, "BitsAllocated"), _int_value(ds, "BitsStored")
            high, sign = _int_value(ds, "HighBit"), _int_value(ds, "PixelRepresentation")
            frames = _int_value(ds, "NumberOfFrames")
            if (
                _int_value(ds, "SamplesPerPixel") != 1
                or _str(ds, "PhotometricInterpretation") not in ("MONOCHROME1", "MONOCHROME2")
                or not rows
                or not columns
                or bits not in (8, 16)
                or stored is None
                or not 1 <= stored <= bits
                or high != stored - 1
                or sign not in (0, 1)
                or (ds.get_item(0x00280008) is not None and frames != 1)
            ):
                return None
            size = rows * columns * (bits // 8)
            if header.pixel_length not in (size, size + (size % 2)):
                return None
            fp.seek(header.pixel_value_offset)
            data = fp.read(size)
    except Exception:  # odd values in the header: pydicom decides
        return None
    if len(data) != size:
        return None
    dtype = {(8, 0): "u1", (8, 1): "i1", (16, 0): "<u2", (16, 1): "<i2"}[(bits, sign)]
    pixels = np.frombuffer(data, dtype=dtype).reshape(rows, columns)
    if stored < bits:
        shift = bits - stored
        if sign:
            pixels = (pixels << shift) >> shift  # sign-extend from bit HighBit
        else:
            pixels = pixels & ((1 << stored) - 1)
    return ds, pixels


def _where(stack: Stack, path: Path, study_dir: Path | None) -> str:
    """``series 3 (T2 TSE), file s3/IM0001``: the series and the file relative to the study
    folder (a bare file name such as IM0001 exists in every series folder)."""
    shown: Path | str = path
    if study_dir is not None:
        try:
            shown = path.relative_to(study_dir)
        except ValueError:
            shown = path
    series = f"series {stack.series_number}" if stack.series_number is not None else "series"
    if stack.description:
        series += f" ({stack.description})"
    if stack.stack:
        series += f" stack {stack.stack}"
    return f"{series}, file {shown}"


def _read(path: Path, where: str) -> Dataset:
    try:
        return pydicom.dcmread(path, specific_tags=sorted(_LOAD_TAG_SET))
    except Exception as exc:  # the file changed or broke since it was indexed
        raise InputError(f"{where}: cannot be read: {exc}") from None


def _pixels(ds: Dataset, where: str) -> np.ndarray:
    try:
        with warnings.catch_warnings():
            # pydicom warns about recoverable oddities (e.g. excess padding it removes).
            warnings.simplefilter("ignore")
            return np.asarray(ds.pixel_array)
    except Exception as exc:  # no decoder, corrupt stream, wrong lengths, out of memory
        ts = getattr(getattr(ds, "file_meta", None), "TransferSyntaxUID", None)
        name = ts.name if ts is not None else "unknown transfer syntax"
        raise InputError(f"{where}: pixel data cannot be decoded ({name}): {exc}") from None


def load_stack(stack: Stack, *, study_dir: Path | None = None) -> sitk.Image:
    """Load a stack's pixels as a float32 SimpleITK image in patient space (LPS).

    Values are rescaled: a Real World Value Mapping when present, else RescaleSlope/Intercept
    (classic) or the Pixel Value Transformation functional group (Enhanced MR). Geometry is
    exactly the stack's: origin = first slice's ImagePositionPatient, spacing (column, row,
    slice spacing from positions), direction columns (row direction, column direction, normal),
    so voxel (i, j, k) lies at origin + D @ (i sx, j sy, k sz) (DICOM PS3.3 C.7.6.2.1.1).
    Slices missing from a regular stack (see ``Stack.warnings``) are NaN.

    Parameters
    ----------
    stack
        A stack of ``index_study``.
    study_dir
        The study folder: error messages name files relative to it.

    Raises
    ------
    InputError
        Naming the series and the file when pixel data cannot be read or decoded, or its size
        does not match; or when the stack's voxels exceed ``limits.MAX_STACK_VOXELS`` (checked
        before anything is allocated).
    """
    columns, rows, n_slices = stack.size
    voxels = int(columns) * int(rows) * int(n_slices)
    if voxels > limits.MAX_STACK_VOXELS:
        raise InputError(
            f"{_where(stack, stack.instances[0].path, study_dir)}: the stack is {columns} x "
            f"{rows} x {n_slices} voxels, above the ceiling of {limits.MAX_STACK_VOXELS} "
            "(sigreport.limits)"
        )
    volume = np.full((n_slices, rows, columns), np.nan, dtype=np.float32)
    indices = _slice_indices(stack)

    by_file: dict[Path, list[tuple[int, int | None]]] = defaultdict(list)
    tiles: dict[Path, list[tuple[int, int]]] = defaultdict(list)
    for k, ref in zip(indices, stack.instances, strict=True):
        if ref.tile is not None:
            tiles[ref.path].append((k, ref.tile))
        else:
            by_file[ref.path].append((k, ref.frame))
    for path, tile_targets in tiles.items():
        _load_mosaic_tiles(
            volume, path, tile_targets, rows, columns, _where(stack, path, study_dir)
        )
    for path, targets in by_file.items():
        where = _where(stack, path, study_dir)
        if all(f is None for _, f in targets):
            native = read_native_frame(path)
            if native is not None:
                ds, pixels = native
                scaling = classic_scaling(ds)
                for k, _ in targets:
                    volume[k] = _apply(_check(pixels, rows, columns, where), scaling)
                continue
        ds = _read(path, where)
        pixels = _pixels(ds, where)
        if str(ds.get("SOPClassUID", "")) in MULTIFRAME_CLASSES or any(
            f is not None for _, f in targets
        ):
            groups = FunctionalGroups(ds)
            frames = pixels if pixels.ndim == 3 else pixels[np.newaxis]
            for k, frame in targets:
                index = (frame or 1) - 1
                if index >= frames.shape[0]:
                    raise InputError(
                        f"{where}: frame {index + 1} requested, file has {frames.shape[0]}"
                    )
                volume[k] = _apply(
                    _check(frames[index], rows, columns, where), frame_scaling(groups, index, ds)
                )
        else:
            scaling = classic_scaling(ds)
            if pixels.ndim != 2:
                raise InputError(
                    f"{where}: expected one {rows}x{columns} frame, got shape {pixels.shape}"
                )
            for k, _ in targets:
                volume[k] = _apply(_check(pixels, rows, columns, where), scaling)

    image = sitk.GetImageFromArray(volume, isVector=False)
    image.SetOrigin(stack.origin_mm)
    image.SetSpacing(stack.spacing_mm)
    image.SetDirection(stack.direction)
    return image


def _load_mosaic_tiles(
    volume: np.ndarray,
    path: Path,
    targets: list[tuple[int, int]],
    rows: int,
    columns: int,
    where: str,
) -> None:
    """Fill ``volume[k]`` with tile ``tile`` of the mosaic in ``path`` for each (k, tile),
    rescaled like any classic image (ingest/mosaic.py describes the tile layout)."""
    native = read_native_frame(path)
    if native is not None:
        ds, pixels = native
    else:
        ds = _read(path, where)
        pixels = _pixels(ds, where)
    scaling = classic_scaling(ds)
    for k, tile in targets:
        try:
            part = cut_tile(pixels, tile, rows, columns)
        except ValueError as exc:
            raise InputError(f"{where}: {exc}") from None
        volume[k] = _apply(part, scaling)


def _check(frame: np.ndarray, rows: int, columns: int, where: str) -> np.ndarray:
    if frame.shape != (rows, columns):
        raise InputError(
            f"{where}: frame is {frame.shape[0]}x{frame.shape[1]}, the stack expects "
            f"{rows}x{columns}"
        )
    return frame


def _slice_indices(stack: Stack) -> list[int]:
    """Index of each instance along the stack: its order, or (when slices are missing) its
    position on the regular grid of the stack's slice spacing."""
    n = stack.size[2]
    if n == len(stack.instances):
        return list(range(n))
    d = np.asarray(stack.direction, float).reshape(3, 3)[:, 2]
    origin = np.asarray(stack.origin_mm, float)
    out = []
    for ref in stack.instances:
        k = int(round(float(np.dot(np.asarray(ref.position_mm) - origin, d)) / stack.spacing_mm[2]))
        out.append(min(max(k, 0), n - 1))
    return out
