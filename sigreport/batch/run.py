"""Every case of a worklist on Dask (docs/usage.md, ``sigreport batch``).

Each case is one task: it reads its study where it is (a folder the worker can see: local disk
on this machine, shared storage on a cluster) or fetches the series it needs from a DICOMweb
archive into a private temporary folder of its own (:func:`sigreport.archive.report_from_archive`),
writes its own ``OUTDIR/<id>/`` through :func:`sigreport.pipeline.run_report` (atomic: a
complete folder or none), with ``push`` stores its sr.dcm in that archive, and returns a small
summary dict for the board sheet. A failing case never stops the others: its reason is in its
summary. Nothing here assumes one machine, except that every worker sees the study folders and
OUTDIR at the same paths.

Archive credentials never travel with a task: each worker reads them from its own environment
(``SIGREPORT_DICOMWEB_*``, docs/usage.md); the workers of the default local cluster are this
process's children and inherit it.
"""

from __future__ import annotations

import contextlib
import logging
import os
import re
import shutil
import traceback
import uuid
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from sigreport.batch.worklist import CaseEntry, Worklist
from sigreport.errors import InputError

DONE = "done"
FAILED = "failed"
CANCELLED = "cancelled"
LOGS_DIR = "logs"

OnResult = Callable[[dict[str, Any]], None]


@dataclass(frozen=True)
class BatchResult:
    """What :func:`run_batch` did: where the sheet is and each case's summary (worklist order)."""

    out_dir: Path
    index_html: Path
    summary_csv: Path
    cases: tuple[dict[str, Any], ...]
    interrupted: bool

    @property
    def n_failed(self) -> int:
        return sum(1 for c in self.cases if c["status"] != DONE)


def _display_name(value: Any) -> str:
    """A DICOM PN value (PS3.5 6.2: family^given^middle^prefix^suffix) as "FAMILY, Given
    Middle"; other text as it is."""
    if not value:
        return ""
    parts = [p.strip() for p in str(value).split("=")[0].split("^")]
    family, rest = parts[0], " ".join(p for p in parts[1:] if p)
    return f"{family}, {rest}" if family and rest else family or rest


def case_summary(
    case_id: str, findings: Mapping[str, Any], site_lexicon: Path | None = None
) -> dict[str, Any]:
    """The board-sheet row of a finished case, from its findings (plain text values; the page
    escapes them)."""
    from sigreport.lexicon_tables import load_lexicon
    from sigreport.report.findings import phrases_from_findings
    from sigreport.report.text import change_sentence, display_date, not_seen_sentence

    lexicon = load_lexicon(site_lexicon)
    wording = lexicon.wording
    phrases = phrases_from_findings(findings, lexicon.rules)
    study = findings.get("study") or {}
    lesions = list(findings.get("lesions", []))
    behaviour: list[str] = []
    change: list[str] = []
    for lesion in lesions:
        chosen = phrases.get(str(lesion.get("id")))
        keys = [str(k) for k in lesion.get("behaviour") or []]
        if keys:
            words = {p.key: p.phrase for p in chosen.behaviour} if chosen is not None else {}
            said = ", ".join(words.get(k, k.replace("-", " ")) for k in keys)
            behaviour.append(f"{lesion.get('id')}: {said}")
        sentence = change_sentence(lesion, wording)
        if sentence:
            change.append(f"{lesion.get('id')}: {sentence}")
    gone = not_seen_sentence(findings, wording)
    if gone:
        change.append(gone)
    warnings = [
        f"{q.get('code')}: {q.get('message')}"
        for q in findings.get("qc", [])
        if q.get("level") in ("warning", "error")
    ]
    return {
        "id": case_id,
        "status": DONE,
        "reason": "",
        "patient_name": _display_name(study.get("patient_name")),
        "patient_id": str(study.get("patient_id") or ""),
        "study_date": display_date(study.get("study_date"), wording)
        if study.get("study_date")
        else "",
        "lesions": len(lesions),
        "behaviour": behaviour,
        "change": change,
        "has_prior": "prior" in findings,
        "qc_warnings": warnings,
        "report": f"{case_id}/report.html",
        "pushed": "",
    }


def failed_summary(case_id: str, reason: str, *, status: str = FAILED) -> dict[str, Any]:
    """The row of a case that did not finish."""
    return {
        "id": case_id,
        "status": status,
        "reason": reason,
        "patient_name": "",
        "patient_id": "",
        "study_date": "",
        "lesions": None,
        "behaviour": [],
        "change": [],
        "has_prior": False,
        "qc_warnings": [],
        "report": None,
        "pushed": "",
    }


def run_case(
    entry: CaseEntry,
    out_dir: str,
    *,
    register: bool | None = None,
    force: bool = False,
    site_lexicon: str | None = None,
    push: bool = False,
    temp_parent: str | None = None,
) -> dict[str, Any]:
    """One task: ``run_report`` on one case into ``out_dir/<id>``; never raises.

    A case whose study is in an archive (``entry.study_uid``) fetches only the series it needs
    into a private temporary folder (inside ``temp_parent`` when given), removed when the case
    ends however it ends; the credentials come from this process's environment. With ``push``
    its sr.dcm is then stored in that archive (STOW-RS); a folder case is never pushed.

    Returns
    -------
    dict
        :func:`case_summary` when the report was written (``pushed``: the archive's answer);
        else :func:`failed_summary` with the reason (an input problem's message, such as the
        archive's refusal, or ``internal error`` and, under ``traceback``, the traceback to
        keep in ``OUTDIR/logs``). A report written but refused by the archive is a failed
        case that keeps its ``report`` link.
    """
    from sigreport.pipeline import run_report

    site = Path(site_lexicon) if site_lexicon is not None else None
    target = Path(out_dir) / entry.id
    try:
        if entry.study_uid is None:
            run = run_report(
                entry.case,
                target,
                study_dir=entry.study,
                register=register,
                force=force,
                site_lexicon=site,
                prior_study=entry.prior_study,
                prior_case=entry.prior_case,
            )
            return case_summary(entry.id, run.findings, site)
        return _run_archive_case(entry, target, register, force, site, push, temp_parent)
    except InputError as exc:
        return failed_summary(entry.id, str(exc))
    except Exception as exc:  # a bug in one case must not stop the others
        summary = failed_summary(entry.id, f"internal error: {exc!r}")
        summary["traceback"] = traceback.format_exc()
        return summary


def _run_archive_case(
    entry: CaseEntry,
    target: Path,
    register: bool | None,
    force: bool,
    site: Path | None,
    push: bool,
    temp_parent: str | None,
) -> dict[str, Any]:
    from sigreport.archive import Archive, report_from_archive

    assert entry.dicomweb is not None and entry.study_uid is not None
    archive = Archive(entry.dicomweb)
    done = report_from_archive(
        entry.case,
        target,
        url=entry.dicomweb,
        study_uid=entry.study_uid,
        register=register,
        force=force,
        site_lexicon=site,
        archive=archive,
        prior_study=entry.prior_study,
        prior_case=entry.prior_case,
        temp_parent=temp_parent,
    )
    summary = case_summary(entry.id, done.run.findings, site)
    if push:
        try:
            stored = archive.store(target / "sr.dcm")
        except InputError as exc:
            summary.update(
                status=FAILED,
                reason=f"the report is in {entry.id}/, but sr.dcm was not stored: {exc}",
            )
            return summary
        summary["pushed"] = "; ".join(stored.lines())
    return summary


def check_out_dir(worklist: Worklist, out_dir: Path, *, force: bool = False) -> None:
    """Refuse, before any work, case folders that exist (without ``force``) or hold any input
    of the worklist, and an OUTDIR inside a study folder (the input is never written to)."""
    problems = []
    inputs = [
        path
        for entry in worklist.cases
        for path in (entry.study, entry.case, entry.prior_study, entry.prior_case)
        if path is not None
    ]
    for entry in worklist.cases:
        target = out_dir / entry.id
        if target.exists() and not force:
            problems.append(f"{target} exists")
        for folder in (entry.study, entry.prior_study):
            if folder is not None and _inside(out_dir, folder):
                problems.append(f"{out_dir} is inside the study folder {folder} of {entry.id}")
        # A case folder is replaced whole (--force): it must hold no input of any case.
        held = [p for p in inputs if _inside(p, target)]
        if held:
            problems.append(f"{target} holds input of the worklist ({held[0]})")
    if problems:
        hint = "; use --force to replace case folders" if not force else ""
        raise InputError(f"{out_dir}: " + "; ".join(problems) + hint)


def _inside(path: Path, folder: Path) -> bool:
    try:
        path.resolve().relative_to(folder.resolve())
    except ValueError:
        return False
    return True


def run_batch(
    worklist: Worklist,
    out_dir: Path,
    *,
    scheduler: str | None = None,
    workers: int | None = None,
    register: bool | None = None,
    force: bool = False,
    site_lexicon: Path | None = None,
    push: bool = False,
    on_result: OnResult | None = None,
    on_start: Callable[[int], None] | None = None,
) -> BatchResult:
    """Run every case of ``worklist`` on Dask and write OUTDIR/index.html and summary.csv.

    Parameters
    ----------
    worklist
        A checked worklist (:func:`sigreport.batch.worklist.load_worklist`).
    out_dir
        OUTDIR: receives one folder per case, ``index.html``, ``summary.csv`` and, for internal
        errors, ``logs/<id>.log``.
    scheduler
        The address of a running Dask scheduler (``tcp://host:8786``); its workers must see the
        study folders and OUTDIR at the same paths. Default: a local cluster.
    workers
        Local cluster only: the number of worker processes (one thread each); default the
        number of cores.
    register, force, site_lexicon
        As for ``report``, for every case.
    push
        Store each archive case's sr.dcm in its archive (STOW-RS); folder cases are not pushed.
    on_result
        Called in this process with each case's summary as it arrives.
    on_start
        Called with the number of workers once the cluster is up.

    Returns
    -------
    BatchResult
        ``interrupted`` when Ctrl-C stopped the run: pending cases are cancelled (status
        ``cancelled``), finished cases are complete, no partial case folder is left.

    Raises
    ------
    InputError
        A case folder exists without ``force``, OUTDIR is inside a study, the scheduler cannot
        be reached, ``workers`` < 1, or ``workers`` is given with ``scheduler``; on a local
        cluster with archive cases, archive credentials that cannot be used (a token file that
        cannot be read, a user without a password).
    """
    out_dir = Path(out_dir)
    check_out_dir(worklist, out_dir, force=force)
    if workers is not None and workers < 1:
        raise InputError(f"--workers must be at least 1, got {workers}")
    if workers is not None and scheduler is not None:
        raise InputError(
            "--workers sets the size of the local cluster; with --scheduler the scheduler's "
            "own workers run the cases"
        )
    from_archive = any(entry.study_uid is not None for entry in worklist.cases)
    if from_archive and scheduler is None:
        from sigreport.archive import Credentials

        # The local workers read the same environment: a misconfiguration is one message
        # before any work, not one failure per case.
        Credentials.from_env()
    out_dir.mkdir(parents=True, exist_ok=True)
    site = str(site_lexicon) if site_lexicon is not None else None
    results: dict[str, dict[str, Any]] = {}
    with contextlib.ExitStack() as stack:
        # Local workers make each archive case's private folder inside one private folder of
        # the batch, removed when the batch ends even if a stopped worker could not clean up;
        # a remote scheduler's workers use their own temporary folder.
        temp_parent = None
        if from_archive and scheduler is None:
            from sigreport.archive import private_folder

            temp_parent = str(stack.enter_context(private_folder("sigreport-batch-")))
        client, cluster = _connect(scheduler, workers)
        interrupted = _run_cases(
            client,
            cluster,
            worklist,
            out_dir,
            results,
            register=register,
            force=force,
            site=site,
            push=push,
            temp_parent=temp_parent,
            on_result=on_result,
            on_start=on_start,
        )
    summaries = tuple(
        results.get(e.id)
        or failed_summary(e.id, "stopped (Ctrl-C) before it finished", status=CANCELLED)
        for e in worklist.cases
    )
    from sigreport.batch.sheet import write_sheet

    index_html, summary_csv = write_sheet(
        out_dir, summaries, title=worklist.title, site_lexicon=site_lexicon
    )
    return BatchResult(
        out_dir=out_dir,
        index_html=index_html,
        summary_csv=summary_csv,
        cases=summaries,
        interrupted=interrupted,
    )


def _run_cases(
    client: Any,
    cluster: Any,
    worklist: Worklist,
    out_dir: Path,
    results: dict[str, dict[str, Any]],
    *,
    register: bool | None,
    force: bool,
    site: str | None,
    push: bool,
    temp_parent: str | None,
    on_result: OnResult | None,
    on_start: Callable[[int], None] | None,
) -> bool:
    """Submit every case, collect the summaries into ``results``; True when Ctrl-C stopped
    the run. The client and the cluster are closed on the way out."""
    from distributed import as_completed

    interrupted = False
    futures: dict[Any, CaseEntry] = {}
    try:
        try:
            if on_start is not None:
                on_start(len(client.scheduler_info().get("workers", {})))
            for entry in worklist.cases:
                future = client.submit(
                    run_case,
                    entry,
                    str(out_dir.resolve()),
                    register=register,
                    force=force,
                    site_lexicon=site,
                    push=push,
                    temp_parent=temp_parent,
                    key=f"sigreport-case-{entry.id}-{uuid.uuid4().hex}",
                    pure=False,
                )
                futures[future] = entry
            for future in as_completed(futures):
                entry = futures[future]
                try:
                    summary = future.result()
                except Exception as exc:  # the worker died or the task could not run
                    summary = failed_summary(entry.id, f"the task failed on its worker: {exc!r}")
                results[entry.id] = _keep_traceback(summary, out_dir)
                if on_result is not None:
                    on_result(results[entry.id])
        except KeyboardInterrupt:
            interrupted = True
            client.cancel([f for f in futures if not f.done()])
    finally:
        client.close()
        if cluster is not None:
            cluster.close()
        _sweep_partials(out_dir, worklist.cases)
    return interrupted


def _connect(scheduler: str | None, workers: int | None) -> tuple[Any, Any]:
    """A Dask client: on the given scheduler, else on a new local cluster of processes bound
    to 127.0.0.1 with the dashboard off (the tool opens no outside connection by itself)."""
    from distributed import Client, LocalCluster

    if scheduler is not None:
        try:
            return Client(scheduler, timeout="10s"), None
        except (OSError, TimeoutError, ValueError) as exc:
            raise InputError(f"--scheduler {scheduler}: cannot connect ({exc})") from None
    cluster = LocalCluster(
        n_workers=workers or os.cpu_count() or 1,
        threads_per_worker=1,
        processes=True,
        host="127.0.0.1",
        dashboard_address=None,
        # The cluster's own notices (workers starting, tasks cancelled on Ctrl-C) are not the
        # user's business; errors still show.
        silence_logs=logging.ERROR,
    )
    try:
        return Client(cluster), cluster
    except BaseException:
        cluster.close()
        raise


def _keep_traceback(summary: dict[str, Any], out_dir: Path) -> dict[str, Any]:
    """Move an internal error's traceback from the summary into ``OUTDIR/logs/<id>.log``."""
    text = summary.pop("traceback", None)
    if text:
        logs = out_dir / LOGS_DIR
        logs.mkdir(exist_ok=True)
        log = logs / f"{summary['id']}.log"
        log.write_text(str(text), encoding="utf-8")
        summary["reason"] += f" (traceback in {LOGS_DIR}/{log.name})"
    return summary


def _sweep_partials(out_dir: Path, cases: Sequence[CaseEntry]) -> None:
    """Remove half-written case folders a stopped worker left (``run_report`` writes into a
    hidden ``.<id>.partial-*`` sibling and renames it); put back a replaced folder whose
    replacement never arrived (``.<id>.old-*``)."""
    for entry in cases:
        pattern = re.compile(rf"\.{re.escape(entry.id)}\.(partial|old)-[0-9a-f]+")
        for path in sorted(out_dir.glob(f".{entry.id}.*")):
            if not pattern.fullmatch(path.name) or not path.is_dir():
                continue
            if path.name.split(".")[-1].startswith("old-") and not (out_dir / entry.id).exists():
                os.replace(path, out_dir / entry.id)
            else:
                shutil.rmtree(path, ignore_errors=True)
