"""report.html: one self-contained page (inline CSS, data: URI images, inline SVG, no script,
no external reference), rendered from the lexicon's ``report.html.j2`` with autoescaping on."""

from __future__ import annotations

import base64
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

from markupsafe import Markup

from sigreport.model import UNGRADED_ROLES, LesionPhrases
from sigreport.report.images import lesion_points, ratio_plot_svg, time_intensity_svg
from sigreport.report.layout import header_block, roi_blocks, series_rows, summary_table
from sigreport.report.tables import ordered_roles, series_by_role
from sigreport.report.text import environment, render_template
from sigreport.report.wording import Wording
from sigreport.safetext import clean_strings


def data_uri(png: bytes) -> str:
    """A ``data:image/png;base64,...`` URI (RFC 2397) of PNG bytes."""
    return "data:image/png;base64," + base64.b64encode(png).decode("ascii")


def _curve_plot(source: Mapping[str, Any], lesion: Mapping[str, Any]) -> Markup | str:
    """The time-intensity plot of a lesion with a ``dynamic`` field, else an empty string."""
    dynamic = source.get("dynamic")
    if not dynamic:
        return ""
    points = [
        (float(p["delay_s"]), float(p["percent"]))
        for p in dynamic.get("phases", [])
        if p.get("delay_s") is not None and p.get("percent") is not None
    ]
    if not points:
        return ""
    # Built from numbers and escaped labels only (images.time_intensity_svg).
    return Markup(
        time_intensity_svg(
            points,
            title=f"{lesion['id']}: enhancement against {dynamic.get('pre')} by phase",
            curve=dynamic.get("curve"),
        )
    )


def render_html(
    context: Mapping[str, Any],
    findings: Mapping[str, Any],
    images: Mapping[str, Sequence[Mapping[str, Any]]],
    wording: Wording,
    site: Path | str | None = None,
    *,
    iso_band: tuple[float, float],
    phrases: Mapping[str, LesionPhrases] | None = None,
) -> str:
    """The page, laid out for the reading room (docs/outputs.md, report.html): header block,
    cautions, summary table, then each lesion's text, key images and ratio plot, the reference
    and control ROIs, the detailed per-series table, quality control and the series table.

    ``images`` maps an ROI id to its key images in display order, each a dict with ``png``
    (bytes), ``role``, ``file`` (the PNG's name under images/) and optionally
    ``instance_number`` (the image number an archive viewer shows); ``iso_band`` is the
    isointense band of the grade thresholds (:attr:`sigreport.lexicon_tables.Lexicon.iso_band`)
    shaded on each ratio plot; ``phrases`` the words characterization chose per lesion (the
    summary table's graded words; without them, the plain grade). Strings of ``findings`` are
    cleaned as in :func:`~sigreport.report.text.report_context`."""
    findings = clean_strings(findings)
    series = series_by_role(findings)
    by_id = {str(lesion.get("id")): lesion for lesion in findings.get("lesions", [])}

    def strip_of(roi_id: str) -> list[dict[str, str]]:
        strip = []
        for item in images.get(roi_id, ()):
            entry = series.get(item["role"], {})
            number = entry.get("series_number")
            instance = item.get("instance_number")
            strip.append(
                {
                    "src": data_uri(item["png"]),
                    "role": item["role"],
                    "role_name": wording.role_name(item["role"]),
                    "series": "" if number is None else str(number),
                    "image": "" if instance is None else str(instance),
                    "description": str(entry.get("description") or ""),
                    "file": item["file"],
                }
            )
        return strip

    lesions = []
    for lesion in context["lesions"]:
        source = by_id.get(lesion["id"], {})
        signal = source.get("signal") or {}
        strip = strip_of(lesion["id"])
        # The SVG is built from numbers and escaped labels only (images.ratio_plot_svg).
        plot = Markup(
            ratio_plot_svg(
                # Dixon water / fat give the fat fraction, not a ratio: not plotted as missing.
                lesion_points(
                    signal, [r for r in ordered_roles(signal) if r not in UNGRADED_ROLES]
                ),
                iso_band=iso_band,
                title=f"{lesion['id']}: ratio to {lesion['reference_tissue']}",
            )
        )
        lesions.append(
            {**lesion, "images": strip, "plot": plot, "curve_plot": _curve_plot(source, lesion)}
        )
    rois = roi_blocks(findings, {str(r.get("id")): () for r in findings.get("rois", [])})
    for roi in rois:
        roi["images"] = strip_of(roi["id"])
    layout = {
        "header": header_block(findings),
        "summary": summary_table(findings, phrases or {}),
        "rois": rois,
        "series_moved": series_rows(findings),
    }
    env = environment(site, autoescape=True)
    return render_template(env, "report.html.j2", {**context, **layout, "lesions": lesions})
