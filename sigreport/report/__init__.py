"""sigreport.report: what the job concluded, as the report folder (docs/outputs.md).

characterization -> build_findings (findings.json object), build_key_slices (key images)
                 -> write_report: findings.json, table.csv, report.md, report.txt,
                    report.html, sr.dcm and images/
"""

from sigreport.report.findings import (
    FINDINGS_SCHEMA,
    build_findings,
    lesion_phrases,
    phrases_from_findings,
)
from sigreport.report.keyslices import build_key_slices
from sigreport.report.writer import write_report

__all__ = [
    "FINDINGS_SCHEMA",
    "build_findings",
    "build_key_slices",
    "lesion_phrases",
    "phrases_from_findings",
    "write_report",
]
