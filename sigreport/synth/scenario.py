"""Scenario files (``demo_cases/*.toml``): patient, lesions, ROIs and series of a synthetic study.

A scenario is data. This module reads one, checks every key and value, and returns frozen
dataclasses; ``docs/synthetic.md`` describes the format.
"""

from __future__ import annotations

import tomllib
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from sigreport.errors import InputError
from sigreport.lexicon import check_keys
from sigreport.model import EnhancementPattern, RoiKind, Role
from sigreport.synth.phantom import Cylinder, Ellipsoid, Solid, Sphere

Vec3 = tuple[float, float, float]

SEQUENCES = ("SE", "TSE", "IR", "GRE", "DWI", "ADC", "DIXON")
TE_KEYWORDS = ("in-phase", "opposed-phase")  # echo times worked out from the field strength
DIXON_IMAGES = ("water", "fat")
ORIENTATIONS = ("axial", "coronal", "sagittal")


@dataclass(frozen=True)
class Patient:
    name: str = "DEMO^PATIENT"
    id: str = "SIGDEMO"
    birth_date: str = ""
    sex: str = "O"


@dataclass(frozen=True)
class StudyMeta:
    date: str = "20261201"
    time: str = "090000"
    description: str = "MR (SYNTHETIC)"
    accession: str = ""
    referring_physician: str = ""


@dataclass(frozen=True)
class LesionPlan:
    """One lesion painted into the model: ``solids`` outermost first."""

    name: str
    solids: tuple[tuple[str, Solid], ...]


@dataclass(frozen=True)
class RoiPlan:
    id: str
    kind: RoiKind
    center_mm: Vec3
    site: str | None = None
    tissue: str | None = None  # reference / control tissue (a lexicon key)
    lesion: str | None = None  # lesions: what the ROI measures (truth.json "tissue")
    contains: tuple[str, ...] = ()
    radius_mm: float | None = None
    semi_axes_mm: Vec3 | None = None
    pattern: EnhancementPattern = EnhancementPattern.NONE
    reference: str | None = None
    outline: bool = False  # written to the case file as a mask (a drawn outline), not a shape

    @property
    def shape(self) -> str:
        if self.outline:
            return "mask"
        return "sphere" if self.semi_axes_mm is None else "ellipsoid"


@dataclass(frozen=True)
class SeriesPlan:
    role: Role
    number: int
    description: str
    sequence: str  # SE | TSE | IR | GRE
    acquisition: str  # 2D | 3D
    orientation: str
    tr_ms: float
    te_ms: float
    pixel_mm: float
    slice_mm: float
    gap_mm: float
    fov_mm: Vec3
    snr: float
    gain_group: str
    ti_ms: float | None = None
    ti_null: str | None = None  # tissue whose null point sets TI
    flip_deg: float | None = None
    echo_train: int = 1
    fat_sat: bool = False
    contrast: bool = False
    tilt_deg: float = 0.0
    center_mm: Vec3 = (0.0, 0.0, 0.0)
    rescale: tuple[float, float] | None = None  # (slope, intercept)
    localizer: bool = False  # ImageType LOCALIZER; role UNKNOWN, never measured
    te_keyword: str | None = None  # "in-phase" / "opposed-phase": TE from the field strength
    b_values: tuple[float, ...] = ()  # DWI: the b-values (s/mm^2) of the trace images
    adc_of: int | None = None  # ADC: the number of the DWI series it is computed from
    dixon: str | None = None  # DIXON: "water" or "fat"
    delay_s: float | None = None  # dynamic post-contrast phase: seconds after injection
    group: str | None = None  # series of one acquisition (dynamic phases, Dixon images, echoes):
    # they share the head position and the receive field

    @property
    def measured(self) -> bool:
        return self.role is not Role.UNKNOWN

    @property
    def spacing_mm(self) -> float:
        return self.slice_mm + self.gap_mm


@dataclass(frozen=True)
class Scenario:
    path: Path
    name: str
    seed: int
    field_strength_t: float
    motion: bool
    motion_max_mm: float
    motion_max_deg: float
    anchor: Role
    patient: Patient
    study: StudyMeta
    lesions: tuple[LesionPlan, ...]
    rois: tuple[RoiPlan, ...]
    series: tuple[SeriesPlan, ...]


def _vec3(value: Any, where: str) -> Vec3:
    if not isinstance(value, list) or len(value) != 3:
        raise InputError(f"{where}: expected 3 numbers, got {value!r}")
    try:
        return (float(value[0]), float(value[1]), float(value[2]))
    except (TypeError, ValueError):
        raise InputError(f"{where}: expected 3 numbers, got {value!r}") from None


def _positive(value: Any, where: str) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise InputError(f"{where}: expected a number, got {value!r}") from None
    if not v > 0:
        raise InputError(f"{where}: must be > 0, got {v}")
    return v


def _lesion(entry: dict[str, Any], where: str) -> LesionPlan:
    check_keys(
        entry,
        {
            "name",
            "tissue",
            "shape",
            "center_mm",
            "radius_mm",
            "semi_axes_mm",
            "layers",
            "start_mm",
            "end_mm",
        },
        where,
    )
    name = str(entry.get("name", ""))
    if not name:
        raise InputError(f"{where}: needs a name")
    shape = entry.get("shape", "sphere")
    if shape == "cylinder":
        solid = Cylinder(
            _vec3(entry.get("start_mm"), f"{where}.start_mm"),
            _vec3(entry.get("end_mm"), f"{where}.end_mm"),
            _positive(entry.get("radius_mm"), f"{where}.radius_mm"),
        )
        return LesionPlan(name, ((str(entry["tissue"]), solid),))
    if shape not in ("sphere", "ellipsoid"):
        raise InputError(f'{where}.shape: "{shape}" is not sphere, ellipsoid or cylinder')
    center = _vec3(entry.get("center_mm"), f"{where}.center_mm")
    if "layers" in entry:
        solids = []
        for k, layer in enumerate(entry["layers"]):
            lw = f"{where}.layers[{k}]"
            check_keys(layer, {"tissue", "radius_mm"}, lw)
            solids.append(
                (str(layer["tissue"]), Sphere(center, _positive(layer.get("radius_mm"), lw)))
            )
        return LesionPlan(name, tuple(solids))
    if "tissue" not in entry:
        raise InputError(f"{where}: needs a tissue (or layers)")
    if shape == "ellipsoid":
        axes = _vec3(entry.get("semi_axes_mm"), f"{where}.semi_axes_mm")
        body: Solid = Ellipsoid(center, axes)
    else:
        body = Sphere(center, _positive(entry.get("radius_mm"), f"{where}.radius_mm"))
    return LesionPlan(name, ((str(entry["tissue"]), body),))


def _roi(entry: dict[str, Any], where: str) -> RoiPlan:
    check_keys(
        entry,
        {
            "id",
            "kind",
            "site",
            "tissue",
            "lesion",
            "contains",
            "center_mm",
            "radius_mm",
            "semi_axes_mm",
            "pattern",
            "reference",
            "outline",
        },
        where,
    )
    try:
        kind = RoiKind(str(entry.get("kind")))
        pattern = EnhancementPattern(entry.get("pattern", "none"))
    except ValueError as exc:
        raise InputError(f"{where}: {exc}") from None
    semi = entry.get("semi_axes_mm")
    radius = entry.get("radius_mm")
    if (semi is None) == (radius is None):
        raise InputError(f"{where}: give exactly one of radius_mm and semi_axes_mm")
    contains = tuple(str(t) for t in entry.get("contains", ()))
    if not contains:
        raise InputError(f"{where}: contains must list the tissue(s) the ROI lies in")
    if kind is not RoiKind.LESION and not entry.get("tissue"):
        raise InputError(f"{where}: a {kind.value} ROI needs a tissue")
    return RoiPlan(
        id=str(entry.get("id", "")),
        kind=kind,
        center_mm=_vec3(entry.get("center_mm"), f"{where}.center_mm"),
        site=entry.get("site"),
        tissue=entry.get("tissue"),
        lesion=entry.get("lesion"),
        contains=contains,
        radius_mm=None if radius is None else _positive(radius, f"{where}.radius_mm"),
        semi_axes_mm=None if semi is None else _vec3(semi, f"{where}.semi_axes_mm"),
        pattern=pattern,
        reference=entry.get("reference"),
        outline=bool(entry.get("outline", False)),
    )


_SERIES_KEYS = {
    "role", "number", "description", "sequence", "acquisition", "orientation", "tr_ms", "te_ms",
    "ti_ms", "flip_deg", "echo_train", "fat_sat", "contrast", "tilt_deg", "center_mm",
    "pixel_mm", "slice_mm", "gap_mm", "fov_mm", "snr", "gain_group", "rescale", "localizer",
    "b_values", "adc_of", "dixon", "delay_s", "group",
}  # fmt: skip


def _series(entry: dict[str, Any], where: str) -> SeriesPlan:
    check_keys(entry, _SERIES_KEYS, where)
    try:
        role = Role(str(entry.get("role")))
    except ValueError:
        raise InputError(f"{where}.role: {entry.get('role')!r} is not a series role") from None
    sequence = entry.get("sequence")
    if sequence not in SEQUENCES:
        raise InputError(f"{where}.sequence: {sequence!r} is not one of {', '.join(SEQUENCES)}")
    orientation = entry.get("orientation", "axial")
    if orientation not in ORIENTATIONS:
        raise InputError(f"{where}.orientation: {orientation!r} is not one of {ORIENTATIONS}")
    acquisition = entry.get("acquisition", "2D")
    if acquisition not in ("2D", "3D"):
        raise InputError(f"{where}.acquisition: {acquisition!r} is not 2D or 3D")
    ti = entry.get("ti_ms")
    ti_ms: float | None = None
    ti_null: str | None = None
    if isinstance(ti, str):
        if not ti.startswith("null:"):
            raise InputError(f'{where}.ti_ms: "{ti}" is neither a number nor "null:<tissue>"')
        ti_null = ti.removeprefix("null:")
    elif ti is not None:
        ti_ms = _positive(ti, f"{where}.ti_ms")
    if sequence == "IR" and ti is None:
        raise InputError(f"{where}: an IR series needs ti_ms")
    if (role is Role.UNKNOWN) != bool(entry.get("localizer", False)):
        raise InputError(f"{where}: a localizer has role UNKNOWN, and only a localizer has")
    te = entry.get("te_ms")
    te_keyword = te if isinstance(te, str) else None
    if te_keyword is not None and (
        te_keyword not in TE_KEYWORDS or sequence not in ("GRE", "DIXON")
    ):
        raise InputError(
            f"{where}.te_ms: {te!r}: a word is allowed for gradient echo only, one of {TE_KEYWORDS}"
        )
    b_values = tuple(float(b) for b in entry.get("b_values", ()))
    if (sequence == "DWI") != bool(b_values) or any(b < 0 for b in b_values):
        raise InputError(f"{where}: a DWI series (and only a DWI series) needs b_values >= 0")
    if sequence == "DWI" and (len(b_values) < 2 or b_values[0] != 0 or max(b_values) <= 0):
        raise InputError(f"{where}.b_values: start with 0 and hold a higher b, got {b_values}")
    adc_of = entry.get("adc_of")
    if (sequence == "ADC") != (adc_of is not None):
        raise InputError(f"{where}: an ADC series (and only one) names adc_of = <DWI number>")
    dixon = entry.get("dixon")
    if (sequence == "DIXON") != (dixon is not None) or (
        dixon is not None and dixon not in DIXON_IMAGES
    ):
        raise InputError(f"{where}: a DIXON series (and only one) has dixon = water or fat")
    delay = entry.get("delay_s")
    if delay is not None and (not entry.get("contrast") or float(delay) < 0):
        raise InputError(f"{where}.delay_s: a dynamic phase is post-contrast with delay_s >= 0")
    if sequence in ("GRE", "DIXON") and entry.get("flip_deg") is None:
        raise InputError(f"{where}: a {sequence} series needs flip_deg")
    rescale = entry.get("rescale")
    if rescale is not None:
        if not isinstance(rescale, list) or len(rescale) != 2 or float(rescale[0]) <= 0:
            raise InputError(f"{where}.rescale: expected [slope > 0, intercept], got {rescale!r}")
        rescale = (float(rescale[0]), float(rescale[1]))
    gap = float(entry.get("gap_mm", 0.0))
    if gap < 0:
        raise InputError(f"{where}.gap_mm: must be >= 0, got {gap}")
    return SeriesPlan(
        role=role,
        number=int(entry.get("number", 0)),
        description=str(entry.get("description", role.value)),
        sequence=sequence,
        acquisition=acquisition,
        orientation=orientation,
        tr_ms=_positive(entry.get("tr_ms"), f"{where}.tr_ms"),
        te_ms=1.0 if te_keyword else _positive(te, f"{where}.te_ms"),
        pixel_mm=_positive(entry.get("pixel_mm"), f"{where}.pixel_mm"),
        slice_mm=_positive(entry.get("slice_mm"), f"{where}.slice_mm"),
        gap_mm=gap,
        fov_mm=_vec3(entry.get("fov_mm"), f"{where}.fov_mm"),
        snr=_positive(entry.get("snr", 40.0), f"{where}.snr"),
        gain_group=str(entry.get("gain_group", role.value)),
        ti_ms=ti_ms,
        ti_null=ti_null,
        flip_deg=None if entry.get("flip_deg") is None else float(entry["flip_deg"]),
        echo_train=int(entry.get("echo_train", 1)),
        fat_sat=bool(entry.get("fat_sat", False)),
        contrast=bool(entry.get("contrast", False)),
        tilt_deg=float(entry.get("tilt_deg", 0.0)),
        center_mm=_vec3(entry.get("center_mm", [0.0, 0.0, 0.0]), f"{where}.center_mm"),
        rescale=rescale,
        localizer=bool(entry.get("localizer", False)),
        te_keyword=te_keyword,
        b_values=b_values,
        adc_of=None if adc_of is None else int(adc_of),
        dixon=dixon,
        delay_s=None if delay is None else float(delay),
        group=None if entry.get("group") is None else str(entry["group"]),
    )


def load_scenario(path: Path | str) -> Scenario:
    """Read and validate a scenario TOML file.

    Raises
    ------
    InputError
        The file is missing, not TOML, or a key or value is wrong (the message names it).
    """
    path = Path(path)
    try:
        with path.open("rb") as handle:
            data = tomllib.load(handle)
    except OSError as exc:
        raise InputError(f"scenario {path}: {exc.strerror}") from None
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"scenario {path}: not valid TOML: {exc}") from None
    w = str(path)
    check_keys(
        data,
        {
            "name",
            "seed",
            "field_strength_t",
            "motion",
            "motion_max_mm",
            "motion_max_deg",
            "anchor",
            "patient",
            "study",
            "lesion",
            "roi",
            "series",
        },
        w,
    )
    patient = data.get("patient", {})
    check_keys(patient, {"name", "id", "birth_date", "sex"}, f"{w}: patient")
    study = data.get("study", {})
    check_keys(
        study, {"date", "time", "description", "accession", "referring_physician"}, f"{w}: study"
    )
    lesions = tuple(_lesion(e, f"{w}: lesion[{k}]") for k, e in enumerate(data.get("lesion", [])))
    rois = tuple(_roi(e, f"{w}: roi[{k}]") for k, e in enumerate(data.get("roi", [])))
    series = tuple(_series(e, f"{w}: series[{k}]") for k, e in enumerate(data.get("series", [])))
    if not series:
        raise InputError(f"{w}: no [[series]]")
    roles = [s.role for s in series]
    single = [s.role for s in series if s.delay_s is None]  # dynamic phases may share a role
    if len(set(single)) != len(single):
        raise InputError(f"{w}: each series role may appear once, got {[r.value for r in roles]}")
    numbers_seen = {s.number: s for s in series}
    for s in series:
        if s.adc_of is not None:
            source = numbers_seen.get(s.adc_of)
            if source is None or source.sequence != "DWI":
                raise InputError(f"{w}: series {s.number}: adc_of = {s.adc_of} is not a DWI series")
    numbers = [s.number for s in series]
    if len(set(numbers)) != len(numbers) or min(numbers) < 1:
        raise InputError(f"{w}: series numbers must be distinct and >= 1, got {numbers}")
    ids = [r.id for r in rois]
    if len(set(ids)) != len(ids) or not all(ids):
        raise InputError(f"{w}: ROI ids must be present and unique, got {ids}")
    if not any(r.kind is RoiKind.REFERENCE for r in rois):
        raise InputError(f"{w}: needs at least one reference ROI")
    for r in rois:
        if r.reference is not None and r.reference not in ids:
            raise InputError(f"{w}: ROI {r.id} names unknown reference {r.reference!r}")
    if not any(s.measured for s in series):
        raise InputError(f"{w}: no series to measure (only localizers)")
    try:
        anchor = Role(data.get("anchor", [s for s in series if s.measured][-1].role.value))
    except ValueError:
        raise InputError(f"{w}: anchor {data.get('anchor')!r} is not a series role") from None
    if anchor not in roles or anchor is Role.UNKNOWN:
        raise InputError(f"{w}: anchor {anchor.value} is not one of the measured series")
    return Scenario(
        path=path,
        name=str(data.get("name", path.stem)),
        seed=int(data.get("seed", 0)),
        field_strength_t=float(data.get("field_strength_t", 1.5)),
        motion=bool(data.get("motion", False)),
        motion_max_mm=float(data.get("motion_max_mm", 2.0)),
        motion_max_deg=float(data.get("motion_max_deg", 2.0)),
        anchor=anchor,
        patient=Patient(**{k: str(v) for k, v in patient.items()}),
        study=StudyMeta(**{k: str(v) for k, v in study.items()}),
        lesions=lesions,
        rois=rois,
        series=series,
    )
