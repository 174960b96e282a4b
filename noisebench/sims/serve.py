"""Console entry: serve a simulated bench over SCPI/TCP until Ctrl-C.

    python -m noisebench.sims --scenario demo-lna --seed 1 --host 127.0.0.1 --port 5025

prints one VISA resource string per instrument (analyzer on PORT, generator on PORT+1, DC
supply on PORT+2, LO generator on PORT+3; ``--port 0`` picks free ports) and serves until
interrupted.
"""

from __future__ import annotations

import argparse
import logging
import sys
import threading
from collections.abc import Callable, Sequence
from typing import Any, TextIO

from noisebench.errors import NoisebenchError

from .scpi_server import INSTRUMENTS, SimServer, is_loopback

#: the placeholder names the example plans use for each instrument's port (``${NAME}`` in a
#: plan's [bench]: noisebench.running.plan_values); ``serve`` prints them with the real ports
PORT_VARIABLES = {
    "analyzer": "NOISEBENCH_SIM_PORT",
    "generator": "NOISEBENCH_SIM_GENERATOR_PORT",
    "supply": "NOISEBENCH_SIM_SUPPLY_PORT",
    "lo": "NOISEBENCH_SIM_LO_PORT",
}

logger = logging.getLogger(__name__)


def build_parser(prog: str = "python -m noisebench.sims") -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog=prog,
        description="Serve a simulated noise-figure bench (analyzer, generator, DC supply, "
        "LO generator) over SCPI on raw TCP sockets.",
    )
    parser.add_argument(
        "--scenario",
        default="demo-lna",
        help="scenario name or path to a scenario TOML file (default: demo-lna)",
    )
    parser.add_argument("--seed", type=int, default=0, help="random seed (default: 0)")
    parser.add_argument(
        "--host",
        default="127.0.0.1",
        help="address to listen on (default: 127.0.0.1, loopback only; any other address "
        "also needs --allow-remote)",
    )
    parser.add_argument(
        "--allow-remote",
        action="store_true",
        help="allow --host to be a non-loopback address: anyone who can reach it can drive "
        "the simulator (no authentication)",
    )
    parser.add_argument(
        "--port",
        type=int,
        default=5025,
        help="analyzer port; generator PORT+1, supply PORT+2, LO PORT+3; 0 = free ports "
        "(default: 5025)",
    )
    parser.add_argument(
        "--time-scale",
        type=float,
        default=0.0,
        metavar="FRACTION",
        help="real seconds slept per simulated second of acquisition "
        "(default: 0 = as fast as computed)",
    )
    parser.add_argument(
        "--duration",
        type=float,
        default=None,
        metavar="SECONDS",
        help="stop after this many seconds (default: run until Ctrl-C)",
    )
    parser.add_argument(
        "--log-commands",
        action="store_true",
        help="log every received command line (debug level of the server's logger)",
    )
    parser.add_argument(
        "--dialect",
        choices=("generic", "compact"),
        default="generic",
        help="the analyzer's command set: generic (profile 'generic') or compact "
        "(profile 'sim_compact': MHz units, switch marker, no abort; default: generic)",
    )
    parser.add_argument("-v", "--verbose", action="store_true", help="debug logging")
    return parser


def _logging_configured() -> bool:
    """True when a handler already shows noisebench's log lines (each line then once only)."""
    package = logging.getLogger("noisebench")
    return bool(package.handlers or logging.getLogger().handlers)


def _default_bench_factory(scenario: str, seed: int) -> Any:
    from noisebench.sims.bench import SimulatedBench

    return SimulatedBench.from_scenario(scenario, seed=seed)


def main(
    argv: Sequence[str] | None = None,
    *,
    out: TextIO | None = None,
    stop_event: threading.Event | None = None,
    bench_factory: Callable[[str, int], Any] | None = None,
    prog: str = "python -m noisebench.sims",
) -> int:
    """Run the simulator; returns the exit code (0 ok, 2 bad input, 1 could not start).

    ``prog`` names the command in usage lines (``noisebench serve`` from the CLI)."""
    out = out or sys.stdout
    args = build_parser(prog).parse_args(argv)
    if not _logging_configured():  # under `noisebench serve` the CLI's handler shows them
        logging.basicConfig(
            level=logging.DEBUG if args.verbose else logging.INFO,
            format="%(asctime)s %(levelname)s %(name)s: %(message)s",
        )
    elif args.verbose:
        logging.getLogger("noisebench").setLevel(logging.DEBUG)
    if args.time_scale < 0:
        print("error: --time-scale must be >= 0", file=sys.stderr)
        return 2
    if not 0 <= args.port <= 65532:
        print("error: --port must be 0..65532 (four consecutive ports are used)", file=sys.stderr)
        return 2
    if not is_loopback(args.host):
        if not args.allow_remote:
            print(
                f"error: --host {args.host} is not a loopback address; the simulator has no "
                "authentication (add --allow-remote to listen there on purpose)",
                file=sys.stderr,
            )
            return 2
        print(
            f"warning: listening on {args.host}, not on loopback: anyone who can reach this "
            "address can drive the simulated bench; there is no authentication",
            file=sys.stderr,
        )
    try:
        bench = (bench_factory or _default_bench_factory)(args.scenario, args.seed)
    except NoisebenchError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2
    server = SimServer(
        bench,
        host=args.host,
        port=args.port,
        log_commands=False,
        allow_remote=args.allow_remote,
        acquisition_time_scale=args.time_scale,
        dialect=args.dialect,
    )
    if args.log_commands:
        logging.getLogger("noisebench.sims.scpi_server").setLevel(logging.DEBUG)
    try:
        server.start()
    except OSError as exc:
        print(
            f"error: cannot listen on {args.host}:{args.port}: {exc.strerror or exc}",
            file=sys.stderr,
        )
        return 1
    stop = stop_event or threading.Event()
    try:
        print(
            f"simulated bench '{args.scenario}' (seed {args.seed}, analyzer dialect "
            f"{args.dialect}):",
            file=out,
        )
        for name in INSTRUMENTS:
            print(f"  {name:<10} {server.resource(name)}", file=out)
        print(
            "for the example plans (examples/*_scpi_simulator.toml): export "
            + " ".join(f"{PORT_VARIABLES[name]}={server.ports[name]}" for name in INSTRUMENTS),
            file=out,
        )
        print("Ctrl-C to stop.", file=out, flush=True)
        stop.wait(args.duration)
    except KeyboardInterrupt:
        pass
    finally:
        server.stop()
        print("stopped.", file=out, flush=True)
    return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
