"""Run the speed and accuracy benchmarks one after the other and keep their output as one record.

    python scripts/run_benchmarks.py [--out docs/benchmarks/latest.txt] [--only scpi memory ...]

Each benchmark runs in its own process (so one's memory or threads never colour another's), in
the order below, and its output is printed and written to ``--out`` under a header naming the
commit, the date, the Python version, the CPU count and the load average at the start: the
README's "Accuracy and speed, measured" section quotes one such file, so every number there
comes from one run on one machine state. Nothing here judges a result; each benchmark prints
its own ratio next to its target.
"""

from __future__ import annotations

import argparse
import datetime as dt
import os
import platform
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent

RUNS: dict[str, list[str]] = {
    "accuracy": ["scripts/bench_accuracy.py"],
    "scpi": ["scripts/bench_scpi.py", "--repeat", "3"],
    "transfer": ["scripts/bench_transfer.py"],
    "simulator": ["scripts/bench_simulator.py"],
    "methods": ["scripts/bench_methods.py"],
    "estimator": ["scripts/bench_estimator.py"],
    "memory-gain": ["scripts/bench_memory.py", "--method", "gain"],
    "memory-y_factor": ["scripts/bench_memory.py", "--method", "y_factor"],
    "database": ["scripts/bench_database.py"],
    "progress_eta": ["scripts/bench_progress_eta.py"],
    "forecast": ["scripts/bench_forecast_schedule.py"],
}


def _commit() -> str:
    try:
        head = subprocess.run(
            ["git", "rev-parse", "--short", "HEAD"], cwd=ROOT, capture_output=True, text=True
        ).stdout.strip()
        dirty = subprocess.run(
            ["git", "status", "--porcelain", "--untracked-files=no"],
            cwd=ROOT,
            capture_output=True,
            text=True,
        ).stdout.strip()
    except OSError:
        return "unknown"
    return head + (" (with uncommitted changes)" if dirty else "") if head else "unknown"


def _noisebench_command() -> list[str]:
    """The installed ``noisebench`` command beside this Python (as a user runs it)."""
    script = Path(sys.executable).parent / "noisebench"
    if script.exists():
        return [str(script)]
    return [
        sys.executable,
        "-c",
        "import sys; from noisebench.frontends.cli import main; sys.exit(main())",
    ]


def _demo_seconds() -> str:
    """Wall time of ``noisebench demo`` (both methods) in a fresh folder, and its verdicts."""
    with tempfile.TemporaryDirectory(prefix="nb_demo_") as tmp:
        started = time.perf_counter()
        done = subprocess.run(
            [*_noisebench_command(), "demo", "--out", tmp],
            capture_output=True,
            text=True,
        )
        seconds = time.perf_counter() - started
    verdicts = [
        line.strip()
        for line in done.stdout.splitlines()
        if line.lstrip().startswith(("Run ", "verdict", "flagged", "vs truth"))
    ]
    return (
        f"noisebench demo (both methods): {seconds:.1f} s wall (target 20 s: "
        f"{seconds / 20:.2f} x target), exit {done.returncode}\n" + "\n".join(verdicts)
    )


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", type=Path, default=ROOT / "docs" / "benchmarks" / "latest.txt")
    parser.add_argument("--only", nargs="*", choices=[*RUNS, "demo"], default=None)
    args = parser.parse_args(argv)
    chosen = args.only or [*RUNS, "demo"]
    load = os.getloadavg() if hasattr(os, "getloadavg") else (float("nan"),) * 3
    header = (
        f"# noisebench benchmarks, one run\n# commit {_commit()}, "
        f"{dt.datetime.now(dt.timezone.utc):%Y-%m-%d %H:%M} UTC, "
        f"Python {platform.python_version()}, "
        f"{os.cpu_count()} CPUs, load average at start {load[0]:.2f} {load[1]:.2f} {load[2]:.2f}\n"
    )
    sections = [header]
    print(header, flush=True)
    env = {**os.environ, "MPLBACKEND": "Agg", "PYTHONPATH": str(ROOT)}
    for name in chosen:
        started = time.perf_counter()
        if name == "demo":
            text = _demo_seconds()
        else:
            done = subprocess.run(
                [sys.executable, *RUNS[name]], cwd=ROOT, env=env, capture_output=True, text=True
            )
            text = done.stdout.rstrip()
            if done.returncode != 0:
                text += f"\n(exit {done.returncode})\n" + done.stderr[-2000:]
        block = f"## {name} ({time.perf_counter() - started:.0f} s)\n{text}\n"
        print(block, flush=True)
        sections.append(block)
    args.out.parent.mkdir(parents=True, exist_ok=True)
    args.out.write_text("\n".join(sections), encoding="utf-8")
    print(f"written to {args.out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
