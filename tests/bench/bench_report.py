"""Benchmark: the whole report against reading the study, side by side in one process.

Not run by CI. Usage: ``PYTHONPATH=tests python tests/bench/bench_report.py [repeats]``.
Builds the neuro demo and an 8-series variant (its localizer replaced by a measured oblique PD
series; a 3D 1 mm anchor, 2D axial, oblique, coronal and sagittal series, motion on all but the
anchor) in a temporary folder, then prints, per run, each figure with its goal
(docs/performance.md):

- whole ``report`` on the demo vs index + load of the measured series (<= 15x; <= 8 s wall);
- peak memory of ``sigreport report`` on the demo (a child process's own VmHWM; <= 400 MB);
- whole ``report`` on the 8-series study vs its index + load (<= 20x);
- sr.dcm: building and writing it, within the demo report (<= 1 s);
- a repeat index (header cache) vs a raw read of every file's bytes (<= 5x).

Registration's share of each report (every ``register_series`` call) is printed beside it, for
information.

Ratios are taken within one process, one right after the other, so that the machine's load
(other processes on a shared machine) affects both sides alike; run it several times and quote
the range.
"""

from __future__ import annotations

import math
import os
import re
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import sigreport.pipeline as pipeline
import sigreport.report.writer as writer
from sigreport.align import clear_anchor_cache
from sigreport.ingest import index_study, load_stack
from sigreport.pipeline import apply_role_overrides, choose_measured, run_report
from sigreport.rois import load_case
from sigreport.synth import demo_scenarios, generate_study

GOALS = {
    "demo": 15.0,
    "demo_wall_s": 8.0,
    "peak_mb": 400.0,
    "eight": 20.0,
    "sr_s": 1.0,
    "cache": 5.0,
}


def _eight_series_scenario(folder: Path) -> Path:
    """The neuro scenario with its localizer replaced by a measured 2D oblique PD series."""
    text = demo_scenarios()["neuro"].read_text()
    start = text.index('[[series]]\nrole = "UNKNOWN"')
    end = text.index("[[series]]", start + 10)
    pd = """[[series]]
role = "PD"
number = 1
description = "AX OBL PD TSE"
sequence = "TSE"
acquisition = "2D"
orientation = "axial"
tilt_deg = -8.0
tr_ms = 3000.0
te_ms = 15.0
echo_train = 8
pixel_mm = 1.0
slice_mm = 5.0
gap_mm = 1.0
fov_mm = [180.0, 150.0, 80.0]
snr = 30.0
gain_group = "pd"

"""
    path = folder / "eight.toml"
    path.write_text(text[:start] + pd + text[end:])
    return path


def _raw_read(study: Path) -> float:
    start = time.perf_counter()
    for path in sorted(p for p in study.rglob("*") if p.is_file()):
        path.read_bytes()
    return time.perf_counter() - start


def _index_and_load(study: Path, case_path: Path) -> float:
    start = time.perf_counter()
    index = index_study(study, use_cache=False)
    index, forced = apply_role_overrides(index, load_case(case_path).roles)
    measured, _ = choose_measured(index, forced)
    for stack in measured.values():
        load_stack(stack)
    return time.perf_counter() - start


def _report(study: Path, case_path: Path, out: Path) -> float:
    clear_anchor_cache()  # as in a fresh process: the anchor's pyramid is built in each run
    start = time.perf_counter()
    run_report(case_path, out, study_dir=study, force=True, use_cache=False)
    return time.perf_counter() - start


def _peak_mb(study: Path, case_path: Path, out: Path) -> float:
    """Peak resident memory of ``sigreport report`` in a child process: its own high-water mark
    (``VmHWM`` of /proc/self/status, proc(5)), written as it exits. Not the child's ru_maxrss:
    Linux counts in it the high-water mark of the address space it had before the exec, i.e.
    this process's own peak (a child printing 11 MB reports 626 MB after its parent peaked at
    640 MB), and this process has run whole reports by then."""
    code = (
        "import atexit, runpy, sys\n"
        "def peak():\n"
        "    for line in open('/proc/self/status'):\n"
        "        if line.startswith('VmHWM:'):\n"
        "            sys.stderr.write('VmHWM ' + line.split()[1] + '\\n')\n"
        "atexit.register(peak)\n"
        f"sys.argv = ['sigreport', 'report', {str(study)!r}, '--case', {str(case_path)!r}, "
        f"'--out', {str(out)!r}, '--force', '--no-cache']\n"
        "runpy.run_module('sigreport', run_name='__main__')\n"
    )
    done = subprocess.run([sys.executable, "-c", code], check=True, capture_output=True, text=True)
    return int(re.findall(r"VmHWM (\d+)", done.stderr)[-1]) / 1024.0  # kB


def _busy(calls: list[tuple[float, float, float]]) -> tuple[float, float]:
    """(seconds during which at least one call ran, CPU seconds of all calls)."""
    busy, until = 0.0, -math.inf
    for start, end, _ in sorted(calls):
        if end > until:
            busy += end - max(start, until)
            until = end
    return busy, sum(cpu for _, _, cpu in calls)


def _line(name: str, value: float, goal: float, unit: str = "x") -> str:
    ok = "ok" if value <= goal else "OVER"
    return f"  {name:<48} {value:8.2f}{unit:<3} goal <= {goal:g}{unit}  {ok}"


def main() -> None:
    repeats = int(sys.argv[1]) if len(sys.argv) > 1 else 1
    cores = os.cpu_count()
    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp)
        os.environ["SIGREPORT_CACHE_DIR"] = str(root / "cache")
        demo = generate_study("neuro", root / "demo")
        eight = generate_study(_eight_series_scenario(root), root / "eight")
        n_demo = sum(1 for p in demo.study_dir.rglob("*") if p.is_file())
        n_eight = sum(1 for p in eight.study_dir.rglob("*") if p.is_file())
        print(f"{cores} cores; demo {n_demo} files; 8-series study {n_eight} files")

        # Wall and CPU seconds (CPU: the process's, all threads; nothing else runs while the
        # report folder is written) of the SR and of the whole writing stage.
        sr_times: list[tuple[float, float]] = []
        stage_times: list[tuple[float, float]] = []
        build, write = writer.build_sr, writer.write_sr
        write_report = pipeline.write_report

        def timed(function, into, add=False):
            def run(*args, **kwargs):
                start, cpu = time.perf_counter(), time.process_time()
                out = function(*args, **kwargs)
                spent = (time.perf_counter() - start, time.process_time() - cpu)
                if add:
                    into[-1] = (into[-1][0] + spent[0], into[-1][1] + spent[1])
                else:
                    into.append(spent)
                return out

            return run

        writer.build_sr = timed(build, sr_times)  # type: ignore[assignment]
        writer.write_sr = timed(write, sr_times, add=True)  # type: ignore[assignment]
        pipeline.write_report = timed(write_report, stage_times)  # type: ignore[assignment]

        # Registration's share of the report: every register_series call the pipeline makes,
        # as (start, end, CPU seconds of the calling thread, where ITK runs single-threaded).
        # The calls overlap (series register in worker threads beside the measurement), so the
        # share is the time during which at least one registration ran, and the CPU they used.
        reg_calls: list[tuple[float, float, float]] = []
        register = pipeline.register_series

        def timed_register(*args, **kwargs):
            start, cpu = time.perf_counter(), time.thread_time()
            found = register(*args, **kwargs)
            reg_calls.append((start, time.perf_counter(), time.thread_time() - cpu))
            return found

        pipeline.register_series = timed_register  # type: ignore[assignment]

        # Warm up: imports, page cache.
        _index_and_load(demo.study_dir, demo.case_path)
        for run in range(1, repeats + 1):
            print(f"run {run}")
            base = _index_and_load(demo.study_dir, demo.case_path)
            cpu = time.process_time()
            reg_calls.clear()
            whole = _report(demo.study_dir, demo.case_path, root / "out-demo")
            cpu = time.process_time() - cpu
            print(f"  demo: index+load {base:.2f} s, report {whole:.2f} s wall, {cpu:.2f} s CPU")
            busy, reg_cpu = _busy(reg_calls)
            print(
                f"  demo: registration running {busy:.2f} s ({busy / base:.2f}x index + load), "
                f"{reg_cpu:.2f} s CPU in {len(reg_calls)} call(s)"
            )
            print(_line("demo report / (index + load)", whole / base, GOALS["demo"]))
            print(_line("demo report wall", whole, GOALS["demo_wall_s"], " s"))
            print(_line("sr.dcm build + write", sr_times[-1][0], GOALS["sr_s"], " s"))
            size = (root / "out-demo" / "sr.dcm").stat().st_size / 1024
            stage, stage_cpu = stage_times[-1]
            print(
                f"  sr.dcm size {size:.0f} KiB, {sr_times[-1][1]:.2f} s CPU; writing the report "
                f"folder {stage:.2f} s wall ({100 * stage / whole:.0f} % of the report), "
                f"{stage_cpu:.2f} s CPU"
            )
            print(_line("demo report peak memory", _peak_mb(demo.study_dir, demo.case_path,
                        root / "out-mem"), GOALS["peak_mb"], " MB"))  # fmt: skip

            base8 = _index_and_load(eight.study_dir, eight.case_path)
            cpu8 = time.process_time()
            reg_calls.clear()
            whole8 = _report(eight.study_dir, eight.case_path, root / "out-eight")
            cpu8 = time.process_time() - cpu8
            print(
                f"  8-series: index+load {base8:.2f} s, report {whole8:.2f} s wall, "
                f"{cpu8:.2f} s CPU"
            )
            busy8, reg_cpu8 = _busy(reg_calls)
            print(
                f"  8-series: registration running {busy8:.2f} s ({busy8 / base8:.2f}x index + "
                f"load), {reg_cpu8:.2f} s CPU in {len(reg_calls)} call(s)"
            )
            print(_line("8-series report / (index + load)", whole8 / base8, GOALS["eight"]))

            index_study(demo.study_dir)  # fills the header cache (if any)
            raw = _raw_read(demo.study_dir)
            start = time.perf_counter()
            index_study(demo.study_dir)
            cached = time.perf_counter() - start
            print(f"  raw read {raw:.3f} s, cached index {cached:.3f} s")
            print(_line("cached index / raw read", cached / raw, GOALS["cache"]))


if __name__ == "__main__":
    main()
