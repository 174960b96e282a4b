"""The calibration step of a run: the analyzer floor (gain method) or the system (Y-factor),
averaged to a design target, with a per-frequency summary."""

from __future__ import annotations

import logging
import math
from datetime import datetime
from functools import partial
from typing import Any

from noisebench.bench.acquisition import AcquisitionSettings
from noisebench.bench.registry import Connection
from noisebench.errors import MeasurementError
from noisebench.running.calibration import (
    DEFAULT_DESIGN_GAIN_DB,
    CalibrationEntry,
    CalibrationKind,
    floor_design_u_db,
    system_design_u_db,
)
from noisebench.running.groups import PointGroup
from noisebench.running.progress import CALIBRATION
from noisebench.running.sequencer_core import _Readings
from noisebench.running.sequencer_rounds import AveragingRounds
from noisebench.science.averaging import (
    TimeBudget,
    averages_for_target,
)
from noisebench.science.density import NoiseDensity
from noisebench.science.methods._common import (
    Y_SIGNIFICANCE_SIGMAS,
    averages_for_significance,
    y_significance,
)
from noisebench.science.point import Method

logger = logging.getLogger(__name__)


class CalibrationSteps(AveragingRounds):
    """Calibrate every group that has no valid stored calibration."""

    def _switched(self, groups: list[PointGroup]) -> bool:
        """Whether Y-factor readings run in sweep-level blocks (the switched sweep's rule)."""
        return False

    def _calibrate_switched(self, groups: list[PointGroup], writer) -> None:
        raise NotImplementedError  # pragma: no cover - provided by SwitchedSweep

    def _calibration_kind(self) -> CalibrationKind:
        return CalibrationKind.FLOOR if self.plan.method is Method.GAIN else CalibrationKind.SYSTEM

    def _calibrate_all(self, groups: list[PointGroup], writer) -> None:
        kind = self._calibration_kind()
        needed = []
        for group in groups:
            settings = self._configure(group, group.policy.min_averages)
            if (
                self.calibrations.find(
                    kind,
                    settings,
                    group.freqs_hz,
                    max_age_s=self.plan.calibration.max_age_s,
                    clock=self.session.clock_reading(),
                )
                is None
            ):
                needed.append(group)
        if not needed:
            logger.info("stored %s calibration still valid: reused", kind.value)
            return
        self.progress.phase(CALIBRATION, sum(len(g.freqs_hz) for g in needed))
        if kind is CalibrationKind.SYSTEM and self._switched(needed):
            self._calibrate_switched(needed, writer)
            return
        connection = Connection.TERMINATION if kind is CalibrationKind.FLOOR else Connection.THROUGH
        self.session.connect(connection)
        for group in needed:
            settings = self._configure(group, group.policy.min_averages)
            if (
                group.lo_hz is not None
                and self.calibrations.find(
                    kind,
                    settings,
                    group.freqs_hz,
                    max_age_s=self.plan.calibration.max_age_s,
                    clock=self.session.clock_reading(),
                )
                is not None
            ):
                continue  # a converter: another LO's group at the same IF was just calibrated
            try:
                entry = self._with_context(group, partial(self._calibrate_group, group, kind))
            except MeasurementError as exc:
                self._set_source_cold(TimeBudget(0.0))
                self._skip(group, exc, "calibration", writer)
                continue
            self.calibrations.add(entry)
            self.calibrations_measured += 1
            self.progress.step_done(len(group.freqs_hz))
        writer.save_calibration(self.calibrations.to_dict())

    def _calibrate_group(self, group: PointGroup, kind: CalibrationKind) -> CalibrationEntry:
        policy = group.policy
        budget = TimeBudget(policy.time_limit_s * len(group.freqs_hz))
        names = ("floor",) if kind is CalibrationKind.FLOOR else ("hot", "cold")
        readings = _Readings(names, group.freqs_hz)
        connection = Connection.TERMINATION if kind is CalibrationKind.FLOOR else Connection.THROUGH
        target = self.plan.calibration.target_ratio * policy.target_u_nf_db
        per_trace = self._first_round_averages(
            policy, len(names), self._prior.get(kind.value), budget
        )
        stopped_by = "target"
        while True:
            self._round(group, readings, per_trace, budget, connection)
            u_worst, settings = self._calibration_u(group, kind, readings)
            done = readings.averages(names[0])
            weak = self._significance_need(group, kind, readings, done)
            if u_worst <= target and weak is None:
                break
            need = (
                averages_for_target(done, u_worst, 0.0, target)
                if math.isfinite(u_worst)
                else 2 * done
            )
            if weak is not None:
                need = weak if need is None else max(need, weak)
            per_trace = self._next_round_averages(policy, done, need, len(names), budget)
            if per_trace == 0:
                stopped_by = "max_averages" if done >= policy.max_averages else "time_limit"
                logger.warning(
                    "%s: calibration stopped by its %s at %d averages (u %.4f dB > "
                    "%.4f dB design target)",
                    group.describe(),
                    stopped_by.replace("_", " "),
                    done,
                    u_worst,
                    target,
                )
                break
        self._set_source_cold(budget)
        self._rate_s = budget.seconds_per_average(self._rate_s or 0.0)
        if stopped_by == "target" and math.isfinite(u_worst):
            done = readings.averages(names[0])
            self._prior[kind.value] = max(1, math.ceil(done * (u_worst / target) ** 2))
        return CalibrationEntry(
            kind=kind,
            settings=settings,
            measured_at_clock=self.session.clock_reading(),
            freqs_hz=list(group.freqs_hz),
            densities={
                n: [readings.get(f, n).combined().density for f in group.freqs_hz] for n in names
            },
            cold_temperature_k=self._corr().source_temperature_k,
            instrument_time_s=budget.used_s,
            stopped_by=stopped_by,
            summary=self._calibration_summary(group, kind, readings),
        )

    def _calibration_u(
        self, group: PointGroup, kind: CalibrationKind, readings: _Readings
    ) -> tuple[float, AcquisitionSettings]:
        """Worst contribution of the calibration to the NF of a design DUT, dB."""
        worst, settings = 0.0, None
        for f in group.freqs_hz:
            if kind is CalibrationKind.FLOOR:
                floor = readings.get(f, "floor").combined().density
                u = self._floor_design_u(f, floor)
                settings = floor.settings
            else:
                hot = readings.get(f, "hot").combined().density
                cold = readings.get(f, "cold").combined().density
                u = self._system_design_u(f, hot, cold)
                settings = hot.settings
            worst = max(worst, u)
        return worst, settings  # type: ignore[return-value]

    @staticmethod
    def _significance_need(
        group: PointGroup, kind: CalibrationKind, readings: _Readings, done: int
    ) -> int | None:
        """Averages that bring a system calibration's weakest hot/cold pair to a usable Y
        (``averages_for_significance``); None when every pair already is one (or a floor).

        A pair within 4 u(Y) of Y = 1 is refused where the calibration is used, so the loop
        averages on until it is significant, or stops at its limits (a dead source)."""
        if kind is CalibrationKind.FLOOR:
            return None
        pairs = [(readings.get(f, "hot"), readings.get(f, "cold")) for f in group.freqs_hz]
        z = min(y_significance(h.combined().density, c.combined().density) for h, c in pairs)
        if z >= Y_SIGNIFICANCE_SIGMAS:
            return None
        return averages_for_significance(done, z)

    def _design_gain_db(self, freq_hz: float) -> float:
        corr = self.corrections
        if corr is not None and corr.gain is not None:
            if self.plan.conversion is not None:
                # one IF serves several RF points: design for the lowest conversion gain
                return min(corr.gain(p.report_hz)[0] for p in self.plan.points())
            return corr.gain(freq_hz)[0]
        expect = self.plan.expect.dut_gain_db
        return expect if expect is not None else DEFAULT_DESIGN_GAIN_DB

    def _design_input_loss_db(self, freq_hz: float) -> float:
        """The input loss in front of the design DUT: at the point, or for a converter the
        largest at any RF (the calibration at one IF serves them all)."""
        corr = self.corrections
        assert corr is not None  # resolved when the sequencer is made
        if self.plan.conversion is not None:
            return max(corr.input_loss(p.report_hz) for p in self.plan.points())
        return corr.input_loss(freq_hz)

    def _floor_design_u(self, freq_hz: float, floor: NoiseDensity) -> float:
        corr = self._corr()
        path_gain_db = (
            self._design_gain_db(freq_hz)
            - self._design_input_loss_db(freq_hz)
            - corr.output_loss(freq_hz)
        )
        return floor_design_u_db(
            floor, path_gain_db, source_temperature_k=corr.source_temperature_k, t0_k=corr.t0_k
        )

    def _system_design_u(self, freq_hz: float, hot: NoiseDensity, cold: NoiseDensity) -> float:
        corr = self._corr()
        return system_design_u_db(
            hot,
            cold,
            corr.enr_at(freq_hz)[0],
            cold_temperature_k=corr.source_temperature_k,
            design_gain_db=self._design_gain_db(freq_hz),
            t0_k=corr.t0_k,
        )

    def _calibration_summary(
        self, group: PointGroup, kind: CalibrationKind, readings: _Readings
    ) -> list[dict[str, Any]]:
        from noisebench.science.physics import BOLTZMANN_J_PER_K

        out: list[dict[str, Any]] = []
        for f in group.freqs_hz:
            if kind is CalibrationKind.FLOOR:
                floor = readings.get(f, "floor").combined().density
                te_sa = floor.density_w_per_hz / BOLTZMANN_J_PER_K
                out.append(
                    {
                        "freq_hz": f,
                        "floor_w_per_hz": floor.density_w_per_hz,
                        "floor_dbm_per_hz": floor.density_dbm_per_hz,
                        "averages": readings.averages("floor"),
                        "floor_noise_temperature_k": te_sa,
                    }
                )
            else:
                cal = self._system_point(
                    f,
                    readings.get(f, "hot").combined().density,
                    readings.get(f, "cold").combined().density,
                )
                out.append(
                    {
                        "freq_hz": f,
                        "system_nf_db": cal.nf_db,
                        "system_te_k": cal.te_k,
                        "u_system_te_k": cal.u_te_k,
                        "y_db": cal.y_db,
                        "enr_db": cal.enr_db,
                        "averages": readings.averages("hot"),
                        "flags": [flag.value for flag in cal.flags],
                    }
                )
        return out

    def _system_point(
        self,
        freq_hz: float,
        hot: NoiseDensity,
        cold: NoiseDensity,
        measured_at: datetime | None = None,
    ):
        from noisebench.science.methods.yfactor import calibrate_point

        corr = self._corr()
        enr_db, u_enr_db, extrapolated = corr.enr_at(freq_hz)
        return calibrate_point(
            hot,
            cold,
            enr_db,
            cold_temperature_k=corr.source_temperature_k,
            u_enr_db=u_enr_db,
            t0_k=corr.t0_k,
            enr_reference=corr.enr_reference,
            enr_extrapolated=extrapolated,
            calibrated_at=measured_at,
        )

    def _calibration_for(self, group: PointGroup) -> CalibrationEntry:
        settings = self._configure(group, group.policy.min_averages)
        entry = self.calibrations.find(
            self._calibration_kind(),
            settings,
            group.freqs_hz,
            max_age_s=self.plan.calibration.max_age_s,
            clock=self.session.clock_reading(),
        )
        if entry is not None:
            return entry
        old = self.calibrations.expired(
            self._calibration_kind(),
            settings,
            group.freqs_hz,
            clock=self.session.clock_reading(),
        )
        if old is None:  # pragma: no cover - _calibrate_all ran first
            raise MeasurementError(f"no valid calibration for {group.describe()}")
        limit = self.plan.calibration.max_age_s
        age = old.age_s(clock=self.session.clock_reading())
        raise MeasurementError(
            f"the calibration is {age:.4g} s old, beyond calibration.max_age_s = {limit:g} s: "
            "the analyzer's gain and noise may have moved since, an error no budget holds; "
            "resume the run (--resume) to calibrate again and measure the remaining points, or "
            "raise calibration.max_age_s if the bench is known to be stable that long"
        )
