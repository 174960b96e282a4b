"""What a station reports: one result per unit measured, and the summary of a station session
(counts, yield, time per unit)."""

from __future__ import annotations

from datetime import datetime
from typing import Any, Literal

from pydantic import BaseModel, Field

from noisebench.units import format_frequency

UnitStatus = Literal["complete", "interrupted", "failed", "not_started"]


class UnitResult(BaseModel):
    """What the station did with one unit."""

    serial: str
    lot: str | None = None
    part_number: str | None = None
    attempt: int = 1
    run_id: str | None = None
    folder: str | None = None
    status: UnitStatus
    verdict: str | None = None  # pass / fail / indeterminate; None: not judged or not measured
    failing: list[dict[str, Any]] = Field(default_factory=list)
    points: int = 0
    skipped_points: list[dict[str, Any]] = Field(default_factory=list)
    max_nf_db: float | None = None
    min_gain_db: float | None = None
    started_at: datetime
    duration_s: float = Field(ge=0)
    instrument_time_s: float | None = None
    calibrated_groups: int = 0
    calibration_reason: str | None = None
    database_id: int | None = None
    store_error: str | None = None
    error: str | None = None
    simulated_unit: dict[str, Any] | None = None

    @property
    def outcome(self) -> str:
        """``pass``/``fail``/``indeterminate``, ``not_judged`` (no limits), or ``error``.

        ``error``: the run did not complete (refused, failed, interrupted), whatever its
        points say; as in the results database, only complete runs are judged units. A
        complete run is counted by its verdict (a unit whose points were all skipped is
        ``indeterminate``: nothing was verified), or without limits ``not_judged`` -
        ``error`` when it measured no point at all.
        """
        if self.error is not None or self.status != "complete":
            return "error"
        if self.verdict:
            return self.verdict
        return "error" if self.points == 0 else "not_judged"

    def line(self) -> str:
        """One line for the operator."""
        who = self.serial + (f" (lot {self.lot})" if self.lot else "")
        text = f"{who}: {self.outcome.upper().replace('_', ' ')}"
        if self.max_nf_db is not None:
            text += f"  NF max {self.max_nf_db:.3f} dB"
        if self.min_gain_db is not None:
            text += f"  gain min {self.min_gain_db:.2f} dB"
        text += f"  {self.duration_s:.1f} s"
        if self.calibration_reason:
            text += f"  [calibrated: {self.calibration_reason}]"
        if self.status != "complete":
            text += f"  [run {self.status}]"
        for point in self.failing[:5]:
            text += "\n    " + _failing_text(point)
        if len(self.failing) > 5:
            text += f"\n    ... {len(self.failing) - 5} more point(s)"
        for skipped in self.skipped_points[:3]:
            text += (
                f"\n    not measured: {format_frequency(skipped.get('freq_hz', 0.0))} "
                f"({skipped.get('stage')}): {skipped.get('reason')}"
            )
        if len(self.skipped_points) > 3:
            text += f"\n    ... {len(self.skipped_points) - 3} more point(s) not measured"
        if self.error:
            text += f"\n    error: {self.error}"
        if self.store_error:
            text += f"\n    NOT STORED in the database: {self.store_error}"
        return text


def _failing_text(point: dict[str, Any]) -> str:
    checks = "; ".join(
        f"{c.get('quantity')} {c.get('value') if c.get('value') is None else round(c['value'], 3)}"
        f" vs {c.get('kind')} {c.get('limit')} (U {_fmt(c.get('U'))}): {c.get('verdict')}"
        for c in point.get("checks") or []
    )
    return f"{format_frequency(point.get('freq_hz', 0.0))} {point.get('verdict')}: {checks}"


def _fmt(value: Any, digits: int = 3) -> str:
    return "-" if not isinstance(value, (int, float)) else f"{value:.{digits}f}"


OUTCOMES = ("pass", "fail", "indeterminate", "not_judged", "error")


class StationSummary(BaseModel):
    """The tally of a station run (see the module docstring for the counting rules)."""

    station_id: str
    operator: str | None = None
    plan_name: str | None = None
    folder: str
    database: str | None = None
    started_at: datetime
    ended_at: datetime | None = None
    stopped_by: str | None = None
    units: list[UnitResult] = Field(default_factory=list)

    def latest(self) -> list[UnitResult]:
        """The latest attempt of every serial, in first-seen order."""
        last: dict[str, UnitResult] = {}
        for result in self.units:
            last[result.serial] = result
        return list(last.values())

    def counts(self) -> dict[str, int]:
        """Units (latest attempt per serial) by outcome."""
        out = dict.fromkeys(OUTCOMES, 0)
        for result in self.latest():
            out[result.outcome] += 1
        return out

    @property
    def judged(self) -> int:
        c = self.counts()
        return c["pass"] + c["fail"] + c["indeterminate"]

    @property
    def yield_fraction(self) -> float | None:
        """Passed / judged units; None when no unit was judged."""
        return self.counts()["pass"] / self.judged if self.judged else None

    @property
    def mean_time_per_unit_s(self) -> float | None:
        """Mean wall-clock time per measured unit (every attempt), s."""
        times = [u.duration_s for u in self.units]
        return sum(times) / len(times) if times else None

    @property
    def calibrations(self) -> int:
        """Units that triggered a calibration."""
        return sum(1 for u in self.units if u.calibrated_groups)

    @property
    def retests(self) -> int:
        return len(self.units) - len(self.latest())

    def not_stored(self) -> list[str]:
        return [u.serial for u in self.units if u.store_error]

    def format(self) -> str:
        """The end-of-run summary for the operator (plain text)."""
        c = self.counts()
        head = f"Station {self.station_id}" + (
            f", operator {self.operator}" if self.operator else ""
        )
        lines = [
            f"{head}: {len(self.latest())} unit(s), {len(self.units)} run(s)"
            + (f" ({self.retests} re-test(s))" if self.retests else ""),
            "  " + ", ".join(f"{k.replace('_', ' ')} {c[k]}" for k in OUTCOMES),
        ]
        if self.yield_fraction is not None:
            lines.append(
                f"  yield {100 * self.yield_fraction:.1f} % ({c['pass']} of {self.judged} judged)"
            )
        else:
            lines.append("  yield - (no unit judged)")
        if self.mean_time_per_unit_s is not None:
            lines.append(f"  mean time per unit {self.mean_time_per_unit_s:.1f} s")
        reasons = [u.calibration_reason for u in self.units if u.calibrated_groups]
        detail = ", ".join(f"{reasons.count(r)} {r}" for r in dict.fromkeys(reasons))
        lines.append(f"  calibrations {self.calibrations}" + (f" ({detail})" if detail else ""))
        failed = [u.serial for u in self.latest() if u.outcome in ("fail", "error")]
        if failed:
            lines.append("  fail/error: " + ", ".join(failed))
        if self.database:
            missing = self.not_stored()
            lines.append(
                f"  database {self.database}"
                + (f"; NOT STORED: {', '.join(missing)}" if missing else "")
            )
        lines.append(f"  results in {self.folder}")
        if self.stopped_by:
            lines.append(f"  stopped: {self.stopped_by}")
        return "\n".join(lines)
