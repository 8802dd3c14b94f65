"""Series role inference from acquisition physics (docs/usage.md, Series roles).

The header decides: repetition, echo and inversion time, flip angle, scanning sequence and
variant, scan options (fat suppression), contrast agent, b-value and image type. The series
description is read only to recognise localizers and screen captures, and to break a tie
between roles the physics allows. Every band is data in ``lexicon/roles.toml``.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from sigreport.errors import InputError
from sigreport.lexicon import check_keys, find_file, read_table
from sigreport.model import Acquisition, Role

LEXICON_FILE = "roles.toml"

_SCHEMA: dict[str, dict[str, str]] = {
    "spin_echo": {
        "t1_tr_ms": "band",
        "t1_te_ms": "band",
        "long_tr_ms": "band",
        "pd_te_ms": "band",
        "t2_te_ms": "band",
    },
    "gradient_echo": {
        "t1_tr_ms": "band",
        "t1_te_ms": "band",
        "t1_flip_deg": "band",
        "t2star_te_ms": "band",
        "t2star_flip_deg": "band",
    },
    "inversion": {
        "stir_ti_ms": "band",
        "t1_prep_ti_ms": "band",
        "flair_ti_ms": "band",
        "flair_te_ms": "band",
        "t1_prep_te_ms": "band",
    },
    "diffusion": {"dwi_min_b": "number"},
    "scan_options": {"fat_suppression": "words", "fat_suppression_enhanced": "words"},
    "image_type": {
        "adc": "words",
        "unmeasurable": "words",
        "diffusion": "words",
        "localizer": "words",
    },
    "description": {
        "localizer": "words",
        "screen_capture": "words",
        "post_contrast": "words",
        "pre_contrast": "words",
        "T1": "words",
        "T2": "words",
        "PD": "words",
        "FLAIR": "words",
        "T2STAR": "words",
    },
    "confidence": {
        "clean": "unit",
        "partial": "unit",
        "tie_break": "unit",
        "unknown_sequence_factor": "unit",
    },
}


@dataclass(frozen=True)
class RoleBands:
    """The validated content of ``roles.toml``: ``section -> key -> value``."""

    source: str
    table: dict[str, dict[str, Any]]

    def band(self, section: str, key: str) -> tuple[float, float]:
        low, high = self.table[section][key]
        return float(low), float(high)

    def number(self, section: str, key: str) -> float:
        return float(self.table[section][key])

    def words(self, section: str, key: str) -> frozenset[str]:
        return frozenset(str(w).upper() for w in self.table[section][key])


def load_role_bands(site_lexicon: Path | None = None) -> RoleBands:
    """Load and validate ``roles.toml`` (the site's copy first).

    Raises
    ------
    InputError
        When a section or key is unknown or missing, or a value has the wrong shape; the message
        names the file and the key.
    """
    path = find_file(LEXICON_FILE, site_lexicon)
    table = read_table(LEXICON_FILE, site_lexicon)
    where = str(path)
    check_keys(table, set(_SCHEMA), where)
    for section, keys in _SCHEMA.items():
        if section not in table or not isinstance(table[section], dict):
            raise InputError(f"{where}: missing table [{section}]")
        check_keys(table[section], set(keys), f"{where} [{section}]")
        for key, kind in keys.items():
            if key not in table[section]:
                raise InputError(f"{where} [{section}]: missing key {key}")
            _check_value(table[section][key], kind, f"{where} [{section}] {key}")
    return RoleBands(source=where, table=table)


def _check_value(value: Any, kind: str, where: str) -> None:
    def is_num(v: Any) -> bool:
        return isinstance(v, int | float) and not isinstance(v, bool)

    if kind == "band":
        ok = isinstance(value, list) and len(value) == 2 and all(map(is_num, value))
        if not ok or value[0] > value[1]:
            raise InputError(
                f"{where}: expected [low, high] numbers with low <= high, got {value!r}"
            )
    elif kind == "number":
        if not is_num(value):
            raise InputError(f"{where}: expected a number, got {value!r}")
    elif kind == "unit":
        if not is_num(value) or not 0.0 <= value <= 1.0:
            raise InputError(f"{where}: expected a number in [0, 1], got {value!r}")
    elif kind == "words":
        if not isinstance(value, list) or not all(isinstance(w, str) for w in value):
            raise InputError(f"{where}: expected a list of strings, got {value!r}")


def _in(value: float | None, band: tuple[float, float]) -> bool:
    return value is not None and band[0] <= value <= band[1]


def _fmt(value: float) -> str:
    return f"{value:.0f}" if abs(value) >= 10 else f"{value:.3g}"


def _words(text: str) -> set[str]:
    """Whole words of a description (keeping ``+``, ``*`` and ``-`` inside words)."""
    return {w for w in re.split(r"[\s_/\\,;:()\[\]]+", text.upper()) if w}


def _mentions(description: str, words: frozenset[str]) -> bool:
    found = _words(description)
    return any(w in found for w in words)


@dataclass(frozen=True)
class _Evidence:
    family: str  # "spin echo", "gradient echo", "echo planar", "unknown sequence"
    inversion: bool
    fat_sat: bool
    contrast: bool


def infer_role(
    acq: Acquisition, description: str = "", *, site_lexicon: Path | None = None
) -> tuple[Role, str, float]:
    """Infer a series' role from its acquisition header.

    Parameters
    ----------
    acq
        The acquisition header values of the series (one stack).
    description
        The series description; read only to recognise localizers and screen captures and to
        break a tie between roles the physics allows.
    site_lexicon
        A site lexicon folder whose ``roles.toml`` replaces the bundled one.

    Returns
    -------
    tuple
        ``(role, reason, confidence)``: the role, a one-line reason naming the values used
        (e.g. ``"spin echo, TR 4000 ms, TE 100 ms, no inversion, no fat saturation"``) and a
        confidence in [0, 1]. Ambiguous or unsupported settings give ``Role.UNKNOWN`` with the
        reason.
    """
    bands = load_role_bands(site_lexicon)
    return _infer(acq, description or "", bands)


def _infer(acq: Acquisition, description: str, b: RoleBands) -> tuple[Role, str, float]:
    conf_clean = b.number("confidence", "clean")
    conf_partial = b.number("confidence", "partial")
    conf_tie = b.number("confidence", "tie_break")
    image_type = {t.upper() for t in acq.image_type}

    # Localizers and screen captures first: never measured (docs/usage.md).
    if image_type & b.words("image_type", "localizer") or _mentions(
        description, b.words("description", "localizer")
    ):
        return Role.UNKNOWN, "localizer (ImageType or series description)", conf_clean
    if _mentions(description, b.words("description", "screen_capture")):
        return Role.UNKNOWN, f"screen capture or report (description {description!r})", conf_clean

    # Diffusion-derived maps: ADC is a role, other derived images are not.
    if image_type & b.words("image_type", "adc"):
        shown = "\\".join(acq.image_type)
        return Role.ADC, f"ADC map (ImageType {shown})", conf_clean
    diffusion_type = bool(image_type & b.words("image_type", "diffusion"))
    unmeasurable = image_type & b.words("image_type", "unmeasurable")
    if unmeasurable:
        kinds = ", ".join(sorted(unmeasurable))
        return Role.UNKNOWN, f"derived or non-magnitude image (ImageType {kinds})", conf_clean
    if "DERIVED" in image_type and not diffusion_type:
        return Role.UNKNOWN, "derived image that is not an ADC map or diffusion trace", conf_clean

    ev = _evidence(acq, b)
    dwi_min_b = b.number("diffusion", "dwi_min_b")
    bval = acq.b_value
    if bval is not None and bval >= dwi_min_b:
        return Role.DWI, f"diffusion weighted, b {_fmt(bval)} s/mm2 ({ev.family})", conf_clean
    if diffusion_type and bval is None:
        return Role.DWI, "diffusion image (ImageType), b-value not in header", conf_partial
    if bval is not None and (diffusion_type or ev.family == "echo planar"):
        return (
            Role.UNKNOWN,
            f"b {_fmt(bval)} s/mm2 diffusion reference image (below b {_fmt(dwi_min_b)})",
            conf_clean,
        )
    if ev.family == "echo planar":
        return (
            Role.UNKNOWN,
            "echo planar without diffusion weighting (functional or perfusion series)",
            conf_clean,
        )

    tr, te, ti = acq.repetition_time_ms, acq.echo_time_ms, acq.inversion_time_ms
    parts = [ev.family]
    if tr is not None:
        parts.append(f"TR {_fmt(tr)} ms")
    if te is not None:
        parts.append(f"TE {_fmt(te)} ms")
    if ev.inversion:
        parts.append(f"TI {_fmt(ti)} ms" if ti is not None else "inversion, TI not given")
    else:
        parts.append("no inversion")
    if ev.family == "gradient echo" and acq.flip_angle_deg is not None:
        parts.append(f"flip {_fmt(acq.flip_angle_deg)} deg")
    parts.append("fat saturation" if ev.fat_sat else "no fat saturation")
    if ev.contrast:
        parts.append(f"contrast {acq.contrast_agent}")
    physics = ", ".join(parts)

    if te is None or (tr is None and not ev.inversion):
        return Role.UNKNOWN, f"{physics}: TR/TE missing from the header", conf_clean

    candidates, note = _candidates(acq, ev, b)
    if not candidates:
        return Role.UNKNOWN, f"{physics}: {note}", conf_clean
    confidence = conf_clean if not note else conf_partial
    if ev.family == "unknown sequence":
        confidence *= b.number("confidence", "unknown_sequence_factor")
    if len(candidates) > 1:
        chosen = [r for r in candidates if _mentions(description, b.words("description", r.value))]
        names = " or ".join(r.value for r in candidates)
        if len(chosen) != 1:
            return Role.UNKNOWN, f"{physics}: ambiguous between {names}", conf_clean
        role = chosen[0]
        physics += f"; {names} by physics, {role.value} by description"
        confidence = min(confidence, conf_tie)
    else:
        role = candidates[0]
        if note:
            physics += f" ({note})"

    if role == Role.PD and ev.fat_sat:
        return (
            Role.UNKNOWN,
            f"{physics}: proton density with fat saturation has no role",
            conf_clean,
        )
    if role == Role.T2 and ev.fat_sat:
        role = Role.T2FS
    if role == Role.T1:
        post = ev.contrast
        if not post and acq.contrast_agent is None:
            if _mentions(description, b.words("description", "post_contrast")) and not _mentions(
                description, b.words("description", "pre_contrast")
            ):
                post = True
                physics += "; no contrast agent in header, description says post-contrast"
                confidence = min(confidence, conf_tie)
        if post:
            role = Role.T1POSTFS if ev.fat_sat else Role.T1POST
        elif ev.fat_sat:
            role = Role.T1FS
    return role, physics, round(float(confidence), 3)


def _evidence(acq: Acquisition, b: RoleBands) -> _Evidence:
    seq = {s.upper() for s in acq.scanning_sequence}
    pulse = (acq.echo_pulse_sequence or "").upper()
    if "EP" in seq:
        family = "echo planar"
    elif "SE" in seq or pulse in ("SPIN", "BOTH"):
        family = "spin echo"
    elif "GR" in seq or pulse == "GRADIENT":
        family = "gradient echo"
    elif "IR" in seq:
        family = "spin echo"  # inversion recovery with a spin-echo readout (PS3.3 C.8.3.1)
    else:
        family = "unknown sequence"
    ti = acq.inversion_time_ms
    if acq.inversion_recovery is not None:
        inversion = acq.inversion_recovery
    elif seq:
        inversion = "IR" in seq
    else:
        inversion = ti is not None and ti > 0
    options = {o.upper() for o in acq.scan_options}
    fat_sat = bool(options & b.words("scan_options", "fat_suppression")) or (
        (acq.spectrally_selected_suppression or "").upper()
        in b.words("scan_options", "fat_suppression_enhanced")
    )
    agent = (acq.contrast_agent or "").strip().upper()
    contrast = bool(agent) and agent not in ("NONE", "NO", "N/A", "NA")
    return _Evidence(family=family, inversion=inversion, fat_sat=fat_sat, contrast=contrast)


def _candidates(acq: Acquisition, ev: _Evidence, b: RoleBands) -> tuple[list[Role], str]:
    """Roles the physics allows, and a note when the match is partial (or why none fits)."""
    tr, te, ti, flip = (
        acq.repetition_time_ms,
        acq.echo_time_ms,
        acq.inversion_time_ms,
        acq.flip_angle_deg,
    )
    assert te is not None
    if ev.inversion:
        if ti is None or ti <= 0:
            return [], "inversion recovery without an inversion time"
        if _in(ti, b.band("inversion", "stir_ti_ms")):
            return [Role.STIR], ""  # fat null: STIR suppresses fat by itself
        if _in(ti, b.band("inversion", "flair_ti_ms")):
            if _in(te, b.band("inversion", "flair_te_ms")):
                return [Role.FLAIR], ""
            return [], "fluid-nulling TI with a short TE fits no role"
        if _in(ti, b.band("inversion", "t1_prep_ti_ms")):
            if _in(te, b.band("inversion", "t1_prep_te_ms")):
                return [Role.T1], ""  # MPRAGE-like or T1-FLAIR: T1 weighted
            return [], "T1-preparation TI with a long TE fits no role"
        return [], "TI fits neither fat nulling, T1 preparation nor fluid nulling"

    if ev.family == "gradient echo":
        seqvar = {v.upper() for v in acq.sequence_variant}
        if ("SS" in seqvar or "TRSS" in seqvar) and "SP" not in seqvar:
            return [], "steady-state free precession (mixed T2/T1 contrast)"
        if _in(te, b.band("gradient_echo", "t2star_te_ms")):
            if flip is None:
                return [Role.T2STAR], "flip angle not given"
            if _in(flip, b.band("gradient_echo", "t2star_flip_deg")):
                return [Role.T2STAR], ""
            return [], "long TE with a large flip angle fits no role"
        if _in(te, b.band("gradient_echo", "t1_te_ms")):
            if tr is not None and not _in(tr, b.band("gradient_echo", "t1_tr_ms")):
                return [], "short-TE gradient echo with a long TR (proton density like)"
            if flip is None:
                return [Role.T1], "flip angle not given"
            if _in(flip, b.band("gradient_echo", "t1_flip_deg")):
                return [Role.T1], ""
            return [], "short-TE gradient echo with a small flip (proton density like)"
        return [], "TE between the T1 and T2* gradient-echo bands"

    # Spin echo (and sequences of unknown type, judged by spin-echo bands).
    assert tr is not None
    short_tr = _in(tr, b.band("spin_echo", "t1_tr_ms")) or tr < b.band("spin_echo", "t1_tr_ms")[0]
    long_tr = _in(tr, b.band("spin_echo", "long_tr_ms"))
    short_te = _in(te, b.band("spin_echo", "t1_te_ms"))
    pd_te = _in(te, b.band("spin_echo", "pd_te_ms"))
    long_te = _in(te, b.band("spin_echo", "t2_te_ms"))
    if short_tr and short_te:
        return [Role.T1], ""
    if long_tr and long_te:
        return [Role.T2], ""
    if long_tr and pd_te:
        return [Role.PD], ""
    if short_tr and long_te:
        return [], "short TR with a long TE fits no weighting"
    if long_tr:
        return [Role.PD, Role.T2], ""
    if not short_tr and not long_tr and long_te:
        return [Role.T2], "TR short for T2 weighting"
    if not short_tr and not long_tr and short_te:
        return [Role.T1, Role.PD], ""
    if short_tr:
        return [], "TE between the T1 and T2 bands with a short TR"
    return [Role.T1, Role.PD, Role.T2], ""
