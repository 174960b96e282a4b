"""The DUT-gain step of a gain-method run: the generator, a THROUGH pass and a DUT pass."""

from __future__ import annotations

from noisebench.bench.registry import Connection
from noisebench.errors import InputError
from noisebench.running.groups import PointGroup
from noisebench.running.safety import (
    check_generator_level,
)
from noisebench.running.sequencer_core import SequencerCore


class GainStep(SequencerCore):
    """Measure the DUT's gain with the generator (substitution)."""

    def _measure_gain(self, groups: list[PointGroup], writer) -> None:
        """DUT gain with the generator (substitution: THROUGH pass, then DUT pass)."""
        from noisebench.running.gain_measurement import (
            GainMeasurementPlan,
            choose_level_dbm,
            measure_gain,
        )

        if self.plan.conversion is not None:
            self._measure_conversion_gain(groups, writer)
            return
        spec, bench = self.plan.gain, self.session.bench
        generator_section = self.plan.bench.generator
        if bench.generator is None or generator_section is None:
            raise InputError("bench.generator", "measuring the DUT gain needs a generator")
        if spec is None or spec.max_gain_db is None or spec.dut_p1db_out_dbm is None:
            raise InputError("gain", 'source = "measure" needs max_gain_db and dut_p1db_out_dbm')
        policy = groups[0].policy
        limits = self._guard().limits
        analyzer_max = min(
            limits.max_input_dbm,
            limits.compression_at(policy.attenuation_db, False) - limits.compression_backoff_db,
        )
        full_scale = bench.analyzer.full_scale_dbm  # a converter clips hard at full scale
        if full_scale is not None:
            analyzer_max = min(analyzer_max, full_scale - limits.compression_backoff_db)
        gm_plan = GainMeasurementPlan(
            freqs_hz=sorted(f for g in groups for f in g.freqs_hz),
            expected_gain_db=spec.max_gain_db,
            dut_p1db_out_dbm=spec.dut_p1db_out_dbm,
            analyzer_max_input_dbm=analyzer_max,
            rbw_hz=spec.rbw_hz,
            readings=spec.readings,
            averages=spec.averages,
            attenuation_db=policy.attenuation_db,
            preamp=False,
            generator_max_dbm=generator_section.max_level_dbm,
            linearity_u_db=spec.linearity_u_db,
        )
        level, _ = choose_level_dbm(gm_plan)
        check_generator_level(
            level,
            max_level_dbm=generator_section.max_level_dbm,
            dut_gain_db=spec.max_gain_db,
            limits=limits,
            dut_max_input_dbm=self.plan.safety.dut_max_input_dbm,
            attenuation_db=policy.attenuation_db,
            preamp=False,
        )
        self._last_request = None  # the gain procedure reconfigures the analyzer
        result = measure_gain(
            bench.analyzer,
            bench.generator,
            gm_plan,
            lambda stage: self.session.connect(Connection(stage.value)),
            noise_source=bench.noise_source,
        )
        self._last_request = None
        self._measured_gain = {p.freq_hz: (p.gain_db, p.u_gain_db) for p in result.points}
        writer.update_info(
            notes={**writer.info.notes, "gain_measurement": result.model_dump(mode="json")}
        )

    def _tone_limits(self, groups: list[PointGroup]) -> tuple[float, float | None]:
        """(highest tone level at the analyzer input, dBm; the analyzer attenuation) for the
        gain procedures: the rated input and the compression back-off, as for amplifiers."""
        policy = groups[0].policy
        limits = self._guard().limits
        analyzer_max = min(
            limits.max_input_dbm,
            limits.compression_at(policy.attenuation_db, False) - limits.compression_backoff_db,
        )
        full_scale = self.session.bench.analyzer.full_scale_dbm
        if full_scale is not None:
            analyzer_max = min(analyzer_max, full_scale - limits.compression_backoff_db)
        return analyzer_max, policy.attenuation_db

    def _measure_conversion_gain(self, groups: list[PointGroup], writer) -> None:
        """A converter's conversion gain with the generator at the RF and the analyzer at the
        IF, against THROUGH references at both (noisebench.running.conversion_gain). The same
        level rule and pre-switch checks as the amplifier's, plus the LO line at the IF port."""
        from noisebench.running.conversion_gain import (
            ConversionGainPlan,
            measure_conversion_gain,
        )
        from noisebench.running.gain_measurement import GainMeasurementPlan, choose_level_dbm
        from noisebench.running.safety import check_input_power
        from noisebench.science.physics import dbm_to_w, w_to_dbm

        spec, bench = self.plan.gain, self.session.bench
        generator_section = self.plan.bench.generator
        if bench.generator is None or generator_section is None:
            raise InputError("bench.generator", "measuring the conversion gain needs a generator")
        if spec is None or spec.max_gain_db is None or spec.dut_p1db_out_dbm is None:
            raise InputError("gain", 'source = "measure" needs max_gain_db and dut_p1db_out_dbm')
        corr = self._corr()
        triples = sorted(
            {
                (g.rf_of(f), float(g.lo_hz), f)
                for g in groups
                if g.lo_hz is not None
                for f in g.freqs_hz
            }
        )
        rf = [t[0] for t in triples]
        lo = [t[1] for t in triples]
        if_ = [t[2] for t in triples]
        analyzer_max, attenuation = self._tone_limits(groups)
        lines = self._guard().dut_lines_dbm
        if lines is not None:  # leave room for the LO line, which reaches the analyzer too
            room_w = float(dbm_to_w(analyzer_max)) - float(dbm_to_w(lines))
            if room_w > 0:
                analyzer_max = float(w_to_dbm(room_w))
        tone = GainMeasurementPlan(
            freqs_hz=sorted(set(rf) | set(if_)),
            expected_gain_db=spec.max_gain_db,
            dut_p1db_out_dbm=spec.dut_p1db_out_dbm,
            analyzer_max_input_dbm=analyzer_max,
            rbw_hz=spec.rbw_hz,
            readings=spec.readings,
            averages=spec.averages,
            attenuation_db=attenuation,
            preamp=False,
            generator_max_dbm=generator_section.max_level_dbm,
            linearity_u_db=spec.linearity_u_db,
        )
        cg_plan = ConversionGainPlan(
            tone=tone,
            rf_hz=rf,
            lo_hz=lo,
            if_hz=if_,
            output_loss_rf_db=[corr.output_loss(f) for f in rf],
            output_loss_if_db=[corr.output_loss(f) for f in if_],
            u_generator_flatness_db=spec.flatness_u_db("generator"),
            u_analyzer_flatness_db=spec.flatness_u_db("analyzer"),
        )
        level, _ = choose_level_dbm(tone)
        limits = self._guard().limits
        check_generator_level(
            level,
            max_level_dbm=generator_section.max_level_dbm,
            dut_gain_db=spec.max_gain_db,
            limits=limits,
            dut_max_input_dbm=self.plan.safety.dut_max_input_dbm,
            attenuation_db=attenuation,
            preamp=False,
        )
        if lines is not None:  # the tone and the LO line reach the analyzer together
            total = float(w_to_dbm(dbm_to_w(level + spec.max_gain_db) + dbm_to_w(lines)))
            check_input_power(
                total,
                limits,
                what="generator tone and LO line",
                attenuation_db=attenuation,
                preamp=False,
            )
        self._last_request = None  # the gain procedure reconfigures the analyzer
        lo_control = self.lo
        result = measure_conversion_gain(
            bench.analyzer,
            bench.generator,
            cg_plan,
            lambda stage: self.session.connect(Connection(stage.value)),
            lambda lo_hz: lo_control.set(lo_hz) if lo_control is not None else None,
            noise_source=bench.noise_source,
        )
        self._last_request = None
        self._measured_gain = {p.rf_hz: (p.gain_db, p.u_gain_db) for p in result.points}
        writer.update_info(
            notes={
                **writer.info.notes,
                "conversion_gain_measurement": result.model_dump(mode="json"),
            }
        )
