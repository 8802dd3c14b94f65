"""sigreport.batch: every case of a worklist on Dask, and the board sheet.

    worklist (worklist.py) -> one task per case on Dask (run.py) -> index.html, summary.csv
    (sheet.py)

docs/usage.md (``sigreport batch``) states the contract.
"""

from sigreport.batch.run import BatchResult, case_summary, run_batch, run_case
from sigreport.batch.sheet import render_index, summary_csv, write_sheet
from sigreport.batch.worklist import CaseEntry, Worklist, load_worklist

__all__ = [
    "BatchResult",
    "CaseEntry",
    "Worklist",
    "case_summary",
    "load_worklist",
    "render_index",
    "run_batch",
    "run_case",
    "summary_csv",
    "write_sheet",
]
