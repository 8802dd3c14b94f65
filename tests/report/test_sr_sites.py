"""sr.dcm's coded finding sites with laterality, the reference and control ROIs as their own
measurement groups, and each value's series as a standard image reference; checked against
pydicom's PS3.16 code dictionary, highdicom's parser and dciodvfy."""

from __future__ import annotations

import os
import shutil
import subprocess
from dataclasses import replace

import highdicom as hd
import pytest
from pydicom.sr.codedict import codes
from report.conftest import CENTRES, disk, make_findings

from sigreport.errors import InputError
from sigreport.lexicon import read_table
from sigreport.report.sites import SITES_FILE, load_sites
from sigreport.report.sr import build_sr, write_sr


def _pydicom_sct() -> dict[str, set[str]]:
    """SNOMED CT code -> meanings, from pydicom's PS3.16 code dictionary (the oracle)."""
    out: dict[str, set[str]] = {}
    for name in dir(codes.SCT):
        code = getattr(codes.SCT, name)
        if hasattr(code, "scheme_designator"):
            out.setdefault(code.value, set()).add(code.meaning.lower())
    return out


def test_every_lexicon_code_is_the_one_ps3_16_lists():
    table = read_table(SITES_FILE)
    known = _pydicom_sct()
    for section in ("sites", "laterality"):
        for key, entry in table[section].items():
            assert entry["code"] in known, (section, key)
            assert entry["meaning"].lower() in known[entry["code"]], (section, key)


def test_every_reference_and_control_tissue_has_a_code():
    sites = load_sites()
    for tissue in read_table("tissues.toml")["tissues"]:
        assert sites.site(tissue) is not None, tissue


def test_site_words_pick_the_longest_match_and_the_side():
    sites = load_sites()
    found = sites.site("right frontal white matter")
    assert found is not None and found.meaning == "White Matter"
    side = sites.side("right frontal white matter")
    assert side is not None and side.coded() == codes.SCT.Right  # PS3.16 CID 244
    assert sites.side("left paramedian artery").coded() == codes.SCT.Left
    assert sites.side("paramedian artery") is None
    assert sites.side("right and left frontal") is None  # two sides: none asserted
    assert sites.site("left temporal") is not None and sites.site("nowhere") is None


def test_a_broken_sites_table_names_the_entry(tmp_path):
    (tmp_path / SITES_FILE).write_text(
        '[laterality]\nright = { code = "24028007", meaning = "Right", words = ["right"] }\n'
        '[sites.brain]\ncode = 12738006\nmeaning = "Brain"\nwords = ["brain"]\n',
        encoding="utf-8",
    )
    with pytest.raises(InputError, match=r"\[sites.brain\] code: expected a SNOMED CT code"):
        load_sites(tmp_path)


@pytest.fixture(scope="module")
def sr_file(tmp_path_factory, study, key_slices):
    """An SR whose findings carry schema-2 reference fields and a key image of R1 on T2."""
    findings = make_findings(study)
    findings["rois"][0].update(site="left frontal white matter", medians={"T2": 678.5, "T1": 660.0})
    findings["rois"][1].update(
        site="right lateral ventricle",
        check={"kind": "fluid", "from": "T2", "to": "FLAIR", "reference": "R1",
               "drop_percent": 92.0, "passed": True},
    )  # fmt: skip
    l1_t2 = next(k for k in key_slices if k.roi_id == "L1" and str(k.role) == "T2")
    r1 = replace(
        l1_t2, roi_id="R1", lesion_mask=disk(CENTRES["R1"], 4), reference_mask=None,
        kind="reference",
    )  # fmt: skip
    path = tmp_path_factory.mktemp("sr") / "sr.dcm"
    write_sr(path, build_sr(findings, [*key_slices, r1], study))
    return path


@pytest.fixture(scope="module")
def read_back(sr_file):
    sr = hd.sr.srread(sr_file)
    return {
        g.tracking_identifier.split(" ")[0]: g for g in sr.content.get_image_measurement_groups()
    }


def test_lesion_finding_site_is_coded_with_laterality(read_back):
    [site] = read_back["L1"].finding_sites
    assert site.value == codes.SCT.WhiteMatter
    assert site.laterality == codes.SCT.Right
    [l2] = read_back["L2"].finding_sites  # "left parietal scalp"
    assert l2.value == codes.SCT.Scalp and l2.laterality == codes.SCT.Left


def test_reference_is_its_own_group_with_its_values_and_image(read_back, study):
    group = read_back["R1"]
    assert group.tracking_identifier == "R1 (reference: white matter)"
    assert group.finding_type == codes.SCT.WhiteMatter
    [site] = group.finding_sites
    assert site.value == codes.SCT.WhiteMatter and site.laterality == codes.SCT.Left
    medians = [
        m for m in group.get_measurements(name=codes.DCM.MRSignalIntensity)
        if m.derivation == codes.cid7464.Median
    ]  # fmt: skip
    assert sorted(m.value for m in medians) == [660.0, 678.5]
    [t2] = [m for m in medians if m.value == 678.5]
    # The series of the value: the image it references (TID 300 Source of Measurement).
    [ref] = t2.referenced_images
    assert ref.referenced_sop_instance_uid == study["T2"].instances[1].sop_instance_uid
    assert t2.method is None
    [t1] = [m for m in medians if m.value == 660.0]
    assert t1.referenced_images is None or t1.referenced_images == []
    assert t1.method is not None and t1.method.value == "ROLE-T1"  # no image: the private name
    snr = group.get_measurements(name=codes.DCM.SignalToNoiseRatio)
    assert sorted(m.value for m in snr) == [35.5, 40.0]


def test_control_group_carries_its_check(read_back):
    group = read_back["C1"]
    assert group.finding_type == codes.SCT.CerebrospinalFluid
    [site] = group.finding_sites
    assert site.value == codes.SCT.LateralVentricle and site.laterality == codes.SCT.Right
    [drop] = [m for m in group.get_measurements() if m.name.value == "DROP-FLUID"]
    assert drop.value == pytest.approx(92.0)
    [passed] = [e for e in group.get_qualitative_evaluations() if e.name.value == "CONTROL-PASSED"]
    assert passed.value == codes.SCT.Yes


def test_pair_values_reference_both_series(read_back, study):
    [enh] = [m for m in read_back["L3"].get_measurements() if m.name.value == "ENH-PCT"]
    uids = {r.referenced_sop_instance_uid for r in enh.referenced_images}
    assert uids == {study[r].instances[1].sop_instance_uid for r in ("T1", "T1POST")}


@pytest.mark.dciodvfy
def test_sr_with_sites_and_reference_groups_passes_dciodvfy(sr_file):
    binary = shutil.which("dciodvfy")
    if binary is None:
        if os.environ.get("CI"):
            pytest.fail("dciodvfy (Debian dicom3tools) is required when CI is set")
        pytest.skip("dciodvfy (Debian dicom3tools) is not installed")
    result = subprocess.run([binary, str(sr_file)], capture_output=True, text=True, timeout=60)
    output = result.stdout + result.stderr
    assert "Comprehensive3DSR" in output
    assert [line for line in output.splitlines() if line.startswith("Error")] == []
