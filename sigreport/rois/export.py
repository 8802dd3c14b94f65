"""Grown lesions as files for review: a NIfTI label image and a DICOM Segmentation.

Both are on the anchor's grid. The NIfTI file is written by SimpleITK (which converts DICOM's
LPS to NIfTI's RAS in the header, so any viewer overlays it on the anchor). The SEG (DICOM
PS3.3 A.51, binary) is built by highdicom and references the anchor's source images, frame by
frame, so a DICOM viewer shows it on that series.
"""

from __future__ import annotations

import io
import tempfile
from pathlib import Path

import numpy as np
import SimpleITK as sitk

from sigreport import __version__
from sigreport.model import Stack

__all__ = ["nifti_bytes", "seg_bytes", "SEG_SERIES_NUMBER"]

# The SEG series number, next to the SR's (sigreport.report.sr.SR_SERIES_NUMBER = 9900).
SEG_SERIES_NUMBER = 9901


def nifti_bytes(mask: sitk.Image) -> bytes:
    """A label image as ``.nii.gz`` bytes (SimpleITK's NIfTI writer)."""
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / "mask.nii.gz"
        sitk.WriteImage(sitk.Cast(mask, sitk.sitkUInt8), str(path), useCompression=True)
        return path.read_bytes()


def seg_bytes(mask: sitk.Image, anchor: Stack, *, roi_id: str, instance_number: int = 1) -> bytes:
    """A binary DICOM SEG of ``mask`` (on the anchor's grid) referencing the anchor's images.

    Parameters
    ----------
    mask : SimpleITK.Image
        UInt8 label image on the anchor's grid (slice k is ``anchor.instances[k]``).
    anchor : sigreport.model.Stack
        The anchor stack whose files are the source images.
    roi_id : str
        The segment label.
    instance_number : int
        The SEG's InstanceNumber (one SEG per grown lesion).
    """
    import highdicom as hd
    import pydicom
    from pydicom.sr.codedict import codes
    from pydicom.uid import generate_uid

    array = sitk.GetArrayFromImage(mask).astype(bool)
    paths: list[Path] = []
    for inst in anchor.instances:
        if inst.path not in paths:
            paths.append(inst.path)
    sources = [pydicom.dcmread(p, stop_before_pixels=True) for p in paths]
    if len(sources) == 1 and anchor.instances[0].frame is not None:
        # One multi-frame file: frames in frame-number order.
        frames = np.zeros((len(anchor.instances), *array.shape[1:]), dtype=bool)
        for k, inst in enumerate(anchor.instances):
            frames[int(inst.frame or 1) - 1] = array[k]
    else:
        order = [paths.index(inst.path) for inst in anchor.instances]
        frames = np.zeros_like(array)
        for k, source in enumerate(order):
            frames[source] = array[k]
    description = hd.seg.SegmentDescription(
        segment_number=1,
        segment_label=roi_id,
        segmented_property_category=codes.SCT.MorphologicallyAbnormalStructure,
        segmented_property_type=codes.SCT.Lesion,
        algorithm_type=hd.seg.SegmentAlgorithmTypeValues.SEMIAUTOMATIC,
        # CID 7162: growing a region from a seed by its neighbourhood's intensities.
        algorithm_identification=hd.AlgorithmIdentificationSequence(
            name="sigreport seed growing",
            version=__version__,
            family=codes.cid7162.NeighborhoodAnalysis,
        ),
    )
    seg = hd.seg.Segmentation(
        source_images=sources,
        pixel_array=frames.astype(np.uint8),
        segmentation_type=hd.seg.SegmentationTypeValues.BINARY,
        segment_descriptions=[description],
        series_instance_uid=generate_uid(),
        series_number=SEG_SERIES_NUMBER,
        sop_instance_uid=generate_uid(),
        instance_number=instance_number,
        manufacturer="sigreport",
        manufacturer_model_name="sigreport",
        software_versions=__version__,
        device_serial_number="0",
        series_description=f"sigreport grown lesion {roi_id}",
    )
    buffer = io.BytesIO()
    seg.save_as(buffer)
    return buffer.getvalue()
