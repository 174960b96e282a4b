"""Kill -9 a real ``noisebench run`` at seeded random moments, resume until it completes, and
check that nothing was lost.

A moment is chosen from the run's own progress, never from a wall-clock guess (which a loaded
machine would turn into a different moment every time): right after the start (before the run
folder exists), after the k-th journalled point plus a seeded random delay (mid-point,
mid-calibration, mid-write), or as soon as ``run.json`` says complete (while results, plots and
report are written). After each kill the harness resumes the run (or starts it, when no run was
started) and kills again, up to ``kills`` times; then it lets it finish. Used by
``tests/test_reliability_crash.py`` and ``scripts/bench_reliability.py``.
"""

from __future__ import annotations

import json
import os
import random
import signal
import subprocess
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path

PLAN = """\
method = "y_factor"
[dut]
id = "CRASH-TEST"
[bench]
analyzer = {{ resource = "sim://demo-lna?seed={seed}", compression_dbm = -3.0 }}
[acquisition]
attenuation_db = 0
target_u_nf_db = 0.1
time_limit_s = 20
[[sweep.segments]]
start_hz = 1e9
stop_hz = 3.2e9
points = {points}
[corrections]
input_loss = 0.3
[expect]
dut_gain_db = 20.0
[output]
plots = {plots}
"""
STEP_TIMEOUT_S = 600.0  # one run or resume on a loaded two-core machine takes a few seconds
_CLI = "import sys; from noisebench.frontends.cli import main; sys.exit(main())"


@dataclass
class CrashReport:
    points_expected: int
    kills: list[str] = field(default_factory=list)
    exits: list[int] = field(default_factory=list)
    points_lost: int = 0
    points_duplicated: int = 0
    torn_lines: int = 0
    status: str = ""
    report_written: bool = False
    lock_released: bool = False
    freqs_hz: list[float] = field(default_factory=list)
    last_error: str = ""
    finished: bool = False


def write_plan(folder: Path, *, points: int = 12, seed: int = 3, plots: bool = False) -> Path:
    path = folder / "crash_plan.toml"
    path.write_text(
        PLAN.format(points=points, seed=seed, plots="true" if plots else "false"), encoding="utf-8"
    )
    return path


def _journal_points(folder: Path) -> int:
    try:
        return (folder / "points.jsonl").read_bytes().count(b'{"kind":"point"')
    except OSError:
        return 0


def _is_complete(folder: Path) -> bool:
    try:
        return json.loads((folder / "run.json").read_text(encoding="utf-8"))["status"] == "complete"
    except (OSError, ValueError, KeyError):
        return False


def _start(plan: Path, folder: Path) -> subprocess.Popen:
    started = (folder / "run.json").exists()
    argv = ["run", str(plan), "--resume" if started else "--out", str(folder)]
    return subprocess.Popen(
        [sys.executable, "-c", _CLI, "-q", *argv],
        stdout=subprocess.DEVNULL,
        stderr=subprocess.PIPE,
        env={**os.environ, "PYTHONUNBUFFERED": "1"},
    )


def _kill_at(proc: subprocess.Popen, folder: Path, moment: str, after: int, delay_s: float) -> str:
    """Wait for ``moment`` (bounded), SIGKILL; returns what happened."""
    deadline = time.monotonic() + STEP_TIMEOUT_S
    reached_at: float | None = time.monotonic() if moment == "start" else None
    while proc.poll() is None and time.monotonic() < deadline:
        if reached_at is None and (
            (moment == "point" and _journal_points(folder) >= after)
            or (moment == "complete" and _is_complete(folder))
        ):
            reached_at = time.monotonic()
        if reached_at is not None and time.monotonic() >= reached_at + delay_s:
            proc.send_signal(signal.SIGKILL)
            proc.wait(timeout=60)
            return f"killed at {moment}{f' {after}' if moment == 'point' else ''}+{delay_s:.2f}s"
        time.sleep(0.005)
    if proc.poll() is None:  # bounded: never leave a child behind
        proc.kill()
        proc.wait(timeout=60)
        return "hang"
    return f"finished before {moment} (exit {proc.returncode})"


def crash_and_resume(work: Path, *, kills: int, seed: int, points: int = 12) -> CrashReport:
    """Run the plan under ``work/run`` with ``kills`` SIGKILLs at seeded moments, then finish."""
    from noisebench.results.store import LOCK_FILE, _FolderLock

    rng = random.Random(seed)
    plan = write_plan(work, points=points)
    folder = work / "run"
    report = CrashReport(points_expected=points)
    for kill in range(kills):
        done = _journal_points(folder)
        moment = rng.choice(["start", "point", "point", "point", "point"])
        if kill == kills - 1 and rng.random() < 0.5:
            moment = "complete"  # while results, plots and report are written
        after = done + rng.randint(1, max(1, (points - done) // 2))  # progress each time
        delay_s = rng.choice([0.0, rng.uniform(0, 0.08)])  # mid-point or mid-write
        if moment == "start":
            delay_s = rng.uniform(0, 1.5)  # before the folder exists, or during calibration
        if _is_complete(folder) or done >= points - 1:
            moment = "start"  # nothing is left to reach; kill a resume that finishes outputs
        proc = _start(plan, folder)
        report.kills.append(_kill_at(proc, folder, moment, after, delay_s))
        if proc.stderr is not None:
            proc.stderr.close()
    for _ in range(3):  # bounded: finish the run (a complete run needs at most one more call)
        proc = _start(plan, folder)
        try:
            _, err = proc.communicate(timeout=STEP_TIMEOUT_S)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.communicate(timeout=60)
            report.kills.append("hang")
            break
        report.exits.append(proc.returncode)
        report.last_error = err.decode("utf-8", "replace").strip()[-500:]
        # exit 0, or the run had already finished with all its outputs during the kill phase
        if proc.returncode == 0 or b"already complete with all its outputs" in err:
            report.finished = True
            break
    _check(folder, report)
    report.lock_released = not _FolderLock.is_held(folder / LOCK_FILE)
    return report


def _check(folder: Path, report: CrashReport) -> None:
    data = (folder / "points.jsonl").read_bytes() if (folder / "points.jsonl").exists() else b""
    freqs: list[float] = []
    for line in data.split(b"\n")[:-1]:
        try:
            entry = json.loads(line)
        except ValueError:
            report.torn_lines += 1
            continue
        if entry.get("kind") == "point":
            freqs.append(float(entry["point"]["freq_hz"]))
    if data and not data.endswith(b"\n"):
        report.torn_lines += 1
    report.freqs_hz = sorted(set(freqs))
    report.points_duplicated = len(freqs) - len(set(freqs))
    report.points_lost = report.points_expected - len(set(freqs))
    try:
        report.status = json.loads((folder / "run.json").read_text(encoding="utf-8"))["status"]
    except (OSError, ValueError, KeyError):
        report.status = "unreadable"
    report.report_written = (folder / "report.html").is_file()
