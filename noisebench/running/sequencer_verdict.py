"""The end of a point and of a run: the point's uncertainty budget and the unit's verdict."""

from __future__ import annotations

from noisebench.running.sequencer_core import SequencerCore
from noisebench.science.point import PointResult


class VerdictStep(SequencerCore):
    """Budgets per point and the verdict against the plan's limits."""

    def _budget(self, point: PointResult) -> dict | None:
        """The point's uncertainty budget when the plan has an [uncertainty] section."""
        inputs = self.plan.uncertainty
        if inputs is None or isinstance(inputs, dict):
            return None
        from noisebench.science.point import Method
        from noisebench.science.uncertainty import budget_for_point

        level_u = self.session.bench.analyzer.level_uncertainty_db
        if (
            self.plan.method is Method.GAIN
            and inputs.absolute_amplitude_db is None
            and level_u is not None
        ):  # the instrument's own absolute-level uncertainty (a receiver scale calibration)
            inputs = type(inputs).model_validate(
                {**inputs.model_dump(exclude_none=True), "absolute_amplitude_db": {"u": level_u}}
            )
        return budget_for_point(point, inputs, base_dir=self.plan.base_dir).to_dict()

    def _verdict(self, writer) -> dict | None:
        """Pass/fail against the plan's [limits] with the stored budgets' expanded U."""
        mask = self.plan.limits
        if mask is None or isinstance(mask, dict):
            return None  # no point measured: judged below as INDETERMINATE, never unjudged
        from noisebench.results.store import load_run
        from noisebench.science.limits import judge

        so_far = load_run(writer.folder)  # every point and budget journalled, incl. resumed
        budgets = {b["freq_hz"]: b for b in so_far.budgets}
        coverage = getattr(self.plan.uncertainty, "coverage_factor", 2.0)
        verdict = judge(so_far.points, budgets, mask, coverage_factor=coverage).to_dict()
        # A unit with points the plan asked for but the run could not measure never passes.
        done = {p.freq_hz for p in so_far.points}
        missing = [p.freq_hz for p in self.plan.points() if p.freq_hz not in done]
        if missing:
            verdict["notes"] = list(verdict.get("notes") or []) + [
                f"{len(missing)} of {len(self.plan.points())} planned points were not "
                "measured: the unit cannot pass"
            ]
            if verdict.get("unit") == "pass":
                verdict["unit"] = "indeterminate"
        return verdict
