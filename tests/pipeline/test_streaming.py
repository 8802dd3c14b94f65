"""A report holds the anchor and the series being measured, not the whole study
(sigreport.pipeline.stream_series, docs/performance.md): counted on a study with a 1,000-slice
series by an instrumented loader that knows which loaded volumes are still alive. The streamed
run must conclude exactly what the stages run on every series at once conclude."""

from __future__ import annotations

import json
import os
import platform
import weakref
from pathlib import Path

import numpy as np
import pytest

import sigreport.pipeline as pipeline
from sigreport import limits
from sigreport.ingest import load_stack
from sigreport.lexicon_tables import load_lexicon
from sigreport.memory import release_free_memory, use_one_heap
from sigreport.model import Role
from sigreport.pipeline import (
    align_series,
    analyze_case,
    characterize_study,
    load_phases,
    load_series,
    measure_study,
    place_rois,
    plan_report,
    resolve_study_dir,
)
from sigreport.report import build_findings, build_key_slices
from sigreport.rois import load_case

from builders.study import write_study

LONG_SLICES = 1000


class LiveVolumes:
    """Wraps ``load_stack``: counts the loaded volumes alive at once (a volume dies when the
    last reference to its image goes) and which stacks were loaded."""

    def __init__(self) -> None:
        self.alive = 0
        self.most = 0
        self.loaded: list[str] = []

    def __call__(self, stack, **kwargs):
        image = load_stack(stack, **kwargs)
        self.alive += 1
        self.most = max(self.most, self.alive)
        self.loaded.append(stack.key)
        weakref.finalize(image, self._released)
        return image

    def _released(self) -> None:
        self.alive -= 1


def _study(root: Path, *, register: bool) -> Path:
    written = write_study(root, slices={"T2": (LONG_SLICES, 0.5)}, register=register)
    # The 0.5 mm series would be the finest, hence the anchor: keep it a streamed series.
    text = written.case_path.read_text(encoding="utf-8")
    written.case_path.write_text(text.replace("[options]\n", '[options]\nanchor = "T1"\n'))
    return written.case_path


@pytest.fixture(scope="module")
def unregistered(tmp_path_factory):
    return _study(tmp_path_factory.mktemp("long"), register=False)


def _at_once(case_path: Path, register: bool | None = None):
    """The stages on every series at once (the oracle): findings and key slices."""
    case = load_case(case_path)
    lexicon = load_lexicon()
    plan = plan_report(case, lexicon, resolve_study_dir(case), register=register)
    images = load_series(plan)
    phase_images = load_phases(plan)
    aligned = align_series(plan, images, phase_images=phase_images)
    plan, placed = place_rois(plan, images, aligned)
    measurement = measure_study(plan, images, aligned, phase_images=phase_images)
    result = characterize_study(plan, measurement)
    qc = [*plan.qc, *aligned.qc, *placed.qc, *measurement.qc, *result.qc, plan.anchor_note]
    findings = build_findings(
        plan.index,
        plan.measured,
        aligned.alignments,
        plan.anchor_role,
        result,
        qc,
        cautions=lexicon.cautions,
        phase_alignments=aligned.phase_alignments,
    )
    slices = build_key_slices(
        plan.case, images, measurement.samples, plan.measured, anchor=plan.anchor_role
    )
    return findings, slices


def _same(streamed, findings, slices) -> None:
    want, got = dict(findings), dict(streamed.findings)
    want.pop("generated"), got.pop("generated")
    assert json.dumps(got) == json.dumps(want)
    assert [(k.roi_id, k.role, k.slice_index) for k in streamed.key_slices] == [
        (k.roi_id, k.role, k.slice_index) for k in slices
    ]
    for mine, theirs in zip(streamed.key_slices, slices, strict=True):
        assert np.array_equal(mine.image, theirs.image)
        assert np.array_equal(mine.lesion_mask, theirs.lesion_mask)


def test_the_long_series_is_loaded_measured_and_released_beside_the_anchor(
    unregistered, monkeypatch
):
    live = LiveVolumes()
    monkeypatch.setattr(pipeline, "load_stack", live)
    analysis = analyze_case(unregistered)
    assert analysis.plan.anchor_role is Role.T1
    assert analysis.plan.measured[Role.T2].size[2] == LONG_SLICES
    # No series to register: each is alone beside the anchor, and each is read once.
    assert live.most == 2
    assert sorted(live.loaded) == sorted(s.key for s in analysis.plan.measured.values())
    assert live.alive == 0  # nothing of the pixels outlives the analysis
    monkeypatch.undo()
    _same(analysis, *_at_once(unregistered))


@pytest.mark.slow
def test_two_small_series_register_side_by_side_and_a_large_one_alone(
    tmp_path_factory, monkeypatch
):
    case_path = _study(tmp_path_factory.mktemp("long-registered"), register=True)
    live = LiveVolumes()
    monkeypatch.setattr(pipeline, "load_stack", live)
    monkeypatch.setattr(pipeline.os, "cpu_count", lambda: 2)
    paired = analyze_case(case_path)
    # T2 (1,000 slices of 40 x 40, 6.4 MB) and FLAIR register in parallel beside the anchor.
    assert live.most == 3
    # A window smaller than the long series: every series alone beside the anchor.
    monkeypatch.setattr(limits, "SERIES_WINDOW_BYTES", 4 * LONG_SLICES * 40 * 40 - 1)
    live.most = 0
    alone = analyze_case(case_path)
    assert live.most == 2 and live.alive == 0
    monkeypatch.undo()
    # Neither the window nor the streaming changes a value.
    findings, slices = _at_once(case_path)
    _same(paired, findings, slices)
    _same(alone, findings, slices)


def _resident_mb() -> float:
    with open("/proc/self/statm") as handle:
        return int(handle.read().split()[1]) * os.sysconf("SC_PAGE_SIZE") / 2**20


@pytest.mark.skipif(platform.libc_ver()[0] != "glibc", reason="glibc's allocator calls")
def test_freed_memory_goes_back_to_the_system_between_series():
    # 48 MiB in 64 KiB blocks (below glibc's mmap threshold: they live in the heap), the last
    # one kept so that the heap cannot shrink from its top by itself (mallopt(3),
    # malloc_trim(3)): the freed pages stay resident until they are released.
    blocks = [np.ones(8192) for _ in range(768)]
    last = blocks[-1]
    del blocks
    before = _resident_mb()
    assert release_free_memory() is True
    assert before - _resident_mb() > 24.0
    assert last.sum() == 8192.0
    assert use_one_heap() is True


def test_every_dynamic_phase_streams_through_once(tmp_path, monkeypatch):
    # The synthetic kinetics study: a dynamic acquisition of several post-contrast phases, each
    # measured for the curve (docs/synthetic.md); without motion or registration every series
    # is alone beside the anchor.
    from sigreport.synth import generate_study

    study = generate_study("kinetics", tmp_path / "case", motion=False)
    live = LiveVolumes()
    monkeypatch.setattr(pipeline, "load_stack", live)
    analysis = analyze_case(study.case_path, study_dir=study.study_dir, register=False)
    plan = analysis.plan
    phases = [s.key for group in plan.phases.values() for s in group]
    assert len(phases) >= 4
    wanted = {s.key for s in plan.measured.values()} | set(phases)
    assert sorted(live.loaded) == sorted(wanted)  # each read once
    assert live.most == 2 and live.alive == 0
    curve = analysis.measurement.study.rois[0].by_phase
    assert set(curve) == set(phases)


def test_series_are_measured_in_order_while_the_next_ones_register(tmp_path, monkeypatch):
    # A registration that ends early waits for its turn to be measured; measuring a series
    # overlaps registering the ones after it (stream_series). The fake registration keeps the
    # scanner's alignment; the first series to register ends after the second.
    import threading

    from sigreport.align import identity_alignment
    from sigreport.synth import generate_study

    study = generate_study("neuro", tmp_path / "case", motion=False)
    events: list[tuple[str, str]] = []
    lock = threading.Lock()
    first: list[str] = []

    def note(kind: str, key) -> None:
        with lock:
            events.append((kind, getattr(key, "value", str(key))))

    second_ended = threading.Event()

    def register(anchor, movings, **kwargs):
        (key,) = movings
        note("register", key)
        with lock:
            first.append(key)
            rank = len(first)
        if rank == 1:
            # Ends only after the second has (or after 30 s, if the two never run together,
            # which the assertions below then catch).
            second_ended.wait(timeout=30.0)
        note("registered", key)
        if rank == 2:
            second_ended.set()
        return {key: identity_alignment("rigid")}

    def loaded(stack, **kwargs):
        note("load", stack.role)
        return load_stack(stack, **kwargs)

    measure = pipeline.measure_series

    def measured(plan, job, *args, **kwargs):
        note("measure", job.key)
        return measure(plan, job, *args, **kwargs)

    monkeypatch.setattr(pipeline, "register_series", register)
    monkeypatch.setattr(pipeline, "measure_series", measured)
    monkeypatch.setattr(pipeline, "load_stack", loaded)
    monkeypatch.setattr(pipeline.os, "cpu_count", lambda: 2)
    analysis = analyze_case(study.case_path, study_dir=study.study_dir, register=True)
    order = [key for kind, key in events if kind == "register"]
    assert len(order) >= 4
    # Measured in the order they were loaded and registered, whatever order they ended in.
    assert [key for kind, key in events if kind == "measure" and key in order] == order
    ended = [key for kind, key in events if kind == "registered"]
    assert ended[0] != order[0]  # the first one ended after the second...
    assert events.index(("measure", order[0])) > events.index(("registered", order[1]))
    # ...and the third series was loaded (and handed to a worker to register) before the
    # second was measured.
    assert events.index(("load", order[2])) < events.index(("measure", order[1]))
    assert analysis.findings["series"]


def test_a_series_that_fails_to_load_stops_the_stream_with_its_error(tmp_path, monkeypatch):
    # A series that cannot be read while others register: the reader's error reaches the
    # caller, the registrations already running end, and nothing waits forever.
    from sigreport.errors import InputError
    from sigreport.synth import generate_study

    study = generate_study("neuro", tmp_path / "case", motion=False)
    calls: list[str] = []

    def failing(stack, **kwargs):
        calls.append(stack.role.value)
        if len(calls) == 4:
            raise InputError(f"{stack.role.value}: unreadable pixel data")
        return load_stack(stack, **kwargs)

    monkeypatch.setattr(pipeline, "load_stack", failing)
    monkeypatch.setattr(pipeline.os, "cpu_count", lambda: 2)
    with pytest.raises(InputError, match="unreadable pixel data"):
        analyze_case(study.case_path, study_dir=study.study_dir, register=True)
    assert len(calls) == 4
