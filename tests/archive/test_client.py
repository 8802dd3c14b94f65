"""The archive client's rules, checked against a small scripted HTTP server on 127.0.0.1
(standard library http.server): retries with back-off on 5xx, credentials from the
environment or a token file, one InputError line per failure, a private temporary folder, and
no network at all without --dicomweb."""

from __future__ import annotations

import json
import os
import signal
import socket
import stat
import threading
import time
from collections.abc import Iterator
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path

import pytest
import requests
from typer.testing import CliRunner

from sigreport.archive import Archive, Credentials, private_folder
from sigreport.archive.dicomweb import PASSWORD_ENV, TOKEN_FILE_ENV, USER_ENV
from sigreport.cli import app
from sigreport.errors import InputError

STUDY = "1.2.826.0.1.3680043.8.498.1"
SERIES_ITEM = {"0020000E": {"vr": "UI", "Value": ["1.2.826.0.1.3680043.8.498.2"]}}


class Script:
    """What the stub answers: a list of HTTP status codes, the last one repeated; 200 answers
    carry one QIDO-RS series object (then an empty page, as paging asks for)."""

    def __init__(self, statuses: list[int]) -> None:
        self.statuses = statuses
        self.seen: list[tuple[str, dict[str, str]]] = []
        self.served_ok = False
        self.delay_s = 0.0


@pytest.fixture
def stub() -> Iterator[tuple[str, Script]]:
    script = Script([200])

    class Handler(BaseHTTPRequestHandler):
        def do_GET(self) -> None:  # noqa: N802 - http.server's name
            script.seen.append((self.path, dict(self.headers)))
            if script.delay_s:
                time.sleep(script.delay_s)
            status = script.statuses[min(len(script.seen) - 1, len(script.statuses) - 1)]
            body = b""
            if status == 200:
                body = b"[]" if script.served_ok else json.dumps([SERIES_ITEM]).encode()
                script.served_ok = True
            self.send_response(status)
            self.send_header("Content-Type", "application/dicom+json")
            self.send_header("Content-Length", str(len(body)))
            self.end_headers()
            self.wfile.write(body)

        def log_message(self, *args: object) -> None:
            pass

    server = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    try:
        yield f"http://127.0.0.1:{server.server_address[1]}/dicom-web", script
    finally:
        server.shutdown()
        server.server_close()


def test_a_503_is_retried_with_back_off_and_then_succeeds(stub):
    url, script = stub
    script.statuses = [503, 503, 200]
    archive = Archive(url, credentials=Credentials(), backoff_s=0.01, max_attempts=4)
    found = archive.search_series(STUDY)
    assert found == [SERIES_ITEM]
    # Two failures, the answer, and the paging request that finds no more.
    assert [s for s in (r.status for r in archive.requests)] == [503, 503, 200, 200]


def test_a_server_that_keeps_failing_is_an_input_error_naming_the_attempts(stub):
    url, script = stub
    script.statuses = [502]
    archive = Archive(url, credentials=Credentials(), backoff_s=0.01, max_attempts=3)
    with pytest.raises(InputError, match=r"kept failing \(HTTP 502\) after 3 attempts"):
        archive.search_series(STUDY)
    assert len(script.seen) == 3


def test_a_403_is_not_retried(stub):
    url, script = stub
    script.statuses = [403]
    archive = Archive(url, credentials=Credentials(user="u", password="p"), backoff_s=0.01)
    with pytest.raises(InputError, match="HTTP 403"):
        archive.search_series(STUDY)
    assert len(script.seen) == 1


def test_a_server_that_does_not_answer_in_time_is_an_input_error(stub):
    url, script = stub
    script.delay_s = 1.0
    archive = Archive(url, credentials=Credentials(), timeout_s=(2.0, 0.2), max_attempts=1)
    with pytest.raises(InputError, match=r"no answer within 0.2 s"):
        archive.search_series(STUDY)


def test_basic_credentials_come_from_the_environment(stub, monkeypatch):
    url, script = stub
    monkeypatch.setenv(USER_ENV, "reader")
    monkeypatch.setenv(PASSWORD_ENV, "s3cret")
    monkeypatch.delenv(TOKEN_FILE_ENV, raising=False)
    Archive(url, backoff_s=0.01).search_series(STUDY)
    # RFC 7617: "Basic " + base64("reader:s3cret")
    assert script.seen[0][1]["Authorization"] == "Basic cmVhZGVyOnMzY3JldA=="


def test_a_token_file_gives_a_bearer_token(stub, monkeypatch, tmp_path):
    url, script = stub
    token = tmp_path / "token"
    token.write_text("abc.def.ghi\n")
    monkeypatch.setenv(TOKEN_FILE_ENV, str(token))
    monkeypatch.delenv(USER_ENV, raising=False)
    monkeypatch.delenv(PASSWORD_ENV, raising=False)
    Archive(url, backoff_s=0.01).search_series(STUDY)
    assert script.seen[0][1]["Authorization"] == "Bearer abc.def.ghi"  # RFC 6750 2.1


def test_credentials_that_do_not_go_together_are_refused():
    with pytest.raises(InputError, match=PASSWORD_ENV):
        Credentials.from_env({USER_ENV: "reader"})
    with pytest.raises(InputError, match="not both"):
        Credentials.from_env({USER_ENV: "reader", TOKEN_FILE_ENV: "/x"})
    with pytest.raises(InputError, match="cannot read the token file"):
        Credentials.from_env({TOKEN_FILE_ENV: "/nonexistent/token"})


def test_credentials_in_the_url_are_refused():
    with pytest.raises(InputError, match="do not belong in the URL"):
        Archive("https://user:pw@pacs.example.org/dicom-web", credentials=Credentials())


def test_tls_verification_is_on_and_only_a_ca_file_can_change_it(monkeypatch, tmp_path):
    monkeypatch.delenv("SIGREPORT_DICOMWEB_CA_BUNDLE", raising=False)
    session = requests.Session()
    session.verify = False
    Archive("https://pacs.example.org/dicom-web", credentials=Credentials(), session=session)
    assert session.verify is True
    ca = tmp_path / "site-ca.pem"
    ca.write_text("-----BEGIN CERTIFICATE-----\n")
    monkeypatch.setenv("SIGREPORT_DICOMWEB_CA_BUNDLE", str(ca))
    session = requests.Session()
    Archive("https://pacs.example.org/dicom-web", credentials=Credentials(), session=session)
    assert session.verify == str(ca)


def test_an_unreachable_server_is_one_line_with_exit_2(monkeypatch):
    with socket.socket() as s:  # a port nothing listens on
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    monkeypatch.setenv(USER_ENV, "reader")
    monkeypatch.setenv(PASSWORD_ENV, "pw")
    result = CliRunner().invoke(
        app, ["scan", "--dicomweb", f"http://127.0.0.1:{port}/dicom-web", "--study-uid", STUDY]
    )
    assert result.exit_code == 2
    assert "cannot reach the archive" in result.output
    assert "Traceback" not in result.output


def test_the_command_line_checks_its_archive_options(tmp_path):
    runner = CliRunner()
    result = runner.invoke(app, ["scan", str(tmp_path), "--dicomweb", "http://127.0.0.1:9/x"])
    assert result.exit_code == 2 and "not both" in result.output
    result = runner.invoke(app, ["scan", "--dicomweb", "http://127.0.0.1:9/x"])
    assert result.exit_code == 2 and "--study-uid" in result.output
    result = runner.invoke(
        app, ["scan", "--dicomweb", "http://127.0.0.1:9/x", "--study-uid", "1.2;rm -rf"]
    )
    assert result.exit_code == 2 and "not a DICOM UID" in result.output
    case = tmp_path / "case.toml"
    case.write_text("")
    result = runner.invoke(
        app, ["report", str(tmp_path), "--case", str(case), "--out", str(tmp_path / "o"), "--push"]
    )
    assert result.exit_code == 2 and "--push needs --dicomweb" in result.output


def test_no_command_line_option_takes_a_password():
    for command in ("scan", "report"):
        text = CliRunner().invoke(app, [command, "--help"]).output.lower()
        assert "--password" not in text and "--token" not in text and "--user" not in text


def test_the_private_folder_is_0700_and_removed_after_an_error_or_ctrl_c():
    with pytest.raises(RuntimeError):
        with private_folder() as folder:
            assert stat.S_IMODE(folder.stat().st_mode) == 0o700
            (folder / "x.dcm").write_bytes(b"data")
            raise RuntimeError("boom")
    assert not folder.exists()
    with pytest.raises(KeyboardInterrupt):
        with private_folder() as folder:
            raise KeyboardInterrupt
    assert not folder.exists()


def test_the_private_folder_is_removed_on_sigterm():
    before = signal.getsignal(signal.SIGTERM)
    with pytest.raises(SystemExit) as stopped:
        with private_folder() as folder:
            os.kill(os.getpid(), signal.SIGTERM)
    assert stopped.value.code == 128 + signal.SIGTERM
    assert not folder.exists()
    assert signal.getsignal(signal.SIGTERM) == before


def test_folder_commands_open_no_network_connection(tmp_path, monkeypatch):
    """scan on a folder (and importing every module) with every socket connection refused."""
    import numpy as np

    from builders.dicom import write_classic_series

    def refuse(*args: object, **kwargs: object) -> None:
        raise AssertionError("a network connection was opened")

    monkeypatch.setattr(socket.socket, "connect", refuse)
    monkeypatch.setattr(socket, "create_connection", refuse)
    import sigreport.archive  # noqa: F401 - importing opens nothing either
    import sigreport.export  # noqa: F401

    write_classic_series(tmp_path / "study", np.zeros((3, 8, 8), dtype=np.uint16))
    result = CliRunner().invoke(app, ["scan", str(tmp_path / "study"), "--json"])
    assert result.exit_code == 0, result.output
    assert json.loads(result.stdout)["series"]


def test_archive_names_are_kept_out_of_local_paths():
    """Instances fetched from an archive are named by position, never by header values."""
    from sigreport.archive.fetch import INSTANCE_FILE, SERIES_FOLDER

    assert Path(SERIES_FOLDER.format(3)).name == "series-003"
    assert INSTANCE_FILE.format(12) == "IM00012.dcm"


def test_a_403_fails_a_batch_case_with_the_archives_message(stub, monkeypatch, tmp_path):
    """A batch case as its worker runs it: the refusal is the case's reason, not an exception,
    and the private folder made inside the batch's is gone."""
    from sigreport.batch import run_case
    from sigreport.batch.worklist import CaseEntry

    url, script = stub
    script.statuses = [403]
    monkeypatch.setenv(USER_ENV, "reader")
    monkeypatch.setenv(PASSWORD_ENV, "s3cret")
    monkeypatch.delenv(TOKEN_FILE_ENV, raising=False)
    case = tmp_path / "case.toml"
    case.write_text(
        '[[roi]]\nid = "L1"\nkind = "lesion"\nshape = "sphere"\n'
        "center_mm = [0.0, 0.0, 0.0]\nradius_mm = 5.0\n"
        '[[roi]]\nid = "R1"\nkind = "reference"\ntissue = "white matter"\nshape = "sphere"\n'
        "center_mm = [20.0, 0.0, 0.0]\nradius_mm = 5.0\n"
    )
    parent = tmp_path / "tmp"
    parent.mkdir()
    entry = CaseEntry(id="c1", study=None, case=case, dicomweb=url, study_uid=STUDY)
    summary = run_case(entry, str(tmp_path / "out"), temp_parent=str(parent))
    assert summary["status"] == "failed"
    assert summary["reason"] == (
        f"{url}: searching the series of study {STUDY}: not allowed for this user "
        "(HTTP 403 Forbidden)"
    )
    assert len(script.seen) == 1  # not retried
    assert list(parent.iterdir()) == []
    assert "s3cret" not in repr(summary)
