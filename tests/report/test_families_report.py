"""The other sequence families in the report: sentences from wording.toml [families], the table
columns, the time-intensity plot and the behaviour-rule keys for the new flags."""

from __future__ import annotations

import xml.etree.ElementTree as ET

import pytest

from sigreport.errors import InputError
from sigreport.lexicon_tables import load_wording
from sigreport.measure.rules import load_rules
from sigreport.report.images import time_intensity_svg
from sigreport.report.tables import COLUMNS, table_rows
from sigreport.report.text import family_sentences

WORDING = load_wording(None)

LESION = {
    "id": "L1",
    "signal": {},
    "diffusion": {
        "dwi": "DWI",
        "b_value": 1000.0,
        "dwi_ratio": 3.5,
        "adc_ratio": 0.55,
        "adc_1e-6_mm2_s": 420.0,
        "restricted": True,
        "shine_through": False,
    },
    "susceptibility": {"from": "T2", "to": "SWI", "drop_percent": None, "blooming": None},
    "chemical_shift": {
        "from": "IP",
        "to": "OP",
        "drop_percent": 48.9,
        "microscopic_fat": True,
        "fat_fraction_percent": 21.8,
        "reliable": False,
    },
    "dynamic": {
        "pre": "T1FS",
        "phases": [
            {"series_number": 8, "delay_s": 0.0, "percent": 114.4},
            {"series_number": 9, "delay_s": 60.0, "percent": 127.8},
            {"series_number": 10, "delay_s": 360.0, "percent": 78.0},
        ],
        "peak_phase": 2,
        "curve": "washout",
    },
}


def test_sentences_say_each_family_in_the_lexicons_words():
    text = " ".join(family_sentences(LESION, WORDING))
    assert "restricted diffusion" in text and "420 x 10^-6 mm2/s, ratio 0.55" in text
    assert "b 1000" in text
    # blooming is never said when the pair could not be assessed
    assert "blooming" not in text and "Susceptibility on SWI could not be assessed" in text
    assert "(drop 49 % from in-phase T1, measured in its core)" in text
    assert "unreliable" in text  # the chemical-shift pair is mismatched
    assert "Fat fraction 22 %" in text
    assert "+114 % at 0 s" in text and "highest at 60 s" in text and "washout (type III)" in text


def test_no_family_sentence_without_the_fields():
    assert family_sentences({"id": "L2", "diffusion": None, "dynamic": None}, WORDING) == []


def test_table_has_the_family_columns_on_the_right_rows():
    findings = {
        "series": [
            {"role": "ADC", "series_number": 6, "measured": True, "adc_units_ok": True},
            {"role": "OP", "series_number": 4, "measured": True},
            {"role": "FAT", "series_number": 6, "measured": True},
            {"role": "T1POSTFS", "series_number": 8, "measured": True, "phase": 1,
             "delay_s": 0.0, "in_signal": False},
            {"role": "T1POSTFS", "series_number": 10, "measured": True, "phase": 3,
             "delay_s": 360.0},
        ],
        "lesions": [
            {
                **LESION,
                "signal": {r: {"ratio": 1.0, "grade": "isointense"} for r in
                           ("ADC", "OP", "FAT", "T1POSTFS")},
            }
        ],
    }  # fmt: skip
    rows = {r["role"]: r for r in table_rows(findings)}
    assert {"adc_1e-6_mm2_s", "fat_fraction_percent", "dynamic_curve"} <= set(COLUMNS)
    assert rows["ADC"]["adc_1e-6_mm2_s"] == 420.0
    assert rows["OP"]["chemical_shift_drop_percent"] == 48.9
    assert "chemical-shift flag unreliable" in rows["OP"]["notes"]
    assert rows["FAT"]["fat_fraction_percent"] == 21.8
    # the role's signal series is the last phase, not a phase measured for the curve only
    assert rows["T1POSTFS"]["series_number"] == 10
    assert rows["T1POSTFS"]["dynamic_curve"] == "washout"


def test_time_intensity_plot_is_plain_svg_with_one_point_per_phase():
    svg = time_intensity_svg(
        [(0.0, 114.4), (60.0, 127.8), (360.0, 78.0)], title="L1 <b>", curve="washout"
    )
    root = ET.fromstring(svg)  # well-formed XML, the title escaped
    ns = "{http://www.w3.org/2000/svg}"
    points = root.findall(f"{ns}circle")
    assert len(points) == 3
    ys = [float(c.get("cy")) for c in points]
    assert ys[1] < ys[0] < ys[2]  # higher percent is higher on the page (smaller y)
    assert "<script" not in svg and "L1 &lt;b&gt; (washout)" in svg


def test_rules_know_the_new_flags_and_refuse_an_unknown_curve(tmp_path):
    rules = load_rules(None)
    assert {"t2-shine-through", "blooming", "microscopic-fat", "curve-washout"} <= set(
        rules.behaviour
    )
    assert rules.behaviour["curve-washout"].matches({"curve": "washout"})
    assert rules.behaviour["curve-washout"].evaluate({"curve": None}) is None
    (tmp_path / "behaviour.toml").write_text(
        '[rule.x]\nphrase = "x"\nwhen = { curve = "type 4" }\n'
    )
    with pytest.raises(InputError, match=r"curve: expected one of persistent, plateau, washout"):
        load_rules(tmp_path)
