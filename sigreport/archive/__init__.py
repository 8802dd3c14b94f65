"""The archive: studies read from and reports stored to a DICOMweb service (DICOM PS3.18).

Archive(url)                                   the connection (credentials from the environment)
read_study(archive, study_uid)                 every series, indexed from metadata (no pixels)
fetch_needed_series(archive, study_uid, dest)  only the series a report measures, into dest
private_folder()                               a 0700 temporary folder removed afterwards
report_from_archive(case, out, url=, study_uid=, push=)    ``report --dicomweb``
scan_archive(url, study_uid)                   ``scan --dicomweb``

No function here is called unless a command was given ``--dicomweb``.
"""

from sigreport.archive.dicomweb import Archive, Credentials, StoreAnswer
from sigreport.archive.fetch import (
    ArchiveReport,
    ArchiveStudy,
    FetchedStudy,
    fetch_needed_series,
    needed_stacks,
    private_folder,
    read_study,
    report_from_archive,
    scan_archive,
)

__all__ = [
    "Archive",
    "ArchiveReport",
    "ArchiveStudy",
    "Credentials",
    "FetchedStudy",
    "StoreAnswer",
    "fetch_needed_series",
    "needed_stacks",
    "private_folder",
    "read_study",
    "report_from_archive",
    "scan_archive",
]
