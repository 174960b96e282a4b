"""Cross-field checks of a plan: the checks that need more than one field, the files the plan
names, the instrument profiles and the bench addresses."""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
from pydantic import (
    ValidationError,
)

from noisebench.bench.addresses import is_simulated
from noisebench.errors import InputError
from noisebench.running.plan_errors import format_validation_error
from noisebench.science.point import Method
from noisebench.units import format_frequency, format_frequency_range

if TYPE_CHECKING:  # annotations only: plan.py loads this module to run the checks
    from noisebench.running.plan import Plan

# --------------------------------------------------------------------------- cross-field checks


def cross_check(plan: Plan, *, check_files: bool = True) -> list[str]:
    """Checks that need more than one field (and the files the plan names)."""
    problems: list[str] = []
    problems += _check_segment_policies(plan)
    problems += _check_duplicates(plan)
    problems += _check_method_needs(plan)
    problems += _check_bench(plan)
    problems += _check_sampled(plan)
    if check_files:
        problems += _check_enr(plan)
        problems += _check_tables(plan)
        profile_problems = _check_profiles(plan)
        problems += profile_problems
        if not profile_problems:
            from noisebench.running.profile_check import profile_errors

            problems += profile_errors(plan)  # the plan against the analyzer's profile
    if plan.conversion is not None:
        problems += _check_conversion(plan, check_files=check_files)
        from noisebench.running.conversion import limit_nf_type_problems

        problems += limit_nf_type_problems(plan.conversion.nf_type, plan.limits)
    elif plan.gain is not None:
        for name in ("u_generator_flatness_db", "u_analyzer_flatness_db"):
            if getattr(plan.gain, name) is not None:
                problems.append(
                    f"gain.{name}: only used for a frequency-converting DUT (generator and "
                    "analyzer at different frequencies); remove it"
                )
    return problems


def _check_conversion(plan: Plan, *, check_files: bool) -> list[str]:
    """A converter plan: frequency plan, IF in the analyzer's range, RF/IF/image in the ENR
    table, IF bands and image clear of the LO leakage, the LO generator's range."""
    from noisebench.running.conversion import ImageRejection, conversion_problems

    section = plan.conversion
    assert section is not None
    problems = []
    try:
        fp = plan.frequency_plan()
        points = plan.points()
    except (InputError, ValidationError) as exc:
        return [str(exc) if isinstance(exc, InputError) else "sweep: invalid"]
    if section.lo.source == "generator" and plan.bench.lo is None and not plan.is_simulated:
        problems.append(
            'bench.lo: the LO comes from a generator (conversion.lo.source = "generator"); '
            'name it: lo = { resource = "TCPIP0::...::SOCKET" } (or source = "external")'
        )
    lo_bench = plan.bench.lo
    level = section.lo.level_dbm
    if section.lo.source == "generator" and lo_bench is not None and level is not None:
        if level > lo_bench.max_level_dbm:
            problems.append(
                f"conversion.lo.level_dbm: {level:g} dBm is above bench.lo.max_level_dbm "
                f"{lo_bench.max_level_dbm:g} dBm (raise max_level_dbm if the converter is rated "
                "for it)"
            )
    if section.lo.source == "external" and section.lo_leakage_dbm is None:
        problems.append(
            "conversion.lo_leakage_dbm: needed with an external LO, the power guard counts the "
            "LO line at the IF port (give the data-sheet LO leakage, dBm)"
        )
    image = None
    if (
        check_files
        or not isinstance(section.image_rejection_db, str)
        or (section.image_rejection_db in ("none", "equal"))
    ):
        try:
            image = ImageRejection(section, plan.resolve_path)
        except InputError as exc:
            problems.append(str(exc))
    analyzer_range = enr_range = lo_range = generator_range = None
    if plan.is_simulated:
        from noisebench.bench.registry import simulated_ranges

        ranges = simulated_ranges(plan.bench.analyzer.resource)
        if ranges is not None:
            analyzer_range, lo_range = ranges["analyzer"], ranges["lo"]
            generator_range = ranges["generator"]
            if plan.enr.table is None:
                enr_range = ranges["enr"]
    measured_gain = (
        plan.method is Method.GAIN and plan.gain is not None and plan.gain.source == "measure"
    )
    if measured_gain and plan.bench.generator is not None and not plan.is_simulated:
        from noisebench.bench.registry import generator_range_hz

        generator_range = generator_range_hz(plan.bench.generator.profile)
    if plan.enr.table is not None and check_files and plan.enr.extrapolate != "clamp":
        try:
            from noisebench.science.enr import EnrTable

            table = EnrTable.from_csv(plan.resolve_path(plan.enr.table))
            enr_range = table.range_hz
        except (ImportError, InputError, OSError):
            pass  # reported by _check_enr
    by_rf = {p.report_hz: p for p in points}
    ordered = [by_rf[float(f)] for f in fp.rf_hz]
    problems += conversion_problems(
        section,
        fp,
        band_hz=[p.policy.span_hz for p in ordered],
        rbw_hz=[p.policy.rbw_hz for p in ordered],
        analyzer_range_hz=analyzer_range,
        enr_range_hz=enr_range,
        lo_range_hz=lo_range,
        image_rejection=image,
        y_factor=plan.method is Method.Y_FACTOR,
    )
    if measured_gain:
        problems += _check_measured_conversion_gain(plan, fp, analyzer_range, generator_range)
    return problems


def _check_measured_conversion_gain(
    plan: Plan,
    fp: Any,
    analyzer_range: tuple[float, float] | None,
    generator_range: tuple[float, float] | None,
) -> list[str]:
    """A conversion gain measured with the generator at the RF and the analyzer at the IF:
    the THROUGH references need the generator at the RF and the IF, the analyzer at the IF and
    the RF; the tone's marker band at the IF must stay clear of the LO leakage."""
    from noisebench.running.conversion import tone_leakage_problems
    from noisebench.running.gain_measurement import GainMeasurementPlan

    section, gain = plan.conversion, plan.gain
    assert section is not None and gain is not None
    problems = []
    for name, rng, fix in (
        ("bench.generator", generator_range, "use a generator that reaches both"),
        ("bench.analyzer", analyzer_range, "use an analyzer that reads both"),
    ):
        if rng is None:
            continue
        lo, hi = rng
        for label, freqs in (("RF", fp.rf_hz), ("IF", fp.if_hz)):
            bad = [float(f) for f in freqs if not lo <= f <= hi]
            if bad:
                problems.append(
                    f"{name}: the {label} {format_frequency(bad[0])} is outside its "
                    f"{format_frequency_range(lo, hi)}; the measured conversion gain needs the "
                    f"generator and the analyzer at the RF and at the IF (THROUGH references) "
                    f'({fix}, or give the gain with source = "file")'
                )
    problems += tone_leakage_problems(
        section,
        fp,
        band_rbw=GainMeasurementPlan.model_fields["band_rbw"].default,
        rbw_hz=gain.rbw_hz,
    )
    return problems


def _profile_sections(plan: Plan) -> list[tuple[str, Any]]:
    """(key, section) of each instrument whose profile a real bench will load."""
    bench = plan.bench
    if is_simulated(bench.analyzer.resource):
        return []
    from noisebench.sampled.address import is_sampled

    out: list[tuple[str, Any]] = []
    if not is_sampled(bench.analyzer.resource):  # a sampled receiver has no SCPI profile
        out.append(("bench.analyzer", bench.analyzer))
    if bench.generator is not None:
        out.append(("bench.generator", bench.generator))
    if bench.lo is not None:
        out.append(("bench.lo", bench.lo))
    if bench.noise_source.drive == "supply":
        out.append(("bench.noise_source", bench.noise_source))
    return out


def _resolve_profiles(plan: Plan) -> None:
    """A profile file next to the plan is found from any working folder (relative file names
    are relative to the plan); packaged names and other paths are left as given."""
    for _key, section in _profile_sections(plan):
        candidate = plan.resolve_path(section.profile)
        if candidate.is_file():
            section.profile = str(candidate)


def _resolve_sampled(plan: Plan) -> None:
    """A ``sigmf://`` folder and a ``scale=`` file relative to the plan are found from any
    working folder (relative names are relative to the plan)."""
    from urllib.parse import parse_qs, urlencode, urlsplit

    from noisebench.sampled.address import is_sampled

    section = plan.bench.analyzer
    resource = section.resource
    parts = urlsplit(resource)
    if not (is_sampled(resource) or parts.scheme == "sim"):
        return
    query = parse_qs(parts.query, keep_blank_values=True)
    if parts.scheme != "sigmf" and "scale" not in query:
        return
    if "scale" in query:
        query["scale"] = [str(plan.resolve_path(query["scale"][-1]))]
    target = parts.netloc + parts.path
    if parts.scheme == "sigmf" and target:
        target = str(plan.resolve_path(target))
    text = f"{parts.scheme}://{target}"
    if query:
        text += "?" + urlencode({k: v[-1] for k, v in query.items()}, safe="/:")
    section.resource = text


def _check_sampled(plan: Plan) -> list[str]:
    """A sampled receiver's address, its recordings folder and scale file, and what recordings
    cannot do (drive a generator or a noise source)."""
    from noisebench.bench.registry import simulated_receiver_options
    from noisebench.sampled.address import is_sampled, parse_sampled_address

    resource = plan.bench.analyzer.resource
    key = "bench.analyzer.resource"
    try:
        if is_sampled(resource):
            address = parse_sampled_address(resource)
            options = address.options
        elif (sampled := simulated_receiver_options(resource)) is not None:
            address, options = None, sampled
        else:
            return []
    except InputError as exc:
        return [f"{key}: {exc.message.split(': ', 1)[-1]}"]
    problems = []
    if options.scale and not Path(options.scale).is_file():
        problems.append(f"{key}: scale file {options.scale!r} not found (check the path)")
    if address is not None and address.scheme == "sigmf":
        if not Path(address.target).is_dir():
            problems.append(f"{key}: no recordings folder {address.target!r}")
        else:
            problems += _check_recorded_time(plan, address.target)
        if plan.bench.generator is not None:
            problems.append(
                'bench.generator: recordings cannot drive a generator (use [gain] source = "file" '
                'or "constant")'
            )
        if plan.bench.noise_source.drive not in ("auto", "none"):
            problems.append(
                "bench.noise_source.drive: with recordings the noise source is the recorded "
                'state (use "auto", or "none" for the gain method)'
            )
    if address is not None and address.scheme == "samples":
        if plan.bench.noise_source.drive in ("auto", "analyzer"):
            problems.append(
                "bench.noise_source.drive: a sampled receiver has no noise-source drive output "
                '(use "supply", "operator" or "none")'
            )
    return problems


def _check_recorded_time(plan: Plan, folder: str) -> list[str]:
    """Every state the method reads must hold the time the plan may spend on it: a point's
    time limit bounds what its hot and cold readings (or its floor / DUT readings) consume, so
    ``time_limit_s`` (times the points one recording serves) seconds per state never run out."""
    from noisebench.sampled.sigmf_io import SigmfRecordings

    try:
        recordings = SigmfRecordings(folder)
    except InputError as exc:
        return [f"bench.analyzer.resource: {exc.message.split(': ', 1)[-1]}"]
    if plan.method is Method.Y_FACTOR:
        needs = [("through", "hot"), ("through", "cold"), ("dut", "hot"), ("dut", "cold")]
    else:
        needs = [("termination", "cold"), ("dut", "cold")]
    demand: dict[float, float] = {}
    for point in plan.points():
        span = point.policy.span_hz
        try:
            center = recordings.center_for(point.freq_hz, span)
        except InputError as exc:
            return [f"sweep: {exc.message.split(': ', 1)[-1]}"]
        demand[center] = demand.get(center, 0.0) + point.policy.time_limit_s
    problems = []
    rate = recordings.sample_rate_hz
    for center, seconds in sorted(demand.items()):
        held = {(c, st): recordings.remaining_samples(center, c, st) / rate for c, st in needs}
        (connection, state), have = min(held.items(), key=lambda item: item[1])
        if have < seconds:
            problems.append(
                f"acquisition.time_limit_s: the points at {format_frequency(center, 9)} may read "
                f"{seconds:g} s "
                f"of each state, the recordings hold {have:.3g} s of {connection} {state} "
                "(lower time_limit_s or record longer)"
            )
    return problems


def _check_profiles(plan: Plan) -> list[str]:
    """Each instrument profile must load (checked here, not when the instrument is opened)."""
    from noisebench.bench.registry import profile_problem

    problems = []
    for key, section in _profile_sections(plan):
        problem = profile_problem(section.profile)
        if problem is not None:
            problems.append(f"{key}.profile: {_one_line(problem).removeprefix('profile: ')}")
    return problems


def _one_line(text: str) -> str:
    return " ".join(str(text).split())


def _check_segment_policies(plan: Plan) -> list[str]:
    """Each segment's overrides merged with the plan defaults must still be consistent."""
    problems = []
    for i in range(len(plan.sweep.segments)):
        try:
            plan.segment_policy(i)
        except ValidationError as exc:
            problems += [f"sweep.segments[{i}].{line}" for line in format_validation_error(exc)]
    return problems


def _check_duplicates(plan: Plan) -> list[str]:
    seen: dict[float, str] = {}
    problems = []
    for key, freqs in _frequency_sources(plan):
        for f in freqs:
            rounded = round(float(f), 3)
            if rounded in seen and seen[rounded] != key:
                problems.append(
                    f"{key}: {format_frequency(f)} is also in {seen[rounded]} (each frequency once)"
                )
            elif rounded in seen:
                problems.append(f"{key}: {format_frequency(f)} is listed twice")
            seen[rounded] = key
    return problems


def _frequency_sources(plan: Plan) -> list[tuple[str, np.ndarray]]:
    out = []
    if plan.sweep.freqs_hz is not None:
        out.append(("sweep.freqs_hz", np.asarray(plan.sweep.freqs_hz)))
    for i, seg in enumerate(plan.sweep.segments):
        out.append((f"sweep.segments[{i}]", seg.frequencies_hz()))
    return out


def _check_method_needs(plan: Plan) -> list[str]:
    problems = []
    if plan.method is Method.GAIN:
        if plan.gain is None:
            problems.append(
                "gain: the gain method needs the DUT gain "
                '([gain] source = "measure", "file" or "constant")'
            )
        elif plan.gain.source == "measure" and plan.bench.generator is None:
            problems.append(
                'bench.generator: gain source "measure" needs a generator '
                '(or use source = "file" / "constant")'
            )
        else:
            problems += _check_stated_gain_limits(plan)
    if plan.method is Method.Y_FACTOR and plan.bench.noise_source.drive == "none":
        problems.append(
            "bench.noise_source.drive: the Y-factor method needs a noise source "
            '(drive = "none" is for the gain method)'
        )
    return problems


def _check_stated_gain_limits(plan: Plan) -> list[str]:
    """A gain limit needs a measured gain: with a stated one (``[gain] source = "file"`` or
    ``"constant"``) the gain method reports the stated value, and the limit would pass (or
    fail) trivially whatever the unit does (flag policy: ``gain_not_measured``)."""
    assert plan.gain is not None
    if plan.gain.source == "measure" or plan.limits is None:
        return []
    problems = []
    for i, band in enumerate(plan.limits.bands):
        for key in ("gain_min_db", "gain_max_db", "flatness_db"):
            if getattr(band, key) is not None:
                problems.append(
                    f"limits.bands[{i}].{key}: the gain is stated "
                    f'([gain] source = "{plan.gain.source}"), not measured, so a gain limit '
                    'could only pass trivially; set [gain] source = "measure" (with a '
                    "generator), use the Y-factor method, or remove the gain limit"
                )
    return problems


def _check_bench(plan: Plan) -> list[str]:
    problems = []
    from noisebench.bench.registry import address_problems

    analyzer_sim = is_simulated(plan.bench.analyzer.resource)
    try:
        spans = [
            (p.freq_hz - p.policy.span_hz / 2, p.freq_hz + p.policy.span_hz / 2)
            for p in plan.points()
        ]
    except (ValidationError, InputError):  # a bad segment policy: reported by its own check
        spans = None
    problems += address_problems(plan.bench.analyzer.resource, spans)
    others = [
        (
            "bench.generator.resource",
            plan.bench.generator.resource if plan.bench.generator else None,
        ),
        ("bench.noise_source.resource", plan.bench.noise_source.resource),
        ("bench.lo.resource", plan.bench.lo.resource if plan.bench.lo else None),
    ]
    for key, res in others:
        if res is None or res == "sim":
            if res == "sim" and not analyzer_sim:
                problems.append(
                    f'{key}: "sim" means the simulated bench, but the analyzer is '
                    f"{plan.bench.analyzer.resource!r}"
                )
            continue
        if analyzer_sim != is_simulated(res):
            problems.append(
                f"{key}: {res!r} cannot be mixed with the analyzer "
                f"{plan.bench.analyzer.resource!r} (one bench, simulated or real)"
            )
    return problems


def _missing_file(key: str, path: Path) -> str:
    if path.is_dir():
        return f"{key}: {str(path)!r} is a folder, not a file (name the file itself)"
    return f"{key}: file {str(path)!r} not found"


def _check_enr(plan: Plan) -> list[str]:
    if plan.method is not Method.Y_FACTOR:
        return []
    if plan.enr.table is None:
        if plan.is_simulated:
            return []
        return [
            "enr.table: the Y-factor method needs the noise source's ENR table "
            '(e.g. table = "enr_ns1234.csv")'
        ]
    path = plan.resolve_path(plan.enr.table)
    if not path.is_file():
        return [_missing_file("enr.table", path)]
    try:
        from noisebench.science.enr import EnrTable

        table = EnrTable.from_csv(path)
    except ImportError:  # pragma: no cover - ENR module not yet in the tree
        return []
    except InputError as exc:
        return [f"enr.table: {exc.message}"]
    if table.range_hz is None or plan.conversion is not None:
        return []  # flat table; a converter's RF, image and IF are checked by _check_conversion
    return _coverage_problems(
        "enr.table",
        path.name,
        np.asarray(table.freq_hz, float),
        plan,
        allow_clamp=plan.enr.extrapolate == "clamp",
    )


def _table_freqs_hz(plan: Plan, key: str) -> np.ndarray:
    """Where a table is read: the analyzer frequencies, or for a converter the RF and image
    (input loss, DUT gain) or the IF (output loss)."""
    fp = plan.frequency_plan() if plan.conversion is not None else None
    if fp is None or key == "corrections.output_loss":
        return plan.freqs_hz()
    if key == "corrections.input_loss":
        return np.concatenate([fp.rf_hz, fp.image_hz])
    return np.asarray(fp.rf_hz)


def _coverage_problems(
    key: str, name: str, table_freq_hz: np.ndarray, plan: Plan, *, allow_clamp: bool
) -> list[str]:
    freqs = _table_freqs_hz(plan, key)
    lo, hi = float(np.min(table_freq_hz)), float(np.max(table_freq_hz))
    outside = freqs[(freqs < lo * (1 - 1e-12)) | (freqs > hi * (1 + 1e-12))]
    if outside.size == 0 or allow_clamp:
        return []
    fix = (
        'narrow the sweep or allow extrapolate = "clamp"'
        if key == "enr.table"
        else "narrow the sweep or extend the table"
    )
    return [
        f"{key}: {name} covers {format_frequency_range(lo, hi)} but the sweep has {outside.size} "
        "point(s) "
        f"outside it (first {format_frequency(outside[0])}){_unit_hint(freqs, lo, hi)}; {fix}"
    ]


def _unit_hint(freqs_hz: np.ndarray, lo_hz: float, hi_hz: float) -> str:
    """A hint when the sweep or the table would fit if one of them were read in kHz/MHz/GHz."""

    def inside(values: np.ndarray, low: float, high: float) -> bool:
        return bool(np.all((values >= low * (1 - 1e-9)) & (values <= high * (1 + 1e-9))))

    for unit, scale in (("kHz", 1e3), ("MHz", 1e6), ("GHz", 1e9)):
        if inside(freqs_hz * scale, lo_hz, hi_hz):
            return f" (the sweep looks like {unit}: plan frequencies are in Hz)"
        if inside(freqs_hz, lo_hz * scale, hi_hz * scale):
            return f" (the table looks like {unit}: name its column freq_{unit.lower()})"
    return ""


def _check_tables(plan: Plan) -> list[str]:
    problems = []
    items = [
        ("corrections.input_loss", plan.corrections.input_loss),
        ("corrections.output_loss", plan.corrections.output_loss),
    ]
    if plan.gain is not None and plan.gain.source == "file" and plan.gain.file:
        items.append(("gain.file", plan.gain.file))
    for key, value in items:
        if not isinstance(value, str):
            continue
        path = plan.resolve_path(value)
        if not path.is_file():
            problems.append(_missing_file(key, path))
            continue
        try:
            from noisebench.science.gain_files import load_gain_table

            table = load_gain_table(path)
        except ImportError:  # pragma: no cover
            continue
        except (InputError, OSError, ValueError) as exc:
            problems.append(f"{key}: {getattr(exc, 'message', exc)}")
            continue
        coverage = (
            []
            if table.range_hz is None
            else _coverage_problems(
                key, path.name, np.asarray(table.freq_hz, float), plan, allow_clamp=False
            )
        )
        problems += coverage
        if key.startswith("corrections.") and not coverage:
            problems += _gain_in_loss_table(key, value, table, plan)
    return problems


def _gain_in_loss_table(key: str, name: str, table: Any, plan: Plan) -> list[str]:
    """A loss table must not give gain at a sweep frequency (the run would refuse it there;
    the same 1e-3 dB tolerance as :mod:`noisebench.running.corrections`)."""
    freqs = _table_freqs_hz(plan, key)
    loss_db = np.asarray(table.at(freqs).loss_db, dtype=float) * np.ones_like(freqs)
    bad = np.flatnonzero(loss_db < -1e-3)
    if bad.size == 0:
        return []
    i = int(bad[0])
    return [
        f"{key}: {name} gives a gain of {-loss_db[i]:.3f} dB at {format_frequency(freqs[i])}, not "
        "a "
        "loss (give loss_db >= 0, or a cable's |S21| (<= 0 dB))"
    ]
