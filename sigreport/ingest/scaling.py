"""Study-level notes on one vendor's private floating-point scaling (docs/ingestion.md).

Each frame's scaling is decided where its header is read (``attributes.philips_fp_scaling``):
the Philips floating-point value FP = DV / (RS x SS) whenever the frame carries the private
scale slope SS and no Real World Value Mapping. Whether that matters depends on what is
compared:

- a ratio to a reference tissue of the same series is the same on display values and on FP
  values (FP is DV divided by one number per frame: RS x SS), so normalized signal ratios,
  enhancement and drop percentages do not change;
- un-normalized values compared across two series (the raw enhancement percent, taken when two
  series share their settings and scaling, ``Stack.scaling_key``) are only comparable on FP
  values: the display scaling RS x SS is chosen by the scanner per series.

So every stack scaled to FP shares one scaling key, and this module adds a stack warning (a qc
note when the series is measured) when the study mixes FP-scaled series with series that carry
no private scale, when a series carries a private scale that was not applied, and when the
display scalings of FP-scaled series differ (their display values would not compare).
"""

from __future__ import annotations

from collections import defaultdict
from dataclasses import replace

from sigreport.ingest.attributes import PHILIPS_FP, FrameRecord
from sigreport.model import Stack


def _name(stack: Stack) -> str:
    number = stack.series_number if stack.series_number is not None else "?"
    return f"series {number}" + (f" ({stack.description})" if stack.description else "")


def scaling_notes(stacks: list[Stack], records: list[FrameRecord]) -> list[Stack]:
    """``stacks`` with the private-scale warnings described in the module docstring."""
    fp_series: set[str] = set()
    other_series: set[str] = set()  # display values (rescale or none): not a physical scale
    display: dict[str, set[float]] = defaultdict(set)  # series -> private scale slopes SS
    unapplied: dict[str, float] = {}
    for record in records:
        scaling, uid = record.scaling, record.series_instance_uid
        if scaling.source == PHILIPS_FP and scaling.private_scale_slope:
            fp_series.add(uid)
            display[uid].add(round(scaling.private_scale_slope, 12))
        elif scaling.source == "real world value mapping":
            continue  # a mapping to physical values (PS3.3 C.7.6.16.2.11): its own scale
        else:
            other_series.add(uid)
            if scaling.private_scale_slope is not None:
                unapplied[uid] = scaling.private_scale_slope
    if not fp_series and not unapplied:
        return stacks
    by_uid: dict[str, Stack] = {}
    for stack in stacks:
        by_uid.setdefault(stack.series_instance_uid, stack)
    plain = sorted(
        (by_uid[u] for u in other_series - fp_series if u in by_uid and u not in unapplied),
        key=lambda s: (s.series_number is None, s.series_number or 0),
    )
    out = []
    for stack in stacks:
        uid = stack.series_instance_uid
        notes: list[str] = []
        if uid in unapplied:
            notes.append(
                f"private scale slope {unapplied[uid]:g} ('Philips MR Imaging DD 001' "
                "(2005,xx0E)) not applied (scale intercept not zero, or no usable rescale): "
                "display values kept, not comparable un-normalized with other series"
            )
        elif uid in fp_series:
            notes.append(
                "stored values scaled to the vendor's floating-point values FP = DV / (RS x SS) "
                "(private scale slope 'Philips MR Imaging DD 001' (2005,xx0E))"
            )
            if plain:
                names = ", ".join(_name(s) for s in plain[:4]) + (" ..." if len(plain) > 4 else "")
                notes.append(
                    f"{names} carry no private scale (display values): un-normalized values are "
                    "not compared with them; ratios to a reference tissue are unaffected"
                )
            others = {round(v, 12) for u in fp_series - {uid} for v in display[u]} - display[uid]
            if others:
                mine = ", ".join(f"{v:g}" for v in sorted(display[uid]))
                theirs = ", ".join(f"{v:g}" for v in sorted(others)[:4])
                notes.append(
                    f"private scale slope {mine} differs from other series' ({theirs}): their "
                    "display values do not compare; FP values do"
                )
        elif fp_series and uid in other_series:
            notes.append(
                "no private scale slope (display values) while other series of the study are "
                "scaled to the vendor's floating-point values: un-normalized values are not "
                "compared with them; ratios to a reference tissue are unaffected"
            )
        if notes:
            stack = replace(stack, warnings=(*stack.warnings, *notes))
        out.append(stack)
    return out
