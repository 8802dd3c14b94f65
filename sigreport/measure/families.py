"""Diffusion, susceptibility, chemical shift and dynamic contrast: the lesion fields beyond the
T1/T2/FLAIR/fat-sat/post table (docs/measurements.md, "Other sequence families").

Each function takes ratios (lesion median / reference median on one series, as every other
number of the table) and returns a frozen result with ``to_json`` in the findings.json shape, or
None when the study lacks the series. Thresholds come from ``lexicon/families.toml``
(:func:`load_family_thresholds`); grades from ``thresholds.toml`` through ``grade_of``.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from sigreport import lexicon
from sigreport.errors import InputError
from sigreport.model import SUSCEPTIBILITY_TARGETS, Acquisition, Grade, Role

FAMILIES_FILE = "families.toml"


_PERCENT_DECIMALS = 2  # as findings.json prints percentages (measure.rules)
_RATIO_DECIMALS = 4


def _r(value: float | None, digits: int) -> float | None:
    return None if value is None else round(float(value), digits)


def _finite(value: float | None) -> bool:
    return value is not None and math.isfinite(value)


# --------------------------------------------------------------------------------------------
# Thresholds


@dataclass(frozen=True)
class FamilyThresholds:
    """``lexicon/families.toml``, validated."""

    blooming_min_drop_percent: float = 40.0
    microscopic_fat_min_drop_percent: float = 16.5
    chemical_shift_use_core: bool = True
    curve_band_percent: float = 10.0
    early_peak_max_delay_s: float = 120.0
    pair_max_timing_difference: float = 0.20
    adc_expected: Mapping[str, tuple[float, float]] | None = None


_SECTIONS: dict[str, dict[str, type]] = {
    "susceptibility": {"blooming_min_drop_percent": float},
    "chemical_shift": {"microscopic_fat_min_drop_percent": float, "use_core": bool},
    "dynamic": {"band_percent": float, "early_peak_max_delay_s": float},
    "pairs": {"max_timing_difference": float},
    "adc": {"expected": dict},
}


def load_family_thresholds(site: Path | str | None = None) -> FamilyThresholds:
    """Read ``families.toml`` (the site's copy first); every key must be present.

    Raises
    ------
    InputError
        A section or key is missing, unknown or of the wrong type (the message names it).
    """
    table = lexicon.read_table(FAMILIES_FILE, site)
    lexicon.check_keys(table, set(_SECTIONS), FAMILIES_FILE)
    values: dict[str, Any] = {}
    for section, keys in _SECTIONS.items():
        part = table.get(section)
        if not isinstance(part, dict):
            raise InputError(f"lexicon {FAMILIES_FILE}: missing section [{section}]")
        lexicon.check_keys(part, set(keys), f"{FAMILIES_FILE} [{section}]")
        for key, kind in keys.items():
            if key not in part:
                raise InputError(f"lexicon {FAMILIES_FILE}: [{section}] needs {key}")
            value = part[key]
            ok = isinstance(value, kind) or (kind is float and isinstance(value, int))
            if not ok or isinstance(value, bool) is not (kind is bool):
                raise InputError(
                    f"lexicon {FAMILIES_FILE}: [{section}] {key} must be a {kind.__name__}, "
                    f"got {value!r}"
                )
            values[f"{section}.{key}"] = value
    expected: dict[str, tuple[float, float]] = {}
    for tissue, bounds in values["adc.expected"].items():
        if (
            not isinstance(bounds, list)
            or len(bounds) != 2
            or not all(isinstance(b, int | float) and not isinstance(b, bool) for b in bounds)
            or not 0 <= bounds[0] < bounds[1]
        ):
            raise InputError(
                f"lexicon {FAMILIES_FILE}: [adc.expected] {tissue!r} must be [low, high] with "
                f"0 <= low < high, got {bounds!r}"
            )
        expected[str(tissue).lower()] = (float(bounds[0]), float(bounds[1]))
    return FamilyThresholds(
        blooming_min_drop_percent=float(values["susceptibility.blooming_min_drop_percent"]),
        microscopic_fat_min_drop_percent=float(
            values["chemical_shift.microscopic_fat_min_drop_percent"]
        ),
        chemical_shift_use_core=bool(values["chemical_shift.use_core"]),
        curve_band_percent=float(values["dynamic.band_percent"]),
        early_peak_max_delay_s=float(values["dynamic.early_peak_max_delay_s"]),
        pair_max_timing_difference=float(values["pairs.max_timing_difference"]),
        adc_expected=expected,
    )


# --------------------------------------------------------------------------------------------
# Pairs


def pair_mismatch(
    a: Acquisition,
    b: Acquisition,
    *,
    max_difference: float = 0.20,
    compare_echo_time: bool = True,
) -> str | None:
    """Why two series of a pair cannot be compared directly, or None when they can.

    Different sequence types (spin echo vs gradient echo, 2-D vs 3-D) or a TR or TE that differ
    by more than ``max_difference`` of the larger value (docs/measurements.md, pairs).
    ``compare_echo_time=False`` for a pair whose echo times differ by design (in- and
    opposed-phase echoes).
    """
    reasons = []
    kind_a, kind_b = _echo_kind(a), _echo_kind(b)
    if kind_a and kind_b and kind_a != kind_b:
        reasons.append(f"{kind_a} vs {kind_b}")
    dim_a, dim_b = a.mr_acquisition_type, b.mr_acquisition_type
    if dim_a and dim_b and dim_a != dim_b:
        reasons.append(f"{dim_a} vs {dim_b}")
    timings = [("TR", a.repetition_time_ms, b.repetition_time_ms)]
    if compare_echo_time:
        timings.append(("TE", a.echo_time_ms, b.echo_time_ms))
    for name, x, y in timings:
        if x is None or y is None or not (_finite(x) and _finite(y)) or max(x, y) <= 0:
            continue
        if abs(x - y) / max(x, y) > max_difference:
            reasons.append(f"{name} {x:g} vs {y:g} ms")
    return "; ".join(reasons) or None


def _echo_kind(acq: Acquisition) -> str | None:
    if acq.echo_pulse_sequence:
        return {"SPIN": "spin echo", "GRADIENT": "gradient echo"}.get(
            acq.echo_pulse_sequence.upper(), acq.echo_pulse_sequence.lower()
        )
    seq = {s.upper() for s in acq.scanning_sequence}
    if "GR" in seq:
        return "gradient echo"
    if "SE" in seq:
        return "spin echo"
    return None


# --------------------------------------------------------------------------------------------
# Diffusion


@dataclass(frozen=True)
class DiffusionResult:
    """``lesions[].diffusion``: DWI bright and ADC dark is restricted diffusion; DWI bright with
    ADC not dark is T2 shine-through."""

    dwi: Role
    b_value: float | None
    dwi_ratio: float | None
    adc_ratio: float | None
    adc_value: float | None  # lesion median ADC, 10^-6 mm^2/s
    restricted: bool | None
    shine_through: bool | None

    def to_json(self) -> dict[str, Any]:
        return {
            "dwi": self.dwi.value,
            "b_value": None if self.b_value is None else round(float(self.b_value), 1),
            "dwi_ratio": _r(self.dwi_ratio, _RATIO_DECIMALS),
            "adc_ratio": _r(self.adc_ratio, _RATIO_DECIMALS),
            "adc_1e-6_mm2_s": _r(self.adc_value, 1),
            "restricted": self.restricted,
            "shine_through": self.shine_through,
        }


def diffusion_of(
    dwi_grade: Grade | None,
    adc_grade: Grade | None,
    *,
    dwi_ratio: float | None,
    adc_ratio: float | None,
    adc_value: float | None,
    b_value: float | None,
) -> DiffusionResult:
    """Restricted = DWI hyperintense and ADC hypointense; shine-through = DWI hyperintense and
    ADC not hypointense (both by the grade thresholds). None flags when a grade is missing."""
    restricted = shine = None
    if dwi_grade is not None and adc_grade is not None:
        bright = dwi_grade is Grade.HYPERINTENSE
        dark = adc_grade is Grade.HYPOINTENSE
        restricted, shine = bright and dark, bright and not dark
    return DiffusionResult(Role.DWI, b_value, dwi_ratio, adc_ratio, adc_value, restricted, shine)


def adc_units_ok(
    tissue: str | None, adc_value: float | None, thresholds: FamilyThresholds
) -> bool | None:
    """Whether the reference tissue's ADC lies in its expected range (a map in other units or
    with a vendor scale not applied fails); None when the tissue has no expected range."""
    if tissue is None or adc_value is None or not math.isfinite(adc_value):
        return None
    bounds = (thresholds.adc_expected or {}).get(tissue.lower())
    if bounds is None:
        return None
    return bounds[0] <= adc_value <= bounds[1]


# --------------------------------------------------------------------------------------------
# Susceptibility and chemical shift (drops between two series, normalized like every pair)


def drop_percent(source_ratio: float | None, target_ratio: float | None) -> float | None:
    """``100 (1 - ratio on target / ratio on source)``, as for suppression."""
    if not _finite(source_ratio) or not _finite(target_ratio) or not source_ratio:
        return None
    return 100.0 * (1.0 - float(target_ratio) / float(source_ratio))  # type: ignore[arg-type]


@dataclass(frozen=True)
class SusceptibilityResult:
    """``lesions[].susceptibility``: the T2 -> T2*/SWI drop; blooming when the lesion darkens
    beyond the default and is hypointense on the susceptibility series."""

    source: Role
    target: Role
    drop_percent: float | None
    blooming: bool | None
    reliable: bool = True

    def to_json(self) -> dict[str, Any]:
        out: dict[str, Any] = {
            "from": self.source.value,
            "to": self.target.value,
            "drop_percent": _r(self.drop_percent, _PERCENT_DECIMALS),
            "blooming": self.blooming,
        }
        if not self.reliable:
            out["reliable"] = False
        return out


def susceptibility_of(
    ratios: Mapping[Role, float | None],
    grades: Mapping[Role, Grade | None],
    thresholds: FamilyThresholds,
    *,
    reliable: bool = True,
) -> SusceptibilityResult | None:
    """The T2 -> SWI (else T2*) pair; None when the study lacks T2 or both targets."""
    target = next((r for r in SUSCEPTIBILITY_TARGETS if r in ratios), None)
    if target is None or Role.T2 not in ratios:
        return None
    drop = drop_percent(ratios[Role.T2], ratios[target])
    blooming = None
    if drop is not None and grades.get(target) is not None:
        blooming = (
            round(drop, _PERCENT_DECIMALS) >= thresholds.blooming_min_drop_percent
            and grades[target] is Grade.HYPOINTENSE
        )
    return SusceptibilityResult(Role.T2, target, drop, blooming, reliable)


@dataclass(frozen=True)
class ChemicalShiftResult:
    """``lesions[].chemical_shift``: the in- to opposed-phase drop (microscopic fat) and the
    Dixon fat fraction."""

    source: Role | None
    target: Role | None
    drop_percent: float | None
    microscopic_fat: bool | None
    fat_fraction_percent: float | None
    reliable: bool = True

    def to_json(self) -> dict[str, Any]:
        out: dict[str, Any] = {
            "from": None if self.source is None else self.source.value,
            "to": None if self.target is None else self.target.value,
            "drop_percent": _r(self.drop_percent, _PERCENT_DECIMALS),
            "microscopic_fat": self.microscopic_fat,
            "fat_fraction_percent": _r(self.fat_fraction_percent, 1),
        }
        if not self.reliable:
            out["reliable"] = False
        return out


def fat_fraction_percent(water: float | None, fat: float | None) -> float | None:
    """``100 F / (W + F)`` from the lesion's medians on the Dixon water and fat images."""
    if not _finite(water) or not _finite(fat):
        return None
    w, f = max(float(water), 0.0), max(float(fat), 0.0)  # type: ignore[arg-type]
    return None if w + f <= 0 else 100.0 * f / (w + f)


def chemical_shift_of(
    ip_ratio: float | None,
    op_ratio: float | None,
    *,
    water_median: float | None,
    fat_median: float | None,
    has_pair: bool,
    has_dixon: bool,
    thresholds: FamilyThresholds,
    reliable: bool = True,
) -> ChemicalShiftResult | None:
    """The IP -> OP drop (ratios from the ROI's inner part when the lexicon says so, measured
    by the caller) and the Dixon fat fraction; None when the study has neither."""
    if not has_pair and not has_dixon:
        return None
    drop = drop_percent(ip_ratio, op_ratio) if has_pair else None
    micro = (
        None
        if drop is None
        else round(drop, _PERCENT_DECIMALS) >= thresholds.microscopic_fat_min_drop_percent
    )
    return ChemicalShiftResult(
        Role.IP if has_pair else None,
        Role.OP if has_pair else None,
        drop,
        micro,
        fat_fraction_percent(water_median, fat_median) if has_dixon else None,
        reliable,
    )


# --------------------------------------------------------------------------------------------
# Dynamic contrast


@dataclass(frozen=True)
class PhaseInput:
    """One post-contrast phase as measured: when it was acquired and the lesion's ratio."""

    series_number: int | None
    time_s: float | None  # acquisition time, seconds (any origin; only differences are used)
    temporal_position: int | None
    ratio: float | None


@dataclass(frozen=True)
class PhaseResult:
    series_number: int | None
    delay_s: float | None  # after the first post phase
    percent: float | None

    def to_json(self) -> dict[str, Any]:
        return {
            "series_number": self.series_number,
            "delay_s": _r(self.delay_s, 1),
            "percent": _r(self.percent, _PERCENT_DECIMALS),
        }


@dataclass(frozen=True)
class DynamicResult:
    """``lesions[].dynamic``: percent enhancement per phase, the peak and the curve type."""

    pre: Role
    phases: tuple[PhaseResult, ...]
    peak_phase: int | None  # 1-based index into phases
    curve: str | None  # "persistent" | "plateau" | "washout"
    reliable: bool = True

    def to_json(self) -> dict[str, Any]:
        out: dict[str, Any] = {
            "pre": self.pre.value,
            "phases": [p.to_json() for p in self.phases],
            "peak_phase": self.peak_phase,
            "curve": self.curve,
        }
        if not self.reliable:
            out["reliable"] = False
        return out


def order_phases(phases: Sequence[PhaseInput]) -> list[PhaseInput]:
    """Phases by acquisition time, then temporal position, then series number."""

    def key(p: PhaseInput) -> tuple[float, float, float]:
        inf = float("inf")
        return (
            p.time_s if p.time_s is not None else inf,
            p.temporal_position if p.temporal_position is not None else inf,
            p.series_number if p.series_number is not None else inf,
        )

    return sorted(phases, key=key)


def dynamic_of(
    pre: Role,
    pre_ratio: float | None,
    phases: Sequence[PhaseInput],
    thresholds: FamilyThresholds,
    *,
    min_peak_percent: float | None = None,
) -> DynamicResult | None:
    """Percent enhancement of each post phase against the pre phase, the peak, and the curve.

    The early peak is the highest percent among phases acquired at most
    ``early_peak_max_delay_s`` after the first post phase; the curve is ``persistent`` when the
    last phase exceeds it by more than ``band_percent`` of it, ``washout`` when it is lower by
    more than that, else ``plateau``. None with fewer than two phases. With
    ``min_peak_percent`` (the enhancing threshold), a lesion whose early peak stays below it
    gets no curve: the three types describe how an enhancing lesion's signal evolves, and a
    percent near zero makes the +-band a band of noise.
    """
    if len(phases) < 2:
        return None
    ordered = order_phases(phases)
    t0 = ordered[0].time_s
    results = []
    for p in ordered:
        delay = None if p.time_s is None or t0 is None else p.time_s - t0
        percent = None
        if _finite(pre_ratio) and pre_ratio and _finite(p.ratio):
            percent = 100.0 * (float(p.ratio) / float(pre_ratio) - 1.0)  # type: ignore[arg-type]
        results.append(PhaseResult(p.series_number, delay, percent))
    known = [(k, r) for k, r in enumerate(results) if r.percent is not None]
    peak_phase = max(known, key=lambda kr: kr[1].percent or 0.0)[0] + 1 if known else None
    early = [
        round(r.percent, _PERCENT_DECIMALS)
        for r in results
        if r.percent is not None
        and r.delay_s is not None
        and r.delay_s <= thresholds.early_peak_max_delay_s
    ]
    last = results[-1].percent
    curve = None
    if (
        early
        and last is not None
        and len(results) >= 2
        and (min_peak_percent is None or max(early) >= min_peak_percent)
    ):
        peak = max(early)
        band = thresholds.curve_band_percent / 100.0 * abs(peak)
        last = round(last, _PERCENT_DECIMALS)
        curve = (
            "persistent" if last > peak + band else "washout" if last < peak - band else "plateau"
        )
    return DynamicResult(pre, tuple(results), peak_phase, curve)
