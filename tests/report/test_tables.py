"""table.csv: one row per lesion and role, with the lesion's enhancement and drops where they
apply; checked by reading the file back with Python's csv module (RFC 4180)."""

from __future__ import annotations

import csv

from sigreport.report.tables import COLUMNS, rows_to_csv, table_rows


def _read(report_dir):
    with (report_dir / "table.csv").open(newline="", encoding="utf-8") as handle:
        return list(csv.DictReader(handle))


def test_one_row_per_lesion_and_role(report_dir, findings):
    rows = _read(report_dir)
    expected = [(lesion["id"], role) for lesion in findings["lesions"] for role in lesion["signal"]]
    assert sorted((r["lesion"], r["role"]) for r in rows) == sorted(expected)
    assert len(rows) == 15
    required = {
        "lesion",
        "site",
        "role",
        "series_number",
        "n_voxels",
        "median",
        "ratio",
        "grade",
        "notes",
    }
    assert required <= set(rows[0])


def test_values_come_from_the_findings(report_dir, findings):
    rows = {(r["lesion"], r["role"]): r for r in _read(report_dir)}
    t2 = findings["lesions"][0]["signal"]["T2"]
    row = rows[("L1", "T2")]
    assert float(row["median"]) == t2["median"] and float(row["ratio"]) == t2["ratio"]
    assert row["grade"] == "hyperintense" and row["series_number"] == "4"
    assert int(row["n_voxels"]) == t2["n_voxels"]


def test_enhancement_and_drops_sit_on_their_rows(report_dir):
    rows = {(r["lesion"], r["role"]): r for r in _read(report_dir)}
    assert float(rows[("L3", "T1POST")]["enhancement_percent"]) == 84.0
    assert "rim" in rows[("L3", "T1POST")]["notes"]
    assert rows[("L3", "T1")]["enhancement_percent"] == ""
    assert float(rows[("L1", "FLAIR")]["fluid_drop_percent"]) == 91.1
    assert rows[("L1", "FLAIR")]["fat_drop_percent"] == ""
    assert float(rows[("L2", "T1FS")]["fat_drop_percent"]) == 80.0
    assert "unreliable" in rows[("L2", "T1FS")]["notes"]
    assert rows[("L1", "T2")]["fluid_drop_percent"] == ""


def test_unmeasured_role_has_a_row_that_says_so(report_dir):
    row = {(r["lesion"], r["role"]): r for r in _read(report_dir)}[("L2", "T1POST")]
    assert row["median"] == "" and row["ratio"] == ""
    assert "not measured" in row["notes"]


def test_free_text_cannot_become_a_spreadsheet_formula(findings):
    # OWASP "CSV injection": a cell starting with "=" is run by spreadsheets.
    findings["lesions"][0]["site"] = '=HYPERLINK("x")'
    text = rows_to_csv(table_rows(findings))
    rows = list(csv.DictReader(text.splitlines()))
    assert rows[0]["site"] == '\'=HYPERLINK("x")'
    assert list(rows[0]) == list(COLUMNS)
