"""``sigreport export OUTDIR --deidentify --out DIR``: a report folder for teaching or an
external board, without the patient's identity (docs/usage.md, export).

sr.dcm gets the PS3.15 Basic Application Level Confidentiality Profile (``deidentify``);
findings.json is de-identified with the same UID replacements, and table.csv, report.md,
report.txt and report.html are drawn again from it by the report writer's own functions, so no
header value of the original run can survive in them. The key images are decoded and encoded
again as plain RGB PNGs (no text chunks); their pixels come from the image data only, with ROI
outlines, and carry no burned-in text.

Before anything is moved into place every exported file's bytes are searched for the original
identifiers; a hit stops the export with nothing written.
"""

from __future__ import annotations

import io
import json
import os
import secrets
import shutil
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np
import pydicom
from PIL import Image

from sigreport.errors import InputError
from sigreport.export.deidentify import (
    MIN_TEXT_LENGTH,
    Identifiers,
    UidMap,
    deidentify_findings,
    deidentify_sr,
    identifier_pattern,
)
from sigreport.model import Progress, say

# Identifiers shorter than this are not searched for in the finished files (see
# deidentify.MIN_TEXT_LENGTH); they are removed from every field that holds them all the same.
MIN_SEARCHED_LENGTH = MIN_TEXT_LENGTH


def export_report(
    report_dir: Path,
    out_dir: Path,
    *,
    force: bool = False,
    site_lexicon: Path | None = None,
    progress: Progress | None = None,
) -> Path:
    """Write the de-identified copy of ``report_dir`` to ``out_dir``, atomically.

    Parameters
    ----------
    report_dir
        A folder written by ``report`` (findings.json required; sr.dcm, images/ optional).
    out_dir
        The export folder; refused when it is ``report_dir`` or inside it (or the reverse), and
        when it exists unless ``force``.
    site_lexicon
        The lexicon the report was written with, so the reports read the same.

    Returns
    -------
    Path
        ``out_dir``.

    Raises
    ------
    InputError
        Unusable report folder or output path, or an identifier left in an exported file.
    """
    from sigreport.lexicon_tables import load_lexicon
    from sigreport.model import role_sort_key
    from sigreport.report.findings import phrases_from_findings
    from sigreport.report.html import render_html
    from sigreport.report.images import safe_name
    from sigreport.report.tables import rows_to_csv, table_rows
    from sigreport.report.text import render_text, report_context
    from sigreport.report.writer import IMAGES_DIR, findings_json

    report_dir = Path(report_dir)
    out_dir = Path(out_dir)
    findings_path = report_dir / "findings.json"
    if not findings_path.is_file():
        raise InputError(f"{report_dir}: no findings.json (not a report folder written by report)")
    if _overlaps(report_dir, out_dir):
        raise InputError(
            f"--out {out_dir} is the report folder {report_dir} or lies inside it (or holds it); "
            "the export is written elsewhere and the report folder is never changed"
        )
    if out_dir.exists() and not force:
        raise InputError(f"{out_dir} exists; use --force to replace it")
    if out_dir.exists() and not out_dir.is_dir():
        raise InputError(f"{out_dir} exists and is not a folder")
    try:
        findings = json.loads(findings_path.read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise InputError(f"{findings_path}: not readable as JSON: {exc}") from None
    if not isinstance(findings, dict) or not isinstance(findings.get("study"), dict):
        raise InputError(f"{findings_path}: field 'study' missing; not a sigreport findings file")

    sr_path = report_dir / "sr.dcm"
    sr = None
    if sr_path.is_file():
        try:
            sr = pydicom.dcmread(sr_path)
        except Exception as exc:  # corrupt file
            raise InputError(f"{sr_path}: not readable as DICOM: {exc}") from None

    say(progress, f"de-identifying {report_dir}")
    identifiers = Identifiers.collect(sr, findings)
    uids = UidMap()
    files: dict[str, bytes] = {}
    if sr is not None:
        clean_sr = deidentify_sr(sr, uids, identifiers)
        buffer = io.BytesIO()
        clean_sr.save_as(buffer, enforce_file_format=True)
        files["sr.dcm"] = buffer.getvalue()
    clean = deidentify_findings(findings, uids, identifiers)

    files["findings.json"] = findings_json(clean).encode("utf-8")
    files["table.csv"] = rows_to_csv(table_rows(clean)).encode("utf-8")
    lexicon = load_lexicon(site_lexicon)
    wording = lexicon.wording
    context = report_context(clean, wording, phrases_from_findings(clean, lexicon.rules))
    markdown, plain = render_text(context, site_lexicon)
    files["report.md"] = markdown.encode("utf-8")
    files["report.txt"] = plain.encode("utf-8")

    images_dir = report_dir / IMAGES_DIR
    per_lesion: dict[str, list[dict[str, Any]]] = {}
    for lesion in clean.get("lesions", []):
        lesion_id = str(lesion.get("id"))
        for role in sorted(lesion.get("signal") or {}, key=role_sort_key):
            name = f"{safe_name(lesion_id)}_{safe_name(role)}.png"
            source = images_dir / name
            if source.is_file():
                png = plain_png(source)
                files[f"{IMAGES_DIR}/{name}"] = png
                per_lesion.setdefault(lesion_id, []).append(
                    {"png": png, "role": role, "file": name}
                )
    html = render_html(context, clean, per_lesion, wording, lexicon.site, iso_band=lexicon.iso_band)
    files["report.html"] = html.encode("utf-8")

    leaks = find_identifiers(files, identifiers, uids.mapping)
    if leaks:
        raise InputError(
            "export stopped, nothing written: "
            + "; ".join(f"{name} still holds the {what}" for name, what in leaks[:5])
        )
    _write_atomically(out_dir, files)
    return out_dir


def plain_png(path: Path) -> bytes:
    """The image's pixels as a new RGB PNG with no ancillary text chunks (Pillow writes none
    unless given ``pnginfo``)."""
    from sigreport.report.images import png_bytes

    try:
        with Image.open(path) as image:
            rgb = np.asarray(image.convert("RGB"))
    except Exception as exc:  # not a PNG
        raise InputError(f"{path}: not readable as an image: {exc}") from None
    return png_bytes(rgb)


def find_identifiers(
    files: Mapping[str, bytes], identifiers: Identifiers, uid_map: Mapping[str, str]
) -> list[tuple[str, str]]:
    """(file, what) for every original identifier or UID found in the files' bytes (text
    compared as UTF-8, case-insensitively; HTML-escaped forms included)."""
    import html
    import re

    needles: list[tuple[str, re.Pattern[bytes]]] = []
    for what, text in identifiers.strings(min_length=MIN_SEARCHED_LENGTH):
        for form in {text, html.escape(text)}:
            needles.append(
                (what, re.compile(identifier_pattern(form).encode("utf-8"), re.IGNORECASE))
            )
    needles.extend(
        ("original UID", re.compile(rb"(?<![0-9.])" + re.escape(uid.encode()) + rb"(?![0-9.])"))
        for uid in uid_map
    )
    found = []
    for name, data in files.items():
        for what, needle in needles:
            if needle.search(data):
                found.append((name, what))
    return found


def _overlaps(a: Path, b: Path) -> bool:
    a, b = a.resolve(), b.resolve()
    return a == b or a in b.parents or b in a.parents


def _write_atomically(out_dir: Path, files: Mapping[str, bytes]) -> None:
    """Build the folder beside ``out_dir`` and rename it into place; an old ``out_dir``
    (``force``) is removed only once the new one is there."""
    parent = out_dir.parent
    parent.mkdir(parents=True, exist_ok=True)
    temp = parent / f".{out_dir.name}.partial-{secrets.token_hex(6)}"
    temp.mkdir()
    try:
        for name, data in sorted(files.items()):
            target = temp / name
            target.parent.mkdir(parents=True, exist_ok=True)
            target.write_bytes(data)
        if out_dir.exists():
            aside = parent / f".{out_dir.name}.old-{secrets.token_hex(6)}"
            os.replace(out_dir, aside)
            try:
                os.replace(temp, out_dir)
            except BaseException:
                os.replace(aside, out_dir)
                raise
            shutil.rmtree(aside, ignore_errors=True)
        else:
            os.replace(temp, out_dir)
    except BaseException:
        shutil.rmtree(temp, ignore_errors=True)
        raise
