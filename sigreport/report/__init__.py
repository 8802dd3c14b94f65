"""sigreport.report: the draft report files of OUTDIR (interface.md): findings.json, table.csv,
report.md, report.txt, report.html, sr.dcm and images/."""

from sigreport.report.writer import write_report

__all__ = ["write_report"]
