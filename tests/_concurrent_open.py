"""Several processes open one FRESH results database at the same moment.

A production line switched on together, or parallel CI jobs, all create the schema on first use.
Each worker waits on a shared barrier, opens the database (creating the schema if it is absent)
and stores one run; the parent counts the opens that failed. Used by the concurrency tests and by
``scripts/bench_reliability.py``.
"""

from __future__ import annotations

import multiprocessing as mp
import traceback
from typing import Any

BARRIER_TIMEOUT_S = 300.0  # generous: spawning interpreters on a loaded two-core machine is slow


def _open_and_store(url: str, worker: int, barrier: Any, results: Any) -> None:
    try:
        from test_database import make_record

        from noisebench.results.database import ResultsDatabase

        barrier.wait(BARRIER_TIMEOUT_S)
        db = ResultsDatabase(url)
        try:
            db.store_run(make_record(f"open-{worker}", f"unit-{worker}", (1.0, 1.1, 1.2)))
        finally:
            db.close()
        results.put((worker, "ok"))
    except BaseException as exc:  # noqa: BLE001 - report every failure to the parent
        results.put((worker, f"{type(exc).__name__}: {exc}\n{traceback.format_exc()}"))


def open_together(url: str, workers: int) -> list[str]:
    """Start ``workers`` processes that open ``url`` at once; returns the failures' texts."""
    ctx = mp.get_context("spawn")
    barrier = ctx.Barrier(workers)
    results = ctx.Queue()
    procs = [
        ctx.Process(target=_open_and_store, args=(url, w, barrier, results)) for w in range(workers)
    ]
    for p in procs:
        p.start()
    outcomes: dict[int, str] = {}
    try:
        for _ in range(workers):
            worker, text = results.get(timeout=BARRIER_TIMEOUT_S + 120)
            outcomes[worker] = text
    finally:
        for p in procs:
            p.join(timeout=60)
            if p.is_alive():  # never leave a process behind, even when the test fails
                p.kill()
                p.join(timeout=10)
    failures = [text for text in outcomes.values() if text != "ok"]
    failures += [f"worker {w} never reported" for w in range(workers) if w not in outcomes]
    return failures
