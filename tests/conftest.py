"""Shared for every test folder: the header index cache never writes to the real home."""

from __future__ import annotations

from pathlib import Path

import pytest

from sigreport.ingest.cache import CACHE_ENV


@pytest.fixture(autouse=True)
def _header_cache_in_tmp(tmp_path_factory: pytest.TempPathFactory, monkeypatch) -> Path:
    folder = tmp_path_factory.mktemp("header-cache")
    monkeypatch.setenv(CACHE_ENV, str(folder))
    return folder
