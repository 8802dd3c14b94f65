"""The ``scan`` command's outputs: the ``scan --json`` object and a readable table."""

from __future__ import annotations

from typing import Any

from rich.console import Console
from rich.table import Table
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
            "confidence": round(float(s.confidence), 3),
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


def print_scan_table(index: StudyIndex, console: Console) -> None:
    """Print the stacks (series number, stack, description, role, reason, size, spacing,
    warnings count), then the skipped files and their reasons. Header values and paths are
    printed as data: never read as console markup, control characters removed
    (:func:`sigreport.safetext.terminal_text`)."""
    table = Table(title=_plain(f"Study {index.study_dir}"), show_lines=False)
    for name in ("#", "stack", "description", "role", "reason", "size", "spacing mm", "warn"):
        table.add_column(name, overflow="fold")
    for s in index.stacks:
        table.add_row(
            *(
                _plain(cell)
                for cell in (
                    "" if s.series_number is None else str(s.series_number),
                    s.stack or "",
                    s.description,
                    f"{s.role.value} ({s.confidence:.2f})",
                    s.role_reason,
                    "x".join(str(v) for v in s.size),
                    " x ".join(f"{v:.3g}" for v in s.spacing_mm),
                    str(len(s.warnings)),
                )
            )
        )
    console.print(table)
    if not index.stacks:
        console.print(_plain("No usable MR image stacks found."))
    for warning in index.warnings:
        console.print(_plain(f"study: {warning}"))
    for s in index.stacks:
        for warning in s.warnings:
            label = f"series {s.series_number}" + (f" [{s.stack}]" if s.stack else "")
            console.print(_plain(f"{label}: {warning}"))
    if index.skipped:
        console.print(_plain(f"Skipped {len(index.skipped)} file(s):"))
        for f in index.skipped:
            console.print(_plain(f"  {f.path}: {f.reason}"))


def _plain(value: object) -> Text:
    return Text(terminal_text(value))
