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
