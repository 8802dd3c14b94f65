"""report.html: one self-contained page (inline CSS, data: URI images, inline SVG, no script,
no external reference), rendered from the lexicon's ``report.html.j2`` with autoescaping on."""

from __future__ import annotations

import base64
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

from markupsafe import Markup

from sigreport.model import UNGRADED_ROLES
from sigreport.report.images import lesion_points, ratio_plot_svg, time_intensity_svg
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
) -> str:
    """The page. ``images`` maps a lesion id to its key images in display order, each a dict
    with ``png`` (bytes), ``role`` and ``file`` (the PNG's name under images/); ``iso_band`` is
    the isointense band of the grade thresholds (:attr:`sigreport.lexicon_tables.Lexicon.iso_band`)
    shaded on each ratio plot. Strings of ``findings`` are cleaned as in
    :func:`~sigreport.report.text.report_context`."""
    findings = clean_strings(findings)
    series = series_by_role(findings)
    by_id = {str(lesion.get("id")): lesion for lesion in findings.get("lesions", [])}
    lesions = []
    for lesion in context["lesions"]:
        source = by_id.get(lesion["id"], {})
        signal = source.get("signal") or {}
        strip = []
        for item in images.get(lesion["id"], ()):
            entry = series.get(item["role"], {})
            number = entry.get("series_number")
            strip.append(
                {
                    "src": data_uri(item["png"]),
                    "role": item["role"],
                    "role_name": wording.role_name(item["role"]),
                    "series": "" if number is None else str(number),
                    "description": str(entry.get("description") or ""),
                    "file": item["file"],
                }
            )
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
    env = environment(site, autoescape=True)
    return render_template(env, "report.html.j2", {**context, "lesions": lesions})
