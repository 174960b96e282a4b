"""The sweep-level schedule's pilot round (``running/sequencer_switched.py``): only a spread of
groups reads it, the rest are planned from them (a running median of three, Tukey's smoother,
then linear interpolation), and every point still reaches its target with its hot and cold
readings in whole cold-hot-hot-cold rounds. Fixed seeds; the run is small (six points at
0.1 dB)."""

from __future__ import annotations

import math
from types import SimpleNamespace

import pytest
from _sequencer_helpers import ideal_sim, make_plan

from noisebench.bench.registry import simulated_session
from noisebench.running.progress import NullProgress
from noisebench.running.sequencer import Sequencer
from noisebench.running.sequencer_switched import PILOT_ALL, SwitchedSweep, _median3

FREQS = (1.0e9, 1.5e9, 2.0e9, 2.5e9, 3.0e9, 3.5e9)
POLICY = object()  # one policy (segment) for the stub groups


def _runs(n: int, policy=POLICY) -> list:
    return [
        SimpleNamespace(group=SimpleNamespace(index=i, policy=policy, center_hz=1e9 * (i + 1)))
        for i in range(n)
    ]


@pytest.mark.parametrize(
    ("n", "expected"),
    [(1, [0]), (4, [0, 1, 2, 3]), (6, [0, 2, 3, 5]), (9, [0, 3, 5, 8])],
)
def test_pilots_are_all_of_a_few_groups_else_a_spread_with_both_ends(n, expected):
    assert sorted(SwitchedSweep._pilot_indices(_runs(n))) == expected


def test_a_long_sweep_pilots_about_the_square_root_of_its_groups_evenly():
    picks = sorted(SwitchedSweep._pilot_indices(_runs(101)))
    assert len(picks) == math.ceil(math.sqrt(101)) == 11
    assert picks[0] == 0 and picks[-1] == 100
    assert {b - a for a, b in zip(picks, picks[1:], strict=False)} == {10}
    assert PILOT_ALL == 4


def test_each_policy_has_its_own_pilots():
    other = object()
    runs = _runs(3) + [
        SimpleNamespace(group=SimpleNamespace(index=3 + i, policy=other, center_hz=9e9 + i))
        for i in range(9)
    ]
    picks = SwitchedSweep._pilot_indices(runs)
    assert {0, 1, 2} <= picks  # three groups of the first segment: all pilots
    assert sorted(picks - {0, 1, 2}) == [3, 6, 8, 11]


def test_running_median_of_three_drops_one_outlier_and_keeps_a_trend():
    # Tukey, Exploratory Data Analysis (1977), ch. 7: median of three with the end-point rule
    assert _median3((1.0, 5.0, 1.0, 1.0)) == (1.0, 1.0, 1.0, 1.0)
    assert _median3((1.0, 2.0, 3.0, 4.0, 5.0)) == (1.0, 2.0, 3.0, 4.0, 5.0)
    # an outlying end value is replaced by the median of it, its neighbour's smoothed value
    # and the line through the next two smoothed ones extrapolated: for (9, 2, 3, 4) the
    # inner values smooth to 3, 3, and the end to median(9, 3, 3*3 - 2*3) = 3
    assert _median3((9.0, 2.0, 3.0, 4.0)) == (3.0, 3.0, 3.0, 3.0)
    assert _median3((2.0, 7.0)) == (2.0, 7.0)


def test_planned_groups_follow_the_smoothed_pilots():
    pilots = _runs(4)
    exact = {0: 80.0, 1: 160.0, 2: 84.0, 3: 86.0}  # pilot 1's u widened by chance
    xs, ys = SwitchedSweep._pilot_model(POLICY, pilots, exact)
    assert xs == (1e9, 2e9, 3e9, 4e9)
    # on a log scale: inner medians 84 and 86; the ends by Tukey's rule, e.g. the first is
    # median(80, 84, 84^3/86^2 = 80.14): pilot 1's 160 moves no plan
    expected = [84.0**3 / 86.0**2, 84.0, 86.0, 86.0]
    assert [math.exp(y) for y in ys] == pytest.approx(expected, rel=1e-12)
    assert SwitchedSweep._pilot_model(object(), pilots, exact) is None  # another policy


class _Rounds(NullProgress):
    """Counts the sweep-level rounds the sequencer announces."""

    def __init__(self) -> None:
        self.rounds = 0

    def round_start(self, readings: int, units: int) -> None:
        self.rounds += 1


def _counted_run(tmp_path, seed: int = 3):
    """A six-point sweep; per centre frequency, each acquisition's (round, source hot)."""
    plan = make_plan("y_factor", freqs_hz=FREQS, target=0.1, switching={"mode": "per_sweep"})
    sim = ideal_sim(seed)
    progress = _Rounds()
    reads: dict[float, list[tuple[int, bool]]] = {}
    original = sim.analyzer.acquire_trace

    def counting():
        centre = sim.analyzer.settings.center_hz
        reads.setdefault(centre, []).append((progress.rounds, sim.noise_source.is_hot))
        return original()

    sim.analyzer.acquire_trace = counting
    session = simulated_session(sim, plan.bench)
    record = Sequencer(plan, session, progress=progress).run(tmp_path / "pilots")
    return plan, record, reads


def test_planned_groups_read_each_phase_in_one_round_and_every_point_reaches_the_target(
    tmp_path,
):
    plan, record, reads = _counted_run(tmp_path)
    assert len(record.points) == len(FREQS)
    target = plan.acquisition.target_u_nf_db
    assert all(p.u_nf_db <= target for p in record.points)
    rounds = {f: sorted({r for r, _ in reads[f]}) for f in FREQS}
    # pilots 0, 2, 3, 5 read the pilot round of both phases (rounds 1 and 3 here: the
    # calibration needs two rounds, the measurement two); groups 1 and 4 are planned from
    # them and read one round per phase
    for i in (0, 2, 3, 5):
        assert {1, 3} <= set(rounds[FREQS[i]])
    assert rounds[FREQS[1]] == rounds[FREQS[4]] == [2, 4]
    for f in FREQS:  # every group's round: cold, hot, hot, cold passes, symmetric in time
        for r in rounds[f]:
            states = [hot for q, hot in reads[f] if q == r]
            assert (
                states == states[::-1] and not states[0] and states.count(True) * 2 == len(states)
            )
