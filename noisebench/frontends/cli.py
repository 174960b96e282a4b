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
from pathlib import Path
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
    positive_seconds,
)
from noisebench.running.safety import cautions_text
from noisebench.units import format_frequency

logger = logging.getLogger("noisebench.frontends.cli")


# --------------------------------------------------------------------------- commands


def cmd_run(args: argparse.Namespace, out: TextIO) -> int:
    from noisebench.bench.registry import open_bench
    from noisebench.results.store import format_summary
    from noisebench.running.plan import load_plan
    from noisebench.running.progress import make_progress
    from noisebench.running.sequencer import run_plan

    plan = load_plan(args.plan)
    if args.resume and args.out:
        raise InputError(
            "--out",
            "cannot be combined with --resume (the run stays in its folder)",
            fix="drop --out",
        )
    if args.resume:
        from noisebench.results.store import check_resumable

        _require_started_run(Path(args.resume), args.plan)
        finished = _finish_complete_run(Path(args.resume), plan, out)
        if finished is not None:
            return finished
        check_resumable(args.resume)  # a wrong folder is refused before any instrument
    _print_profile_warnings(plan)
    session = open_bench(plan.bench, prompt=input)
    try:
        if session.real_hardware:
            print("Safety cautions:\n" + cautions_text(), file=sys.stderr)
        folder = Path(args.resume) if args.resume else (Path(args.out) if args.out else None)
        record, folder = run_plan(
            plan, folder=folder, resume=bool(args.resume), session=session, progress=make_progress()
        )
    finally:
        session.close()
    print(format_summary(record), file=out)
    print(f"results in {folder}", file=out)
    if record.info.status == "interrupted":
        print(
            f"interrupted: continue with `noisebench run {args.plan} --resume {folder}`",
            file=sys.stderr,
        )
        return EXIT_INTERRUPTED
    skipped = record.info.notes.get("skipped_points") or []
    if skipped:
        first = skipped[0]
        print(
            f"noisebench: error: {len(skipped)} point(s) not measured, first at "
            f"{format_frequency(first['freq_hz'])} ({first['stage']}): "
            f"{_one_line(first['reason'])} "
            f"(once fixed, `noisebench run {args.plan} --resume {folder}` measures them)",
            file=sys.stderr,
        )
        return EXIT_MEASUREMENT
    return EXIT_OK


def cmd_demo(args: argparse.Namespace, out: TextIO) -> int:
    from noisebench.frontends.demo import run_demo
    from noisebench.running.progress import make_progress

    summary = run_demo(
        Path(args.out), points=args.points, seed=args.seed, stream=out, progress=make_progress()
    )
    return EXIT_OK if summary.complete else EXIT_FAILED


def cmd_estimate(args: argparse.Namespace, out: TextIO) -> int:
    from noisebench.running.forecast import forecast_plan
    from noisebench.running.plan import load_plan

    plan = load_plan(args.plan)
    print(
        f"{plan.method.value.replace('_', '-')} method, {len(plan.points())} points "
        f"(forecast from the radiometer equation; no instrument touched)",
        file=out,
    )
    from noisebench.running.profile_check import applied_plan

    _print_profile_warnings(plan)
    print(forecast_plan(applied_plan(plan)).format(), file=out)  # RBWs as the profile rounds
    return EXIT_OK


def cmd_serve(args: argparse.Namespace, out: TextIO) -> int:
    from noisebench.sims.serve import main as serve_main

    try:
        return int(serve_main(list(args.serve_args), out=out, prog="noisebench serve"))
    except SystemExit as exc:  # the server's own --help or usage error
        return int(exc.code or 0)


def _require_started_run(folder: Path, plan_path: str) -> None:
    """InputError in plain words when no run was ever started in ``folder`` (the process was
    killed before it wrote its run description, or the path is wrong)."""
    from noisebench.results.store import RUN_INFO_FILE

    if folder.is_dir() and (folder / RUN_INFO_FILE).exists():
        return
    if folder.exists() and not folder.is_dir():
        raise InputError("--resume", f"{folder} is a file, not a run folder", fix="pass the folder")
    state = "does not exist" if not folder.exists() else f"holds no {RUN_INFO_FILE}"
    raise InputError(
        "--resume",
        f"no run was started in {folder} ({state}; a run killed before it began leaves nothing "
        "to resume)",
        fix=f"start it with `noisebench run {plan_path} --out {folder}`",
    )


def _missing_outputs(folder: Path, plots: bool, report: bool) -> list[str]:
    """Output files of a complete run that are absent (the run was killed while writing them)."""
    from noisebench.results.store import (
        PLOTS_DIR,
        REPORT_FILE,
        RESULTS_CSV_FILE,
        RESULTS_JSON_FILE,
    )

    wanted = [RESULTS_JSON_FILE, RESULTS_CSV_FILE] + ([REPORT_FILE] if report else [])
    missing = [name for name in wanted if not (folder / name).is_file()]
    if plots and not any((folder / PLOTS_DIR).glob("*.png")):
        missing.append(f"{PLOTS_DIR}/")
    return missing


def _finish_complete_run(folder: Path, plan, out: TextIO) -> int | None:
    """``--resume`` of a run whose points are all measured: write the outputs a kill left
    missing (exit 0), or say that nothing is left to do. None: the run is not complete."""
    from noisebench.results.store import format_summary, load_run, write_results
    from noisebench.running.sequencer import write_outputs

    record = load_run(folder)
    if record.info.status != "complete" or record.info.notes.get("skipped_points"):
        return None
    wants_plots, wants_report = bool(plan.output.plots), bool(plan.output.report)
    missing = _missing_outputs(folder, wants_plots, wants_report)
    if not missing:
        raise InputError(
            "folder",
            f"run {record.info.run_id} in {folder} is already complete with all its outputs",
            fix=f"start a new run to measure again; `noisebench render {folder}` draws plots "
            "and report again",
        )
    write_results(record, folder)
    write_outputs(record, folder, plots=wants_plots, report=wants_report)
    print(format_summary(record), file=out)
    print(
        f"run {record.info.run_id} was already complete; wrote what was missing "
        f"({', '.join(missing)}) in {folder}",
        file=out,
    )
    return EXIT_OK


def cmd_render(args: argparse.Namespace, out: TextIO) -> int:
    from noisebench.results.store import format_summary, load_run
    from noisebench.running.sequencer import write_outputs

    folder = Path(args.folder)
    record = load_run(folder)
    if args.no_plots:  # draw nothing, but embed the figures an earlier run or render left
        from noisebench.results.report import existing_figures, write_report

        figures = existing_figures(folder)
        written = [write_report(record, folder / "report.html", plots=figures)]
        if figures:
            print(f"embedded {len(figures)} existing figures from {figures[0].parent}", file=out)
    else:
        written = write_outputs(record, folder, plots=True, report=True)
    print(format_summary(record), file=out)
    for path in written:
        print(f"wrote {path}", file=out)
    return EXIT_OK


def cmd_validate(args: argparse.Namespace, out: TextIO) -> int:
    from noisebench.frontends.validate import validate_file

    path = Path(args.path)
    kind, summary, problems = validate_file(path)
    name = path.name or str(path)  # "." has no name
    if not problems:
        if kind == "plan":
            from noisebench.running.plan import load_plan

            _print_profile_warnings(load_plan(path))
        print(f"ok: {summary}", file=out)
    for line in problems:
        print(f"{name}: {line}", file=sys.stderr)
    return EXIT_INPUT if problems else EXIT_OK


def _print_profile_warnings(plan) -> None:
    """One line per setting the analyzer will apply differently from the plan (stderr)."""
    from noisebench.running.profile_check import profile_warnings

    for line in profile_warnings(plan):
        print(f"noisebench: warning: {_one_line(line)}", file=sys.stderr)


def cmd_probe(args: argparse.Namespace, out: TextIO) -> int:
    from noisebench.drivers.probe import format_probe, probe_analyzer

    print(
        "Probe: talks to the analyzer only; no noise source or generator is switched on. "
        "Keep the analyzer input terminated (50 ohm load) or connected to a passive, "
        "unpowered DUT, and follow the instrument manual's input-power limits.",
        file=sys.stderr,
    )
    results = probe_analyzer(args.resource, args.profile, timeout_s=args.timeout)
    print(format_probe(results, resource=args.resource, profile=str(args.profile)), file=out)
    if any(r.status == "FAIL" and r.check == "connect" for r in results):
        return EXIT_INSTRUMENT
    return EXIT_FAILED if any(r.status == "FAIL" for r in results) else EXIT_OK


def cmd_info(args: argparse.Namespace, out: TextIO) -> int:
    from noisebench.frontends.info import collect_info, format_info

    info = collect_info(scan=args.scan, timeout_s=args.timeout, ranges=args.ranges)
    print(format_info(info), file=out)
    return EXIT_OK


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


def _one_line(text: str) -> str:
    return " ".join(str(text).split())


def _report(exc: BaseException) -> int:
    """Print an error as one line per problem on stderr; return its exit code."""
    from noisebench.running.plan import PlanError, format_validation_error

    if isinstance(exc, PlanError):
        where = f"{exc.source}: " if exc.source else ""
        for line in exc.problems:
            print(f"noisebench: error: {where}{_one_line(line)}", file=sys.stderr)
        return EXIT_INPUT
    if isinstance(exc, ValidationError):
        for line in format_validation_error(exc):
            print(f"noisebench: error: {_one_line(line)}", file=sys.stderr)
        return EXIT_INPUT
    code = _exit_code(exc)
    text = _one_line(str(exc)) or type(exc).__name__
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
            f"noisebench: error: unexpected {type(exc).__name__}: {_one_line(str(exc))} "
            "(run with -v for details and report it)",
            file=sys.stderr,
        )
        return EXIT_FAILED


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
