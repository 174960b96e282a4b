"""The commands of the ``noisebench`` command line that measure, render and inspect: one
``cmd_<name>(args, out) -> exit code`` per subcommand (``run``, ``demo``, ``estimate``,
``serve``, ``render``, ``validate``, ``probe``, ``info``) with the helpers only they use.

The parser, the error-to-exit-code mapping and logging live in :mod:`noisebench.frontends.cli`,
which imports these; the production commands (``station``, ``db``) are in
:mod:`noisebench.frontends.dbcli`.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import TextIO

from noisebench.errors import InputError
from noisebench.frontends.argtypes import (
    EXIT_FAILED,
    EXIT_INPUT,
    EXIT_INSTRUMENT,
    EXIT_INTERRUPTED,
    EXIT_MEASUREMENT,
    EXIT_OK,
    one_line,
)
from noisebench.running.safety import cautions_text
from noisebench.units import format_frequency


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
            f"{one_line(first['reason'])} "
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
        from noisebench.results.plots import NARROW_DIR
        from noisebench.results.report import existing_figures, write_report

        figures = existing_figures(folder)
        written = [write_report(record, folder / "report.html", plots=figures)]
        narrow = sum(1 for f in figures if f.parent.name == NARROW_DIR)
        if figures:
            print(
                f"embedded {len(figures) - narrow} existing figures from {figures[0].parent}"
                f" ({narrow} with a narrow rendering for phones)",
                file=out,
            )
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
        print(f"noisebench: warning: {one_line(line)}", file=sys.stderr)


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
