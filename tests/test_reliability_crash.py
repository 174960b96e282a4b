"""Crash moments: kill -9 at seeded moments spread over a real run, resume, lose nothing and
end with the noise figures of an uninterrupted run of the same seed; and the two moments that
used to leave the user stuck (killed before the run existed, killed while the outputs of a
complete run were written).

Resumed points are compared with the uninterrupted run within z * sqrt(u^2 + u_ref^2), z the
standard normal quantile for a 1e-4 false-alarm rate over the points (scipy.stats.norm; the
two runs' measurement parts are independent, JCGM 100:2008 §5.1 for the sum in quadrature)."""

from __future__ import annotations

import os

import pytest
from _crash import Timeline, compare_with_reference, crash_and_resume, reference_run, write_plan
from scipy import stats

from noisebench.frontends import cli

CI_KILLS = 4  # per seed; NOISEBENCH_CRASH_KILLS raises it for a nightly-size run
POINTS = 12
FAMILY_FALSE_ALARM = 1e-4


def _cli(capsys, *argv) -> tuple[int, str, str]:
    code = cli.main([str(a) for a in argv])
    captured = capsys.readouterr()
    return code, captured.out, captured.err


@pytest.fixture(scope="module")
def reference(tmp_path_factory) -> Timeline:
    """The crash plan run once without interruption: kill moments and expected results."""
    return reference_run(tmp_path_factory.mktemp("reference"), points=POINTS)


@pytest.mark.parametrize("seed", [12])  # one seed in CI: each process lives up to D
def test_kill9_at_random_moments_then_resume_loses_nothing(tmp_path, seed, reference):
    kills = int(os.environ.get("NOISEBENCH_CRASH_KILLS", CI_KILLS))
    report = crash_and_resume(tmp_path, kills=kills, seed=seed, points=POINTS, timeline=reference)
    assert "hang" not in report.kills, report.kills
    assert report.finished, (report.kills, report.exits, report.last_error)
    assert report.status == "complete"
    assert report.points_lost == 0 and report.points_duplicated == 0, report
    assert report.torn_lines == 0  # resume cut any torn line before appending
    assert len(report.freqs_hz) == POINTS
    assert report.report_written and report.lock_released
    # the moments are spread over the run's phases (before: most kills landed at start-up)
    assert len(set(report.phases) - {"finished", "hang"}) >= 3, report.kills

    # the final noise figures against the uninterrupted run of the same seed (_crash docstring)
    agreements = compare_with_reference(report, reference.folder)
    assert len(agreements) == POINTS
    # the first kill waits for points: some come from the first process, some from resumes
    assert any(a.from_starter for a in agreements) and not all(a.from_starter for a in agreements)
    z_limit = stats.norm.isf(FAMILY_FALSE_ALARM / (2 * POINTS))  # normal quantile, scipy
    for a in agreements:
        if a.from_starter:  # journalled before the first kill: the same draws, identical
            assert (a.nf_db, a.u_nf_db) == (a.nf_ref_db, a.u_ref_db), a
        else:  # measured by a resumed process: other draws of the same bench
            assert abs(a.z) < z_limit, (a, report.kills)


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
