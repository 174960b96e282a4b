"""pytest plugin: noise-figure measurements as ordinary tests (entry point ``noisebench``).

Options (command line, or the same names without ``--`` and with ``_`` in the ini file)::

    --nb-bench ADDRESS   the bench: ``sim://<scenario>?seed=N`` (default sim://demo-lna?seed=1)
                         or a VISA resource string of the analyzer; overrides the plan's
                         analyzer when given
    --nb-plan PLAN.toml  the plan the fixtures measure
    --nb-out DIR         keep every run folder under DIR (default: pytest's tmp_path)

Fixtures::

    nb_plan_path      (session)  the configured plan file, or None; override it in a conftest
    nb_plan           (session)  the loaded Plan (fails the test when no plan is configured)
    nb_bench          (function) an open BenchSession; one per bench, shared by the session,
                                 put in its safe state after every test, closed at the end
    nb_run_plan       (function) nb_run_plan(plan=None, *, freqs_hz=None, dut_id=None) -> RunRecord
    nb_measure_point  (function) nb_measure_point(freq_hz, plan=None) -> PointResult
    nb_dialogue                  noisebench.drivers.protocol.replay_dialogue

``nb_run_plan`` runs the plan (default: ``nb_plan``; a Plan or a path also), optionally only at
``freqs_hz`` (each frequency keeps the settings of the segment it lies in), completes budgets
and verdict (:func:`noisebench.results.production.apply_budgets_and_verdict`) and returns the
RunRecord; the run folder is attached to the test report (user property ``nb_run``). Without a
configured plan, ``freqs_hz`` runs the built-in quick plan (:data:`QUICK_PLAN`: Y-factor,
1 MHz RBW, 4 MHz band, 0 dB attenuation, 0.05 dB target). Calibrations are kept per bench
for the whole session and reused while valid (:mod:`noisebench.running.calibration`).

Helpers to import: :func:`assert_verdict` (``assert_verdict(record, "pass")`` fails with every
point that did not pass, its value, expanded uncertainty and limit), :func:`failing_points`
and :func:`replay_dialogue` for testing your own instrument profiles without hardware.
Operator prompts (moving cables on a real bench) suspend pytest's output capture.

Until the package's ``pytest11`` entry point is installed, load the plugin with
``pytest -p noisebench.frontends.pytest_plugin``.
"""

from __future__ import annotations

import copy
import logging
import sys
from collections.abc import Callable, Iterator, Sequence
from pathlib import Path
from typing import Any

import pytest

logger = logging.getLogger(__name__)

__all__ = [
    "DEFAULT_BENCH",
    "QUICK_PLAN",
    "assert_verdict",
    "configured_bench_address",
    "configured_plan_path",
    "failing_points",
    "replay_dialogue",
]

DEFAULT_BENCH = "sim://demo-lna?seed=1"
QUICK_PLAN: dict[str, Any] = {
    "method": "y_factor",
    "name": "pytest quick plan",
    "acquisition": {
        "rbw_hz": 1e6,
        "span_hz": 4e6,
        "attenuation_db": 0.0,
        "min_averages": 8,
        "max_averages": 400,
        "target_u_nf_db": 0.05,
        "time_limit_s": 10.0,
    },
    "output": {"plots": False, "report": False},
}
"""The plan ``nb_run_plan(freqs_hz=...)`` / ``nb_measure_point`` use without ``--nb-plan``."""

_STATE_KEY = pytest.StashKey["_BenchState"]()


# =========================================================================== re-exports
# (thin wrappers: the plugin is imported by every pytest run once installed, so the heavy
# modules load only when a test uses them)


def replay_dialogue(
    script: Sequence[tuple[str, Any]], build: Callable[..., Any], **kwargs: Any
) -> Any:
    """:func:`noisebench.drivers.protocol.replay_dialogue`: test a driver on a script.

    ``with replay_dialogue([("*IDN?", "..."), ...], lambda t: ScpiGenerator(t, "mine.toml"))
    as generator:`` fails on an unexpected, missing or unread exchange.
    """
    from noisebench.drivers.protocol import replay_dialogue as replay

    return replay(script, build, **kwargs)


def failing_points(record: Any) -> list[dict[str, Any]]:
    """:func:`noisebench.results.production.failing_points`: the points that did not pass."""
    from noisebench.results.production import failing_points as not_passed

    return not_passed(record)


# =========================================================================== options


def pytest_addoption(parser: pytest.Parser) -> None:
    group = parser.getgroup("noisebench", "noise-figure measurements (noisebench)")
    group.addoption(
        "--nb-bench",
        dest="nb_bench",
        default=None,
        metavar="ADDRESS",
        help=f"bench address: sim://<scenario>?seed=N or a VISA resource string "
        f"(default: {DEFAULT_BENCH}; overrides the plan's analyzer)",
    )
    group.addoption(
        "--nb-plan",
        dest="nb_plan",
        default=None,
        metavar="PLAN",
        help="measurement plan (.toml) for the noisebench fixtures",
    )
    group.addoption(
        "--nb-out",
        dest="nb_out",
        default=None,
        metavar="DIR",
        help="keep run folders under DIR (default: each test's tmp_path)",
    )
    parser.addini("nb_bench", "noisebench bench address (like --nb-bench)", default=None)
    parser.addini(
        "nb_plan", "noisebench plan file, relative to the ini file (like --nb-plan)", default=None
    )
    parser.addini("nb_out", "folder for noisebench run folders (like --nb-out)", default=None)


def _ini_path(config: pytest.Config, value: str) -> Path:
    base = config.inipath.parent if config.inipath else config.rootpath
    path = Path(value).expanduser()
    return path if path.is_absolute() else base / path


def _option_path(config: pytest.Config, name: str) -> Path | None:
    given = config.getoption(name)
    if given:
        path = Path(given).expanduser()
        return path if path.is_absolute() else Path(config.invocation_params.dir) / path
    ini = config.getini(name)
    return _ini_path(config, ini) if ini else None


def configured_plan_path(config: pytest.Config) -> Path | None:
    """``--nb-plan`` (relative to the invocation folder), else the ini's ``nb_plan``."""
    return _option_path(config, "nb_plan")


def configured_bench_address(config: pytest.Config) -> str | None:
    """``--nb-bench``, else the ini's ``nb_bench``; None when neither is given."""
    return config.getoption("nb_bench") or config.getini("nb_bench") or None


def pytest_report_header(config: pytest.Config) -> str | None:
    """One header line, only in a run that configures the plugin (``--nb-*`` or ``nb_*`` ini
    keys): every pytest run of any project installed beside noisebench loads it."""
    bench = configured_bench_address(config)
    plan = configured_plan_path(config)
    if not (bench or plan):
        return None
    return (
        f"noisebench: bench {bench or '(plan / default ' + DEFAULT_BENCH + ')'}, plan {plan or '-'}"
    )


# =========================================================================== state


def _capture_free_prompt(config: pytest.Config) -> Callable[[str], str]:
    """``input`` with pytest's capture suspended, so the operator sees the instruction."""
    capman = config.pluginmanager.getplugin("capturemanager")

    def ask(text: str) -> str:
        if capman is None:
            return input(text)
        with capman.global_and_fixture_disabled():
            return input(text)

    return ask


class _BenchState:
    """The benches opened during a test session and their calibrations (one per bench)."""

    def __init__(self, config: pytest.Config) -> None:
        self.config = config
        self.sessions: dict[str, Any] = {}
        self.calibrations: dict[str, Any] = {}
        self.runs = 0

    def session_for(self, section: Any) -> Any:
        from noisebench.bench.registry import open_bench
        from noisebench.running.calibration import CalibrationStore

        key = section.model_dump_json()
        if key not in self.sessions:
            session = open_bench(section, prompt=_capture_free_prompt(self.config))
            if session.real_hardware:
                self._show_cautions()
            self.sessions[key] = session
            self.calibrations[key] = CalibrationStore()
        return self.sessions[key]

    def _show_cautions(self) -> None:
        """The bench-safety cautions, once per session, past pytest's output capture."""
        from noisebench.running.safety import cautions_text

        text = "noisebench: real instruments. Safety cautions:\n" + cautions_text()
        capman = self.config.pluginmanager.getplugin("capturemanager")
        if capman is None:
            print(text, file=sys.stderr)
            return
        with capman.global_and_fixture_disabled():
            print(text, file=sys.stderr)

    def calibrations_for(self, section: Any) -> Any:
        self.session_for(section)
        return self.calibrations[section.model_dump_json()]

    def safe_state(self) -> None:
        for session in self.sessions.values():
            session.bench.safe_state()

    def close(self) -> None:
        while self.sessions:
            _, session = self.sessions.popitem()
            session.close()


def pytest_configure(config: pytest.Config) -> None:
    config.stash[_STATE_KEY] = _BenchState(config)


def pytest_unconfigure(config: pytest.Config) -> None:
    state = config.stash.get(_STATE_KEY, None)
    if state is not None:
        state.close()


def _state(config: pytest.Config) -> _BenchState:
    return config.stash[_STATE_KEY]


# =========================================================================== plans


def _fail_setup(exc: BaseException) -> None:
    from noisebench.running.plan import PlanError

    lines = exc.problems if isinstance(exc, PlanError) else [str(exc)]
    pytest.fail("noisebench: " + "\n  ".join(str(line) for line in lines), pytrace=False)


def _with_bench(plan: Any, address: str | None) -> Any:
    """``plan`` with its analyzer at ``address`` (checked like a loaded plan)."""
    from noisebench.running.plan import PlanError
    from noisebench.running.plan_checks import cross_check

    if address is None or address == plan.bench.analyzer.resource:
        return plan
    analyzer = plan.bench.analyzer.model_copy(update={"resource": address})
    changed = plan.model_copy(
        update={"bench": plan.bench.model_copy(update={"analyzer": analyzer})}
    )
    problems = cross_check(changed)
    if problems:
        raise PlanError(problems, source=f"plan with --nb-bench {address}")
    return changed


def _quick_plan(address: str) -> Any:
    from noisebench.running.plan import parse_plan

    data = copy.deepcopy(QUICK_PLAN)
    data["bench"] = {"analyzer": address}
    data["sweep"] = {"freqs_hz": [1e9]}  # replaced by the frequencies asked for
    return parse_plan(data, base_dir=Path.cwd())


def _load(plan: Any, address: str | None) -> Any:
    from noisebench.running.plan import Plan, load_plan

    if isinstance(plan, Plan):
        return plan
    return _with_bench(load_plan(Path(plan)), address)


# =========================================================================== fixtures


@pytest.fixture(scope="session")
def nb_plan_path(pytestconfig: pytest.Config) -> Path | None:
    """The plan file of ``--nb-plan`` / ini ``nb_plan`` (None: none configured)."""
    return configured_plan_path(pytestconfig)


@pytest.fixture(scope="session")
def nb_plan(nb_plan_path: Path | None, pytestconfig: pytest.Config) -> Any:
    """The configured plan, loaded and checked (with ``--nb-bench`` applied)."""
    from noisebench.errors import NoisebenchError

    if nb_plan_path is None:
        pytest.fail(
            "noisebench: no plan configured: pass --nb-plan PLAN.toml, set nb_plan in "
            "the ini file, or override the nb_plan_path fixture",
            pytrace=False,
        )
    try:
        return _load(nb_plan_path, configured_bench_address(pytestconfig))
    except (NoisebenchError, OSError) as exc:
        _fail_setup(exc)


def _default_plan(request: pytest.FixtureRequest) -> Any:
    """The configured plan, or None when none is configured."""
    if request.getfixturevalue("nb_plan_path") is None:
        return None
    return request.getfixturevalue("nb_plan")


def _bench_section(request: pytest.FixtureRequest) -> Any:
    from noisebench.running.plan import BenchSection

    plan = _default_plan(request)
    if plan is not None:
        return plan.bench
    address = configured_bench_address(request.config) or DEFAULT_BENCH
    return BenchSection.model_validate({"analyzer": {"resource": address}})


@pytest.fixture
def nb_bench(request: pytest.FixtureRequest) -> Iterator[Any]:
    """The open bench (:class:`~noisebench.bench.registry.BenchSession`) of the plan / --nb-bench.

    Shared by every test of the session; left in its safe state (noise source off, generator
    off) after each test and closed when the session ends.
    """
    from noisebench.errors import NoisebenchError

    state = _state(request.config)
    try:
        session = state.session_for(_bench_section(request))
    except (NoisebenchError, OSError) as exc:
        _fail_setup(exc)
    try:
        yield session
    finally:
        session.bench.safe_state()


class PlanRunner:
    """The callable of the ``nb_run_plan`` fixture (see the module docstring)."""

    def __init__(self, request: pytest.FixtureRequest) -> None:
        self.request = request
        self.state = _state(request.config)
        self.records: list[Any] = []

    def _plan(self, plan: Any, freqs_hz: Sequence[float] | float | None) -> Any:
        from noisebench.results.production import plan_for_frequencies

        address = configured_bench_address(self.request.config)
        if plan is not None:
            chosen = _load(plan, address)
        else:
            chosen = _default_plan(self.request)
            if chosen is None:
                if freqs_hz is None:
                    pytest.fail(
                        "noisebench: nb_run_plan() needs a plan (--nb-plan, or "
                        "nb_run_plan(plan)) or freqs_hz for the quick plan",
                        pytrace=False,
                    )
                chosen = _quick_plan(address or DEFAULT_BENCH)
        return chosen if freqs_hz is None else plan_for_frequencies(chosen, freqs_hz)

    def _folder(self) -> Path:
        from noisebench.user_files import safe_path_component

        self.state.runs += 1
        out = _option_path(self.request.config, "nb_out")
        name = f"{self.request.node.name}-run{self.state.runs}"
        name = safe_path_component(name, default="run", max_length=120)
        if out is not None:
            return out / name
        return self.request.getfixturevalue("tmp_path") / name

    def __call__(
        self,
        plan: Any = None,
        *,
        freqs_hz: Sequence[float] | float | None = None,
        dut_id: str | None = None,
    ) -> Any:
        from noisebench.errors import NoisebenchError
        from noisebench.results.production import apply_budgets_and_verdict, save_record
        from noisebench.running.sequencer import Sequencer

        try:  # a plan or bench that cannot be used fails the test with one clear message
            chosen = self._plan(plan, freqs_hz)
            session = self.state.session_for(chosen.bench)
        except (NoisebenchError, OSError) as exc:
            _fail_setup(exc)
        if dut_id is not None:
            chosen = chosen.model_copy(update={"dut": chosen.dut.model_copy(update={"id": dut_id})})
        folder = self._folder()
        seq = Sequencer(chosen, session, calibrations=self.state.calibrations_for(chosen.bench))
        try:
            record = seq.run(folder)
        finally:
            session.bench.safe_state()
        record = save_record(apply_budgets_and_verdict(record, chosen), folder)
        self.request.node.user_properties.append(("nb_run", str(folder)))
        self.records.append(record)
        if record.info.status == "interrupted":  # Ctrl-C: the sequencer kept the points
            raise KeyboardInterrupt
        return record


@pytest.fixture
def nb_run_plan(request: pytest.FixtureRequest) -> PlanRunner:
    """Run a plan (default ``nb_plan``) or some of its frequencies; returns the RunRecord."""
    return PlanRunner(request)


@pytest.fixture
def nb_measure_point(nb_run_plan: PlanRunner) -> Callable[..., Any]:
    """Measure one frequency (Hz) with the plan's settings there; returns the PointResult."""

    def measure(freq_hz: float, plan: Any = None) -> Any:
        record = nb_run_plan(plan, freqs_hz=[freq_hz])
        if not record.points:
            skipped = record.info.notes.get("skipped_points") or []
            why = f": {skipped[0].get('reason')}" if skipped else ""
            raise AssertionError(
                f"no point measured at {freq_hz:.9g} Hz "
                f"(run {record.info.run_id} {record.info.status}){why}"
            )
        return record.points[0]

    return measure


@pytest.fixture
def nb_dialogue() -> Callable[..., Any]:
    """:func:`noisebench.drivers.protocol.replay_dialogue`, for profile tests."""
    return replay_dialogue


# =========================================================================== assertions


def _describe_check(check: dict[str, Any]) -> str:
    value, u = check.get("value"), check.get("U")
    shown = "not measured" if value is None else f"{value:.3f} dB"
    if u is not None and value is not None:
        shown += f" +/- {u:.3f} dB (U)"
    bound = "<=" if check.get("kind") == "max" else ">="
    text = (
        f"{check.get('quantity')} {shown}, limit {bound} {check.get('limit')} dB: "
        f"{check.get('verdict')}"
    )
    return text + (f" ({check['note']})" if check.get("note") else "")


def _verdict_lines(record: Any) -> list[str]:
    verdict = record.verdict or {}
    lines = []
    for point in failing_points(record):
        checks = "; ".join(_describe_check(c) for c in point["checks"]) or "no check detail"
        lines.append(f"  {point['freq_hz']:.9g} Hz {str(point['verdict']).upper()}: {checks}")
    for band in verdict.get("bands") or []:
        flat = band.get("flatness")
        if flat and flat.get("verdict") != "pass":
            lines.append(
                f"  band {band.get('name') or band.get('band')} "
                f"({band.get('start_hz'):.6g}-{band.get('stop_hz'):.6g} Hz) flatness: "
                + _describe_check(flat)
            )
    lines += [f"  note: {note}" for note in verdict.get("notes") or []]
    return lines


def assert_verdict(record: Any, expected: str = "pass") -> None:
    """Fail unless the unit verdict of ``record`` is ``expected`` (pass/fail/indeterminate).

    The message names the run, the DUT and every point that did not pass, with value,
    expanded uncertainty, limit and verdict of each check, plus band and verdict notes.
    """
    __tracebackhide__ = True
    allowed = ("pass", "fail", "indeterminate")
    if expected not in allowed:
        raise ValueError(f"expected must be one of {allowed} (got {expected!r})")
    info = record.info
    who = f"run {info.run_id} (DUT {info.dut_id or '-'}, status {info.status})"
    if not record.verdict:
        raise AssertionError(
            f"{who} has no verdict: the plan has no [limits] section or no point was measured"
        )
    unit = record.verdict.get("unit")
    if unit == expected:
        return
    head = (
        f"unit verdict is {str(unit).upper()}, expected {expected.upper()}: {who}, "
        f"rule {record.verdict.get('rule')}"
    )
    raise AssertionError("\n".join([head, *_verdict_lines(record)]))
