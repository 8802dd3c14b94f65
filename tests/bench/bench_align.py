"""Benchmark: registration's accuracy and cost on simulated motions whose truth is known.

Not run by CI. Usage: ``PYTHONPATH=tests python tests/bench/bench_align.py [site_lexicon]``.
Builds the neuro demo (its default seed and seeds 101, 202, 303 and 404: 6 registered series
each) and the 8-series study of ``bench_report.py`` (default seed, 101 and 202: 7 each), 51
simulated motions in all, in a temporary folder, captures what the report hands to
:func:`sigreport.align.register_series` (the anchor, every series to register and the ROIs'
box), then registers every series again, one at a time on one worker so that CPU seconds are
comparable, and prints per series and in total:

- the error: the largest distance, at the ROI centres of the case file, between the recovered
  and the simulated motion (``truth.json``), as ``tests/pipeline/test_end_to_end.py`` measures
  it (the tests hold it under 0.5 mm), and the rotation angle's error (tests: 0.5 degree);
- the CPU seconds of the registration (the anchor's pyramid built once per study).

``site_lexicon``: a folder whose ``alignment.toml`` replaces the bundled one, to compare
settings (docs/performance.md, Registration).
"""

from __future__ import annotations

import json
import os
import sys
import tempfile
import time
import tomllib
from pathlib import Path
from typing import Any

import numpy as np

import sigreport.pipeline as pipeline
from sigreport.align import clear_anchor_cache, identity_alignment, load_settings
from sigreport.pipeline import run_report
from sigreport.synth import generate_study

sys.path.insert(0, str(Path(__file__).resolve().parent))
from bench_report import _eight_series_scenario  # noqa: E402

from builders.synthetic import motion_error  # noqa: E402


def _captured(study: Any, out: Path) -> tuple[Any, dict[Any, Any], Any]:
    """What the report asks ``register_series`` to align (all its calls, merged)."""
    fixed: list[Any] = []
    movings: dict[Any, Any] = {}
    boxes: list[Any] = []

    def capture(anchor, series, *, box_mm=None, **_kwargs):
        fixed.append(anchor)
        boxes.append(box_mm)
        movings.update(series)
        return {key: identity_alignment("identity") for key in series}

    real = pipeline.register_series
    pipeline.register_series = capture  # type: ignore[assignment]
    try:
        run_report(study.case_path, out, study_dir=study.study_dir, force=True, use_cache=False)
    finally:
        pipeline.register_series = real  # type: ignore[assignment]
    return fixed[0], movings, boxes[0]


def main() -> None:
    site = Path(sys.argv[1]) if len(sys.argv) > 1 else None
    settings = load_settings(site)
    print(f"settings: {settings}")
    total_cpu = 0.0
    errors: list[float] = []
    angles: list[float] = []
    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp)
        os.environ["SIGREPORT_CACHE_DIR"] = str(root / "cache")
        eight = _eight_series_scenario(root)
        studies = [("demo", "neuro", None), ("eight", eight, None)]
        studies += [(f"demo-{seed}", "neuro", seed) for seed in (101, 202, 303, 404)]
        studies += [(f"eight-{seed}", eight, seed) for seed in (101, 202)]
        for name, scenario, seed in studies:
            study = generate_study(scenario, root / name, seed=seed)
            truth = json.loads(study.truth_path.read_text())
            case = tomllib.loads(study.case_path.read_text())
            centres = np.array([roi["center_mm"] for roi in case["roi"]])
            fixed, movings, box = _captured(study, root / f"out-{name}")
            clear_anchor_cache()
            for key, image in movings.items():
                role = getattr(key, "value", key)
                cpu = time.process_time()
                found = pipeline.register_series(
                    fixed, {key: image}, box_mm=box, settings=settings, max_workers=1
                )[key]
                spent = time.process_time() - cpu
                total_cpu += spent
                motion = truth["motion"].get(role)
                if motion is None or found.matrix is None:
                    print(f"  {name:9} {role:10} {found.method:9} {spent:6.2f} s CPU (no truth)")
                    continue
                error = motion_error(
                    centres, motion, found.matrix, found.center_mm, found.translation_mm
                )
                angle = abs(float(found.rotation_deg) - float(motion["rotation_deg"]))
                errors.append(error)
                angles.append(angle)
                print(
                    f"  {name:9} {role:10} error {error:5.2f} mm, angle {angle:5.2f} deg, "
                    f"{spent:6.2f} s CPU"
                )
    print(
        f"{len(errors)} motions: error mean {np.mean(errors):.2f} / max {np.max(errors):.2f} mm, "
        f"{sum(e >= 0.5 for e in errors)} at 0.5 mm or more; "
        f"angle max {np.max(angles):.2f} deg; CPU {total_cpu:.1f} s "
        f"({total_cpu / max(1, len(errors)):.2f} s per series)"
    )


if __name__ == "__main__":
    main()
