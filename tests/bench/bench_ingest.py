"""Benchmark: index a ~2,000-file study and load one series, against SimpleITK (GDCM).

Not run by CI. Usage: ``PYTHONPATH=tests python tests/bench/bench_ingest.py [n_series] [slices_per_series]``.
Prints, from one run on the same files: our index vs SimpleITK's GDCM series scan
(GetGDCMSeriesIDs + GetGDCMSeriesFileNames per series) vs a raw read of every file's bytes; and
loading one series with ``load_stack`` vs ``sitk.ImageSeriesReader``.
"""

from __future__ import annotations

import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import SimpleITK as sitk

from sigreport.ingest import index_study, load_stack

from builders.dicom import write_classic_series


def _timed(fn):
    start = time.perf_counter()
    result = fn()
    return time.perf_counter() - start, result


def main() -> None:
    n_series = int(sys.argv[1]) if len(sys.argv) > 1 else 10
    n_slices = int(sys.argv[2]) if len(sys.argv) > 2 else 200
    rng = np.random.default_rng(0)
    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp)
        for s in range(n_series):
            stored = rng.integers(0, 4000, size=(n_slices, 256, 256), dtype=np.int16)
            write_classic_series(root / f"series{s}", stored, series_number=s + 1,
                                 spacing=(0.9, 0.9, 1.0), rescale=(1.0, 0.0), seed=s,
                                 extra={"RepetitionTime": "4000", "EchoTime": "100",
                                        "ScanningSequence": "SE"})  # fmt: skip
        files = [p for p in root.rglob("*") if p.is_file()]
        print(f"{len(files)} files, {n_series} series of {n_slices} slices 256x256")

        def raw():
            return sum(len(p.read_bytes()) for p in files)

        def gdcm_scan():
            # GDCM's series scan looks in one folder; scan each series folder like a user would
            # with a flat study, then list the files of each series.
            out = {}
            for folder in sorted({p.parent for p in files}):
                for uid in sitk.ImageSeriesReader.GetGDCMSeriesIDs(str(folder)):
                    out[uid] = sitk.ImageSeriesReader.GetGDCMSeriesFileNames(str(folder), uid)
            return out

        t_raw, n_bytes = _timed(raw)  # also warms the page cache for both scans
        t_gdcm, series = _timed(gdcm_scan)
        t_ours, index = _timed(lambda: index_study(root, use_cache=False))
        assert len(index.stacks) == n_series == len(series)
        print(
            f"index:  ours {t_ours:.3f} s | GDCM scan {t_gdcm:.3f} s | raw read "
            f"{t_raw:.3f} s ({n_bytes / 1e6:.0f} MB)  -> ours / GDCM = {t_ours / t_gdcm:.2f}"
        )

        stack = index.stacks[0]
        folder = stack.instances[0].path.parent

        def theirs():
            reader = sitk.ImageSeriesReader()
            reader.SetFileNames(sitk.ImageSeriesReader.GetGDCMSeriesFileNames(str(folder)))
            return reader.Execute()

        t_load_theirs, image_theirs = _timed(theirs)
        t_load_ours, image_ours = _timed(lambda: load_stack(stack))
        same = np.array_equal(sitk.GetArrayViewFromImage(image_ours),
                              sitk.GetArrayViewFromImage(image_theirs))  # fmt: skip
        print(
            f"load:   ours {t_load_ours:.3f} s | ImageSeriesReader {t_load_theirs:.3f} s  -> "
            f"ours / ITK = {t_load_ours / t_load_theirs:.2f} (same values: {same})"
        )


if __name__ == "__main__":
    main()
