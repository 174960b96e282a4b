"""Host CPU and SCPI chatter per frequency point against the SCPI simulator in another process.

    python scripts/bench_scpi.py [--points 101 11] [--target 0.1] [--repeat 1] [--error-batch N]

Starts ``python -m noisebench.sims`` (scenario demo-lna, seed 1, free loopback ports) as a child
process, then runs a Y-factor plan through the SCPI drivers in this process twice: a
``points``-point sweep and a short one. The differences between the two runs, divided by the
difference in points, give the cost of one more point without the fixed costs (start-up,
identification, first calibration set-up; a discarded short sweep first takes the process's
one-time costs, such as lazy imports): this process's CPU time, and the SCPI messages it
sent, counted at the VISA session: *messages* (every write and query, the ``*OPC?`` wait and
error-queue reads included; a compound line ``A;:B`` is one message) and *commands* (the
program message units in them, a compound counted once per unit). Prints both against the
target (<= 30 per point) with the ratio, the CPU against <= 5 ms per point, and the commands per
point by kind (settings sent, read-back queries, acquisition start and wait, trace fetch, error
queue, noise-source switching: see ``kind_of``) and by header. The analyzer uses the generic
profile, which reads the error queue once per pass of a sweep-level block (``[common]
error_batch = 16``; the configure read-back lines carry their own read); ``--error-batch 1``
runs a copy of it that reads the queue in every acquisition's line, as before, for
comparison (same seed: same results). With ``--repeat N`` both runs
are made N times and the CPU per point is the smallest of the N differences (CPU time on a
shared machine is inflated by other load, never deflated: the timeit module's advice); the
counts are the same every time the script runs (fixed seed), but move a little between
repeats (the server's random stream runs on), so each repeat's commands are printed too.

Both figures above include each point's share of the calibration (measured in the same run).
A production station calibrates once and measures many units while the calibration stays
valid (``Sequencer(..., calibrations=store)``, as ``station.py`` does), so the two sweeps are
then run once more with the long sweep's calibration store (it covers the short sweep's
frequencies): the second line gives commands, acquisitions and CPU per point with the
calibration reused, and says if any calibration was measured after all. The acquisitions
(``INIT:IMM`` units or ``READ?`` queries) per point with the calibration included are printed
too.

The generic profile declares the SCPI-1999 single read query (``[analyzer.acquisition] read =
"READ?"``: abort, start, wait and fetch in one query), so one acquisition is
``FREQ:CENT ...;:READ?`` (two units) instead of ``FREQ:CENT ...;:INIT:IMM;*WAI;:TRAC? TRACE1``
(four). For comparison the two sweeps run once more with a copy of the profile without it
(``read = false``), and the third line gives that profile's commands per point.
"""

from __future__ import annotations

import argparse
import collections
import functools
import logging
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from noisebench.bench.registry import open_bench, simulated_enr_table
from noisebench.drivers.transport import VisaSession
from noisebench.running.calibration import CalibrationStore
from noisebench.running.plan import parse_plan
from noisebench.running.sequencer import Sequencer
from noisebench.sims.bench import SimulatedBench

TARGET_COMMANDS = 30
TARGET_CPU_MS = 5.0
COUNTS: collections.Counter[str] = collections.Counter()  # commands by header
KINDS: collections.Counter[str] = collections.Counter()  # commands by kind (see kind_of)
MESSAGES = [0]  # program messages (lines) sent
SWITCHING: set[str] = set()  # resources that switch the noise source (the DC supply)
KIND_ORDER = ("settings", "read-back", "acquisition", "fetch", "error queue", "switching", "other")


def units(message: str) -> list[str]:
    """The program message units of one line (split at ``;`` outside quoted strings)."""
    if "'" not in message and '"' not in message:  # the common case, cheap: the counting's
        return [u.strip() for u in message.split(";") if u.strip()]  # CPU is this process's
    out, current, quote = [], "", ""
    for char in message:
        if quote:
            quote = "" if char == quote else quote
        elif char in "\"'":
            quote = char
        elif char == ";":
            out.append(current)
            current = ""
            continue
        current += char
    out.append(current)
    return [u.strip() for u in out if u.strip()]


@functools.lru_cache(maxsize=4096)  # the counting's CPU is the measured process's: keep it small
def kind_of(header: str, resource: str) -> str:
    """What a command is for: *switching* (anything sent to the noise source's supply, the
    analyzer's noise drive and the simulator's path), the *error queue*, the *acquisition*
    (start, completion wait or poll, abort), the trace *fetch* (trace query and its format),
    a *read-back* query of a setting, or a *settings* command."""
    h = header.upper().lstrip(":")
    if resource in SWITCHING or h.startswith(("OUTP:NOIS", "SIM")):
        return "switching"
    if h.startswith("SYST:ERR"):
        return "error queue"
    if h.startswith(("INIT:IMM", "*OPC", "*WAI", "*ESR", "ABOR", "READ")):
        return "acquisition"  # READ? (start, wait and trace in one query) counts here
    if h.startswith(("TRAC", "FORM")):
        return "fetch"
    if h.startswith("*"):
        return "other"
    return "read-back" if h.endswith("?") else "settings"


def _counting(method):
    def wrapped(self, command, *args, **kwargs):
        MESSAGES[0] += 1
        for unit in units(command):
            header = unit.split()[0].lstrip(":")
            COUNTS[header] += 1
            KINDS[kind_of(header, self.resource)] += 1
        return method(self, command, *args, **kwargs)

    return wrapped


def start_server() -> tuple[subprocess.Popen, dict[str, str]]:
    proc = subprocess.Popen(
        [sys.executable, "-m", "noisebench.sims", "--port", "0", "--seed", "1"],
        stdout=subprocess.PIPE,
        stderr=subprocess.STDOUT,
        text=True,
    )
    resources: dict[str, str] = {}
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline and len(resources) < 3:
        line = proc.stdout.readline()  # type: ignore[union-attr]
        if not line:
            break
        parts = line.split()
        if len(parts) == 2 and parts[1].startswith("TCPIP"):
            resources[parts[0]] = parts[1]
    if len(resources) < 3:
        proc.kill()
        raise SystemExit("the SCPI simulator did not start")
    SWITCHING.add(resources["supply"])
    return proc, resources


def plan_for(
    resources: dict[str, str],
    points: int,
    target: float,
    folder: Path,
    batch: int | None = None,
    single_query: bool = True,
):
    enr = folder / "enr.csv"
    profile = "generic"
    if batch is not None or not single_query:  # a copy of the generic profile, edited
        from noisebench.drivers import load_profile

        text = Path(load_profile("generic").source).read_text(encoding="utf-8")
        if batch is not None:  # another error_batch
            text = text.replace("\nerror_batch = 16\n", f"\nerror_batch = {batch}\n")
        if not single_query:  # no READ?: start, *WAI and trace query per acquisition
            assert '\nread = "READ?"\n' in text
            text = text.replace('\nread = "READ?"\n', "\nread = false\n")
        path = folder / "generic_edited.toml"
        path.write_text(text)
        profile = str(path)
    simulated_enr_table(SimulatedBench.from_scenario("demo-lna", seed=1)).to_csv(enr)
    plan = parse_plan(
        {
            "method": "y_factor",
            "dut": {"id": "SCPI-BENCH"},
            "bench": {
                "analyzer": {
                    "resource": resources["analyzer"],
                    "profile": profile,
                    "compression_dbm": -3.0,
                },
                "noise_source": {
                    "drive": "supply",
                    "resource": resources["supply"],
                    "drive_v": 28.0,
                    "settle_time_s": 0.02,
                },
            },
            "acquisition": {"rbw_hz": 1e6, "attenuation_db": 0, "target_u_nf_db": target},
            "sweep": {"segments": [{"start_hz": 1e9, "stop_hz": 3e9, "points": points}]},
            "enr": {"table": str(enr)},
            "corrections": {"source_temperature_k": 296.5},
            "expect": {"dut_gain_db": 20.0},
            "output": {"plots": False, "report": False},
        }
    )
    return plan


def run(
    resources: dict[str, str],
    points: int,
    target: float,
    batch: int | None = None,
    calibrations: CalibrationStore | None = None,
    single_query: bool = True,
) -> tuple[float, int, int, int, dict, dict]:
    """One run; with ``calibrations`` the sequencer uses (and fills) that store, so a second
    run of the same sweep reuses the still-valid calibration as a production station does."""
    COUNTS.clear()
    KINDS.clear()
    MESSAGES[0] = 0
    with tempfile.TemporaryDirectory(prefix="nb_scpi_") as tmp:
        plan = plan_for(resources, points, target, Path(tmp), batch, single_query)
        cpu0 = time.process_time()
        session = open_bench(plan.bench)
        try:
            sequencer = Sequencer(plan, session, calibrations=calibrations)
            record = sequencer.run(Path(tmp) / "run")
        finally:
            session.close()
        cpu = time.process_time() - cpu0
    LAST_CALIBRATED[0] = sequencer.calibrations_measured
    return cpu, MESSAGES[0], sum(COUNTS.values()), len(record.points), dict(COUNTS), dict(KINDS)


LAST_CALIBRATED = [0]  # calibration entries the last run measured (0: it reused them all)


def acquisitions(heads: dict[str, int]) -> int:
    """Acquisitions started: ``INIT:IMM`` units and ``READ?`` queries (which start one)."""
    return heads.get("INIT:IMM", 0) + heads.get("READ?", 0)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--points", type=int, nargs=2, default=[101, 11])
    parser.add_argument("--target", type=float, default=0.1)
    parser.add_argument("--repeat", type=int, default=1)
    parser.add_argument(
        "--error-batch",
        type=int,
        default=None,
        help="the generic profile's error_batch replaced by this (1: a read per acquisition)",
    )
    args = parser.parse_args(argv)
    logging.basicConfig(level=logging.ERROR)
    for name in ("write", "query", "query_binary", "query_watched", "query_block_then_text"):
        setattr(VisaSession, name, _counting(getattr(VisaSession, name)))
    proc, resources = start_server()
    try:
        big, small = max(args.points), min(args.points)
        per_cpu: list[float] = []
        per_cmds: list[float] = []
        # a first, discarded run: the process's one-time costs (lazy imports, the models'
        # first validation, profile parsing, the kept values of estimator and axis) would
        # otherwise fall on the long sweep of the first repeat and read as per-point cost
        run(resources, small, args.target, args.error_batch)
        for _ in range(max(1, args.repeat)):
            store = CalibrationStore()  # the long sweep's calibration covers the short one
            cpu_b, msg_b, cmd_b, n_b, heads_b, kinds_b = run(
                resources, big, args.target, args.error_batch, store
            )
            cpu_s, msg_s, cmd_s, n_s, heads_s, kinds_s = run(
                resources, small, args.target, args.error_batch
            )
            per_cpu.append((cpu_b - cpu_s) / max(n_b - n_s, 1) * 1e3)
            per_cmds.append((cmd_b - cmd_s) / max(n_b - n_s, 1))
        # a station calibrates once and measures many units: the same two sweeps again,
        # reusing the long sweep's still-valid calibration (none measured, checked below)
        reuse_b = run(resources, big, args.target, args.error_batch, store)
        calibrated = LAST_CALIBRATED[0]
        reuse_s = run(resources, small, args.target, args.error_batch, store)
        calibrated += LAST_CALIBRATED[0]
        # for comparison: the same two sweeps with a profile without the single read query
        bare_b = run(resources, big, args.target, args.error_batch, single_query=False)
        bare_s = run(resources, small, args.target, args.error_batch, single_query=False)
    finally:
        proc.terminate()
        proc.wait(timeout=10)
    extra = max(n_b - n_s, 1)
    per_cmd = (cmd_b - cmd_s) / extra
    per_msg = (msg_b - msg_s) / extra
    per_cpu_ms = min(per_cpu)
    if len(per_cpu) > 1:
        # the server's random stream runs on between repeats, so the counts move a little too;
        # the lines below show the last repeat
        print("host CPU per added point, each repeat: " + ", ".join(f"{c:.1f} ms" for c in per_cpu))
        print(
            "SCPI commands per added point, each repeat: " + ", ".join(f"{c:.1f}" for c in per_cmds)
        )
    print(
        f"Y-factor over SCPI, analyzer and supply in another process, target {args.target} dB: "
        f"{n_b} points: {msg_b} messages, {cmd_b} commands, {cpu_b:.2f} s CPU; {n_s} points: "
        f"{msg_s} messages, {cmd_s} commands, {cpu_s:.2f} s CPU"
    )
    for what, value, target, unit in (
        ("SCPI commands (calibration included)", per_cmd, TARGET_COMMANDS, ""),
        ("SCPI messages", per_msg, TARGET_COMMANDS, ""),
        ("host CPU", per_cpu_ms, TARGET_CPU_MS, " ms"),
    ):
        verdict = "met" if value <= target else "NOT met"
        print(
            f"per added point: {value:.1f}{unit} {what} (target <= {target:g}{unit}: "
            f"{value / target:.2f} x target, {verdict})"
        )
    reuse_extra = max(reuse_b[3] - reuse_s[3], 1)
    reuse_cmd = (reuse_b[2] - reuse_s[2]) / reuse_extra
    reuse_cpu_ms = (reuse_b[0] - reuse_s[0]) / reuse_extra * 1e3
    reuse_init = (acquisitions(reuse_b[4]) - acquisitions(reuse_s[4])) / reuse_extra
    verdict = "met" if reuse_cmd <= TARGET_COMMANDS else "NOT met"
    print(
        f"per added point, calibration reused (a station measuring its next unit; "
        f"{'no calibration measured' if not calibrated else f'{calibrated} entries measured!'}"
        f"): {reuse_cmd:.1f} SCPI commands (target <= {TARGET_COMMANDS}: "
        f"{reuse_cmd / TARGET_COMMANDS:.2f} x target, {verdict}), {reuse_init:.1f} acquisitions, "
        f"{reuse_cpu_ms:.1f} ms host CPU (one run, not the smallest of repeats)"
    )
    bare_cmd = (bare_b[2] - bare_s[2]) / max(bare_b[3] - bare_s[3], 1)
    verdict = "met" if bare_cmd <= TARGET_COMMANDS else "NOT met"
    print(
        f"per added point, a profile without the single read query (read = false: start, "
        f"*WAI and trace query per acquisition), calibration included: {bare_cmd:.1f} SCPI "
        f"commands (target <= {TARGET_COMMANDS}: {bare_cmd / TARGET_COMMANDS:.2f} x target, "
        f"{verdict})"
    )
    init = (acquisitions(heads_b) - acquisitions(heads_s)) / extra
    print(f"  acquisitions (INIT:IMM or READ?) per added point, calibration included: {init:.1f}")
    per_kind = [(k, (kinds_b.get(k, 0) - kinds_s.get(k, 0)) / extra) for k in KIND_ORDER]
    print(
        "  commands per point by kind: "
        + ", ".join(f"{k} {v:.1f}" for k, v in per_kind if k in kinds_b or k in kinds_s)
    )
    heads = sorted(
        ((k, (heads_b.get(k, 0) - heads_s.get(k, 0)) / extra) for k in heads_b),
        key=lambda kv: -kv[1],
    )
    print("  commands per point by header: " + ", ".join(f"{k} {v:.1f}" for k, v in heads[:12]))
    return 0


if __name__ == "__main__":
    sys.exit(main())
