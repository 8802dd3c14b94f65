"""Alignment: bring every series into the anchor series' patient space.

study index -> series roles -> volumes -> ROIs -> [alignment] -> measurements
"""

from sigreport.align.rigid import (
    AlignmentSettings,
    identity_alignment,
    load_settings,
    register_rigid,
)

__all__ = ["register_rigid", "identity_alignment", "AlignmentSettings", "load_settings"]
