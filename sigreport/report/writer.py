"""The report folder (interface.md, OUTDIR), written atomically.

Everything is built in a hidden sibling folder and renamed onto ``out_dir`` once complete; on
any failure the temporary folder is removed and the error re-raised, so a failed run leaves no
half-written report behind. With ``force`` an existing folder is replaced only after the new one
is complete.
"""

from __future__ import annotations

import json
import os
import secrets
import shutil
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

from sigreport.errors import InputError
from sigreport.model import KeySlice, Stack
from sigreport.report.html import render_html
from sigreport.report.images import png_bytes, render_key_image, safe_name
from sigreport.report.sr import build_sr, write_sr
from sigreport.report.tables import rows_to_csv, table_rows
from sigreport.report.text import render_text, report_context
from sigreport.report.wording import Phrases, load_wording, role_sort_key

IMAGES_DIR = "images"


def ordered_findings(findings: Mapping[str, Any]) -> dict[str, Any]:
    """A copy of ``findings`` with each lesion's ``signal`` and each ROI's ``snr`` keyed in
    reading order of the roles (equal to the input as JSON; only key order changes)."""
    out = json.loads(json.dumps(findings))
    for lesion in out.get("lesions", []):
        if isinstance(lesion.get("signal"), dict):
            lesion["signal"] = {
                k: lesion["signal"][k] for k in sorted(lesion["signal"], key=role_sort_key)
            }
    for roi in out.get("rois", []):
        if isinstance(roi.get("snr"), dict):
            roi["snr"] = {k: roi["snr"][k] for k in sorted(roi["snr"], key=role_sort_key)}
    return out


def findings_json(findings: Mapping[str, Any]) -> str:
    """findings.json text: indent 2, roles in reading order, UTF-8 kept as is, final newline.

    Raises
    ------
    ValueError
        When ``findings`` holds NaN or infinity (not JSON).
    """
    return (
        json.dumps(ordered_findings(findings), indent=2, ensure_ascii=False, allow_nan=False) + "\n"
    )


def key_image_files(
    key_slices: Sequence[KeySlice],
) -> tuple[dict[str, bytes], dict[str, list[dict[str, Any]]]]:
    """The PNGs (file name -> bytes) and, per lesion id, its images in reading order.

    File names are ``<lesion>_<role>.png`` built from sanitized ids only
    (:func:`images.safe_name`), with a numeric suffix when two ids sanitize alike.
    """
    files: dict[str, bytes] = {}
    per_lesion: dict[str, list[dict[str, Any]]] = {}
    ordered = sorted(key_slices, key=lambda k: (str(k.roi_id), role_sort_key(str(k.role))))
    for key in ordered:
        role = str(key.role)
        stem = f"{safe_name(key.roi_id)}_{safe_name(role)}"
        name, n = f"{stem}.png", 1
        while name in files:
            n += 1
            name = f"{stem}-{n}.png"
        png = png_bytes(render_key_image(key))
        files[name] = png
        per_lesion.setdefault(str(key.roi_id), []).append({"png": png, "role": role, "file": name})
    return files, per_lesion


def write_report(
    out_dir: Path,
    findings: dict,
    key_slices: Sequence[KeySlice],
    stacks: Mapping[str, Stack],
    *,
    site_lexicon: Path | None = None,
    force: bool = False,
    extra_files: Mapping[str, bytes] | None = None,
) -> Path:
    """Write every OUTDIR file of interface.md, atomically.

    Files: findings.json, table.csv, report.md, report.txt, report.html, sr.dcm, images/*.png.

    Parameters
    ----------
    out_dir:
        The report folder to create.
    findings:
        The complete findings.json object (schema sigreport-findings/1), written as is.
    key_slices:
        Each lesion's central slice on each series (the key images; the SR's source images).
    stacks:
        Role string -> the stack measured for that role.
    site_lexicon:
        A site lexicon folder (wording, templates, characterization rules).
    force:
        Replace an existing ``out_dir`` (only once the new report is complete).
    extra_files:
        More files for OUTDIR, relative path (``/``-separated, no ``..``) -> bytes, e.g. the
        grown lesions' ``rois/<id>.nii.gz`` and ``rois/<id>-seg.dcm`` (docs/rois.md).

    Returns
    -------
    Path
        ``out_dir / "report.html"``.

    Raises
    ------
    InputError
        When ``out_dir`` exists and ``force`` is false, or the site lexicon is unusable.
    """
    out_dir = Path(out_dir)
    if out_dir.exists() and not force:
        raise InputError(f"output folder {out_dir} exists; use --force to replace it")
    if out_dir.exists() and not out_dir.is_dir():
        raise InputError(f"output path {out_dir} exists and is not a folder")
    parent = out_dir.parent
    parent.mkdir(parents=True, exist_ok=True)
    temp = parent / f".{out_dir.name}.partial-{secrets.token_hex(6)}"
    temp.mkdir()
    try:
        _build(temp, findings, key_slices, stacks, site_lexicon)
        _write_extra(temp, extra_files or {})
        _replace(temp, out_dir)
    except BaseException:
        shutil.rmtree(temp, ignore_errors=True)
        raise
    return out_dir / "report.html"


def _build(
    folder: Path,
    findings: Mapping[str, Any],
    key_slices: Sequence[KeySlice],
    stacks: Mapping[str, Stack],
    site: Path | None,
) -> None:
    wording = load_wording(site)
    phrases = Phrases(site)
    (folder / "findings.json").write_text(findings_json(findings), encoding="utf-8")
    (folder / "table.csv").write_text(
        rows_to_csv(table_rows(findings)), encoding="utf-8", newline=""
    )
    context = report_context(findings, wording, phrases)
    markdown, plain = render_text(context, site)
    (folder / "report.md").write_text(markdown, encoding="utf-8")
    (folder / "report.txt").write_text(plain, encoding="utf-8")
    files, per_lesion = key_image_files(key_slices)
    (folder / IMAGES_DIR).mkdir()
    for name, png in files.items():
        (folder / IMAGES_DIR / name).write_bytes(png)
    html = render_html(context, findings, per_lesion, wording, site)
    (folder / "report.html").write_text(html, encoding="utf-8")
    write_sr(folder / "sr.dcm", build_sr(findings, key_slices, stacks))


def _write_extra(folder: Path, files: Mapping[str, bytes]) -> None:
    for name, content in files.items():
        parts = name.split("/")
        if not name or name.startswith("/") or any(p in ("", ".", "..") for p in parts):
            raise ValueError(f'Argument "extra_files" has an unsafe path {name!r}.')
        path = folder.joinpath(*parts)
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_bytes(content)


def _replace(temp: Path, out_dir: Path) -> None:
    """Move the complete ``temp`` onto ``out_dir``; an old ``out_dir`` is first renamed aside
    and removed only once the new one is in place (restored if the rename fails)."""
    if not out_dir.exists():
        os.replace(temp, out_dir)
        return
    aside = out_dir.parent / f".{out_dir.name}.old-{secrets.token_hex(6)}"
    os.replace(out_dir, aside)
    try:
        os.replace(temp, out_dir)
    except BaseException:
        os.replace(aside, out_dir)
        raise
    shutil.rmtree(aside, ignore_errors=True)
