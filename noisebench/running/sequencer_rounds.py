"""Adaptive averaging: how many averages the next round of readings takes, and the rounds
themselves (one reading, or hot-cold-cold-hot with the noise source)."""

from __future__ import annotations

import math

from noisebench.bench.registry import Connection
from noisebench.running.groups import PointGroup
from noisebench.running.plan import AcquisitionPolicy
from noisebench.running.safety import (
    PowerCheck,
)
from noisebench.running.sequencer_core import SequencerCore, _Readings
from noisebench.science.averaging import (
    PLANNING_MARGIN,
    TimeBudget,
    averages_at_target,
    averages_for_target,
)
from noisebench.science.point import PointResult

PILOT_FRACTION = 0.5
"""Gain method: a group's first round takes half the averages the previous group needed; one
well-planned top-up round usually follows, and a point that needs much less wastes at most
that half."""


PILOT_FRACTION_SWITCHED = 1.1
"""Y-factor: every extra hot-cold-cold-hot round costs two noise-source settling times, so the
first round takes what the previous group needed plus the planning margin, and usually ends
the point in one round."""


MAX_ROUND_GROWTH = 16
"""A round may at most multiply the averages so far by 16: the first estimate of u from few
averages scatters, and a cap keeps one noisy estimate from buying far too many averages."""


def _split_uncertainty(point: PointResult) -> tuple[float, float]:
    """(part more averages reduce, part they do not) of ``point.u_nf_db``, dB."""
    contributions = point.notes.get("u_nf_db_contributions") or {}
    fixed_names = ("hot_cal", "cold_cal", "n_floor", "floor")
    reducible_names = ("hot", "cold", "n_meas", "dut")
    u_fix = math.sqrt(sum(float(contributions[n]) ** 2 for n in fixed_names if n in contributions))
    u_red = math.sqrt(
        sum(float(contributions[n]) ** 2 for n in reducible_names if n in contributions)
    )
    if u_red == 0.0 and u_fix == 0.0:
        return point.u_nf_db, 0.0
    return u_red, u_fix


class AveragingRounds(SequencerCore):
    """Rounds of readings and the averages each round takes (radiometer scaling)."""

    def _first_round_averages(
        self,
        policy: AcquisitionPolicy,
        states: int,
        prior: int | None = None,
        budget: TimeBudget | None = None,
    ) -> int:
        """Per-trace averages of a group's first round: ``min_averages``, or a share of what
        the previous group needed (neighbouring frequencies need similar averaging), within
        the group's time budget at the previous group's rate."""
        traces_per_state = 2 if states == 2 else 1
        total = policy.min_averages
        if prior:
            fraction = PILOT_FRACTION_SWITCHED if states == 2 else PILOT_FRACTION
            total = max(total, min(int(fraction * prior), policy.max_averages))
        per_trace = max(1, math.ceil(total / traces_per_state))
        if budget is not None and self._rate_s is not None and per_trace > 1:
            settle = self._round_settle_s(states)
            fits = budget.averages_that_fit(traces_per_state * states, settle, self._rate_s)
            per_trace = max(1, min(per_trace, fits))
        return per_trace

    def _next_round_averages(
        self,
        policy: AcquisitionPolicy,
        done: int,
        need: int | None,
        states: int,
        budget: TimeBudget,
        growth: int = MAX_ROUND_GROWTH,
    ) -> int:
        """Per-trace averages of the next round (0: stop); the averages so far grow at most
        ``growth`` times."""
        if need is None or done >= policy.max_averages:
            return 0
        traces_per_state = 2 if states == 2 else 1
        want = min(need, policy.max_averages, growth * done) - done
        if want <= 0:
            return 0
        per_trace = max(1, math.ceil(want / traces_per_state))
        settle = self._round_settle_s(states)
        fits = budget.averages_that_fit(traces_per_state * states, settle, fallback_s=0.0)
        return min(per_trace, fits)

    def _round_settle_s(self, states: int) -> float:
        """Settling a hot-cold-cold-hot round costs: to hot (if cold now), hot to cold, cold to
        hot, and the final switch to cold should this be the last round."""
        if states != 2:
            return 0.0
        source = self.session.bench.noise_source
        switches = 3 + (0 if source is not None and source.is_hot else 1)
        return switches * self._settle_s()

    def _round(
        self,
        group: PointGroup,
        readings: _Readings,
        per_trace: int,
        budget: TimeBudget,
        connection: Connection,
    ) -> list[PowerCheck]:
        """One round: ``floor``/``dut`` once, or hot-cold-cold-hot."""
        if readings.names in (("floor",), ("dut",)):
            self.progress.round_start(1, len(group.freqs_hz))
            readings.add(readings.names[0], self._acquire(group, per_trace, budget))
            self.progress.reading_done()
            return []
        checks = []
        self.progress.round_start(4, len(group.freqs_hz))
        for hot in (True, False, False, True):
            check = self._set_hot(hot, budget, connection, group)
            if check is not None:
                checks.append(check)
            densities = self._acquire(group, per_trace, budget)
            readings.add("hot" if hot else "cold", densities)
            self.progress.reading_done()
            if not hot and connection is Connection.DUT:
                self._guard().observe_cold([d.density_w_per_hz for d in densities])
        return checks

    @staticmethod
    def _averages_at_target(points: list[PointResult], done: int, target: float) -> int | None:
        """What the worst point would have needed exactly: the next group's prior."""
        exact = [averages_at_target(done, *_split_uncertainty(p), target) for p in points]
        known = [n for n in exact if n is not None]
        return max(1, math.ceil(max(known))) if known else None

    @staticmethod
    def _averages_needed(
        points: list[PointResult], done: int, target: float, margin: float = PLANNING_MARGIN
    ) -> int | None:
        """Averages (per reading) that bring every point to its goal; None: none can improve.

        The goal is the target; where the calibration's part alone exceeds it, the goal is to
        bring the reducible part down to the calibration's (beyond that, averaging gains
        little)."""
        needs = []
        for point in points:
            if point.u_nf_db <= target:
                continue
            u_red, u_fix = _split_uncertainty(point)
            need = averages_for_target(done, u_red, u_fix, target, margin=margin)
            if need is None and u_red > u_fix:
                need = averages_for_target(done, u_red, 0.0, u_fix, margin=margin)
            if need is not None:
                needs.append(need)
        return max(needs) if needs else None
