"""scan / report with --dicomweb against a real archive (Orthanc with its DICOMweb plugin, see
conftest.py): the study is uploaded through Orthanc's own REST API, read back through DICOMweb
(QIDO-RS, WADO-RS) by the tool, and the server's HTTP log is the witness of what was fetched.
"""

from __future__ import annotations

import io
import json
import tempfile
from pathlib import Path

import numpy as np
import pydicom
import pytest
import requests
from pydicom.uid import generate_uid
from typer.testing import CliRunner

from sigreport.cli import app
from sigreport.ingest import index_study
from sigreport.pipeline import run_report
from sigreport.synth import generate_study

SCENARIO = Path(__file__).parent / "data" / "archive.toml"
runner = CliRunner()
pytestmark = pytest.mark.orthanc


def _coarse_copy(series_dir: Path, dest: Path, number: int) -> str:
    """A second copy of a series at half the in-plane resolution (every other row and column,
    PixelSpacing doubled; the first pixel's centre, hence ImagePositionPatient, is unchanged,
    PS3.3 C.7.6.2.1.1), with new UIDs and SeriesNumber ``number``."""
    dest.mkdir(parents=True)
    series_uid = generate_uid()
    for path in sorted(series_dir.glob("*.dcm")):
        ds = pydicom.dcmread(path)
        pixels = ds.pixel_array[::2, ::2].copy()
        ds.PixelData = pixels.tobytes()
        ds.Rows, ds.Columns = pixels.shape
        ds.PixelSpacing = [float(v) * 2 for v in ds.PixelSpacing]
        ds.SeriesInstanceUID = series_uid
        ds.SeriesNumber = number
        ds.SOPInstanceUID = generate_uid()
        ds.file_meta.MediaStorageSOPInstanceUID = ds.SOPInstanceUID
        ds.save_as(dest / path.name)
    return series_uid


@pytest.fixture(scope="module")
def uploaded(orthanc, tmp_path_factory):
    """The archive scenario (T1, T1FS, T2, a localizer) plus a coarse copy of the T2, on disk
    and in the archive."""
    root = tmp_path_factory.mktemp("archive-study")
    study = generate_study(SCENARIO, root / "case")
    index = index_study(study.study_dir)
    t2 = next(s for s in index.stacks if s.role.value == "T2")
    coarse_uid = _coarse_copy(t2.instances[0].path.parent, study.study_dir / "S05", number=5)
    files = sorted(study.study_dir.rglob("*.dcm"))
    for path in files:
        response = requests.post(
            f"{orthanc.rest}/instances",
            data=path.read_bytes(),
            auth=(orthanc.user, orthanc.password),
            timeout=30,
        )
        response.raise_for_status()
    index = index_study(study.study_dir)
    uid = index.study.study_instance_uid
    return {
        "study": study,
        "index": index,
        "study_uid": uid,
        "coarse_uid": coarse_uid,
        "n_files": len(files),
    }


def test_scan_from_the_archive_lists_what_a_folder_scan_lists_without_fetching_pixels(
    archive_env, uploaded
):
    orthanc = archive_env
    mark = len(orthanc.log_requests())
    result = runner.invoke(
        app,
        ["scan", "--dicomweb", orthanc.url, "--study-uid", uploaded["study_uid"], "--json"],
    )
    assert result.exit_code == 0, result.output
    remote = json.loads(result.stdout)
    local = json.loads(
        runner.invoke(app, ["scan", str(uploaded["study"].study_dir), "--json"]).stdout
    )
    assert remote["study_dir"] == f"{orthanc.url}/studies/{uploaded['study_uid']}"
    assert remote["series"] == local["series"]
    assert [s["role"] for s in remote["series"]] == ["T1", "T1FS", "T2", "UNKNOWN", "T2"]
    # Metadata only: QIDO-RS and WADO-RS metadata requests, no instance retrieved.
    assert orthanc.retrieved_series(uploaded["study_uid"], mark) == []
    assert any(line.endswith("/metadata") for line in orthanc.log_requests()[mark:])


@pytest.mark.slow
def test_report_from_the_archive_equals_a_folder_run_fetches_only_needed_series_and_pushes_the_sr(
    archive_env, uploaded, tmp_path, monkeypatch
):
    orthanc = archive_env
    study = uploaded["study"]
    temp_root = tmp_path / "tmp"
    temp_root.mkdir()
    monkeypatch.setattr(tempfile, "tempdir", str(temp_root))

    folder_run = run_report(study.case_path, tmp_path / "folder", study_dir=study.study_dir)
    mark = len(orthanc.log_requests())
    result = runner.invoke(
        app,
        [
            "report",
            "--dicomweb",
            orthanc.url,
            "--study-uid",
            uploaded["study_uid"],
            "--case",
            str(study.case_path),
            "--out",
            str(tmp_path / "web"),
            "--push",
        ],
    )
    assert result.exit_code == 0, result.output
    assert result.stdout.strip().splitlines()[-1] == str(tmp_path / "web" / "report.html")

    # The findings of both runs are the same, but for the time of the run.
    web = json.loads((tmp_path / "web" / "findings.json").read_text())
    folder = json.loads((tmp_path / "folder" / "findings.json").read_text())
    web.pop("generated")
    folder.pop("generated")
    assert web == folder
    assert folder_run.findings["lesions"]

    # Only the measured series were retrieved: not the localizer, not the coarse T2.
    measured = {s["series_instance_uid"] for s in folder["series"] if s["measured"]}
    assert len(measured) == 3
    fetched = orthanc.retrieved_series(uploaded["study_uid"], mark)
    assert sorted(fetched) == sorted(measured)
    assert uploaded["coarse_uid"] not in fetched

    # The private temporary folder is gone.
    assert list(temp_root.iterdir()) == []

    # The SR is in the archive, byte for byte (Orthanc's stored file), and WADO-RS gives it back.
    sr_bytes = (tmp_path / "web" / "sr.dcm").read_bytes()
    sr = pydicom.dcmread(io.BytesIO(sr_bytes))
    assert f"archive: stored SOP instance {sr.SOPInstanceUID}" in result.stdout
    # The archive's retrieve URL names this server, port included (the Host header, RFC 9110).
    assert f"archive: retrieve URL {orthanc.url}/studies/{sr.StudyInstanceUID}/" in result.stdout
    found = requests.post(
        f"{orthanc.rest}/tools/lookup",
        data=str(sr.SOPInstanceUID),
        auth=(orthanc.user, orthanc.password),
        timeout=30,
    ).json()
    assert [item["Type"] for item in found] == ["Instance"]
    stored = orthanc.rest_get(f"/instances/{found[0]['ID']}/file").content
    assert stored == sr_bytes

    from sigreport.archive import Archive

    archive = Archive(orthanc.url)
    back = list(archive.retrieve_series(str(sr.StudyInstanceUID), str(sr.SeriesInstanceUID)))
    assert len(back) == 1
    assert back[0] == sr


def test_scan_from_the_archive_prints_the_series_table(archive_env, uploaded):
    result = runner.invoke(
        app, ["scan", "--dicomweb", archive_env.url, "--study-uid", uploaded["study_uid"]]
    )
    assert result.exit_code == 0, result.output
    assert "LOCALIZER" in result.stdout and "UNKNOWN" in result.stdout
    assert "T1FS" in result.stdout


def test_a_wrong_password_exits_2_with_a_message_and_no_traceback(
    archive_env, uploaded, monkeypatch
):
    monkeypatch.setenv("SIGREPORT_DICOMWEB_PASSWORD", "wrong")
    result = runner.invoke(
        app, ["scan", "--dicomweb", archive_env.url, "--study-uid", uploaded["study_uid"]]
    )
    assert result.exit_code == 2
    assert "HTTP 401" in result.output
    assert "SIGREPORT_DICOMWEB_PASSWORD" in result.output
    assert "Traceback" not in result.output
    assert result.exception is None or isinstance(result.exception, SystemExit)


def test_no_credentials_exits_2_and_says_how_to_give_them(archive_env, uploaded, monkeypatch):
    monkeypatch.delenv("SIGREPORT_DICOMWEB_USER")
    monkeypatch.delenv("SIGREPORT_DICOMWEB_PASSWORD")
    result = runner.invoke(
        app, ["scan", "--dicomweb", archive_env.url, "--study-uid", uploaded["study_uid"]]
    )
    assert result.exit_code == 2
    assert "no credentials were given" in result.output


def test_an_unknown_study_exits_2(archive_env, tmp_path):
    result = runner.invoke(
        app, ["scan", "--dicomweb", archive_env.url, "--study-uid", "1.2.3.4.5.6.7"]
    )
    assert result.exit_code == 2
    assert "no study 1.2.3.4.5.6.7" in result.output


def test_a_wrong_service_path_exits_2_with_404(archive_env, uploaded):
    result = runner.invoke(
        app,
        ["scan", "--dicomweb", f"{archive_env.rest}/nothing-here", "--study-uid", "1.2.3.4"],
    )
    assert result.exit_code == 2
    assert "HTTP 404" in result.output
    assert "Traceback" not in result.output


def test_report_with_push_writes_nothing_when_the_archive_refuses(
    archive_env, uploaded, tmp_path, monkeypatch
):
    monkeypatch.setenv("SIGREPORT_DICOMWEB_PASSWORD", "wrong")
    out = tmp_path / "out"
    result = runner.invoke(
        app,
        [
            "report",
            "--dicomweb",
            archive_env.url,
            "--study-uid",
            uploaded["study_uid"],
            "--case",
            str(uploaded["study"].case_path),
            "--out",
            str(out),
            "--push",
        ],
    )
    assert result.exit_code == 2
    assert "HTTP 401" in result.output
    assert not out.exists()


def test_the_archive_metadata_index_equals_the_folder_index_but_for_file_paths(
    archive_env, uploaded
):
    from dataclasses import replace

    from sigreport.archive import Archive, read_study

    remote = read_study(Archive(archive_env.url), uploaded["study_uid"]).index
    local = uploaded["index"]
    assert [replace(s, instances=()) for s in remote.stacks] == [
        replace(s, instances=()) for s in local.stacks
    ]
    assert [[i.sop_instance_uid for i in s.instances] for s in remote.stacks] == [
        [i.sop_instance_uid for i in s.instances] for s in local.stacks
    ]
    assert remote.study == local.study


def test_fetch_needed_series_honours_the_case_files_roles(archive_env, uploaded, tmp_path):
    """[roles] T2 = 5 picks the coarse copy; it alone is fetched for T2."""
    from sigreport.archive import Archive, fetch_needed_series
    from sigreport.model import Role

    fetched = fetch_needed_series(
        Archive(archive_env.url), uploaded["study_uid"], tmp_path / "study", roles={Role.T2: 5}
    )
    assert uploaded["coarse_uid"] in fetched.fetched_series
    assert len(fetched.fetched_series) == 3
    t2 = [s for s in fetched.index.stacks if s.series_instance_uid == uploaded["coarse_uid"]]
    assert all(i.path.is_file() for i in t2[0].instances)
    pixels = pydicom.dcmread(t2[0].instances[0].path).pixel_array
    assert pixels.shape == (t2[0].size[1], t2[0].size[0])
    assert np.isfinite(pixels).all()
