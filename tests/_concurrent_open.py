"""Several processes open one FRESH results database at the same moment.

A production line switched on together, or parallel CI jobs, all create the schema on first use.
Each worker waits on a shared barrier, opens the database (creating the schema if it is absent)
and stores one run; the parent counts the opens that failed. Several rounds (one fresh database
each) reuse the same workers. Used by the concurrency tests and by
``scripts/bench_reliability.py``.
"""

from __future__ import annotations

import multiprocessing as mp
import queue
import traceback
from collections.abc import Sequence
from typing import Any

BARRIER_TIMEOUT_S = 300.0  # generous: spawning interpreters on a loaded two-core machine is slow


def _failure(exc: BaseException) -> str:
    return f"{type(exc).__name__}: {exc}\n{traceback.format_exc()}"


def _open_and_store(urls: list[str], worker: int, barrier: Any, results: Any) -> None:
    try:
        from test_database import make_record

        from noisebench.results.database import ResultsDatabase
    except BaseException as exc:  # noqa: BLE001 - report every failure to the parent
        barrier.abort()  # the others would wait for this worker in vain
        for round_no in range(len(urls)):
            results.put((round_no, worker, _failure(exc)))
        return
    for round_no, url in enumerate(urls):
        try:
            barrier.wait(BARRIER_TIMEOUT_S)  # each round starts together, the imports done
            db = ResultsDatabase(url)
            try:
                db.store_run(make_record(f"open-{worker}", f"unit-{worker}", (1.0, 1.1, 1.2)))
            finally:
                db.close()
            results.put((round_no, worker, "ok"))
        except BaseException as exc:  # noqa: BLE001 - report every failure to the parent
            results.put((round_no, worker, _failure(exc)))


def open_together(urls: str | Sequence[str], workers: int) -> list[str]:
    """Start ``workers`` processes that open each of ``urls`` (a fresh database per round) at
    the same moment, round after round; returns the failures' texts. The processes start once
    and every round waits on the barrier after the imports, so each round's opens are as
    simultaneous as a single round's and a round costs no interpreter start-ups."""
    rounds = [urls] if isinstance(urls, str) else list(urls)
    ctx = mp.get_context("spawn")
    barrier = ctx.Barrier(workers)
    results = ctx.Queue()
    procs = [
        ctx.Process(target=_open_and_store, args=(rounds, w, barrier, results))
        for w in range(workers)
    ]
    for p in procs:
        p.start()
    outcomes: dict[tuple[int, int], str] = {}
    try:
        for _ in range(workers * len(rounds)):
            round_no, worker, text = results.get(timeout=BARRIER_TIMEOUT_S + 120)
            outcomes[(round_no, worker)] = text
    except queue.Empty:
        pass  # the workers that never reported are named below
    finally:
        for p in procs:
            p.join(timeout=60)
            if p.is_alive():  # never leave a process behind, even when the test fails
                p.kill()
                p.join(timeout=10)
    failures = [
        f"round {r}, worker {w}: {t}" for (r, w), t in sorted(outcomes.items()) if t != "ok"
    ]
    failures += [
        f"round {r}, worker {w} never reported"
        for r in range(len(rounds))
        for w in range(workers)
        if (r, w) not in outcomes
    ]
    return failures
