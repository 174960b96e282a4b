"""Reliability figures: concurrent first opens, fuzzed inputs, kill -9 and resume, table parsing.

    python scripts/bench_reliability.py [--rounds 8] [--workers 4] [--fuzz 3400] [--kills 9]
                                        [--no-postgres] [--only-crashes]

Prints what one run measured (the numbers in DEVELOPERS.md, "Reliability, measured"):

- failed opens when ``--workers`` processes open one FRESH results database at the same moment,
  ``--rounds`` times, on SQLite and on a throw-away PostgreSQL (``tests/_postgres.py``);
- tracebacks, hangs and lost journal lines among ``--fuzz`` damaged plans, profiles, tables and
  run folders (``tests/_fuzz.py``), and how many impossible settings are still accepted;
- points lost, duplicated or torn after ``--kills`` SIGKILLs at seeded moments of a 24-point run
  and a resume (``tests/_crash.py``), the phases the kills landed in (moments from the measured
  phases of an uninterrupted run), and the final NF against that run;
- the time to load a legitimate 10 001-point gain file against a naive baseline (``numpy.loadtxt``
  of the same numbers, which checks nothing), and the time to refuse a 200 000-row ENR table
  (above the row limit) against parsing it whole.
"""

from __future__ import annotations

import argparse
import logging
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "tests"))  # the harnesses live beside the tests that run them


def concurrent_opens(rounds: int, workers: int, postgres: bool) -> None:
    from _concurrent_open import open_together

    with tempfile.TemporaryDirectory() as tmp:
        failed = sum(
            len(open_together(f"sqlite:///{Path(tmp) / f'fresh-{n}.sqlite'}", workers))
            for n in range(rounds)
        )
    print(f"SQLite:     {failed} failed of {rounds * workers} concurrent first opens")
    if not postgres:
        return
    import sqlalchemy as sa
    from _postgres import temporary_postgres

    try:
        with temporary_postgres() as url:
            failed = 0
            for n in range(rounds):
                engine = sa.create_engine(url, isolation_level="AUTOCOMMIT")
                with engine.connect() as con:
                    con.execute(sa.text(f'CREATE DATABASE "bench_fresh_{n}"'))
                engine.dispose()
                fresh = url.rsplit("/", 1)[0] + f"/bench_fresh_{n}"
                failed += len(open_together(fresh, workers))
            print(f"PostgreSQL: {failed} failed of {rounds * workers} concurrent first opens")
    except RuntimeError as exc:
        print(f"PostgreSQL: not measured ({exc})")


def fuzzing(cases: int) -> None:
    import _fuzz

    logging.disable(logging.CRITICAL)
    with tempfile.TemporaryDirectory() as tmp:
        pristine = _fuzz.build_pristine(Path(tmp) / "pristine")
        start = time.perf_counter()
        tally = _fuzz.fuzz(pristine, Path(tmp) / "work", cases, seed=1)
        elapsed = time.perf_counter() - start
        logging.disable(logging.NOTSET)  # the unusual-value warnings are counted from the log
        logging.getLogger("noisebench").setLevel(logging.WARNING)
        accepted, refused, warned = _fuzz.impossible_values_accepted(Path(tmp))
    counts = tally.counts()
    print(
        f"fuzz:       {cases} damaged inputs in {elapsed:.0f} s: {counts['ok']} accepted, "
        f"{counts['clean']} clean one-line errors, {counts['traceback']} tracebacks, "
        f"{counts['hang']} hangs, {counts['lost']} with journal lines lost"
    )
    for target, c in tally.by_target().items():
        print(f"  {target:<12} {dict(c)}")
    for outcome in tally.failures()[:5]:
        print(f"  ! {outcome.target} [{outcome.mutation}] {outcome.kind}: {outcome.detail}")
    total = len(accepted) + len(refused) + len(warned)
    print(
        f"implausible: {len(accepted)} of {total} implausible settings accepted silently, "
        f"{len(refused)} refused, {len(warned)} accepted with a warning"
        f"{': ' + '; '.join(accepted) if accepted else ''}"
    )


def crashes(kills: int) -> None:
    from collections import Counter

    from _crash import compare_with_reference, crash_and_resume, reference_run

    with tempfile.TemporaryDirectory() as tmp:
        reference = reference_run(Path(tmp) / "reference", points=24)
        start = time.perf_counter()
        report = crash_and_resume(
            Path(tmp) / "crash", kills=kills, seed=2026, points=24, timeline=reference
        )
        elapsed = time.perf_counter() - start
        agreements = compare_with_reference(report, reference.folder)
    hangs = report.kills.count("hang")
    print(
        f"kill -9:    {kills} kills at seeded moments + resume in {elapsed:.0f} s: "
        f"{report.points_lost} points lost, {report.points_duplicated} duplicated, "
        f"{report.torn_lines} torn lines, {hangs} hangs, status {report.status}, "
        f"report {'written' if report.report_written else 'MISSING'}, "
        f"lock {'released' if report.lock_released else 'HELD'}"
    )
    phases = Counter(report.phases)
    print(
        "  moments from the uninterrupted run's phases ("
        + ", ".join(f"{k} {v:.2f} s" for k, v in reference.phase_durations_s().items())
        + "); kills landed in: "
        + ", ".join(f"{name} {phases[name]}" for name in sorted(phases))
    )
    exact = [a for a in agreements if a.from_starter]
    resumed = [a for a in agreements if not a.from_starter]
    same = sum(1 for a in exact if (a.nf_db, a.u_nf_db) == (a.nf_ref_db, a.u_ref_db))
    worst = max((abs(a.z) for a in resumed), default=0.0)
    print(
        f"  NF vs the uninterrupted run of the same seed: {same} of {len(exact)} first-process "
        f"points identical; {len(resumed)} resumed points, largest |z| {worst:.2f}"
    )
    for line in report.kills:
        print(f"  {line}")


def tables() -> None:
    from noisebench.science.enr import validate_enr_file
    from noisebench.science.gain_files import load_gain_table

    with tempfile.TemporaryDirectory() as tmp:
        gain = Path(tmp) / "gain.csv"
        freq = np.linspace(10e6, 6e9, 10_001)
        rows = "".join(f"{float(f)!r},{float(20.0 + 0.1 * np.sin(f / 1e9))!r},0.05\n" for f in freq)
        gain.write_text("freq_hz,gain_db,u_gain_db\n" + rows, encoding="utf-8")
        ours = min(_timed(lambda: load_gain_table(gain)) for _ in range(5))
        naive = min(_timed(lambda: np.loadtxt(gain, delimiter=",", skiprows=1)) for _ in range(5))
        print(
            f"gain file:  10 001 points loaded and checked in {ours * 1e3:.0f} ms; "
            f"numpy.loadtxt (no checks) {naive * 1e3:.0f} ms; ratio {ours / naive:.2f}"
        )
        enr = Path(tmp) / "enr.csv"
        enr.write_text(
            "freq_hz,enr_db\n" + "".join(f"{1e6 + 1e4 * i:.1f},15.0\n" for i in range(200_000)),
            encoding="utf-8",
        )
        repeats = Path(tmp) / "repeats.csv"
        repeats.write_text("freq_hz,enr_db\n" + "1e6,15.0\n" * 100_000, encoding="utf-8")
        listed = _timed(lambda: validate_enr_file(repeats))
        print(
            f"ENR table:  100 000 rows that all repeat one frequency: 99 999 problems found, "
            f"50 listed, in {listed:.2f} s (a list scan per problem took over 60 s before)"
        )
        refused = _timed(lambda: validate_enr_file(enr))
        whole = _timed(lambda: np.loadtxt(enr, delimiter=",", skiprows=1))
        print(
            f"ENR table:  200 000 rows refused at the row limit in {refused:.2f} s "
            f"(numpy.loadtxt of the whole file: {whole:.2f} s)"
        )


def _timed(func) -> float:
    start = time.perf_counter()
    func()
    return time.perf_counter() - start


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rounds", type=int, default=8)
    parser.add_argument("--workers", type=int, default=4)
    parser.add_argument("--fuzz", type=int, default=3400)
    parser.add_argument("--kills", type=int, default=9)
    parser.add_argument("--no-postgres", action="store_true")
    parser.add_argument("--only-crashes", action="store_true", help="the kill -9 part only")
    args = parser.parse_args()
    if args.only_crashes:
        crashes(args.kills)
        return
    concurrent_opens(args.rounds, args.workers, not args.no_postgres)
    fuzzing(args.fuzz)
    crashes(args.kills)
    tables()


if __name__ == "__main__":
    main()
