"""The case file: which ROIs to place, where, and how the study is to be read (docs/usage.md).

``load_case`` parses the TOML with :mod:`tomllib`, checks every field, and returns the frozen
:class:`~sigreport.model.Case`. Every problem found is reported at once, one per line, in one
:class:`~sigreport.errors.InputError`, so a user fixes the file in one pass::

    case.toml: roi[2] (L2): radius_mm must be a positive number, got -3

Paths in the case file are relative to the case file; the returned ``Case`` and ``RoiSpec``
hold absolute paths.
"""

from __future__ import annotations

import math
import stat
import tomllib
from pathlib import Path
from typing import Any

from sigreport import limits
from sigreport.errors import InputError
from sigreport.model import AUTO_REFERENCE, Case, RoiKind, RoiShape, RoiSpec, Role, ViewerPosition

__all__ = ["load_case", "ROI_KEYS", "TOP_KEYS"]

TOP_KEYS = frozenset({"study", "study_uid", "roles", "options", "roi", "lexicon"})
OPTION_KEYS = frozenset({"register", "anchor"})
ROI_KEYS = frozenset(
    {
        "id",
        "kind",
        "site",
        "tissue",
        "shape",
        "center_mm",
        "radius_mm",
        "semi_axes_mm",
        "size_mm",
        "mask",
        "segment",
        "label",
        "reference",
        "at",
        "max_radius_mm",
    }
)
AT_KEYS = frozenset({"series", "image", "row", "column", "frame"})
# The geometry keys each shape needs; any other geometry key on that shape is a mistake.
_SHAPE_KEYS: dict[RoiShape, frozenset[str]] = {
    RoiShape.SPHERE: frozenset({"center_mm", "radius_mm"}),
    RoiShape.ELLIPSOID: frozenset({"center_mm", "semi_axes_mm"}),
    RoiShape.BOX: frozenset({"center_mm", "size_mm"}),
    RoiShape.MASK: frozenset({"mask"}),
    RoiShape.SEED: frozenset({"center_mm"}),
}
# Keys a shape may have besides the ones it needs.
_SHAPE_OPTIONAL: dict[RoiShape, frozenset[str]] = {RoiShape.SEED: frozenset({"max_radius_mm"})}
_GEOMETRY_KEYS = frozenset(
    {"center_mm", "radius_mm", "semi_axes_mm", "size_mm", "mask", "max_radius_mm"}
)
_MASK_ONLY_KEYS = frozenset({"segment", "label"})
_MAX_ID_LENGTH = 32


def _is_number(value: Any) -> bool:
    # TOML booleans are Python bools, which are ints: they are not numbers here.
    return isinstance(value, int | float) and not isinstance(value, bool)


def _show(value: Any) -> str:
    if isinstance(value, str):
        return repr(value)
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float) and value.is_integer():
        return str(int(value))
    if isinstance(value, dict):
        return "a table"
    return str(value)


def _is_uid(text: str) -> bool:
    """A UID (PS3.5 9.1): digits in dot-separated components, at most 64 characters."""
    parts = text.split(".")
    return 0 < len(text) <= 64 and all(p.isdigit() and p.isascii() for p in parts)


def _choices(values: Any) -> str:
    return ", ".join(str(v) for v in values)


class _Problems:
    """Collects one line per problem, all prefixed by the case file's name."""

    def __init__(self, name: str) -> None:
        self.name = name
        self.lines: list[str] = []

    def add(self, where: str, message: str) -> None:
        self.lines.append(
            f"{self.name}: {where}: {message}" if where else f"{self.name}: {message}"
        )

    def raise_if_any(self) -> None:
        if self.lines:
            raise InputError("\n".join(self.lines))


def _vector3(
    value: Any, key: str, where: str, problems: _Problems, *, positive: bool
) -> tuple[float, float, float] | None:
    what = "3 positive numbers" if positive else "3 numbers"
    if (
        not isinstance(value, list)
        or len(value) != 3
        or not all(_is_number(v) and math.isfinite(v) for v in value)
        or (positive and not all(v > 0 for v in value))
    ):
        problems.add(where, f"{key} must be a list of {what} (mm), got {_show(value)}")
        return None
    # Bounded up front: an ROI's extent sets the size of everything sampled for it.
    ceiling = limits.MAX_ROI_EXTENT_MM if positive else limits.MAX_COORDINATE_MM
    if not all(abs(v) <= ceiling for v in value):
        problems.add(
            where,
            f"{key} must lie within {ceiling:g} mm, got {_show(value)} (sigreport.limits)",
        )
        return None
    return (float(value[0]), float(value[1]), float(value[2]))


def _positive(value: Any, key: str, where: str, problems: _Problems) -> float | None:
    if not _is_number(value) or not math.isfinite(value) or value <= 0:
        problems.add(where, f"{key} must be a positive number, got {_show(value)}")
        return None
    if value > limits.MAX_ROI_EXTENT_MM:
        problems.add(
            where,
            f"{key} must be at most {limits.MAX_ROI_EXTENT_MM:g} mm, got {_show(value)} "
            "(sigreport.limits)",
        )
        return None
    return float(value)


def _parse_at(value: Any, where: str, problems: _Problems) -> ViewerPosition | None:
    """``at = {series, image, row, column[, frame]}`` (docs/rois.md, viewer positions)."""
    if not isinstance(value, dict):
        problems.add(
            where,
            "at must be a table {series = n, image = n, row = r, column = c} (frame = n for a "
            f"multi-frame file), got {_show(value)}",
        )
        return None
    ok = True
    unknown = sorted(set(value) - AT_KEYS)
    if unknown:
        problems.add(
            where,
            f"at: unknown key(s) {_choices(unknown)}; expected {_choices(sorted(AT_KEYS))}",
        )
        ok = False
    for key in ("series", "image", "row", "column"):
        if key not in value:
            problems.add(where, f"at.{key} is missing")
            ok = False
    ints: dict[str, int] = {}
    for key, low in (("series", 0), ("image", 0), ("frame", 1)):
        if key not in value:
            continue
        v = value[key]
        if isinstance(v, bool) or not isinstance(v, int) or v < low:
            problems.add(where, f"at.{key} must be an integer >= {low}, got {_show(v)}")
            ok = False
        else:
            ints[key] = v
    floats: dict[str, float] = {}
    for key in ("row", "column"):
        if key not in value:
            continue
        v = value[key]
        if not _is_number(v) or not math.isfinite(v) or v < 0:
            problems.add(
                where, f"at.{key} must be a 0-based pixel {key} (a number >= 0), got {_show(v)}"
            )
            ok = False
        else:
            floats[key] = float(v)
    if not ok:
        return None
    return ViewerPosition(
        series=ints["series"],
        image=ints["image"],
        row=floats["row"],
        column=floats["column"],
        frame=ints.get("frame"),
    )


def _optional_text(table: dict[str, Any], key: str, where: str, problems: _Problems) -> str | None:
    value = table.get(key)
    if value is None:
        return None
    if not isinstance(value, str) or not value.strip():
        problems.add(where, f"{key} must be a non-empty string, got {_show(value)}")
        return None
    return value


def _parse_roi(
    index: int, table: Any, base: Path, problems: _Problems
) -> tuple[dict[str, Any] | None, str]:
    """Check one ``[[roi]]`` table; return the RoiSpec fields (None when unusable) and its label."""
    if not isinstance(table, dict):
        problems.add(f"roi[{index}]", f"must be a table ([[roi]]), got {_show(table)}")
        return None, f"roi[{index}]"
    raw_id = table.get("id")
    label_id = raw_id if isinstance(raw_id, str) and raw_id.strip() else "?"
    where = f"roi[{index}] ({label_id})"
    ok = True

    unknown = sorted(set(table) - ROI_KEYS)
    if unknown:
        problems.add(
            where,
            f"unknown key(s) {_choices(unknown)}; expected one of {_choices(sorted(ROI_KEYS))}",
        )
        ok = False

    if raw_id is None:
        problems.add(where, "id is missing")
        ok = False
    elif (
        not isinstance(raw_id, str)
        or not raw_id.strip()
        or any(c.isspace() for c in raw_id)
        or len(raw_id) > _MAX_ID_LENGTH
    ):
        problems.add(
            where,
            f"id must be a short string without spaces (at most {_MAX_ID_LENGTH} characters), "
            f"got {_show(raw_id)}",
        )
        ok = False
    elif raw_id == AUTO_REFERENCE:
        problems.add(
            where, f'id {raw_id!r} is reserved (reference = "auto" asks for a mirror reference)'
        )
        ok = False

    kind: RoiKind | None = None
    raw_kind = table.get("kind")
    if raw_kind is None:
        problems.add(where, f"kind is missing; expected one of {_choices(RoiKind)}")
    elif raw_kind not in {k.value for k in RoiKind}:
        problems.add(where, f"kind must be one of {_choices(RoiKind)}, got {_show(raw_kind)}")
    else:
        kind = RoiKind(raw_kind)
    ok = ok and kind is not None

    shape: RoiShape | None = None
    raw_shape = table.get("shape")
    if raw_shape is None:
        problems.add(where, f"shape is missing; expected one of {_choices(RoiShape)}")
    elif raw_shape not in {s.value for s in RoiShape}:
        problems.add(
            where, f"unknown shape {_show(raw_shape)}; expected one of {_choices(RoiShape)}"
        )
    else:
        shape = RoiShape(raw_shape)
    ok = ok and shape is not None

    site = _optional_text(table, "site", where, problems)
    tissue = _optional_text(table, "tissue", where, problems)
    ok = ok and ("site" not in table or site is not None)
    ok = ok and ("tissue" not in table or tissue is not None)
    if kind is RoiKind.CONTROL and "tissue" not in table:
        problems.add(where, 'control ROIs need a tissue (e.g. "CSF" or "fat")')
        ok = False
    if kind is not None and kind is not RoiKind.LESION and "reference" in table:
        problems.add(where, f"reference is only for lesions, not for a {kind.value} ROI")
        ok = False
    reference = _optional_text(table, "reference", where, problems)
    ok = ok and ("reference" not in table or reference is not None)

    fields: dict[str, Any] = {}
    if shape is not None:
        needed = _SHAPE_KEYS[shape]
        allowed = needed | _SHAPE_OPTIONAL.get(shape, frozenset())
        present = set(table)
        if "center_mm" in needed and "at" in table:
            # A viewer position stands for the centre (docs/rois.md).
            if "center_mm" in table:
                problems.add(where, "give center_mm or at, not both")
                ok = False
            present.add("center_mm")
        elif "at" in table:
            problems.add(where, f"at does not apply to shape {shape.value}")
            ok = False
        for key in sorted(needed - present):
            hint = " or at" if key == "center_mm" else ""
            problems.add(where, f"{key}{hint} is missing (shape {shape.value} needs it)")
            ok = False
        for key in sorted((_GEOMETRY_KEYS - allowed) & set(table)):
            problems.add(where, f"{key} does not apply to shape {shape.value}")
            ok = False
        if "at" in table and "center_mm" in needed:
            fields["at"] = _parse_at(table["at"], where, problems)
            ok = ok and fields["at"] is not None
        if "max_radius_mm" in table and "max_radius_mm" in allowed:
            fields["max_radius_mm"] = _positive(
                table["max_radius_mm"], "max_radius_mm", where, problems
            )
            ok = ok and fields["max_radius_mm"] is not None
        if shape is not RoiShape.MASK:
            for key in sorted(_MASK_ONLY_KEYS & set(table)):
                problems.add(where, f"{key} only applies to shape mask")
                ok = False
        if "center_mm" in table and "center_mm" in needed:
            fields["center_mm"] = _vector3(
                table["center_mm"], "center_mm", where, problems, positive=False
            )
            ok = ok and fields["center_mm"] is not None
        if "radius_mm" in table and "radius_mm" in needed:
            fields["radius_mm"] = _positive(table["radius_mm"], "radius_mm", where, problems)
            ok = ok and fields["radius_mm"] is not None
        for key in ("semi_axes_mm", "size_mm"):
            if key in table and key in needed:
                fields[key] = _vector3(table[key], key, where, problems, positive=True)
                ok = ok and fields[key] is not None
        if "mask" in table and shape is RoiShape.MASK:
            raw_mask = table["mask"]
            if not isinstance(raw_mask, str) or not raw_mask.strip():
                problems.add(where, f"mask must be a file path (string), got {_show(raw_mask)}")
                ok = False
            else:
                mask_path = (base / raw_mask).resolve()
                problem = _not_a_file(mask_path)
                if problem == "not found":
                    problems.add(where, f"mask file {raw_mask} not found (looked for {mask_path})")
                    ok = False
                elif problem:
                    problems.add(where, f"mask {raw_mask} {problem} ({mask_path})")
                    ok = False
                fields["mask"] = mask_path
        if "segment" in table and shape is RoiShape.MASK:
            segment = table["segment"]
            if isinstance(segment, bool) or not (
                (isinstance(segment, int) and segment > 0)
                or (isinstance(segment, str) and segment.strip())
            ):
                problems.add(
                    where,
                    "segment must be a segment label / ROI name (string) or a segment number "
                    f"(positive integer), got {_show(segment)}",
                )
                ok = False
            else:
                fields["segment"] = segment
        if "label" in table and shape is RoiShape.MASK:
            label = table["label"]
            if isinstance(label, bool) or not isinstance(label, int) or label <= 0:
                problems.add(where, f"label must be a positive integer, got {_show(label)}")
                ok = False
            else:
                fields["label"] = label

    if not ok:
        return None, label_id
    fields.update(
        id=raw_id,
        kind=kind,
        shape=shape,
        site=site,
        tissue=tissue,
        reference=reference,
    )
    return fields, label_id


def _parse_roles(raw: Any, problems: _Problems) -> dict[Role, int | str]:
    roles: dict[Role, int | str] = {}
    if not isinstance(raw, dict):
        problems.add("[roles]", f"must be a table, got {_show(raw)}")
        return roles
    names = [r.value for r in Role if r is not Role.UNKNOWN]
    for key, value in raw.items():
        if key not in names:
            problems.add("[roles]", f"unknown role {key!r}; expected one of {_choices(names)}")
            continue
        if isinstance(value, float) and value.is_integer() and value >= 0:
            value = int(value)  # FLAIR = 4.0 is series 4
        elif isinstance(value, str) and value.strip().isdigit():
            value = int(value.strip())  # FLAIR = "4" is series 4 (a UID always has a dot)
        elif isinstance(value, str):
            value = value.strip()
        if isinstance(value, bool) or not (
            (isinstance(value, int) and value >= 0) or (isinstance(value, str) and value)
        ):
            shown = repr(value) if isinstance(value, float) else _show(value)
            problems.add(
                "[roles]",
                f"{key} must be a series number (a whole number such as 4) or a "
                f"SeriesInstanceUID (text), got {shown}",
            )
            continue
        roles[Role(key)] = value
    return roles


def _parse_options(raw: Any, problems: _Problems) -> tuple[bool | None, str | None]:
    if not isinstance(raw, dict):
        problems.add("[options]", f"must be a table, got {_show(raw)}")
        return None, None
    unknown = sorted(set(raw) - OPTION_KEYS)
    if unknown:
        problems.add(
            "[options]",
            f"unknown key(s) {_choices(unknown)}; expected one of {_choices(sorted(OPTION_KEYS))}",
        )
    register = raw.get("register")
    if register is not None and not isinstance(register, bool):
        problems.add("[options]", f"register must be true or false, got {_show(register)}")
        register = None
    anchor = raw.get("anchor")
    if anchor is not None and (not isinstance(anchor, str) or not anchor.strip()):
        problems.add(
            "[options]",
            "anchor must be a string (a role name, or a series number / UID in quotes), "
            f"got {_show(anchor)}",
        )
        anchor = None
    return register, anchor


def _not_a_file(path: Path) -> str | None:
    """Why ``path`` is not a regular file to read ("not found", "is a folder, not a file", ...),
    or None when it is one."""
    try:
        mode = path.stat().st_mode
    except FileNotFoundError:
        return "not found"
    except OSError as exc:
        return f"cannot be read: {exc.strerror or exc}"
    if stat.S_ISDIR(mode):
        return "is a folder, not a file"
    if not stat.S_ISREG(mode):
        return "is a device or pipe, not a regular file"
    return None


# Byte order marks (Unicode 15, section 23.8) of the encodings a text editor may have used.
_UTF16_32_BOMS = (b"\xff\xfe\x00\x00", b"\x00\x00\xfe\xff", b"\xff\xfe", b"\xfe\xff")


def _toml_text(raw: bytes, name: str) -> str:
    """The case file's text. TOML files are UTF-8 (TOML 1.0, "Spec"); a UTF-8 byte order mark
    is dropped; UTF-16/32 and binary files are refused with what they look like."""
    if raw.startswith(_UTF16_32_BOMS):
        raise InputError(
            f"{name}: is UTF-16 or UTF-32 text (it starts with a byte order mark); a case file "
            "must be UTF-8: save it as UTF-8"
        )
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise InputError(
            f"{name}: not UTF-8 text (byte 0x{raw[exc.start]:02x} at offset {exc.start}); a "
            "case file is a TOML text file in UTF-8"
        ) from None
    if "\x00" in text:
        raise InputError(
            f"{name}: holds NUL bytes (UTF-16 without a byte order mark, or not a text file); "
            "a case file is a TOML text file in UTF-8"
        )
    return text.removeprefix("\ufeff")


def load_case(path: Path) -> Case:
    """Read and validate a case file.

    Parameters
    ----------
    path : pathlib.Path
        The case file (TOML, docs/usage.md "The case file").

    Returns
    -------
    sigreport.model.Case
        With absolute paths, and each lesion's ``reference`` resolved (the first reference ROI
        when the case file names none).

    Raises
    ------
    sigreport.errors.InputError
        When the file is missing or not TOML, or when any field is wrong; the message lists
        every problem found, one per line, each prefixed with the file name and the place.
    """
    path = Path(path).expanduser().resolve()
    name = path.name
    problem = _not_a_file(path)
    if problem == "is a folder, not a file":
        problem = "is a folder, not a case file"
    if problem:
        raise InputError(f"case file {path} {problem}")
    try:
        raw_bytes = path.read_bytes()
    except OSError as exc:
        raise InputError(f"{name}: cannot be read: {exc.strerror or exc}") from None
    try:
        data = tomllib.loads(_toml_text(raw_bytes, name))
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"{name}: not valid TOML: {exc}") from None

    base = path.parent
    problems = _Problems(name)

    unknown = sorted(set(data) - TOP_KEYS)
    if unknown:
        problems.add(
            "",
            f"unknown top-level key(s) {_choices(unknown)}; "
            f"expected one of {_choices(sorted(TOP_KEYS))}",
        )

    study: Path | None = None
    if "study" in data:
        raw = data["study"]
        if not isinstance(raw, str) or not raw.strip():
            problems.add("", f"study must be a folder path (string), got {_show(raw)}")
        else:
            study = (base / raw).resolve()

    study_uid: str | None = None
    if "study_uid" in data:
        raw = data["study_uid"]
        if not isinstance(raw, str) or not _is_uid(raw.strip()):
            problems.add(
                "",
                "study_uid must be a StudyInstanceUID (digits and dots, at most 64 characters), "
                f"got {_show(raw)}",
            )
        else:
            study_uid = raw.strip()

    lexicon: Path | None = None
    if "lexicon" in data:
        raw = data["lexicon"]
        if not isinstance(raw, str) or not raw.strip():
            problems.add("", f"lexicon must be a folder path (string), got {_show(raw)}")
        else:
            lexicon = (base / raw).resolve()
            if not lexicon.exists():
                problems.add("", f"lexicon folder {raw} not found (looked for {lexicon})")
            elif not lexicon.is_dir():
                problems.add("", f"lexicon {raw} is a file, not a folder ({lexicon})")

    roles = _parse_roles(data.get("roles", {}), problems)
    register, anchor = _parse_options(data.get("options", {}), problems)

    raw_rois = data.get("roi")
    parsed: list[dict[str, Any]] = []
    if raw_rois is None:
        problems.add("", "no [[roi]] tables; at least one lesion and one reference are needed")
        raw_rois = []
    elif not isinstance(raw_rois, list):
        problems.add("", f"roi must be an array of tables ([[roi]]), got {_show(raw_rois)}")
        raw_rois = []
    elif len(raw_rois) > limits.MAX_ROIS:
        # Checked before any ROI is looked at: each one costs a sampled mask per series.
        raise InputError(
            f"{name}: {len(raw_rois)} [[roi]] tables; at most {limits.MAX_ROIS} are allowed "
            "(sigreport.limits)"
        )

    seen: dict[str, int] = {}
    for index, table in enumerate(raw_rois, start=1):
        fields, label_id = _parse_roi(index, table, base, problems)
        if isinstance(table, dict) and isinstance(table.get("id"), str):
            roi_id = table["id"]
            if roi_id in seen:
                problems.add(
                    f"roi[{index}] ({roi_id})", f"duplicate id; roi[{seen[roi_id]}] has it too"
                )
                fields = None
            else:
                seen[roi_id] = index
        if fields is not None:
            fields["_index"] = index
            parsed.append(fields)

    # Kinds as far as they could be read, so that reference checks work on partly bad files.
    kinds: dict[str, Any] = {}
    for table in raw_rois:
        if isinstance(table, dict) and isinstance(table.get("id"), str):
            kinds.setdefault(table["id"], table.get("kind"))
    references = [roi_id for roi_id, kind in kinds.items() if kind == RoiKind.REFERENCE.value]
    lesions = [roi_id for roi_id, kind in kinds.items() if kind == RoiKind.LESION.value]
    # Lesions with reference = "auto" need no reference ROI of the case file (docs/rois.md).
    all_auto = bool(lesions) and all(
        isinstance(t, dict) and t.get("reference") == AUTO_REFERENCE
        for t in raw_rois
        if isinstance(t, dict) and t.get("kind") == RoiKind.LESION.value
    )
    if raw_rois and not lesions:
        problems.add("", 'no lesion ROI (kind = "lesion"); at least one is needed')
    if raw_rois and not references and not all_auto:
        problems.add(
            "",
            'no reference ROI (kind = "reference"); at least one is needed (or reference = '
            '"auto" on every lesion)',
        )

    for fields in parsed:
        if fields["kind"] is not RoiKind.LESION:
            continue
        where = f"roi[{fields['_index']}] ({fields['id']})"
        ref = fields["reference"]
        if ref == AUTO_REFERENCE:
            continue
        if ref is None:
            fields["reference"] = references[0] if references else None
        elif ref not in kinds:
            problems.add(where, f"reference {ref!r} is not the id of any ROI")
        elif kinds[ref] != RoiKind.REFERENCE.value:
            problems.add(where, f"reference {ref!r} is a {kinds[ref]} ROI, not a reference ROI")

    problems.raise_if_any()
    rois = tuple(RoiSpec(**{k: v for k, v in fields.items() if k != "_index"}) for fields in parsed)
    return Case(
        path=path,
        study=study,
        study_uid=study_uid,
        roles=roles,
        register=register,
        anchor=anchor,
        rois=rois,
        lexicon=lexicon,
    )
