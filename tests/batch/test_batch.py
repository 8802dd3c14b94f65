"""``sigreport batch`` on a local Dask cluster of two worker processes, against serial ``report``
runs of the same cases: identical findings, a broken case reported without stopping the others
(exit 3), the known interval change of the growth case recovered, a clean stop on Ctrl-C."""

from __future__ import annotations

import csv
import json
import os
import shutil
import subprocess
from dataclasses import replace
from html.parser import HTMLParser
from pathlib import Path

import jsonschema
import pytest
from typer.testing import CliRunner

from sigreport.batch import load_worklist, run_batch
from sigreport.cli import app
from sigreport.errors import InputError
from sigreport.pipeline import run_report

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def batch_run(board, tmp_path_factory):
    out = tmp_path_factory.mktemp("batch") / "out"
    result = CliRunner().invoke(
        app, ["batch", str(board.worklist), "--out", str(out), "--workers", "2"]
    )
    return result, out


@pytest.fixture(scope="module")
def serial(board, tmp_path_factory):
    """Each case run on its own by ``run_report`` in this process: findings, or the error."""
    out = tmp_path_factory.mktemp("serial")
    runs: dict[str, dict | InputError] = {}
    for entry in load_worklist(board.worklist).cases:
        try:
            runs[entry.id] = run_report(
                entry.case,
                out / entry.id,
                study_dir=entry.study,
                prior_study=entry.prior_study,
                prior_case=entry.prior_case,
            ).findings
        except InputError as exc:
            runs[entry.id] = exc
    return runs, out


def _summary(out: Path) -> dict[str, dict]:
    with (out / "summary.csv").open(newline="", encoding="utf-8") as handle:
        return {row["id"]: row for row in csv.DictReader(handle)}


def _without_time(findings: dict) -> dict:
    return {k: v for k, v in findings.items() if k != "generated"}


def test_a_broken_case_fails_alone_with_exit_3(batch_run, board, serial):
    result, out = batch_run
    assert result.exit_code == 3, result.output
    rows = _summary(out)
    assert list(rows) == list(board.ids)  # worklist order
    assert {k: r["status"] for k, r in rows.items()} == {
        "growth": "done",
        "cyst": "done",
        "broken": "failed",
        "cyst-still": "done",
    }
    # The reason is the one `report` gives for that case file.
    runs, _ = serial
    assert isinstance(runs["broken"], InputError)
    assert rows["broken"]["reason"] == str(runs["broken"])
    assert "radius_mm" in rows["broken"]["reason"]
    assert f"failed broken: {runs['broken']}" in " ".join(result.output.split())
    assert not (out / "broken").exists()
    # Nothing half-written: every entry of OUTDIR is a complete case folder or the sheet.
    assert sorted(p.name for p in out.iterdir()) == sorted(
        ["growth", "cyst", "cyst-still", "index.html", "summary.csv"]
    )
    for case_id in ("growth", "cyst", "cyst-still"):
        for name in ("findings.json", "table.csv", "report.html", "report.txt", "sr.dcm"):
            assert (out / case_id / name).is_file()


def test_findings_are_identical_to_serial_report_runs(batch_run, serial):
    _, out = batch_run
    runs, serial_out = serial
    for case_id in ("growth", "cyst", "cyst-still"):
        written = json.loads((out / case_id / "findings.json").read_text(encoding="utf-8"))
        alone = json.loads((serial_out / case_id / "findings.json").read_text(encoding="utf-8"))
        assert _without_time(written) == _without_time(alone), case_id
        assert (out / case_id / "table.csv").read_bytes() == (
            serial_out / case_id / "table.csv"
        ).read_bytes()


def test_the_known_interval_change_is_recovered(batch_run, board):
    _, out = batch_run
    findings = json.loads((out / "growth" / "findings.json").read_text(encoding="utf-8"))
    lesion = next(x for x in findings["lesions"] if x["id"] == "L1")
    change = lesion["change"]
    before, now = board.truth("growth-prior"), board.truth("growth")
    # Truth: the outlines' voxels on the 1 mm model grid (sphere radius 6.0 -> 7.0 mm).
    true_percent = 100.0 * (now["rois"]["L1"]["n_voxels"] / before["rois"]["L1"]["n_voxels"] - 1)
    assert change["status"] == "matched"
    assert change["interval_days"] == 183  # 2026-06-03 -> 2026-12-03
    assert change["volume_change_percent"] == pytest.approx(true_percent, rel=0.10)
    assert lesion["volume_ml"] == pytest.approx(now["rois"]["L1"]["n_voxels"] / 1000, rel=0.10)
    # The tumour started to enhance: gadolinium reaches "enhancing tumour", not "solid tumour".
    true_pp = now["rois"]["L1"]["enhancement_percent"] - before["rois"]["L1"]["enhancement_percent"]
    assert true_pp > 0 and change["enhancement_change_pp"] > 0
    assert change["enhancing_before"] is False and lesion["enhancement"]["enhancing"] is True
    assert set(change["ratio_change"]) == {"T1", "T2", "T1POST"}
    schema = json.loads((Path(__file__).parents[2] / "docs" / "findings.schema.json").read_text())
    jsonschema.validate(findings, schema)
    assert findings["prior"]["not_seen"] == []
    text = " ".join((out / "growth" / "report.txt").read_text(encoding="utf-8").split())
    assert "Since the prior study of 2026-06-03 (183 days): larger by" in text
    assert "newly enhancing" in text
    rows = _summary(out)
    assert "newly enhancing" in rows["growth"]["change"]
    assert rows["cyst"]["change"] == ""


class _Links(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.links: list[str] = []
        self.tags: list[str] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        if tag == "a":
            self.links.append(dict(attrs)["href"])


def test_the_board_sheet_links_each_finished_case(batch_run):
    _, out = batch_run
    html = (out / "index.html").read_text(encoding="utf-8")
    page = _Links()
    page.feed(html)
    assert "script" not in page.tags
    assert page.links == ["growth/report.html", "cyst/report.html", "cyst-still/report.html"]
    for link in page.links:
        assert (out / link).is_file()  # relative links resolve inside OUTDIR
    # PatientName (PN, PS3.5 6.2: family^given) shown as "FAMILY, Given".
    assert "TEST, GROWTH" in html and "TEST, TINY" in html
    assert "radius_mm" in html  # the broken case's reason


@pytest.mark.browser
def test_the_board_sheet_renders_in_headless_chromium(batch_run, tmp_path):
    binary = shutil.which("chromium") or shutil.which("chromium-browser")
    if binary is None:
        if os.environ.get("CI"):
            pytest.fail("chromium is required when CI is set")
        pytest.skip("headless Chromium (Debian package chromium) is not installed")
    _, out = batch_run
    cmd = [
        binary, "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
        "--disable-component-update", "--disable-sync", "--no-first-run",
        f"--user-data-dir={tmp_path / 'profile'}", "--dump-dom", (out / "index.html").as_uri(),
    ]  # fmt: skip
    dom = subprocess.run(cmd, capture_output=True, text=True, timeout=120, check=False).stdout
    # The browser's own parse of the page: one row per case, the finished ones linked.
    assert dom.count('<tr class="') == 4
    assert dom.count('href="growth/report.html"') == 1
    assert "Test board" in dom


def test_ctrl_c_cancels_pending_cases_and_leaves_no_partial_folder(board, tmp_path):
    full = load_worklist(board.worklist)
    # The quick cases only, two of them after the first to be cancelled.
    worklist = replace(full, cases=tuple(c for c in full.cases if c.id != "growth"))

    def interrupt(summary: dict) -> None:
        raise KeyboardInterrupt  # as if Ctrl-C arrived while waiting for the next case

    result = run_batch(worklist, tmp_path / "out", workers=1, on_result=interrupt)
    assert result.interrupted
    statuses = [c["status"] for c in result.cases]
    assert statuses.count("cancelled") == 2  # one result arrived, then the stop
    assert (tmp_path / "out" / "index.html").is_file()
    for path in (tmp_path / "out").iterdir():
        assert not path.name.startswith("."), path  # no half-written case folder
        if path.is_dir():  # any case folder there is complete
            assert (path / "findings.json").is_file() and (path / "sr.dcm").is_file()


def test_an_existing_scheduler_runs_the_cases(board, tmp_path):
    from distributed import LocalCluster

    # A scheduler the command did not start (here in this process; on a cluster, another
    # machine): the command only connects to it.
    full = load_worklist(board.worklist)
    worklist = tmp_path / "two.toml"
    worklist.write_text(
        "".join(
            f'[[case]]\nid = "{c.id}"\nstudy = {json.dumps(str(c.study))}\n'
            f"case = {json.dumps(str(c.case))}\n"
            for c in full.cases
            if c.id in ("cyst", "broken")
        )
    )
    with LocalCluster(
        n_workers=1, threads_per_worker=1, processes=False, dashboard_address=None
    ) as cluster:
        result = CliRunner().invoke(
            app,
            ["batch", str(worklist), "--out", str(tmp_path / "out"),
             "--scheduler", cluster.scheduler_address],
        )  # fmt: skip
    assert result.exit_code == 3, result.output
    rows = _summary(tmp_path / "out")
    assert rows["cyst"]["status"] == "done" and rows["broken"]["status"] == "failed"
    assert (tmp_path / "out" / "cyst" / "findings.json").is_file()


def test_an_unreachable_scheduler_is_an_input_error(board, tmp_path):
    # Port 9 (discard) is closed on the test machine: nothing listens there.
    result = CliRunner().invoke(
        app,
        ["batch", str(board.worklist), "--out", str(tmp_path / "out"),
         "--scheduler", "tcp://127.0.0.1:9"],
    )  # fmt: skip
    assert result.exit_code == 2, result.output
    assert "--scheduler tcp://127.0.0.1:9: cannot connect" in " ".join(result.output.split())


def test_report_prior_options_and_errors(board, tmp_path):
    cyst = board.studies["cyst"]
    result = CliRunner().invoke(
        app,
        ["report", str(cyst.study_dir), "--case", str(cyst.case_path),
         "--out", str(tmp_path / "a"), "--prior", str(cyst.study_dir)],
    )  # fmt: skip
    assert result.exit_code == 2
    assert "--prior needs --prior-case" in result.output
    # A problem with the prior names it as such, and nothing is written.
    broken = board.root / "broken.toml"
    with pytest.raises(InputError, match=r"^prior study: broken\.toml: roi\[1\] \(L1\): radius_mm"):
        run_report(
            cyst.case_path,
            tmp_path / "b",
            prior_study=cyst.study_dir,
            prior_case=broken,
        )
    assert not (tmp_path / "b").exists()
