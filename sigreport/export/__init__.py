"""De-identified copies of a report folder (``sigreport export``).

export_report(report_dir, out_dir)     the whole folder, atomically
deidentify_sr(ds, uids, identifiers)   PS3.15 Basic Application Level Confidentiality Profile
deidentify_findings(findings, uids, identifiers)
"""

from sigreport.export.deidentify import (
    Identifiers,
    UidMap,
    deidentify_findings,
    deidentify_sr,
)
from sigreport.export.folder import export_report, find_identifiers

__all__ = [
    "Identifiers",
    "UidMap",
    "deidentify_findings",
    "deidentify_sr",
    "export_report",
    "find_identifiers",
]
