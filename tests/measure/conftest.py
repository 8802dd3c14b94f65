"""Builders for hand-made measurements: the characterization tests do not need the other
stages, so they build MeasuredStudy objects directly from medians (or from small volumes pushed
through measure_roi)."""

from __future__ import annotations

from pathlib import Path

import pytest

from sigreport.measure import load_rules

from builders.measured import Build


@pytest.fixture(scope="session")
def build() -> type[Build]:
    return Build


@pytest.fixture(scope="session")
def rules():
    # The bundled lexicon, whatever a developer's $SIGREPORT_LEXICON says.
    with pytest.MonkeyPatch.context() as mp:
        mp.delenv("SIGREPORT_LEXICON", raising=False)
        return load_rules(None)


@pytest.fixture
def bundled_lexicon() -> Path:
    from sigreport import lexicon

    return lexicon.bundled_dir()


@pytest.fixture(autouse=True)
def _no_site_lexicon(monkeypatch):
    # A developer's $SIGREPORT_LEXICON must not change what these tests check.
    monkeypatch.delenv("SIGREPORT_LEXICON", raising=False)
