"""The report folder (docs/outputs.md, OUTDIR), written atomically.

Everything is built in a hidden sibling folder and renamed onto ``out_dir`` once complete; on
any failure (SIGINT, SIGTERM and SIGHUP included) the temporary folder is removed and the error
re-raised, so a failed run leaves no half-written report behind. The finished folder carries the
tool's mark (:mod:`sigreport.report.outdir`). Without ``force`` the folder is claimed with an
exclusive ``mkdir`` at the end, so a run never replaces a folder that appeared while it was
writing; with ``force`` an existing folder is replaced only after the new one is complete, and
only when it is the tool's own (checked again once it has been moved aside).
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
from sigreport.lexicon_tables import Lexicon, load_lexicon
from sigreport.model import KeySlice, LesionPhrases, Progress, Stack, role_sort_key, say
from sigreport.report.findings import phrases_from_findings
from sigreport.report.html import render_html
from sigreport.report.images import png_bytes, render_key_image, safe_name
from sigreport.report.outdir import (
    check_outdir,
    exit_on_termination,
    hidden_sibling,
    replace_problem,
    shown,
    write_mark,
)
from sigreport.report.sr import build_sr, write_sr
from sigreport.report.tables import rows_to_csv, table_rows
from sigreport.report.text import render_text, report_context

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
    lexicon: Lexicon | None = None,
    phrases: Mapping[str, LesionPhrases] | None = None,
    progress: Progress | None = None,
) -> Path:
    """Write every OUTDIR file (docs/outputs.md), atomically.

    Files: findings.json, table.csv, report.md, report.txt, report.html, sr.dcm, images/*.png.

    Parameters
    ----------
    out_dir:
        The report folder to create.
    findings:
        The complete findings.json object (schema sigreport-findings/2), written as is.
    key_slices:
        Each lesion's central slice on each series (the key images; the SR's source images).
    stacks:
        Role string -> the stack measured for that role.
    site_lexicon:
        A site lexicon folder (wording, templates, characterization rules); read only when
        ``lexicon`` is not given.
    force:
        Replace an existing ``out_dir`` (only once the new report is complete, and only a
        folder the tool marked as its own).
    lexicon:
        The run's lexicon (:func:`sigreport.lexicon_tables.load_lexicon`).
    phrases:
        Lesion id -> the words characterization chose (:func:`report.findings.lesion_phrases`);
        None for a findings object without its characterization (a findings.json read back):
        the words then come from the lexicon (:func:`report.findings.phrases_from_findings`).
    progress:
        Told about each file as it is written.

    Returns
    -------
    Path
        ``out_dir / "report.html"``.

    Raises
    ------
    InputError
        When ``out_dir`` exists and ``force`` is false, exists but is not the tool's own folder,
        appeared while writing, cannot be written (permissions, space, names too long), or the
        site lexicon is unusable.
    """
    out_dir = Path(out_dir)
    check_outdir(out_dir, force=force)
    if lexicon is None:
        lexicon = load_lexicon(site_lexicon)
    if phrases is None:
        phrases = phrases_from_findings(findings, lexicon.rules)
    try:
        out_dir.parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise _cannot_write(out_dir, exc) from None
    temp = hidden_sibling(out_dir, "partial", secrets.token_hex(6))
    with exit_on_termination():
        try:
            temp.mkdir()
        except OSError as exc:
            raise _cannot_write(out_dir, exc) from None
        try:
            try:
                _build(temp, findings, key_slices, stacks, lexicon, phrases, progress)
                write_mark(temp, kind="report")
            except OSError as exc:
                raise _cannot_write(out_dir, exc) from None
            _install(temp, out_dir, force=force)
        except BaseException:
            shutil.rmtree(temp, ignore_errors=True)
            raise
    return out_dir / "report.html"


def _cannot_write(out_dir: Path, exc: OSError) -> InputError:
    where = f" ({Path(exc.filename).name})" if exc.filename else ""
    return InputError(
        f"cannot write the report folder {shown(out_dir)}: {exc.strerror or exc}{where}"
    )


def _build(
    folder: Path,
    findings: Mapping[str, Any],
    key_slices: Sequence[KeySlice],
    stacks: Mapping[str, Stack],
    lexicon: Lexicon,
    phrases: Mapping[str, LesionPhrases],
    progress: Progress | None,
) -> None:
    total = 6
    say(progress, "writing findings.json", 0, total)
    (folder / "findings.json").write_text(findings_json(findings), encoding="utf-8")
    say(progress, "writing table.csv", 1, total)
    (folder / "table.csv").write_text(
        rows_to_csv(table_rows(findings)), encoding="utf-8", newline=""
    )
    say(progress, "writing report.md and report.txt", 2, total)
    context = report_context(findings, lexicon.wording, phrases)
    markdown, plain = render_text(context, lexicon.site)
    (folder / "report.md").write_text(markdown, encoding="utf-8")
    (folder / "report.txt").write_text(plain, encoding="utf-8")
    say(progress, "writing the key images", 3, total)
    files, per_lesion = key_image_files(key_slices)
    (folder / IMAGES_DIR).mkdir()
    for name, png in files.items():
        (folder / IMAGES_DIR / name).write_bytes(png)
    say(progress, "writing report.html", 4, total)
    html = render_html(
        context, findings, per_lesion, lexicon.wording, lexicon.site, iso_band=lexicon.iso_band
    )
    (folder / "report.html").write_text(html, encoding="utf-8")
    say(progress, "writing sr.dcm", 5, total)
    write_sr(folder / "sr.dcm", build_sr(findings, key_slices, stacks))
    say(progress, "report written", total, total)


def _install(temp: Path, out_dir: Path, *, force: bool) -> None:
    """Put the complete ``temp`` in place of ``out_dir``.

    An absent ``out_dir`` is claimed with ``mkdir`` (atomic: of two runs, one wins) and ``temp``
    renamed onto the empty folder. With ``force``, an existing folder is first renamed aside,
    checked to be the tool's own (after the move, so nothing can change it between the check and
    the deletion), and removed only once the new one is in place; it is restored otherwise.
    """
    try:
        os.mkdir(out_dir)
    except FileExistsError:
        if not force:
            raise InputError(
                f"{shown(out_dir)} appeared while this run was writing it (another run?); "
                "it was left as it is and this run's report was not kept"
            ) from None
    except OSError as exc:
        raise _cannot_write(out_dir, exc) from None
    else:
        try:
            os.rename(temp, out_dir)
        except OSError as exc:
            _remove_empty(out_dir)
            raise _cannot_write(out_dir, exc) from None
        return
    aside = hidden_sibling(out_dir, "old", secrets.token_hex(6))
    try:
        os.rename(out_dir, aside)
    except OSError as exc:
        raise _cannot_write(out_dir, exc) from None
    try:
        problem = replace_problem(aside)
        if problem is not None:
            raise InputError(problem.replace(shown(aside), shown(out_dir)))
        os.rename(temp, out_dir)
    except BaseException as exc:
        # Refused, failed or interrupted (Ctrl-C, SIGTERM): the old folder goes back.
        if not os.path.lexists(out_dir):
            os.rename(aside, out_dir)
        if isinstance(exc, OSError):
            raise _cannot_write(out_dir, exc) from None
        raise
    shutil.rmtree(aside, ignore_errors=True)


def _remove_empty(folder: Path) -> None:
    try:
        os.rmdir(folder)
    except OSError:
        pass
