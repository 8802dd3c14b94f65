"""Per-tissue noiseless signal of one series, from the tissue table and the series' parameters."""

from __future__ import annotations

from dataclasses import dataclass, replace

from sigreport.errors import InputError
from sigreport.synth import physics
from sigreport.synth.scenario import SeriesPlan
from sigreport.synth.tissues import Tissue, TissueTable


@dataclass(frozen=True)
class ResolvedSeries:
    """A series plan with its inversion time (``None`` without inversion) and, for in- and
    opposed-phase echoes, its echo time worked out from the field strength."""

    plan: SeriesPlan
    ti_ms: float | None


def resolve_ti(
    plan: SeriesPlan, table: TissueTable, *, field_strength_t: float | None = None
) -> ResolvedSeries:
    """Set TI from ``ti_null`` with the finite-TR null-point formula, else keep ``ti_ms``; set
    TE of an ``in-phase`` / ``opposed-phase`` echo to the first such echo at the field."""
    if plan.te_keyword is not None:
        field = field_strength_t if field_strength_t is not None else table.field_strength_t
        te = (
            physics.in_phase_te_ms(field)
            if plan.te_keyword == "in-phase"
            else physics.opposed_phase_te_ms(field)
        )
        plan = replace(plan, te_ms=round(te, 3))
    if plan.ti_null is not None:
        t1 = table.get(plan.ti_null).t1_ms
        return ResolvedSeries(plan, physics.null_inversion_time(t1, tr_ms=plan.tr_ms))
    return ResolvedSeries(plan, plan.ti_ms)


def _agent(tissue: Tissue, plan: SeriesPlan, table: TissueTable) -> float:
    """Agent concentration in ``tissue`` on ``plan``: the steady value on a single
    post-contrast series, the uptake curve at ``delay_s`` on a dynamic phase."""
    if not plan.contrast:
        return 0.0
    if plan.delay_s is None or tissue.gd_mmol_l == 0.0:
        return tissue.gd_mmol_l
    curve = table.uptake[tissue.uptake]
    return tissue.gd_mmol_l * float(
        physics.uptake_fraction(plan.delay_s, rise_s=curve.rise_s, washout_s=curve.washout_s)
    )


def _gradient_echo(pd: float, t1: float, t2: float, r2_prime: float, plan: SeriesPlan) -> float:
    assert plan.flip_deg is not None
    t2s = physics.t2_star(t2, r2_prime)
    return float(
        physics.spoiled_gradient_echo(
            pd, t1, t2s, tr_ms=plan.tr_ms, te_ms=plan.te_ms, flip_deg=plan.flip_deg
        )
    )


def water_fat_signals(
    series: ResolvedSeries, table: TissueTable
) -> tuple[dict[str, float], dict[str, float]]:
    """The noiseless gradient-echo signal of every tissue split into its water and its fat
    part (``fat_fraction`` of the protons are fat, relaxing with the ``fat`` tissue's T1/T2),
    for in-/opposed-phase and Dixon images. Combine with
    ``physics.two_component_magnitude`` after painting each part."""
    plan = series.plan
    fat_ref = table.tissues.get("fat")
    water: dict[str, float] = {}
    fat: dict[str, float] = {}
    for name, tissue in table.tissues.items():
        if tissue.pd == 0.0 or tissue.flow_void:
            water[name] = fat[name] = 0.0
            continue
        gd = _agent(tissue, plan, table)
        t1, t2 = _with_agent(tissue.t1_ms, tissue.t2_ms, gd, table)
        prime = tissue.r2_prime_per_s if tissue.r2_prime_per_s is not None else table.r2_prime_per_s
        ff = tissue.fat_fraction
        water[name] = _gradient_echo(tissue.pd * (1.0 - ff), t1, t2, prime, plan) if ff < 1 else 0.0
        if ff > 0:
            ref = tissue if tissue.fat or fat_ref is None else fat_ref
            ft1, ft2 = _with_agent(ref.t1_ms, ref.t2_ms, gd, table)
            fat[name] = _gradient_echo(tissue.pd * ff, ft1, ft2, prime, plan)
        else:
            fat[name] = 0.0
    return water, fat


def _with_agent(t1: float, t2: float, gd: float, table: TissueTable) -> tuple[float, float]:
    if gd <= 0:
        return t1, t2
    return (
        float(physics.relaxation_with_contrast(t1, gd, table.r1_l_mmol_s)),
        float(physics.relaxation_with_contrast(t2, gd, table.r2_l_mmol_s)),
    )


def tissue_signals(
    series: ResolvedSeries,
    table: TissueTable,
    *,
    fat_sat_failed: bool = False,
    b_value: float | None = None,
) -> dict[str, float]:
    """The noiseless signal of every tissue on ``series``.

    Post-contrast series shorten T1 and T2 with the agent's relaxivities where the tissue holds
    agent (following its uptake curve on a dynamic phase); fat-saturated series keep
    ``table.fat_sat_residual`` of fat (``fat_sat_failed``: the failed residual); flowing blood
    gives no signal (flow void). A DWI series (``b_value``) is a spin echo attenuated by
    ``exp(-b ADC)``; gradient echoes dephase with the tissue's own R2' where it has one.
    """
    plan = series.plan
    out: dict[str, float] = {}
    for name, tissue in table.tissues.items():
        if tissue.pd == 0.0 or tissue.flow_void:
            out[name] = 0.0
            continue
        t1, t2 = _with_agent(tissue.t1_ms, tissue.t2_ms, _agent(tissue, plan, table), table)
        if plan.sequence in ("SE", "TSE"):
            s = physics.spin_echo(tissue.pd, t1, t2, tr_ms=plan.tr_ms, te_ms=plan.te_ms)
        elif plan.sequence == "DWI":
            if tissue.adc_1e6_mm2_s is None:
                raise InputError(f'tissue "{name}" has no adc_1e-6_mm2_s for the DWI series')
            s = physics.spin_echo(tissue.pd, t1, t2, tr_ms=plan.tr_ms, te_ms=plan.te_ms)
            s = s * physics.diffusion_weighting(tissue.adc_1e6_mm2_s, b_value or 0.0)
        elif plan.sequence == "IR":
            assert series.ti_ms is not None
            s = physics.inversion_recovery(
                tissue.pd, t1, t2, tr_ms=plan.tr_ms, te_ms=plan.te_ms, ti_ms=series.ti_ms
            )
        else:
            prime = (
                tissue.r2_prime_per_s if tissue.r2_prime_per_s is not None else table.r2_prime_per_s
            )
            s = _gradient_echo(tissue.pd, t1, t2, prime, plan)
        value = float(s)
        if plan.fat_sat and tissue.fat:
            value *= table.fat_sat_failed_residual if fat_sat_failed else table.fat_sat_residual
        out[name] = value
    return out
