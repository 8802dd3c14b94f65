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
from sigreport.model import EnhancementPattern, RoiKind, Role
from sigreport.synth import phantom
from sigreport.synth.geometry import SeriesGeometry, model_image, plan_geometry, sample
from sigreport.synth.physics import rician
from sigreport.synth.scenario import RoiPlan, Scenario, SeriesPlan, load_scenario
from sigreport.synth.sequences import ResolvedSeries, resolve_ti, tissue_signals
from sigreport.synth.tissues import TissueTable, demo_dir, load_tissues
from sigreport.synth.writer import SeriesOutput, StudyHeader, write_classic, write_enhanced

TRUTH_SCHEMA = "sigreport-truth/1"
ROI_PURITY = 0.95  # every ROI voxel must be at least this fraction of its `contains` tissues
GAIN_TARGET = 2500.0  # stored values peak near this times a random factor in [0.6, 1.6]

# Pairs in the order the contract picks them (interface.md, suppression / enhancement).
FAT_PAIRS = ((Role.T1, Role.T1FS), (Role.T1POST, Role.T1POSTFS), (Role.T2, Role.T2FS),
             (Role.T2, Role.STIR))  # fmt: skip
ENHANCEMENT_PAIRS = ((Role.T1, Role.T1POST), (Role.T1FS, Role.T1POSTFS))


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
    """Voxels whose centre lies inside the ROI (interface.md membership rule)."""
    x, y, z = grid.points((slice(None), slice(None), slice(None)))
    c = roi.center_mm
    r = float(roi.radius_mm or 0.0)
    axes = roi.semi_axes_mm or (r, r, r)
    q = ((x - c[0]) / axes[0]) ** 2 + ((y - c[1]) / axes[1]) ** 2 + ((z - c[2]) / axes[2]) ** 2
    return q <= 1.0


def _series_roi_mask(geo: SeriesGeometry, roi: RoiPlan) -> np.ndarray:
    """Voxels of a series grid (array ``[slice, row, column]``) whose centre lies inside the
    ROI (interface.md membership rule; PS3.3 C.7.6.2.1.1 voxel centres). Only the index box
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

    def first(pairs: tuple[tuple[Role, Role], ...]) -> tuple[Role, Role] | None:
        return next((p for p in pairs if p[0] in ratio and p[1] in ratio), None)

    fluid = drop((Role.T2, Role.FLAIR) if Role.T2 in ratio and Role.FLAIR in ratio else None)
    fat = drop(first(FAT_PAIRS))
    enh_pair = first(ENHANCEMENT_PAIRS)
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
        (the interface.md case file) and ``truth.json`` (the expected values, for tests).
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
    gains: dict[str, tuple[float, float, float]] = {}  # group -> gain, slope, intercept
    motions: dict[Role, Motion] = {}
    series_json: dict[str, Any] = {}
    for plan in scn.series:
        resolved: ResolvedSeries = resolve_ti(plan, table)
        signals = tissue_signals(resolved, table, fat_sat_failed=fat_sat_failed)
        biased = model.paint(signals) * _bias_field(grid, rng_bias)
        for roi in scn.rois if plan.measured else ():  # localizers are never measured
            medians[roi.id][plan.role] = float(np.median(biased[masks[roi.id]]))
        geo = plan_geometry(plan)
        move = NO_MOTION
        if scn.motion and plan.role is not scn.anchor:
            move = _random_motion(scn, rng_motion)
        motions[plan.role] = move
        seen = sample(
            model_image(biased, grid), geo, None if move is NO_MOTION else move.transform()
        )
        if plan.measured:
            # What an ideal measurement sees on this series: the noiseless, motion-free series
            # image (slice profile and partial volume included) over the voxels whose centres
            # lie inside each ROI. Heterogeneous lesions (a rim around a core) have a median
            # that depends on the slice thickness, so this is the truth for each series.
            still = seen if move is NO_MOTION else sample(model_image(biased, grid), geo, None)
            for roi in scn.rois:
                inside = _series_roi_mask(geo, roi)
                if inside.any():
                    series_medians[roi.id][plan.role] = float(np.median(still[inside]))
        sigma = float(np.percentile(biased[head], 95)) / plan.snr
        noisy = rician(seen, sigma, rng_noise)
        if plan.gain_group not in gains:
            slope, intercept = plan.rescale or (1.0, 0.0)
            peak = float(np.percentile(noisy, 99.5)) or 1.0
            gain = GAIN_TARGET * float(rng_gain.uniform(0.6, 1.6)) / peak
            gains[plan.gain_group] = (gain, slope, intercept)
        gain, slope, intercept = gains[plan.gain_group]
        if plan.rescale is not None and plan.rescale != (slope, intercept):
            raise InputError(
                f"series {plan.role.value}: rescale {plan.rescale} differs from its gain group "
                f'"{plan.gain_group}" ({slope}, {intercept})'
            )
        stored = np.clip(np.rint((gain * noisy - intercept) / slope), 0, 65535).astype(np.uint16)
        series_uid = generate_uid(entropy_srcs=[*map(str, entropy), "series", str(plan.number)])
        n_inst = 1 if enhanced else geo.size[2]
        sops = tuple(
            generate_uid(entropy_srcs=[series_uid, "instance", str(k)]) for k in range(n_inst)
        )
        description = f"SERIES {plan.number}" if useless_descriptions else plan.description
        out = SeriesOutput(
            plan=plan,
            ti_ms=resolved.ti_ms,
            geometry=geo,
            pixels=stored,
            slope=slope,
            intercept=intercept,
            series_instance_uid=series_uid,
            sop_instance_uids=sops,
            description=description,
        )
        folder = study_dir / f"S{plan.number:02d}"
        if enhanced:
            write_enhanced(header, out, folder / "MF0001.dcm")
        else:
            write_classic(header, out, folder)
        series_json[plan.role.value] = {
            "series_number": plan.number,
            "series_instance_uid": series_uid,
            "inversion_time_ms": None if resolved.ti_ms is None else round(resolved.ti_ms, 1),
            "noise_sigma": round(sigma * gain, 6),  # rescaled units
        }

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
        rois_json[roi.id] = {
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
