"""The head model, the tissue table, the per-tissue signals and the scenario loader."""

from __future__ import annotations

import math
import tomllib

import numpy as np
import pytest

from sigreport.errors import InputError
from sigreport.model import Role
from sigreport.synth import phantom
from sigreport.synth.geometry import plan_geometry
from sigreport.synth.scenario import load_scenario
from sigreport.synth.sequences import resolve_ti, tissue_signals
from sigreport.synth.study import demo_scenarios
from sigreport.synth.tissues import demo_dir, load_tissues

GRID = phantom.Grid.covering((-20.0, -20.0, -20.0), (20.0, 20.0, 20.0))


@pytest.mark.parametrize(
    ("solid", "volume"),
    [
        (phantom.Sphere((0.3, -0.2, 0.1), 7.3), 4 / 3 * math.pi * 7.3**3),  # 4/3 pi r^3
        (phantom.Ellipsoid((0.0, 0.5, 0.0), (8.0, 5.0, 4.0)), 4 / 3 * math.pi * 8 * 5 * 4),
        (phantom.Cylinder((0.0, -10.0, 0.2), (0.0, 10.0, 0.2), 4.5), math.pi * 4.5**2 * 20),
    ],
)
def test_partial_volume_fractions_add_up_to_the_solid_volume(solid, volume):
    # Geometry: the fractional occupancy summed over 1 mm voxels is the solid's volume.
    model = phantom.build(GRID, [("x", solid)])
    frac = model.fraction_of("x")
    assert frac.sum() == pytest.approx(volume, rel=0.015)
    assert ((frac > 0.05) & (frac < 0.95)).any()  # partial volume at the edge


def test_head_model_fractions_are_a_partition_of_unity():
    model = phantom.build(phantom.default_grid(), phantom.anatomy())
    total = model.paint(dict.fromkeys(model.tissues, 1.0))
    np.testing.assert_allclose(total, 1.0, atol=1e-5)
    wanted = {"fat", "muscle", "bone", "gray matter", "white matter", "CSF", "vitreous",
              "optic nerve", "extraocular muscle", "sclera"}  # fmt: skip
    assert wanted <= set(model.tissues)
    wm = model.fraction_of("white matter")
    assert wm.sum() > 1e5 and ((wm > 0.1) & (wm < 0.9)).sum() > 1000


def test_every_tissue_cites_a_source():
    with (demo_dir() / "tissues.toml").open("rb") as handle:
        data = tomllib.load(handle)
    for name, entry in data["tissue"].items():
        assert entry["source"] in data["sources"], name
        assert set(entry["t1_ms"]) == {"1.5", "3.0"} == set(entry["t2_ms"]), name
    # Relaxation times lengthen (T1) with field for the tabulated brain tissues (Stanisz 2005).
    t15, t30 = load_tissues(1.5), load_tissues(3.0)
    for name in ("white matter", "gray matter", "muscle", "fat"):
        assert t30.get(name).t1_ms > t15.get(name).t1_ms


def test_tissue_signals_flow_void_fat_sat_and_contrast():
    scn = load_scenario(demo_scenarios()["neuro"])
    table = load_tissues(1.5)
    plans = {s.role: s for s in scn.series}
    t1 = tissue_signals(resolve_ti(plans[Role.T1], table), table)
    post = tissue_signals(resolve_ti(plans[Role.T1POST], table), table)
    gre = tissue_signals(resolve_ti(plans[Role.T1FS], table), table)
    gre_post = tissue_signals(resolve_ti(plans[Role.T1POSTFS], table), table)
    flair = tissue_signals(resolve_ti(plans[Role.FLAIR], table), table)
    for signals in (t1, post, gre, flair):
        assert signals["artery"] == 0.0  # flow void
    assert flair["CSF"] == pytest.approx(0.0, abs=1e-12)  # nulled
    assert post["white matter"] == t1["white matter"]  # intact blood-brain barrier
    assert post["optic nerve"] == t1["optic nerve"]  # blood-nerve barrier
    assert gre_post["extraocular muscle"] > 1.3 * gre["extraocular muscle"]
    assert post["enhancing tumour"] > 1.3 * t1["enhancing tumour"]
    failed = tissue_signals(resolve_ti(plans[Role.T1FS], table), table, fat_sat_failed=True)
    assert gre["fat"] / failed["fat"] == pytest.approx(
        table.fat_sat_residual / table.fat_sat_failed_residual
    )
    assert failed["white matter"] == gre["white matter"]


def test_demo_scenarios_load_and_fit_their_series():
    for name, path in demo_scenarios().items():
        scn = load_scenario(path)
        assert scn.name == name
        refs = [r for r in scn.rois if r.kind.value == "reference"]
        assert refs, name
        for plan in scn.series:
            geo = plan_geometry(plan)
            normal = np.cross(geo.row, geo.column)
            np.testing.assert_allclose(normal, geo.normal)  # PS3.3 C.7.6.2.1.1
            assert abs(np.dot(geo.row, geo.column)) < 1e-12


def _write(tmp_path, text):
    path = tmp_path / "s.toml"
    path.write_text(text)
    return path


def test_scenario_errors_name_the_field(tmp_path):
    base = (demo_dir() / "neuro.toml").read_text()
    with pytest.raises(InputError, match="unknown key"):
        load_scenario(_write(tmp_path, base + "\nbogus = 1\n"))
    with pytest.raises(InputError, match=r"series\[1\].role: 'T9' is not a series role"):
        load_scenario(_write(tmp_path, base.replace('role = "T1"\n', 'role = "T9"\n', 1)))
    with pytest.raises(InputError, match="an IR series needs ti_ms"):
        load_scenario(_write(tmp_path, base.replace('ti_ms = "null:CSF"\n', "")))
    with pytest.raises(InputError, match="each series role may appear once"):
        load_scenario(_write(tmp_path, base.replace('role = "T1POST"', 'role = "T1"')))
    with pytest.raises(InputError, match="not valid TOML"):
        load_scenario(_write(tmp_path, "name = "))
