"""The draft text: per-lesion findings paragraphs in the lexicon's wording, and the jinja2
rendering of report.md and report.txt.

Templates live in the lexicon (``lexicon/templates``; a site's folder first, through a
``ChoiceLoader``), are rendered with ``StrictUndefined``, and receive only plain strings and
lists built here, so a site can rearrange or reword the report without code.
"""

from __future__ import annotations

import datetime as _dt
import math
import re
import textwrap
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import jinja2
from jinja2 import nodes
from jinja2.sandbox import ImmutableSandboxedEnvironment, SecurityError

from sigreport import lexicon
from sigreport.errors import InputError
from sigreport.model import UNGRADED_ROLES, LesionPhrases, role_sort_key
from sigreport.report.tables import NOT_ASSESSED, ordered_roles, series_by_role, table_rows
from sigreport.report.wording import Wording, fill
from sigreport.safetext import clean_strings

TEXT_WIDTH = 100


class _LexiconEnvironment(ImmutableSandboxedEnvironment):
    """jinja2's sandbox (no access to Python internals: attributes starting with ``_``, the
    globals of functions, mutation of the values handed in); with autoescaping on, a template
    may also not turn it off (``{% autoescape false %}``) nor mark text as ``safe``."""

    def _parse(self, source: str, name: str | None, filename: str | None) -> nodes.Template:
        tree = super()._parse(source, name, filename)
        if self.autoescape:
            for node in tree.find_all((nodes.EvalContextModifier, nodes.Filter)):
                if isinstance(node, nodes.Filter) and node.name != "safe":
                    continue
                raise jinja2.TemplateSyntaxError(
                    "an HTML template may not turn autoescaping off or mark text as safe",
                    node.lineno,
                    name,
                    filename,
                )
        return tree


def environment(site: Path | str | None = None, *, autoescape: bool = False) -> jinja2.Environment:
    """A sandboxed jinja2 environment over the lexicon's template folders (site first), strict
    about undefined names; ``autoescape`` for HTML.

    Lexicon templates are untrusted data: they are rendered in jinja2's
    ``ImmutableSandboxedEnvironment``, so a site template cannot reach Python (docs/outputs.md).
    """
    loader = jinja2.ChoiceLoader(
        [jinja2.FileSystemLoader(str(folder)) for folder in lexicon.template_dirs(site)]
    )
    env = _LexiconEnvironment(
        loader=loader,
        undefined=jinja2.StrictUndefined,
        autoescape=autoescape,
        keep_trailing_newline=True,
        trim_blocks=True,
        lstrip_blocks=True,
    )
    env.filters["md"] = md_escape
    env.filters["wrap"] = wrap
    return env


def render_template(env: jinja2.Environment, name: str, context: Mapping[str, Any]) -> str:
    """Render lexicon template ``name``; a template that is broken, uses an undefined name or
    reaches for Python internals is an ``InputError`` naming the template and its file."""
    try:
        template = env.get_template(name)
        return template.render(**context)
    except jinja2.TemplateNotFound:
        raise InputError(f"lexicon template {name} not found") from None
    except (jinja2.TemplateError, RecursionError) as exc:
        where = getattr(exc, "filename", None) or _template_file(env, name)
        line = getattr(exc, "lineno", None)
        at = f"{where}" + (f", line {line}" if line else "")
        kind = "unsafe" if isinstance(exc, SecurityError) else "unusable"
        raise InputError(
            f"lexicon template {name} ({at}) is {kind}: {type(exc).__name__}: {exc}"
        ) from exc


def _template_file(env: jinja2.Environment, name: str) -> str:
    try:
        _, filename, _ = env.loader.get_source(env, name)  # type: ignore[union-attr]
    except Exception:  # noqa: BLE001 - only for the message
        return name
    return filename or name


_MD_SPECIAL = re.compile(r"([\\`*_\[\]|#<])")
_MD_ENTITY = re.compile(r"&(?=#?[A-Za-z0-9]+;)")


def md_escape(text: Any) -> str:
    """Text safe to place in Markdown, readable as it stands: Markdown punctuation and ``<``
    (which would open raw HTML) backslash-escaped, an ``&`` that would start a character
    reference backslash-escaped (CommonMark: any ASCII punctuation may be escaped), a leading
    ``>`` escaped (a block quote), newlines as spaces. No HTML entity is written, so the file
    reads "T1 -> T1POST" in an editor as in a viewer."""
    value = "" if text is None else str(text)
    value = _MD_SPECIAL.sub(r"\\\1", value)
    value = _MD_ENTITY.sub(r"\\&", value)
    value = " ".join(value.splitlines())
    return "\\" + value if value.startswith(">") else value


def wrap(text: Any, width: int = TEXT_WIDTH, indent: str = "", first: str | None = None) -> str:
    """Wrap plain text at ``width`` columns (``textwrap``; long words are not broken, and a
    number stays on the line of its unit: "+84 %")."""
    glued = re.sub(r"(\d) (%|ml|mm)(?!\w)", "\\1\u00a0\\2", " ".join(str(text).split()))
    return textwrap.fill(
        glued,
        width=width,
        initial_indent=indent if first is None else first,
        subsequent_indent=indent,
        break_long_words=False,
        break_on_hyphens=False,
    ).replace("\u00a0", " ")


def _capital(sentence: str) -> str:
    return sentence[:1].upper() + sentence[1:] if sentence else sentence


def _num(value: Any, digits: int) -> str:
    """``value`` with ``digits`` decimals; "n/a" when missing; never "-0" (a value that rounds
    to zero has no sign)."""
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "n/a"
    text = f"{float(value):.{digits}f}"
    # A value that rounds to zero has no sign: "-0 %" never appears.
    return text[1:] if text.startswith("-") and float(text) == 0 else text


def _signed(value: Any) -> str:
    """A percentage with its sign ("+84", "-12"); "0" for anything that rounds to zero."""
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "n/a"
    text = f"{float(value):+.0f}"
    return "0" if float(text) == 0 else text


def lesion_sentences(
    lesion: Mapping[str, Any],
    findings: Mapping[str, Any],
    wording: Wording,
    phrases: LesionPhrases,
) -> list[str]:
    """The draft findings sentences for one lesion, in reading order: size, signal on each
    series relative to the reference tissue, suppression, enhancement, flow void.

    The graded wording of each series ("markedly hyperintense", "borderline hypointense") is
    the one characterization chose (``phrases.grades``); a series without one reads as its
    plain ``grade``. Every grade names the reference tissue. Nothing is said about what was not
    measured or not assessed, and no placeholder is ever filled with a missing value: a pair the
    study lacks is left out, a finding not assessed says so.
    """
    s = wording.sentences
    out: list[str] = [_size_sentence(lesion, wording)]

    tissue = reference_tissue(lesion, findings)
    signal: Mapping[str, Any] = lesion.get("signal") or {}
    # Series sharing one graded wording are named together, in reading order of the first:
    # "hyperintense to white matter on T2 and FLAIR; isointense to white matter on T1".
    groups: dict[str, list[str]] = {}
    unmeasured: list[str] = []
    unnormalized: list[str] = []
    for role in ordered_roles(signal):
        stats = signal[role]
        name = wording.role_name(role)
        if stats is not None and role in UNGRADED_ROLES:
            continue  # Dixon water / fat: the fat fraction, not a grade (family_sentences)
        if stats is None:
            unmeasured.append(name)
            continue
        if stats.get("ratio") is None:
            unnormalized.append(name)
            continue
        graded = phrases.grades.get(role) or stats.get("grade")
        if not graded:
            unnormalized.append(name)
            continue
        groups.setdefault(str(graded), []).append(name)
    items: list[str] = []
    for grade, names in groups.items():
        key = "signal_first" if not items else "signal_next"
        items.append(fill(s[key], key, grade=grade, tissue=tissue, role=wording.join(names)))
    if items:
        out.append(fill(s["signal"], "signal", items=s["signal_separator"].join(items)))
    if unmeasured:
        out.append(
            fill(s["signal_unmeasured"], "signal_unmeasured", roles=wording.join(unmeasured))
        )
    if unnormalized and lesion.get("reference"):
        out.append(
            fill(
                s["signal_unnormalized"],
                "signal_unnormalized",
                roles=wording.join(unnormalized),
                reference=str(lesion["reference"]),
            )
        )
    elif unnormalized:
        out.append(
            fill(s["signal_no_reference"], "signal_no_reference", roles=wording.join(unnormalized))
        )

    flow_void = lesion.get("flow_void")
    if flow_void is True:
        # A flow void holds only noise: its percent changes are not findings.
        out.append(s["flow_void"])
        out.append(s["not_assessed_flow_void"])
        return [_capital(sentence) for sentence in out]

    suppression: Mapping[str, Any] = lesion.get("suppression") or {}
    for kind in ("fluid", "fat"):
        flag = suppression.get(kind)
        if not flag or not flag.get("from") or not flag.get("to"):
            continue  # the study has no pair of this kind: nothing to say
        drop = flag.get("drop_percent")
        values = {
            "from": wording.role_name(str(flag["from"])),
            "to": wording.role_name(str(flag["to"])),
            "drop": _num(drop, 0),
            "rise": _num(-float(drop), 0) if drop is not None else "",
        }
        if drop is None or flag.get("suppressed") is None:
            out.append(fill(s["suppression_unknown"], "suppression_unknown", **values))
        else:
            key = f"{kind}_suppressed" if flag["suppressed"] else f"{kind}_not_suppressed"
            if not flag["suppressed"] and round(float(drop)) < 0:
                key = f"{kind}_rises"
            out.append(fill(s[key], key, **values))
        if flag.get("reliable") is False:
            out.append(s["unreliable"])

    enhancement = lesion.get("enhancement") or {}
    if enhancement.get("pre") and enhancement.get("post"):
        percent = enhancement.get("percent")
        values = {
            "pre": wording.role_name(str(enhancement["pre"])),
            "post": wording.role_name(str(enhancement["post"])),
            "percent": _signed(percent),
        }
        raw = enhancement.get("raw_percent")
        if percent is None:
            out.append(fill(s["enhancement_unknown"], "enhancement_unknown", **values))
        elif enhancement.get("basis") == "raw" and raw is not None:
            # The reference itself enhanced: both numbers, the raw one first (it is the one the
            # flag follows).
            out.append(
                fill(
                    s["enhancement_reference_changed"],
                    "enhancement_reference_changed",
                    raw=_signed(raw),
                    tissue=tissue,
                    reference=_signed(enhancement.get("reference_percent")),
                    **values,
                )
            )
        elif enhancement.get("enhancing"):
            pattern = enhancement.get("pattern")
            if pattern in (None, "none"):
                out.append(fill(s["enhancing_no_pattern"], "enhancing_no_pattern", **values))
            else:
                name = wording.patterns.get(str(pattern), str(pattern))
                out.append(
                    fill(
                        s["enhancing"], "enhancing", Pattern=_capital(name), pattern=name, **values
                    )
                )
        else:
            out.append(fill(s["not_enhancing"], "not_enhancing", **values))
        if percent is not None and raw is not None and enhancement.get("basis") != "raw":
            out.append(fill(s["raw_percent"], "raw_percent", raw=_signed(raw)))

    out += family_sentences(lesion, wording)
    if flow_void is False:
        out.append(s["no_flow_void"])
    change = change_sentence(lesion, wording)
    if change:
        out.append(change)
    return [_capital(sentence) for sentence in out]


def display_date(value: Any, wording: Wording) -> str:
    """A DICOM DA (``YYYYMMDD``, PS3.5 6.2) as ``YYYY-MM-DD`` (ISO 8601), else as given."""
    text = "" if value is None else str(value).strip()
    if len(text) == 8 and text.isdigit():
        return f"{text[:4]}-{text[4:6]}-{text[6:]}"
    return text or wording.change["date_unknown"]


def change_sentence(lesion: Mapping[str, Any], wording: Wording) -> str:
    """The interval-change sentence of a lesion (empty without a prior): "Since the prior study
    of 2026-06-03 (183 days): larger by 35 %; newly enhancing (...)." The words come from the
    lexicon's ``[change]``; no judgement of progression is made."""
    change = lesion.get("change")
    if not isinstance(change, Mapping):
        return ""
    c = wording.change
    date = display_date(change.get("prior_study_date"), wording)
    if change.get("status") == "new":
        return fill(c["new"], "new", date=date)
    days = change.get("interval_days")
    interval = (
        c["interval_unknown"] if days is None else fill(c["interval"], "interval", days=str(days))
    )
    items: list[str] = []
    volume = change.get("volume_change_percent")
    if volume is not None:
        rounded = round(float(volume))
        if rounded > 0:
            items.append(fill(c["larger"], "larger", percent=str(rounded)))
        elif rounded < 0:
            items.append(fill(c["smaller"], "smaller", percent=str(-rounded)))
        else:
            items.append(c["same_volume"])
    pp = change.get("enhancement_change_pp")
    if pp is not None:
        now = (lesion.get("enhancement") or {}).get("enhancing")
        before = change.get("enhancing_before")
        key = "enhancement"
        if now is True and before is False:
            key = "newly_enhancing"
        elif now is False and before is True:
            key = "no_longer_enhancing"
        items.append(fill(c[key], key, pp=_signed(pp)))
    ratios: Mapping[str, Any] = change.get("ratio_change") or {}
    for role in sorted(ratios, key=role_sort_key):
        if round(float(ratios[role]), 2) == 0:
            continue  # "+0.00" says nothing; findings.json keeps the value
        items.append(
            fill(
                c["ratio"],
                "ratio",
                delta=f"{float(ratios[role]):+.2f}",
                role=wording.role_name(role),
            )
        )
    if not items:
        return fill(c["since_nothing"], "since_nothing", date=date, interval=interval)
    return fill(
        c["since"], "since", date=date, interval=interval, items=c["items_separator"].join(items)
    )


def not_seen_sentence(findings: Mapping[str, Any], wording: Wording) -> str:
    """The prior's lesions that this study does not have (empty when none, or no prior)."""
    prior = findings.get("prior")
    if not isinstance(prior, Mapping) or not prior.get("not_seen"):
        return ""
    c = wording.change
    lesions = [
        fill(
            c["not_seen_lesion"],
            "not_seen_lesion",
            id=str(item.get("id")),
            site=str(item.get("site") or ""),
        )
        for item in prior["not_seen"]
    ]
    return fill(
        c["not_seen"],
        "not_seen",
        date=display_date(prior.get("study_date"), wording),
        lesions=wording.join(lesions),
    )


def _size_sentence(lesion: Mapping[str, Any], wording: Wording) -> str:
    """The size: axial diameters when the lesion was outlined, the ROI's volume (labelled as
    such) for a typed shape, and the findings/1 fields for a findings.json without ``size``."""
    s = wording.sentences
    size = lesion.get("size")
    if isinstance(size, Mapping):
        volume = size.get("volume_ml")
        diameters = size.get("diameters_mm")
        if size.get("source") in ("mask", "grown") and diameters and len(diameters) == 3:
            long, short, cc = diameters
            return fill(
                s["size_axes"],
                "size_axes",
                long=_num(long, 0),
                short=_num(short, 0),
                craniocaudal=_num(cc, 0),
                volume_ml=_num(volume, 2),
            )
        if size.get("source") == "roi" and volume is not None:
            return fill(s["size_roi"], "size_roi", volume_ml=_num(volume, 2))
        return s["size_unknown"]
    volume, diameter = lesion.get("volume_ml"), lesion.get("max_diameter_mm")
    if volume is not None and diameter is not None:
        return fill(s["size"], "size", volume_ml=_num(volume, 2), max_diameter_mm=_num(diameter, 1))
    if volume is not None:
        return fill(s["size_volume_only"], "size_volume_only", volume_ml=_num(volume, 2))
    return s["size_unknown"]


def family_sentences(lesion: Mapping[str, Any], wording: Wording) -> list[str]:
    """Diffusion, susceptibility, chemical shift and dynamic sentences (wording.toml
    ``[families]``), each only when the lesion has the field; "blooming" is said only when the
    drop and the grade on both series are known (``blooming`` not null)."""
    f = wording.families
    out: list[str] = []

    def add(key: str, **values: str) -> None:
        out.append(fill(f[key], key, section="families", **values))

    diffusion = lesion.get("diffusion")
    if diffusion:
        ratio = _num(diffusion.get("adc_ratio"), 2)
        value = diffusion.get("adc_1e-6_mm2_s")
        adc = (
            fill(f["adc_value"], "adc_value", section="families", value=_num(value, 0), ratio=ratio)
            if value is not None
            else fill(f["adc_ratio_only"], "adc_ratio_only", section="families", ratio=ratio)
        )
        b = diffusion.get("b_value")
        values = {"dwi": wording.role_name("DWI"), "b_value": _num(b, 0), "adc": adc}
        if diffusion.get("restricted"):
            add("restricted", **values)
        elif diffusion.get("shine_through"):
            add("shine_through", **values)
        elif diffusion.get("restricted") is False:
            add("no_restriction", **values)
        else:
            add("diffusion_unknown")
    for name, flag, yes, no, unknown in (
        ("susceptibility", "blooming", "blooming", "no_blooming", "susceptibility_unknown"),
        (
            "chemical_shift",
            "microscopic_fat",
            "microscopic_fat",
            "no_microscopic_fat",
            "chemical_shift_unknown",
        ),
    ):
        pair = lesion.get(name)
        if not pair or pair.get("from") is None:
            continue
        values = {
            "from": wording.role_name(str(pair.get("from"))),
            "to": wording.role_name(str(pair.get("to"))),
            "drop": _num(pair.get("drop_percent"), 0),
        }
        if pair.get(flag) is None:
            add(unknown, **values)
        else:
            add(yes if pair[flag] else no, **values)
            if pair.get("reliable") is False:
                add("unreliable")
    cs = lesion.get("chemical_shift") or {}
    if cs.get("fat_fraction_percent") is not None:
        add("fat_fraction", fat_fraction=_num(cs["fat_fraction_percent"], 0))
    dynamic = lesion.get("dynamic")
    if dynamic:
        items = [
            fill(
                f["dynamic_phase"],
                "dynamic_phase",
                section="families",
                percent=_signed(p.get("percent")),
                delay=_num(p.get("delay_s"), 0),
            )
            for p in dynamic.get("phases", [])
        ]
        values = {
            "pre": wording.role_name(str(dynamic.get("pre"))),
            "phases": wording.sentences["list_separator"].join(items),
        }
        peak = dynamic.get("peak_phase")
        phases = dynamic.get("phases", [])
        curve = dynamic.get("curve")
        if curve is not None and peak is not None and 1 <= peak <= len(phases):
            add(
                "dynamic",
                peak_delay=_num(phases[peak - 1].get("delay_s"), 0),
                curve=f.get(f"curve_{curve}", str(curve)),
                **values,
            )
            if dynamic.get("reliable") is False:
                add("unreliable")
        else:
            add("dynamic_no_curve", **values)
    return out


def behaviour_sentences(
    lesion: Mapping[str, Any], wording: Wording, phrases: LesionPhrases
) -> list[str]:
    """One "<phrase>: consider <a, b and c>." line per behaviour key of the lesion, in the words
    characterization chose (``phrases.behaviour``); a key without them reads as the key itself
    with hyphens as spaces and no considerations."""
    chosen = {p.key: p for p in phrases.behaviour}
    out = []
    for key in lesion.get("behaviour") or []:
        found = chosen.get(str(key))
        phrase = found.phrase if found is not None else str(key).replace("-", " ")
        considerations = found.considerations if found is not None else ()
        if considerations:
            joined = wording.sentences["considerations_separator"].join(considerations)
            line = fill(
                wording.sentences["behaviour"], "behaviour", phrase=phrase, considerations=joined
            )
        else:
            line = fill(
                wording.sentences["behaviour_no_considerations"],
                "behaviour_no_considerations",
                phrase=phrase,
            )
        out.append(_capital(line))
    return out


def not_applied_sentences(
    lesion: Mapping[str, Any], findings: Mapping[str, Any], wording: Wording, phrases: LesionPhrases
) -> list[str]:
    """Why a behaviour reading the grades would suggest is not made: the rule assumes another
    reference tissue than the lesion's (behaviour.toml ``references``)."""
    tissue = reference_tissue(lesion, findings)
    return [
        _capital(
            fill(
                wording.sentences["behaviour_not_applied"],
                "behaviour_not_applied",
                phrase=p.phrase,
                tissues=wording.join(list(p.references)),
                tissue=tissue,
            )
        )
        for p in phrases.not_applied
    ]


def reference_tissue(lesion: Mapping[str, Any], findings: Mapping[str, Any]) -> str:
    """The tissue of the lesion's reference ROI ("white matter"), else the ROI id."""
    ref = lesion.get("reference")
    for roi in findings.get("rois", []):
        if roi.get("id") == ref:
            return str(roi.get("tissue") or ref)
    return str(ref) if ref else "the reference tissue"


def display_rows(
    findings: Mapping[str, Any], *, not_assessed: str = NOT_ASSESSED
) -> list[dict[str, str]]:
    """The table rows formatted for reading (fixed decimals, signed percentages); a flow void's
    enhancement and drop cells read ``not_assessed``."""
    out = []
    flow_voids = {
        str(lesion.get("id")): lesion
        for lesion in findings.get("lesions", [])
        if lesion.get("flow_void") is True
    }
    for row in table_rows(findings):
        drops = [
            f"{kind} {_num(row[f'{kind}_drop_percent'], 0)}"
            for kind in ("fluid", "fat")
            if row[f"{kind}_drop_percent"] is not None
        ]
        enhancement = (
            _signed(row["enhancement_percent"]) if row["enhancement_percent"] is not None else ""
        )
        drop = ", ".join(drops)
        void = flow_voids.get(str(row["lesion"]))
        if void is not None:
            if (void.get("enhancement") or {}).get("post") == row["role"]:
                enhancement = not_assessed
            if any(
                (flag or {}).get("to") == row["role"]
                for flag in (void.get("suppression") or {}).values()
            ):
                drop = not_assessed
        out.append(
            {
                "lesion": str(row["lesion"]),
                "site": str(row["site"] or ""),
                "role": str(row["role"]),
                "series": "" if row["series_number"] is None else str(row["series_number"]),
                "n_voxels": "" if row["n_voxels"] is None else str(row["n_voxels"]),
                "median": _num(row["median"], 1) if row["median"] is not None else "",
                "ratio": _num(row["ratio"], 2) if row["ratio"] is not None else "",
                "grade": str(row["grade"] or ""),
                "enhancement": enhancement,
                "drop": drop,
                "notes": str(row["notes"] or ""),
            }
        )
    return out


def text_table(
    headers: Sequence[str], rows: Sequence[Sequence[str]], *, width: int = TEXT_WIDTH
) -> str:
    """A fixed-width plain-text table; the last column wraps so lines stay within ``width``."""
    cols = len(headers)
    widths = [max([len(headers[i])] + [len(r[i]) for r in rows]) for i in range(cols - 1)]
    used = sum(widths) + 2 * (cols - 1)
    last = max(16, width - used)
    lines = []

    def emit(cells: Sequence[str]) -> None:
        wrapped = textwrap.wrap(cells[-1], last, break_long_words=True) or [""]
        for j, piece in enumerate(wrapped):
            lead = cells[:-1] if j == 0 else [""] * (cols - 1)
            lines.append("  ".join(c.ljust(widths[i]) for i, c in enumerate(lead)) + "  " + piece)

    emit(list(headers))
    lines.append("  ".join("-" * w for w in widths) + "  " + "-" * min(last, 20))
    for row in rows:
        emit(list(row))
    return "\n".join(line.rstrip() for line in lines)


def report_context(
    findings: Mapping[str, Any], wording: Wording, phrases: Mapping[str, LesionPhrases]
) -> dict[str, Any]:
    """Everything the templates use, as plain strings, lists and dicts.

    ``phrases`` maps a lesion id to the words characterization chose for it. Every string of
    ``findings`` (header values, case-file text, qc messages) is first made one line without
    control characters (:func:`sigreport.safetext.one_line`): a CR/LF in an AccessionNumber
    cannot add a line to report.txt, nor a NUL reach report.html.

    The keys (docs/outputs.md lists their fields): ``titles``, ``header`` and ``header_lines``
    (patient, ID, birth date, sex, accession, study date in the lexicon's date format, the
    series used), ``references`` (reference and control ROIs: site, tissue, per-series medians,
    control check), ``study``, ``tool``, ``generated``, ``cautions``, ``lesions`` (with
    ``not_applied``: readings whose rule assumes another reference), ``rows``, ``text_table``,
    ``qc``, ``qc_prominent``, ``qc_none``, ``series`` (with ``displacement_mm`` and
    ``rotation_deg``) and ``series_text_table``.
    """
    findings = clean_strings(findings)
    rows = display_rows(findings, not_assessed=wording.formats.get("not_assessed", NOT_ASSESSED))
    lesions = []
    for lesion in findings.get("lesions", []):
        lesion_id = str(lesion.get("id"))
        own = phrases.get(lesion_id, LesionPhrases())
        sentences = lesion_sentences(lesion, findings, wording, own)
        lesions.append(
            {
                "id": lesion_id,
                "site": str(lesion.get("site") or ""),
                "heading": fill(
                    wording.sentences["heading"],
                    "heading",
                    id=lesion_id,
                    site=str(lesion.get("site") or ""),
                ),
                "sentences": sentences,
                "paragraph": " ".join(sentences),
                "behaviours": behaviour_sentences(lesion, wording, own),
                "not_applied": not_applied_sentences(lesion, findings, wording, own),
                "reference_tissue": reference_tissue(lesion, findings),
                "rows": [r for r in rows if r["lesion"] == lesion_id],
            }
        )
    qc = []
    for note in findings.get("qc", []):
        level = str(note.get("level"))
        qc.append(
            {
                "level": level,
                "label": wording.qc.get(level, level),
                "code": str(note.get("code")),
                "message": str(note.get("message")),
                "prominent": level in ("warning", "error"),
            }
        )
    series = []
    by_role = series_by_role(findings)
    for entry in sorted(
        findings.get("series", []),
        key=lambda e: (role_sort_key(str(e.get("role"))), e.get("series_number") or 0),
    ):
        alignment = entry.get("alignment") or {}
        series.append(
            {
                "role": str(entry.get("role")),
                "role_name": wording.role_name(str(entry.get("role"))),
                "series_number": ""
                if entry.get("series_number") is None
                else str(entry["series_number"]),
                "description": str(entry.get("description") or ""),
                "reason": str(entry.get("role_reason") or ""),
                "measured": "yes"
                if entry.get("measured", by_role.get(str(entry.get("role"))) is entry)
                else "no",
                "alignment": str(alignment.get("method", "")),
                "displacement_mm": _num(alignment.get("displacement_mm"), 1)
                if alignment.get("displacement_mm") is not None
                else "",
                "rotation_deg": _num(alignment.get("rotation_deg"), 1)
                if alignment.get("rotation_deg") is not None
                else "",
            }
        )
    study = findings.get("study") or {}
    tool = findings.get("tool") or {}
    text_rows = [
        [r["lesion"], r["role"], r["series"], r["median"], r["ratio"], r["grade"],
         r["enhancement"], r["drop"], r["notes"]]
        for r in rows
    ]  # fmt: skip
    header = header_block(findings, wording)
    return {
        "titles": wording.titles,
        "header": header,
        "header_lines": [f"{label}: {value}" for label, value in header["items"]],
        "references": reference_entries(findings, wording),
        "series_text_table": text_table(
            ["Role", "Series", "Measured", "Aligned", "Moved mm", "Rotated deg", "Description"],
            [
                [
                    e["role"],
                    e["series_number"],
                    e["measured"],
                    e["alignment"],
                    e["displacement_mm"],
                    e["rotation_deg"],
                    e["description"],
                ]
                for e in series
            ],
        ),
        "study": {k: "" if v is None else str(v) for k, v in study.items()},
        "tool": f"{tool.get('name', 'sigreport')} {tool.get('version', '')}".strip(),
        "generated": str(findings.get("generated") or ""),
        "cautions": [str(c) for c in findings.get("cautions", [])],
        "lesions": lesions,
        "rows": rows,
        "text_table": text_table(
            ["Lesion", "Role", "Series", "Median", "Ratio", "Grade", "Enh %", "Drop %", "Notes"],
            text_rows,
        ),
        "not_seen": not_seen_sentence(findings, wording),
        "qc": qc,
        "qc_prominent": [n for n in qc if n["prominent"]],
        "qc_none": wording.qc["none"],
        "series": series,
    }


def format_date(value: Any, fmt: str) -> str:
    """A DICOM DA value (YYYYMMDD) as the lexicon's date format (wording.toml ``[formats]
    date``, strftime codes); the value as it stands when it is not a valid date, "" when
    missing."""
    text = "" if value is None else str(value).strip()
    if len(text) == 8 and text.isdigit():
        try:
            return _dt.date(int(text[:4]), int(text[4:6]), int(text[6:])).strftime(fmt)
        except ValueError:
            return text
    return text


def person_name(value: Any) -> str:
    """A DICOM PN value ("Family^Given^Middle^Prefix^Suffix", PS3.5 6.2) as it is read:
    "Family, Given Middle"; the alphabetic group only (before any "=")."""
    text = "" if value is None else str(value).split("=")[0].strip()
    if "^" not in text:
        return text
    parts = [p.strip() for p in text.split("^")] + [""] * 5
    family, given, middle, prefix, suffix = parts[:5]
    first = " ".join(p for p in (prefix, given, middle) if p)
    name = f"{family}, {first}" if family and first else family or first
    return f"{name} {suffix}".strip() if suffix else name


def header_block(findings: Mapping[str, Any], wording: Wording) -> dict[str, Any]:
    """The header of the human reports: patient name, ID, birth date, sex, accession, study
    date (the lexicon's date format) and the series used, as ``items`` (label, value) pairs in
    that order (empty values left out) and as named fields."""
    study = findings.get("study") or {}
    fmt = wording.formats.get("date") or "%Y-%m-%d"
    used = [
        f"{e.get('role')} (series {e.get('series_number')})"
        if e.get("series_number") is not None
        else str(e.get("role"))
        for e in sorted(
            findings.get("series", []),
            key=lambda e: (role_sort_key(str(e.get("role"))), e.get("series_number") or 0),
        )
        if e.get("measured")
    ]
    fields = {
        "patient_name": person_name(study.get("patient_name")),
        "patient_id": str(study.get("patient_id") or ""),
        "birth_date": format_date(study.get("birth_date"), fmt),
        "sex": str(study.get("sex") or ""),
        "accession": str(study.get("accession_number") or ""),
        "study_date": format_date(study.get("study_date"), fmt),
        "series_used": ", ".join(used),
    }
    return {
        **fields,
        "items": [(wording.header.get(k, k), v) for k, v in fields.items() if v],
    }


def reference_entries(findings: Mapping[str, Any], wording: Wording) -> list[dict[str, Any]]:
    """The reference and control ROIs for the reader: id, kind, site, tissue, the median on
    each series (reading order) and, for a control, its suppression check, with one sentence
    each (wording.toml ``reference_line`` / ``control_line``)."""
    s = wording.sentences
    out = []
    for roi in findings.get("rois", []):
        medians = roi.get("medians") or {}
        values = [
            {"role": str(role), "role_name": wording.role_name(str(role)),
             "value": _num(medians[role], 1) if medians[role] is not None else "not measured"}
            for role in ordered_roles(medians)
        ]  # fmt: skip
        medians_text = ", ".join(f"{v['role']} {v['value']}" for v in values) or "not measured"
        check = roi.get("check")
        check_text = ""
        if isinstance(check, Mapping):
            kind = str(check.get("kind") or "")
            pieces = {
                "kind": kind,
                "drop": _num(check.get("drop_percent"), 0),
                "from": wording.role_name(str(check.get("from") or "")),
                "to": wording.role_name(str(check.get("to") or "")),
            }
            if check.get("passed") is True:
                check_text = fill(s["control_passed"], "control_passed", **pieces)
            elif check.get("passed") is False:
                check_text = fill(s["control_failed"], "control_failed", **pieces)
            else:
                check_text = fill(s["control_unchecked"], "control_unchecked", **pieces)
        site = str(roi.get("site") or "")
        values_for_line = {
            "id": str(roi.get("id")),
            "kind": str(roi.get("kind")),
            "tissue": str(roi.get("tissue") or "unnamed tissue"),
            "site": f", {site}" if site else "",
            "medians": medians_text,
        }
        if roi.get("kind") == "control":
            sentence = fill(s["control_line"], "control_line", check=check_text, **values_for_line)
        else:
            sentence = fill(s["reference_line"], "reference_line", **values_for_line)
        out.append(
            {
                "id": values_for_line["id"],
                "kind": values_for_line["kind"],
                "site": site,
                "tissue": values_for_line["tissue"],
                "medians": values,
                "medians_text": medians_text,
                "check": check_text,
                "sentence": sentence.strip(),
            }
        )
    return out


def render_text(context: Mapping[str, Any], site: Path | str | None = None) -> tuple[str, str]:
    """(report.md, report.txt) rendered from the lexicon templates."""
    env = environment(site)
    markdown = render_template(env, "report.md.j2", context)
    plain = render_template(env, "report.txt.j2", context)
    return markdown, plain
