"""Role inference from acquisition physics.

Settings in the table are typical clinical protocols at 1.5 T / 3 T (common practice); the
inversion times follow TI_null = ln 2 * T1 with T1(fat) ~260-380 ms and T1(CSF) ~4,000 ms (from
memory).
"""

from __future__ import annotations

from pathlib import Path

import pytest

from sigreport.errors import InputError
from sigreport.ingest import infer_role, load_role_bands
from sigreport.model import Acquisition, Role


def acq(**kw) -> Acquisition:
    for key in ("scanning_sequence", "sequence_variant", "scan_options", "image_type"):
        if key in kw and isinstance(kw[key], str):
            kw[key] = tuple(kw[key].split("\\"))
    return Acquisition(**kw)


TYPICAL = [
    # (role, acquisition) - common practice protocols
    (Role.T1, acq(repetition_time_ms=500, echo_time_ms=12, scanning_sequence="SE")),
    (Role.T2, acq(repetition_time_ms=4000, echo_time_ms=100, scanning_sequence="SE")),
    (Role.PD, acq(repetition_time_ms=3000, echo_time_ms=30, scanning_sequence="SE")),
    (Role.FLAIR, acq(repetition_time_ms=9000, echo_time_ms=120, inversion_time_ms=2500,
                     scanning_sequence="SE\\IR")),
    (Role.STIR, acq(repetition_time_ms=4500, echo_time_ms=40, inversion_time_ms=160,
                    scanning_sequence="SE\\IR")),
    (Role.STIR, acq(repetition_time_ms=5000, echo_time_ms=50, inversion_time_ms=230,
                    scanning_sequence="IR", magnetic_field_strength_t=3.0)),
    (Role.T1FS, acq(repetition_time_ms=600, echo_time_ms=10, scanning_sequence="SE",
                    scan_options="FS")),
    (Role.T2FS, acq(repetition_time_ms=3500, echo_time_ms=85, scanning_sequence="SE",
                    scan_options="SAT_FAT\\FC")),
    (Role.T1POST, acq(repetition_time_ms=550, echo_time_ms=11, scanning_sequence="SE",
                      contrast_agent="Gadobutrol")),
    (Role.T1POSTFS, acq(repetition_time_ms=550, echo_time_ms=11, scanning_sequence="SE",
                        scan_options="FS", contrast_agent="GADAVIST 7.5ML")),
    # MPRAGE-like 3D GRE with a T1 inversion preparation -> T1
    (Role.T1, acq(repetition_time_ms=2300, echo_time_ms=2.3, inversion_time_ms=900,
                  flip_angle_deg=8, scanning_sequence="GR\\IR", sequence_variant="SK\\SP\\MP",
                  mr_acquisition_type="3D")),
    # T1 spoiled 3D GRE (short TR/TE, larger flip), fat-saturated, post contrast
    (Role.T1POSTFS, acq(repetition_time_ms=4.5, echo_time_ms=2.0, flip_angle_deg=12,
                        scanning_sequence="GR", sequence_variant="SP", scan_options="FS",
                        contrast_agent="gadoterate", mr_acquisition_type="3D")),
    # 2D FLASH T1
    (Role.T1, acq(repetition_time_ms=250, echo_time_ms=2.5, flip_angle_deg=70,
                  scanning_sequence="GR", sequence_variant="SP")),
    # T2* GRE: long TE, small flip
    (Role.T2STAR, acq(repetition_time_ms=700, echo_time_ms=20, flip_angle_deg=20,
                      scanning_sequence="GR", sequence_variant="SP")),
    (Role.DWI, acq(repetition_time_ms=5000, echo_time_ms=80, scanning_sequence="EP",
                   b_value=1000, image_type="ORIGINAL\\PRIMARY\\DIFFUSION\\NONE")),
    (Role.DWI, acq(scanning_sequence="EP", image_type="DERIVED\\PRIMARY\\DIFFUSION\\TRACEW",
                   b_value=1000)),
    (Role.ADC, acq(scanning_sequence="EP", image_type="DERIVED\\PRIMARY\\DIFFUSION\\ADC")),
]  # fmt: skip


@pytest.mark.parametrize(("expected", "acquisition"), TYPICAL)
def test_typical_protocols(expected: Role, acquisition: Acquisition) -> None:
    role, reason, confidence = infer_role(acquisition, "SERIES 4")  # useless description
    assert role == expected, reason
    assert 0.5 <= confidence <= 1.0
    assert reason and "\n" not in reason


def test_reason_names_the_values() -> None:
    role, reason, _ = infer_role(
        acq(repetition_time_ms=4000, echo_time_ms=100, scanning_sequence="SE")
    )
    assert role == Role.T2
    assert reason == "spin echo, TR 4000 ms, TE 100 ms, no inversion, no fat saturation"


AMBIGUOUS = [
    # TR/TE between the PD and T2 bands, no description to break the tie
    acq(repetition_time_ms=3000, echo_time_ms=52, scanning_sequence="SE"),
    # TR between T1 and long-TR bands, short TE: T1 or PD
    acq(repetition_time_ms=1400, echo_time_ms=15, scanning_sequence="SE"),
    # TI between fat nulling and T1 preparation bands
    acq(repetition_time_ms=3000, echo_time_ms=40, inversion_time_ms=360, scanning_sequence="IR"),
    # GRE TE between T1 and T2* bands
    acq(repetition_time_ms=30, echo_time_ms=12, flip_angle_deg=30, scanning_sequence="GR"),
    # No TE / TR in the header
    acq(scanning_sequence="SE"),
    # b = 0 reference of a diffusion series
    acq(repetition_time_ms=5000, echo_time_ms=80, scanning_sequence="EP", b_value=0),
    # echo planar without diffusion (perfusion)
    acq(repetition_time_ms=1500, echo_time_ms=30, scanning_sequence="EP"),
    # balanced SSFP
    acq(repetition_time_ms=4, echo_time_ms=2, flip_angle_deg=60, scanning_sequence="GR",
        sequence_variant="SS"),
    # long TI with a short TE
    acq(repetition_time_ms=9000, echo_time_ms=10, inversion_time_ms=2500, scanning_sequence="IR"),
    # derived image that is not ADC (MPR), localizer, phase image
    acq(repetition_time_ms=500, echo_time_ms=12, scanning_sequence="SE",
        image_type="DERIVED\\SECONDARY\\MPR"),
    acq(repetition_time_ms=8, echo_time_ms=3, flip_angle_deg=20, scanning_sequence="GR",
        image_type="ORIGINAL\\PRIMARY\\LOCALIZER"),
    acq(repetition_time_ms=700, echo_time_ms=20, flip_angle_deg=20, scanning_sequence="GR",
        image_type="ORIGINAL\\PRIMARY\\P\\ND"),
    # proton density with fat saturation has no role
    acq(repetition_time_ms=3000, echo_time_ms=30, scanning_sequence="SE", scan_options="FS"),
]  # fmt: skip


@pytest.mark.parametrize("acquisition", AMBIGUOUS)
def test_ambiguous_or_unsupported_is_unknown_with_a_reason(acquisition: Acquisition) -> None:
    role, reason, _ = infer_role(acquisition, "SERIES 4")
    assert role == Role.UNKNOWN
    assert len(reason) > 10


def test_description_breaks_a_physics_tie_only() -> None:
    between = acq(repetition_time_ms=3000, echo_time_ms=52, scanning_sequence="SE")
    role, reason, confidence = infer_role(between, "AX T2 TSE")
    assert role == Role.T2
    assert "by description" in reason
    assert confidence < 0.5
    # A description never overrides clear physics: this is T1 whatever it says.
    t1 = acq(repetition_time_ms=500, echo_time_ms=12, scanning_sequence="SE")
    assert infer_role(t1, "AX T2 FLAIR")[0] == Role.T1


def test_localizer_and_screen_capture_descriptions() -> None:
    t1 = acq(repetition_time_ms=500, echo_time_ms=12, scanning_sequence="SE")
    assert infer_role(t1, "3-plane localizer")[0] == Role.UNKNOWN
    assert infer_role(t1, "Screen Capture")[0] == Role.UNKNOWN


def test_description_says_post_when_header_has_no_agent() -> None:
    t1 = acq(repetition_time_ms=500, echo_time_ms=12, scanning_sequence="SE")
    role, reason, confidence = infer_role(t1, "AX T1 POST")
    assert role == Role.T1POST
    assert "description says post-contrast" in reason
    assert confidence < 0.5


def test_site_bands_replace_the_bundled_ones(tmp_path: Path) -> None:
    from sigreport.lexicon import bundled_dir

    text = (bundled_dir() / "roles.toml").read_text()
    # A site whose STIR band stops at 150 ms: TI 160 ms no longer nulls fat there.
    (tmp_path / "roles.toml").write_text(
        text.replace("stir_ti_ms = [80.0, 320.0]", "stir_ti_ms = [80.0, 150.0]")
    )
    stir = acq(repetition_time_ms=4500, echo_time_ms=40, inversion_time_ms=160,
               scanning_sequence="SE\\IR")  # fmt: skip
    assert infer_role(stir)[0] == Role.STIR
    assert infer_role(stir, site_lexicon=tmp_path)[0] == Role.UNKNOWN


def test_unknown_key_in_site_file_is_an_input_error(tmp_path: Path) -> None:
    from sigreport.lexicon import bundled_dir

    text = (bundled_dir() / "roles.toml").read_text()
    (tmp_path / "roles.toml").write_text(text.replace("dwi_min_b =", "dwi_minimum_b ="))
    with pytest.raises(
        InputError, match=r"roles.toml \[diffusion\]: unknown key\(s\) dwi_minimum_b"
    ):
        load_role_bands(tmp_path)


def test_malformed_band_is_an_input_error(tmp_path: Path) -> None:
    from sigreport.lexicon import bundled_dir

    text = (bundled_dir() / "roles.toml").read_text()
    (tmp_path / "roles.toml").write_text(
        text.replace("flair_ti_ms = [1300.0, 3500.0]", "flair_ti_ms = [3500.0, 1300.0]")
    )
    with pytest.raises(InputError, match=r"\[inversion\] flair_ti_ms: expected \[low, high\]"):
        load_role_bands(tmp_path)


# Confidence by how the role was decided (lexicon roles.toml [confidence], docs/ingestion.md):
# each rule gives its own value, so the values order the decisions from sure to doubtful.
CONFIDENCE_RULES = [
    # (rule, acquisition, description, expected role, lexicon key)
    ("standard attribute", acq(repetition_time_ms=4000, echo_time_ms=100, scanning_sequence="SE",
                               acquisition_contrast="T2"), "", Role.T2, "stated"),
    ("ImageType names it", acq(scanning_sequence="EP",
                               image_type="DERIVED\\PRIMARY\\DIFFUSION\\ADC"), "", Role.ADC,
     "stated"),
    ("physics well inside", acq(repetition_time_ms=4000, echo_time_ms=100,
                                scanning_sequence="SE"), "", Role.T2, "clean"),
    # TR 950 ms is within 10 % of the 1000 ms upper edge of the spin-echo T1 band.
    ("near a band edge", acq(repetition_time_ms=950, echo_time_ms=12, scanning_sequence="SE"),
     "", Role.T1, "near_edge"),
    ("a value missing", acq(repetition_time_ms=250, echo_time_ms=2.5, scanning_sequence="GR"),
     "", Role.T1, "partial"),
    # TR 1400 ms, TE 15 ms: between the short and long TR bands, T1 or PD by physics.
    ("description tie-break", acq(repetition_time_ms=1400, echo_time_ms=15,
                                  scanning_sequence="SE"), "AX T1 SE", Role.T1, "tie_break"),
]  # fmt: skip


@pytest.mark.parametrize(
    ("rule", "acquisition", "description", "expected", "key"),
    CONFIDENCE_RULES,
    ids=[r[0] for r in CONFIDENCE_RULES],
)
def test_confidence_depends_on_the_rule_that_decided(rule, acquisition, description, expected, key):
    bands = load_role_bands()
    role, reason, confidence = infer_role(acquisition, description)
    assert role == expected, reason
    assert confidence == bands.number("confidence", key)
    if key == "near_edge":
        assert "TR 950 ms near the band edge 1000 ms" in reason


def test_confidence_values_are_ordered_from_sure_to_doubtful():
    bands = load_role_bands()
    keys = ["stated", "clean", "near_edge", "partial", "tie_break"]
    values = [bands.number("confidence", k) for k in keys]
    assert values == sorted(values, reverse=True) and len(set(values)) == len(values)


def test_unknown_has_no_confidence():
    for acquisition, description in [
        (acq(repetition_time_ms=4.0, echo_time_ms=2.0, scanning_sequence="GR",
             sequence_variant="SS"), ""),  # SSFP
        (acq(image_type="ORIGINAL\\PRIMARY\\LOCALIZER"), "scout"),
        (acq(repetition_time_ms=1400, echo_time_ms=15, scanning_sequence="SE"), "series 4"),
    ]:  # fmt: skip
        role, reason, confidence = infer_role(acquisition, description)
        assert role == Role.UNKNOWN and confidence is None, reason
