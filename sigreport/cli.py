"""The ``sigreport`` command (docs/usage.md, Commands). Thin: each command parses its arguments,
calls one library function and prints.

Exit codes: 0 done (warnings are in ``qc``); 2 unusable input (one message on stderr, no
traceback); 1 a bug (the traceback is kept in OUTDIR/error.log).
"""

from __future__ import annotations

import json
import sys
import traceback
from pathlib import Path
from typing import Annotated, Any

import typer
from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, TextColumn
from rich.progress import Progress as RichProgress
from rich.text import Text

from sigreport import __version__
from sigreport.errors import InputError
from sigreport.memory import use_one_heap
from sigreport.model import Progress
from sigreport.safetext import terminal_text

app = typer.Typer(
    add_completion=False,
    no_args_is_help=True,
    help="Signal-behaviour tables and draft reports for lesions on a DICOM MR study.",
)
# Nothing printed is ever read as rich markup: values are data (see _say).
err = Console(stderr=True, highlight=False, markup=False)

NoCacheOption = Annotated[
    bool,
    typer.Option(
        "--no-cache",
        help="Read every header again, neither using nor updating the header index cache "
        "(kept in the user's cache directory).",
    ),
]

LexiconOption = Annotated[
    Path | None,
    typer.Option(
        "--lexicon",
        help="A site lexicon folder (wording, thresholds, role bands) replacing bundled files.",
        envvar="SIGREPORT_LEXICON",
        show_default=False,
    ),
]


def _say(*parts: str | tuple[str, str], end: str = "\n") -> None:
    """Print on stderr: plain strings are data (control characters stripped, never read as
    markup), ``(text, style)`` pairs are the tool's own styled words."""
    line = Text.assemble(
        *(part if isinstance(part, tuple) else terminal_text(part) for part in parts)
    )
    err.print(line, soft_wrap=True, highlight=False, end=end)


DicomwebOption = Annotated[
    str | None,
    typer.Option(
        "--dicomweb",
        help="Read the study from this DICOMweb service instead of a folder (credentials from "
        "SIGREPORT_DICOMWEB_USER / SIGREPORT_DICOMWEB_PASSWORD or SIGREPORT_DICOMWEB_TOKEN_FILE).",
        show_default=False,
    ),
]
StudyUidOption = Annotated[
    str | None,
    typer.Option(
        "--study-uid", help="The StudyInstanceUID to read with --dicomweb.", show_default=False
    ),
]


def _source(study_dir: Path | None, dicomweb: str | None, study_uid: str | None) -> None:
    """A folder or an archive, not both; --study-uid goes with --dicomweb."""
    if dicomweb is None:
        if study_uid is not None:
            raise _fail("--study-uid needs --dicomweb URL")
        return
    if study_dir is not None:
        raise _fail("give STUDY_DIR or --dicomweb URL, not both")
    if not study_uid:
        raise _fail("--dicomweb needs --study-uid UID")


def _fail(message: str) -> typer.Exit:
    _say(("sigreport:", "bold red"), " ", message)
    return typer.Exit(2)


def _bug(out_dir: Path | None) -> typer.Exit:
    """An unexpected error: keep the traceback where the user can send it. Never raises."""
    text = f"sigreport {__version__}\n{traceback.format_exc()}"
    try:
        kept, problems = _keep_traceback(out_dir, text)
    except Exception as exc:  # noqa: BLE001 - the handler of last resort must not fail
        kept, problems = None, [repr(exc)]
    try:
        _say(f"sigreport: internal error: {sys.exc_info()[1]!r}")
        if kept is not None:
            _say(f"the traceback is in {kept}")
        else:
            _say(f"could not write error.log ({'; '.join(problems)}); the traceback:\n{text}")
    except Exception:  # noqa: BLE001
        sys.stderr.write(text)
    return typer.Exit(1)


def _keep_traceback(out_dir: Path | None, text: str) -> tuple[Path | None, list[str]]:
    """Write ``text`` to OUTDIR/error.log when OUTDIR does not exist yet (the folder is marked as
    the tool's own); else beside OUTDIR as ``<name>.error.log`` (never over an existing file);
    else in the system's temporary folder. Returns the file, or None and why each place failed."""
    import tempfile

    from sigreport.report.outdir import write_mark

    problems: list[str] = []
    if out_dir is not None:
        try:
            out_dir.mkdir(parents=True)
        except OSError as exc:
            problems.append(f"{_short(out_dir)}: {exc.strerror or exc}")
        else:
            try:
                log = out_dir / "error.log"
                log.write_text(text, encoding="utf-8")
                write_mark(out_dir, kind="error")
                return log, problems
            except OSError as exc:
                problems.append(f"{_short(out_dir)}: {exc.strerror or exc}")
        stem = out_dir.name[:100] or "sigreport"
        for n in range(1, 10):
            log = out_dir.parent / (f"{stem}.error.log" if n == 1 else f"{stem}.error-{n}.log")
            try:
                with log.open("x", encoding="utf-8") as handle:
                    handle.write(text)
                return log, problems
            except FileExistsError:
                continue
            except OSError as exc:
                problems.append(f"{_short(log)}: {exc.strerror or exc}")
                break
    try:
        handle_fd, name = tempfile.mkstemp(prefix="sigreport-error-", suffix=".log")
        with open(handle_fd, "w", encoding="utf-8") as handle:
            handle.write(text)
        return Path(name), problems
    except OSError as exc:
        problems.append(f"temporary folder: {exc.strerror or exc}")
    return None, problems


def _short(path: Path) -> str:
    from sigreport.report.outdir import shown

    return shown(path, 80)


def _version(value: bool) -> None:
    if value:
        typer.echo(f"sigreport {__version__}")
        raise typer.Exit()


@app.callback()
def _root(
    version: Annotated[
        bool, typer.Option("--version", callback=_version, is_eager=True, help="Print the version.")
    ] = False,
) -> None:
    """Signal-behaviour tables and draft reports for lesions on a DICOM MR study."""
    # One allocator heap for the registration threads too: freed memory is reused, not kept
    # per thread (sigreport.memory; docs/performance.md, Memory).
    use_one_heap()


@app.command()
def scan(
    study_dir: Annotated[
        Path | None,
        typer.Argument(help="Folder holding the study (searched recursively).", show_default=False),
    ] = None,
    as_json: Annotated[bool, typer.Option("--json", help="Print the series list as JSON.")] = False,
    site_lexicon: LexiconOption = None,
    dicomweb: DicomwebOption = None,
    study_uid: StudyUidOption = None,
    no_cache: NoCacheOption = False,
) -> None:
    """Index every DICOM file under STUDY_DIR, group into series, infer each series' role."""
    from sigreport.ingest import index_study, print_scan_table, scan_to_json

    _source(study_dir, dicomweb, study_uid)
    if dicomweb is not None:
        _scan_archive(dicomweb, str(study_uid), as_json=as_json, site_lexicon=site_lexicon)
        return
    if study_dir is None:
        raise _fail("give STUDY_DIR, or --dicomweb URL --study-uid UID")
    try:
        with ProgressDisplay(quiet=as_json) as progress:
            index = index_study(
                study_dir, progress=progress, site_lexicon=site_lexicon, use_cache=not no_cache
            )
    except InputError as exc:
        raise _fail(str(exc)) from None
    if as_json:
        typer.echo(json.dumps(scan_to_json(index), indent=2))
    else:
        print_scan_table(index, Console(highlight=False, markup=False))
    if not index.stacks:
        raise _fail(f"no usable MR series under {study_dir}")


@app.command()
def report(
    study_dir: Annotated[
        Path | None, typer.Argument(help="The study folder (default: the case file's `study`).")
    ] = None,
    case: Annotated[Path, typer.Option("--case", help="The case file (TOML) with the ROIs.")] = ...,  # type: ignore[assignment]
    out: Annotated[Path, typer.Option("--out", help="The report folder to write.")] = ...,  # type: ignore[assignment]
    register: Annotated[
        bool | None,
        typer.Option(
            "--register/--no-register",
            help="Rigidly align every series to the anchor (default), or trust the scanner's frame of reference.",
            show_default=False,
        ),
    ] = None,
    force: Annotated[bool, typer.Option("--force", help="Replace OUTDIR if it exists.")] = False,
    site_lexicon: LexiconOption = None,
    dicomweb: DicomwebOption = None,
    study_uid: StudyUidOption = None,
    push: Annotated[
        bool, typer.Option("--push", help="With --dicomweb: store sr.dcm in the archive (STOW-RS).")
    ] = False,
    prior: Annotated[
        Path | None,
        typer.Option(
            "--prior",
            help="A prior study of the same patient: each lesion gets its interval change.",
            show_default=False,
        ),
    ] = None,
    prior_case: Annotated[
        Path | None,
        typer.Option(
            "--prior-case",
            help="The prior study's case file (lesions matched by ROI id).",
            show_default=False,
        ),
    ] = None,
    no_cache: NoCacheOption = False,
) -> None:
    """Place the ROIs, carry them to every series, measure, characterize, write OUTDIR."""
    from sigreport.pipeline import run_report

    _source(study_dir, dicomweb, study_uid)
    if push and dicomweb is None:
        raise _fail("--push needs --dicomweb URL --study-uid UID")
    if dicomweb is not None:
        # The prior study is a folder (as in a batch worklist); only the current study is read
        # from the archive.
        _report_archive(
            case,
            out,
            dicomweb,
            str(study_uid),
            register,
            force,
            site_lexicon,
            push=push,
            prior=prior,
            prior_case=prior_case,
        )
        return
    try:
        with ProgressDisplay() as progress:
            run = run_report(
                case,
                out,
                study_dir=study_dir,
                register=register,
                force=force,
                site_lexicon=site_lexicon,
                progress=progress,
                prior_study=prior,
                prior_case=prior_case,
                use_cache=not no_cache,
            )
    except InputError as exc:
        raise _fail(str(exc)) from None
    except Exception:
        raise _bug(out) from None
    _print_summary(run.findings)
    typer.echo(terminal_text(run.report_html))


@app.command()
def demo(
    out: Annotated[
        Path, typer.Option("--out", help="Where to build the demo study and its report.")
    ] = Path("sigreport-demo"),
    scenario: Annotated[
        str,
        typer.Option(
            "--scenario",
            help="A bundled scenario (neuro, orbit, diffusion, kinetics) or a scenario TOML file.",
        ),
    ] = "neuro",
    force: Annotated[bool, typer.Option("--force", help="Replace OUT if it is not empty.")] = False,
    seed: Annotated[
        int | None, typer.Option("--seed", help="Random seed (default: the scenario's).")
    ] = None,
    site_lexicon: LexiconOption = None,
) -> None:
    """Build the bundled synthetic demo study and run `report` on it; print where the report is."""
    from sigreport.pipeline import run_report
    from sigreport.report.outdir import exit_on_termination, prepare_folder, write_mark
    from sigreport.synth import generate_study

    try:
        prepare_folder(out, kind="demo", force=force)
    except InputError as exc:
        raise _fail(str(exc)) from None
    try:
        with exit_on_termination(), ProgressDisplay() as say:
            try:
                say(f"generating the {scenario} demo study in {out}")
                study = generate_study(scenario, out, seed=seed)
                run = run_report(
                    study.case_path,
                    out / "report",
                    study_dir=study.study_dir,
                    site_lexicon=site_lexicon,
                    progress=say,
                )
            finally:
                # Whatever is in the folder now was written by this run: mark it as the
                # tool's own, so that --force may replace it later.
                if out.is_dir():
                    write_mark(out, kind="demo")
    except InputError as exc:
        raise _fail(str(exc)) from None
    except Exception:
        raise _bug(out / "report") from None
    _print_summary(run.findings)
    typer.echo(terminal_text(run.report_html))


@app.command()
def export(
    report_dir: Annotated[Path, typer.Argument(help="A report folder written by `report`.")],
    out: Annotated[Path, typer.Option("--out", help="The export folder to write.")] = ...,  # type: ignore[assignment]
    deidentify: Annotated[
        bool,
        typer.Option(
            "--deidentify",
            help="Remove or replace every patient identifier, date and UID (DICOM PS3.15 Basic "
            "Application Level Confidentiality Profile on sr.dcm). Required.",
        ),
    ] = False,
    force: Annotated[bool, typer.Option("--force", help="Replace --out if it exists.")] = False,
    site_lexicon: LexiconOption = None,
) -> None:
    """Copy a report folder for teaching or an external board, de-identified."""
    from sigreport.export import export_report

    if not deidentify:
        raise _fail("export writes de-identified copies only: give --deidentify")
    try:
        with ProgressDisplay() as progress:
            done = export_report(
                report_dir, out, force=force, site_lexicon=site_lexicon, progress=progress
            )
    except InputError as exc:
        raise _fail(str(exc)) from None
    except Exception:
        raise _bug(None) from None
    typer.echo(terminal_text(str(done)))


# --------------------------------------------------------------------------------------------
# --dicomweb: the archive as source and sink (sigreport.archive)


def _scan_archive(url: str, study_uid: str, *, as_json: bool, site_lexicon: Path | None) -> None:
    from sigreport.archive import scan_archive
    from sigreport.ingest import print_scan_table, scan_to_json

    try:
        with ProgressDisplay(quiet=as_json) as progress:
            study = scan_archive(url, study_uid, site_lexicon=site_lexicon, progress=progress)
    except InputError as exc:
        raise _fail(str(exc)) from None
    if as_json:
        doc = scan_to_json(study.index)
        doc["study_dir"] = f"{study.url}/studies/{study.study_uid}"
        typer.echo(json.dumps(doc, indent=2))
    else:
        print_scan_table(study.index, Console(highlight=False, markup=False))
    if not study.index.stacks:
        raise _fail(f"no usable MR series in study {study_uid} at {url}")


def _report_archive(
    case: Path,
    out: Path,
    url: str,
    study_uid: str,
    register: bool | None,
    force: bool,
    site_lexicon: Path | None,
    *,
    push: bool,
    prior: Path | None = None,
    prior_case: Path | None = None,
) -> None:
    from sigreport.archive import report_from_archive

    try:
        with ProgressDisplay() as progress:
            done = report_from_archive(
                case,
                out,
                url=url,
                study_uid=study_uid,
                register=register,
                force=force,
                site_lexicon=site_lexicon,
                progress=progress,
                push=push,
                prior_study=prior,
                prior_case=prior_case,
            )
    except InputError as exc:
        raise _fail(str(exc)) from None
    except Exception:
        raise _bug(out) from None
    _print_summary(done.run.findings)
    if done.stored is not None:
        for line in done.stored.lines():
            typer.echo(terminal_text(f"archive: {line}"))
    typer.echo(terminal_text(str(done.run.report_html)))


@app.command()
def batch(
    worklist: Annotated[
        Path,
        typer.Argument(
            help="The worklist (TOML): one [[case]] with id, case, and study (a folder) or "
            "study_uid (and dicomweb)."
        ),
    ],
    out: Annotated[
        Path,
        typer.Option(
            "--out", help="The folder receiving every case's report, index.html and summary.csv."
        ),
    ] = ...,  # type: ignore[assignment]
    scheduler: Annotated[
        str | None,
        typer.Option(
            "--scheduler",
            help="Address of a running Dask scheduler (tcp://host:8786); default a local cluster.",
            show_default=False,
        ),
    ] = None,
    workers: Annotated[
        int | None,
        typer.Option(
            "--workers", help="Local cluster: worker processes (default: the number of cores)."
        ),
    ] = None,
    register: Annotated[
        bool | None,
        typer.Option(
            "--register/--no-register",
            help="As for report, for every case.",
            show_default=False,
        ),
    ] = None,
    force: Annotated[
        bool, typer.Option("--force", help="Replace case folders that exist.")
    ] = False,
    site_lexicon: LexiconOption = None,
    dicomweb: Annotated[
        str | None,
        typer.Option(
            "--dicomweb",
            help="The DICOMweb service of cases that give study_uid without dicomweb "
            "(credentials from SIGREPORT_DICOMWEB_USER / SIGREPORT_DICOMWEB_PASSWORD or "
            "SIGREPORT_DICOMWEB_TOKEN_FILE, in every worker's environment).",
            show_default=False,
        ),
    ] = None,
    push: Annotated[
        bool,
        typer.Option(
            "--push", help="Store the sr.dcm of each archive case in its archive (STOW-RS)."
        ),
    ] = False,
) -> None:
    """Run every case of a worklist on Dask; write OUTDIR/<id>/, index.html and summary.csv.

    Exit codes: 0 every case done, 2 the worklist is unusable, 3 some case failed (its reason is
    in summary.csv and index.html), 130 stopped by Ctrl-C (finished cases are complete).
    """
    from sigreport.batch import load_worklist, run_batch

    try:
        entries = load_worklist(worklist, dicomweb=dicomweb)
        if push and not any(e.study_uid is not None for e in entries.cases):
            raise InputError(
                "--push stores the SR of cases read from an archive; this worklist has none "
                "(give study_uid, and dicomweb or --dicomweb)"
            )
        with _batch_progress(len(entries.cases)) as (on_start, on_result):
            result = run_batch(
                entries,
                out,
                scheduler=scheduler,
                workers=workers,
                register=register,
                force=force,
                site_lexicon=site_lexicon,
                push=push,
                on_result=on_result,
                on_start=on_start,
            )
    except InputError as exc:
        raise _fail(str(exc)) from None
    except Exception:
        raise _bug(None) from None
    done = len(result.cases) - result.n_failed
    _say(f"{done} of {len(result.cases)} case(s) done")
    for case in result.cases:
        if case["status"] != "done":
            _say(f"  {case['status']} {case['id']}: {case['reason']}")
        if case.get("pushed"):
            _say(f"  archive {case['id']}: {case['pushed']}")
    typer.echo(terminal_text(str(result.index_html)))
    if result.interrupted:
        raise typer.Exit(130)
    if result.n_failed:
        raise typer.Exit(3)


# --------------------------------------------------------------------------------------------


class _batch_progress:
    """Cases done / failed: a rich progress bar on a terminal, else one line per case. Case ids
    and reasons are printed as data, never as rich markup."""

    def __init__(self, total: int) -> None:
        self.total = total
        self._progress = None
        self._task = None
        self._failed = 0

    def __enter__(self):  # type: ignore[no-untyped-def]
        if err.is_terminal:
            from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn

            self._progress = Progress(
                TextColumn("cases"),
                BarColumn(),
                MofNCompleteColumn(),
                TextColumn("{task.fields[failed]} failed", markup=False),
                TextColumn("{task.fields[last]}", markup=False),
                console=err,
            )
            self._progress.start()
            self._task = self._progress.add_task("cases", total=self.total, failed=0, last="")

        def on_start(n_workers: int) -> None:
            self._line(f"{self.total} case(s) on {n_workers} worker(s)")

        def on_result(summary: dict) -> None:  # type: ignore[type-arg]
            ok = summary["status"] == "done"
            self._failed += 0 if ok else 1
            line = f"{summary['status']} {summary['id']}" + ("" if ok else f": {summary['reason']}")
            if self._progress is not None:
                self._progress.update(  # type: ignore[attr-defined]
                    self._task,
                    advance=1,
                    failed=self._failed,
                    last=terminal_text(f"{summary['id']} {summary['status']}"),
                )
            self._line(line)

        return on_start, on_result

    def _line(self, text: str) -> None:
        console = self._progress.console if self._progress is not None else err  # type: ignore[attr-defined]
        console.print(terminal_text(text), markup=False, highlight=False, soft_wrap=True)

    def __exit__(self, *exc: object) -> None:
        if self._progress is not None:
            self._progress.stop()


class ProgressDisplay:
    """The progress of every stage on stderr, in the shape every stage reports it
    (:class:`sigreport.model.Progress`): a line per step, and on a terminal a bar for counted
    steps (indexing files, loading, registering, measuring, writing).

    Messages are shown as text, never as rich markup: they hold paths and header values
    (series descriptions), which may contain brackets. Off a terminal (a pipe, a log file) a
    counted step prints its line once, not once per item. ``quiet`` shows nothing.
    """

    def __init__(self, *, quiet: bool = False, console: Console | None = None) -> None:
        self.console = console if console is not None else err
        self.quiet = quiet
        self._bar: Any = None
        self._task: Any = None
        self._last: str | None = None

    def __enter__(self) -> Progress:
        return self

    def __exit__(self, *exc: object) -> None:
        self._stop_bar()

    def __call__(self, message: str, done: int | None = None, total: int | None = None) -> None:
        if self.quiet:
            return
        counted = done is not None and total is not None
        if counted and self.console.is_terminal:
            self._show_bar(message, done, total)
            return
        if message == self._last:
            return
        self._stop_bar()
        self._last = message
        self.console.print(
            Text.assemble(("… ", "dim"), terminal_text(message)), highlight=False, soft_wrap=True
        )

    def _show_bar(self, message: str, done: int | None, total: int | None) -> None:
        if self._bar is None:
            # markup=False: the description is a path or a header value, shown as it is.
            self._bar = RichProgress(
                TextColumn("{task.description}", markup=False),
                BarColumn(),
                MofNCompleteColumn(),
                console=self.console,
                transient=True,
            )
            self._bar.start()
            self._task = self._bar.add_task(terminal_text(message), total=total)
        self._bar.update(
            self._task, description=terminal_text(message), completed=done, total=total
        )

    def _stop_bar(self) -> None:
        if self._bar is not None:
            self._bar.stop()
            self._bar = None
            self._task = None


def _print_summary(findings: dict) -> None:  # type: ignore[type-arg]
    warnings = [q for q in findings.get("qc", []) if q.get("level") in ("warning", "error")]
    _say(f"{len(findings.get('lesions', []))} lesion(s), {len(warnings)} QC warning(s)")
    for note in warnings:
        _say("  ", ("warning", "yellow"), " ", f"{note['code']}: {note['message']}")
    for caution in findings.get("cautions", []):
        _say("  ", ("caution", "bold"), " ", str(caution))


def main() -> None:
    """Console-script entry point."""
    app()


if __name__ == "__main__":
    main()
