"""Kill -9 a real ``noisebench run`` at seeded moments spread over the run, resume until it
completes, and check that nothing was lost and that the final noise figures agree with an
uninterrupted run of the same seed.

Kill moments come from the run's measured duration. :func:`reference_run` runs the same plan
once without interruption and records its timeline: start-up (imports, plan checks, opening the
bench) until ``run.json`` is written, preparation (bench set-up, calibration) until the first
journalled point, the points until the last, the outputs (results, report) until exit. Each
kill picks a phase, waits for that phase to begin in the process being killed (its launch,
its own write of ``run.json``, its first new journalled point, ``run.json`` saying complete)
and kills after a seeded fraction of that phase's measured duration. Anchoring on the
process's own progress keeps the moment inside the phase on a loaded machine, where a bare
time after launch lands in the start-up (it takes most of ``D`` and stretches with the load).
Phases are spread over the kills: the first kill lands in the start-up of the first start
(before the run folder exists), the second at one of the first quarter of the points
(mid-point or mid-write: points follow each other within milliseconds, so its delay is at
most 10 ms; it leaves points of the first process, and points for the resumes, to compare),
the last (from four kills on) while the outputs of the complete run are written, and the
others cycle through a seeded permutation of start-up, preparation and points of resumes.
Every kill records the phase it landed in (what the folder shows at that moment). After the
kills the harness lets the run finish. Used by ``tests/test_reliability_crash.py`` and
``scripts/bench_reliability.py``.

Agreement with the uninterrupted run (:func:`compare_with_reference`): a seeded simulated run
repeats exactly (``tests/test_determinism.py``), so every point journalled by the process that
started the run equals the reference bit for bit. A resumed process re-creates the simulated
bench from its seed, so its points see other noise draws than the reference did at that
moment: they must agree within the statistics, |NF - NF_ref| <= z sqrt(u^2 + u_ref^2) with z
for a family-wise false alarm of 1e-4 over the compared points (normal quantile). The shared
parts of u (one calibration, the same ENR table) cancel in the difference, so the bound is
conservative.
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
[switching]
mode = "per_group"
[output]
plots = {plots}
"""
# group by group, the points are journalled one group at a time over the run; a sweep-level
# schedule journals most of them in one burst at the end of its last block, and a kill aimed
# at "one of the first quarter of the points" then lands after all of them (no points left
# for the resumes to measure, which the harness compares)
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
    phases: list[str] = field(default_factory=list)  # where each kill landed
    starter_freqs_hz: list[float] = field(default_factory=list)  # journalled by the first start
    points: dict[float, tuple[float, float]] = field(default_factory=dict)  # f: (nf, u) dB


@dataclass
class Timeline:
    """An uninterrupted run, seconds after launch: ``run.json`` written, first and last point
    journalled, process exit."""

    folder_s: float | None
    first_point_s: float | None
    last_point_s: float | None
    end_s: float
    exit_code: int
    folder: Path
    complete_s: float | None = None  # run.json says complete: the outputs are being written

    def phase_durations_s(self) -> dict[str, float]:
        """Seconds of each phase: start-up, preparation, points, outputs (from ``run.json``
        saying complete to the process exit)."""
        end = self.end_s
        marks = [0.0, self.folder_s, self.first_point_s, self.last_point_s]
        known = [m if m is not None else end for m in marks] + [end]
        names = ("start-up", "preparation", "points")
        out = {n: max(known[i + 1] - known[i], 0.0) for i, n in enumerate(names)}
        out["outputs"] = max(end - (self.complete_s if self.complete_s is not None else end), 0.0)
        return out


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


def _snapshot(folder: Path) -> tuple[int, int | None, bool]:
    """(journalled points, run.json modification time in ns or None, complete)."""
    try:
        mtime: int | None = (folder / "run.json").stat().st_mtime_ns
    except OSError:
        mtime = None
    return _journal_points(folder), mtime, _is_complete(folder)


def _phase(before: tuple[int, int | None, bool], now: tuple[int, int | None, bool]) -> str:
    """Where a kill landed, from what the folder showed at launch and at the kill."""
    if now[2] and not (before[2] and now[1] == before[1]):
        return "outputs"  # complete now (a resume of a complete run that did nothing: start-up)
    if now[0] > before[0]:
        return "points"
    if now[1] != before[1]:
        return "preparation"  # run.json (re)written: bench prepared, calibration, gain
    return "start-up"  # imports, plan checks, opening the bench


def _kill_at(
    proc: subprocess.Popen, folder: Path, anchor: str, delay_s: float, points_at: int = 0
) -> tuple[str, str]:
    """SIGKILL ``delay_s`` after ``anchor`` in this process (``launch``, ``folder``: it wrote
    run.json, ``point``: the journal holds ``points_at`` points, ``complete``), bounded;
    returns (what happened, phase it landed in)."""
    launched = time.monotonic()
    before = _snapshot(folder)
    deadline = launched + STEP_TIMEOUT_S
    reached_at: float | None = launched if anchor == "launch" else None
    while proc.poll() is None and time.monotonic() < deadline:
        if reached_at is None:
            now = _snapshot(folder)
            if (
                (anchor == "folder" and now[1] is not None and now[1] != before[1])
                or (anchor == "point" and now[0] >= points_at)
                or (anchor == "complete" and now[2])
            ):
                reached_at = time.monotonic()
        if reached_at is not None and time.monotonic() >= reached_at + delay_s:
            phase = _phase(before, _snapshot(folder))
            proc.send_signal(signal.SIGKILL)
            proc.wait(timeout=60)
            where = f"point {points_at}" if anchor == "point" else anchor
            return f"killed at {where}+{delay_s:.3f} s ({phase})", phase
        time.sleep(0.002)
    if proc.poll() is None:  # bounded: never leave a child behind
        proc.kill()
        proc.wait(timeout=60)
        return "hang", "hang"
    return f"finished before the kill at {anchor} (exit {proc.returncode})", "finished"


def reference_run(work: Path, *, points: int = 12) -> Timeline:
    """The same plan run once without interruption in ``work/reference``: its timeline (the
    kill moments) and its results (the comparison)."""
    work.mkdir(parents=True, exist_ok=True)
    plan = write_plan(work, points=points)
    folder = work / "reference"
    launched = time.monotonic()
    proc = _start(plan, folder)
    marks: dict[str, float] = {}
    deadline = launched + STEP_TIMEOUT_S
    while proc.poll() is None and time.monotonic() < deadline:
        now = time.monotonic() - launched
        if "folder" not in marks and (folder / "run.json").exists():
            marks["folder"] = now
        count = _journal_points(folder)
        if count and "first" not in marks:
            marks["first"] = now
        if count >= points and "last" not in marks:
            marks["last"] = now
        if "complete" not in marks and _is_complete(folder):
            marks["complete"] = now
        time.sleep(0.005)
    if proc.poll() is None:
        proc.kill()
    _, err = proc.communicate(timeout=60)
    end = time.monotonic() - launched
    if proc.returncode != 0:
        raise RuntimeError(f"the reference run failed: {err.decode('utf-8', 'replace')[-500:]}")
    return Timeline(
        marks.get("folder"),
        marks.get("first"),
        marks.get("last"),
        end,
        proc.returncode,
        folder,
        marks.get("complete"),
    )


def crash_and_resume(
    work: Path, *, kills: int, seed: int, points: int = 12, timeline: Timeline | None = None
) -> CrashReport:
    """Run the plan under ``work/run`` with ``kills`` SIGKILLs at seeded moments spread over
    the phases of ``timeline`` (None: measured by :func:`reference_run`), then finish (module
    doc)."""
    from noisebench.results.store import LOCK_FILE, _FolderLock

    rng = random.Random(seed)
    if timeline is None:
        timeline = reference_run(work / "timing", points=points)
    durations = timeline.phase_durations_s()
    work.mkdir(parents=True, exist_ok=True)
    plan = write_plan(work, points=points)
    folder = work / "run"
    report = CrashReport(points_expected=points)
    middle = ["start-up", "preparation", "points"]
    rng.shuffle(middle)
    for kill in range(kills):
        done = _journal_points(folder)
        fresh = not (folder / "run.json").exists()
        if kill == 0 and kills >= 3:
            phase = "start-up"  # of the first start: before the run folder exists
        elif kill == (1 if kills >= 3 else 0):
            phase = "first points"
        elif kill == kills - 1 and kills >= 4:
            phase = "outputs"
        else:
            phase = middle[kill % len(middle)]
        if phase in ("points", "first points") and done >= points:
            phase = "outputs"  # nothing left to measure
        proc = _start(plan, folder)
        if phase == "first points":
            what, phase = _kill_at(
                proc,
                folder,
                "point",
                rng.uniform(0, 0.01),
                points_at=done + rng.randint(1, max(1, (points - done) // 4)),
            )
        elif phase == "points":
            share = durations["points"] * (points - done) / points
            what, phase = _kill_at(proc, folder, "point", rng.uniform(0, share), points_at=done + 1)
        else:
            anchor = {"start-up": "launch", "preparation": "folder", "outputs": "complete"}[phase]
            # within the phase, early enough that a faster process than the reference is still
            # in it (the outputs' end includes the interpreter's exit)
            low, top = {"start-up": (0.05, 0.6), "preparation": (0.05, 0.9)}.get(phase, (0.02, 0.3))
            what, phase = _kill_at(proc, folder, anchor, rng.uniform(low, top) * durations[phase])
        report.kills.append(what)
        report.phases.append(phase)
        if proc.stderr is not None:
            proc.stderr.close()
        if fresh and (folder / "run.json").exists():
            report.starter_freqs_hz = _journal_freqs(folder)
    for _ in range(3):  # bounded: finish the run (a complete run needs at most one more call)
        fresh = not (folder / "run.json").exists()
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
        if fresh:
            report.starter_freqs_hz = _journal_freqs(folder)
        # exit 0, or the run had already finished with all its outputs during the kill phase
        if proc.returncode == 0 or b"already complete with all its outputs" in err:
            report.finished = True
            break
    _check(folder, report)
    report.lock_released = not _FolderLock.is_held(folder / LOCK_FILE)
    return report


def _journal_freqs(folder: Path) -> list[float]:
    """Frequencies of the journal's intact point lines, in journal order."""
    return [f for f, _ in _journal_entries(folder)]


def _journal_entries(folder: Path) -> list[tuple[float, dict]]:
    try:
        data = (folder / "points.jsonl").read_bytes()
    except OSError:
        return []
    out = []
    for line in data.split(b"\n")[:-1]:  # a last line without its newline is torn: resume cuts it
        try:
            entry = json.loads(line)
        except ValueError:
            continue
        if entry.get("kind") == "point":
            out.append((float(entry["point"]["freq_hz"]), entry["point"]))
    return out


@dataclass
class Agreement:
    """One point of the crashed run against the uninterrupted run of the same seed."""

    freq_hz: float
    nf_db: float
    u_nf_db: float
    nf_ref_db: float
    u_ref_db: float
    from_starter: bool  # journalled by the process that started the run: must be identical

    @property
    def z(self) -> float:
        return (self.nf_db - self.nf_ref_db) / (self.u_nf_db**2 + self.u_ref_db**2) ** 0.5


def compare_with_reference(report: CrashReport, reference: Path) -> list[Agreement]:
    """Every point of the crashed run with the reference run's point at its frequency."""
    ref = {f: (float(p["nf_db"]), float(p["u_nf_db"])) for f, p in _journal_entries(reference)}
    starter = set(report.starter_freqs_hz)
    out = []
    for f, (nf, u) in sorted(report.points.items()):
        nf_ref, u_ref = ref[f]
        out.append(Agreement(f, nf, u, nf_ref, u_ref, f in starter))
    return out


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
            point = entry["point"]
            report.points[float(point["freq_hz"])] = (
                float(point["nf_db"]),
                float(point["u_nf_db"]),
            )
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
