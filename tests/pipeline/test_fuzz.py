"""Header fuzzing: ``scan`` and ``report`` on mutated headers exit 0 or 2, never 1, within a
memory ceiling.

The examples run in a child process (``fuzz_headers.main``) whose address space is capped with
``resource.setrlimit(RLIMIT_AS)`` at 1.5 GB, so an allocation sized from a hostile header fails
there (as a MemoryError, exit 1, which fails the test) instead of swapping the machine; its peak
resident memory must also stay under 1 GB. Seeded (``SIGREPORT_FUZZ_SEED``) so CI runs are
reproducible; another seed explores other examples.
"""

from __future__ import annotations

import os
import resource
import subprocess
import sys
from pathlib import Path

import pytest

HERE = Path(__file__).resolve().parent
ADDRESS_SPACE = int(1.5 * 1024**3)
PEAK_RSS = 1024**3


def _limit_memory() -> None:
    resource.setrlimit(resource.RLIMIT_AS, (ADDRESS_SPACE, ADDRESS_SPACE))


@pytest.mark.slow
def test_mutated_headers_never_exit_1_and_stay_under_the_memory_ceiling() -> None:
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join([str(HERE.parent), str(HERE)])
    # One thread each: thread stacks and BLAS buffers count against the address space.
    for name in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS",
                 "ITK_GLOBAL_DEFAULT_NUMBER_OF_THREADS"):  # fmt: skip
        env[name] = "1"
    done = subprocess.run(
        [sys.executable, "-c", "import fuzz_headers; fuzz_headers.main(40)"],
        cwd=HERE,
        env=env,
        capture_output=True,
        text=True,
        timeout=600,
        preexec_fn=_limit_memory,
        check=False,
    )
    assert done.returncode == 0, done.stdout[-6000:] + done.stderr[-6000:]
    peak_kb = int(done.stdout.split("maxrss_kb")[-1].split()[0])
    assert peak_kb * 1024 < PEAK_RSS, f"peak resident memory {peak_kb} kB"
