"""Say the real cause when a series a user asked for is not there.

"anchor = '1' names no measured series" is a consequence; the cause is usually that every file
of series 1 was skipped while indexing (no orientation, truncated, another study...) or that its
role is UNKNOWN. These functions turn the index's skipped files and stacks into that sentence.
"""

from __future__ import annotations

from collections import Counter, defaultdict

from sigreport.model import Role, SkippedFile, StudyIndex


def _name(number: int | None, description: str | None) -> str:
    name = f"series {number}" if number is not None else "a series without SeriesNumber"
    return f"{name} ({description})" if description else name


def skipped_series(index: StudyIndex) -> dict[str, list[SkippedFile]]:
    """Skipped files grouped by the SeriesInstanceUID their header named (files whose header
    was not read far enough are left out)."""
    groups: dict[str, list[SkippedFile]] = defaultdict(list)
    for skipped in index.skipped:
        if skipped.series_instance_uid is not None:
            groups[skipped.series_instance_uid].append(skipped)
    return groups


def _summary(files: list[SkippedFile], *, kept: int) -> str:
    first = files[0]
    reason, count = Counter(f.reason for f in files).most_common(1)[0]
    how = "was skipped" if kept == 0 else f"lost {len(files)} file(s)"
    more = "" if count == len(files) else f"; {len(files) - count} other file(s) for other reasons"
    return (
        f"{_name(first.series_number, first.description)} {how}: {reason} ({count} file(s){more})"
    )


def skipped_series_summary(index: StudyIndex, *, limit: int = 5) -> str:
    """One clause per series that lost files while indexing, e.g. ``series 1 (T1 SE) was
    skipped: ImageOrientationPatient ... (20 file(s))``; empty when none did."""
    kept = Counter(s.series_instance_uid for s in index.stacks)
    parts = [_summary(files, kept=kept[uid]) for uid, files in skipped_series(index).items()]
    if len(parts) > limit:
        parts = [*parts[:limit], f"and {len(parts) - limit} more series"]
    return "; ".join(parts)


def why_absent(index: StudyIndex, target: str | int | None) -> str:
    """Why the series a case file names (a SeriesNumber, a SeriesInstanceUID or a role name)
    is not measured; an empty string when the index does not tell.

    Returns
    -------
    str
        Starting with ``": "`` so it can follow the consequence, e.g.
        ``": series 1 (T1 SE) was skipped: ... (20 file(s))"``.
    """
    if target is None:
        return ""
    text = str(target).strip()
    kept = Counter(s.series_instance_uid for s in index.stacks)
    for uid, files in skipped_series(index).items():
        if text == uid or text == str(files[0].series_number):
            return ": " + _summary(files, kept=kept[uid])
    for stack in index.stacks:
        if text in (stack.series_instance_uid, stack.key, str(stack.series_number)):
            if stack.role is Role.UNKNOWN:
                return (
                    f": {_name(stack.series_number, stack.description)} is not measured, its "
                    f"role is UNKNOWN ({stack.role_reason})"
                )
    summary = skipped_series_summary(index)
    if text.upper() in {r.value for r in Role} and summary:
        return f": no series has that role; skipped while indexing: {summary}"
    return ""
