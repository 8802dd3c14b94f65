"""The signal-behaviour table: one row per lesion and series role (``table.csv`` and the table
of report.md / report.txt / report.html)."""

from __future__ import annotations

import csv
import io
from collections.abc import Mapping, Sequence
from typing import Any

from sigreport.report.wording import role_sort_key

COLUMNS: tuple[str, ...] = (
    "lesion", "site", "role", "series_number", "series_description", "n_voxels", "mean",
    "median", "sd", "p05", "p95", "ratio", "grade", "enhancement_percent",
    "fluid_drop_percent", "fat_drop_percent", "adc_1e-6_mm2_s", "susceptibility_drop_percent",
    "chemical_shift_drop_percent", "fat_fraction_percent", "dynamic_curve", "notes",
)  # fmt: skip


def series_by_role(findings: Mapping[str, Any]) -> dict[str, Mapping[str, Any]]:
    """The findings' series entry for each role: the measured one when several share a role."""
    out: dict[str, Mapping[str, Any]] = {}
    for entry in findings.get("series", []):
        role = entry.get("role")
        if role is None:
            continue
        if entry.get("in_signal") is False:  # a dynamic phase measured for the curve only
            continue
        if role not in out or (entry.get("measured") and not out[role].get("measured")):
            out[role] = entry
    return out


def ordered_roles(signal: Mapping[str, Any]) -> list[str]:
    """The roles of a lesion's ``signal`` in reading order."""
    return sorted(signal, key=role_sort_key)


#: What a cell or note says for a finding that is not assessed.
NOT_ASSESSED = "not assessed"


def table_rows(findings: Mapping[str, Any]) -> list[dict[str, Any]]:
    """One row per lesion and role of its ``signal`` (null signal included, noted).

    The lesion's enhancement percent sits on its post-contrast row (the pre-contrast row notes
    that it is the baseline); each suppression drop sits on the row of the suppressed series.
    Numbers are left as numbers (``None`` when absent); the CSV writes them as they are.
    """
    series = series_by_role(findings)
    rows: list[dict[str, Any]] = []
    for lesion in findings.get("lesions", []):
        signal: Mapping[str, Any] = lesion.get("signal") or {}
        enhancement = lesion.get("enhancement") or {}
        suppression = lesion.get("suppression") or {}
        for role in ordered_roles(signal):
            stats = signal[role]
            entry = series.get(role, {})
            notes: list[str] = []
            row: dict[str, Any] = dict.fromkeys(COLUMNS)
            row.update(
                lesion=lesion.get("id"),
                site=lesion.get("site"),
                role=role,
                series_number=entry.get("series_number"),
                series_description=entry.get("description"),
            )
            if stats is None:
                notes.append("not measured (see qc)")
            else:
                for key in ("n_voxels", "mean", "median", "sd", "p05", "p95", "ratio", "grade"):
                    row[key] = stats.get(key)
                if stats.get("ratio") is None:
                    notes.append("not graded: reference not measured (see qc)")
                elif stats.get("borderline"):
                    notes.append("borderline grade")
            if lesion.get("flow_void") is True:
                # A flow void holds only noise: its changes are not assessed (findings.json
                # keeps the numbers; the table does not present them as findings).
                if role in (enhancement.get("post"),) or any(
                    (flag or {}).get("to") == role for flag in suppression.values()
                ):
                    notes.append(NOT_ASSESSED + " (flow void)")
                row["notes"] = "; ".join(notes)
                rows.append(row)
                continue
            if enhancement.get("post") == role:
                row["enhancement_percent"] = enhancement.get("percent")
                if enhancement.get("percent") is not None:
                    pattern = enhancement.get("pattern")
                    if enhancement.get("enhancing"):
                        notes.append(
                            f"enhancing ({pattern})"
                            if pattern not in (None, "none")
                            else "enhancing"
                        )
                    else:
                        notes.append("not enhancing")
                if enhancement.get("raw_percent") is not None:
                    raw = float(enhancement["raw_percent"])
                    said = "unnormalized change " + ("0.0" if round(raw, 1) == 0 else f"{raw:+.1f}")
                    notes.append(said + " %")
                if enhancement.get("basis") == "raw":
                    notes.append("the reference itself changed; flag from the unnormalized change")
            if enhancement.get("pre") == role and enhancement.get("percent") is not None:
                notes.append(f"baseline for {enhancement.get('post')}")
            for kind in ("fluid", "fat"):
                flag = suppression.get(kind)
                if not flag or flag.get("to") != role:
                    continue
                row[f"{kind}_drop_percent"] = flag.get("drop_percent")
                if flag.get("suppressed") is not None:
                    said = "suppressed" if flag["suppressed"] else "not suppressed"
                    notes.append(f"{kind} {said} vs {flag.get('from')}")
                if flag.get("reliable") is False:
                    notes.append(f"{kind} flag unreliable")
            notes += family_cells(lesion, role, row, entry)
            row["notes"] = "; ".join(notes)
            rows.append(row)
    return rows


def family_cells(
    lesion: Mapping[str, Any], role: str, row: dict[str, Any], series: Mapping[str, Any]
) -> list[str]:
    """Fill the other sequence families' cells of one row (docs/measurements.md): the ADC
    value on the ADC row, each drop on the row of the series it drops to, the fat fraction on
    the FAT row, the curve on the dynamic post-contrast row. Returns the row's notes."""
    notes: list[str] = []
    diffusion = lesion.get("diffusion") or {}
    if role == "ADC" and diffusion:
        row["adc_1e-6_mm2_s"] = diffusion.get("adc_1e-6_mm2_s")
        if series.get("adc_units_ok") is False:
            notes.append("ADC map scaling implausible (see qc)")
        if diffusion.get("restricted"):
            notes.append("restricted diffusion (DWI bright, ADC dark)")
        elif diffusion.get("shine_through"):
            notes.append("T2 shine-through (DWI bright, ADC not dark)")
    sus = lesion.get("susceptibility") or {}
    if sus and sus.get("to") == role:
        row["susceptibility_drop_percent"] = sus.get("drop_percent")
        if sus.get("blooming") is not None:
            notes.append(f"{'blooming' if sus['blooming'] else 'no blooming'} vs {sus.get('from')}")
        if sus.get("reliable") is False:
            notes.append("susceptibility flag unreliable")
    cs = lesion.get("chemical_shift") or {}
    if cs and cs.get("to") == role:
        row["chemical_shift_drop_percent"] = cs.get("drop_percent")
        if cs.get("microscopic_fat") is not None:
            said = "drop suggests microscopic fat" if cs["microscopic_fat"] else "no fat drop"
            notes.append(f"{said} vs {cs.get('from')} (core of the ROI)")
        if cs.get("reliable") is False:
            notes.append("chemical-shift flag unreliable")
    if cs and role == "FAT":
        row["fat_fraction_percent"] = cs.get("fat_fraction_percent")
    dynamic = lesion.get("dynamic") or {}
    if dynamic and role in ("T1POST", "T1POSTFS") and series.get("phase") is not None:
        row["dynamic_curve"] = dynamic.get("curve")
        phases = ", ".join(
            f"{p['delay_s']:g} s {p['percent']:+.0f} %"
            for p in dynamic.get("phases", [])
            if p.get("delay_s") is not None and p.get("percent") is not None
        )
        if phases:
            notes.append(f"dynamic vs {dynamic.get('pre')}: {phases}")
        if dynamic.get("reliable") is False:
            notes.append("dynamic curve unreliable")
    return notes


def rows_to_csv(rows: Sequence[Mapping[str, Any]]) -> str:
    """The rows as CSV text (RFC 4180 quoting, ``\\r\\n`` line ends as the csv module writes
    them), header first, empty cells for ``None``."""
    buffer = io.StringIO()
    writer = csv.DictWriter(buffer, fieldnames=list(COLUMNS), extrasaction="raise")
    writer.writeheader()
    for row in rows:
        writer.writerow({k: _cell(row.get(k)) for k in COLUMNS})
    return buffer.getvalue()


def _cell(value: Any) -> Any:
    """A CSV cell: empty for ``None``; free text that a spreadsheet would run as a formula
    (leading ``= + - @``, OWASP "CSV injection") is prefixed with an apostrophe."""
    if value is None:
        return ""
    if isinstance(value, str) and value[:1] in ("=", "+", "-", "@", "\t", "\r"):
        return "'" + value
    return value


def csv_cell(value: Any) -> Any:
    """A CSV cell safe to open in a spreadsheet (empty for ``None``; formula-like text
    prefixed with an apostrophe): the rule of ``table.csv``, for other CSV files."""
    return _cell(value)


def roi_medians(roi: Mapping[str, Any]) -> dict[str, Any]:
    """A reference or control ROI's median on each series (findings schema 2): its ``medians``
    (role -> median), or the ``median`` of each role of its ``signal`` statistics; {} when the
    findings carry neither (schema 1)."""
    medians = roi.get("medians")
    if isinstance(medians, Mapping) and medians:
        return dict(medians)
    signal = roi.get("signal")
    if isinstance(signal, Mapping):
        return {
            str(role): stats.get("median") if isinstance(stats, Mapping) else None
            for role, stats in signal.items()
        }
    return {}
