"""The ``sigreport`` command (interface.md, Commands). Thin: each command parses its arguments,
calls one library function and prints.

Exit codes: 0 done (warnings are in ``qc``); 2 unusable input (one message on stderr, no
traceback); 1 a bug (the traceback is kept in OUTDIR/error.log).
"""

from __future__ import annotations

import json
import shutil
import sys
import traceback
from pathlib import Path
from typing import Annotated

import typer
from rich.console import Console
from rich.markup import escape

from sigreport import __version__
from sigreport.errors import InputError

app = typer.Typer(
    add_completion=False,
    no_args_is_help=True,
    help="Signal-behaviour tables and draft reports for lesions on a DICOM MR study.",
)
err = Console(stderr=True, highlight=False)

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


def _fail(message: str) -> typer.Exit:
    err.print(f"[bold red]sigreport:[/] {escape(message)}", markup=True, soft_wrap=True)
    return typer.Exit(2)


def _bug(out_dir: Path | None) -> typer.Exit:
    """An unexpected error: keep the traceback where the user can send it."""
    text = traceback.format_exc()
    kept = None
    if out_dir is not None and not out_dir.exists():
        try:
            out_dir.mkdir(parents=True)
            (out_dir / "error.log").write_text(f"sigreport {__version__}\n{text}", encoding="utf-8")
            kept = out_dir / "error.log"
        except OSError:
            kept = None
    err.print(f"sigreport: internal error: {sys.exc_info()[1]!r}", markup=False)
    err.print(f"the traceback is in {kept}" if kept else text, markup=False)
    return typer.Exit(1)


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


@app.command()
def scan(
    study_dir: Annotated[
        Path, typer.Argument(help="Folder holding the study (searched recursively).")
    ],
    as_json: Annotated[bool, typer.Option("--json", help="Print the series list as JSON.")] = False,
    site_lexicon: LexiconOption = None,
    no_cache: NoCacheOption = False,
) -> None:
    """Index every DICOM file under STUDY_DIR, group into series, infer each series' role."""
    from sigreport.ingest import index_study, print_scan_table, scan_to_json

    try:
        with _progress_bar(enabled=not as_json) as progress:
            index = index_study(
                study_dir, progress=progress, site_lexicon=site_lexicon, use_cache=not no_cache
            )
    except InputError as exc:
        raise _fail(str(exc)) from None
    if as_json:
        typer.echo(json.dumps(scan_to_json(index), indent=2))
    else:
        print_scan_table(index, Console(highlight=False))
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
    no_cache: NoCacheOption = False,
) -> None:
    """Place the ROIs, carry them to every series, measure, characterize, write OUTDIR."""
    from sigreport.pipeline import run_report

    try:
        run = run_report(
            case,
            out,
            study_dir=study_dir,
            register=register,
            force=force,
            use_cache=not no_cache,
            site_lexicon=site_lexicon,
            progress=_status_printer(),
        )
    except InputError as exc:
        raise _fail(str(exc)) from None
    except Exception:
        raise _bug(out) from None
    _print_summary(run.findings)
    typer.echo(str(run.report_html))


@app.command()
def demo(
    out: Annotated[
        Path, typer.Option("--out", help="Where to build the demo study and its report.")
    ] = Path("sigreport-demo"),
    scenario: Annotated[
        str,
        typer.Option(
            "--scenario", help="A bundled scenario (neuro, orbit) or a scenario TOML file."
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
    from sigreport.synth import generate_study

    if out.exists() and (not out.is_dir() or any(out.iterdir())):
        if not force:
            raise _fail(f"{out} exists and is not empty; use --force to replace it")
        if out.is_dir():
            shutil.rmtree(out)
        else:
            out.unlink()
    say = _status_printer()
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
    except InputError as exc:
        raise _fail(str(exc)) from None
    except Exception:
        raise _bug(out / "report") from None
    _print_summary(run.findings)
    typer.echo(str(run.report_html))


# --------------------------------------------------------------------------------------------


def _status_printer():  # type: ignore[no-untyped-def]
    def say(message: str) -> None:
        err.print(f"[dim]…[/] {escape(message)}", markup=True, highlight=False)

    return say


class _progress_bar:
    """A progress bar on stderr for long indexing runs (silent when ``enabled`` is False)."""

    def __init__(self, *, enabled: bool) -> None:
        self.enabled = enabled and err.is_terminal
        self._progress = None
        self._task = None

    def __enter__(self):  # type: ignore[no-untyped-def]
        if not self.enabled:
            return None
        from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn

        self._progress = Progress(
            TextColumn("indexing"), BarColumn(), MofNCompleteColumn(), console=err, transient=True
        )
        self._progress.start()
        self._task = self._progress.add_task("index", total=None)

        def update(done: int, total: int) -> None:
            self._progress.update(self._task, completed=done, total=total)  # type: ignore[union-attr,attr-defined]

        return update

    def __exit__(self, *exc: object) -> None:
        if self._progress is not None:
            self._progress.stop()


def _print_summary(findings: dict) -> None:  # type: ignore[type-arg]
    warnings = [q for q in findings.get("qc", []) if q.get("level") in ("warning", "error")]
    err.print(
        f"{len(findings.get('lesions', []))} lesion(s), {len(warnings)} QC warning(s)",
        highlight=False,
    )
    for note in warnings:
        err.print(
            f"  [yellow]warning[/] {escape(note['code'])}: {escape(note['message'])}",
            markup=True,
            highlight=False,
        )
    for caution in findings.get("cautions", []):
        err.print(f"  [bold]caution[/] {escape(caution)}", markup=True, highlight=False)


def main() -> None:
    """Console-script entry point."""
    app()


if __name__ == "__main__":
    main()
