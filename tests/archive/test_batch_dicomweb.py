"""``sigreport batch`` with cases read from a real archive (Orthanc with its DICOMweb plugin,
conftest.py): two synthetic studies are uploaded through Orthanc's own REST API; a mixed
worklist (folders and the archive, one wrong study UID) and a worklist of two archive cases
with ``--push`` run on a local Dask cluster. Orthanc's HTTP log is the witness of what was
fetched, its storage of what was pushed.
"""

from __future__ import annotations

import csv
import io
import json
import tempfile
from pathlib import Path

import pydicom
import pytest
import requests
from typer.testing import CliRunner

from sigreport.batch import run_case
from sigreport.batch.worklist import CaseEntry
from sigreport.cli import app
from sigreport.ingest import index_study
from sigreport.synth import generate_study

SCENARIO = Path(__file__).parent / "data" / "archive.toml"
WRONG_UID = "1.2.826.0.1.3680043.8.498.424242"
runner = CliRunner()
pytestmark = [pytest.mark.orthanc, pytest.mark.slow]  # two batch runs of a few cases (~30 s)


def _upload(orthanc, folder: Path) -> str:
    for path in sorted(folder.rglob("*.dcm")):
        response = requests.post(
            f"{orthanc.rest}/instances",
            data=path.read_bytes(),
            auth=(orthanc.user, orthanc.password),
            timeout=30,
        )
        response.raise_for_status()
    return str(index_study(folder).study.study_instance_uid)


@pytest.fixture(scope="module")
def studies(orthanc, tmp_path_factory):
    """Two studies of the archive scenario (T1, T1FS, T2 and a localizer the report does not
    need), other seeds than the single-study tests, on disk and in the archive."""
    root = tmp_path_factory.mktemp("batch-archive")
    made = {
        "a": generate_study(SCENARIO, root / "a", seed=21),
        "b": generate_study(SCENARIO, root / "b", seed=22, motion=False),
    }
    uids = {name: _upload(orthanc, study.study_dir) for name, study in made.items()}
    assert uids["a"] != uids["b"]
    return root, made, uids


def _rows(out: Path) -> dict[str, dict[str, str]]:
    with (out / "summary.csv").open(newline="", encoding="utf-8") as handle:
        return {row["id"]: row for row in csv.DictReader(handle)}


def _findings(out: Path, case_id: str) -> dict:
    findings = json.loads((out / case_id / "findings.json").read_text(encoding="utf-8"))
    findings.pop("generated")  # the time of the run
    return findings


def _measured(findings: dict) -> set[str]:
    return {s["series_instance_uid"] for s in findings["series"] if s.get("measured")}


def _run_batch(orthanc, root: Path, name: str, text: str, *extra: str):
    """``sigreport batch`` on a worklist, with the archive's credentials in the environment
    only (the local workers inherit it) and the temporary folders under a folder of our own."""
    worklist = root / f"{name}.toml"
    worklist.write_text(text)
    temp_root = root / f"{name}-tmp"
    temp_root.mkdir()
    out = root / f"{name}-out"
    with pytest.MonkeyPatch.context() as mp:
        mp.setenv("SIGREPORT_DICOMWEB_USER", orthanc.user)
        mp.setenv("SIGREPORT_DICOMWEB_PASSWORD", orthanc.password)
        mp.delenv("SIGREPORT_DICOMWEB_TOKEN_FILE", raising=False)
        mp.setattr(tempfile, "tempdir", str(temp_root))
        mark = len(orthanc.log_requests())
        result = runner.invoke(
            app, ["batch", str(worklist), "--out", str(out), "--workers", "2", *extra]
        )
    return result, out, mark, temp_root


def _case(case_id: str, **fields: str) -> str:
    lines = ["[[case]]", f'id = "{case_id}"'] + [
        f"{k} = {json.dumps(v)}" for k, v in fields.items()
    ]
    return "\n".join(lines) + "\n"


@pytest.fixture(scope="module")
def mixed(orthanc, studies):
    """Folders and the archive in one worklist: A and B from their folders, B again from the
    archive (by the command's --dicomweb), and a study UID the archive does not hold."""
    root, made, uids = studies
    text = (
        'title = "Mixed board"\n'
        + _case("folder-a", study=str(made["a"].study_dir), case=str(made["a"].case_path))
        + _case("folder-b", study=str(made["b"].study_dir), case=str(made["b"].case_path))
        + _case("web-b", study_uid=uids["b"], case=str(made["b"].case_path))
        + _case("wrong", study_uid=WRONG_UID, case=str(made["a"].case_path))
    )
    return _run_batch(orthanc, root, "mixed", text, "--dicomweb", orthanc.url)


@pytest.fixture(scope="module")
def pushed(orthanc, studies, mixed):
    """Two archive cases, each naming the service itself, with --push (after ``mixed``, so
    that the pushed SRs are not part of the studies that run read)."""
    root, made, uids = studies
    text = _case(
        "web-a", dicomweb=orthanc.url, study_uid=uids["a"], case=str(made["a"].case_path)
    ) + _case("web-b", dicomweb=orthanc.url, study_uid=uids["b"], case=str(made["b"].case_path))
    return _run_batch(orthanc, root, "pushed", text, "--push")


def test_a_mixed_worklist_runs_folder_and_archive_cases_and_a_wrong_uid_fails_alone(
    orthanc, studies, mixed
):
    _root, _made, uids = studies
    result, out, mark, temp_root = mixed
    assert result.exit_code == 3, result.output  # some case failed (docs/usage.md, batch)
    rows = _rows(out)
    assert {k: r["status"] for k, r in rows.items()} == {
        "folder-a": "done",
        "folder-b": "done",
        "web-b": "done",
        "wrong": "failed",
    }
    reason = f"{orthanc.url}: no study {WRONG_UID} (QIDO-RS found no series)"
    assert rows["wrong"]["reason"] == reason
    assert reason in " ".join(result.output.split())
    assert reason in (out / "index.html").read_text(encoding="utf-8")
    assert not (out / "wrong").exists()
    # The archive's copy of B gives the findings of B's folder.
    assert _findings(out, "web-b") == _findings(out, "folder-b")
    # Only the series B's report measures were fetched; nothing of A (read from its folder),
    # nothing for the wrong UID.
    measured = _measured(_findings(out, "web-b"))
    assert len(measured) == 3  # T1, T1FS, T2: not the localizer
    assert sorted(orthanc.retrieved_series(uids["b"], mark)) == sorted(measured)
    assert orthanc.retrieved_series(uids["a"], mark) == []
    assert orthanc.retrieved_series(WRONG_UID, mark) == []
    # No case's private folder is left, nor the batch's.
    assert not [p for p in temp_root.rglob("sigreport-*")]
    assert rows["web-b"]["pushed"] == ""  # no --push


def test_archive_cases_with_push_equal_folder_runs_fetch_only_needed_series_and_store_the_srs(
    orthanc, studies, mixed, pushed
):
    _root, _made, uids = studies
    result, out, mark, temp_root = pushed
    assert result.exit_code == 0, result.output
    _mixed_result, mixed_out, _mark, _tmp = mixed
    rows = _rows(out)
    assert [r["status"] for r in rows.values()] == ["done", "done"]
    for name in ("a", "b"):
        case_id = f"web-{name}"
        findings = _findings(out, case_id)
        assert findings == _findings(mixed_out, f"folder-{name}"), case_id
        assert findings["lesions"]
        measured = _measured(findings)
        assert len(measured) == 3
        assert sorted(orthanc.retrieved_series(uids[name], mark)) == sorted(measured), case_id

        # The SR is in the archive, byte for byte, and its answer is on the sheet.
        sr_bytes = (out / case_id / "sr.dcm").read_bytes()
        sr = pydicom.dcmread(io.BytesIO(sr_bytes))
        assert sr.StudyInstanceUID == uids[name]
        assert rows[case_id]["pushed"].startswith(f"stored SOP instance {sr.SOPInstanceUID}")
        assert f"archive {case_id}: stored SOP instance {sr.SOPInstanceUID}" in " ".join(
            result.output.split()
        )
        found = requests.post(
            f"{orthanc.rest}/tools/lookup",
            data=str(sr.SOPInstanceUID),
            auth=(orthanc.user, orthanc.password),
            timeout=30,
        ).json()
        assert [item["Type"] for item in found] == ["Instance"]
        assert orthanc.rest_get(f"/instances/{found[0]['ID']}/file").content == sr_bytes
    assert "SR stored in the archive" in (out / "index.html").read_text(encoding="utf-8")
    assert not [p for p in temp_root.rglob("sigreport-*")]


def test_the_password_is_nowhere_in_what_the_batch_wrote_or_printed(orthanc, mixed, pushed):
    secret = orthanc.password.encode()
    for result, out, _mark, _tmp in (mixed, pushed):
        assert orthanc.password not in result.output
        for path in out.rglob("*"):
            if path.is_file():
                assert secret not in path.read_bytes(), path


@pytest.mark.parametrize(
    ("password", "service", "expected"),
    [
        ("wrong", "/dicom-web", "the archive refused the credentials (HTTP 401 Unauthorized;"),
        (None, "/no-such-service", "not found (HTTP 404); check the URL and the UID"),
    ],
)
def test_a_refused_fetch_fails_its_case_with_the_archives_message(
    orthanc, studies, tmp_path, monkeypatch, password, service, expected
):
    """One case as a worker runs it (in this process): the failure is its summary, never an
    exception, and its private folder is gone."""
    _root, made, uids = studies
    monkeypatch.setenv("SIGREPORT_DICOMWEB_USER", orthanc.user)
    monkeypatch.setenv("SIGREPORT_DICOMWEB_PASSWORD", password or orthanc.password)
    url = f"{orthanc.rest}{service}"
    entry = CaseEntry(
        id="one", study=None, case=made["a"].case_path, dicomweb=url, study_uid=uids["a"]
    )
    parent = tmp_path / "tmp"
    parent.mkdir()
    summary = run_case(entry, str(tmp_path / "out"), temp_parent=str(parent))
    assert summary["status"] == "failed"
    assert summary["reason"].startswith(f"{url}: ") and expected in summary["reason"]
    assert "traceback" not in summary
    assert list(parent.iterdir()) == []
    assert not (tmp_path / "out" / "one").exists()


def test_an_unreachable_archive_fails_its_case(studies, tmp_path, monkeypatch):
    _root, made, uids = studies
    monkeypatch.delenv("SIGREPORT_DICOMWEB_USER", raising=False)
    monkeypatch.delenv("SIGREPORT_DICOMWEB_PASSWORD", raising=False)
    # Port 9 (discard) is closed on the test machine: nothing listens there.
    entry = CaseEntry(
        id="one",
        study=None,
        case=made["a"].case_path,
        dicomweb="http://127.0.0.1:9/dicom-web",
        study_uid=uids["a"],
    )
    summary = run_case(entry, str(tmp_path / "out"))
    assert summary["status"] == "failed"
    assert summary["reason"].startswith("cannot reach the archive at http://127.0.0.1:9/dicom-web")


def test_ctrl_c_leaves_no_private_folder_and_no_partial_case(
    orthanc, studies, tmp_path, monkeypatch
):
    """Stopped after the first case: the cancelled cases' folders and the batch's private
    folder are gone, as is every half-written case folder."""
    from sigreport.batch import Worklist, run_batch

    _root, made, uids = studies
    monkeypatch.setenv("SIGREPORT_DICOMWEB_USER", orthanc.user)
    monkeypatch.setenv("SIGREPORT_DICOMWEB_PASSWORD", orthanc.password)
    temp_root = tmp_path / "tmp"
    temp_root.mkdir()
    monkeypatch.setattr(tempfile, "tempdir", str(temp_root))
    cases = tuple(
        CaseEntry(
            id=f"web-{k}",
            study=None,
            case=made[name].case_path,
            dicomweb=orthanc.url,
            study_uid=uids[name],
        )
        for k, name in enumerate(("a", "b", "a"))
    )
    worklist = Worklist(path=tmp_path / "worklist.toml", title=None, cases=cases)

    def interrupt(summary: dict) -> None:
        raise KeyboardInterrupt  # as if Ctrl-C arrived while waiting for the next case

    result = run_batch(worklist, tmp_path / "out", workers=1, on_result=interrupt)
    assert result.interrupted
    assert [c["status"] for c in result.cases].count("cancelled") == 2
    assert not [p for p in temp_root.rglob("sigreport-*")]
    for path in (tmp_path / "out").iterdir():
        assert not path.name.startswith("."), path
        if path.is_dir():
            assert (path / "findings.json").is_file() and (path / "sr.dcm").is_file()
