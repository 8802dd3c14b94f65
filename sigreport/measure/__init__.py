"""sigreport.measure: ROI statistics, the noise floor, and characterization.

    measurements (roi_stats, measure_roi, noise_sigma) -> characterization (characterize)

The lexicon this stage reads (thresholds.toml, tissues.toml, behaviour.toml) is loaded and
validated by :func:`load_rules`. Definitions follow docs/usage.md (findings.json); the reasoning
behind each number is in docs/measurements.md.
"""

from sigreport.measure.characterize import (
    Characterization,
    EnhancementResult,
    LesionResult,
    SignalResult,
    SuppressionResult,
    characterize,
    same_acquisition,
)
from sigreport.measure.noise import noise_sigma
from sigreport.measure.rules import (
    BehaviourRule,
    Rules,
    Thresholds,
    Tissue,
    grade_of,
    grade_phrase,
    load_rules,
)
from sigreport.measure.stats import (
    inner_depth_mm,
    measure_roi,
    roi_stats,
    shell_core_masks,
    weighted_percentile,
)

__all__ = [
    "BehaviourRule",
    "Characterization",
    "EnhancementResult",
    "LesionResult",
    "Rules",
    "SignalResult",
    "SuppressionResult",
    "Thresholds",
    "Tissue",
    "characterize",
    "grade_of",
    "grade_phrase",
    "inner_depth_mm",
    "load_rules",
    "measure_roi",
    "noise_sigma",
    "roi_stats",
    "same_acquisition",
    "shell_core_masks",
    "weighted_percentile",
]
