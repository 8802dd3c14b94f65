"""Study ingestion: index a DICOM MR study, split series into stacks, infer roles, load pixels.

index_study(study_dir) -> StudyIndex       header-only scan, roles inferred
load_stack(stack) -> SimpleITK.Image       float32, rescaled, DICOM patient space (LPS)
infer_role(acquisition, description)       (Role, reason, confidence)
scan_to_json(index), print_scan_table(index, console)
"""

from sigreport.ingest.index import index_study
from sigreport.ingest.roles import infer_role, load_role_bands
from sigreport.ingest.scan import print_scan_table, scan_to_json
from sigreport.ingest.volume import load_stack

__all__ = [
    "index_study",
    "infer_role",
    "load_role_bands",
    "load_stack",
    "print_scan_table",
    "scan_to_json",
]
