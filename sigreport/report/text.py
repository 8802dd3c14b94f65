"""The draft text: per-lesion findings paragraphs in the lexicon's wording, and the jinja2
rendering of report.md and report.txt.

Templates live in the lexicon (``lexicon/templates``; a site's folder first, through a
``ChoiceLoader``), are rendered with ``StrictUndefined``, and receive only plain strings and
lists built here, so a site can rearrange or reword the report without code.
"""

from __future__ import annotations

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
from sigreport.report.tables import ordered_roles, series_by_role, table_rows
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


_MD_SPECIAL = re.compile(r"([\\`*_\[\]|#])")


def md_escape(text: Any) -> str:
    """Text safe to place in Markdown: HTML-special characters as entities (a Markdown viewer
    renders raw HTML), Markdown punctuation backslash-escaped, newlines as spaces."""
    value = "" if text is None else str(text)
    value = value.replace("&", "&amp;").replace("<", "&lt;").replace(">", "&gt;")
    value = _MD_SPECIAL.sub(r"\\\1", value)
    return " ".join(value.splitlines())


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
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "n/a"
    return f"{float(value):.{digits}f}"


def _signed(value: Any) -> str:
    if value is None:
        return "n/a"
    return f"{float(value):+.0f}"


def lesion_sentences(
    lesion: Mapping[str, Any],
    findings: Mapping[str, Any],
    wording: Wording,
    phrases: LesionPhrases,
) -> list[str]:
    """The draft findings sentences for one lesion, in reading order: size, signal on each
    series relative to the reference tissue, suppression, enhancement, flow void.

    The graded wording of each series ("markedly hyperintense") is the one characterization
    chose (``phrases.grades``); a series without one reads as its plain ``grade``."""
    s = wording.sentences
    out: list[str] = []
    volume, diameter = lesion.get("volume_ml"), lesion.get("max_diameter_mm")
    if volume is not None and diameter is not None:
        out.append(
            fill(s["size"], "size", volume_ml=_num(volume, 2), max_diameter_mm=_num(diameter, 1))
        )
    elif volume is not None:
        out.append(fill(s["size_volume_only"], "size_volume_only", volume_ml=_num(volume, 2)))
    else:
        out.append(s["size_unknown"])

    tissue = reference_tissue(lesion, findings)
    signal: Mapping[str, Any] = lesion.get("signal") or {}
    # Series sharing one graded wording are named together, in reading order of the first:
    # "hyperintense to white matter on T2 and FLAIR, isointense on T1".
    groups: dict[str, list[str]] = {}
    unmeasured: list[str] = []
    for role in ordered_roles(signal):
        stats = signal[role]
        name = wording.role_name(role)
        if stats is not None and role in UNGRADED_ROLES:
            continue  # Dixon water / fat: the fat fraction, not a grade (family_sentences)
        if stats is None or stats.get("ratio") is None:
            unmeasured.append(name)
            continue
        graded = phrases.grades.get(role) or stats.get("grade") or "unmeasured"
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

    suppression: Mapping[str, Any] = lesion.get("suppression") or {}
    for kind in ("fluid", "fat"):
        flag = suppression.get(kind)
        if not flag or flag.get("to") is None:  # the study has no such pair
            continue
        values = {
            "from": wording.role_name(str(flag.get("from"))),
            "to": wording.role_name(str(flag.get("to"))),
            "drop": _num(flag.get("drop_percent"), 0),
            "rise": _num(-flag["drop_percent"], 0) if flag.get("drop_percent") is not None else "",
        }
        if flag.get("drop_percent") is None or flag.get("suppressed") is None:
            out.append(fill(s["suppression_unknown"], "suppression_unknown", **values))
        else:
            key = f"{kind}_suppressed" if flag["suppressed"] else f"{kind}_not_suppressed"
            if not flag["suppressed"] and round(float(flag["drop_percent"])) < 0:
                key = f"{kind}_rises"
            out.append(fill(s[key], key, **values))
        if flag.get("reliable") is False:
            out.append(s["unreliable"])

    enhancement = lesion.get("enhancement") or {}
    if enhancement and (enhancement.get("pre") or enhancement.get("post")):
        percent = enhancement.get("percent")
        values = {
            "pre": wording.role_name(str(enhancement.get("pre"))),
            "post": wording.role_name(str(enhancement.get("post"))),
            "percent": _signed(percent),
        }
        if percent is None:
            out.append(fill(s["enhancement_unknown"], "enhancement_unknown", **values))
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
        if percent is not None and enhancement.get("raw_percent") is not None:
            out.append(
                fill(s["raw_percent"], "raw_percent", raw=_signed(enhancement["raw_percent"]))
            )

    out += family_sentences(lesion, wording)
    flow_void = lesion.get("flow_void")
    if flow_void is True:
        out.append(s["flow_void"])
    elif flow_void is False:
        out.append(s["no_flow_void"])
    return [_capital(sentence) for sentence in out]


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


def reference_tissue(lesion: Mapping[str, Any], findings: Mapping[str, Any]) -> str:
    """The tissue of the lesion's reference ROI ("white matter"), else the ROI id."""
    ref = lesion.get("reference")
    for roi in findings.get("rois", []):
        if roi.get("id") == ref:
            return str(roi.get("tissue") or ref)
    return str(ref) if ref else "the reference tissue"


def display_rows(findings: Mapping[str, Any]) -> list[dict[str, str]]:
    """The table rows formatted for reading (fixed decimals, signed percentages)."""
    out = []
    for row in table_rows(findings):
        drops = [
            f"{kind} {_num(row[f'{kind}_drop_percent'], 0)}"
            for kind in ("fluid", "fat")
            if row[f"{kind}_drop_percent"] is not None
        ]
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
                "enhancement": _signed(row["enhancement_percent"])
                if row["enhancement_percent"] is not None
                else "",
                "drop": ", ".join(drops),
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
    """
    findings = clean_strings(findings)
    rows = display_rows(findings)
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
            }
        )
    study = findings.get("study") or {}
    tool = findings.get("tool") or {}
    text_rows = [
        [r["lesion"], r["role"], r["series"], r["median"], r["ratio"], r["grade"],
         r["enhancement"], r["drop"], r["notes"]]
        for r in rows
    ]  # fmt: skip
    return {
        "titles": wording.titles,
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
        "qc": qc,
        "qc_prominent": [n for n in qc if n["prominent"]],
        "qc_none": wording.qc["none"],
        "series": series,
    }


def render_text(context: Mapping[str, Any], site: Path | str | None = None) -> tuple[str, str]:
    """(report.md, report.txt) rendered from the lexicon templates."""
    env = environment(site)
    markdown = render_template(env, "report.md.j2", context)
    plain = render_template(env, "report.txt.j2", context)
    return markdown, plain
