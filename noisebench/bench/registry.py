"""Address strings -> instrument back ends, in one place.

``sim://<scenario>?seed=N``    the in-process simulated bench (noisebench.sims); with
                               ``&receiver=sampled`` its sampled receiver instead of the analyzer
``sigmf://<folder>``           a folder of SigMF hot/cold recordings (noisebench.sampled)
``samples://<name>``           a sample source registered from Python, or ``module:factory``
``TCPIP0::host::port::SOCKET`` (any VISA resource string) the SCPI drivers (noisebench.drivers)

:func:`open_bench` turns a plan's ``[bench]`` section into a :class:`BenchSession`: the
:class:`~noisebench.bench.instruments.Bench` the sequencer drives, plus a ``connect`` callback that
puts the analyzer input on the DUT, on the noise source directly (THROUGH, system calibration)
or on a matched termination (floor). On the in-process simulator ``connect`` moves the simulated
path; on the SCPI simulator it sends the profile's simulator path command; on a real bench it
asks the operator to move the cables. The drivers and the simulator are imported only when an
address asks for them, so the core never depends on either.
"""

from __future__ import annotations

import logging
import time
import uuid
from collections.abc import Callable
from dataclasses import dataclass, field
from enum import Enum
from typing import TYPE_CHECKING, Any

from noisebench.bench.addresses import is_simulated
from noisebench.bench.capabilities import NoiseDriveOutput, PathSwitch
from noisebench.bench.instruments import Analyzer, Bench
from noisebench.errors import InputError, NoisebenchError

if TYPE_CHECKING:  # annotations only: the bench layer does not import the running layer
    from noisebench.running.plan import BenchSection
    from noisebench.science.enr import EnrTable

logger = logging.getLogger(__name__)

Prompt = Callable[[str], Any]


class Connection(str, Enum):
    """What the analyzer input sees."""

    DUT = "dut"  # noise source (or termination) -> DUT -> analyzer
    THROUGH = "through"  # noise source -> analyzer (Y-factor system calibration, gain reference)
    TERMINATION = "termination"  # matched load at ambient -> analyzer (gain-method floor)


OPERATOR_INSTRUCTIONS: dict[Connection, str] = {
    Connection.DUT: "Connect the DUT: noise source (or termination) -> DUT input, DUT output "
    "-> analyzer input. Power the DUT.",
    Connection.THROUGH: "Remove the DUT: connect the noise source straight to the analyzer "
    "input (through the same cables and adapters).",
    Connection.TERMINATION: "Terminate the analyzer input with a matched load at room "
    "temperature (no DUT, no noise source).",
}


def address_problems(resource: str, spans_hz: list[tuple[float, float]] | None) -> list[str]:
    """Plan-time problems of an analyzer address that only its back end can judge (a
    simulated bench's scenario and frequency range), one line each; [] for other addresses."""
    if is_simulated(resource):
        from noisebench.sims.address import simulated_bench_problems

        return simulated_bench_problems(resource, spans_hz)
    return []


def analyzer_profile(section: BenchSection) -> Any:
    """The analyzer profile a real bench would load; None for the simulated bench or a profile
    that does not load (:func:`profile_problem` reports that)."""
    if is_simulated(section.analyzer.resource):
        return None
    from noisebench.drivers.profile import load_profile

    try:
        return load_profile(section.analyzer.profile)
    except InputError:
        return None


def profile_problem(profile: str) -> str | None:
    """Why an instrument profile (packaged name or file) does not load; None when it does."""
    from noisebench.drivers.profile import load_profile

    try:
        load_profile(profile)
    except InputError as exc:
        return exc.message
    return None


def generator_range_hz(profile: str) -> tuple[float, float] | None:
    """The frequency range (Hz) a generator profile declares (``frequency_hz`` min and max);
    None when it declares no range or does not load (reported by the profile check)."""
    from noisebench.drivers.profile import load_profile

    try:
        loaded = load_profile(profile)
    except InputError:
        return None
    section = loaded.generator
    if section is None:
        return None
    setting = section.settings.frequency_hz
    if setting.min is None or setting.max is None:
        return None
    return float(setting.min) * setting.scale, float(setting.max) * setting.scale


def simulated_receiver_options(resource: str) -> Any:
    """The sampled-receiver options of a ``sim://...&receiver=sampled`` address; None for any
    other address, or an invalid one (:func:`address_problems` reports that)."""
    if not is_simulated(resource):
        return None
    from noisebench.sims.address import parse_sim_address

    try:
        address = parse_sim_address(resource)
    except InputError:
        return None
    return address.sampled if address.receiver == "sampled" else None


@dataclass
class BenchSession:
    """An opened bench with its connection callback.

    ``kind`` is ``"simulated"``, ``"scpi"``, ``"sampled"`` (a live sample source) or
    ``"recorded"`` (SigMF recordings: nothing is driven). What a back end supplies besides the
    instruments is explicit: ``enr_table``, the noise source's own ENR table when the bench
    knows it (used when the plan names none; for the simulated bench this module builds it
    from the simulator's plain numbers, :func:`simulated_enr_table`); ``clock``, the
    instrument time in seconds when the bench keeps one (None: wall time); ``wait``, how a
    settling wait passes (the simulated bench advances its clock; None: a real sleep). ``sim``
    is the simulator object itself, for the front ends and tests that compare with its truth;
    the core never reads it.
    """

    bench: Bench
    kind: str
    resources: dict[str, str]
    _move: Callable[[Connection], None]
    enr_table: EnrTable | None = None
    clock: Callable[[], float] | None = None
    clock_id: str = field(default_factory=lambda: uuid.uuid4().hex)
    wait: Callable[[float], Any] | None = None
    sim: Any = None
    scpi_simulator: bool = False
    connection: Connection | None = None
    moves: list[Connection] = field(default_factory=list)

    def connect(self, target: Connection | str) -> None:
        """Put the analyzer input on ``target`` (no-op when it is already there)."""
        target = Connection(target)
        if target is self.connection:
            return
        self.bench.safe_state()  # never move cables with the source hot or the tone on
        self._move(target)
        self.connection = target
        self.moves.append(target)
        logger.info("bench connected: %s", target.value)

    @property
    def real_hardware(self) -> bool:
        """True unless every instrument is simulated (in process or over SCPI)."""
        return self.kind not in ("simulated", "recorded") and not self.scpi_simulator

    def clock_reading(self) -> tuple[str, float] | None:
        """(this session's clock id, instrument time) when the bench keeps a clock: a time
        from another session's clock is not comparable (a new simulated bench starts at 0)."""
        if self.clock is None:
            return None
        return (self.clock_id, float(self.clock()))

    def instrument_time_s(self) -> float | None:
        """Simulated instrument clock (None on real instruments: use wall time)."""
        return float(self.clock()) if self.clock is not None else None

    def settle(self, seconds: float) -> None:
        """Let ``seconds`` of settling pass: on the bench's own clock when it keeps one (a
        simulated bench: no wall time passes and runs repeat exactly), else in real time."""
        if seconds <= 0:
            return
        if self.wait is not None:
            self.wait(seconds)
        else:
            time.sleep(seconds)

    def close(self) -> None:
        """Safe state, then close every instrument. Idempotent; never raises."""
        try:
            self.bench.close()
        except Exception:  # noqa: BLE001 - closing is best effort
            logger.warning("closing the bench failed", exc_info=True)


def open_bench(
    section: BenchSection, *, prompt: Prompt = input, enr_drive_v: float | None = None
) -> BenchSession:
    """Open the instruments named by a plan's bench section."""
    resource = section.analyzer.resource
    if is_simulated(resource):
        return _open_simulated(section)
    from noisebench.sampled.address import is_sampled

    if is_sampled(resource):
        return _open_sampled(section, prompt=prompt, enr_drive_v=enr_drive_v)
    return _open_scpi(section, prompt=prompt, enr_drive_v=enr_drive_v)


# --------------------------------------------------------------------------- simulated


def _open_simulated(section: BenchSection) -> BenchSession:
    from noisebench.sims.address import parse_sim_address
    from noisebench.sims.bench import SimulatedBench

    address = parse_sim_address(section.analyzer.resource)
    sim = SimulatedBench.from_scenario(address.scenario, seed=address.seed)
    analyzer = None
    if address.receiver == "sampled":
        from noisebench.sims.samples import SimSampleReceiver

        analyzer = _sampled_analyzer(
            SimSampleReceiver(sim, seed=address.seed),
            address.sampled,
            section,
        )
    return simulated_session(sim, section, resource=section.analyzer.resource, analyzer=analyzer)


def simulated_session(
    sim: Any,
    section: BenchSection | None = None,
    *,
    resource: str = "sim://custom",
    analyzer: Any = None,
) -> BenchSession:
    """A session on an already built :class:`noisebench.sims.bench.SimulatedBench`.

    For tests and benchmarks that build the simulator with scenario overrides. Without a
    ``section`` the noise source and the generator are both kept.
    """
    from noisebench.sims.bench import Path as SimPath

    bench = sim.as_bench()
    if analyzer is not None:  # the simulated sampled receiver in place of the analyzer
        bench.analyzer = analyzer
    if section is not None:
        if section.noise_source.drive == "none":
            bench.noise_source = None
        if section.generator is None:
            bench.generator = None
        if section.ambient_k is not None:
            bench.ambient_k = section.ambient_k
    paths = {
        Connection.DUT: SimPath.DUT,
        Connection.THROUGH: SimPath.THROUGH,
        Connection.TERMINATION: SimPath.TERMINATION,
    }
    resources = {"analyzer": resource}
    if bench.generator is not None:
        resources["generator"] = resource
    if bench.lo_generator is not None:
        resources["lo"] = resource
    return BenchSession(
        bench=bench,
        kind="simulated",
        resources=resources,
        _move=lambda target: sim.set_path(paths[target]),
        enr_table=simulated_enr_table(sim),
        clock=lambda: sim.clock.now_s,
        wait=sim.clock.advance,
        sim=sim,
    )


def simulated_enr_table(sim: Any) -> EnrTable:
    """The simulated noise source's calibration sheet (``sim.enr_calibration``, plain numbers)
    as the core's :class:`~noisebench.science.enr.EnrTable`: what an operator would load from
    the source's CSV. Built here, in the composition root, so the simulator imports no
    measurement code (``tests/test_sim_independence.py``)."""
    from noisebench.science.enr import EnrMetadata, EnrTable

    cal = sim.enr_calibration
    return EnrTable(
        freq_hz=list(cal.freq_hz),
        enr_db=list(cal.enr_db),
        u_enr_db=None if cal.u_enr_db is None else list(cal.u_enr_db),
        metadata=EnrMetadata(
            serial=cal.serial,
            nominal_drive_v=cal.nominal_drive_v,
            enr_reference=cal.enr_reference,
            description=cal.description,
        ),
    )


def bench_model(section: BenchSection) -> Any:
    """A model of the bench for forecasts, when the address offers one (the simulated bench:
    :class:`noisebench.sims.forecast_model.SimulatedBenchModel`); None otherwise."""
    if not is_simulated(section.analyzer.resource):
        return None
    from noisebench.sims.address import parse_sim_address
    from noisebench.sims.bench import SimulatedBench
    from noisebench.sims.forecast_model import SimulatedBenchModel

    address = parse_sim_address(section.analyzer.resource)
    return SimulatedBenchModel(SimulatedBench.from_scenario(address.scenario, seed=address.seed))


def settings_analyzer(section: BenchSection, model: Any) -> Any:
    """The analyzer whose applied settings and timing a forecast uses, without acquiring: the
    model's (simulated) analyzer, or a sampled analyzer (the simulated receiver, or SigMF
    recordings read for their metadata only); None for a real instrument (the forecast then
    uses a nominal swept-analyzer model)."""
    from urllib.parse import urlsplit

    resource = section.analyzer.resource
    scheme = urlsplit(resource).scheme
    if is_simulated(resource):
        from noisebench.sims.address import parse_sim_address
        from noisebench.sims.forecast_model import SimulatedBenchModel

        address = parse_sim_address(resource)
        if not isinstance(model, SimulatedBenchModel):
            return None
        if address.receiver != "sampled":
            return model.analyzer
        from noisebench.sampled.analyzer import SampledAnalyzer
        from noisebench.sims.samples import SimSampleReceiver

        options = address.sampled
        assert options is not None  # receiver=sampled always carries its options
        return SampledAnalyzer(
            SimSampleReceiver(model.sim), window=options.window, overlap=options.overlap
        )
    if scheme == "sigmf":
        from noisebench.sampled.address import parse_sampled_address
        from noisebench.sampled.analyzer import SampledAnalyzer
        from noisebench.sampled.sigmf_io import SigmfRecordings

        sampled = parse_sampled_address(resource)
        return SampledAnalyzer(
            SigmfRecordings(sampled.target),
            window=sampled.options.window,
            overlap=sampled.options.overlap,
        )
    return model.analyzer if model is not None else None


# --------------------------------------------------------------------------- sampled


def _sampled_analyzer(
    source: Any, options: Any, section: BenchSection | None, recorded_scale: Any = None
) -> Any:
    """The analyzer on ``source``; a ``scale=`` file wins over a scale stored with recordings."""
    from noisebench.sampled.analyzer import SampledAnalyzer
    from noisebench.sampled.scale import load_scale

    scale = load_scale(options.scale) if options.scale else recorded_scale
    return SampledAnalyzer(
        source,
        window=options.window,
        overlap=options.overlap,
        iq_correction=options.iq_correction,
        scale=scale,
        max_input_power_dbm=section.analyzer.max_input_dbm if section is not None else None,
        resource=section.analyzer.resource if section is not None else "",
    )


def _open_sampled(
    section: BenchSection, *, prompt: Prompt, enr_drive_v: float | None
) -> BenchSession:
    """``sigmf://`` recordings (connections and the noise source select annotated ranges) or
    a ``samples://`` source driven live (noise source and generator as on any bench)."""
    from noisebench.sampled.address import parse_sampled_address

    address = parse_sampled_address(section.analyzer.resource)
    resources = {"analyzer": section.analyzer.resource}
    if address.scheme == "sigmf":
        from noisebench.sampled.sigmf_io import BenchState, RecordedNoiseSource, SigmfRecordings

        if section.generator is not None:
            raise InputError(
                "bench.generator",
                "recordings cannot drive a generator",
                fix='remove it; use [gain] source = "file" or "constant"',
            )
        if section.noise_source.drive not in ("auto", "none"):
            raise InputError(
                "bench.noise_source.drive",
                f"{section.noise_source.drive!r}: with recordings the noise source is the "
                "recorded state",
                fix='use drive = "auto" (or "none" for the gain method)',
            )
        state = BenchState()
        recordings = SigmfRecordings(address.target, state=state)
        analyzer = _sampled_analyzer(recordings, address.options, section, recordings.scale)
        source = None
        if section.noise_source.drive == "auto":
            source = RecordedNoiseSource(
                state, recordings.cold_temperature_k, f"sigmf://{address.target}"
            )
        bench = Bench(analyzer=analyzer, noise_source=source, ambient_k=section.ambient_k)

        def select(target: Connection) -> None:
            state.connection = target.value

        return BenchSession(bench=bench, kind="recorded", resources=resources, _move=select)
    from noisebench.sampled.source import open_registered

    if section.noise_source.drive in ("auto", "analyzer"):
        raise InputError(
            "bench.noise_source.drive",
            "a sampled receiver has no noise-source drive output",
            fix='use drive = "supply" (with its resource), "operator" or "none"',
        )
    opened: list[Any] = []
    try:
        analyzer = _sampled_analyzer(open_registered(address.target), address.options, section)
        opened.append(analyzer)
        source = _open_noise_source(section, analyzer, prompt, enr_drive_v)
        if source is not None:
            opened.append(source)
        generator = None
        if section.generator is not None:
            from noisebench import drivers

            generator = drivers.open_generator(
                section.generator.resource,
                profile=section.generator.profile,
                timeout_s=section.generator.timeout_s,
            )
            resources["generator"] = section.generator.resource
    except BaseException:
        for inst in reversed(opened):
            _close_quietly(inst)
        raise
    if section.noise_source.resource:
        resources["noise_source"] = section.noise_source.resource
    bench = Bench(
        analyzer=analyzer, noise_source=source, generator=generator, ambient_k=section.ambient_k
    )
    return BenchSession(
        bench=bench, kind="sampled", resources=resources, _move=_operator_mover(prompt)
    )


# --------------------------------------------------------------------------- SCPI


def _open_scpi(section: BenchSection, *, prompt: Prompt, enr_drive_v: float | None) -> BenchSession:
    from noisebench import drivers

    opened: list[Any] = []
    try:
        analyzer = drivers.open_analyzer(
            section.analyzer.resource,
            profile=section.analyzer.profile,
            timeout_s=section.analyzer.timeout_s,
        )
        opened.append(analyzer)
        source = _open_noise_source(section, analyzer, prompt, enr_drive_v)
        if source is not None:
            opened.append(source)
        generator = None
        if section.generator is not None:
            generator = drivers.open_generator(
                section.generator.resource,
                profile=section.generator.profile,
                timeout_s=section.generator.timeout_s,
            )
            opened.append(generator)
        lo_generator = None
        if section.lo is not None:
            lo_generator = drivers.open_generator(
                section.lo.resource,
                profile=section.lo.profile,
                timeout_s=section.lo.timeout_s,
                max_level_dbm=section.lo.max_level_dbm,
            )
            opened.append(lo_generator)
    except BaseException:
        for inst in reversed(opened):
            _close_quietly(inst)
        raise
    bench = Bench(
        analyzer=analyzer,
        noise_source=source,
        generator=generator,
        ambient_k=section.ambient_k,
        lo_generator=lo_generator,
    )
    resources = {"analyzer": section.analyzer.resource}
    if section.noise_source.resource:
        resources["noise_source"] = section.noise_source.resource
    if section.generator is not None:
        resources["generator"] = section.generator.resource
    if section.lo is not None:
        resources["lo"] = section.lo.resource
    switch = analyzer if isinstance(analyzer, PathSwitch) and analyzer.has_path_switch else None
    sim_path = section.connect == "auto" and switch is not None
    move = _path_mover(switch) if switch is not None and sim_path else _operator_mover(prompt)
    return BenchSession(
        bench=bench, kind="scpi", resources=resources, _move=move, scpi_simulator=sim_path
    )


def _open_noise_source(
    section: BenchSection, analyzer: Analyzer, prompt: Prompt, enr_drive_v: float | None
) -> Any:
    from noisebench import drivers

    cfg = section.noise_source
    drive = "analyzer" if cfg.drive == "auto" else cfg.drive
    if drive == "none":
        return None
    if drive == "analyzer":
        if not (isinstance(analyzer, NoiseDriveOutput) and analyzer.has_noise_drive):
            raise InputError(
                "bench.noise_source.drive",
                f"{cfg.drive!r}: the analyzer {analyzer.identity!r} has no noise-source drive "
                "output (its profile names no noise_drive commands)",
                fix='use drive = "supply" (with its resource), "operator" or "none", or a '
                "profile with noise_drive",
            )
        return drivers.AnalyzerDriveNoiseSource(analyzer, settle_time_s=cfg.settle_time_s)
    if drive == "operator":
        return drivers.OperatorNoiseSource(prompt=prompt, settle_time_s=cfg.settle_time_s)
    drive_v = cfg.drive_v or enr_drive_v
    if drive_v is None:
        raise InputError(
            "bench.noise_source.drive_v",
            "the supply voltage is not known",
            fix="set drive_v, or give nominal_drive_v in the ENR table",
        )
    assert cfg.resource is not None  # the plan requires it for drive = "supply"
    return drivers.open_supply_noise_source(
        cfg.resource,
        drive_v=drive_v,
        current_limit_a=cfg.current_limit_a,
        max_drive_v=cfg.max_drive_v,
        settle_time_s=cfg.settle_time_s,
        profile=cfg.profile,
    )


def _path_mover(analyzer: PathSwitch) -> Callable[[Connection], None]:
    def move(target: Connection) -> None:
        analyzer.set_path(target.value)

    return move


def _operator_mover(prompt: Prompt) -> Callable[[Connection], None]:
    def move(target: Connection) -> None:
        prompt(f"{OPERATOR_INSTRUCTIONS[target]} Press Enter when done. ")

    return move


def _close_quietly(inst: Any) -> None:
    try:
        inst.close()
    except (NoisebenchError, OSError):
        logger.warning("closing %r failed", inst, exc_info=True)


def simulated_ranges(resource: str) -> dict[str, tuple[float, float]] | None:
    """Frequency ranges (Hz) of a ``sim://`` bench for plan checks: the analyzer's input, the LO
    generator's and the noise source's ENR table; None when the scenario cannot be loaded."""
    try:
        from noisebench.sims.address import parse_sim_address
        from noisebench.sims.scenario import load_scenario

        scenario = load_scenario(parse_sim_address(resource).scenario)
    except (ImportError, NoisebenchError):
        return None
    ns = scenario.noise_source
    return {
        "analyzer": (scenario.analyzer.min_freq_hz, scenario.analyzer.max_freq_hz),
        "lo": (scenario.lo_generator.min_freq_hz, scenario.lo_generator.max_freq_hz),
        "generator": (scenario.generator.min_freq_hz, scenario.generator.max_freq_hz),
        "enr": (float(ns.freq_hz[0]), float(ns.freq_hz[-1])),
    }
