"""The schedule the sequencer runs, played through with the forecast's expected uncertainties:
rounds, blocks, noise-source switches, acquisitions and instrument time per group.

Each group enters with what :mod:`noisebench.running.forecast` predicts from the radiometer
equation: per point the NF uncertainty at one average per reading (``meas_u1``) and the
calibration's part at one average (``fix_u1``), the calibration's design uncertainty at one
average (``cal_u1``) and the Y significance (Y - 1)/u(Y) at one average (``cal_z1``,
``meas_z1``). Both scale as the radiometer equation says (u ~ 1/sqrt(n), z ~ sqrt(n)), so the
rounds the sequencer plans from its measured u can be played through with the expected u:

- **per group** (gain method; Y-factor with ``[switching] mode = "per_group"``, one group,
  no settling, a frequency converter): each group reads in rounds, the first of
  ``min_averages`` or a share of what the previous group needed
  (``sequencer_rounds._first_round_averages``), the next planned with margin 1.1 and growth
  at most 16x; Y-factor rounds are hot-cold-cold-hot (two traces per state): three switches
  in the first round, two in each further one, one back to cold at the end; a measurement
  without a bound of the DUT's output power first takes a cold look;
- **per sweep** (``sequencer_switched.py``): every phase starts with a pilot round of a
  spread of the groups (``_pilot_indices``; ``min_averages``, half per pass), the others
  planned from their expected need and read first in the main round; each round is read
  in blocks of four passes with two switches per block, the next round planned with
  margin 1.03 and growth at most 64x. The
  calibration's rounds are one block each (no rate is known yet); the measurement's are packed
  into blocks of at most ``max_block_s`` at the calibration's rate; the block's monitor (the
  group with most averages) reads each pass of 4 averages or more as two acquisitions.

Settling is shared by the block's groups, as the sequencer charges it. Time limits act on the
rounds as in the sequencer (``TimeBudget.averages_that_fit``, settling reserved).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

# the sequencer's constants (imported, so a change there moves the forecast along)
from noisebench.running.sequencer_rounds import (
    MAX_ROUND_GROWTH,
    PILOT_FRACTION,
    PILOT_FRACTION_SWITCHED,
)
from noisebench.running.sequencer_switched import (
    CALIBRATION_EXTRA_SHARE,
    MIN_CHECK_AVERAGES,
    PILOT_ALL,
    SWITCHED_MARGIN,
    SWITCHED_ROUND_GROWTH,
)
from noisebench.science.averaging import PLANNING_MARGIN, averages_for_target
from noisebench.science.methods._common import Y_SIGNIFICANCE_SIGMAS, averages_for_significance
from noisebench.science.trace_combine import split_averages

STRAGGLER_SHARE = 0.07
"""Share of the groups that a sweep-level round planned to reach the target (margin 1.03)
leaves a hair above it: the sequencer's u estimates scatter by about a percent, so these
groups take one more short round, two more switches for the sweep. Measured with
``scripts/bench_forecast_schedule.py`` (demo-lna, 11-201 points, 0.05-0.1 dB): 1 of 11, 4 of
51, 10 of 201 groups in the measurement; the forecast plays that round when it holds at least
one group (7 or more groups)."""

STRAGGLER_TOP_UP = 0.25
"""Averages of that extra round, as a share of what the group has (same runs: from one
average per pass up to about the group's averages so far)."""


@dataclass(frozen=True)
class Timing:
    """A group's trace time: per average, per trace, most averages per trace."""

    per_average_s: float
    per_trace_s: float
    max_per_trace: int | None

    def acquisition(self, averages: int) -> tuple[float, int]:
        """(seconds, traces) of one reading of ``averages`` (split above the maximum)."""
        parts = split_averages(averages, self.max_per_trace)
        return averages * self.per_average_s + len(parts) * self.per_trace_s, len(parts)


@dataclass
class GroupNeed:
    """What one group's points need, from the radiometer equation (see the module doc)."""

    index: int
    share: int  # points in the group
    policy: Any  # AcquisitionPolicy
    timing: Timing
    y_factor: bool
    cal_u1: float  # worst calibration design u at 1 average per reading, dB
    cal_target: float  # calibration_ratio x target, dB
    meas_u1: list[float]  # per point: reducible NF u at 1 average per reading, dB
    fix_u1: list[float]  # per point: the calibration's part at 1 calibration average, dB
    cal_z1: float = math.inf  # weakest calibration (Y-1)/u(Y) at 1 average
    meas_z1: float = math.inf  # weakest measurement (Y-1)/u(Y) at 1 average
    calibrate: bool = True  # False: another group's calibration serves it (converter IF)


@dataclass
class PhaseRun:
    """One group's phase as played: averages per reading, time, traces, how it stopped."""

    done: int = 0
    time_s: float = 0.0
    trace_s: float = 0.0
    trace_averages: int = 0
    traces: int = 0
    stop: str | None = None  # "target", "time_limit", "max_averages", "calibration", "weak_y"
    per_trace: int = 0

    def charge_reading(self, timing: Timing, averages: int) -> None:
        seconds, traces = timing.acquisition(averages)
        self.time_s += seconds
        self.trace_s += seconds
        self.trace_averages += averages
        self.traces += traces

    def rate(self) -> float:
        return self.trace_s / self.trace_averages if self.trace_averages else 0.0

    def fits(self, limit_s: float, traces: int, overhead_s: float) -> int:
        """``TimeBudget.averages_that_fit`` with the rate so far (fallback 0)."""
        per = self.rate()
        room = limit_s - self.time_s - overhead_s
        if per <= 0:
            return 1_000_000 if room > 0 else 0
        return max(0, int(room / (traces * per)))


@dataclass
class ScheduleResult:
    """The played schedule: per group its calibration and measurement, and the switches."""

    schedule: str  # "per_sweep" or "per_group"
    calibration: dict[int, PhaseRun] = field(default_factory=dict)
    measurement: dict[int, PhaseRun] = field(default_factory=dict)
    switches: int = 0
    settle_s: float = 0.0


# --------------------------------------------------------------------------- decisions


def _cal_decision(g: GroupNeed, done: int, margin: float) -> tuple[bool, int | None]:
    """(stop at target, averages needed) of a calibration after ``done`` averages."""
    u = g.cal_u1 / math.sqrt(done)
    z = g.cal_z1 * math.sqrt(done) if g.y_factor else math.inf
    weak = z < Y_SIGNIFICANCE_SIGMAS
    if u <= g.cal_target and not weak:
        return True, None
    need = averages_for_target(done, u, 0.0, g.cal_target, margin=margin) if u > 0 else done
    if weak:
        extra = averages_for_significance(done, z)
        need = extra if need is None else max(need, extra)
    return False, need


def _point_u(g: GroupNeed, done: int, n_cal: int) -> list[tuple[float, float]]:
    return [
        (m / math.sqrt(done), f / math.sqrt(max(n_cal, 1)))
        for m, f in zip(g.meas_u1, g.fix_u1, strict=True)
    ]


def _meas_decision(
    g: GroupNeed, done: int, n_cal: int, margin: float
) -> tuple[str | None, int | None]:
    """("target" or None, averages needed; None: more cannot help) after ``done``."""
    if g.y_factor and g.meas_z1 * math.sqrt(done) < Y_SIGNIFICANCE_SIGMAS:
        return None, averages_for_significance(done, g.meas_z1 * math.sqrt(done))
    target = g.policy.target_u_nf_db
    parts = _point_u(g, done, n_cal)
    if all(math.hypot(r, f) <= target for r, f in parts):
        return "target", None
    needs = []
    for r, f in parts:
        if math.hypot(r, f) <= target:
            continue
        need = averages_for_target(done, r, f, target, margin=margin)
        if need is None and r > f:
            need = averages_for_target(done, r, 0.0, f, margin=margin)
        if need is not None:
            needs.append(need)
    return None, (max(needs) if needs else None)


def _next_per_trace(
    policy: Any,
    run: PhaseRun,
    need: int | None,
    states: int,
    limit_s: float,
    settle_reserve_s: float,
    growth: int,
) -> int:
    """``AveragingRounds._next_round_averages`` on the played run."""
    if need is None or run.done >= policy.max_averages:
        return 0
    per_state = 2 if states == 2 else 1
    want = min(need, policy.max_averages, growth * run.done) - run.done
    if want <= 0:
        return 0
    per_trace = max(1, math.ceil(want / per_state))
    return min(per_trace, run.fits(limit_s, per_state * states, settle_reserve_s))


def _stop_reason(policy: Any, run: PhaseRun, need: int | None, calibration: bool) -> str:
    if need is None and not calibration:
        return "calibration"
    return "max_averages" if run.done >= policy.max_averages else "time_limit"


# --------------------------------------------------------------------------- per group


def play_per_group(groups: list[GroupNeed], settle_s: float, cold_look: bool) -> ScheduleResult:
    """The per-group order (``sequencer_calibration._calibrate_group``, ``_measure_group``)."""
    result = ScheduleResult("per_group")
    prior: int | None = None
    for g in groups:
        if not g.calibrate:
            continue
        run = _play_group(g, settle_s, prior, calibration=True, n_cal=0, result=result)
        result.calibration[g.index] = run
        if run.stop == "target":
            prior = max(
                1, math.ceil(run.done * (g.cal_u1 / math.sqrt(run.done) / g.cal_target) ** 2)
            )
    prior = None
    cal_of = _calibration_of(groups, result)
    for g in groups:
        if cal_of[g.index].stop == "weak_y":
            continue  # the sequencer refuses the group (no usable Y-factor)
        n_cal = cal_of[g.index].done
        run = _play_group(
            g, settle_s, prior, calibration=False, n_cal=n_cal, result=result, cold_look=cold_look
        )
        cold_look = False  # the first group's cold look bounds the DUT's output power
        result.measurement[g.index] = run
        target = g.policy.target_u_nf_db
        exact = [
            run.done * r**2 / (target**2 - f**2)
            for r, f in _point_u(g, run.done, n_cal)
            if target**2 > f**2
        ]
        if exact:
            prior = max(1, math.ceil(max(exact)))
    return result


def _calibration_of(groups: list[GroupNeed], result: ScheduleResult) -> dict[int, PhaseRun]:
    """Each group's calibration (a converter group whose IF another group calibrated uses that
    group's)."""
    out: dict[int, PhaseRun] = {}
    last: PhaseRun | None = None
    for g in groups:
        run = result.calibration.get(g.index) or last or PhaseRun(done=1, stop="target")
        out[g.index] = run
        last = run
    return out


def _play_group(
    g: GroupNeed,
    settle_s: float,
    prior: int | None,
    *,
    calibration: bool,
    n_cal: int,
    result: ScheduleResult,
    cold_look: bool = False,
) -> PhaseRun:
    policy = g.policy
    states = 2 if g.y_factor else 1
    per_state = 2 if states == 2 else 1
    limit = policy.time_limit_s * g.share
    run = PhaseRun()
    hot = False
    if cold_look and g.y_factor and not calibration:
        run.charge_reading(g.timing, max(1, math.ceil(policy.min_averages / 2)))
    total = policy.min_averages
    if prior:
        fraction = PILOT_FRACTION_SWITCHED if states == 2 else PILOT_FRACTION
        total = max(total, min(int(fraction * prior), policy.max_averages))
    per_trace = max(1, math.ceil(total / per_state))
    while True:
        if g.y_factor:  # hot, cold, cold, hot
            for state in (True, False, False, True):
                if state != hot:
                    hot = state
                    result.switches += 1
                    result.settle_s += settle_s
                    run.time_s += settle_s
                run.charge_reading(g.timing, per_trace)
        else:
            run.charge_reading(g.timing, per_trace)
        run.done += per_state * per_trace
        if calibration:
            stop, need = _cal_decision(g, run.done, PLANNING_MARGIN)
            reason = "target" if stop else None
        else:
            reason, need = _meas_decision(g, run.done, n_cal, PLANNING_MARGIN)
        if reason is not None:
            run.stop = reason
            break
        reserve = (3 + (0 if hot else 1)) * settle_s if g.y_factor else 0.0
        per_trace = _next_per_trace(policy, run, need, states, limit, reserve, MAX_ROUND_GROWTH)
        if per_trace == 0:
            run.stop = _weak_or(g, run, calibration) or _stop_reason(policy, run, need, calibration)
            break
    if hot:
        result.switches += 1
        result.settle_s += settle_s
        run.time_s += settle_s
    return run


def _weak_or(g: GroupNeed, run: PhaseRun, calibration: bool) -> str | None:
    """ "weak_y" when the group stops with a Y the sequencer will refuse."""
    if not g.y_factor:
        return None
    z1 = g.cal_z1 if calibration else g.meas_z1
    return "weak_y" if z1 * math.sqrt(run.done) < Y_SIGNIFICANCE_SIGMAS else None


# --------------------------------------------------------------------------- per sweep


def play_per_sweep(
    groups: list[GroupNeed], settle_s: float, block_limit_s: float
) -> ScheduleResult:
    """The sweep-level order (``sequencer_switched._calibrate_switched``, ``_measure_switched``)."""
    result = ScheduleResult("per_sweep")
    cal_runs = {g.index: PhaseRun() for g in groups}
    _play_sweep_phase(groups, cal_runs, settle_s, None, result, calibration=True, n_cal={})
    result.calibration = cal_runs
    rates = [r.rate() for r in cal_runs.values() if r.rate() > 0]
    rate = sum(rates) / len(rates) if rates else None
    measured = [g for g in groups if cal_runs[g.index].stop != "weak_y"]
    meas_runs = {g.index: PhaseRun() for g in measured}
    n_cal = {g.index: cal_runs[g.index].done for g in measured}
    limit = block_limit_s if rate else None
    _play_sweep_phase(
        measured, meas_runs, settle_s, (rate, limit), result, calibration=False, n_cal=n_cal
    )
    result.measurement = meas_runs
    return result


def _blocks(
    active: list[GroupNeed], runs: dict[int, PhaseRun], packing: tuple[Any, Any] | None
) -> list[list[GroupNeed]]:
    """``SwitchedSweep._blocks``: one block without a rate, else packed to the limit."""
    if packing is None or not packing[0]:
        return [active]
    rate, limit = packing
    blocks: list[list[GroupNeed]] = [[]]
    used = 0.0
    for g in active:
        need = 4 * runs[g.index].per_trace * rate
        if blocks[-1] and used + need > limit:
            blocks.append([])
            used = 0.0
        blocks[-1].append(g)
        used += need
    return blocks


def _play_sweep_phase(
    groups: list[GroupNeed],
    runs: dict[int, PhaseRun],
    settle_s: float,
    packing: tuple[Any, Any] | None,
    result: ScheduleResult,
    *,
    calibration: bool,
    n_cal: dict[int, int],
) -> None:
    for g in groups:
        runs[g.index].per_trace = max(1, math.ceil(g.policy.min_averages / 2))
    pilots = _pilot_indices(groups)
    active = [g for g in groups if g.index in pilots]
    pending = [g for g in groups if g.index not in pilots]
    planned_stops: list[GroupNeed] = []  # groups that reached the target in a planned round
    rounds = 0
    while active:
        _play_blocks(active, runs, settle_s, packing, result, calibration)
        rounds += 1
        if rounds == 1 and pending:
            rate = packing[0] if packing is not None and packing[0] else None
            rate = rate or _mean_rate([runs[g.index] for g in active])
            _plan_pending(pending, runs, n_cal, calibration, settle_s, rate)
        still = []
        for g in active:
            run = runs[g.index]
            policy = g.policy
            if calibration:
                stop, need = _cal_decision(g, run.done, SWITCHED_MARGIN)
                reason = "target" if stop else None
            else:
                reason, need = _meas_decision(g, run.done, n_cal[g.index], SWITCHED_MARGIN)
            if reason is not None:
                run.stop = reason
                if reason == "target" and rounds > 1:
                    planned_stops.append(g)
                continue
            reserve = 4 * settle_s  # the sequencer reserves a group's own four switches
            run.per_trace = _next_per_trace(
                policy, run, need, 2, policy.time_limit_s * g.share, reserve, SWITCHED_ROUND_GROWTH
            )
            if run.per_trace == 0:
                run.stop = _weak_or(g, run, calibration) or _stop_reason(
                    policy, run, need, calibration
                )
                continue
            still.append(g)
        active = sorted(still + pending, key=lambda g: g.index) if rounds == 1 else still
    stragglers = round(STRAGGLER_SHARE * len(planned_stops))
    if stragglers:
        late = planned_stops[:stragglers]
        for g in late:
            run = runs[g.index]
            run.per_trace = max(1, math.ceil(STRAGGLER_TOP_UP * run.done / 2))
        _play_blocks(late, runs, settle_s, packing, result, calibration)


def _pilot_indices(groups: list[GroupNeed]) -> set[int]:
    """``SwitchedSweep._pilot_indices``: of each policy's groups all up to ``PILOT_ALL``,
    else ``max(PILOT_ALL, ceil(sqrt(n)))`` spread evenly, both ends included."""
    by_policy: list[tuple[Any, list[GroupNeed]]] = []
    for g in groups:
        for policy, members in by_policy:
            if g.policy is policy or g.policy == policy:
                members.append(g)
                break
        else:
            by_policy.append((g.policy, [g]))
    chosen: set[int] = set()
    for _, members in by_policy:
        n = len(members)
        k = n if n <= PILOT_ALL else max(PILOT_ALL, math.ceil(math.sqrt(n)))
        picks = {0} if k == 1 else {round(i * (n - 1) / (k - 1)) for i in range(k)}
        chosen.update(members[i].index for i in picks)
    return chosen


def _mean_rate(runs: list[PhaseRun]) -> float | None:
    rates = [r.rate() for r in runs if r.rate() > 0]
    return sum(rates) / len(rates) if rates else None


def _exact_need(g: GroupNeed, n_cal: int, calibration: bool) -> float:
    """Averages per reading at which the group's worst u equals its target exactly (what a
    pilot measures and its neighbours are planned from)."""
    if calibration:
        return (g.cal_u1 / g.cal_target) ** 2
    target = g.policy.target_u_nf_db
    n_cal = max(n_cal, 1)
    needs = [
        r**2 / (target**2 - f**2 / n_cal)
        for r, f in zip(g.meas_u1, g.fix_u1, strict=True)
        if target**2 > f**2 / n_cal
    ]
    return max(needs) if needs else math.inf


def _plan_pending(
    pending: list[GroupNeed],
    runs: dict[int, PhaseRun],
    n_cal: dict[int, int],
    calibration: bool,
    settle_s: float,
    rate: float | None,
) -> None:
    """``SwitchedSweep._plan_from_pilots`` with the expected needs (the pilots' interpolated
    needs are, in expectation, the group's own): the exact need times the margin, plus the
    calibration's extra share capped at one round's settling, within the limits."""
    extra = CALIBRATION_EXTRA_SHARE if calibration else 0.0
    cap = settle_s / (len(pending) * rate) if rate else math.inf
    for g in pending:
        need = _exact_need(g, n_cal.get(g.index, 0), calibration)
        if not math.isfinite(need) or need <= 0:
            continue  # no usable plan: its first round is a pilot of its own
        planned = need * SWITCHED_MARGIN + min(extra * need, cap)
        total = min(max(math.ceil(planned), g.policy.min_averages), g.policy.max_averages)
        per_trace = max(1, math.ceil(total / 2))
        if rate:
            room = g.policy.time_limit_s * g.share - 4 * settle_s
            per_trace = max(1, min(per_trace, max(0, int(room / (4 * rate)))))
        runs[g.index].per_trace = per_trace


def _play_blocks(
    active: list[GroupNeed],
    runs: dict[int, PhaseRun],
    settle_s: float,
    packing: tuple[Any, Any] | None,
    result: ScheduleResult,
    calibration: bool,
) -> None:
    """One sweep-level round: its blocks, two switches and four passes each."""
    for block in _blocks(active, runs, packing):
        monitor = None if calibration else max(block, key=lambda b: runs[b.index].per_trace)
        for _ in range(2):  # two switches per block: to hot, back to cold
            result.switches += 1
            result.settle_s += settle_s
            for g in block:
                runs[g.index].time_s += settle_s / len(block)
        for g in block:
            run = runs[g.index]
            n = run.per_trace
            split = g is monitor and n >= 2 * MIN_CHECK_AVERAGES
            for _ in range(4):  # four passes
                for part in (n // 2, n - n // 2) if split else (n,):
                    run.charge_reading(g.timing, part)
            run.done += 2 * n
