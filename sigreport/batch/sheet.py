"""The board sheet of a batch: ``OUTDIR/index.html`` and ``OUTDIR/summary.csv``.

index.html is self-contained like report.html (inline CSS, no script, a Content-Security-Policy
that forbids every fetch), rendered from the lexicon's ``index.html.j2`` with autoescaping on, so
every header value is escaped; each case links to its own ``<id>/report.html`` by a relative
link, so the folder can be moved or copied whole. summary.csv holds the same rows, each cell
made safe for spreadsheets the way ``table.csv`` is (``report.tables.csv_cell``).
"""

from __future__ import annotations

import csv
import io
import os
import secrets
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any
from urllib.parse import quote

from sigreport import __version__, lexicon
from sigreport.report.tables import csv_cell
from sigreport.report.text import environment

INDEX_HTML = "index.html"
SUMMARY_CSV = "summary.csv"
SUMMARY_COLUMNS: tuple[str, ...] = (
    "id", "status", "reason", "patient_name", "patient_id", "study_date", "lesions",
    "behaviour", "change", "qc_warnings", "qc_codes", "report", "pushed",
)  # fmt: skip


def summary_rows(cases: Sequence[Mapping[str, Any]]) -> list[dict[str, Any]]:
    """One summary.csv row per case: lists joined with " | ", the number of QC warnings and
    their codes."""
    rows = []
    for case in cases:
        warnings = list(case.get("qc_warnings") or [])
        rows.append(
            {
                "id": case["id"],
                "status": case["status"],
                "reason": case.get("reason") or "",
                "patient_name": case.get("patient_name") or "",
                "patient_id": case.get("patient_id") or "",
                "study_date": case.get("study_date") or "",
                "lesions": case.get("lesions"),
                "behaviour": " | ".join(case.get("behaviour") or []),
                "change": " | ".join(case.get("change") or []),
                "qc_warnings": len(warnings) if case["status"] == "done" else None,
                "qc_codes": " ".join(w.split(":", 1)[0] for w in warnings),
                "report": case.get("report") or "",
                "pushed": case.get("pushed") or "",
            }
        )
    return rows


def summary_csv(cases: Sequence[Mapping[str, Any]]) -> str:
    """summary.csv text (RFC 4180 quoting as the csv module writes it, header first)."""
    buffer = io.StringIO()
    writer = csv.DictWriter(buffer, fieldnames=list(SUMMARY_COLUMNS), extrasaction="raise")
    writer.writeheader()
    for row in summary_rows(cases):
        writer.writerow({k: csv_cell(row.get(k)) for k in SUMMARY_COLUMNS})
    return buffer.getvalue()


def render_index(
    cases: Sequence[Mapping[str, Any]],
    *,
    title: str | None = None,
    site_lexicon: Path | str | None = None,
) -> str:
    """The board sheet page."""
    cautions = lexicon.read_table("cautions.toml", site_lexicon).get("cautions") or []
    rows = []
    for case in cases:
        report = case.get("report")
        rows.append(
            {
                **case,
                # Ids are checked safe folder names; quoting keeps the link a plain relative path.
                "href": quote(str(report)) if report else "",
                "behaviour": list(case.get("behaviour") or []),
                "change": list(case.get("change") or []),
                "qc_warnings": list(case.get("qc_warnings") or []),
                "pushed": case.get("pushed") or "",
            }
        )
    env = environment(site_lexicon, autoescape=True)
    return env.get_template("index.html.j2").render(
        title=title or "Board sheet",
        cases=rows,
        n_done=sum(1 for c in cases if c["status"] == "done"),
        n_failed=sum(1 for c in cases if c["status"] != "done"),
        cautions=[str(c) for c in cautions],
        tool=f"sigreport {__version__}",
    )


def write_sheet(
    out_dir: Path,
    cases: Sequence[Mapping[str, Any]],
    *,
    title: str | None = None,
    site_lexicon: Path | str | None = None,
) -> tuple[Path, Path]:
    """Write index.html and summary.csv into ``out_dir``, each atomically (written beside and
    renamed). Returns their paths."""
    out_dir = Path(out_dir)
    html = render_index(cases, title=title, site_lexicon=site_lexicon)
    index = _write_atomic(out_dir / INDEX_HTML, html)
    summary = _write_atomic(out_dir / SUMMARY_CSV, summary_csv(cases))
    return index, summary


def _write_atomic(path: Path, text: str) -> Path:
    temp = path.parent / f".{path.name}.partial-{secrets.token_hex(6)}"
    try:
        with temp.open("w", encoding="utf-8", newline="") as handle:
            handle.write(text)
        os.replace(temp, path)
    except BaseException:
        temp.unlink(missing_ok=True)
        raise
    return path
