"""A corpus of hand-made hostile studies (``builders.hostile.build_corpus``: huge declared
sizes, frames that do not exist, a FIFO, a device, a socket, large non-DICOM files, a deflate
bomb, NaN geometry, foreign slices, duplicate UIDs, two studies, gzip bombs, a mask of another
frame of reference, 10,000 ROIs) through the installed program, one process per command.

Each run must end by itself (no hang: a timeout kills it and fails), exit 0 or 2 with the
expected code (never 1), print no traceback, and peak under 1 GB resident (each child's own
``ru_maxrss`` from ``os.wait4``).
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from builders.hostile import build_corpus

TIMEOUT_S = 180
PEAK_RSS = 1024**3
# name: (scan exit code, report exit code)
EXPECTED = {
    "huge-rows": (0, 0),
    "million-frames": (0, 0),
    "special-files": (0, 0),
    "big-non-dicom": (0, 0),
    "deflate-bomb": (0, 0),
    "nan-geometry": (2, 2),
    "inf-slope": (2, 2),
    "no-sop-uid": (2, 2),
    "unknown-charset": (0, 0),
    "two-studies": (0, 2),
    "foreign-slice": (0, 0),
    "duplicate-uid": (0, 0),
    "gzip-bomb": (0, 2),
    "gzip-padding": (0, 2),
    "rtstruct-other-frame": (0, 2),
    "many-rois": (0, 2),
    "huge-roi": (0, 2),
}


def _start(args: list[str], log: Path) -> tuple[subprocess.Popen[bytes], Path, float]:
    with open(log.with_suffix(".out"), "wb") as out, open(log, "wb") as err:
        process = subprocess.Popen(
            [sys.executable, "-m", "sigreport", *args], stdout=out, stderr=err
        )
    return process, log, time.monotonic()


def _wait(process: subprocess.Popen[bytes], started: float) -> tuple[int | None, int]:
    """(exit code or None when it had to be killed, peak resident kB)."""
    while True:
        pid, status, usage = os.wait4(process.pid, os.WNOHANG)
        if pid:
            process.returncode = os.waitstatus_to_exitcode(status)
            return process.returncode, usage.ru_maxrss
        if time.monotonic() - started > TIMEOUT_S:
            process.send_signal(signal.SIGKILL)
            _, _, usage = os.wait4(process.pid, 0)
            process.returncode = -9
            return None, usage.ru_maxrss
        time.sleep(0.05)


@pytest.mark.slow
def test_hostile_corpus_exits_0_or_2_without_traceback_hang_or_1_gb(tmp_path: Path) -> None:
    corpus = build_corpus(tmp_path / "corpus")
    assert set(corpus) == set(EXPECTED)
    runs = []
    for name, (study, case) in sorted(corpus.items()):
        out = tmp_path / "out" / name
        runs.append((name, "scan", ["scan", str(study)]))
        runs.append((name, "report", ["report", str(study), "--case", str(case), "--out",
                                      str(out), "--no-register"]))  # fmt: skip
    logs = tmp_path / "logs"
    logs.mkdir()
    problems = []
    pending = list(runs)
    active: list[tuple[str, str, subprocess.Popen[bytes], Path, float]] = []
    while pending or active:
        while pending and len(active) < 2:  # two at a time: CI machines have two cores
            name, command, args = pending.pop(0)
            process, log, started = _start(args, logs / f"{name}-{command}.err")
            active.append((name, command, process, log, started))
        name, command, process, log, started = active.pop(0)
        code, peak_kb = _wait(process, started)
        stderr = log.read_text(errors="replace")
        want = EXPECTED[name][0 if command == "scan" else 1]
        if code is None:
            problems.append(f"{name} {command}: still running after {TIMEOUT_S} s, killed")
        elif code != want:
            problems.append(f"{name} {command}: exit {code}, expected {want}: {stderr[-800:]}")
        if "Traceback" in stderr:
            problems.append(f"{name} {command}: traceback on stderr: {stderr[-800:]}")
        if peak_kb * 1024 >= PEAK_RSS:
            problems.append(f"{name} {command}: peak resident memory {peak_kb} kB")
    assert not problems, "\n".join(problems)
