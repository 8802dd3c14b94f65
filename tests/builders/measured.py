"""Hand-made measurements (MeasuredStudy objects built from medians), for the tests of the
stages after measurement: characterization and the report's wording."""

from __future__ import annotations

from sigreport.model import (
    Acquisition,
    MeasuredRoi,
    MeasuredStudy,
    RoiKind,
    RoiShape,
    RoiSpec,
    RoiStats,
    Role,
    SeriesMeasurement,
    Stack,
)


def stats(median: float, *, cv: float = 0.05, n: int = 200) -> RoiStats:
    """Statistics of a roughly symmetric ROI with the given median and coefficient of variation."""
    sd = abs(median) * cv
    return RoiStats(
        n_voxels=n,
        mean=median,
        median=median,
        sd=sd,
        p05=median - 1.645 * sd,
        p95=median + 1.645 * sd,
    )


def series(
    value: float | SeriesMeasurement | None,
    *,
    shell: float | None = None,
    core: float | None = None,
    cv: float = 0.05,
) -> SeriesMeasurement:
    if isinstance(value, SeriesMeasurement):
        return value
    if value is None:
        return SeriesMeasurement(stats=None, note="not measurable")
    return SeriesMeasurement(
        stats=stats(value, cv=cv),
        shell=stats(shell) if shell is not None else None,
        core=stats(core) if core is not None else None,
    )


def roi(
    roi_id: str,
    kind: RoiKind,
    values: dict[Role, float | SeriesMeasurement | None],
    *,
    tissue: str | None = None,
    reference: str | None = None,
    cv: float = 0.05,
) -> MeasuredRoi:
    spec = RoiSpec(
        id=roi_id,
        kind=kind,
        shape=RoiShape.SPHERE,
        site="test site" if kind is RoiKind.LESION else None,
        tissue=tissue,
        center_mm=(0.0, 0.0, 0.0),
        radius_mm=5.0,
        reference=reference,
    )
    return MeasuredRoi(
        spec=spec,
        volume_ml=0.5,
        max_diameter_mm=10.0,
        by_role={role: series(v, cv=cv) for role, v in values.items()},
    )


def stack(
    role: Role, acquisition: Acquisition | None = None, scaling_key: str | None = None
) -> Stack:
    uid = f"1.2.826.0.1.3680043.10.{list(Role).index(role) + 1}"
    return Stack(
        key=uid,
        series_instance_uid=uid,
        series_number=list(Role).index(role) + 1,
        stack=None,
        description=role.value,
        modality="MR",
        frame_of_reference_uid="1.2.826.0.1.3680043.10.99",
        instances=(),
        size=(32, 32, 16),
        spacing_mm=(1.0, 1.0, 1.0),
        origin_mm=(0.0, 0.0, 0.0),
        direction=(1, 0, 0, 0, 1, 0, 0, 0, 1),
        acquisition=acquisition or Acquisition(),
        role=role,
        role_reason="test",
        confidence=1.0,
        scaling_key=scaling_key,
    )


def study(
    rois: list[MeasuredRoi],
    *,
    noise: dict[Role, float | None] | None = None,
    stacks: dict[Role, Stack] | None = None,
) -> MeasuredStudy:
    roles = {r for m in rois for r in m.by_role}
    all_stacks = {r: stack(r) for r in roles}
    all_stacks.update(stacks or {})
    return MeasuredStudy(
        rois=tuple(rois),
        stacks=all_stacks,
        noise_sigma=dict(noise) if noise is not None else {r: None for r in all_stacks},
    )


class Build:
    stats = staticmethod(stats)
    series = staticmethod(series)
    roi = staticmethod(roi)
    stack = staticmethod(stack)
    study = staticmethod(study)

    @staticmethod
    def lesion(values, **kw) -> MeasuredRoi:
        return roi("L1", RoiKind.LESION, values, **kw)

    @staticmethod
    def reference(values, roi_id: str = "R1", **kw) -> MeasuredRoi:
        return roi(roi_id, RoiKind.REFERENCE, values, tissue=kw.pop("tissue", "white matter"), **kw)

    @staticmethod
    def control(roi_id: str, tissue: str, values, **kw) -> MeasuredRoi:
        return roi(roi_id, RoiKind.CONTROL, values, tissue=tissue, **kw)
