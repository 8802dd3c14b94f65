"""Borderline grades (grading.toml, docs/measurements.md): the ratio's confidence interval from
the ROIs' noise, checked against a Monte Carlo of medians drawn with numpy, and the lexicon's
margin around each grade threshold."""

from __future__ import annotations

import shutil

import numpy as np
import pytest

from sigreport.errors import InputError
from sigreport.measure import load_rules
from sigreport.measure.rules import is_borderline, ratio_interval
from sigreport.model import RoiStats


def _stats(median: float, sd: float, n: int) -> RoiStats:
    return RoiStats(n_voxels=n, mean=median, median=median, sd=sd, p05=0.0, p95=0.0)


@pytest.mark.parametrize(("n_lesion", "n_ref", "cv"), [(50, 200, 0.2), (400, 100, 0.1)])
def test_ratio_interval_matches_a_monte_carlo_of_medians(n_lesion, n_ref, cv):
    # Oracle: draw both ROIs' voxels from normal distributions with numpy, take the medians'
    # ratio many times, and compare its 2.5th / 97.5th percentiles with the analytic interval.
    rng = np.random.default_rng(7)
    lesion_median, ref_median = 900.0, 1000.0
    lesion = rng.normal(lesion_median, cv * lesion_median, size=(4000, n_lesion))
    ref = rng.normal(ref_median, cv * ref_median, size=(4000, n_ref))
    ratios = np.median(lesion, axis=1) / np.median(ref, axis=1)
    lo_mc, hi_mc = np.percentile(ratios, [2.5, 97.5])
    lo, hi = ratio_interval(
        _stats(lesion_median, cv * lesion_median, n_lesion),
        _stats(ref_median, cv * ref_median, n_ref),
        confidence=0.95,
    )
    half_mc, half = (hi_mc - lo_mc) / 2, (hi - lo) / 2
    assert half == pytest.approx(half_mc, rel=0.1)
    assert (lo + hi) / 2 == pytest.approx(0.9, abs=0.01)


def test_borderline_from_the_margin_or_the_interval(monkeypatch):
    monkeypatch.delenv("SIGREPORT_LEXICON", raising=False)
    rules = load_rules(None)
    assert rules.borderline.margin == 0.03 and rules.borderline.confidence == 0.95
    assert is_borderline(0.90, rules) is True  # on the threshold
    assert is_borderline(0.93, rules) is True and is_borderline(1.07, rules) is True  # margin
    assert is_borderline(0.85, rules) is False and is_borderline(1.00, rules) is False
    assert is_borderline(0.85, rules, (0.80, 0.91)) is True  # the interval holds 0.90
    assert is_borderline(None, rules) is None


def test_a_site_grading_file_is_validated(tmp_path, bundled_lexicon):
    site = tmp_path / "site"
    site.mkdir()
    shutil.copy(bundled_lexicon / "grading.toml", site / "grading.toml")
    assert load_rules(site).borderline == load_rules(None).borderline
    (site / "grading.toml").write_text(
        "[borderline]\nmargin = 0.6\nconfidence = 0.95\nword = 'x'\n"
    )
    with pytest.raises(InputError, match=r"grading\.toml \[borderline\] margin: must be in"):
        load_rules(site)


def test_a_rule_naming_an_unknown_reference_tissue_is_refused(tmp_path, bundled_lexicon):
    site = tmp_path / "site"
    site.mkdir()
    text = (bundled_lexicon / "behaviour.toml").read_text(encoding="utf-8")
    (site / "behaviour.toml").write_text(
        text.replace('references = ["white matter"', 'references = ["whte matter"', 1),
        encoding="utf-8",
    )
    with pytest.raises(InputError, match=r"references: 'whte matter' is not a tissue"):
        load_rules(site)
