"""Dynamic post-contrast phases: several T1 post-contrast stacks of one acquisition.

A dynamic (multi-phase) contrast study repeats one T1-weighted acquisition, usually a fat-
suppressed 3-D gradient echo, before and several times after the injection: as temporal
positions of one series (split into stacks ``t 1``, ``t 2``...) or as separate series. Stacks
belong to one dynamic acquisition when they share the frame of reference, the grid (size,
spacing, orientation) and the sequence settings (scanning sequence, TR, TE, flip angle, fat
suppression). Within such a group, the post-contrast stacks (T1POST / T1POSTFS) are numbered
1..n by acquisition time (then temporal position, then series number) and their delay after the
first post-contrast phase is recorded (docs/ingestion.md, Dynamic phases); the pre-contrast
stacks of the group keep their role and carry the group only.

When the header gives ContrastBolusStartTime (0018,1042), a phase acquired before it is
pre-contrast whatever its contrast fields say (the agent is often entered once for the whole
series): its role becomes T1 / T1FS and the reason says why.
"""

from __future__ import annotations

from dataclasses import replace

from sigreport.model import FAT_SUPPRESSED_T1, PRE_CONTRAST_OF, Stack

POST = tuple(PRE_CONTRAST_OF)
PRE_OF = PRE_CONTRAST_OF
T1_FAMILY = (*PRE_CONTRAST_OF.values(), *POST)


def _signature(stack: Stack) -> tuple[object, ...]:
    acq = stack.acquisition

    def r(value: float | None, digits: int = 2) -> float | None:
        return None if value is None else round(value, digits)

    return (
        stack.frame_of_reference_uid,
        stack.size,
        tuple(round(v, 3) for v in stack.spacing_mm),
        tuple(round(v, 3) for v in stack.direction),
        acq.scanning_sequence,
        r(acq.repetition_time_ms),
        r(acq.echo_time_ms),
        r(acq.flip_angle_deg, 1),
        stack.role in FAT_SUPPRESSED_T1,
    )


def _order(stack: Stack) -> tuple[float, int, int, str]:
    acq = stack.acquisition
    return (
        acq.acquisition_time_s if acq.acquisition_time_s is not None else float("inf"),
        acq.temporal_position if acq.temporal_position is not None else 1 << 30,
        stack.series_number if stack.series_number is not None else 1 << 30,
        stack.key,
    )


def assign_dynamic_phases(stacks: list[Stack]) -> list[Stack]:
    """Record the dynamic group, phase number and delay of every post-contrast phase.

    Returns new stacks (same order); stacks outside a dynamic acquisition are unchanged.
    A group needs at least two stacks of the T1 family, at least two of them post-contrast
    (after the ContrastBolusStartTime check). ``dynamic_delay_s`` is None when any post phase
    of the group lacks an acquisition time.
    """
    out = list(stacks)
    groups: dict[tuple[object, ...], list[int]] = {}
    for i, stack in enumerate(out):
        if stack.role in T1_FAMILY:
            groups.setdefault(_signature(stack), []).append(i)
    for members in groups.values():
        if len(members) < 2:
            continue
        for i in members:
            out[i] = _before_bolus(out[i])
        ordered = sorted(members, key=lambda i: _order(out[i]))
        posts = [i for i in ordered if out[i].role in POST]
        if len(posts) < 2:
            continue
        name = out[ordered[0]].key
        times = [out[i].acquisition.acquisition_time_s for i in posts]
        first = times[0]
        known = all(t is not None for t in times)
        for i in ordered:
            out[i] = replace(out[i], dynamic_group=name)
        for phase, (i, t) in enumerate(zip(posts, times, strict=True), start=1):
            delay = round(t - first, 3) if known and t is not None and first is not None else None
            out[i] = replace(out[i], dynamic_phase=phase, dynamic_delay_s=delay)
    return out


def _before_bolus(stack: Stack) -> Stack:
    acq = stack.acquisition
    if (
        stack.role not in POST
        or acq.contrast_start_time_s is None
        or acq.acquisition_time_s is None
        or acq.acquisition_time_s >= acq.contrast_start_time_s
    ):
        return stack
    early = acq.contrast_start_time_s - acq.acquisition_time_s
    return replace(
        stack,
        role=PRE_OF[stack.role],
        role_reason=(
            f"{stack.role_reason}; acquired {early:.0f} s before ContrastBolusStartTime: "
            "pre-contrast phase"
        ),
    )
