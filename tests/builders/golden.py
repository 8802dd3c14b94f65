"""Reference outputs of the main job on the bundled synthetic scenarios, for checking that a
change of the code's structure leaves every output as it was.

``run_scenario`` runs one scenario the way ``sigreport demo`` and the end-to-end tests do and
returns its outputs normalized for comparison: the run's timestamp (``generated``) and the
temporary folder are replaced by fixed markers, and each PNG embedded in report.html is replaced
by the SHA-256 of its decoded pixels (so that a different zlib or Pillow build, which may
compress the same pixels to other bytes, does not count as a change). Nothing else is touched.

Regenerate the stored copies (only when an output is meant to change, and say so in the
commit)::

    .venv/bin/python tests/builders/golden.py
"""

from __future__ import annotations

import base64
import hashlib
import io
import json
import re
import sys
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from PIL import Image

from sigreport.pipeline import run_report
from sigreport.synth import generate_study

#: Where the stored outputs live (one folder per scenario).
GOLDEN_DIR = Path(__file__).resolve().parent.parent / "pipeline" / "golden"
#: Files compared byte for byte (after normalization); findings.json is compared value for value.
TEXT_FILES = ("table.csv", "report.md", "report.txt", "report.html")
GENERATED = "<generated>"
TMP = "<tmp>"


@dataclass(frozen=True)
class Scenario:
    """A bundled scenario and the options it runs with."""

    scenario: str
    generate: dict[str, Any] = field(default_factory=dict)
    register: bool | None = None


#: The demo's scenarios (``sigreport demo``, default seed and options) and the end-to-end
#: tests' variants.
SCENARIOS: dict[str, Scenario] = {
    "demo-neuro": Scenario("neuro"),
    "demo-orbit": Scenario("orbit"),
    "neuro-fat-sat-failed": Scenario(
        "neuro", {"fat_sat_failed": True, "motion": False}, register=False
    ),
    "neuro-enhanced": Scenario(
        "neuro", {"enhanced": True, "useless_descriptions": True, "motion": False}, register=False
    ),
}

_PNG = re.compile(r"data:image/png;base64,([A-Za-z0-9+/=]+)")


def _pixels_digest(match: re.Match[str]) -> str:
    image = Image.open(io.BytesIO(base64.b64decode(match.group(1))))
    array = np.asarray(image.convert("RGB"))
    digest = hashlib.sha256(repr(array.shape).encode() + array.tobytes()).hexdigest()
    return f"png-pixels:{digest}"


def normalize_text(text: str, *, generated: str, tmp: Path) -> str:
    """``text`` with the run's timestamp, its temporary folder and embedded PNGs replaced."""
    text = text.replace(generated, GENERATED).replace(str(tmp), TMP)
    return _PNG.sub(_pixels_digest, text)


def run_scenario(name: str, tmp: Path) -> dict[str, Any]:
    """Run scenario ``name`` in ``tmp``; return ``{"findings.json": dict, <file>: text}``."""
    spec = SCENARIOS[name]
    study = generate_study(spec.scenario, tmp / "case", **spec.generate)
    out = tmp / "report"
    run_report(study.case_path, out, study_dir=study.study_dir, register=spec.register)
    findings = json.loads((out / "findings.json").read_text(encoding="utf-8"))
    generated = findings.pop("generated")
    outputs: dict[str, Any] = {"findings.json": findings}
    for file in TEXT_FILES:
        text = (out / file).read_bytes().decode("utf-8")
        outputs[file] = normalize_text(text, generated=generated, tmp=tmp)
    return outputs


def digest(text: str) -> str:
    """SHA-256 of ``text`` encoded as UTF-8."""
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def stored(name: str) -> tuple[dict[str, Any], dict[str, str]]:
    """The stored findings of scenario ``name`` and the digests of its normalized files."""
    folder = GOLDEN_DIR / name
    findings = json.loads((folder / "findings.json").read_text(encoding="utf-8"))
    digests = json.loads((folder / "digests.json").read_text(encoding="utf-8"))
    return findings, digests


def store(name: str, outputs: dict[str, Any]) -> None:
    """Keep findings.json whole (to compare value for value, with a readable difference) and the
    SHA-256 of each normalized file (to compare byte for byte without storing the pages)."""
    folder = GOLDEN_DIR / name
    folder.mkdir(parents=True, exist_ok=True)
    # json writes each float as the shortest repr that reads back to the same double.
    (folder / "findings.json").write_text(
        json.dumps(outputs["findings.json"], indent=1, ensure_ascii=False) + "\n", encoding="utf-8"
    )
    digests = {file: digest(outputs[file]) for file in TEXT_FILES}
    (folder / "digests.json").write_text(json.dumps(digests, indent=1) + "\n", encoding="utf-8")


if __name__ == "__main__":
    import tempfile

    for scenario in sys.argv[1:] or SCENARIOS:
        with tempfile.TemporaryDirectory() as work:
            store(scenario, run_scenario(scenario, Path(work)))
        print(f"stored {scenario}")
