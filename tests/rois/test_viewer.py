"""Viewer positions (``at``): converted on the series' own geometry (DICOM PS3.3
C.7.6.2.1.1), then carried through that series' alignment into the anchor's space."""

from __future__ import annotations

import numpy as np
import pytest

from sigreport.errors import InputError
from sigreport.ingest import load_stack
from sigreport.model import Alignment, Role, ViewerPosition
from sigreport.rois.viewer import carry_to_anchor, find_image, viewer_point_mm
from sigreport.synth.study import Motion


def _motion(truth, role: Role):
    m = truth["motion"][role.value]
    return Motion(
        tuple(m["translation_mm"]), m["rotation_deg"], tuple(m["axis"]), tuple(m["center_mm"])
    )


def _position_of(stack, image, point_mm) -> ViewerPosition:
    """The viewer position (nearest pixel and image) of a patient point on a stack."""
    index = np.asarray(image.TransformPhysicalPointToContinuousIndex(tuple(point_mm)))
    col, row, k = np.round(index).astype(int)
    return ViewerPosition(
        series=stack.series_number, image=stack.instances[k].instance_number, row=row, column=col
    )


@pytest.mark.parametrize("role", [Role.T2, Role.STIR, Role.T1FS, Role.T1POSTFS])
def test_point_matches_simpleitk_on_the_series_geometry(neuro, role):
    """SimpleITK's reader places the same pixel centre (an oracle outside the project)."""
    stack = neuro.stack(role)
    image = load_stack(stack)
    for k in (0, len(stack.instances) // 2, len(stack.instances) - 1):
        at = ViewerPosition(
            stack.series_number, stack.instances[k].instance_number, row=17, column=40.5
        )
        point, found = viewer_point_mm(neuro.index, at)
        assert found.key == stack.key
        want = image.TransformContinuousIndexToPhysicalPoint((40.5, 17.0, float(k)))
        np.testing.assert_allclose(point, want, atol=1e-3)


def test_a_point_seen_on_a_moved_series_comes_back_to_the_anchor(neuro):
    """The head moved between the anchor and T2 by a known rigid motion (truth.json: anchor
    point p appears at R (p - c) + c + t on T2). A reader pointing at the lesion on T2 must
    land on the lesion in the anchor's space: through the inverse of that motion."""
    role = Role.T2
    motion = _motion(neuro.truth, role)
    assert motion.rotation_deg > 0.5 and np.linalg.norm(motion.translation_mm) > 1.0
    transform = motion.transform()
    stack = neuro.stack(role)
    image = load_stack(stack)
    lesion_anchor = np.array([24.0, -22.0, 10.0])  # L2's centre in the anchor (neuro.toml)
    on_series = np.asarray(transform.TransformPoint(tuple(lesion_anchor)))
    at = _position_of(stack, image, on_series)
    point, _ = viewer_point_mm(neuro.index, at)
    got = carry_to_anchor(point, Alignment("rigid", transform=transform))
    want = np.asarray(transform.GetInverse().TransformPoint(tuple(point)))
    np.testing.assert_allclose(got, want, atol=1e-9)
    # Within the rounding of the viewer position (half a pixel, half a slice) of the lesion.
    half = 0.5 * np.linalg.norm(stack.spacing_mm) + 1e-6
    assert np.linalg.norm(got - lesion_anchor) <= half
    # The other direction would be off by about twice the motion: the test can tell them apart.
    wrong = np.asarray(transform.TransformPoint(tuple(point)))
    assert np.linalg.norm(wrong - got) > 1.0


def test_identity_alignment_keeps_the_point(neuro):
    point = np.array([1.0, 2.0, 3.0])
    assert np.array_equal(carry_to_anchor(point, Alignment("identity")), point)


def test_missing_series_image_frame_and_pixel_are_named(neuro):
    stack = neuro.stack(Role.T2)
    n = stack.series_number
    with pytest.raises(InputError, match=r"at: no series 99 in the study \(series: 1-8\)"):
        find_image(neuro.index, ViewerPosition(99, 1, 0, 0))
    last = max(i.instance_number for i in stack.instances)
    with pytest.raises(
        InputError, match=rf"at: series {n} has no image {last + 1} \(images: 1-{last}\)"
    ):
        find_image(neuro.index, ViewerPosition(n, last + 1, 0, 0))
    with pytest.raises(InputError, match="single-frame image; frame 2 does not exist"):
        find_image(neuro.index, ViewerPosition(n, 1, 0, 0, frame=2))
    rows = stack.size[1]
    with pytest.raises(InputError, match=rf"row {rows}, column 0 is outside image 1 of series {n}"):
        viewer_point_mm(neuro.index, ViewerPosition(n, 1, rows, 0))


def test_a_frame_of_a_multi_frame_file(tmp_path_factory):
    """Enhanced MR: one file per series; `frame` names the image (PS3.3 C.7.6.16 per-frame
    plane position); SimpleITK places the same pixel centre."""
    from sigreport.ingest import index_study
    from sigreport.synth import generate_study

    study = generate_study(
        "orbit", tmp_path_factory.mktemp("enh") / "case", enhanced=True, motion=False
    )
    index = index_study(study.study_dir)
    stack = next(s for s in index.stacks if s.role is Role.STIR)  # coronal
    image = load_stack(stack)
    k = len(stack.instances) // 2
    inst = stack.instances[k]
    assert inst.frame is not None
    point, _ = viewer_point_mm(
        index, ViewerPosition(stack.series_number, inst.instance_number, 10, 20, frame=inst.frame)
    )
    want = image.TransformContinuousIndexToPhysicalPoint((20.0, 10.0, float(k)))
    np.testing.assert_allclose(point, want, atol=1e-3)
    with pytest.raises(InputError, match="is a multi-frame file; give frame = n"):
        find_image(index, ViewerPosition(stack.series_number, inst.instance_number, 0, 0))
    with pytest.raises(InputError, match="has no frame 999"):
        find_image(
            index, ViewerPosition(stack.series_number, inst.instance_number, 0, 0, frame=999)
        )


def test_an_unmeasured_series_named_by_at_gets_an_alignment(neuro):
    """The localizer (series 1, never measured) in the anchor's frame of reference, with
    registration off: the scanner's frame of reference is trusted, as for measured series."""
    from sigreport.lexicon_tables import load_lexicon
    from sigreport.model import AlignedStudy, ReportPlan
    from sigreport.pipeline import _alignments_by_key

    anchor = neuro.stack(Role.T1POSTFS)
    localizer = next(s for s in neuro.index.stacks if s.series_number == 1)
    assert localizer.role is Role.UNKNOWN
    plan = ReportPlan(
        case=None,  # type: ignore[arg-type]
        lexicon=load_lexicon(),
        study_dir=neuro.index.study_dir,
        index=neuro.index,
        measured={Role.T1POSTFS: anchor},
        anchor_role=Role.T1POSTFS,
        anchor_reason="test",
        register=False,
        regions=(),
        viewer_keys={"L1": localizer.key},
    )
    aligned = AlignedStudy(alignments={Role.T1POSTFS: Alignment("identity")})
    by_key = _alignments_by_key(plan, aligned, None)  # type: ignore[arg-type]
    assert by_key[localizer.key].method == "frame-of-reference"
    assert by_key[anchor.key].method == "identity"
