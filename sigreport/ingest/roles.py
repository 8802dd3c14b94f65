"""Series role inference from acquisition physics (docs/usage.md, Series roles).

The header decides: repetition, echo and inversion time, flip angle, scanning sequence and
variant, scan options (fat suppression), contrast agent, b-value and image type. The series
description is read only to recognise localizers and screen captures, and to break a tie
between roles the physics allows. Every band is data in ``lexicon/roles.toml``.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

from sigreport.errors import InputError
from sigreport.lexicon import check_keys, find_file, read_table
from sigreport.model import Acquisition, Role, Stack

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
        "sequence_name_prefixes": "words",
    },
    "diffusion": {"dwi_min_b": "number", "directional": "words"},
    "scan_options": {
        "fat_suppression": "words",
        "fat_suppression_enhanced": "words",
        "fat_excitation_enhanced": "words",
    },
    "image_type": {
        "adc": "words",
        "unmeasurable": "words",
        "diffusion": "words",
        "localizer": "words",
        "water": "words",
        "fat": "words",
        "in_phase": "words",
        "opposed_phase": "words",
        "swi": "words",
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
        "STIR": "words",
        "T2STAR": "words",
        "SWI": "words",
        "ADC": "words",
    },
    "enhanced": {
        "T1": "words",
        "T2": "words",
        "PD": "words",
        "FLAIR": "words",
        "STIR": "words",
        "T2STAR": "words",
        "diffusion": "words",
        "unmeasurable": "words",
        "not_magnitude": "words",
    },
    "chemical_shift": {
        "fat_water_shift_ppm": "number",
        "gyromagnetic_mhz_per_t": "number",
        "phase_tolerance_cycles": "number",
    },
    "localizer": {
        "max_tr_ms": "number",
        "max_te_ms": "number",
        "max_slices_per_plane": "number",
        "min_planes": "number",
    },
    "scout_3d": {
        "max_tr_ms": "number",
        "max_te_ms": "number",
        "min_pixel_mm": "number",
        "max_matrix": "number",
        "max_slices": "number",
        "min_slab_step_mm": "number",
        "measurable_words": "words",
    },
    "confidence": {
        "stated": "unit",
        "clean": "unit",
        "near_edge": "unit",
        "edge_margin": "unit",
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


def tokens(text: str) -> tuple[str, ...]:
    """A description cut into upper-case tokens: runs of letters, digits and ``*``, and each
    ``+`` on its own; everything else separates. "anat-scout" -> (ANAT, SCOUT),
    "AX T1+C" -> (AX, T1, +, C), "T2*_gre" -> (T2*, GRE)."""
    return tuple(re.findall(r"[A-Z0-9*]+|\+", text.upper()))


def _mentions(description: str, words: frozenset[str]) -> bool:
    """True when the description holds one of ``words``, each matched as its own token run
    (an entry of several tokens, such as "3-plane", matches those tokens in a row)."""
    found = tokens(description)
    if not found:
        return False
    for word in words:
        wanted = tokens(word)
        n = len(wanted)
        if n and any(found[i : i + n] == wanted for i in range(len(found) - n + 1)):
            return True
    return False


@dataclass(frozen=True)
class _Evidence:
    family: str  # "spin echo", "gradient echo", "echo planar", "unknown sequence"
    inversion: bool
    fat_sat: bool
    contrast: bool
    fat_sat_reason: str = ""  # e.g. "fat saturation", "water excitation (fat suppressed)"


def infer_role(
    acq: Acquisition, description: str = "", *, site_lexicon: Path | None = None
) -> tuple[Role, str, float | None]:
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
        confidence in [0, 1] that says how the role was decided (lexicon ``[confidence]``,
        docs/ingestion.md): a standard attribute naming it, physics well inside its bands,
        physics near a band edge, a missing value, the description breaking a tie. Ambiguous or
        unsupported settings give ``Role.UNKNOWN`` with the reason and no confidence (None):
        there is no role to be sure of.
    """
    bands = load_role_bands(site_lexicon)
    return _infer(acq, description or "", bands)


def _infer(acq: Acquisition, description: str, b: RoleBands) -> tuple[Role, str, float | None]:
    """:func:`_decide`, with no confidence for UNKNOWN, and the rule for several echo times in
    one image (``Acquisition.echo_times_in_image_ms``)."""
    values = acq.echo_times_in_image_ms
    if len(values) >= 2:
        shown = "\\".join(_fmt(v) for v in values)
        if acq.echo_time_ms is not None:
            # The vendor lists every echo; EchoNumbers picked this image's own.
            role, reason, confidence = _decide(acq, description, b)
            reason += f"; EchoTime lists {shown} ms, echo {acq.echo_number} taken"
        else:
            # A combined image (echoes summed or averaged): the role must hold over the whole
            # range of echo times, else it is not one weighting.
            low = _decide(replace(acq, echo_time_ms=min(values)), description, b)
            high = _decide(replace(acq, echo_time_ms=max(values)), description, b)
            if low[0] != high[0]:
                return (
                    Role.UNKNOWN,
                    f"EchoTime holds several values ({shown} ms) in one image: "
                    f"{low[0].value} at TE {_fmt(min(values))} ms, {high[0].value} at TE "
                    f"{_fmt(max(values))} ms, not one weighting",
                    None,
                )
            role, reason = (
                low[0],
                (
                    f"{low[1]}; EchoTime holds several values ({shown} ms) in one image (combined "
                    f"echoes), {low[0].value} over the whole range"
                ),
            )
            confidence = min(low[2], high[2], b.number("confidence", "partial"))
        return role, reason, (None if role is Role.UNKNOWN else confidence)
    role, reason, confidence = _decide(acq, description, b)
    return role, reason, (None if role is Role.UNKNOWN else confidence)


def _decide(acq: Acquisition, description: str, b: RoleBands) -> tuple[Role, str, float]:
    """The order of decisions (docs/ingestion.md, Roles): what the image is (localizer, screen
    capture, non-magnitude, Dixon / chemical-shift / SWI / ADC / derived ImageType values) ->
    Enhanced MR AcquisitionContrast -> diffusion -> physics (TR, TE, TI, flip, sequence) ->
    description as a tie-break -> fat suppression and contrast modifiers."""
    conf_stated = b.number("confidence", "stated")
    conf_clean = b.number("confidence", "clean")
    conf_edge = b.number("confidence", "near_edge")
    conf_partial = b.number("confidence", "partial")
    conf_tie = b.number("confidence", "tie_break")
    image_type = {t.upper() for t in acq.image_type}
    # Values 3 on of ImageType / FrameType name the image's flavour (PS3.3 C.7.6.1.1.2,
    # C.8.16.1); values 1-2 are ORIGINAL/DERIVED and PRIMARY/SECONDARY.
    flavour = {t.upper() for t in acq.image_type[2:]}
    shown = "\\".join(acq.image_type)

    # Localizers and screen captures first: never measured (docs/usage.md).
    if image_type & b.words("image_type", "localizer") or _mentions(
        description, b.words("description", "localizer")
    ):
        return Role.UNKNOWN, "localizer (ImageType or series description)", conf_clean
    if _mentions(description, b.words("description", "screen_capture")):
        return Role.UNKNOWN, f"screen capture or report (description {description!r})", conf_clean
    component = (acq.complex_image_component or "").upper()
    if component in b.words("enhanced", "not_magnitude"):
        return Role.UNKNOWN, f"ComplexImageComponent {component}: not a magnitude image", conf_clean

    # What the image is, by its ImageType values (before the derived rule: Dixon, SWI and ADC
    # images are often DERIVED).
    if image_type & b.words("image_type", "adc"):
        return Role.ADC, f"ADC map (ImageType {shown})", conf_stated
    unmeasurable = image_type & b.words("image_type", "unmeasurable")
    if unmeasurable:
        kinds = ", ".join(sorted(unmeasurable))
        return Role.UNKNOWN, f"derived or non-magnitude image (ImageType {kinds})", conf_clean
    for key, role in (
        ("water", Role.WATER),
        ("fat", Role.FAT),
        ("in_phase", Role.IP),
        ("opposed_phase", Role.OP),
        ("swi", Role.SWI),
    ):
        if flavour & b.words("image_type", key):
            return role, f"{_ROLE_NAMES[role]} (ImageType {shown})", conf_stated
    diffusion_type = bool(image_type & b.words("image_type", "diffusion"))
    if "DERIVED" in image_type and not diffusion_type:
        if _evidence(acq, b).family == "echo planar" and _mentions(
            description, b.words("description", "ADC")
        ):
            return (
                Role.ADC,
                f"derived echo planar image without ADC in ImageType ({shown}); ADC by description",
                conf_tie,
            )
        return Role.UNKNOWN, "derived image that is not an ADC map or diffusion trace", conf_clean

    # The Enhanced MR AcquisitionContrast (standard attribute) names the intended weighting.
    stated = _stated_contrast(acq, b)
    if stated == "unmeasurable":
        return (
            Role.UNKNOWN,
            f"AcquisitionContrast {acq.acquisition_contrast}: no measurable role",
            conf_clean,
        )

    ev = _evidence(acq, b)
    dwi_min_b = b.number("diffusion", "dwi_min_b")
    bval = acq.b_value
    directionality = (acq.diffusion_directionality or "").upper()
    diffusion_stated = diffusion_type or stated == "diffusion"
    if bval is not None and bval >= dwi_min_b:
        if directionality in b.words("diffusion", "directional"):
            return (
                Role.UNKNOWN,
                f"b {_fmt(bval)} s/mm2, one diffusion direction (DiffusionDirectionality "
                f"{directionality}): not a trace",
                conf_clean,
            )
        return Role.DWI, f"diffusion weighted, b {_fmt(bval)} s/mm2 ({ev.family})", conf_stated
    if diffusion_stated and bval is None:
        return Role.DWI, "diffusion image (ImageType), b-value not in header", conf_partial
    if bval is not None and (diffusion_stated or ev.family == "echo planar"):
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
        if ti is None:
            parts.append("inversion, TI not given")
        elif acq.inversion_time_source:
            parts.append(f"TI {_fmt(ti)} ms ({acq.inversion_time_source})")
        else:
            parts.append(f"TI {_fmt(ti)} ms")
    else:
        parts.append("no inversion")
    if ev.family == "gradient echo" and acq.flip_angle_deg is not None:
        parts.append(f"flip {_fmt(acq.flip_angle_deg)} deg")
    parts.append(ev.fat_sat_reason or "no fat saturation")
    if ev.contrast:
        parts.append(f"contrast {acq.contrast_agent}")
    physics = ", ".join(parts)

    stated_role = _STATED_ROLES.get(stated or "")
    if te is None or (tr is None and not ev.inversion):
        if stated_role is None:
            return Role.UNKNOWN, f"{physics}: TR/TE missing from the header", conf_clean
        candidates, note = [stated_role], "TR/TE missing from the header"
        matched: list[tuple[str, float, tuple[float, float]]] = []
    else:
        matched = []
        candidates, note = _candidates(acq, ev, b, matched)
    confidence = conf_clean if not note else conf_partial
    margin = b.number("confidence", "edge_margin")
    edges = []
    for name, value, band in matched:
        edge = _near_edge(value, band, margin)
        if edge is not None:
            unit = "deg" if name == "flip" else "ms"
            edges.append(f"{name} {_fmt(value)} {unit} near the band edge {_fmt(edge)} {unit}")
    if edges and not note and len(candidates) == 1:
        physics_edges = "; " + ", ".join(edges)
        confidence = conf_edge
    else:
        physics_edges = ""
    if stated_role is not None:
        # The standard attribute decides over the physics; the physics is reported beside it.
        if stated_role in candidates:
            physics += f"; AcquisitionContrast {acq.acquisition_contrast}"
            confidence = conf_stated
            physics_edges = ""
        else:
            alone = " or ".join(r.value for r in candidates) if candidates else note
            physics += f"; AcquisitionContrast {acq.acquisition_contrast} (physics alone: {alone})"
            confidence = conf_partial
        candidates, note = [stated_role], ""
    if not candidates:
        return Role.UNKNOWN, f"{physics}: {note}", conf_clean
    if ev.family == "unknown sequence" and stated_role is None:
        confidence *= b.number("confidence", "unknown_sequence_factor")
    if len(candidates) > 1:
        chosen = [r for r in candidates if _mentions(description, b.words("description", r.value))]
        names = " or ".join(r.value for r in candidates)
        if len(chosen) != 1:
            why = f" ({note})" if note else ""
            return Role.UNKNOWN, f"{physics}: ambiguous between {names}{why}", conf_clean
        role = chosen[0]
        physics += f"; {names} by physics, {role.value} by description"
        if note:
            physics += f" ({note})"
        confidence = min(confidence, conf_tie)
    else:
        role = candidates[0]
        if note:
            physics += f" ({note})"
        physics += physics_edges

    if role == Role.T2STAR and _mentions(description, b.words("description", "SWI")):
        role = Role.SWI
        physics += "; susceptibility weighted by description"
        confidence = min(confidence, conf_tie)
    if role == Role.T1 and ev.family == "gradient echo" and not ev.inversion:
        shifted = _chemical_shift_phase(acq, b)
        if shifted is not None:
            role, why = shifted
            return role, f"{physics}; {why}", round(float(confidence), 3)
        if len(acq.series_echo_times_ms) >= 2:
            return (
                Role.UNKNOWN,
                f"{physics}: multi-echo gradient echo whose echo is neither in phase nor opposed "
                f"phase at the header's field strength ({acq.magnetic_field_strength_t} T)",
                conf_clean,
            )
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


_ROLE_NAMES = {
    Role.WATER: "Dixon water image",
    Role.FAT: "Dixon fat image",
    Role.IP: "in-phase image",
    Role.OP: "opposed-phase image",
    Role.SWI: "susceptibility-weighted image",
}
_STATED_ROLES = {
    "T1": Role.T1,
    "T2": Role.T2,
    "PD": Role.PD,
    "FLAIR": Role.FLAIR,
    "STIR": Role.STIR,
    "T2STAR": Role.T2STAR,
}


def _stated_contrast(acq: Acquisition, b: RoleBands) -> str | None:
    """The role key AcquisitionContrast (0008,9209) names: "T1", "T2", "PD", "FLAIR", "STIR",
    "T2STAR", "diffusion", "unmeasurable", or None (absent, MIXED, UNKNOWN)."""
    value = (acq.acquisition_contrast or "").upper()
    if not value:
        return None
    for key in ("T1", "T2", "PD", "FLAIR", "STIR", "T2STAR", "diffusion", "unmeasurable"):
        if value in b.words("enhanced", key):
            return key
    return None


def _chemical_shift_phase(acq: Acquisition, b: RoleBands) -> tuple[Role, str] | None:
    """IP or OP for one echo of a multi-echo short-TR gradient echo, from where its TE falls in
    the fat-water precession cycle at the series' field strength (lexicon [chemical_shift]);
    None for a single-echo series, a missing field strength or a TE between the phases."""
    te, field = acq.echo_time_ms, acq.magnetic_field_strength_t
    if len(acq.series_echo_times_ms) < 2 or te is None or not field:
        return None
    shift_hz = (
        b.number("chemical_shift", "fat_water_shift_ppm")
        * b.number("chemical_shift", "gyromagnetic_mhz_per_t")
        * field
    )  # ppm x MHz = Hz
    cycles = te * 1e-3 * shift_hz
    tol = b.number("chemical_shift", "phase_tolerance_cycles")
    fraction = cycles - int(cycles)
    period = 1000.0 / shift_hz
    where = (
        f"TE {_fmt(te)} ms = {cycles:.2f} fat-water cycles at {field:g} T (period {period:.2f} ms)"
    )
    if min(fraction, 1.0 - fraction) <= tol and cycles >= 0.5:
        return Role.IP, f"multi-echo, in phase: {where}"
    if abs(fraction - 0.5) <= tol:
        return Role.OP, f"multi-echo, opposed phase: {where}"
    return None


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
        inversion = "IR" in seq or _named_inversion(acq.sequence_name, b)
    else:
        inversion = ti is not None and ti > 0 or _named_inversion(acq.sequence_name, b)
    options = {o.upper() for o in acq.scan_options}
    reason = ""
    suppression = (acq.spectrally_selected_suppression or "").upper()
    if suppression in b.words("scan_options", "fat_suppression_enhanced"):
        reason = f"fat saturation (SpectrallySelectedSuppression {suppression})"
    elif (acq.spectrally_selected_excitation or "").upper() in b.words(
        "scan_options", "fat_excitation_enhanced"
    ):
        reason = "water excitation (fat suppressed)"
    elif options & b.words("scan_options", "fat_suppression"):
        reason = "fat saturation"
    agent = (acq.contrast_agent or "").strip().upper()
    contrast = bool(agent) and agent not in ("NONE", "NO", "N/A", "NA")
    return _Evidence(
        family=family,
        inversion=inversion,
        fat_sat=bool(reason),
        contrast=contrast,
        fat_sat_reason=reason,
    )


def _named_inversion(sequence_name: str | None, b: RoleBands) -> bool:
    """True when SequenceName (0018,0024), without its leading ``*`` (one vendor's mark of a
    2-D or 3-D sequence), starts with a lexicon inversion prefix ("tir" in "*tir2d1_16")."""
    name = (sequence_name or "").strip().lstrip("*").upper()
    return bool(name) and any(
        name.startswith(prefix) for prefix in b.words("inversion", "sequence_name_prefixes")
    )


def _near_edge(value: float, band: tuple[float, float], margin: float) -> float | None:
    """The edge of ``band`` that ``value`` lies within ``margin`` of (a fraction of the edge's
    own value), else None: a TR of 760 ms is near the 800 ms edge at a margin of 0.1; a TE of
    2 ms is not near a 0 ms edge."""
    for edge in band:
        if abs(value - edge) <= margin * abs(edge):
            return edge
    return None


def _candidates(
    acq: Acquisition,
    ev: _Evidence,
    b: RoleBands,
    matched: list[tuple[str, float, tuple[float, float]]] | None = None,
) -> tuple[list[Role], str]:
    """Roles the physics allows, and a note when the match is partial (or why none fits).
    Each band a value fell in is appended to ``matched`` as (name, value, band)."""
    tr, te, ti, flip = (
        acq.repetition_time_ms,
        acq.echo_time_ms,
        acq.inversion_time_ms,
        acq.flip_angle_deg,
    )
    assert te is not None

    def _in(name: str, value: float | None, band: tuple[float, float]) -> bool:
        if value is None or not band[0] <= value <= band[1]:
            return False
        if matched is not None:
            matched.append((name, float(value), band))
        return True

    if ev.inversion:
        if ti is None or ti <= 0:
            # Private or missing TI (vendor quirk): the TE narrows it, the description decides.
            if _in("TE", te, b.band("inversion", "flair_te_ms")):
                return [Role.FLAIR, Role.STIR], "inversion time not in the header"
            return [Role.STIR, Role.T1], "inversion time not in the header"
        if _in("TI", ti, b.band("inversion", "stir_ti_ms")):
            return [Role.STIR], ""  # fat null: STIR suppresses fat by itself
        if _in("TI", ti, b.band("inversion", "flair_ti_ms")):
            if _in("TE", te, b.band("inversion", "flair_te_ms")):
                return [Role.FLAIR], ""
            return [], "fluid-nulling TI with a short TE fits no role"
        if _in("TI", ti, b.band("inversion", "t1_prep_ti_ms")):
            if _in("TE", te, b.band("inversion", "t1_prep_te_ms")):
                return [Role.T1], ""  # MPRAGE-like or T1-FLAIR: T1 weighted
            return [], "T1-preparation TI with a long TE fits no role"
        return [], "TI fits neither fat nulling, T1 preparation nor fluid nulling"

    if ev.family == "gradient echo":
        seqvar = {v.upper() for v in acq.sequence_variant}
        if ("SS" in seqvar or "TRSS" in seqvar) and "SP" not in seqvar:
            return [], "steady-state free precession (mixed T2/T1 contrast)"
        if _in("TE", te, b.band("gradient_echo", "t2star_te_ms")):
            if flip is None:
                return [Role.T2STAR], "flip angle not given"
            if _in("flip", flip, b.band("gradient_echo", "t2star_flip_deg")):
                return [Role.T2STAR], ""
            return [], "long TE with a large flip angle fits no role"
        if _in("TE", te, b.band("gradient_echo", "t1_te_ms")):
            if tr is not None and not _in("TR", tr, b.band("gradient_echo", "t1_tr_ms")):
                return [], "short-TE gradient echo with a long TR (proton density like)"
            if flip is None:
                return [Role.T1], "flip angle not given"
            if _in("flip", flip, b.band("gradient_echo", "t1_flip_deg")):
                return [Role.T1], ""
            return [], "short-TE gradient echo with a small flip (proton density like)"
        return [], "TE between the T1 and T2* gradient-echo bands"

    # Spin echo (and sequences of unknown type, judged by spin-echo bands).
    assert tr is not None
    # Below the T1 band is still a short TR: only the band's upper edge is a boundary.
    short_tr = _in("TR", tr, (min(0.0, tr), b.band("spin_echo", "t1_tr_ms")[1]))
    long_tr = _in("TR", tr, b.band("spin_echo", "long_tr_ms"))
    short_te = _in("TE", te, b.band("spin_echo", "t1_te_ms"))
    pd_te = _in("TE", te, b.band("spin_echo", "pd_te_ms"))
    long_te = _in("TE", te, b.band("spin_echo", "t2_te_ms"))
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


def refine_roles_across_stacks(stacks: list[Stack], bands: RoleBands) -> list[Stack]:
    """Decisions that need more than one stack, applied after each stack's own inference.

    - A series whose stacks lie in ``min_planes`` or more planes, each with at most
      ``max_slices_per_plane`` slices, at a TR and TE at or below the lexicon's localizer limits
      is a (three-plane) localizer, whatever its description says: UNKNOWN.
    - DWI is the highest-b trace of the study: a trace of lower b is UNKNOWN, its reason naming
      the b-value kept (docs/ingestion.md, Roles).
    - A single-plane scout of the T1 family (``scout_reason``) is UNKNOWN.
    """
    out = [_unless_scout(stack, bands) for stack in stacks]
    by_series: dict[str, list[int]] = {}
    for i, stack in enumerate(out):
        by_series.setdefault(stack.series_instance_uid, []).append(i)
    limit_tr = bands.number("localizer", "max_tr_ms")
    limit_te = bands.number("localizer", "max_te_ms")
    limit_slices = bands.number("localizer", "max_slices_per_plane")
    min_planes = bands.number("localizer", "min_planes")
    for members in by_series.values():
        planes = {_plane(out[i]) for i in members}
        if len(planes) < min_planes:
            continue
        acqs = [out[i].acquisition for i in members]
        if all(
            a.repetition_time_ms is not None
            and a.repetition_time_ms <= limit_tr
            and a.echo_time_ms is not None
            and a.echo_time_ms <= limit_te
            for a in acqs
        ) and all(out[i].size[2] <= limit_slices for i in members):
            for i in members:
                if out[i].role == Role.UNKNOWN:
                    continue  # already unmeasured, for its own reason
                out[i] = replace(
                    out[i],
                    role=Role.UNKNOWN,
                    role_reason=(
                        f"localizer: slices in {len(planes)} planes, at most "
                        f"{max(out[j].size[2] for j in members)} per plane, TR "
                        f"{_fmt(acqs[0].repetition_time_ms or 0)} ms, TE "
                        f"{_fmt(acqs[0].echo_time_ms or 0)} ms"
                    ),
                    confidence=None,
                )
    traces = [i for i, s in enumerate(out) if s.role == Role.DWI and s.acquisition.b_value]
    if traces:
        highest = max(out[i].acquisition.b_value or 0.0 for i in traces)
        for i in traces:
            bval = out[i].acquisition.b_value or 0.0
            if bval < highest:
                out[i] = replace(
                    out[i],
                    role=Role.UNKNOWN,
                    role_reason=(
                        f"diffusion trace b {_fmt(bval)} s/mm2: DWI is the study's highest-b "
                        f"trace (b {_fmt(highest)})"
                    ),
                    confidence=None,
                )
    return out


_T1_FAMILY = (Role.T1, Role.T1FS, Role.T1POST, Role.T1POSTFS)


def scout_reason(stack: Stack, bands: RoleBands) -> str | None:
    """Why a stack the physics read as T1 is a 3-D scout, or None (lexicon ``[scout_3d]``).

    A scout: not declared 2-D, very short TR and TE, no inversion, coarse in-plane pixels, a
    small matrix, and few slices or thick partitions; no contrast agent and no temporal
    position (a dynamic series is not a scout); and a description naming no role, sequence or
    dynamic acquisition (``[description]`` role and post-contrast words, ``measurable_words``):
    a named series keeps its role. A true 3-D T1 (MPRAGE-like with TI, or spoiled gradient echo
    with ~1 mm voxels and enough slices) fails one of these and keeps T1."""
    acq = stack.acquisition
    tr, te = acq.repetition_time_ms, acq.echo_time_ms
    if stack.role not in _T1_FAMILY or tr is None or te is None:
        return None
    if (acq.mr_acquisition_type or "").upper() == "2D":
        return None
    inverted = (
        acq.inversion_time_ms is not None
        or bool(acq.inversion_recovery)
        or "IR" in {v.upper() for v in acq.scanning_sequence}
    )
    if inverted or acq.contrast_agent or (acq.temporal_position or 0) > 1:
        return None
    limit = bands.table["scout_3d"]
    pixel = min(stack.spacing_mm[0], stack.spacing_mm[1])
    matrix = max(stack.size[0], stack.size[1])
    slices, step = stack.size[2], stack.spacing_mm[2]
    if not (
        tr <= limit["max_tr_ms"]
        and te <= limit["max_te_ms"]
        and pixel >= limit["min_pixel_mm"]
        and matrix <= limit["max_matrix"]
        and (slices <= limit["max_slices"] or step >= limit["min_slab_step_mm"])
    ):
        return None
    named = set(bands.words("scout_3d", "measurable_words")) | bands.words(
        "description", "post_contrast"
    )
    for key in ("T1", "T2", "PD", "FLAIR", "STIR", "T2STAR", "SWI", "ADC"):
        named |= bands.words("description", key)
    if _mentions(stack.description, frozenset(named)):
        return None
    return (
        f"3-D scout: TR {_fmt(tr)} ms, TE {_fmt(te)} ms, no inversion, {pixel:.2g} mm pixels, "
        f"{stack.size[0]}x{stack.size[1]} matrix, {slices} slices of {step:.2g} mm, and a "
        f"description naming no role ({stack.description!r}); the physics alone said "
        f"{stack.role.value}: name the series in the case file's [roles] to measure it"
    )


def _unless_scout(stack: Stack, bands: RoleBands) -> Stack:
    reason = scout_reason(stack, bands)
    if reason is None:
        return stack
    return replace(stack, role=Role.UNKNOWN, role_reason=reason, confidence=None)


def _plane(stack: Stack) -> int:
    """The patient axis (0 x, 1 y, 2 z) nearest the stack's slice normal."""
    d = stack.direction  # row-major 3x3, the normal is the third column
    normal = (abs(d[2]), abs(d[5]), abs(d[8]))
    return max(range(3), key=lambda k: normal[k])
