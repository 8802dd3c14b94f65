"""Generated studies shared by the synth tests (each built once per test session); the helpers
live in ``builders.synthetic``, importable from any test folder."""

from __future__ import annotations

from types import SimpleNamespace

import pytest

from builders.synthetic import (
    TINY,
    Built,
    build,
    ratio,
    read_all,
    roi_box,
    roi_values,
    voxel_points,
)


@pytest.fixture(scope="session")
def neuro(tmp_path_factory) -> Built:
    return build(tmp_path_factory, "neuro", "neuro", motion=False)


@pytest.fixture(scope="session")
def orbit(tmp_path_factory) -> Built:
    return build(tmp_path_factory, "orbit", "orbit", motion=False)


@pytest.fixture(scope="session")
def orbit_enhanced(tmp_path_factory) -> Built:
    return build(tmp_path_factory, "orbit_enh", "orbit", motion=False, enhanced=True)


@pytest.fixture(scope="session")
def tiny(tmp_path_factory) -> Built:
    return build(tmp_path_factory, "tiny", TINY)


@pytest.fixture(scope="session")
def tools():
    """The helpers of ``builders.synthetic`` as one fixture (new tests import them directly)."""
    return SimpleNamespace(
        voxel_points=voxel_points,
        roi_values=roi_values,
        roi_box=roi_box,
        ratio=ratio,
        read_all=read_all,
        build=build,
        TINY=TINY,
    )
