"""Presentation states and TID 1500 SRs with outlines, built by highdicom the way the standard
defines them (PS3.3 C.10.5 Graphic Annotation; PS3.16 TID 1500 / TID 1410 image regions)."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path

import highdicom as hd
import numpy as np
import pydicom
from pydicom.sr.codedict import codes
from pydicom.uid import generate_uid


@dataclass
class Graphic:
    """One graphic annotation: ``graphic_type`` with ``data`` (column\\row pairs) on
    ``images`` (datasets), in ``units`` (PIXEL or DISPLAY), on ``layer``, with ``text``."""

    graphic_type: str
    data: np.ndarray
    images: Sequence[pydicom.Dataset]
    units: str = "PIXEL"
    layer: str = "LESIONS"
    text: str | None = None
    extra: list = field(default_factory=list)


def write_gsps(path: Path, graphics: Sequence[Graphic]) -> Path:
    """A Grayscale Softcopy Presentation State holding ``graphics``."""
    layers = sorted({g.layer for g in graphics})
    layer_objects = {
        name: hd.pr.GraphicLayer(layer_name=name, order=k + 1, description=f"{name} layer")
        for k, name in enumerate(layers)
    }
    annotations = []
    images: list[pydicom.Dataset] = []
    for g in graphics:
        texts = None
        if g.text:
            texts = [
                hd.pr.TextObject(
                    text_value=g.text,
                    units=hd.pr.AnnotationUnitsValues.PIXEL,
                    anchor_point=(1.0, 1.0),
                )
            ]
        annotations.append(
            hd.pr.GraphicAnnotation(
                referenced_images=list(g.images),
                graphic_layer=layer_objects[g.layer],
                graphic_objects=[
                    hd.pr.GraphicObject(
                        graphic_type=g.graphic_type,
                        graphic_data=np.asarray(g.data, dtype=np.float64),
                        units=g.units,
                    )
                ],
                text_objects=texts,
            )
        )
        for image in g.images:
            if all(image.SOPInstanceUID != i.SOPInstanceUID for i in images):
                images.append(image)
    gsps = hd.pr.GrayscaleSoftcopyPresentationState(
        referenced_images=images,
        series_instance_uid=generate_uid(),
        series_number=200,
        sop_instance_uid=generate_uid(),
        instance_number=1,
        manufacturer="test",
        manufacturer_model_name="test",
        software_versions="1",
        device_serial_number="1",
        content_label="OUTLINES",
        graphic_annotations=annotations,
        graphic_layers=list(layer_objects.values()),
    )
    gsps.save_as(path)
    return path


@dataclass
class SrRegion:
    """One TID 1410 measurement group: a 2-D region (``image`` set, column\\row pairs) or a
    3-D region (``frame_of_reference_uid`` set, patient points), with a tracking identifier."""

    tracking: str
    graphic_type: str
    data: np.ndarray
    image: pydicom.Dataset | None = None
    frame_of_reference_uid: str | None = None


def write_sr(path: Path, evidence: Sequence[pydicom.Dataset], regions: Sequence[SrRegion]) -> Path:
    """A Comprehensive 3D SR with a TID 1500 Measurement Report of ``regions``."""
    groups: list = []
    for r in regions:
        tracking = hd.sr.TrackingIdentifier(uid=generate_uid(), identifier=r.tracking)
        data = np.asarray(r.data, dtype=np.float64)
        if r.graphic_type == "ELLIPSOID":  # a volume surface (TID 1411), patient space
            surface = hd.sr.VolumeSurface(
                graphic_type=r.graphic_type,
                graphic_data=data,
                frame_of_reference_uid=r.frame_of_reference_uid,
                source_series=hd.sr.SourceSeriesForSegmentation(evidence[0].SeriesInstanceUID),
            )
            groups.append(
                hd.sr.VolumetricROIMeasurementsAndQualitativeEvaluations(
                    tracking_identifier=tracking,
                    referenced_volume_surface=surface,
                    finding_type=codes.SCT.Lesion,
                )
            )
            continue
        if r.image is not None:
            region: hd.sr.ImageRegion | hd.sr.ImageRegion3D = hd.sr.ImageRegion(
                graphic_type=r.graphic_type,
                graphic_data=data,
                source_image=hd.sr.SourceImageForRegion.from_source_image(r.image),
            )
        else:
            region = hd.sr.ImageRegion3D(
                graphic_type=r.graphic_type,
                graphic_data=data,
                frame_of_reference_uid=r.frame_of_reference_uid,
            )
        groups.append(
            hd.sr.PlanarROIMeasurementsAndQualitativeEvaluations(
                tracking_identifier=tracking,
                referenced_region=region,
                finding_type=codes.SCT.Lesion,
            )
        )
    report = hd.sr.MeasurementReport(
        observation_context=hd.sr.ObservationContext(
            observer_person_context=hd.sr.ObserverContext(
                observer_type=codes.DCM.Person,
                observer_identifying_attributes=hd.sr.PersonObserverIdentifyingAttributes(
                    name="Reader^Test"
                ),
            )
        ),
        procedure_reported=codes.LN.MRIHeadWithoutAndWithIVContrast
        if hasattr(codes.LN, "MRIHeadWithoutAndWithIVContrast")
        else hd.sr.CodedConcept("24590-2", "LN", "MR Brain"),
        imaging_measurements=groups,
    )
    sr = hd.sr.Comprehensive3DSR(
        evidence=list(evidence),
        content=report,
        series_instance_uid=generate_uid(),
        series_number=201,
        sop_instance_uid=generate_uid(),
        instance_number=1,
        manufacturer="test",
    )
    sr.save_as(path)
    return path
