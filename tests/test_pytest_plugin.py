"""The pytest plugin: the example user test suite runs and passes through it, its options
and fixtures behave, and a failing verdict explains itself.

The inner pytest runs load the plugin with ``-p noisebench.frontends.pytest_plugin`` and with
entry-point
autoloading off, so they behave the same before and after the package's ``pytest11`` entry
point is installed (otherwise the plugin would be registered twice). They run in this process
(pytester's in-process mode, fast); pytester forgets the modules an inner run imported, and
extension modules (numpy, scipy) cannot be imported twice, so one small measurement runs here
first to import everything a measurement needs.
"""

from __future__ import annotations

import shutil
import xml.etree.ElementTree as ET
from datetime import datetime, timezone
from pathlib import Path

import pytest

from noisebench.frontends.pytest_plugin import assert_verdict
from noisebench.results.store import RunInfo, RunRecord, load_run
from noisebench.science.point import Method, PointResult

pytest_plugins = ["pytester"]

EXAMPLES = Path(__file__).resolve().parents[1] / "examples" / "user_tests"
PLUGIN = ("-p", "noisebench.frontends.pytest_plugin")


@pytest.fixture(scope="module")
def imported(tmp_path_factory: pytest.TempPathFactory) -> None:
    """One measurement with budgets, verdict and report in this process (see the docstring)."""
    from _production import exact_sim, session_on, small_plan

    import noisebench.drivers  # noqa: F401 - the example suite's profile test needs it
    from noisebench.results.production import apply_budgets_and_verdict, save_record
    from noisebench.results.report import write_report
    from noisebench.running.sequencer import Sequencer

    folder = tmp_path_factory.mktemp("warm-up")
    plan = small_plan(folder)
    record = Sequencer(plan, session_on(exact_sim(), plan)).run(folder / "run")
    record = save_record(apply_budgets_and_verdict(record, plan), folder / "run")
    write_report(record, folder / "run" / "report.html", plots=[])


@pytest.fixture
def inner(
    pytester: pytest.Pytester, monkeypatch: pytest.MonkeyPatch, imported: None
) -> pytest.Pytester:
    monkeypatch.setenv("PYTEST_DISABLE_PLUGIN_AUTOLOAD", "1")
    return pytester


def _run(pytester: pytest.Pytester, *args: str) -> pytest.RunResult:
    return pytester.runpytest(*PLUGIN, "-p", "no:cacheprovider", *args)


# =========================================================================== the example suite


def test_the_example_user_tests_pass_on_the_simulated_bench(inner: pytest.Pytester):
    shutil.copytree(EXAMPLES, inner.path / "user_tests")
    report = inner.path / "report.xml"
    result = _run(inner, "user_tests", "-v", f"--junitxml={report}")
    result.assert_outcomes(passed=6)
    # no --nb-* option and no nb_* ini key: the plugin prints no header line
    assert "noisebench: bench" not in result.stdout.str()
    # every measuring test lists its run folder; the folders hold finished, judged runs
    runs = [
        prop.get("value")
        for prop in ET.parse(report).iter("property")
        if prop.get("name") == "nb_run"
    ]
    assert len(runs) == 4  # two whole-plan runs, two spot points
    whole = [load_run(Path(folder)) for folder in runs if len(load_run(Path(folder)).points) == 3]
    assert len(whole) == 2
    for record in whole:
        assert record.verdict["unit"] == "pass" and len(record.budgets) == 3
        assert record.info.dut_id == "demo-lna"


# =========================================================================== options, fixtures


TIGHT_PLAN = """\
method = "y_factor"
[dut]
id = "tight-unit"
[bench]
analyzer = "sim://demo-lna?seed=2"
[acquisition]
rbw_hz = 1e6
span_hz = 4e6
attenuation_db = 0.0
min_averages = 8
max_averages = 400
target_u_nf_db = 0.05
[sweep]
freqs_hz = [1.0e9, 2.0e9]
[uncertainty]
enr_db = 0.05
[limits]
[[limits.bands]]
start_hz = 0.9e9
stop_hz = 2.1e9
nf_max_db = 0.4
[output]
plots = false
report = false
"""

TIGHT_TESTS = """\
from noisebench.frontends.pytest_plugin import assert_verdict


def test_mask_too_tight(nb_run_plan):
    assert_verdict(nb_run_plan(), "pass")


def test_expecting_the_failure(nb_run_plan, nb_plan):
    record = nb_run_plan()
    assert nb_plan.bench.analyzer.resource == "sim://demo-lna?seed=3"  # --nb-bench wins
    assert record.info.plan["bench"]["analyzer"]["resource"] == "sim://demo-lna?seed=3"
    assert_verdict(record, "fail")


def test_one_frequency_of_the_plan(nb_measure_point):
    point = nb_measure_point(2.0e9)
    assert point.freq_hz == 2.0e9 and 0.3 < point.nf_db < 2.0


def test_leaves_the_source_hot(nb_bench):
    nb_bench.bench.noise_source.set_hot(True)


def test_finds_the_source_cold_again(nb_bench):
    assert not nb_bench.bench.noise_source.is_hot
"""


def test_options_fixtures_and_the_failure_message(inner: pytest.Pytester):
    inner.makefile(".toml", tight=TIGHT_PLAN)
    inner.makeini("[pytest]\nnb_plan = tight.toml\nnb_bench = sim://demo-lna?seed=9\n")
    inner.makepyfile(test_tight=TIGHT_TESTS)
    result = _run(inner, "--nb-bench", "sim://demo-lna?seed=3")
    result.assert_outcomes(passed=4, failed=1)
    result.stdout.fnmatch_lines(
        [
            "noisebench: bench sim://demo-lna?seed=3, plan *tight.toml",
            "*unit verdict is FAIL, expected PASS: run * (DUT tight-unit, status complete), "
            "rule guarded",
            "*1 GHz FAIL: nf_db * dB +/- * dB (U), limit <= 0.4 dB: fail",
            "*2 GHz FAIL: nf_db * dB +/- * dB (U), limit <= 0.4 dB: fail",
        ]
    )
    # the helper hides its own frame: the report points at the user's line only
    assert "raise AssertionError" not in result.stdout.str()
    result.stdout.fnmatch_lines(["test_tight.py:5: AssertionError"])


def test_single_points_need_no_plan_and_a_missing_plan_is_explained(inner: pytest.Pytester):
    inner.makepyfile(
        test_quick="""
        def test_quick_point(nb_measure_point):
            point = nb_measure_point(1.5e9)
            assert point.freq_hz == 1.5e9 and point.gain_db > 20

        def test_whole_plan_without_a_plan(nb_run_plan):
            nb_run_plan()

        def test_bench_without_a_plan(nb_bench):
            assert nb_bench.resources["analyzer"] == "sim://demo-lna?seed=1"
    """
    )
    result = _run(inner)
    result.assert_outcomes(passed=2, failed=1)
    assert "noisebench: bench" not in result.stdout.str()  # no header unless configured
    assert "Safety cautions" not in result.stdout.str() + result.stderr.str()  # simulated
    result.stdout.fnmatch_lines(
        [
            "*noisebench: nb_run_plan() needs a plan (--nb-plan, or "
            "nb_run_plan(plan)) or freqs_hz for the quick plan*"
        ]
    )


def test_a_bad_plan_or_bench_fails_setup_with_one_clear_message(inner: pytest.Pytester):
    inner.makefile(
        ".toml",
        broken='method = "y_factor"\n[bench]\nanalyzer = "sim://nowhere"\n'
        "[sweep]\nfreqs_hz = [-1.0]\n",
    )
    inner.makepyfile(
        test_bad="""
        def test_uses_the_plan(nb_plan):
            pass
    """
    )
    result = _run(inner, "--nb-plan", "broken.toml")
    result.assert_outcomes(errors=1)
    result.stdout.fnmatch_lines(
        ["*noisebench: sweep.freqs_hz[[]0[]]: must be a finite frequency > 0*"]
    )
    result = _run(inner)
    result.assert_outcomes(errors=1)
    result.stdout.fnmatch_lines(["*noisebench: no plan configured: pass --nb-plan PLAN.toml*"])
    # a real analyzer with the quick plan: no ENR table, refused before any I/O
    inner.makepyfile(
        test_visa="""
        def test_point_on_real_hardware(nb_measure_point):
            nb_measure_point(1.0e9)
    """
    )
    result = _run(inner, "test_visa.py", "--nb-bench", "TCPIP0::127.0.0.1::9::SOCKET")
    result.assert_outcomes(failed=1)
    result.stdout.fnmatch_lines(
        ["*noisebench: enr.table: the Y-factor method needs the noise source's ENR table*"]
    )


DIALOGUE_TESTS = """
import pytest

from noisebench.drivers import ScpiGenerator

PROFILE = {profile!r}
GOOD = [
    ("*IDN?", "Fictional Labs,SG-9,1234,1.0"),
    ("*CLS", None),
    ("OUTPut:STATe?", "0"),
    ("SOURce:FREQuency:CW 1500000000", None),
    ("SYSTem:ERRor?", '0,"No error"'),
    ("SOURce:POWer:LEVel {{level}}", None),
    ("SYSTem:ERRor?", '0,"No error"'),
    ("SOURce:FREQuency:CW?", "1500000000"),
    ("SOURce:POWer:LEVel?", "-30.00"),
    ("SYSTem:ERRor?", '0,"No error"'),
]


def script(level="-30.00", extra=()):
    return [(c.replace("{{level}}", level), r) for c, r in GOOD] + list(extra)


def build(transport):
    return ScpiGenerator(transport, PROFILE)


def test_good_dialogue(nb_dialogue):
    with nb_dialogue(script(), build) as generator:
        generator.set_cw(1.5e9, -30.0)
    assert generator.level_dbm == -30.0


def test_wrong_command(nb_dialogue):
    with nb_dialogue(script(level="-31.00"), build) as generator:
        generator.set_cw(1.5e9, -30.0)


def test_exchange_never_sent(nb_dialogue):
    with nb_dialogue(script(extra=[("OUTPut:STATe 1", None)]), build) as generator:
        generator.set_cw(1.5e9, -30.0)
"""


def test_nb_dialogue_passes_a_right_dialogue_and_explains_a_wrong_one(inner: pytest.Pytester):
    """A user's profile test through the ``nb_dialogue`` fixture (examples/user_tests'
    generator profile): the scripted exchanges pass; a command the driver does not send and a
    scripted exchange it never reaches each fail, naming the exchange."""
    profile = EXAMPLES / "my_generator.toml"
    inner.makepyfile(test_dialogue=DIALOGUE_TESTS.format(profile=str(profile)))
    result = _run(inner, "-v")
    result.assert_outcomes(passed=1, failed=2)
    result.stdout.fnmatch_lines(
        [
            "*test_good_dialogue PASSED*",
            "*ProtocolError: exchange 5: expected 'SOURce:POWer:LEVel -31.00', the driver "
            "sent 'SOURce:POWer:LEVel -30.00' (write)*",
        ]
    )
    result.stdout.fnmatch_lines(
        [
            "*ProtocolError: 1 scripted exchange(s) never happened, starting at 10: "
            "'OUTPut:STATe 1'*",
        ]
    )


# =========================================================================== assert_verdict


def _record(verdict: dict | None) -> RunRecord:
    point = PointResult(
        freq_hz=1e9, method=Method.Y_FACTOR, nf_db=1.5, te_k=119.6, u_nf_db=0.05, u_te_k=3.0
    )
    info = RunInfo(
        run_id="r-1",
        method=Method.Y_FACTOR,
        dut_id="SN7",
        status="complete",
        started_at=datetime(2026, 1, 1, tzinfo=timezone.utc),
    )
    return RunRecord(info=info, points=[point], verdict=verdict)


def test_assert_verdict_lists_every_point_that_did_not_pass():
    check = {
        "quantity": "nf_db",
        "kind": "max",
        "limit": 1.2,
        "value": 1.5,
        "U": 0.14,
        "verdict": "fail",
        "band": 0,
        "margin_db": -0.3,
        "note": None,
    }
    gain = {
        "quantity": "gain_db",
        "kind": "min",
        "limit": 20.0,
        "value": None,
        "U": None,
        "verdict": "indeterminate",
        "band": 0,
        "note": "gain not measured at this point",
    }
    verdict = {
        "unit": "fail",
        "rule": "guarded",
        "notes": ["1 point(s) without a budget"],
        "bands": [],
        "points": [
            {
                "freq_hz": 1e9,
                "verdict": "fail",
                "nf_db": 1.5,
                "U_nf_db": 0.14,
                "checks": [check, gain],
            },
            {
                "freq_hz": 2e9,
                "verdict": "pass",
                "nf_db": 1.0,
                "U_nf_db": 0.14,
                "checks": [{**check, "value": 1.0, "verdict": "pass"}],
            },
        ],
    }
    with pytest.raises(AssertionError) as info:
        assert_verdict(_record(verdict), "pass")
    lines = str(info.value).splitlines()
    assert lines[0] == (
        "unit verdict is FAIL, expected PASS: run r-1 (DUT SN7, status complete), rule guarded"
    )
    assert lines[1] == (
        "  1 GHz FAIL: nf_db 1.500 dB +/- 0.140 dB (U), limit <= 1.2 dB: "
        "fail; gain_db not measured, limit >= 20.0 dB: indeterminate (gain "
        "not measured at this point)"
    )
    assert lines[2] == "  note: 1 point(s) without a budget"
    assert len(lines) == 3  # the passing point is not listed
    assert_verdict(_record(verdict), "fail")  # expecting the failure passes


def test_assert_verdict_without_a_verdict_or_with_a_bad_expectation():
    with pytest.raises(AssertionError, match="has no verdict: the plan has no .limits. "):
        assert_verdict(_record(None), "pass")
    with pytest.raises(ValueError, match="expected must be one of"):
        assert_verdict(_record(None), "passed")


def test_real_instruments_get_the_safety_cautions_once(monkeypatch, capsys):
    from types import SimpleNamespace

    import noisebench.bench.registry as registry
    from noisebench.frontends import pytest_plugin
    from noisebench.running.safety import CAUTIONS

    opened = []

    def fake_open_bench(section, prompt):
        opened.append(section)
        return SimpleNamespace(real_hardware=section.real, close=lambda: None)

    monkeypatch.setattr(registry, "open_bench", fake_open_bench)
    config = SimpleNamespace(pluginmanager=SimpleNamespace(getplugin=lambda name: None))
    state = pytest_plugin._BenchState(config)

    def section(name, real):
        return SimpleNamespace(model_dump_json=lambda: name, real=real)

    state.session_for(section("sim", False))
    assert "Safety cautions" not in capsys.readouterr().err
    real = section("visa", True)
    state.session_for(real)
    state.session_for(real)  # the same bench again: no second copy
    err = capsys.readouterr().err
    assert err.count("Safety cautions") == 1 and len(opened) == 2
    assert CAUTIONS[-1].split(":")[0] in " ".join(err.split())
