"""Crash moments: kill -9 at seeded random moments of a real run, resume, lose nothing; and the
two moments that used to leave the user stuck (killed before the run existed, killed while the
outputs of a complete run were written)."""

from __future__ import annotations

import os

import pytest
from _crash import crash_and_resume, write_plan

from noisebench.frontends import cli

CI_KILLS = 4  # per seed; NOISEBENCH_CRASH_KILLS raises it for a nightly-size run


def _cli(capsys, *argv) -> tuple[int, str, str]:
    code = cli.main([str(a) for a in argv])
    captured = capsys.readouterr()
    return code, captured.out, captured.err


@pytest.mark.parametrize("seed", [11, 12])
def test_kill9_at_random_moments_then_resume_loses_nothing(tmp_path, seed):
    kills = int(os.environ.get("NOISEBENCH_CRASH_KILLS", CI_KILLS))
    report = crash_and_resume(tmp_path, kills=kills, seed=seed, points=12)
    assert "hang" not in report.kills, report.kills
    assert report.finished, (report.kills, report.exits, report.last_error)
    assert report.status == "complete"
    assert report.points_lost == 0 and report.points_duplicated == 0, report
    assert report.torn_lines == 0  # resume cut any torn line before appending
    assert len(report.freqs_hz) == 12
    assert report.report_written and report.lock_released


def test_resume_where_no_run_was_started_says_so_and_how_to_start(tmp_path, capsys):
    plan = write_plan(tmp_path)
    for folder in (tmp_path / "never-created", tmp_path / "empty"):
        if folder.name == "empty":
            folder.mkdir()
        code, _, err = _cli(capsys, "run", plan, "--resume", folder)
        assert code == cli.EXIT_INPUT
        assert f"no run was started in {folder}" in err
        assert f"noisebench run {plan} --out {folder}" in err
        assert len(err.strip().splitlines()) == 1


def test_resume_of_a_complete_run_writes_the_outputs_a_kill_left_missing(tmp_path, capsys):
    plan = write_plan(tmp_path, points=3, plots=True)
    folder = tmp_path / "run"
    assert _cli(capsys, "-q", "run", plan, "--out", folder)[0] == 0
    report = (folder / "report.html").read_text(encoding="utf-8")
    # the moment after run.json said "complete", before the CSV, plots and report were written
    (folder / "report.html").unlink()
    (folder / "results.csv").unlink()
    for png in (folder / "plots").glob("*.png"):
        png.unlink()
    code, out, err = _cli(capsys, "-q", "run", plan, "--resume", folder)
    assert code == cli.EXIT_OK, err
    assert "was already complete; wrote what was missing" in out
    assert "results.csv, report.html, plots/" in out
    assert (folder / "results.csv").is_file() and any((folder / "plots").glob("*.png"))
    rewritten = (folder / "report.html").read_text(encoding="utf-8")
    assert rewritten.count("<tr") == report.count("<tr")  # same points, same tables

    # with every output there, resume says so and points to render
    code, _, err = _cli(capsys, "-q", "run", plan, "--resume", folder)
    assert code == cli.EXIT_INPUT
    assert "already complete with all its outputs" in err and "noisebench render" in err
