"""lexicon/rois.toml: loaded and validated, a site's copy first."""

from __future__ import annotations

import shutil

import pytest

from sigreport.errors import InputError
from sigreport.lexicon import bundled_dir
from sigreport.rois.settings import load_roi_settings


def test_the_bundled_rules():
    s = load_roi_settings()
    assert s.seed_max_radius_mm == 20.0  # the case-file default of docs/usage.md
    assert s.mirror_spacing_mm > 0 and s.midline_margin_mm >= 0


def test_a_site_copy_wins_and_typos_are_named(tmp_path):
    shutil.copy(bundled_dir() / "rois.toml", tmp_path / "rois.toml")
    text = (tmp_path / "rois.toml").read_text()
    (tmp_path / "rois.toml").write_text(
        text.replace("max_radius_mm = 20.0", "max_radius_mm = 30.0")
    )
    assert load_roi_settings(tmp_path).seed_max_radius_mm == 30.0
    (tmp_path / "rois.toml").write_text(text.replace("leak_margin_mm", "leak_margn_mm"))
    with pytest.raises(InputError, match=r"rois.toml \[seed\]: unknown key\(s\) leak_margn_mm"):
        load_roi_settings(tmp_path)
