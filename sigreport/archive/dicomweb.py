"""The archive connection: a DICOMweb client (DICOM PS3.18) with the tool's rules.

The HTTP work is ``dicomweb_client``'s (QIDO-RS search, WADO-RS metadata and multipart retrieve,
STOW-RS store); this module adds what docs/usage.md promises about it:

- credentials from the environment or a token file, never the command line
  (``SIGREPORT_DICOMWEB_USER`` / ``SIGREPORT_DICOMWEB_PASSWORD``, or
  ``SIGREPORT_DICOMWEB_TOKEN_FILE`` naming a file that holds a bearer token);
- TLS certificates always verified (``SIGREPORT_DICOMWEB_CA_BUNDLE`` names a site's CA file);
- a timeout on every request, retries with exponential back-off on 408, 429 and 5xx answers
  and on refused connections;
- every failure as one ``InputError`` line (401, 403, 404, an unreachable server, a server
  that keeps failing), which the CLI prints with exit code 2.

Nothing here runs unless a command was given ``--dicomweb``: the tool opens no network
connection otherwise.
"""

from __future__ import annotations

import logging
import os
from collections.abc import Callable, Iterator, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, TypeVar
from urllib.parse import urlsplit

import pydicom
import requests
from pydicom.dataset import Dataset

from sigreport.errors import InputError

USER_ENV = "SIGREPORT_DICOMWEB_USER"
PASSWORD_ENV = "SIGREPORT_DICOMWEB_PASSWORD"
TOKEN_FILE_ENV = "SIGREPORT_DICOMWEB_TOKEN_FILE"
CA_BUNDLE_ENV = "SIGREPORT_DICOMWEB_CA_BUNDLE"

# Answers worth asking again: the server is busy or failed for a moment (RFC 9110 15.5.9,
# 15.5.20 (429 is RFC 6585 4), 15.6). Anything else is final.
RETRY_STATUS = (408, 429, 500, 502, 503, 504)

# WADO-RS: instances in the archive's own transfer syntax (PS3.18 8.7.3.5.2, "transfer-syntax=*"),
# so nothing is transcoded (or lossy-recompressed) on the way.
NATIVE_DICOM = (("application/dicom", "*"),)

T = TypeVar("T")


@dataclass(frozen=True)
class Credentials:
    """How the tool authenticates: HTTP Basic (user and password) or a bearer token."""

    user: str | None = None
    password: str | None = field(default=None, repr=False)
    token: str | None = field(default=None, repr=False)

    @classmethod
    def from_env(cls, env: Mapping[str, str] | None = None) -> Credentials:
        """Read the credentials from ``env`` (default ``os.environ``).

        Raises
        ------
        InputError
            When only one of user and password is set, both a token file and a user are set,
            or the token file cannot be read or is empty.
        """
        env = os.environ if env is None else env
        user = env.get(USER_ENV) or None
        password = env.get(PASSWORD_ENV) or None
        token_file = env.get(TOKEN_FILE_ENV) or None
        if token_file and user:
            raise InputError(f"set either {TOKEN_FILE_ENV} or {USER_ENV}, not both")
        if token_file:
            try:
                token = Path(token_file).read_text(encoding="utf-8").strip()
            except OSError as exc:
                raise InputError(
                    f"{TOKEN_FILE_ENV}: cannot read the token file {token_file}: "
                    f"{exc.strerror or exc}"
                ) from None
            if not token or any(c.isspace() for c in token):
                raise InputError(
                    f"{TOKEN_FILE_ENV}: the token file {token_file} must hold one token on one line"
                )
            return cls(token=token)
        if (user is None) != (password is None):
            missing = PASSWORD_ENV if password is None else USER_ENV
            raise InputError(f"{missing} is not set (the archive's user and password go together)")
        return cls(user=user, password=password)

    @property
    def kind(self) -> str:
        if self.token:
            return "token"
        return "user and password" if self.user else "none"


@dataclass(frozen=True)
class Request:
    """One HTTP exchange with the archive, as the client saw it."""

    method: str
    path: str
    status: int


@dataclass(frozen=True)
class StoreAnswer:
    """The archive's answer to a STOW-RS store (PS3.18 10.5.3, Store Instances Response)."""

    sop_instance_uid: str
    retrieve_url: str | None
    warnings: tuple[str, ...]

    def lines(self) -> list[str]:
        out = [f"stored SOP instance {self.sop_instance_uid}"]
        if self.retrieve_url:
            out.append(f"retrieve URL {self.retrieve_url}")
        out.extend(f"archive warning: {w}" for w in self.warnings)
        return out


class Archive:
    """A DICOMweb archive (PS3.18): search, metadata, retrieve and store, with the tool's rules.

    Parameters
    ----------
    url
        The DICOMweb service root, e.g. ``https://pacs.example.org/dicom-web``.
    credentials
        Default: ``Credentials.from_env()``.
    timeout_s
        (connect, read) timeout of every request in seconds (default 10 s, 120 s).
    max_attempts
        Attempts per request when the answer is 408, 429 or 5xx, or the request fails (refused
        connection, timeout) (default 3).
    backoff_s
        The first wait between attempts; each further wait doubles (default 0.5 s).
    session
        A ``requests.Session`` to use (tests); its ``verify`` is set to True or the CA bundle.
    """

    def __init__(
        self,
        url: str,
        *,
        credentials: Credentials | None = None,
        timeout_s: tuple[float, float] = (10.0, 120.0),
        max_attempts: int = 3,
        backoff_s: float = 0.5,
        session: requests.Session | None = None,
    ) -> None:
        from dicomweb_client.api import DICOMwebClient

        parts = urlsplit(url)
        problem = url_problem(url)
        if problem:
            # The URL itself is not repeated when it carries a password.
            shown = "" if parts.username or parts.password else f" {url!r}"
            raise InputError(f"--dicomweb{shown}: {problem}")
        self.url = url.rstrip("/")
        self.credentials = credentials if credentials is not None else Credentials.from_env()
        self.timeout_s = timeout_s
        self.max_attempts = max(1, int(max_attempts))
        self.requests: list[Request] = []
        session = session if session is not None else requests.Session()
        ca_bundle = os.environ.get(CA_BUNDLE_ENV) or None
        if ca_bundle is not None and not Path(ca_bundle).is_file():
            raise InputError(f"{CA_BUNDLE_ENV}: no CA file {ca_bundle}")
        # TLS verification is never turned off; a site's own CA file may replace the default.
        session.verify = ca_bundle if ca_bundle is not None else True
        session.trust_env = False  # no credentials from ~/.netrc, no proxy surprises
        if self.credentials.token:
            session.headers["Authorization"] = f"Bearer {self.credentials.token}"
        elif self.credentials.user:
            session.auth = (self.credentials.user, self.credentials.password or "")
        session.hooks["response"].append(self._record)
        logging.getLogger("retrying").setLevel(logging.ERROR)
        try:
            self._client = DICOMwebClient(self.url, session=session, timeout=timeout_s)
        except ValueError as exc:
            raise InputError(f"--dicomweb {url!r}: {exc}") from None
        # dicomweb_client sends its own Host header without the port; a Host header names the
        # port when it is not the scheme's default (RFC 9110 7.2), and archives build the
        # retrieve URLs of their answers from it.
        self._client.host = parts.netloc
        # dicomweb_client retries through the ``retrying`` package: on the listed answers and on
        # any exception of the request (refused connection, timeout), waiting
        # 2**attempt * multiplier ms, i.e. backoff_s, 2 backoff_s, 4 backoff_s...
        self._client.set_http_retry_params(
            retry=self.max_attempts > 1,
            max_attempts=self.max_attempts,
            wait_exponential_multiplier=max(1, int(backoff_s * 500)),
            retriable_error_codes=RETRY_STATUS,  # type: ignore[arg-type]
        )

    def _record(self, response: requests.Response, *args: Any, **kwargs: Any) -> None:
        self.requests.append(
            Request(
                method=str(response.request.method),
                path=urlsplit(str(response.request.url)).path,
                status=int(response.status_code),
            )
        )

    # ----------------------------------------------------------------------------------------

    def search_series(self, study_uid: str) -> list[dict[str, Any]]:
        """QIDO-RS: the series of one study (PS3.18 10.6), as DICOM JSON objects."""
        return self._call(
            f"searching the series of study {study_uid}",
            lambda: self._client.search_for_series(
                study_instance_uid=study_uid, get_remaining=True
            ),
        )

    def series_metadata(self, study_uid: str, series_uid: str) -> list[Dataset]:
        """WADO-RS metadata of one series (PS3.18 10.4, no pixel data), one dataset per
        instance. Bulk data (pixel data, large binary values) is not fetched."""
        items = self._call(
            f"reading the metadata of series {series_uid}",
            lambda: self._client.retrieve_series_metadata(study_uid, series_uid),
        )
        out = []
        for item in items:
            try:
                out.append(Dataset.from_json(item, bulk_data_uri_handler=_no_bulk_data))
            except Exception as exc:  # a malformed JSON dataset from the archive
                raise InputError(
                    f"{self.url}: the metadata of series {series_uid} is not valid DICOM JSON "
                    f"(PS3.18 F.2): {exc}"
                ) from None
        return out

    def retrieve_series(self, study_uid: str, series_uid: str) -> Iterator[Dataset]:
        """WADO-RS retrieve of one series' instances (multipart/related application/dicom, in
        the archive's transfer syntax)."""
        iterator = self._call(
            f"retrieving series {series_uid}",
            lambda: self._client.iter_series(study_uid, series_uid, media_types=NATIVE_DICOM),
        )
        while True:
            item = self._call(f"retrieving series {series_uid}", lambda: next(iterator, None))
            if item is None:
                return
            yield item

    def store(self, path: Path) -> StoreAnswer:
        """STOW-RS: store one DICOM file (PS3.18 10.5) and return the archive's answer.

        Raises
        ------
        InputError
            When the archive refuses the instance (its Failed SOP Sequence, or an HTTP error).
        """
        ds = pydicom.dcmread(path)
        answer = self._call(f"storing {path.name}", lambda: self._client.store_instances([ds]))
        failed = answer.get("FailedSOPSequence") or []
        if failed:
            reasons = ", ".join(
                f"0x{int(item.get('FailureReason', 0)):04X}" for item in failed
            )  # PS3.18 Table 10.5.3-2 / PS3.4 failure reason codes
            raise InputError(
                f"{self.url}: the archive refused {path.name} (failure reason {reasons})"
            )
        stored = [
            item
            for item in answer.get("ReferencedSOPSequence") or []
            if item.get("ReferencedSOPInstanceUID") == ds.SOPInstanceUID
        ]
        if not stored:
            raise InputError(
                f"{self.url}: the archive's answer does not list {path.name} "
                f"({ds.SOPInstanceUID}) as stored"
            )
        item = stored[0]
        warnings = []
        if "WarningReason" in item:
            warnings.append(f"0x{int(item.WarningReason):04X}")
        return StoreAnswer(
            sop_instance_uid=str(ds.SOPInstanceUID),
            retrieve_url=str(item.get("RetrieveURL") or answer.get("RetrieveURL") or "") or None,
            warnings=tuple(warnings),
        )

    # ----------------------------------------------------------------------------------------

    def _call(self, what: str, fn: Callable[[], T]) -> T:
        """Run one client call; turn every network or HTTP failure into one InputError line."""
        from retrying import RetryError

        try:
            return fn()
        except RetryError as exc:
            response = getattr(exc.last_attempt, "value", None)
            status = getattr(response, "status_code", None)
            raise InputError(
                f"{self.url}: {what}: the archive kept failing (HTTP {status}) after "
                f"{self.max_attempts} attempts"
            ) from None
        except requests.exceptions.SSLError as exc:
            raise InputError(
                f"{self.url}: TLS certificate verification failed ({_reason(exc)}); a site CA "
                f"file can be named in {CA_BUNDLE_ENV}"
            ) from None
        except requests.exceptions.Timeout:
            raise InputError(
                f"{self.url}: {what}: no answer within {self.timeout_s[1]:g} s"
                f" (connect timeout {self.timeout_s[0]:g} s)"
            ) from None
        except requests.exceptions.ConnectionError as exc:
            raise InputError(f"cannot reach the archive at {self.url}: {_reason(exc)}") from None
        except requests.exceptions.HTTPError as exc:
            raise InputError(self._http_message(what, exc.response)) from None
        except requests.exceptions.RequestException as exc:
            raise InputError(f"{self.url}: {what}: {_reason(exc)}") from None
        except ValueError as exc:  # JSON or multipart that cannot be decoded
            raise InputError(
                f"{self.url}: {what}: the archive's answer cannot be read: {exc}"
            ) from None

    def _http_message(self, what: str, response: requests.Response | None) -> str:
        status = response.status_code if response is not None else None
        if status == 401:
            how = {
                "token": f"the token in {TOKEN_FILE_ENV}",
                "user and password": f"{USER_ENV} / {PASSWORD_ENV}",
                "none": f"no credentials were given: set {USER_ENV} and {PASSWORD_ENV}, or "
                f"{TOKEN_FILE_ENV}",
            }[self.credentials.kind]
            return f"{self.url}: the archive refused the credentials (HTTP 401 Unauthorized; {how})"
        if status == 403:
            return f"{self.url}: {what}: not allowed for this user (HTTP 403 Forbidden)"
        if status == 404:
            return f"{self.url}: {what}: not found (HTTP 404); check the URL and the UID"
        if status is not None and status >= 500:
            return f"{self.url}: {what}: the archive failed (HTTP {status})"
        return f"{self.url}: {what}: HTTP {status}"


def url_problem(url: str) -> str | None:
    """Why ``url`` cannot be a DICOMweb service root, or None when it can: an http(s) URL with
    a host name and no credentials in it (they come from the environment, never from text that
    lands in shell histories, worklists and logs)."""
    try:
        parts = urlsplit(url)
        hostname = parts.hostname
    except ValueError as exc:
        return f"not a URL ({exc})"
    if parts.scheme not in ("http", "https") or not hostname:
        return "not an http(s) URL of a DICOMweb service (e.g. https://pacs.example.org/dicom-web)"
    if parts.username or parts.password:
        return (
            f"credentials do not belong in the URL; set {USER_ENV} and {PASSWORD_ENV} or "
            f"{TOKEN_FILE_ENV}"
        )
    return None


def _no_bulk_data(uri: str) -> bytes | None:
    """Bulk data (pixel data, LUTs) are not fetched with the metadata: the role and geometry
    attributes are never bulk data (PS3.18 8.7.3.5.5 leaves only large binary values out)."""
    return None


def _reason(exc: BaseException) -> str:
    """The innermost cause of a requests / urllib3 error, in one line."""
    seen = exc
    while seen.__context__ is not None and seen.__context__ is not seen:
        seen = seen.__context__
    text = str(seen) or type(seen).__name__
    return text.splitlines()[0][:300]
