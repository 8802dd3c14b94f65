"""One synthetic neuro study (with motion) shared by the ROI-form tests of this folder."""

from __future__ import annotations

import json
from dataclasses import dataclass
from typing import Any

import pytest

from sigreport.ingest import index_study
from sigreport.model import Role, StudyIndex
from sigreport.synth import GeneratedStudy, generate_study


@dataclass(frozen=True)
class Neuro:
    study: GeneratedStudy
    index: StudyIndex
    truth: dict[str, Any]

    def stack(self, role: Role):
        return next(s for s in self.index.stacks if s.role is role)


@pytest.fixture(scope="session")
def neuro(tmp_path_factory) -> Neuro:
    study = generate_study("neuro", tmp_path_factory.mktemp("neuro") / "case")
    return Neuro(study, index_study(study.study_dir), json.loads(study.truth_path.read_text()))
