"""Build a synthetic MR head study from a scenario: DICOM files, the case file, and the truth.

scenario -> head model (anatomy + lesions) -> per-series noiseless signal (signal equations)
         -> bias field -> truth ratios on the 1 mm model grid
         -> motion + slice profile resampling -> Rician noise -> gain and stored values
         -> DICOM (classic or Enhanced MR), case.toml, truth.json
"""

from __future__ import annotations

import json
import math
import re
import shutil
import tempfile
import tomllib
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np
import SimpleITK as sitk
from pydicom.uid import generate_uid

from sigreport.errors import InputError
from sigreport.model import (
    ENHANCEMENT_PAIRS,
    SUPPRESSION_PAIRS,
    EnhancementPattern,
    RoiKind,
    Role,
    first_pair,
)
from sigreport.synth import phantom, physics
from sigreport.synth.geometry import SeriesGeometry, model_image, plan_geometry, sample
from sigreport.synth.physics import rician
from sigreport.synth.scenario import RoiPlan, Scenario, SeriesPlan, load_scenario
from sigreport.synth.sequences import (
    ResolvedSeries,
    resolve_ti,
    tissue_signals,
    water_fat_signals,
)
from sigreport.synth.tissues import TissueTable, demo_dir, load_tissues
from sigreport.synth.writer import (
    SeriesOutput,
    SeriesTiming,
    StudyHeader,
    write_classic,
    write_enhanced,
)

TRUTH_SCHEMA = "sigreport-truth/1"
ROI_PURITY = 0.95  # every ROI voxel must be at least this fraction of its `contains` tissues
GAIN_TARGET = 2500.0  # stored values peak near this times a random factor in [0.6, 1.6]


@dataclass(frozen=True)
class GeneratedStudy:
    """Where a generated study was written."""

    root: Path  # out_dir
    study_dir: Path  # out_dir / "study"
    case_path: Path  # out_dir / "case.toml"
    truth_path: Path  # out_dir / "truth.json"


@dataclass(frozen=True)
class Motion:
    """A rigid head motion about ``center_mm``: p -> R (p - c) + c + t (anatomy to series)."""

    translation_mm: tuple[float, float, float]
    rotation_deg: float
    axis: tuple[float, float, float]
    center_mm: tuple[float, float, float] = (0.0, 0.0, 0.0)

    def transform(self) -> sitk.Transform:
        t = sitk.VersorRigid3DTransform()
        t.SetCenter(self.center_mm)
        t.SetRotation(self.axis, math.radians(self.rotation_deg))
        t.SetTranslation(self.translation_mm)
        return t

    def to_json(self) -> dict[str, Any]:
        return {
            "translation_mm": [round(v, 4) for v in self.translation_mm],
            "rotation_deg": round(self.rotation_deg, 4),
            "axis": [round(v, 6) for v in self.axis],
            "center_mm": list(self.center_mm),
        }


NO_MOTION = Motion((0.0, 0.0, 0.0), 0.0, (0.0, 0.0, 1.0))


def demo_scenarios() -> dict[str, Path]:
    """The bundled scenarios: name -> TOML path (every ``demo_cases/*.toml`` with series)."""
    out: dict[str, Path] = {}
    for path in sorted(demo_dir().glob("*.toml")):
        with path.open("rb") as handle:
            data = tomllib.load(handle)
        if "series" in data:
            out[str(data.get("name", path.stem))] = path
    return out


def _resolve_scenario(scenario: Path | str) -> Path:
    path = Path(scenario)
    if path.suffix == ".toml" or path.exists():
        if not path.is_file():
            raise InputError(f"scenario {path} does not exist")
        return path
    demos = demo_scenarios()
    if str(scenario) not in demos:
        raise InputError(
            f'scenario "{scenario}" is neither a TOML file nor a demo ({", ".join(demos)})'
        )
    return demos[str(scenario)]


def _truth_rules() -> dict[str, float]:
    with (demo_dir() / "truth_rules.toml").open("rb") as handle:
        return {k: float(v) for k, v in tomllib.load(handle).items()}


def _roi_mask(grid: phantom.Grid, roi: RoiPlan) -> np.ndarray:
    """Voxels whose centre lies inside the ROI (docs/usage.md membership rule)."""
    x, y, z = grid.points((slice(None), slice(None), slice(None)))
    c = roi.center_mm
    r = float(roi.radius_mm or 0.0)
    axes = roi.semi_axes_mm or (r, r, r)
    q = ((x - c[0]) / axes[0]) ** 2 + ((y - c[1]) / axes[1]) ** 2 + ((z - c[2]) / axes[2]) ** 2
    return q <= 1.0


def _series_roi_mask(geo: SeriesGeometry, roi: RoiPlan) -> np.ndarray:
    """Voxels of a series grid (array ``[slice, row, column]``) whose centre lies inside the
    ROI (docs/usage.md membership rule; PS3.3 C.7.6.2.1.1 voxel centres). Only the index box
    around the ROI is evaluated."""
    cols, rows, slices = geo.size
    axes_dir = np.column_stack([geo.row, geo.column, geo.normal])  # orthonormal
    spacing = np.asarray(geo.spacing, dtype=np.float64)
    c = np.asarray(roi.center_mm, dtype=np.float64)
    r = float(roi.radius_mm or 0.0)
    semi = np.asarray(roi.semi_axes_mm or (r, r, r), dtype=np.float64)
    centre_index = axes_dir.T @ (c - np.asarray(geo.origin)) / spacing
    reach = float(semi.max()) / spacing + 1.0
    lo = np.maximum(np.floor(centre_index - reach), 0).astype(int)
    hi = np.minimum(np.ceil(centre_index + reach), np.array([cols, rows, slices]) - 1).astype(int)
    mask = np.zeros((slices, rows, cols), dtype=bool)
    if np.any(hi < lo):
        return mask
    k, j, i = np.meshgrid(
        np.arange(lo[2], hi[2] + 1),
        np.arange(lo[1], hi[1] + 1),
        np.arange(lo[0], hi[0] + 1),
        indexing="ij",
    )
    index = np.stack([i, j, k], axis=-1) * spacing
    points = np.asarray(geo.origin) + index @ axes_dir.T
    inside = np.sum(((points - c) / semi) ** 2, axis=-1) <= 1.0
    mask[lo[2] : hi[2] + 1, lo[1] : hi[1] + 1, lo[0] : hi[0] + 1] = inside
    return mask


def _bias_field(grid: phantom.Grid, rng: np.random.Generator) -> np.ndarray:
    """A smooth multiplicative receive field, within about +-10 % over the head."""
    x, y, z = grid.points((slice(None), slice(None), slice(None)))
    half = [
        max(abs(lo), abs(hi)) for lo, hi in zip(phantom.GRID_LOW, phantom.GRID_HIGH, strict=True)
    ]
    u, v, w = x / half[0], y / half[1], z / half[2]
    a = rng.uniform(-0.05, 0.05, 3)
    c = rng.uniform(-0.05, 0.05)
    field = 1.0 + a[0] * u + a[1] * v + a[2] * w + c * (u * u + v * v + w * w - 1.0)
    return np.broadcast_to(field, grid.shape).astype(np.float32)


def _random_motion(scn: Scenario, rng: np.random.Generator) -> Motion:
    t = rng.uniform(-scn.motion_max_mm, scn.motion_max_mm, 3)
    axis = rng.normal(size=3)
    axis /= np.linalg.norm(axis)
    angle = rng.uniform(0.3, 1.0) * scn.motion_max_deg
    return Motion(
        (float(t[0]), float(t[1]), float(t[2])),
        float(angle),
        (float(axis[0]), float(axis[1]), float(axis[2])),
    )


@dataclass(frozen=True)
class _Echo:
    """One image set a series plan writes: the biased noiseless image on the model grid, and
    for a derived map its series-grid images (computed, not sampled)."""

    index: int  # 0 for the first image set of the series, 1, 2... for further b-values
    model: np.ndarray
    b_value: float | None = None
    still: np.ndarray | None = None
    noisy: np.ndarray | None = None


def _echoes(
    plan: SeriesPlan,
    resolved: ResolvedSeries,
    table: TissueTable,
    model: phantom.HeadModel,
    bias: np.ndarray,
    fat_sat_failed: bool,
    dwi_images: dict[int, dict[float, tuple[np.ndarray, np.ndarray, np.ndarray]]],
) -> list[_Echo]:
    """The image sets of one series: one for most series, one per b-value for DWI; an ADC map
    is computed from its DWI series' b=0 and highest-b images (noiseless on the model grid,
    noisy on the series grid), as a scanner computes it."""
    if plan.sequence == "DWI":
        return [
            _Echo(
                k,
                model.paint(
                    tissue_signals(resolved, table, b_value=b, fat_sat_failed=fat_sat_failed)
                )
                * bias,
                b_value=b,
            )
            for k, b in enumerate(plan.b_values)
        ]
    if plan.sequence == "ADC":
        assert plan.adc_of is not None
        source = dwi_images[plan.adc_of]
        b = max(source)
        (m0, s0, n0), (mb, sb, nb) = source[0.0], source[b]
        noisy = physics.apparent_diffusion(n0, nb, b)
        # Scanners blank the map where the b=0 signal is background (common practice).
        noisy[n0 < 0.05 * float(np.percentile(n0, 99))] = 0.0
        noisy = np.clip(noisy, 0.0, 5000.0)
        return [
            _Echo(
                0,
                physics.apparent_diffusion(m0, mb, b).astype(np.float32),
                still=physics.apparent_diffusion(s0, sb, b),
                noisy=noisy,
            )
        ]
    if plan.sequence == "DIXON" or plan.te_keyword is not None:
        water, fat = water_fat_signals(resolved, table)
        w, f = model.paint(water) * bias, model.paint(fat) * bias
        if plan.dixon == "water":
            return [_Echo(0, w)]
        if plan.dixon == "fat":
            return [_Echo(0, f)]
        phase = physics.fat_water_phase(resolved.plan.te_ms, table.field_strength_t)
        return [_Echo(0, physics.two_component_magnitude(w, f, phase).astype(np.float32))]
    return [
        _Echo(0, model.paint(tissue_signals(resolved, table, fat_sat_failed=fat_sat_failed)) * bias)
    ]


def _timing(scn: Scenario, plan: SeriesPlan) -> SeriesTiming | None:
    """Acquisition time and temporal position of a dynamic phase: the phases of a group are
    timed from the injection, which starts when the group's first post phase would start."""
    if plan.group is None or not any(s.group == plan.group and s.contrast for s in scn.series):
        return None
    members = [s for s in scn.series if s.group == plan.group]
    first_post = min(s.number for s in members if s.contrast)
    hh, mm, ss = (int(scn.study.time[i : i + 2] or 0) for i in (0, 2, 4))
    injection = hh * 3600 + mm * 60 + ss + 240 * first_post - 60
    delay = plan.delay_s if plan.delay_s is not None else -60.0  # the pre phase: a minute before
    order = sorted(members, key=lambda s: s.delay_s if s.delay_s is not None else -1.0)
    return SeriesTiming(
        acquisition_s=(injection + delay) % 86400,
        injection_s=injection % 86400 if plan.contrast else None,
        temporal_position=order.index(plan) + 1,
        temporal_positions=len(members),
    )


def _check_scenario(scn: Scenario, table: TissueTable) -> None:
    names = {t for lesion in scn.lesions for t, _ in lesion.solids}
    names |= {t for r in scn.rois for t in r.contains}
    names |= {s.ti_null for s in scn.series if s.ti_null is not None}
    for name in sorted(names):
        table.get(name)


def _check_in_view(roi: RoiPlan, role: Role, geo: SeriesGeometry) -> None:
    """Raise when an ROI leaves the field of view of a series (a scenario error)."""
    rel = np.asarray(roi.center_mm) - np.asarray(geo.origin)
    reach = max(roi.semi_axes_mm or (roi.radius_mm or 0.0,) * 3)
    for axis, n, step in zip((geo.row, geo.column, geo.normal), geo.size, geo.spacing, strict=True):
        pos = float(np.dot(rel, axis))
        if pos - reach < 0 or pos + reach > (n - 1) * step:
            raise InputError(f"ROI {roi.id} is outside the field of view of series {role.value}")


def _ratio_flags(
    ratio: dict[Role, float], roi: RoiPlan, rules: dict[str, float]
) -> tuple[dict[str, Any], dict[str, float | None]]:
    def drop(pair: tuple[Role, Role] | None) -> float | None:
        if pair is None or ratio[pair[0]] <= 0:
            return None
        return 100.0 * (1.0 - ratio[pair[1]] / ratio[pair[0]])

    # The pairs characterization uses (sigreport.model, docs/usage.md), first the study has.
    fluid = drop(first_pair(SUPPRESSION_PAIRS["fluid"], ratio))
    fat = drop(first_pair(SUPPRESSION_PAIRS["fat"], ratio))
    enh_pair = first_pair(ENHANCEMENT_PAIRS, ratio)
    enh = None
    if enh_pair is not None and ratio[enh_pair[0]] > 0:
        enh = 100.0 * (ratio[enh_pair[1]] / ratio[enh_pair[0]] - 1.0)
    enhancing = None if enh is None else bool(enh >= rules["enhancing_percent"])
    if enhancing is None:
        pattern = None
    else:
        pattern = roi.pattern.value if enhancing else EnhancementPattern.NONE.value
        if enhancing and roi.pattern is EnhancementPattern.NONE:
            pattern = EnhancementPattern.SOLID.value
    expected = {
        "fluid_suppressed": None if fluid is None else bool(fluid >= rules["fluid_drop_percent"]),
        "fat_suppressed": None if fat is None else bool(fat >= rules["fat_drop_percent"]),
        "enhancing": enhancing,
        "pattern": pattern,
        "flow_void": bool(all(v <= rules["flow_void_ratio"] for v in ratio.values())),
    }
    percents = {
        "fluid_drop_percent": None if fluid is None else round(fluid, 3),
        "fat_drop_percent": None if fat is None else round(fat, 3),
        "enhancement_percent": None if enh is None else round(enh, 3),
    }
    return expected, percents


def _sequence_family_truth(
    scn: Scenario,
    roi_id: str,
    ref_id: str,
    ratio: dict[Role, float],
    medians: dict[str, dict[Role, float]],
    phase_medians: dict[str, dict[int, float]],
    rules: dict[str, float],
) -> dict[str, Any]:
    """Expected diffusion, susceptibility, chemical-shift and dynamic values of one ROI from
    the noiseless model (the definitions of docs/measurements.md, applied to the truth)."""
    out: dict[str, Any] = {"expected": {}}
    hyper, hypo = rules["hyperintense_ratio"], rules["hypointense_ratio"]
    if Role.DWI in ratio and Role.ADC in ratio:
        bright = ratio[Role.DWI] >= hyper
        out["diffusion"] = {
            "dwi_ratio": round(ratio[Role.DWI], 6),
            "adc_ratio": round(ratio[Role.ADC], 6),
        }
        out["expected"]["restricted"] = bool(bright and ratio[Role.ADC] <= hypo)
        out["expected"]["shine_through"] = bool(bright and ratio[Role.ADC] > hypo)
    to = Role.SWI if Role.SWI in ratio else Role.T2STAR if Role.T2STAR in ratio else None
    if to is not None and Role.T2 in ratio and ratio[Role.T2] > 0:
        drop = 100.0 * (1.0 - ratio[to] / ratio[Role.T2])
        out["susceptibility"] = {"to": to.value, "drop_percent": round(drop, 3)}
        out["expected"]["blooming"] = bool(
            drop >= rules["blooming_drop_percent"] and ratio[to] <= hypo
        )
    if Role.IP in ratio and Role.OP in ratio and ratio[Role.IP] > 0:
        drop = 100.0 * (1.0 - ratio[Role.OP] / ratio[Role.IP])
        out["chemical_shift"] = {"drop_percent": round(drop, 3)}
        out["expected"]["microscopic_fat"] = bool(drop >= rules["microscopic_fat_drop_percent"])
    if Role.WATER in medians[roi_id] and Role.FAT in medians[roi_id]:
        w, f = medians[roi_id][Role.WATER], medians[roi_id][Role.FAT]
        cs = out.setdefault("chemical_shift", {})
        cs["fat_fraction_percent"] = round(100.0 * f / (w + f), 3) if w + f > 0 else None
    phases = sorted(
        (s for s in scn.series if s.delay_s is not None), key=lambda s: float(s.delay_s or 0.0)
    )
    if len(phases) >= 2:
        group = phases[0].group
        pre = next(
            (s for s in scn.series if s.group == group and not s.contrast and group is not None),
            None,
        )
        if pre is not None:

            def r(number: int) -> float:
                ref = phase_medians[ref_id][number]
                return phase_medians[roi_id][number] / ref if ref else 0.0

            first = float(phases[0].delay_s or 0.0)
            r_pre = r(pre.number)
            entries: list[dict[str, Any]] = [
                {
                    "series_number": s.number,
                    "delay_s": round(float(s.delay_s or 0.0) - first, 3),
                    "percent": round(100.0 * (r(s.number) / r_pre - 1.0), 3) if r_pre else None,
                }
                for s in phases
            ]
            early: list[float] = [
                float(e["percent"])
                for e in entries
                if e["delay_s"] <= rules["early_peak_delay_s"] and e["percent"] is not None
            ]
            last = entries[-1]["percent"]
            curve = None
            # A lesion that does not enhance has no curve type (docs/measurements.md).
            if early and last is not None and max(early) >= rules["enhancing_percent"]:
                peak = max(early)
                band = rules["curve_band_percent"] / 100.0 * abs(peak)
                curve = (
                    "persistent"
                    if last > peak + band
                    else "washout"
                    if last < peak - band
                    else "plateau"
                )
            out["dynamic"] = {"pre_series_number": pre.number, "phases": entries}
            out["expected"]["curve"] = curve
    return out


def _toml_value(value: Any) -> str:
    if isinstance(value, str):
        return json.dumps(value)
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    return repr(float(value)) if isinstance(value, float) else str(value)


def outline_path(roi: RoiPlan) -> str:
    """Where an ``outline = true`` ROI's mask is written, relative to the case file."""
    return "rois/" + re.sub(r"[^A-Za-z0-9_-]", "_", roi.id) + ".nii.gz"


def _write_outlines(
    scn: Scenario, grid: phantom.Grid, masks: dict[str, np.ndarray], out: Path
) -> None:
    """The outline ROIs as label images on the 1 mm model grid, in the patient space of the
    anchor (which never moves), as a reader's drawn outline would be."""
    for roi in scn.rois:
        if not roi.outline:
            continue
        image = sitk.Cast(model_image(masks[roi.id].astype(np.float32), grid), sitk.sitkUInt8)
        path = out / outline_path(roi)
        path.parent.mkdir(parents=True, exist_ok=True)
        sitk.WriteImage(image, str(path))


def _case_text(scn: Scenario, anchor_number: int) -> str:
    lines = [
        f"# Case file of the synthetic study {scn.name!r} (sigreport.synth); ROIs in patient",
        "# coordinates (LPS, mm) of the anchor series.",
        'study = "study"',
        "",
        "[options]",
        "register = true",
        f'anchor = "{anchor_number}"',
    ]
    first_ref = next(r.id for r in scn.rois if r.kind is RoiKind.REFERENCE)
    for roi in scn.rois:
        lines += ["", "[[roi]]", f"id = {_toml_value(roi.id)}", f'kind = "{roi.kind.value}"']
        if roi.site:
            lines.append(f"site = {_toml_value(roi.site)}")
        if roi.kind is not RoiKind.LESION and roi.tissue:
            lines.append(f"tissue = {_toml_value(roi.tissue)}")
        lines.append(f'shape = "{roi.shape}"')
        if roi.outline:
            lines.append(f"mask = {_toml_value(outline_path(roi))}")
        else:
            lines.append(f"center_mm = {_toml_value(list(roi.center_mm))}")
            if roi.semi_axes_mm is not None:
                lines.append(f"semi_axes_mm = {_toml_value(list(roi.semi_axes_mm))}")
            else:
                lines.append(f"radius_mm = {_toml_value(roi.radius_mm)}")
        if roi.kind is RoiKind.LESION:
            lines.append(f"reference = {_toml_value(roi.reference or first_ref)}")
    return "\n".join(lines) + "\n"


def generate_study(
    scenario: Path | str,
    out_dir: Path,
    *,
    seed: int | None = None,
    motion: bool | None = None,
    enhanced: bool = False,
    fat_sat_failed: bool = False,
    useless_descriptions: bool = False,
    field_strength_t: float | None = None,
) -> GeneratedStudy:
    """Generate a synthetic MR head study.

    Parameters
    ----------
    scenario
        A scenario TOML path, or the name of a bundled demo (see :func:`demo_scenarios`).
    out_dir
        Output folder; must not exist or be empty. Receives ``study/`` (DICOM), ``case.toml``
        (the case file of docs/usage.md) and ``truth.json`` (the expected values, for tests).
    seed, motion, field_strength_t
        Override the scenario's values (None: keep them). The output is a deterministic function
        of the scenario and these arguments.
    enhanced
        Write Enhanced MR Image Storage multi-frame files (one per series) instead of classic
        single-frame MR Image Storage files.
    fat_sat_failed
        Fat-saturated series keep most of the fat signal (a failed saturation).
    useless_descriptions
        SeriesDescription and ProtocolName are ``"SERIES <n>"``, so roles must come from physics.

    Returns
    -------
    GeneratedStudy

    Raises
    ------
    InputError
        The scenario is invalid, an ROI is not within its tissue or a series' field of view, or
        ``out_dir`` exists and is not empty.
    """
    out_dir = Path(out_dir)
    if out_dir.exists() and (not out_dir.is_dir() or any(out_dir.iterdir())):
        raise InputError(f"output folder {out_dir} exists and is not empty")
    scn = load_scenario(_resolve_scenario(scenario))
    scn = replace(
        scn,
        seed=scn.seed if seed is None else int(seed),
        motion=scn.motion if motion is None else bool(motion),
        field_strength_t=scn.field_strength_t if field_strength_t is None else field_strength_t,
    )
    table = load_tissues(scn.field_strength_t)
    _check_scenario(scn, table)
    rules = _truth_rules()
    solids = phantom.anatomy() + [s for lesion in scn.lesions for s in lesion.solids]
    grid = phantom.default_grid()
    model = phantom.build(grid, solids)

    masks = {roi.id: _roi_mask(grid, roi) for roi in scn.rois}
    for roi in scn.rois:
        if masks[roi.id].sum() < 7:
            raise InputError(f"ROI {roi.id} holds fewer than 7 model voxels")
        purity = float(model.fraction_of(list(roi.contains))[masks[roi.id]].min())
        if purity < ROI_PURITY:
            raise InputError(
                f"ROI {roi.id} is not within {', '.join(roi.contains)}: a voxel is only "
                f"{100 * purity:.0f} % those tissues (needs {100 * ROI_PURITY:.0f} %)"
            )
    head = model.fraction_of([t for t in model.tissues if t != "air"]) > 0.5

    entropy = [scn.seed, scn.name, scn.field_strength_t, enhanced, scn.motion, fat_sat_failed]
    entropy.append(useless_descriptions)
    study_uid = generate_uid(entropy_srcs=[*map(str, entropy), "study"])
    header = StudyHeader(
        patient=scn.patient,
        study=scn.study,
        study_instance_uid=study_uid,
        frame_of_reference_uid=generate_uid(entropy_srcs=[*map(str, entropy), "frame"]),
        field_strength_t=scn.field_strength_t,
        agent=table.agent,
    )
    anchor_plan = next(s for s in scn.series if s.role is scn.anchor)
    for plan in scn.series:
        geo = plan_geometry(plan)
        for roi in scn.rois if plan.measured else ():
            _check_in_view(roi, plan.role, geo)
    # Write into a hidden sibling folder and rename it at the end, so that a failure leaves no
    # half-written study behind.
    out_dir.parent.mkdir(parents=True, exist_ok=True)
    work = Path(tempfile.mkdtemp(prefix=f".{out_dir.name}.", dir=out_dir.parent))
    work.chmod(0o755)
    try:
        _write(
            scn,
            table,
            rules,
            model,
            masks,
            head,
            header,
            anchor_plan,
            work,
            enhanced,
            fat_sat_failed,
            useless_descriptions,
            entropy,
        )
        if out_dir.exists():
            out_dir.rmdir()  # empty, checked above
        work.rename(out_dir)
    except BaseException:
        shutil.rmtree(work, ignore_errors=True)
        raise
    return GeneratedStudy(out_dir, out_dir / "study", out_dir / "case.toml", out_dir / "truth.json")


def _write(
    scn: Scenario,
    table: TissueTable,
    rules: dict[str, float],
    model: phantom.HeadModel,
    masks: dict[str, np.ndarray],
    head: np.ndarray,
    header: StudyHeader,
    anchor_plan: SeriesPlan,
    out_dir: Path,
    enhanced: bool,
    fat_sat_failed: bool,
    useless_descriptions: bool,
    entropy: list[Any],
) -> None:
    """Image every series and write the study, the case file and the truth into ``out_dir``."""
    grid = model.grid
    seeds = np.random.SeedSequence([scn.seed, 20261201])
    rng_bias, rng_motion, rng_noise, rng_gain = (np.random.default_rng(s) for s in seeds.spawn(4))
    study_dir = out_dir / "study"
    study_dir.mkdir()

    medians: dict[str, dict[Role, float]] = {roi.id: {} for roi in scn.rois}
    series_medians: dict[str, dict[Role, float]] = {roi.id: {} for roi in scn.rois}
    # Per series number, for the phases of a dynamic series and for diffusion.
    phase_medians: dict[str, dict[int, float]] = {roi.id: {} for roi in scn.rois}
    adc_truth: dict[str, float] = {}
    gains: dict[str, tuple[float, float, float]] = {}  # group -> gain, slope, intercept
    motions: dict[Role, Motion] = {}
    group_motion: dict[str, Motion] = {}
    group_bias: dict[str, np.ndarray] = {}
    dwi_sigma = 0.0
    dwi_images: dict[int, dict[float, tuple[np.ndarray, np.ndarray, np.ndarray]]] = {}
    series_json: dict[str, Any] = {}
    for plan in scn.series:
        resolved: ResolvedSeries = resolve_ti(plan, table, field_strength_t=scn.field_strength_t)
        plan_te = resolved.plan
        geo = plan_geometry(plan)
        move = NO_MOTION
        if plan.adc_of is not None:  # computed from its DWI series: same geometry and motion
            geo = plan_geometry(next(s for s in scn.series if s.number == plan.adc_of))
            move = group_motion[f"series {plan.adc_of}"]
        elif scn.motion and plan.role is not scn.anchor:
            group = f"group {plan.group}" if plan.group else None
            move = group_motion.get(group) if group else None  # type: ignore[assignment]
            if move is None:
                move = _random_motion(scn, rng_motion)
                if group:
                    group_motion[group] = move
        group_motion[f"series {plan.number}"] = move
        motions[plan.role] = move
        bias = _bias_field(grid, rng_bias)
        if plan.group:  # one acquisition, one receive field
            bias = group_bias.setdefault(plan.group, bias)
        for echo in _echoes(plan, resolved, table, model, bias, fat_sat_failed, dwi_images):
            is_role_image = echo.b_value is None or echo.b_value == max(plan.b_values)
            if plan.measured and is_role_image:
                for roi in scn.rois:  # localizers are never measured
                    medians[roi.id][plan.role] = float(np.median(echo.model[masks[roi.id]]))
                    phase_medians[roi.id][plan.number] = medians[roi.id][plan.role]
                    if plan.sequence == "ADC":
                        adc_truth[roi.id] = medians[roi.id][plan.role]
            if echo.noisy is None:
                seen = sample(
                    model_image(echo.model, grid),
                    geo,
                    None if move is NO_MOTION else move.transform(),
                )
                still = (
                    seen if move is NO_MOTION else sample(model_image(echo.model, grid), geo, None)
                )
                sigma = float(np.percentile(echo.model[head], 95)) / plan.snr
                if echo.b_value:  # the noise of the b=0 image: same receiver, same bandwidth
                    sigma = dwi_sigma
                noisy = rician(seen, sigma, rng_noise)
            else:  # a derived map: computed from the noisy images of its source
                assert echo.still is not None
                still, noisy, sigma = echo.still, echo.noisy, 0.0
            if plan.sequence == "DWI":
                assert echo.b_value is not None
                dwi_images.setdefault(plan.number, {})[echo.b_value] = (echo.model, still, noisy)
                if echo.b_value == 0:
                    dwi_sigma = sigma
            if plan.measured and is_role_image:
                # What an ideal measurement sees on this series: the noiseless, motion-free
                # series image (slice profile and partial volume included) over the voxels
                # whose centres lie inside each ROI. Heterogeneous lesions (a rim around a
                # core) have a median that depends on the slice thickness, so this is the
                # truth for each series.
                for roi in scn.rois:
                    inside = _series_roi_mask(geo, roi)
                    if inside.any():
                        series_medians[roi.id][plan.role] = float(np.median(still[inside]))
            if plan.sequence == "ADC":
                slope, intercept = plan.rescale or (1.0, 0.0)
                gain = 1.0  # stored in physical units, 10^-6 mm^2/s (times the rescale)
            else:
                if plan.gain_group not in gains:
                    slope, intercept = plan.rescale or (1.0, 0.0)
                    peak = float(np.percentile(noisy, 99.5)) or 1.0
                    gain = GAIN_TARGET * float(rng_gain.uniform(0.6, 1.6)) / peak
                    gains[plan.gain_group] = (gain, slope, intercept)
                gain, slope, intercept = gains[plan.gain_group]
                if plan.rescale is not None and plan.rescale != (slope, intercept):
                    raise InputError(
                        f"series {plan.role.value}: rescale {plan.rescale} differs from its gain "
                        f'group "{plan.gain_group}" ({slope}, {intercept})'
                    )
            stored = np.clip(np.rint((gain * noisy - intercept) / slope), 0, 65535).astype(
                np.uint16
            )
            series_uid = generate_uid(entropy_srcs=[*map(str, entropy), "series", str(plan.number)])
            n_inst = 1 if enhanced else geo.size[2]
            salt = [] if echo.index == 0 else ["echo", str(echo.index)]
            sops = tuple(
                generate_uid(entropy_srcs=[series_uid, *salt, "instance", str(k)])
                for k in range(n_inst)
            )
            description = f"SERIES {plan.number}" if useless_descriptions else plan.description
            out = SeriesOutput(
                plan=plan_te,
                ti_ms=resolved.ti_ms,
                geometry=geo,
                pixels=stored,
                slope=slope,
                intercept=intercept,
                series_instance_uid=series_uid,
                sop_instance_uids=sops,
                description=description,
                b_value=echo.b_value,
                first_instance=echo.index * n_inst,
                timing=_timing(scn, plan),
            )
            folder = study_dir / f"S{plan.number:02d}"
            if enhanced:
                suffix = "" if echo.index == 0 else f"_{echo.index + 1}"
                write_enhanced(header, out, folder / f"MF0001{suffix}.dcm")
            else:
                write_classic(header, out, folder)
            if is_role_image:
                series_json[plan.role.value] = {
                    "series_number": plan.number,
                    "series_instance_uid": series_uid,
                    "inversion_time_ms": None
                    if resolved.ti_ms is None
                    else round(resolved.ti_ms, 1),
                    "echo_time_ms": plan_te.te_ms,
                    "noise_sigma": round(sigma * gain, 6),  # rescaled units
                }
                if plan.b_values:
                    series_json[plan.role.value]["b_value"] = max(plan.b_values)

    refs = {r.id: r for r in scn.rois if r.kind is RoiKind.REFERENCE}
    first_ref = next(iter(refs))
    rois_json: dict[str, Any] = {}
    for roi in scn.rois:
        ref_id = roi.reference or first_ref
        ratio = {
            role: (medians[roi.id][role] / medians[ref_id][role]) if medians[ref_id][role] else 0.0
            for role in medians[roi.id]
        }
        expected, percents = _ratio_flags(ratio, roi, rules)
        on_series = {
            role: series_medians[roi.id][role] / series_medians[ref_id][role]
            for role in series_medians[roi.id]
            if series_medians[ref_id].get(role)
        }
        extra = _sequence_family_truth(scn, roi.id, ref_id, ratio, medians, phase_medians, rules)
        if roi.id in adc_truth and extra.get("diffusion"):
            extra["diffusion"]["adc_1e-6_mm2_s"] = round(adc_truth[roi.id], 3)
        expected.update(extra.pop("expected"))
        rois_json[roi.id] = {
            **extra,
            "kind": roi.kind.value,
            "tissue": roi.lesion if roi.kind is RoiKind.LESION else roi.tissue,
            "site": roi.site,
            "reference": ref_id,
            "n_voxels": int(masks[roi.id].sum()),
            "ratio": {role.value: round(v, 6) for role, v in ratio.items()},
            "series_ratio": {role.value: round(v, 6) for role, v in on_series.items()},
            "expected": expected,
            **percents,
        }
    truth = {
        "schema": TRUTH_SCHEMA,
        "scenario": scn.name,
        "seed": scn.seed,
        "field_strength_t": scn.field_strength_t,
        "enhanced": enhanced,
        "fat_sat_failed": fat_sat_failed,
        "anchor": {"role": scn.anchor.value, "series_number": anchor_plan.number},
        "motion": {role.value: m.to_json() for role, m in motions.items()},
        "series": series_json,
        "rois": rois_json,
    }
    _write_outlines(scn, grid, masks, out_dir)
    (out_dir / "case.toml").write_text(_case_text(scn, anchor_plan.number), encoding="utf-8")
    (out_dir / "truth.json").write_text(json.dumps(truth, indent=2) + "\n", encoding="utf-8")
