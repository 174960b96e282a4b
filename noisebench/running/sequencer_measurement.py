"""The measurement step of a run: a group's readings with the DUT in, until the target
uncertainty, the average limit or the time limit, and the point results with their flags."""

from __future__ import annotations

from noisebench.bench.registry import Connection
from noisebench.errors import MeasurementError, YNotSignificantError
from noisebench.running.calibration import (
    CalibrationEntry,
)
from noisebench.running.groups import PointGroup
from noisebench.running.safety import (
    PowerCheck,
)
from noisebench.running.sequencer_calibration import CalibrationSteps
from noisebench.running.sequencer_core import _GroupOutcome, _Readings
from noisebench.science.averaging import (
    TimeBudget,
)
from noisebench.science.methods._common import averages_for_significance
from noisebench.science.point import Method, PointFlag, PointResult
from noisebench.units import format_frequency


class MeasurementSteps(CalibrationSteps):
    """Measure a group of points with the DUT in and build their results."""

    def _measure_group(self, group: PointGroup) -> _GroupOutcome:
        policy = group.policy
        budget = TimeBudget(policy.time_limit_s * len(group.freqs_hz))
        y_factor = self.plan.method is Method.Y_FACTOR
        names = ("hot", "cold") if y_factor else ("dut",)
        readings = _Readings(names, group.freqs_hz)
        calibration = self._calibration_for(group)
        self._set_lo(group, budget)
        checks: list[PowerCheck] = []
        replay = self.session.bench.analyzer.replays_recordings
        if y_factor and self._guard().needs_cold_look and not replay:
            self._set_source_cold(budget)
            look = self._acquire(group, self._first_round_averages(policy, 2), budget)
            readings.add("cold", look)
            self._guard().observe_cold([d.density_w_per_hz for d in look])
        per_trace = self._first_round_averages(policy, len(names), self._prior.get("dut"), budget)
        while True:
            checks += self._round(group, readings, per_trace, budget, Connection.DUT)
            done = readings.averages(names[0])
            try:
                points = [self._point(f, readings, calibration, group) for f in group.freqs_hz]
            except YNotSignificantError as exc:
                # a weak source may become significant with more averages; a dead one is
                # refused when the averaging has to stop
                per_trace = self._next_round_averages(
                    policy,
                    done,
                    averages_for_significance(done, exc.significance),
                    len(names),
                    budget,
                )
                if per_trace == 0:
                    raise
                continue
            if all(p.u_nf_db <= policy.target_u_nf_db for p in points):
                stop = "target"
                break
            need = self._averages_needed(points, done, policy.target_u_nf_db)
            per_trace = self._next_round_averages(policy, done, need, len(names), budget)
            if per_trace == 0:
                stop = (
                    "calibration"
                    if need is None
                    else "max_averages"
                    if done >= policy.max_averages
                    else "time_limit"
                )
                break
        self._set_source_cold(budget)
        self._rate_s = budget.seconds_per_average(self._rate_s or 0.0)
        prior = self._averages_at_target(points, readings.averages(names[0]), policy.target_u_nf_db)
        if prior is not None:
            self._prior["dut"] = prior
        settings = self.session.bench.analyzer.settings
        points = [
            self._finish_point(p, readings, budget, group, checks, stop, calibration)
            for p in points
        ]
        return _GroupOutcome(points, settings, budget.used_s)

    def _point(
        self,
        freq_hz: float,
        readings: _Readings,
        calibration: CalibrationEntry,
        group: PointGroup | None = None,
    ) -> PointResult:
        corr = self._corr()
        if group is not None and group.lo_hz is not None:
            return self._converter_point(freq_hz, readings, calibration, group)
        if self.plan.method is Method.Y_FACTOR:
            from noisebench.science.methods.yfactor import y_factor_point

            enr_db, u_enr_db, extrapolated = corr.enr_at(freq_hz)
            cal = self._system_point(
                freq_hz,
                calibration.reading("hot", freq_hz),
                calibration.reading("cold", freq_hz),
                calibration.measured_at,
            )
            return y_factor_point(
                readings.get(freq_hz, "hot").combined().density,
                readings.get(freq_hz, "cold").combined().density,
                enr_db,
                cold_temperature_k=corr.source_temperature_k,
                calibration=cal,
                u_enr_db=u_enr_db,
                t0_k=corr.t0_k,
                enr_reference=corr.enr_reference,
                enr_extrapolated=extrapolated,
                input_loss_db=corr.input_loss(freq_hz),
                input_loss_temperature_k=corr.input_loss_temperature_k,
                output_loss_db=corr.output_loss(freq_hz),
                output_loss_temperature_k=corr.output_loss_temperature_k,
            )
        from noisebench.science.methods.gain import gain_method_point

        gain_db, u_gain_db, holds_input_loss = self._stated_gain(freq_hz)
        loss_in, loss_out = corr.input_loss(freq_hz), corr.output_loss(freq_hz)
        point = gain_method_point(
            readings.get(freq_hz, "dut").combined().density,
            gain_db,
            floor=calibration.reading("floor", freq_hz),
            u_gain_db=u_gain_db,
            source_temperature_k=corr.source_temperature_k,
            t0_k=corr.t0_k,
            input_loss_db=loss_in,
            input_loss_temperature_k=corr.input_loss_temperature_k,
            output_loss_db=loss_out,
            output_loss_temperature_k=corr.output_loss_temperature_k,
            floor_temperature_k=calibration.cold_temperature_k,
            gain_includes_losses=holds_input_loss,
            gain_includes_output_loss=False,
        )
        return self._mark_stated_gain(point)

    def _converter_point(
        self, if_hz: float, readings: _Readings, calibration: CalibrationEntry, group: PointGroup
    ) -> PointResult:
        """A frequency-converting DUT's point: read at the IF, reported at the RF, with ENR at
        the RF and the image, the analyzer calibrated at the IF, losses at RF/image/IF."""
        from noisebench.science.methods.converter import (
            converter_gain_method_point,
            converter_y_factor_point,
        )

        corr, conv = self.corrections, self.plan.conversion
        assert corr is not None and conv is not None and group.lo_hz is not None
        rf, lo = group.rf_of(if_hz), group.lo_hz
        image = 2.0 * lo - rf
        rejection = self.image_rejection.at(rf)
        common = dict(
            rf_hz=rf,
            lo_hz=lo,
            image_rejection_db=rejection,
            nf_type=conv.nf_type,
            u_image_rejection_db=conv.u_image_rejection_db,
            t0_k=corr.t0_k,
            input_loss_db=corr.input_loss(rf),
            input_loss_image_db=corr.input_loss(image) if rejection is not None else None,
            input_loss_temperature_k=corr.input_loss_temperature_k,
            output_loss_db=corr.output_loss(if_hz),
            output_loss_temperature_k=corr.output_loss_temperature_k,
            lo_level_dbm=self.lo.level_dbm if self.lo is not None else None,
        )
        if self.plan.method is Method.Y_FACTOR:
            enr_rf, u_rf, extrapolated = corr.enr_at(rf)
            enr_img = u_img = None
            if rejection is not None:
                enr_img, u_img, ext_img = corr.enr_at(image)
                extrapolated = extrapolated or ext_img
            cal = self._system_point(
                if_hz,
                calibration.reading("hot", if_hz),
                calibration.reading("cold", if_hz),
                calibration.measured_at,
            )
            return converter_y_factor_point(
                readings.get(if_hz, "hot").combined().density,
                readings.get(if_hz, "cold").combined().density,
                enr_rf_db=enr_rf,
                enr_image_db=enr_img,
                cold_temperature_k=corr.source_temperature_k,
                calibration=cal,
                u_enr_rf_db=u_rf,
                u_enr_image_db=u_img,
                enr_reference=corr.enr_reference,
                enr_extrapolated=extrapolated,
                **common,
            )
        gain_db, u_gain_db, holds_input_loss = self._stated_gain(rf)
        point = converter_gain_method_point(
            readings.get(if_hz, "dut").combined().density,
            gain_db,
            floor=calibration.reading("floor", if_hz),
            u_gain_db=u_gain_db,
            source_temperature_k=corr.source_temperature_k,
            floor_temperature_k=calibration.cold_temperature_k,
            gain_includes_input_loss=holds_input_loss,
            gain_includes_output_loss=False,
            **common,
        )
        assert point.conversion is not None  # a converter method's point
        spec = self.plan.gain
        source = "measured" if holds_input_loss else (spec.source if spec is not None else None)
        info = point.conversion.model_copy(
            update={
                "gain_source": source,
                "measured_gain_db": gain_db if holds_input_loss else None,
                "u_measured_gain_db": u_gain_db if holds_input_loss else None,
            }
        )
        return self._mark_stated_gain(point.model_copy(update={"conversion": info}))

    def _mark_stated_gain(self, point: PointResult) -> PointResult:
        """Flag ``gain_not_measured`` on a point whose gain is the stated one (a file or a
        constant): its ``gain_db`` reports what was assumed, so no gain limit may judge it."""
        if self._corr().gain is None or PointFlag.GAIN_NOT_MEASURED in point.flags:
            return point
        return point.model_copy(update={"flags": [*point.flags, PointFlag.GAIN_NOT_MEASURED]})

    def _stated_gain(self, freq_hz: float) -> tuple[float, float, bool]:
        """The DUT gain as known, dB, its uncertainty, dB, and whether it holds the input loss.

        A file/constant gain is the DUT's own (neither loss). A measured gain is between the
        THROUGH planes (input loss and DUT, not the output loss). The gain method turns it into
        the path gain (source termination to analyzer) and records which losses it held, so
        that budgets move the path gain with a loss's error where the loss was subtracted."""
        corr = self._corr()
        if corr.gain is not None:
            gain_db, u = corr.gain(freq_hz)
            return gain_db, u, False
        if freq_hz in self._measured_gain:
            gain_db, u = self._measured_gain[freq_hz]
            return gain_db, u, True
        raise MeasurementError(f"no DUT gain at {format_frequency(freq_hz)}")  # pragma: no cover

    def _finish_point(
        self,
        point: PointResult,
        readings: _Readings,
        budget: TimeBudget,
        group: PointGroup,
        checks: list[PowerCheck],
        stop: str,
        calibration: CalibrationEntry,
    ) -> PointResult:
        f = point.conversion.if_hz if point.conversion is not None else point.freq_hz
        flags = list(point.flags)
        combined = [readings.get(f, n).combined() for n in readings.names]
        if any(c.excess_scatter for c in combined) and PointFlag.EXCESS_SCATTER not in flags:
            flags.append(PointFlag.EXCESS_SCATTER)
        reached = point.u_nf_db <= group.policy.target_u_nf_db
        if not reached and stop == "time_limit":
            flags.append(PointFlag.TIME_LIMIT)
        if calibration.stopped_by == "time_limit" and PointFlag.CAL_TIME_LIMIT not in flags:
            flags.append(PointFlag.CAL_TIME_LIMIT)  # the calibration's quality travels along
        if any(c.caution for c in checks) and PointFlag.COMPRESSION_RISK not in flags:
            flags.append(PointFlag.COMPRESSION_RISK)
        share = len(group.freqs_hz)
        by_name = list(zip(readings.names, combined, strict=True))
        notes = dict(point.notes)
        notes.update(
            {
                "target_u_nf_db": group.policy.target_u_nf_db,
                "stopped_by": "target" if reached else stop,
                "group": group.index,
                "group_points": share,
                "readings": {n: c.readings for n, c in by_name},
                "averages_per_reading": {n: c.averages for n, c in by_name},
                "birge_ratio": {n: c.birge_ratio for n, c in by_name},
                "calibration_measured_at": calibration.measured_at.isoformat(),
                "calibration_time_s": (calibration.instrument_time_s or 0.0) / share,
            }
        )
        if checks:
            notes["hot_power_dbm"] = max(c.power_dbm for c in checks)
            notes["compression_backoff_db"] = min(c.backoff_db for c in checks)
        return point.model_copy(
            update={
                "flags": flags,
                "notes": notes,
                "averages": sum(c.averages for c in combined),
                "instrument_time_s": budget.used_s / share,
            }
        )
