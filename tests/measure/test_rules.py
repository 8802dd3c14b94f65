"""The measurement lexicon: bundled files load, bad site files are rejected with a message naming
the file and key, a site folder overrides a threshold, and the condition language's logic."""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest

from sigreport.errors import InputError
from sigreport.measure import BehaviourRule, grade_of, grade_phrase, load_rules
from sigreport.model import EnhancementPattern, Grade

FILES = ("thresholds.toml", "tissues.toml", "behaviour.toml", "grading.toml")


def _site(tmp_path: Path, bundled: Path, name: str, edit) -> Path:
    site = tmp_path / "site"
    site.mkdir()
    text = (bundled / name).read_text(encoding="utf-8")
    (site / name).write_text(edit(text), encoding="utf-8")
    return site


def test_bundled_lexicon_loads(rules):
    # docs/usage.md findings.json: defaults hyper >= 1.10, hypo <= 0.90, enhancing >= 15 %,
    # suppressed >= 50 %, flow void ratio <= 0.3.
    t = rules.thresholds
    assert (t.grade.hyper_min_ratio, t.grade.hypo_max_ratio) == (1.10, 0.90)
    assert t.enhancement.enhancing_min_percent == 15.0
    assert t.suppression.suppressed_min_drop_percent == 50.0
    assert t.flow_void.max_ratio == 0.3
    assert rules.min_voxels == t.measure.min_voxels
    # The keys the report looks phrases up by (the brief's list).
    for key in (
        "follows-fluid",
        "macroscopic-fat",
        "t1-bright-not-fat",
        "rim-enhancement",
        "solid-enhancement",
        "non-enhancing",
        "flow-void",
        "t2-bright-not-fluid",
    ):
        assert rules.behaviour[key].phrase
    assert rules.behaviour["flow-void"].phrase == "flow void: patent high-flow vessel"


def test_tissue_names_resolve_through_aliases_case_insensitively(rules):
    assert rules.tissue("Cerebrospinal Fluid").name == "CSF"
    assert rules.tissue("csf").check == "fluid"
    assert rules.tissue("subcutaneous fat").check == "fat"
    assert rules.tissue("gray matter").name == "grey matter"
    assert rules.tissue("white matter").check is None
    assert rules.tissue("unobtainium") is None


def test_considerations_are_not_diagnoses(rules):
    # Project rule: considerations are things to consider; no "diagnosis" / "is a" wording.
    for rule in rules.behaviour.values():
        for text in rule.considerations:
            assert "diagnos" not in text.lower() and not text.lower().startswith("is ")


@pytest.mark.parametrize(
    ("ratio", "phrase"),
    [
        (2.5, "markedly hyperintense"),
        (2.0, "markedly hyperintense"),
        (1.5, "hyperintense"),
        (1.2, "mildly hyperintense"),
        (1.10, "mildly hyperintense"),
        (1.0999, "isointense"),
        (1.0, "isointense"),
        (0.9001, "isointense"),
        (0.90, "mildly hypointense"),
        (0.7, "hypointense"),
        (0.5, "markedly hypointense"),
        (0.1, "markedly hypointense"),
        (None, None),
    ],
)
def test_grade_phrase_bands(rules, ratio, phrase):
    assert grade_phrase(ratio, rules) == phrase


def test_grade_is_compared_as_printed(rules):
    # 1.09996 prints as 1.1 (4 decimals) and so grades as hyperintense.
    assert grade_of(1.09996, rules) is Grade.HYPERINTENSE
    assert grade_of(1.09994, rules) is Grade.ISOINTENSE


def test_site_folder_overrides_a_threshold(tmp_path, bundled_lexicon):
    site = _site(
        tmp_path,
        bundled_lexicon,
        "thresholds.toml",
        lambda t: t.replace("hyper_min_ratio = 1.10", "hyper_min_ratio = 1.20"),
    )
    local = load_rules(site)
    assert local.thresholds.grade.hyper_min_ratio == 1.20
    assert grade_of(1.15, local) is Grade.ISOINTENSE
    assert grade_of(1.15, load_rules()) is Grade.HYPERINTENSE
    # Files absent from the site folder fall back to the bundled ones.
    assert local.sources["tissues.toml"].parent == bundled_lexicon
    assert local.sources["thresholds.toml"].parent == site


def test_unknown_threshold_key_is_rejected(tmp_path, bundled_lexicon):
    site = _site(
        tmp_path,
        bundled_lexicon,
        "thresholds.toml",
        lambda t: t.replace("[grade]\n", "[grade]\nhyper_min_ration = 1.2\n"),
    )
    with pytest.raises(
        InputError, match=r"thresholds\.toml \[grade\]: unknown key\(s\) hyper_min_ration"
    ):
        load_rules(site)


def test_missing_threshold_key_is_rejected(tmp_path, bundled_lexicon):
    site = _site(
        tmp_path,
        bundled_lexicon,
        "thresholds.toml",
        lambda t: t.replace("max_cv = 0.20\n", ""),
    )
    with pytest.raises(
        InputError, match=r"thresholds\.toml \[reference\]: missing key\(s\) max_cv"
    ):
        load_rules(site)


def test_wrong_type_is_rejected(tmp_path, bundled_lexicon):
    site = _site(
        tmp_path,
        bundled_lexicon,
        "thresholds.toml",
        lambda t: t.replace("max_ratio = 0.3", 'max_ratio = "low"'),
    )
    with pytest.raises(InputError, match=r"\[flow_void\] max_ratio: expected a number, got 'low'"):
        load_rules(site)


def test_inconsistent_grade_bands_are_rejected(tmp_path, bundled_lexicon):
    site = _site(
        tmp_path,
        bundled_lexicon,
        "thresholds.toml",
        lambda t: t.replace("hypo_max_ratio = 0.90", "hypo_max_ratio = 1.30"),
    )
    with pytest.raises(InputError, match=r"hypo_max_ratio < 1 < hyper_min_ratio"):
        load_rules(site)


def test_behaviour_rule_without_phrase_is_rejected(tmp_path, bundled_lexicon):
    site = _site(
        tmp_path,
        bundled_lexicon,
        "behaviour.toml",
        lambda t: t.replace('phrase = "follows fluid on all series"\n', ""),
    )
    with pytest.raises(
        InputError, match=r"behaviour\.toml \[rule\.follows-fluid\]: missing phrase"
    ):
        load_rules(site)


def test_behaviour_condition_with_unknown_key_is_rejected(tmp_path, bundled_lexicon):
    site = _site(
        tmp_path,
        bundled_lexicon,
        "behaviour.toml",
        lambda t: t.replace('when = { pattern = "rim" }', 'when = { patern = "rim" }'),
    )
    with pytest.raises(
        InputError, match=r"\[rule\.rim-enhancement\] when: unknown key\(s\) patern"
    ):
        load_rules(site)


def test_behaviour_condition_with_unknown_grade_is_rejected(tmp_path, bundled_lexicon):
    site = _site(
        tmp_path,
        bundled_lexicon,
        "behaviour.toml",
        lambda t: t.replace('T2 = "hypointense", not', 'T2 = "dark", not'),
    )
    with pytest.raises(InputError, match=r"\[rule\.t2-dark\] when\.T2: expected one of"):
        load_rules(site)


def test_tissue_with_unknown_check_is_rejected(tmp_path, bundled_lexicon):
    site = _site(
        tmp_path,
        bundled_lexicon,
        "tissues.toml",
        lambda t: t.replace('check = "fat"', 'check = "lipid"'),
    )
    with pytest.raises(InputError, match=r"tissues\.toml \[tissues\.fat\] check: expected one of"):
        load_rules(site)


def test_all_bundled_files_exist(bundled_lexicon):
    for name in FILES:
        assert (bundled_lexicon / name).is_file()


def test_a_site_copy_of_the_bundled_files_loads_the_same(tmp_path, bundled_lexicon):
    site = tmp_path / "site"
    site.mkdir()
    for name in FILES:
        shutil.copy(bundled_lexicon / name, site / name)
    local = load_rules(site)
    assert local.thresholds == load_rules().thresholds
    assert list(local.behaviour) == list(load_rules().behaviour)
    assert all(path.parent == site for path in local.sources.values())


def _rule(when) -> BehaviourRule:
    return BehaviourRule(key="k", phrase="p", considerations=(), when=when)


def test_condition_language_is_three_valued():
    rule = _rule({"T2": "hyperintense", "fluid_suppressed": True})
    assert rule.evaluate({"T2": Grade.HYPERINTENSE, "fluid_suppressed": True}) is True
    assert rule.evaluate({"T2": Grade.HYPERINTENSE, "fluid_suppressed": False}) is False
    # A missing fact is unknown: the rule neither holds nor fails, and does not fire.
    assert rule.evaluate({"T2": Grade.HYPERINTENSE}) is None
    assert not rule.matches({"T2": Grade.HYPERINTENSE})
    # ... but a failing entry decides, whatever else is unknown.
    assert rule.evaluate({"T2": Grade.ISOINTENSE}) is False


def test_condition_language_any_of_not_and_lists():
    rule = _rule(
        {
            "any_of": [{"T1": "hyperintense"}, {"pattern": ["rim", "heterogeneous"]}],
            "not": {"flow_void": True},
        }
    )
    assert rule.matches({"T1": Grade.HYPERINTENSE, "flow_void": False})
    assert rule.matches({"pattern": EnhancementPattern.HETEROGENEOUS, "flow_void": False})
    assert not rule.matches(
        {"pattern": EnhancementPattern.SOLID, "T1": Grade.ISOINTENSE, "flow_void": False}
    )
    assert not rule.matches({"T1": Grade.HYPERINTENSE, "flow_void": True})
    # not(unknown) is unknown
    assert rule.evaluate({"T1": Grade.HYPERINTENSE}) is None
