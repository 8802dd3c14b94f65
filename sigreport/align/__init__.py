"""Alignment: bring every series into the anchor series' patient space.

study index -> series roles -> volumes -> ROIs -> [alignment] -> measurements
"""

from sigreport.align.rigid import (
    AlignmentSettings,
    clear_anchor_cache,
    identity_alignment,
    load_settings,
    register_rigid,
    register_series,
)

__all__ = [
    "register_rigid",
    "register_series",
    "clear_anchor_cache",
    "identity_alignment",
    "AlignmentSettings",
    "load_settings",
]
