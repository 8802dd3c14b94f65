"""Benchmark: cases per minute of ``sigreport batch`` with 1 and 2 local workers, against the
same cases run one after the other by ``run_report`` in this process.

Not run by CI. Usage: ``python tests/bench/bench_batch.py [n_cases] [--keep DIR]``.
Builds ``n_cases`` (default 8) small synthetic cases from the tiny test scenario (three series,
one lesion, motion on; a different seed each), then, on the same files, in one run:
serial ``run_report`` calls, ``run_batch(workers=1)`` and ``run_batch(workers=2)``, two rounds
interleaved, the best of each kept. Wall times include the local cluster's start and stop;
CPU seconds per case (this process and its worker processes) show the overhead of Dask
independently of other load. The ratios are what to compare: absolute times depend on the
machine and on whatever else runs on it.
"""

from __future__ import annotations

import json
import os
import resource
import shutil
import sys
import tempfile
import time
from pathlib import Path

from sigreport.batch import load_worklist, run_batch
from sigreport.pipeline import run_report
from sigreport.synth import generate_study

TINY = Path(__file__).resolve().parents[1] / "synth" / "data" / "tiny.toml"


def build(root: Path, n_cases: int) -> Path:
    lines = []
    for k in range(n_cases):
        study = generate_study(TINY, root / f"case{k:02d}", seed=100 + k)
        lines += [
            "[[case]]",
            f'id = "case{k:02d}"',
            f"study = {json.dumps(str(study.study_dir))}",
            f"case = {json.dumps(str(study.case_path))}",
            "",
        ]
    worklist = root / "worklist.toml"
    worklist.write_text("\n".join(lines))
    return worklist


def _keep_best(times: dict[str, float], name: str, seconds: float) -> None:
    times[name] = min(seconds, times.get(name, seconds))


def _cpu_seconds() -> float:
    """CPU time (user + system) of this process and of its finished children: the local
    cluster's worker processes are children of this process, counted once the cluster closes."""
    own = resource.getrusage(resource.RUSAGE_SELF)
    children = resource.getrusage(resource.RUSAGE_CHILDREN)
    return own.ru_utime + own.ru_stime + children.ru_utime + children.ru_stime


def main() -> None:
    args = sys.argv[1:]
    keep = None
    if "--keep" in args:
        at = args.index("--keep")
        keep = Path(args[at + 1])
        del args[at : at + 2]
    n_cases = int(args[0]) if args else 8
    rounds = 2
    root = keep if keep is not None else Path(tempfile.mkdtemp(prefix="sigreport-bench-"))
    root.mkdir(parents=True, exist_ok=True)
    try:
        print(f"building {n_cases} cases in {root} ...", flush=True)
        worklist = load_worklist(build(root, n_cases))
        print(f"cores: {os.cpu_count()}; load average before: {os.getloadavg()}")
        times: dict[str, float] = {}
        cpu: dict[str, float] = {}
        # Two rounds, configurations interleaved, the best time of each kept: on a shared
        # machine the load changes from one minute to the next.
        for round_ in range(rounds):
            start, cpu_start = time.perf_counter(), _cpu_seconds()
            for entry in worklist.cases:
                run_report(entry.case, root / f"serial-{round_}" / entry.id, study_dir=entry.study)
            _keep_best(times, "serial run_report", time.perf_counter() - start)
            _keep_best(cpu, "serial run_report", _cpu_seconds() - cpu_start)
            for workers in (1, 2):
                out = root / f"batch{workers}-{round_}"
                start, cpu_start = time.perf_counter(), _cpu_seconds()
                result = run_batch(worklist, out, workers=workers)
                name = f"batch, {workers} worker(s)"
                _keep_best(times, name, time.perf_counter() - start)
                _keep_best(cpu, name, _cpu_seconds() - cpu_start)
                assert result.n_failed == 0, [c["reason"] for c in result.cases if c["reason"]]

        reference = times["serial run_report"]
        print(f"load average after: {os.getloadavg()}")
        print(
            f"{'run':<22} {'wall s':>7} {'cases/min':>10} {'wall vs serial':>15} {'CPU s/case':>11}"
        )
        for name, seconds in times.items():
            print(
                f"{name:<22} {seconds:7.1f} {60 * n_cases / seconds:10.1f} "
                f"{seconds / reference:15.2f} {cpu[name] / n_cases:11.2f}"
            )
    finally:
        if keep is None:
            shutil.rmtree(root, ignore_errors=True)


if __name__ == "__main__":
    main()
