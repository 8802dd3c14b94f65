"""A real DICOMweb archive for the archive tests: Debian's Orthanc with its DICOMweb plugin,
started once per test session on 127.0.0.1 (free ports, HTTP authentication on, remote access
off, storage in a temporary folder), stopped at the end.

Without Orthanc the tests skip, except when CI is set (.ci/run installs ``orthanc`` and
``orthanc-dicomweb``): then they fail.
"""

from __future__ import annotations

import json
import os
import shutil
import socket
import subprocess
import time
from dataclasses import dataclass
from pathlib import Path

import pytest
import requests

USER = "reader"
PASSWORD = "correct-horse-battery"
# Where Debian's orthanc-dicomweb package puts the plugin.
PLUGIN_PATHS = (
    Path("/usr/share/orthanc/plugins/libOrthancDicomWeb.so"),
    Path("/usr/lib/orthanc/plugins/libOrthancDicomWeb.so"),
)


@dataclass
class OrthancServer:
    """A running Orthanc: its DICOMweb root, REST root, credentials and HTTP log."""

    url: str  # DICOMweb root
    rest: str  # Orthanc's own REST API
    user: str
    password: str
    log_path: Path

    def log_requests(self) -> list[str]:
        """The HTTP requests Orthanc logged (``--verbose-http``), as 'METHOD /path' lines."""
        lines = []
        for line in self.log_path.read_text(errors="replace").splitlines():
            if "(http) " in line:
                tail = line.split("(http) ", 1)[1]
                if tail.split(" ", 1)[0] in ("GET", "POST", "PUT", "DELETE"):
                    lines.append(tail)
        return lines

    def retrieved_series(self, study_uid: str, since: int = 0) -> list[str]:
        """Series UIDs of ``study_uid`` whose instances were retrieved (WADO-RS
        ``GET .../series/{uid}``, not its ``/metadata``) since log line ``since``."""
        prefix = f"GET /dicom-web/studies/{study_uid}/series/"
        out = []
        for line in self.log_requests()[since:]:
            if line.startswith(prefix):
                rest = line[len(prefix) :].strip()
                if "/" not in rest:
                    out.append(rest)
        return out

    def rest_get(self, path: str) -> requests.Response:
        response = requests.get(f"{self.rest}{path}", auth=(self.user, self.password), timeout=30)
        response.raise_for_status()
        return response


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def _missing(reason: str):
    if os.environ.get("CI"):
        pytest.fail(f"{reason}; it is required when CI is set (.ci/run installs it)")
    pytest.skip(reason)


@pytest.fixture(scope="session")
def orthanc(tmp_path_factory) -> OrthancServer:
    binary = shutil.which("Orthanc") or (
        "/usr/sbin/Orthanc" if Path("/usr/sbin/Orthanc").exists() else None
    )
    if binary is None:
        _missing("Orthanc (Debian package orthanc) is not installed")
    plugin = next((p for p in PLUGIN_PATHS if p.exists()), None)
    if plugin is None:
        _missing("the Orthanc DICOMweb plugin (Debian package orthanc-dicomweb) is not installed")
    root = tmp_path_factory.mktemp("orthanc")
    http_port, dicom_port = _free_port(), _free_port()
    config = {
        "Name": "sigreport-test-archive",
        "HttpPort": http_port,
        "DicomPort": dicom_port,
        "RemoteAccessAllowed": False,
        "AuthenticationEnabled": True,
        "RegisteredUsers": {USER: PASSWORD},
        "StorageDirectory": str(root / "storage"),
        "IndexDirectory": str(root / "index"),
        "Plugins": [str(plugin)],
        "DicomWeb": {
            "Enable": True,
            "Root": "/dicom-web/",
            "StudiesMetadata": "Full",
            "SeriesMetadata": "Full",
        },
        "HttpBindAddress": "127.0.0.1",
        "DicomServerEnabled": False,
    }
    config_path = root / "orthanc.json"
    config_path.write_text(json.dumps(config, indent=2))
    log_path = root / "orthanc.log"
    out = open(root / "stdout.txt", "wb")  # noqa: SIM115 - closed at teardown
    process = subprocess.Popen(
        [str(binary), "--verbose-http", f"--logfile={log_path}", str(config_path)],
        stdout=out,
        stderr=subprocess.STDOUT,
        cwd=root,
    )
    rest = f"http://127.0.0.1:{http_port}"
    server = OrthancServer(
        url=f"{rest}/dicom-web", rest=rest, user=USER, password=PASSWORD, log_path=log_path
    )
    try:
        deadline = time.monotonic() + 60
        while True:
            if process.poll() is not None:
                raise RuntimeError(
                    f"Orthanc exited with {process.returncode}: "
                    + (root / "stdout.txt").read_text(errors="replace")[-2000:]
                )
            try:
                if requests.get(f"{rest}/system", auth=(USER, PASSWORD), timeout=2).ok:
                    break
            except requests.ConnectionError:
                pass
            if time.monotonic() > deadline:
                raise RuntimeError("Orthanc did not answer within 60 s")
            time.sleep(0.2)
        yield server
    finally:
        process.terminate()
        try:
            process.wait(timeout=20)
        except subprocess.TimeoutExpired:
            process.kill()
            process.wait()
        out.close()


@pytest.fixture
def archive_env(orthanc, monkeypatch):
    """The environment a user sets for the archive (credentials never on the command line)."""
    monkeypatch.setenv("SIGREPORT_DICOMWEB_USER", orthanc.user)
    monkeypatch.setenv("SIGREPORT_DICOMWEB_PASSWORD", orthanc.password)
    monkeypatch.delenv("SIGREPORT_DICOMWEB_TOKEN_FILE", raising=False)
    monkeypatch.delenv("SIGREPORT_DICOMWEB_CA_BUNDLE", raising=False)
    return orthanc
