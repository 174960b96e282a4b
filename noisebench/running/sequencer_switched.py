"""Y-factor readings scheduled over the whole sweep: two noise-source switches per sweep-level
round instead of several per point, and a linear drift still cancels.

A block of groups is read in four passes, starting in the state the source is in - cold, as it
always is after a connection change and at the end of every block: cold forward, hot backward,
hot forward, cold backward. A group read for ``tau`` in every pass, starting ``s`` into a pass
of length ``T``, has its cold readings at ``s + tau/2`` and ``4T - s - tau/2`` and its hot ones
at ``2T - s - tau/2`` and ``2T + s + tau/2``: both pairs are centred on ``2T``, so a drift
linear in time (receiver gain, or the source's own output) moves hot and cold alike and cancels
in Y, for every point. Two switches serve the whole block, and it ends cold (the safe state),
so the next block or phase starts without a switch and the run ends without one. The first
cold pass reads every group of the block before the source goes hot, which is the power
guard's cold look. (Started hot, a block reads hot-cold-cold-hot.) The calibration and the
measurement each start with a pilot round (``min_averages``) of a spread of the groups: all of
a segment's groups when it has at most ``PILOT_ALL``, else about the square root of their number,
both ends included (``_pilot_indices``). The pilots' readings plan their own next round; the
other groups are planned from them (the averages the pilots needed exactly, smoothed by a
running median of three and interpolated in frequency, ``_plan_from_pilots``) and first read
in the main round, so most points take four acquisitions a phase instead of eight, each
round still a whole cold-hot-hot-cold block for every group it reads. Neither phase reads a
first group alone.

Drift the schedule cannot cancel (curvature, steps) is a property of the bench - the receiver
gain, the source's output - seen alike at every frequency, so one group per block watches it:
the block's *monitor* (the group with the most averages per pass) takes each pass reading of
32 averages or more as two acquisitions of half the averages, which gives every state four
readings, and :func:`noisebench.science.drift.drift_check` tests the residuals about a receiver
gain drifting linearly (one slope for hot and cold) with a stable source; the reading times
come from the bench's clock. Every point of the block carries the monitor's result
(chi-square and degrees of freedom summed over its frequencies and over the blocks that read
it) and is flagged ``drift`` when it fails. The other
groups read each pass once: four acquisitions per block instead of eight. A drift local to one
frequency (a wandering spur) is not this check's business: the spur search and the estimator's
scatter check see it.

The block length is chosen from the settling time, the sweep time and the drift model
(:class:`noisebench.running.plan.SwitchingSection`): groups are packed into blocks no longer
than ``max_block_s`` of instrument time, shorter when a drift curvature is declared. Averaging
stays adaptive per group (the same radiometer planning as the per-group rounds); a block after
the first holds only the groups still short of their target, and each group's points are
journalled as soon as it stops.

Size: one schedule - the blocks, the drift monitor, the pilots and the plans drawn from them
serve the calibration and the measurement alike, and splitting them would spread one
round's bookkeeping (``_GroupRun``) over several modules.
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass, field
from functools import partial
from typing import TYPE_CHECKING, Any

import numpy as np

from noisebench.bench.acquisition import AcquisitionSettings
from noisebench.bench.registry import Connection
from noisebench.errors import MeasurementError, YNotSignificantError
from noisebench.running.calibration import CalibrationEntry, CalibrationKind
from noisebench.running.groups import PointGroup
from noisebench.running.safety import PowerCheck
from noisebench.running.sequencer_core import Commit, _GroupOutcome, _Readings
from noisebench.running.sequencer_measurement import MeasurementSteps
from noisebench.science.averaging import PackedReading, TimeBudget, averages_for_target
from noisebench.science.density import NoiseDensity
from noisebench.science.drift import DRIFT_ALPHA, DriftCheck, combined_check, drift_check
from noisebench.science.methods._common import averages_for_significance
from noisebench.science.point import Method, PointFlag, PointResult

logger = logging.getLogger(__name__)

MIN_CHECK_AVERAGES = 2
"""A pass reading is split in two for the drift check when each half has this many averages
(the pilot block is read whole). A band density averages many bins besides the trace averages,
so even two averages make ln(density) close enough to normal: over 24 seeded stable runs the
checks' p-values are uniform or slightly conservative (tests/test_switched_schedule.py). At 16
(the rule before) sweeps at ordinary targets (0.05-0.1 dB) were never split and carried no
drift check; that waited for the Y-factor to refuse a hot - cold that is not significant (a
dead source's coin flip read as an absurd NF), which ``check_y_significant`` now does.
Measured with the split from 2 (seeds 10-29, 5 points each, ideal demo bench): every point
carries a drift check; gain z-scores sd 1.02, largest |z| 2.7; NF z-scores sd 0.96."""

PRIOR_SHARE = 0.5
"""A group may stop on its target only with at least this share of the median averages the
sweep's groups plan (see ``SwitchedSweep._hold_lucky``)."""

SWITCHED_ROUND_GROWTH = 64
"""A sweep-level round may multiply a group's averages so far by up to 64 (the per-group
rounds: 16, ``sequencer_rounds.MAX_ROUND_GROWTH``). Every round costs the whole sweep two
settling times, and the pilot round of ``min_averages`` reads each state of every group in
two passes, whose u estimate plans the next round within a few percent (the planning margin
absorbs that); a cap of 16 turned an ordinary need (about 90 averages a state from a pilot
of 4 at 0.05 dB) into two rounds, one more switch pair for the sweep."""

SWITCHED_MARGIN = 1.03
"""Planning margin of a sweep-level round (per-group rounds: ``averaging.PLANNING_MARGIN``,
1.1). A point's u comes from the readings' averaging, which the applied settings fix, and
from Y (through Y/(Y - 1)), not from the readings' scatter, so the u a round will reach is
known to about a percent; the margin only has to cover that, while every 1 % of margin costs
1 % of the measurement. Measured with ``scripts/bench_accuracy.py``'s bench over 12 seeds:
margins 1.1, 1.05 and 1.02 needed the same switches (8 or 10 per sweep), and the whole run
took 1.30x, 1.25x and 1.22x its radiometer minimum on average (1.03: 1.23x, 1.17-1.50x).
A round the scatter test widens (excess scatter) still takes its extra round, as it must."""

PILOT_ALL = 4
"""A policy's groups up to this many all read the pilot round; of more, ``max(PILOT_ALL,
ceil(sqrt(n)))`` spread evenly over them (both ends included) do, see ``_pilot_indices``."""

CALIBRATION_EXTRA_SHARE = 0.5
"""A calibration group planned from its neighbours' pilots takes up to this share of its
interpolated need on top of the planning margin (the measurement's: none). The through path's
Y is large, so the calibration needs few averages (4-7 a state at 0.05 dB on
``scripts/bench_accuracy.py``'s bench), and a pilot's estimate of that need from
``min_averages`` scatters by tens of percent (3-7 over nine groups of a flat band, where the
measurement's pilots agreed within 82-86): with the margin alone, one group in nine fell short
and cost the sweep a round (two settling times) in most seeds. The extra is capped at what it
insures against, one round's settling shared by the planned groups (``_plan_from_pilots``)."""

CURVATURE_SHARE = 0.1
"""With a declared drift curvature b (dB/s^2), a block of length T leaves at most b T^2 / 2 in
Y; blocks are kept short enough that this stays below this share of the target."""


def _median3(values: tuple[float, ...]) -> tuple[float, ...]:
    """Running median of three with Tukey's end-point rule (the end value, its neighbour's,
    and the straight line through the two next ones, extrapolated: Tukey, *Exploratory Data
    Analysis*, 1977, ch. 7): one pilot's outlying estimate does not move its neighbours' plans,
    while a monotone trend passes unchanged."""
    n = len(values)
    if n < 3:
        return tuple(values)
    out = [float(np.median(values[i - 1 : i + 2])) for i in range(1, n - 1)]
    first = float(np.median([values[0], out[0], 3 * out[0] - 2 * out[1] if n > 3 else values[0]]))
    last = float(
        np.median([values[-1], out[-1], 3 * out[-1] - 2 * out[-2] if n > 3 else values[-1]])
    )
    return (first, *out, last)


@dataclass
class _GroupRun:
    """One group's state across the blocks of a switched sweep."""

    group: PointGroup
    readings: _Readings
    budget: TimeBudget
    per_trace: int
    checks: list[PowerCheck] = field(default_factory=list)
    log: list[tuple[float, str, list[NoiseDensity]]] = field(default_factory=list)
    settings: AcquisitionSettings | None = None
    failed: MeasurementError | None = None  # the physics refused a reading of this group
    drift_checks: list[DriftCheck] = field(default_factory=list)  # monitors of its blocks
    monitor_hz: list[float] = field(default_factory=list)

    def release(self) -> None:
        """Drop what the group read once it has stopped (its points or calibration entry are
        made, or the physics refused it): a sweep's finished groups keep only their time
        budget (the rate of the next phase). Lists are replaced, not cleared: points and
        notes made from them may still refer to them."""
        self.readings.release()
        self.log = []
        self.checks = []
        self.drift_checks = []
        self.monitor_hz = []


class SwitchedSweep(MeasurementSteps):
    """Calibration and measurement of the Y-factor method in sweep-level hot/cold blocks."""

    _clock_s: float = 0.0  # instrument time of the switched schedule, s

    if TYPE_CHECKING:  # provided by the Sequencer and VerdictStep that complete the steps

        def _record_settings(
            self, settings: AcquisitionSettings | None, group: PointGroup, writer: Any
        ) -> None: ...

        def _budget(self, point: PointResult) -> dict | None: ...

    def _switched(self, groups: list[PointGroup]) -> bool:
        """Whether the Y-factor readings run in sweep-level blocks (see the module doc)."""
        if self.plan.method is not Method.Y_FACTOR:
            return False
        if self.plan.conversion is not None:
            return False  # a converter's groups each need their own LO setting
        mode = self.plan.switching.mode
        if mode != "auto":
            return mode == "per_sweep"
        return len(groups) > 1 and self._settle_s() > 0

    def _block_limit_s(self) -> float:
        sw = self.plan.switching
        limit = sw.max_block_s
        if sw.drift_curvature_db_per_s2:
            target = self.plan.acquisition.target_u_nf_db
            limit = min(
                limit, math.sqrt(2 * CURVATURE_SHARE * target / sw.drift_curvature_db_per_s2)
            )
        return limit

    # ----------------------------------------------------------------- blocks

    def _blocks(self, runs: list[_GroupRun]) -> list[list[_GroupRun]]:
        """Consecutive groups packed into blocks no longer than the limit (estimated at the
        rate measured so far: four passes of each group's averages)."""
        rate = self._rate_s
        if not rate:
            return [runs]
        limit = self._block_limit_s()
        blocks: list[list[_GroupRun]] = [[]]
        used = 0.0
        for run in runs:
            need = 4 * run.per_trace * rate
            if blocks[-1] and used + need > limit:
                blocks.append([])
                used = 0.0
            blocks[-1].append(run)
            used += need
        return blocks

    def _switch_block(self, hot: bool, block: list[_GroupRun], connection: Connection) -> None:
        """Switch the source for the whole block; its settling is shared by the block's
        groups. Before going hot the power guard checks every group of the block."""
        source = self.session.bench.noise_source
        if source is None:
            raise MeasurementError("the Y-factor method needs a noise source")
        if source.is_hot == hot:
            return
        if hot:
            current = self.session.bench.analyzer.settings
            for run in block:
                settings = run.settings or current
                run.checks.append(
                    self._guard().before_hot(
                        through=connection is Connection.THROUGH,
                        attenuation_db=settings.attenuation_db if settings else None,
                        preamp=settings.preamp if settings else None,
                        freq_hz=run.group.freqs_hz[0],
                    )
                )
        source.set_hot(hot)
        settle = source.settle_time_s
        self._clock_s += settle
        for run in block:
            run.budget.charge(settle / len(block))

    def _read(self, run: _GroupRun, state: str, connection: Connection, monitor: bool) -> Commit:
        """One pass reading of a group; the block's drift monitor takes it as two acquisitions
        of half the averages each. Returns what accepting the reading does (the pass's error
        check comes first, see ``_checked_step``); the time is charged at once."""
        n = run.per_trace
        split = monitor and n >= 2 * MIN_CHECK_AVERAGES
        # packed as read: a pass holds every group's reading until its error check
        taken: list[tuple[float | None, list[NoiseDensity] | None, PackedReading]] = []
        for averages in (n // 2, n - n // 2) if split else (n,):
            before = run.budget.used_s
            started = self._now_s()
            densities = self._acquire(run.group, averages, run.budget)
            spent = run.budget.used_s - before
            # the reading's middle on the bench's clock (drift lives in real time)
            middle = 0.5 * (started + self._now_s()) if split else None
            taken.append((middle, densities if split else None, PackedReading(densities)))
            del densities
            self._clock_s += spent
            run.settings = self.session.bench.analyzer.settings

        def accept() -> None:
            for middle, densities, packed in taken:
                if middle is not None and densities is not None:
                    run.log.append((middle, state, densities))
                run.readings.add(state, packed)
                if state == "cold" and connection is Connection.DUT:
                    self._guard().observe_cold(packed.densities_w_per_hz())
            self.progress.reading_done()

        return accept

    def _pass(
        self,
        order: list[_GroupRun],
        state: str,
        connection: Connection,
        monitor: _GroupRun | None,
    ) -> None:
        """One pass over ``order`` as one analyzer step: its readings are accepted together
        after the step's error check (``_checked_step``; a profile's ``error_batch``)."""

        def read() -> list[Commit]:
            commits: list[Commit] = []
            for run in order:
                if run.failed is not None:
                    continue
                try:
                    commits.append(
                        self._with_context(
                            run.group, partial(self._read, run, state, connection, run is monitor)
                        )
                    )
                except MeasurementError as exc:
                    commits.append(partial(setattr, run, "failed", exc))
            return commits

        self._checked_step(read)

    def _run_block(self, block: list[_GroupRun], connection: Connection) -> None:
        """The four passes over ``block``. A group whose reading the physics refuses is left
        out of the rest of the block and skipped afterwards, as in the per-group order."""
        forward, backward = block, block[::-1]
        # the measurement's blocks are watched; a calibration block's check would have no
        # point to travel to (its drift is the calibration's, see DEVELOPERS.md)
        monitor: _GroupRun | None = (
            max(block, key=lambda r: r.per_trace) if connection is Connection.DUT else None
        )
        if monitor is not None:
            monitor.log.clear()  # the monitor's check covers this block only
        # the block starts in the state the source is in: cold (after the calibration's
        # blocks and every connection change) means cold-hot-hot-cold, two switches, ending
        # cold for the next block
        source = self.session.bench.noise_source
        first = source is not None and source.is_hot
        passes = ((first, forward), (not first, backward), (not first, forward), (first, backward))
        for hot, order in passes:
            self._switch_block(hot, block, connection)
            self._pass(order, "hot" if hot else "cold", connection, monitor)
        if monitor is None:
            return
        check = self._monitor_check(monitor)
        monitor.log = []  # the check is made: a long sweep's monitors keep none of their readings
        if check is not None:
            for run in block:
                run.drift_checks.append(check)
                run.monitor_hz.append(monitor.group.freqs_hz[0])

    def _round_progress(self, active: list[_GroupRun]) -> None:
        """Tell the progress display a sweep-level round starts: four readings per group,
        for the groups' frequencies (no point ends before the round does)."""
        self.progress.round_start(4 * len(active), sum(len(r.group.freqs_hz) for r in active))

    @staticmethod
    def _monitor_check(monitor: _GroupRun) -> DriftCheck | None:
        """The drift check of the monitor's readings in one block: its points' checks combined
        (disjoint bins of one trace: independent, see :func:`combined_check`)."""
        if monitor.failed is not None or not monitor.log:
            return None
        times = np.array([t for t, _, _ in monitor.log])
        states = [s for _, s, _ in monitor.log]
        checks = []
        for i in range(len(monitor.group.freqs_hz)):
            dens = np.array([d[i].density_w_per_hz for _, _, d in monitor.log])
            u = np.array([d[i].u_density_w_per_hz for _, _, d in monitor.log])
            check = drift_check(times, states, dens, u)
            if check is not None:
                checks.append(check)
        return combined_check(checks)

    def _hold_lucky(self, active: list[_GroupRun], decisions: dict[int, tuple]) -> None:
        """Keep a group that claims its target on far fewer averages than the sweep's other
        groups plan: its u was computed at a noisy estimate, and a lucky one looks finished
        (the per-group order avoids this with the previous group's prior). It takes at least
        ``PRIOR_SHARE`` of the median planned averages before it may stop."""
        planned = [
            r.readings.averages("hot") + (0 if decisions[r.group.index][0] else 2 * r.per_trace)
            for r in active
            if r.group.index in decisions
        ]
        if len(planned) < 3:
            return
        floor = PRIOR_SHARE * float(np.median(planned))
        for run in active:
            decision = decisions.get(run.group.index)
            if decision is None or decision[0] != "target":
                continue
            done = run.readings.averages("hot")
            if done >= floor:
                continue
            policy = run.group.policy
            per_trace = self._next_round_averages(
                policy, done, math.ceil(floor), 2, run.budget, SWITCHED_ROUND_GROWTH
            )
            if per_trace > 0:
                run.per_trace = per_trace
                decisions[run.group.index] = (None, *decision[1:])

    @staticmethod
    def _pilot_indices(runs: list[_GroupRun]) -> set[int]:
        """The groups (indices) that read the pilot round: of each policy's groups (a
        segment's), all when there are at most ``PILOT_ALL``, else ``max(PILOT_ALL,
        ceil(sqrt(n)))`` spread evenly over them, both ends included. The rest are planned
        from the pilots on either side (``_plan_from_pilots``) and read first in the main
        round: four acquisitions each instead of eight, while the pilots' share of a long
        sweep falls as 1/sqrt(n) and their spacing still shrinks as the sweep gets denser."""
        by_policy: list[tuple[Any, list[_GroupRun]]] = []
        for run in runs:
            for policy, members in by_policy:
                if run.group.policy is policy or run.group.policy == policy:
                    members.append(run)
                    break
            else:
                by_policy.append((run.group.policy, [run]))
        chosen: set[int] = set()
        for _, members in by_policy:
            n = len(members)
            k = n if n <= PILOT_ALL else max(PILOT_ALL, math.ceil(math.sqrt(n)))
            picks = {0} if k == 1 else {round(i * (n - 1) / (k - 1)) for i in range(k)}
            chosen.update(members[i].group.index for i in picks)
        return chosen

    def _plan_from_pilots(
        self,
        pending: list[_GroupRun],
        pilots: list[_GroupRun],
        exact: dict[int, float],
        extra_share: float = 0.0,
    ) -> None:
        """Per-trace averages of groups that skipped the pilot round: the averages the pilots
        of the same policy needed exactly (``exact``, per state), smoothed over the pilots by a
        running median of three (one pilot's unlucky estimate - its u widened by a scatter
        test at ``min_averages`` - does not move its neighbours' plans) and interpolated
        linearly in frequency on a log scale, times ``SWITCHED_MARGIN``, plus ``extra_share``
        of it, at most the averages one round's settling would buy the planned groups (the
        calibration's, see ``CALIBRATION_EXTRA_SHARE``); within the group's limits and time
        budget. A group with no usable pilot of its policy (all refused, or none could
        improve) keeps its pilot averages: its first round is then a pilot of its own."""
        rate = self._rate_s or self._rate_from(pilots)
        cap = self._settle_s() / (len(pending) * rate) if rate else math.inf
        models: dict[int, tuple[tuple[float, ...], tuple[float, ...]] | None] = {}
        for run in pending:
            policy = run.group.policy
            if id(policy) not in models:
                models[id(policy)] = self._pilot_model(policy, pilots, exact)
            model = models[id(policy)]
            if model is None:
                continue
            need = math.exp(float(np.interp(run.group.center_hz, *model)))
            planned = need * SWITCHED_MARGIN + min(extra_share * need, cap)
            total = min(max(math.ceil(planned), policy.min_averages), policy.max_averages)
            per_trace = max(1, math.ceil(total / 2))
            if rate:
                fits = run.budget.averages_that_fit(4, 4 * self._settle_s(), rate)
                per_trace = max(1, min(per_trace, fits))
            run.per_trace = per_trace

    @staticmethod
    def _pilot_model(
        policy: Any, pilots: list[_GroupRun], exact: dict[int, float]
    ) -> tuple[tuple[float, ...], tuple[float, ...]] | None:
        """(pilot frequencies, log of their exact needs smoothed by ``_median3``) of one
        policy's pilots (see ``_plan_from_pilots``); None without a usable pilot."""
        known = sorted(
            (p.group.center_hz, math.log(exact[p.group.index]))
            for p in pilots
            if p.group.index in exact
            and exact[p.group.index] > 0
            and (p.group.policy is policy or p.group.policy == policy)
        )
        if not known:
            return None
        xs, raw = zip(*known, strict=True)
        return xs, _median3(raw)

    def _after_pilots(
        self,
        still: list[_GroupRun],
        pending: list[_GroupRun],
        pilots: list[_GroupRun],
        exact: dict[int, float],
        extra_share: float = 0.0,
    ) -> list[_GroupRun]:
        """The next round's groups: those still short of their target and, after the pilot
        round, the groups planned from it, in sweep order (blocks pack consecutive groups)."""
        if not pending:
            return still
        self._plan_from_pilots(pending, pilots, exact, extra_share)
        return sorted(still + pending, key=lambda r: r.group.index)

    @staticmethod
    def _drift_note(run: _GroupRun) -> dict | None:
        """The drift monitors' result for a group's points: chi-square and degrees of freedom
        summed over the blocks that read it (None: no block had a monitor check)."""
        total = combined_check(run.drift_checks)
        if total is None:
            return None
        last = run.drift_checks[-1]
        return {
            "chi2": total.chi2,
            "dof": total.dof,
            "p_value": total.p_value,
            "flagged": total.flagged,
            "slope_db_per_s": {k: 10 / math.log(10) * v for k, v in last.slopes_per_s.items()},
            "monitor_hz": run.monitor_hz,
        }

    # ----------------------------------------------------------------- calibration

    def _calibrate_switched(self, groups: list[PointGroup], writer) -> None:
        """System calibration (THROUGH) of ``groups`` in sweep-level blocks."""
        kind = CalibrationKind.SYSTEM
        self.session.connect(Connection.THROUGH)
        runs = [
            _GroupRun(
                g,
                _Readings(("hot", "cold"), g.freqs_hz),
                TimeBudget(g.policy.time_limit_s * len(g.freqs_hz)),
                self._first_round_averages(g.policy, 2, self._prior.get(kind.value)),
            )
            for g in groups
        ]
        pilots = self._pilot_indices(runs)
        active = [r for r in runs if r.group.index in pilots]
        pending = [r for r in runs if r.group.index not in pilots]
        exact: dict[int, float] = {}  # averages per state each pilot needed exactly
        while active:
            self._round_progress(active)
            for block in self._blocks(active):
                self._run_block(block, Connection.THROUGH)
            decisions = {}
            for run in active:
                if run.failed is not None:
                    self._skip(run.group, run.failed, "calibration", writer)
                    run.release()
                    continue
                policy = run.group.policy
                target = self.plan.calibration.target_ratio * policy.target_u_nf_db
                try:
                    u_worst, settings = self._calibration_u(run.group, kind, run.readings)
                except MeasurementError as exc:
                    self._skip(run.group, exc, "calibration", writer)
                    run.release()
                    continue
                done = run.readings.averages("hot")
                weak = self._significance_need(run.group, kind, run.readings, done)
                if pending and math.isfinite(u_worst):
                    exact[run.group.index] = max(done * (u_worst / target) ** 2, weak or 0)
                stop = None
                if u_worst <= target and weak is None:
                    stop = "target"
                else:
                    need = (
                        averages_for_target(done, u_worst, 0.0, target, margin=SWITCHED_MARGIN)
                        if math.isfinite(u_worst)
                        else 2 * done
                    )
                    if weak is not None:
                        need = weak if need is None else max(need, weak)
                    run.per_trace = self._next_round_averages(
                        policy, done, need, 2, run.budget, SWITCHED_ROUND_GROWTH
                    )
                    if run.per_trace == 0:
                        stop = "max_averages" if done >= policy.max_averages else "time_limit"
                decisions[run.group.index] = (stop, u_worst, settings, target)
            self._hold_lucky(active, decisions)
            still = []
            for run in active:
                if run.group.index not in decisions:
                    continue
                stop, u_worst, settings, target = decisions[run.group.index]
                if stop is None:
                    still.append(run)
                    continue
                done = run.readings.averages("hot")
                if stop == "target" and math.isfinite(u_worst):
                    self._prior[kind.value] = max(1, math.ceil(done * (u_worst / target) ** 2))
                try:
                    entry = self._calibration_entry(run, kind, settings, stop)
                except MeasurementError as exc:
                    self._skip(run.group, exc, "calibration", writer)
                    continue
                finally:
                    run.release()
                self.calibrations.add(entry)
                self.calibrations_measured += 1
                self.progress.step_done(len(run.group.freqs_hz))
            active = self._after_pilots(still, pending, active, exact, CALIBRATION_EXTRA_SHARE)
            pending = []
        self._set_source_cold(TimeBudget(0.0))
        self._rate_s = self._rate_from(runs)
        writer.save_calibration(self.calibrations.to_dict())

    def _calibration_entry(
        self, run: _GroupRun, kind: CalibrationKind, settings, stopped_by: str
    ) -> CalibrationEntry:
        group, readings = run.group, run.readings
        return CalibrationEntry(
            kind=kind,
            settings=settings,
            measured_at_clock=self.session.clock_reading(),
            freqs_hz=list(group.freqs_hz),
            densities={
                n: [readings.get(f, n).combined().density for f in group.freqs_hz]
                for n in ("hot", "cold")
            },
            cold_temperature_k=self.corrections.source_temperature_k,  # type: ignore[union-attr]
            instrument_time_s=run.budget.used_s,
            stopped_by=stopped_by,
            summary=self._calibration_summary(group, kind, readings),
        )

    @staticmethod
    def _rate_from(runs: list[_GroupRun]) -> float | None:
        rates = [r.budget.seconds_per_average(0.0) for r in runs]
        rates = [r for r in rates if r > 0]
        return sum(rates) / len(rates) if rates else None

    # ----------------------------------------------------------------- measurement

    def _measure_switched(self, groups: list[PointGroup], writer) -> None:
        """Measure ``groups`` with the DUT in, in sweep-level blocks; each group's points are
        stored as soon as it stops."""
        groups = [g for g in groups if g.index not in self._unmeasurable]
        runs = []
        for g in groups:
            runs.append(
                _GroupRun(
                    g,
                    _Readings(("hot", "cold"), g.freqs_hz),
                    TimeBudget(g.policy.time_limit_s * len(g.freqs_hz)),
                    self._first_round_averages(g.policy, 2, self._prior.get("dut")),
                )
            )
        if not runs:
            return
        # every block starts cold, so its first pass reads each group cold before the source
        # goes hot: that pass is the power guard's cold look (no extra readings, which would
        # also break the schedule's symmetry in time)
        self._set_source_cold(TimeBudget(0.0))
        calibrations = {r.group.index: self._calibration_for(r.group) for r in runs}
        pilots = self._pilot_indices(runs)
        active = [r for r in runs if r.group.index in pilots]
        pending = [r for r in runs if r.group.index not in pilots]
        exact: dict[int, float] = {}  # averages per state each pilot needed exactly
        while active:
            self._round_progress(active)
            for block in self._blocks(active):
                self._run_block(block, Connection.DUT)
            decisions = {}
            for run in active:
                if run.failed is not None:
                    self._skip(run.group, run.failed, "measurement", writer)
                    run.release()
                    continue
                decided = self._decide(run, calibrations[run.group.index], writer)
                if decided is None:
                    run.release()  # refused by the physics
                else:
                    need = self._averages_at_target(
                        decided[1], run.readings.averages("hot"), run.group.policy.target_u_nf_db
                    )
                    if pending and need is not None:
                        exact[run.group.index] = need
                    # a group reading on drops its points (the next round makes new ones):
                    # only the stopping groups' points wait for the sweep's decisions
                    decisions[run.group.index] = decided if decided[0] is not None else (None, [])
                decided = None
            self._hold_lucky(active, decisions)
            still = []
            for run in active:
                if run.group.index not in decisions:
                    continue
                stop, points = decisions.pop(run.group.index)  # stored points are let go
                if stop is None:
                    still.append(run)
                    continue
                calibration = calibrations[run.group.index]
                outcome = self._finish_group(run, stop, points, calibration)
                run.release()
                self._store_outcome(run.group, outcome, writer)
                del outcome, points  # journalled: not held through the next round
            active = self._after_pilots(still, pending, active, exact)
            pending = []
        self._set_source_cold(TimeBudget(0.0))
        self._rate_s = self._rate_from(runs) or self._rate_s

    def _decide(self, run: _GroupRun, calibration: CalibrationEntry, writer):
        """(stop reason or None, points) after a block; None when the physics refused."""
        group, policy = run.group, run.group.policy
        done = run.readings.averages("hot")
        try:
            points = [self._point(f, run.readings, calibration) for f in group.freqs_hz]
        except YNotSignificantError as exc:
            # a weak source may become significant with more averages (see _measure_group)
            run.per_trace = self._next_round_averages(
                policy, done, averages_for_significance(done, exc.significance), 2, run.budget
            )
            if run.per_trace > 0:
                return None, []
            self._skip(group, exc, "measurement", writer)
            return None
        except MeasurementError as exc:
            self._skip(group, exc, "measurement", writer)
            return None
        if all(p.u_nf_db <= policy.target_u_nf_db for p in points):
            return "target", points
        need = self._averages_needed(points, done, policy.target_u_nf_db, SWITCHED_MARGIN)
        run.per_trace = self._next_round_averages(
            policy, done, need, 2, run.budget, SWITCHED_ROUND_GROWTH
        )
        if run.per_trace > 0:
            return None, points
        if need is None:
            return "calibration", points
        return ("max_averages" if done >= policy.max_averages else "time_limit"), points

    def _finish_group(
        self, run: _GroupRun, stop: str, points: list[PointResult], calibration
    ) -> _GroupOutcome:
        group, policy = run.group, run.group.policy
        done = run.readings.averages("hot")
        prior = self._averages_at_target(points, done, policy.target_u_nf_db)
        if prior is not None:
            self._prior["dut"] = prior
        drift = self._drift_note(run)
        if drift is not None and drift["flagged"]:
            logger.warning(
                "%s: drift the hot/cold schedule cannot cancel (curvature or a step of the "
                "receiver gain or the source output; chi-square %.1f on %d dof, p = %.2g < %g): "
                "points flagged 'drift', never PASS; let the bench warm up, check cables and "
                'the source supply, or use [switching] mode = "per_group"',
                group.describe(),
                drift["chi2"],
                drift["dof"],
                drift["p_value"],
                DRIFT_ALPHA,
            )
        finished = []
        for p in points:
            p = self._finish_point(
                p, run.readings, run.budget, group, run.checks, stop, calibration
            )
            finished.append(self._with_drift(p, drift))
        return _GroupOutcome(finished, run.settings, run.budget.used_s)

    @staticmethod
    def _with_drift(point: PointResult, check: dict | None) -> PointResult:
        notes = {**point.notes, "schedule": "per_sweep"}
        flags = list(point.flags)
        if check is not None:
            notes["drift_check"] = check
            if check["flagged"] and PointFlag.DRIFT not in flags:
                flags.append(PointFlag.DRIFT)
        return point.model_copy(update={"notes": notes, "flags": flags})

    def _store_outcome(self, group: PointGroup, outcome: _GroupOutcome, writer) -> None:
        self._record_settings(outcome.settings, group, writer)
        for point in outcome.points:
            writer.add_point(point, self._budget(point))
            self.progress.point_done(point)
            if self.on_point is not None:
                self.on_point(point)
