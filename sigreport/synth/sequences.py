"""Per-tissue noiseless signal of one series, from the tissue table and the series' parameters."""

from __future__ import annotations

from dataclasses import dataclass

from sigreport.synth import physics
from sigreport.synth.scenario import SeriesPlan
from sigreport.synth.tissues import TissueTable


@dataclass(frozen=True)
class ResolvedSeries:
    """A series plan with its inversion time worked out (``None`` without inversion)."""

    plan: SeriesPlan
    ti_ms: float | None


def resolve_ti(plan: SeriesPlan, table: TissueTable) -> ResolvedSeries:
    """Set TI from ``ti_null`` with the finite-TR null-point formula, else keep ``ti_ms``."""
    if plan.ti_null is not None:
        t1 = table.get(plan.ti_null).t1_ms
        return ResolvedSeries(plan, physics.null_inversion_time(t1, tr_ms=plan.tr_ms))
    return ResolvedSeries(plan, plan.ti_ms)


def tissue_signals(
    series: ResolvedSeries, table: TissueTable, *, fat_sat_failed: bool = False
) -> dict[str, float]:
    """The noiseless signal of every tissue on ``series``.

    Post-contrast series shorten T1 and T2 with the agent's relaxivities where the tissue holds
    agent; fat-saturated series keep ``table.fat_sat_residual`` of fat (``fat_sat_failed``: the
    failed residual); flowing blood gives no signal (flow void).
    """
    plan = series.plan
    out: dict[str, float] = {}
    for name, tissue in table.tissues.items():
        if tissue.pd == 0.0 or tissue.flow_void:
            out[name] = 0.0
            continue
        t1, t2 = tissue.t1_ms, tissue.t2_ms
        if plan.contrast and tissue.gd_mmol_l > 0:
            t1 = float(physics.relaxation_with_contrast(t1, tissue.gd_mmol_l, table.r1_l_mmol_s))
            t2 = float(physics.relaxation_with_contrast(t2, tissue.gd_mmol_l, table.r2_l_mmol_s))
        if plan.sequence in ("SE", "TSE"):
            s = physics.spin_echo(tissue.pd, t1, t2, tr_ms=plan.tr_ms, te_ms=plan.te_ms)
        elif plan.sequence == "IR":
            assert series.ti_ms is not None
            s = physics.inversion_recovery(
                tissue.pd, t1, t2, tr_ms=plan.tr_ms, te_ms=plan.te_ms, ti_ms=series.ti_ms
            )
        else:
            t2s = physics.t2_star(t2, table.r2_prime_per_s)
            assert plan.flip_deg is not None
            s = physics.spoiled_gradient_echo(
                tissue.pd, t1, t2s, tr_ms=plan.tr_ms, te_ms=plan.te_ms, flip_deg=plan.flip_deg
            )
        value = float(s)
        if plan.fat_sat and tissue.fat:
            value *= table.fat_sat_failed_residual if fat_sat_failed else table.fat_sat_residual
        out[name] = value
    return out
