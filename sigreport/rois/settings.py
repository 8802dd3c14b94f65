"""``lexicon/rois.toml``: the rules of the ROI forms (seeds, automatic references, laterality)."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

from sigreport.errors import InputError
from sigreport.lexicon import check_keys, read_table

__all__ = ["RoiSettings", "load_roi_settings"]

_KEYS = {
    "seed": {
        "max_radius_mm",
        "seed_radius_mm",
        "smoothing_iterations",
        "leak_margin_mm",
        "min_voxels",
    },
    "mirror": {"spacing_mm"},
    "laterality": {"midline_margin_mm"},
}


@dataclass(frozen=True)
class RoiSettings:
    """See ``lexicon/rois.toml`` for each value's meaning and provenance."""

    seed_max_radius_mm: float = 20.0
    seed_radius_mm: float = 1.5
    smoothing_iterations: int = 5
    leak_margin_mm: float = 1.0
    seed_min_voxels: int = 20
    mirror_spacing_mm: float = 3.0
    midline_margin_mm: float = 5.0


def _number(table: dict[str, Any], key: str, where: str, *, minimum: float = 0.0) -> float:
    value = table.get(key)
    if isinstance(value, bool) or not isinstance(value, int | float) or value < minimum:
        raise InputError(f"{where}: {key} must be a number >= {minimum:g}, got {value!r}")
    return float(value)


def load_roi_settings(site_lexicon: Path | None = None) -> RoiSettings:
    """Load and validate ``rois.toml`` (the site's copy first).

    Raises
    ------
    sigreport.errors.InputError
        Naming the file and the key that is missing or wrong.
    """
    table = read_table("rois.toml", site_lexicon)
    check_keys(table, set(_KEYS), "lexicon rois.toml")
    parts: dict[str, dict[str, Any]] = {}
    for section, keys in _KEYS.items():
        part = table.get(section)
        if not isinstance(part, dict):
            raise InputError(f"lexicon rois.toml: [{section}] is missing")
        check_keys(part, keys, f"lexicon rois.toml [{section}]")
        parts[section] = part
    where = "lexicon rois.toml"
    seed, mirror, side = parts["seed"], parts["mirror"], parts["laterality"]
    return RoiSettings(
        seed_max_radius_mm=_number(seed, "max_radius_mm", f"{where} [seed]", minimum=1.0),
        seed_radius_mm=_number(seed, "seed_radius_mm", f"{where} [seed]", minimum=0.1),
        smoothing_iterations=int(_number(seed, "smoothing_iterations", f"{where} [seed]")),
        leak_margin_mm=_number(seed, "leak_margin_mm", f"{where} [seed]"),
        seed_min_voxels=int(_number(seed, "min_voxels", f"{where} [seed]", minimum=1)),
        mirror_spacing_mm=_number(mirror, "spacing_mm", f"{where} [mirror]", minimum=0.25),
        midline_margin_mm=_number(side, "midline_margin_mm", f"{where} [laterality]"),
    )
