"""The ``scan`` command's outputs: the ``scan --json`` object and a readable table."""

from __future__ import annotations

import textwrap
from typing import Any

from rich.console import Console
from rich.text import Text

from sigreport.model import StudyIndex
from sigreport.safetext import terminal_text

SCAN_SCHEMA = "sigreport-scan/1"


def scan_to_json(index: StudyIndex) -> dict[str, Any]:
    """The ``scan --json`` object of docs/usage.md: one series entry per stack."""
    series = [
        {
            "series_instance_uid": s.series_instance_uid,
            "series_number": s.series_number,
            "stack": s.stack,
            "description": s.description,
            "modality": s.modality,
            "role": s.role.value,
            "role_reason": s.role_reason,
            "confidence": None if s.confidence is None else round(float(s.confidence), 3),
            "n_instances": len(s.instances),
            "size": [int(v) for v in s.size],
            "spacing_mm": [round(float(v), 6) for v in s.spacing_mm],
            "frame_of_reference_uid": s.frame_of_reference_uid,
            "warnings": list(s.warnings),
        }
        for s in index.stacks
    ]
    skipped = [{"path": str(f.path), "reason": f.reason} for f in index.skipped]
    return {
        "schema": SCAN_SCHEMA,
        "study_dir": str(index.study_dir),
        "series": series,
        "skipped": skipped,
    }


def scan_rows(index: StudyIndex) -> tuple[list[str], list[list[str]], list[str]]:
    """The scan table as text: (headers, one row of cells per stack, each stack's reason).

    Columns: series number, stack, description, role, confidence, size, spacing, warnings
    count; a column empty for every stack (no split series, no confidence, no warning) is
    dropped. UNKNOWN has no confidence, so its cell is empty. Header values are made terminal
    text (:func:`sigreport.safetext.terminal_text`)."""
    headers = ["#", "stack", "description", "role", "conf", "size", "spacing mm", "warn"]
    rows = [
        [
            "" if s.series_number is None else str(s.series_number),
            s.stack or "",
            s.description,
            s.role.value,
            "" if s.confidence is None else f"{s.confidence:.2f}",
            "x".join(str(v) for v in s.size),
            " x ".join(f"{v:.3g}" for v in s.spacing_mm),
            str(len(s.warnings)) if s.warnings else "",
        ]
        for s in index.stacks
    ]
    rows = [[terminal_text(cell) for cell in row] for row in rows]
    keep = [i for i in range(len(headers)) if any(row[i] for row in rows)] or [0, 2, 3]
    reasons = [terminal_text(s.role_reason) for s in index.stacks]
    return [headers[i] for i in keep], [[row[i] for i in keep] for row in rows], reasons


def _wrap(text: str, width: int) -> list[str]:
    # Words stay whole; only a single token longer than the whole line is cut.
    return textwrap.wrap(text, max(1, width), break_long_words=False, break_on_hyphens=False) or [
        ""
    ]


def _cut(line: str, width: int) -> list[str]:
    return [line[i : i + width] for i in range(0, len(line), width)] or [""]


def print_scan_table(index: StudyIndex, console: Console) -> None:
    """Print the stacks as a table that fits the console's width (an 80-column terminal
    included): one line per stack (series number, stack, description, role, confidence, size,
    spacing, warnings; empty columns dropped), the description wrapped within its column and
    the role's reason on the lines below, indented, wrapped between words. Then the warnings,
    the skipped files and their reasons. Header values and paths are printed as data: never
    read as console markup, control characters removed
    (:func:`sigreport.safetext.terminal_text`)."""
    width = max(40, console.width)
    headers, rows, reasons = scan_rows(index)
    console.print(_plain(f"Study {index.study_dir}"), overflow="fold")
    desc = headers.index("description") if "description" in headers else None
    widths = [max([len(h)] + [len(r[i]) for r in rows]) for i, h in enumerate(headers)]
    gap = 2
    if desc is not None:
        fixed = sum(w for i, w in enumerate(widths) if i != desc) + gap * (len(headers) - 1)
        longest_word = max([len(w) for r in rows for w in r[desc].split()] + [len("description")])
        widths[desc] = max(min(widths[desc], width - fixed), min(longest_word, 24), 11)

    def emit(cells: list[str], *, style: str = "") -> None:
        columns = [_wrap(cell, widths[i]) if i == desc else [cell] for i, cell in enumerate(cells)]
        for k in range(max(len(c) for c in columns)):
            parts = [(c[k] if k < len(c) else "").ljust(widths[i]) for i, c in enumerate(columns)]
            line = (" " * gap).join(parts).rstrip()
            for piece in _cut(line, width):
                console.print(Text(piece, style=style), overflow="ignore", crop=False)

    if rows:
        emit(headers, style="bold")
        console.print(Text("-" * min(width, sum(widths) + gap * (len(widths) - 1))))
    for row, reason in zip(rows, reasons, strict=True):
        emit(row)
        for line in _wrap(reason, width - 4):
            for piece in _cut(line, width - 4):
                console.print(Text("    " + piece, style="dim"), overflow="ignore", crop=False)
    if not index.stacks:
        console.print(_plain("No usable MR image stacks found."))
    for warning in index.warnings:
        _print_wrapped(console, f"study: {warning}", width)
    for s in index.stacks:
        for warning in s.warnings:
            label = f"series {s.series_number}" + (f" [{s.stack}]" if s.stack else "")
            _print_wrapped(console, f"{label}: {warning}", width)
    if index.skipped:
        console.print(_plain(f"Skipped {len(index.skipped)} file(s):"))
        for f in index.skipped:
            _print_wrapped(console, f"  {f.path}: {f.reason}", width, indent="    ")


def _print_wrapped(console: Console, text: str, width: int, indent: str = "  ") -> None:
    lines = textwrap.wrap(
        terminal_text(text),
        width,
        subsequent_indent=indent,
        break_long_words=False,
        break_on_hyphens=False,
    )
    for line in lines:
        for piece in _cut(line, width):
            console.print(Text(piece), overflow="ignore", crop=False)


def _plain(value: object) -> Text:
    return Text(terminal_text(value))
