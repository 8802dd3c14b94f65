"""ROIs: the case file, physical-space regions, masks, and their sampling onto every series.

study index -> series roles -> volumes -> [ROIs] -> alignment -> measurements
"""

from sigreport.rois.case import load_case
from sigreport.rois.masks import ContourRegion, GridRegion, load_mask_region
from sigreport.rois.propagate import (
    RoiSample,
    axial_diameters_mm,
    max_diameter_mm,
    sample_region,
    volume_ml,
)
from sigreport.rois.regions import (
    BoxRegion,
    EllipsoidRegion,
    Region,
    SphereRegion,
    build_region,
    union_bounds,
)

__all__ = [
    "load_case",
    "Region",
    "SphereRegion",
    "EllipsoidRegion",
    "BoxRegion",
    "GridRegion",
    "ContourRegion",
    "build_region",
    "union_bounds",
    "load_mask_region",
    "RoiSample",
    "sample_region",
    "volume_ml",
    "axial_diameters_mm",
    "max_diameter_mm",
]
