"""The ``noisebench`` command line.

Commands (ours; see ``noisebench --help`` and ``noisebench <command> --help``):

``run PLAN [--resume FOLDER]``   measure a plan (TOML) and write results, plots and report
``demo [--out DIR]``             both methods on the invented simulated bench, in seconds
``estimate PLAN``                instrument time and expected uncertainty, no instruments
``serve``                        the simulated bench as SCPI instruments on loopback TCP
``render FOLDER``                plots and report again from a run folder
``validate PLAN|ENR.csv``        check a plan or an ENR table; every problem on its own line
``info``                         versions, VISA back ends, visible resources, profiles,
                                 plausibility ranges (``--ranges``)
``probe RESOURCE --profile P``   live check of one analyzer against one profile
``station PLAN`` / ``db ...``    production loop and results database
                                 (:mod:`noisebench.frontends.dbcli`)

The commands themselves are in :mod:`noisebench.frontends.commands`; this module builds the
parser, maps errors to exit codes and sets up logging.

Errors end with one line on stderr and a non-zero exit code, never a traceback:
2 bad input (plan, file, arguments), 3 refused for safety, 4 instrument or communication
fault, 5 measurement refused by the physics, 1 anything else, 130 interrupted (Ctrl-C).
"""

from __future__ import annotations

import argparse
import contextlib
import logging
import os
import sys
from collections.abc import Callable, Iterator, Sequence
from typing import TextIO

from pydantic import ValidationError

from noisebench import __version__
from noisebench.errors import (
    CommunicationError,
    InputError,
    InstrumentError,
    MeasurementError,
    NoisebenchError,
    SafetyError,
)
from noisebench.frontends.argtypes import (
    EPILOG,
    EXIT_FAILED,
    EXIT_INPUT,
    EXIT_INSTRUMENT,
    EXIT_INTERRUPTED,
    EXIT_MEASUREMENT,
    EXIT_OK,
    EXIT_SAFETY,
    non_negative_int,
    one_line,
    positive_seconds,
)
from noisebench.frontends.commands import (
    cmd_demo,
    cmd_estimate,
    cmd_info,
    cmd_probe,
    cmd_render,
    cmd_run,
    cmd_serve,
    cmd_validate,
)

logger = logging.getLogger("noisebench.frontends.cli")


# --------------------------------------------------------------------------- parser


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="noisebench",
        description="Automated noise-figure measurement with a spectrum analyzer: gain method "
        "and Y-factor, on SCPI instruments or on the simulated bench.",
        epilog=EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument("--version", action="version", version=f"noisebench {__version__}")
    parser.add_argument("-v", "--verbose", action="store_true", help="debug logging")
    parser.add_argument("-q", "--quiet", action="store_true", help="warnings and errors only")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)

    p = sub.add_parser(
        "run",
        help="measure a plan",
        epilog=EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
        description="Measure the plan (TOML) and write results, plots and the "
        "report into a new run folder (or continue one).",
    )
    p.add_argument("plan", help="plan file (.toml)")
    p.add_argument(
        "--define",
        action="append",
        default=[],
        metavar="NAME=VALUE",
        help="value of a ${NAME} placeholder in the plan's [bench] (wins over the environment; "
        "repeatable), e.g. --define NOISEBENCH_SIM_PORT=5025",
    )
    p.add_argument(
        "--resume",
        metavar="FOLDER",
        help="continue an interrupted run in FOLDER (finished points are kept)",
    )
    p.add_argument("--out", metavar="FOLDER", help="run folder (default: from [output])")
    p.set_defaults(func=cmd_run)

    p = sub.add_parser(
        "demo",
        help="both methods on the invented simulated bench",
        description="Sweep the invented 'demo-lna' scenario on the simulated "
        "bench with the Y-factor and the gain method and write "
        "results, plots and reports.",
    )
    p.add_argument(
        "--out",
        default="noisebench-demo",
        metavar="DIR",
        help="output folder (default: ./noisebench-demo)",
    )
    p.add_argument("--points", type=int, default=56, help="frequency points (default: 56)")
    p.add_argument("--seed", type=non_negative_int, default=1, help="simulator seed (default: 1)")
    p.set_defaults(func=cmd_demo)

    p = sub.add_parser(
        "estimate",
        help="forecast time and uncertainty of a plan",
        description="Instrument time and expected NF uncertainty per point from "
        "the radiometer equation, without touching an instrument. "
        "Real benches need [expect] priors; sim:// benches use the "
        "scenario's declared models.",
    )
    p.add_argument("plan", help="plan file (.toml)")
    p.add_argument(
        "--define",
        action="append",
        default=[],
        metavar="NAME=VALUE",
        help="value of a ${NAME} placeholder in the plan's [bench] (wins over the environment; "
        "repeatable), e.g. --define NOISEBENCH_SIM_PORT=5025",
    )
    p.set_defaults(func=cmd_estimate)

    p = sub.add_parser(
        "serve",
        help="serve the simulated bench over SCPI (loopback TCP)",
        description="Run the SCPI simulator; every option after 'serve' goes "
        "to it (noisebench serve --help lists them).",
        add_help=False,
    )
    p.set_defaults(func=cmd_serve, serve_args=[])

    p = sub.add_parser("render", help="plots and report from a saved run folder")
    p.add_argument("folder", help="run folder")
    p.add_argument(
        "--no-plots",
        action="store_true",
        help="draw no figures (the report embeds those already in FOLDER/plots)",
    )
    p.set_defaults(func=cmd_render)

    p = sub.add_parser(
        "validate",
        help="check a plan, ENR/gain/loss table, instrument profile or scenario",
        description="Recognise the file by its content (plan, ENR table, gain or loss table, "
        "instrument profile, simulator scenario) and check it as that.",
    )
    p.add_argument("path", help="the file to check (.toml, .csv, .s2p)")
    p.add_argument(
        "--define",
        action="append",
        default=[],
        metavar="NAME=VALUE",
        help="value of a ${NAME} placeholder in the plan's [bench] (wins over the environment; "
        "repeatable), e.g. --define NOISEBENCH_SIM_PORT=5025",
    )
    p.set_defaults(func=cmd_validate)

    p = sub.add_parser(
        "probe",
        help="check one analyzer against one profile (before a first run)",
        description="Connect to the analyzer at RESOURCE with PROFILE; set and read back every "
        "declared setting, take one trace (format, byte order, plausibility, scatter), read "
        "the marker, time one acquisition; print what works and the profile lines to change. "
        "No noise source or generator is switched on. Exit 0: all ok, 1: some checks failed, "
        "4: no connection.",
        epilog=EPILOG,  # it drives a real analyzer: the same cautions as `run`
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("resource", help="VISA resource string, e.g. TCPIP0::127.0.0.1::5025::SOCKET")
    p.add_argument("--profile", default="generic", help="profile name or .toml path")
    p.add_argument(
        "--timeout",
        type=positive_seconds,
        default=5.0,
        metavar="S",
        help="I/O timeout in seconds (default: 5)",
    )
    p.set_defaults(func=cmd_probe)

    p = sub.add_parser("info", help="versions, VISA back ends, profiles (--scan: resources)")
    scan = p.add_mutually_exclusive_group()
    scan.add_argument(
        "--scan",
        action="store_true",
        help="also list VISA resources (pyvisa-py's discovery broadcasts on the local network)",
    )
    scan.add_argument(
        "--no-scan", dest="scan", action="store_false", help="do not list resources (default)"
    )
    p.add_argument(
        "--timeout",
        type=positive_seconds,
        default=5.0,
        metavar="S",
        help="give up listing resources after S seconds (default: 5)",
    )
    p.add_argument(
        "--ranges",
        action="store_true",
        help="also print the plausibility ranges plan values are checked against, with sources",
    )
    p.set_defaults(func=cmd_info)

    from noisebench.frontends.dbcli import register as register_production

    register_production(sub)  # station, db (noisebench/frontends/dbcli.py)
    return parser


# --------------------------------------------------------------------------- errors


def _report(exc: BaseException) -> int:
    """Print an error as one line per problem on stderr; return its exit code."""
    from noisebench.running.plan import PlanError, format_validation_error

    if isinstance(exc, PlanError):
        where = f"{exc.source}: " if exc.source else ""
        for line in exc.problems:
            print(f"noisebench: error: {where}{one_line(line)}", file=sys.stderr)
        return EXIT_INPUT
    if isinstance(exc, ValidationError):
        for line in format_validation_error(exc):
            print(f"noisebench: error: {one_line(line)}", file=sys.stderr)
        return EXIT_INPUT
    code = _exit_code(exc)
    text = one_line(str(exc)) or type(exc).__name__
    if isinstance(exc, OSError) and not isinstance(exc, NoisebenchError):
        name = f" {exc.filename}" if getattr(exc, "filename", None) else ""
        text = f"{exc.strerror or type(exc).__name__}{':' if name else ''}{name}"
    print(f"noisebench: error: {text}", file=sys.stderr)
    return code


def _exit_code(exc: BaseException) -> int:
    table: list[tuple[type[BaseException], int]] = [
        (SafetyError, EXIT_SAFETY),
        (InputError, EXIT_INPUT),
        (CommunicationError, EXIT_INSTRUMENT),
        (InstrumentError, EXIT_INSTRUMENT),
        (MeasurementError, EXIT_MEASUREMENT),
        (NoisebenchError, EXIT_FAILED),
        (FileNotFoundError, EXIT_INPUT),
        (IsADirectoryError, EXIT_INPUT),
        (NotADirectoryError, EXIT_INPUT),
        (OSError, EXIT_FAILED),
        (ValueError, EXIT_INPUT),
    ]
    for kind, code in table:
        if isinstance(exc, kind):
            return code
    return EXIT_FAILED


class _CurrentStderrHandler(logging.StreamHandler):
    """Writes to whatever ``sys.stderr`` is at emit time (a captured or replaced stderr
    that has since been closed must not break logging)."""

    def __init__(self) -> None:
        super().__init__(sys.stderr)

    @property
    def stream(self) -> TextIO:
        return sys.stderr

    @stream.setter
    def stream(self, _value: TextIO) -> None:
        pass


def _configure_logging(args: argparse.Namespace) -> None:
    level = logging.DEBUG if args.verbose else logging.WARNING if args.quiet else logging.INFO
    root = logging.getLogger("noisebench")
    if not any(getattr(h, "_noisebench_cli", False) for h in root.handlers):
        handler = _CurrentStderrHandler()
        handler.setFormatter(
            logging.Formatter(
                "%(levelname)s %(name)s: %(message)s" if args.verbose else "%(message)s"
            )
        )
        handler._noisebench_cli = True  # type: ignore[attr-defined]
        root.addHandler(handler)
    root.setLevel(level)


_GLOBAL_FLAGS = ("-v", "--verbose", "-q", "--quiet")


def _split_serve(tokens: list[str]) -> tuple[list[str], list[str] | None]:
    """``[globals] serve ARGS...``: every token after ``serve`` belongs to the simulator."""
    for i, token in enumerate(tokens):
        if token == "serve":
            return tokens[: i + 1], tokens[i + 1 :]
        if token not in _GLOBAL_FLAGS:
            break
    return tokens, None


@contextlib.contextmanager
def _defined(items: list[str] | None) -> Iterator[None]:
    """``--define NAME=VALUE``: the command sees NAME=VALUE as if the environment held it (so
    every plan it loads, also through validate and station, expands it); restored after."""
    from noisebench.running.plan_values import parse_defines

    try:
        values = parse_defines(items)
    except ValueError as exc:
        raise InputError("--define", str(exc), fix="write --define NAME=VALUE") from None
    saved = {name: os.environ.get(name) for name in values}
    os.environ.update(values)
    try:
        yield
    finally:
        for name, old in saved.items():
            if old is None:
                os.environ.pop(name, None)
            else:
                os.environ[name] = old


def main(argv: Sequence[str] | None = None, *, out: TextIO | None = None) -> int:
    """Entry point of the ``noisebench`` console script; returns the exit code."""
    out = out or sys.stdout
    parser = build_parser()
    tokens = [str(t) for t in (sys.argv[1:] if argv is None else argv)]
    tokens, serve_args = _split_serve(tokens)
    try:
        args = parser.parse_args(tokens)
    except SystemExit as exc:  # argparse: --help (0) or a usage error (2)
        return int(exc.code or 0)
    if serve_args is not None:
        args.serve_args = serve_args
    _configure_logging(args)
    func: Callable[[argparse.Namespace, TextIO], int] = args.func
    try:
        with _defined(getattr(args, "define", None)):
            return func(args, out)
    except KeyboardInterrupt:
        print("noisebench: interrupted", file=sys.stderr)
        return EXIT_INTERRUPTED
    except (NoisebenchError, ValidationError, OSError, ValueError) as exc:
        logger.debug("error detail", exc_info=True)
        return _report(exc)
    except Exception as exc:  # noqa: BLE001 - a CLI never shows a traceback
        logger.debug("unexpected error", exc_info=True)
        print(
            f"noisebench: error: unexpected {type(exc).__name__}: {one_line(str(exc))} "
            "(run with -v for details and report it)",
            file=sys.stderr,
        )
        return EXIT_FAILED


__all__ = [
    "EXIT_FAILED",
    "EXIT_INPUT",
    "EXIT_INSTRUMENT",
    "EXIT_INTERRUPTED",
    "EXIT_MEASUREMENT",
    "EXIT_OK",
    "EXIT_SAFETY",
    "build_parser",
    "main",
]


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
