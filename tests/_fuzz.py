"""Seeded fuzzing of everything a user hands to noisebench: plans, instrument profiles, ENR /
loss / gain tables and run folders.

Each case copies a pristine, valid input, damages it with one to three seeded mutations (flipped
bytes, truncation, bytes that are not UTF-8, NUL bytes, duplicated / dropped / swapped lines,
hostile numbers and names, a huge number) and runs the command a user would run on it
(``validate``, ``render``, or a resume of the run folder) in-process with a time bound. Every
outcome falls in one class:

``ok``         accepted (exit 0)
``clean``      refused with one-line ``noisebench: error:`` messages (exit 2) and no raw Python
               exception name in them
``traceback``  an exception escaped, exit 1 ("unexpected ..."), or a raw exception name
               (``UnicodeDecodeError``, ``KeyError`` ...) reached the user
``hang``       the command did not return within :data:`CASE_TIME_LIMIT_S`
``lost``       the journal of a run folder lost an intact line (render must never touch it;
               resume may only cut a torn last line)

The test suite runs a few hundred cases (``NOISEBENCH_FUZZ_CASES`` raises it for a nightly-size
run); ``scripts/bench_reliability.py`` prints the tallies for DEVELOPERS.md.
"""

from __future__ import annotations

import contextlib
import io
import json
import os
import random
import re
import shutil
import signal
from collections import Counter
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
EXAMPLES = ROOT / "examples"
CASE_TIME_LIMIT_S = 120.0  # generous: a case takes well under a second even on a loaded machine
DEFAULT_CASES = 300

HOSTILE_NUMBERS = (
    "-1e308",
    "1e308",
    "1e999",
    "nan",
    "inf",
    "-inf",
    "0",
    "-0.0",
    "-1",
    "1e-320",
    "9" * 400,
    "0x10",
    "1_000",
)
HOSTILE_TEXTS = (
    '"../../escaped"',
    '"<script>alert(1)</script>"',
    '""',
    '"x\'); DROP TABLE runs; --"',
    '"' + "A" * 5000 + '"',
    '"\\u0000"',
    '"\\ud800"',
    "[]",
    "{}",
    "true",
)
_NUMBER = re.compile(rb"-?\d+(\.\d+)?([eE][-+]?\d+)?")
_QUOTED = re.compile(rb'"[^"\n]*"')
_RAW_EXCEPTION = re.compile(
    r"Traceback|unexpected [A-Za-z]+(Error|Exception)|\b(UnicodeDecodeError|UnicodeEncodeError|"
    r"KeyError|IndexError|AttributeError|TypeError|JSONDecodeError|RecursionError|MemoryError|"
    r"OverflowError|ZeroDivisionError|AssertionError|StopIteration)\b|codec can.t (de|en)code|"
    r"Expecting value: line|Extra data: line|Invalid control character"
)


class CaseTimeout(BaseException):
    """Raised by the alarm when a case runs past its time bound (not an Exception, so that no
    ``except Exception`` on the way can swallow it)."""


# --------------------------------------------------------------------------- mutations


def _flip(data: bytes, rng: random.Random) -> tuple[bytes, str]:
    buf = bytearray(data or b" ")
    for _ in range(rng.randint(1, 5)):
        i = rng.randrange(len(buf))
        buf[i] ^= 1 << rng.randrange(8)
    return bytes(buf), "flip"


def _truncate(data: bytes, rng: random.Random) -> tuple[bytes, str]:
    return data[: rng.randrange(len(data) + 1)], "truncate"


def _not_utf8(data: bytes, rng: random.Random) -> tuple[bytes, str]:
    i = rng.randrange(len(data) + 1)
    junk = rng.choice([b"\xff\xfe", b"\xc3(", b"\xa0\xa1", b"\xed\xa0\x80", b"\x80"])
    return data[:i] + junk + data[i:], "not-utf8"


def _nul(data: bytes, rng: random.Random) -> tuple[bytes, str]:
    i = rng.randrange(len(data) + 1)
    return data[:i] + b"\x00" * rng.randint(1, 8) + data[i:], "nul"


def _lines(data: bytes, rng: random.Random) -> tuple[bytes, str]:
    lines = data.split(b"\n")
    if len(lines) < 2:
        return data + data, "double"
    op = rng.choice(["dup", "drop", "swap"])
    i, j = rng.randrange(len(lines)), rng.randrange(len(lines))
    if op == "dup":
        lines.insert(i, lines[j])
    elif op == "drop":
        del lines[i]
    else:
        lines[i], lines[j] = lines[j], lines[i]
    return b"\n".join(lines), f"line-{op}"


def _number(data: bytes, rng: random.Random) -> tuple[bytes, str]:
    found = list(_NUMBER.finditer(data))
    if not found:
        return _flip(data, rng)
    m = rng.choice(found)
    value = rng.choice(HOSTILE_NUMBERS).encode()
    return data[: m.start()] + value + data[m.end() :], f"number={value[:12].decode()}"


def _text(data: bytes, rng: random.Random) -> tuple[bytes, str]:
    found = list(_QUOTED.finditer(data))
    if not found:
        return _nul(data, rng)
    m = rng.choice(found)
    value = rng.choice(HOSTILE_TEXTS).encode()
    return data[: m.start()] + value + data[m.end() :], f"text={value[:12].decode()}"


def _empty(data: bytes, rng: random.Random) -> tuple[bytes, str]:
    return rng.choice([b"", b"\n", b"\xef\xbb\xbf", b" " * 10]), "empty"


MUTATIONS: tuple[Callable[[bytes, random.Random], tuple[bytes, str]], ...] = (
    _flip,
    _truncate,
    _not_utf8,
    _nul,
    _lines,
    _lines,
    _number,
    _number,
    _text,
    _empty,
)


def mutate(data: bytes, rng: random.Random) -> tuple[bytes, str]:
    """``data`` damaged by one to three seeded mutations, and their names."""
    names = []
    for _ in range(rng.choice([1, 1, 2, 3])):
        data, name = rng.choice(MUTATIONS)(data, rng)
        names.append(name)
    return data, "+".join(names)


# --------------------------------------------------------------------------- pristine inputs


def _write_plan_inputs(folder: Path) -> None:
    folder.mkdir(parents=True, exist_ok=True)
    for name in (
        "yfactor_simulated.toml",
        "gain_simulated.toml",
        "gain_real_bench.toml",
        "enr_demo_source.csv",
        "input_cable.csv",
        "output_cable.csv",
        "dut_gain_example.csv",
    ):
        shutil.copy(EXAMPLES / name, folder / name)
    shutil.copy(ROOT / "noisebench" / "drivers" / "profiles" / "generic.toml", folder / "prof.toml")
    text = (folder / "gain_real_bench.toml").read_text(encoding="utf-8")
    (folder / "profile_plan.toml").write_text(
        text.replace('profile = "generic"', 'profile = "prof.toml"'), encoding="utf-8"
    )


def _write_runs(folder: Path) -> None:
    """A complete and an interrupted run of four points on the ideal simulated bench."""
    from _sequencer_helpers import ideal_session, make_plan

    from noisebench.running.sequencer import Sequencer

    plan = make_plan("y_factor", target=0.3)
    plan = plan.model_copy(update={"output": plan.output.model_copy(update={"plots": False})})
    Sequencer(plan, ideal_session(plan)).run(folder / "complete")
    done: list[object] = []

    def stop(point: object) -> None:
        done.append(point)
        if len(done) == 2:
            raise KeyboardInterrupt

    Sequencer(plan, ideal_session(plan), on_point=stop).run(folder / "interrupted")


def build_pristine(folder: Path) -> Path:
    """Valid inputs for every target under ``folder`` (built once per harness run)."""
    _write_plan_inputs(folder / "plans")
    _write_runs(folder / "runs")
    return folder


# --------------------------------------------------------------------------- running one case


@dataclass
class Outcome:
    target: str
    mutation: str
    kind: str
    code: int | None
    detail: str = ""


@dataclass
class Tally:
    outcomes: list[Outcome] = field(default_factory=list)

    def counts(self) -> Counter:
        return Counter(o.kind for o in self.outcomes)

    def by_target(self) -> dict[str, Counter]:
        out: dict[str, Counter] = {}
        for o in self.outcomes:
            out.setdefault(o.target, Counter())[o.kind] += 1
        return out

    def failures(self) -> list[Outcome]:
        return [o for o in self.outcomes if o.kind not in ("ok", "clean")]


@contextlib.contextmanager
def _time_bound(seconds: float):
    def on_alarm(signum, frame):
        raise CaseTimeout

    previous = signal.signal(signal.SIGALRM, on_alarm)
    signal.setitimer(signal.ITIMER_REAL, seconds)
    try:
        yield
    finally:
        signal.setitimer(signal.ITIMER_REAL, 0)
        signal.signal(signal.SIGALRM, previous)


def _cli(argv: list[str]) -> tuple[int | None, str, BaseException | None]:
    from noisebench.frontends import cli

    err, out = io.StringIO(), io.StringIO()
    code: int | None = None
    escaped: BaseException | None = None
    with contextlib.redirect_stderr(err), contextlib.redirect_stdout(out):
        try:
            with _time_bound(CASE_TIME_LIMIT_S):
                code = cli.main(argv, out=out)
        except CaseTimeout as exc:
            escaped = exc
        except BaseException as exc:  # noqa: BLE001 - what escapes is the finding
            escaped = exc
    return code, err.getvalue(), escaped


def _resume(folder: Path) -> tuple[int | None, str, BaseException | None]:
    """Re-open a run folder for appending and close it again, as ``run --resume`` does first."""
    from noisebench.errors import NoisebenchError
    from noisebench.results.store import RunWriter, check_resumable

    try:
        with _time_bound(CASE_TIME_LIMIT_S):
            check_resumable(folder)
            RunWriter.resume(folder).close()
    except CaseTimeout as exc:
        return None, "", exc
    except NoisebenchError as exc:
        return 2, f"noisebench: error: {exc}", None
    except BaseException as exc:  # noqa: BLE001
        return None, "", exc
    return 0, "", None


def classify(code: int | None, err: str, escaped: BaseException | None) -> tuple[str, str]:
    """(kind, detail) of one outcome, see the module text."""
    if isinstance(escaped, CaseTimeout):
        return "hang", f"no answer within {CASE_TIME_LIMIT_S:g} s"
    if escaped is not None:
        return "traceback", f"{type(escaped).__name__}: {escaped}"[:300]
    raw = _RAW_EXCEPTION.search(err)
    if code == 1 or raw:
        return "traceback", err.strip()[:300]
    if code == 0:
        return "ok", ""
    return "clean", err.strip().splitlines()[0][:200] if err.strip() else ""


def _intact_lines(data: bytes) -> list[bytes]:
    """Journal lines that are complete (newline-terminated) and valid JSON."""
    out = []
    for piece in data.split(b"\n")[:-1]:
        try:
            json.loads(piece)
        except ValueError:
            continue
        out.append(piece)
    return out


def run_case(pristine: Path, work: Path, index: int, seed: int) -> Outcome:
    """Case ``index`` of the seeded sequence ``seed`` in a fresh copy under ``work``."""
    rng = random.Random(seed * 1_000_003 + index)
    target = TARGETS[index % len(TARGETS)]
    case = work / f"case{index}"
    if case.exists():
        shutil.rmtree(case)
    if target.startswith("run"):
        source = "complete" if target == "run-render" else "interrupted"
        shutil.copytree(pristine / "runs" / source, case, ignore=shutil.ignore_patterns("plots"))
        name = rng.choice(
            ["run.json", "points.jsonl", "points.jsonl", "results.json", "results.csv"]
        )
        if not (case / name).exists():
            name = "points.jsonl"
        path = case / name
    else:
        shutil.copytree(pristine / "plans", case)
        name, command = _PLAN_TARGETS[target]
        path = case / name
    data, mutation = mutate(path.read_bytes(), rng)
    path.write_bytes(data)
    journal = case / "points.jsonl"
    before = journal.read_bytes() if journal.exists() else b""
    if target == "run-render":
        code, err, escaped = _cli(["render", "--no-plots", str(case)])
    elif target == "run-resume":
        code, err, escaped = _resume(case)
    else:
        code, err, escaped = _cli(["validate", str(case / command)])
    kind, detail = classify(code, err, escaped)
    if target.startswith("run") and kind != "hang":
        after = journal.read_bytes() if journal.exists() else b""
        if target == "run-render" and after != before:
            kind, detail = "lost", "render changed the journal"
        elif not set(_intact_lines(before)) <= set(_intact_lines(after)):
            kind, detail = "lost", "an intact journal line disappeared"
    shutil.rmtree(case, ignore_errors=True)
    return Outcome(target, f"{name}: {mutation}", kind, code, detail)


# target -> (file that is mutated, file given to `validate`)
_PLAN_TARGETS = {
    "plan-yfactor": ("yfactor_simulated.toml", "yfactor_simulated.toml"),
    "plan-gain": ("gain_simulated.toml", "gain_simulated.toml"),
    "profile": ("prof.toml", "profile_plan.toml"),
    "enr-table": ("enr_demo_source.csv", "enr_demo_source.csv"),
    "loss-table": ("input_cable.csv", "yfactor_simulated.toml"),
    "gain-table": ("dut_gain_example.csv", "gain_real_bench.toml"),
}
TARGETS = (*_PLAN_TARGETS, "run-render", "run-resume")


def fuzz(pristine: Path, work: Path, cases: int, seed: int = 1) -> Tally:
    """Run ``cases`` seeded cases; returns the tally."""
    tally = Tally()
    work.mkdir(parents=True, exist_ok=True)
    for index in range(cases):
        tally.outcomes.append(run_case(pristine, work, index, seed))
    return tally


def cases_from_env(default: int = DEFAULT_CASES) -> int:
    """``NOISEBENCH_FUZZ_CASES`` (nightly-size runs), else ``default``."""
    value = os.environ.get("NOISEBENCH_FUZZ_CASES", "").strip()
    return int(value) if value else default


# --------------------------------------------------------------------------- impossible values

_PLAN_ENR = "freq_hz,enr_db,u_enr_db\n1e8,15.0,0.1\n2e10,15.0,0.1\n"


def _impossible_plans() -> dict[str, dict]:
    """Plans that are well-formed but hold a value no bench can have (issue's list)."""
    from _sequencer_helpers import plan_dict

    def with_analyzer(**kw) -> dict:
        data = plan_dict("y_factor")
        data["bench"]["analyzer"].update(kw)
        return data

    def gain_measured(**kw) -> dict:
        data = plan_dict("gain")
        data["bench"]["generator"] = {"resource": "sim", "max_level_dbm": -10.0}
        data["gain"] = {"source": "measure", "max_gain_db": 30.0, "dut_p1db_out_dbm": 14.0}
        for key, value in kw.items():
            section, name = key.split("__")
            if section == "generator":
                data["bench"]["generator"][name] = value
            else:
                data[section][name] = value
        return data

    def with_band(**kw) -> dict:
        data = plan_dict("y_factor")
        data["limits"] = {"bands": [{"name": "b", "start_hz": 0.9e9, "stop_hz": 4.1e9, **kw}]}
        return data

    def with_expect(**kw) -> dict:
        data = plan_dict("y_factor")
        data["expect"].update(kw)
        return data

    return {
        "analyzer max_input_dbm = -1e308": with_analyzer(max_input_dbm=-1e308),
        "analyzer max_input_dbm = -1": with_analyzer(max_input_dbm=-1.0),
        "compression 0 dB below max input": with_analyzer(max_input_dbm=10.0, compression_dbm=10.0),
        "generator max_level_dbm = -1e308": gain_measured(generator__max_level_dbm=-1e308),
        "expected DUT gain 0 dB": with_expect(dut_gain_db=0.0),
        "expected DUT gain -1 dB": with_expect(dut_gain_db=-1.0),
        "band gain_min_db = 0": with_band(gain_min_db=0.0),
        "DUT output P1dB -1 dBm": gain_measured(gain__dut_p1db_out_dbm=-1.0),
    }


def impossible_values_accepted(folder: Path) -> tuple[list[str], list[str], list[str]]:
    """(accepted silently, refused, accepted with a plausibility warning) names of the
    implausible settings, each tried through validation. Legal but unusual values are warned
    once (noisebench.science.ranges); impossible ones are refused."""
    import logging

    from noisebench.errors import NoisebenchError
    from noisebench.running.plan import PlanError, parse_plan
    from noisebench.science import ranges
    from noisebench.science.enr import EnrTable

    class _Catch(logging.Handler):
        def __init__(self) -> None:
            super().__init__(logging.WARNING)
            self.count = 0

        def emit(self, record: logging.LogRecord) -> None:
            self.count += 1

    catch = _Catch()
    range_logger = logging.getLogger(ranges.__name__)
    range_logger.addHandler(catch)
    accepted, refused, warned = [], [], []
    try:
        for name, data in _impossible_plans().items():
            ranges._warned.clear()  # each case may warn afresh
            before = catch.count
            try:
                parse_plan(data, base_dir=folder)
            except (PlanError, NoisebenchError, ValueError):
                refused.append(name)
            else:
                (warned if catch.count > before else accepted).append(name)
    finally:
        range_logger.removeHandler(catch)
    table = "# nominal_drive_v: inf\n" + _PLAN_ENR
    try:
        EnrTable.from_csv(table)
    except (NoisebenchError, ValueError):
        refused.append("ENR header nominal_drive_v: inf")
    else:
        accepted.append("ENR header nominal_drive_v: inf")
    return accepted, refused, warned
