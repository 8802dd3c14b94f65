"""A tumour-board worklist of four tiny synthetic cases, built once per test session:

- ``growth``: a later study whose outlined tumour grew (radius 6.0 -> 7.0 mm) and started to
  enhance, with its prior study (growth_prior.toml, growth_now.toml);
- ``cyst`` and ``cyst-still``: the tiny scenario (tests/synth/data/tiny.toml), two seeds, the
  second without motion;
- ``broken``: the cyst's study with a case file that is not usable (an ROI without a radius).
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path

import pytest

from sigreport.synth import GeneratedStudy, generate_study

DATA = Path(__file__).parent / "data"
TINY = Path(__file__).parents[1] / "synth" / "data" / "tiny.toml"


@dataclass(frozen=True)
class Board:
    root: Path
    worklist: Path
    studies: dict[str, GeneratedStudy]  # growth, growth-prior, cyst, cyst-still
    ids: tuple[str, ...]  # worklist order

    def truth(self, name: str) -> dict:
        return json.loads(self.studies[name].truth_path.read_text())


def _toml_path(path: Path, base: Path) -> str:
    return json.dumps(str(path.relative_to(base)))


@pytest.fixture(scope="session")
def board(tmp_path_factory) -> Board:
    root = tmp_path_factory.mktemp("board")
    studies = {
        "growth-prior": generate_study(DATA / "growth_prior.toml", root / "growth-prior"),
        "growth": generate_study(DATA / "growth_now.toml", root / "growth"),
        "cyst": generate_study(TINY, root / "cyst"),
        "cyst-still": generate_study(TINY, root / "cyst-still", seed=5, motion=False),
    }
    broken = root / "broken.toml"
    text = studies["cyst"].case_path.read_text()
    # The first ROI loses its radius: the case file is unusable, the worklist is not.
    broken.write_text(text.replace("radius_mm = 5.5\n", "", 1))
    assert broken.read_text() != text
    cases = [
        ("growth", studies["growth"], studies["growth"].case_path, studies["growth-prior"]),
        ("cyst", studies["cyst"], studies["cyst"].case_path, None),
        ("broken", studies["cyst"], broken, None),
        ("cyst-still", studies["cyst-still"], studies["cyst-still"].case_path, None),
    ]
    lines = ['title = "Test board"']
    for case_id, study, case, prior in cases:
        lines += [
            "",
            "[[case]]",
            f'id = "{case_id}"',
            f"study = {_toml_path(study.study_dir, root)}",
            f"case = {_toml_path(case, root)}",
        ]
        if prior is not None:
            lines.append(f"prior_study = {_toml_path(prior.study_dir, root)}")
            lines.append(f"prior_case = {_toml_path(prior.case_path, root)}")
    worklist = root / "worklist.toml"
    worklist.write_text("\n".join(lines) + "\n")
    return Board(root, worklist, studies, tuple(c[0] for c in cases))
