"""Budgets and verdicts of a finished run, and the few record edits production needs.

The sequencer computes a budget per point (plan ``[uncertainty]``) and the verdict (plan
``[limits]``) while it runs. :func:`apply_budgets_and_verdict` does the same for a finished
:class:`~noisebench.results.store.RunRecord` - a run measured before the plan had those sections, a
run imported into the database, or a run whose budgets could not all be computed - and adds
one production rule the per-point judging cannot know about:

**An incomplete run never passes.** When points of the plan are missing from the record (the
run was interrupted, or failed part-way), a unit verdict of ``pass`` becomes
``indeterminate`` with a note naming how many points are missing: the missing points were
never verified, and a band that holds at least one measured point would otherwise pass on
that point alone. ``fail`` stays ``fail`` (a failing point is a failure whatever else is
missing).

The function is idempotent: budgets already in the record are kept, missing ones are added,
and the verdict is recomputed from the budgets, so applying it to a run the sequencer already
judged gives the same verdict (plus the incomplete-run rule).

:func:`annotate_record` adds production notes (lot, part number, station unit data) to the
run's ``info.notes`` and :func:`save_record` rewrites ``results.json``, ``results.csv`` and
``run.json`` of the run folder atomically with the edited record.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from noisebench.errors import InputError, MeasurementError
from noisebench.results.store import RUN_INFO_FILE, RunInfo, RunRecord, write_atomic, write_results
from noisebench.running.plan import Plan
from noisebench.science.point import PointResult

logger = logging.getLogger(__name__)

__all__ = [
    "INCOMPLETE_NOTE",
    "annotate_record",
    "apply_budgets_and_verdict",
    "failing_points",
    "missing_freqs_hz",
    "plan_for_frequencies",
    "save_record",
]

INCOMPLETE_NOTE = (
    "incomplete run: {missing} of {total} planned point(s) not measured; "
    "a unit with unverified points cannot pass"
)
FREQ_REL_TOL = 1e-9


def missing_freqs_hz(record: RunRecord, plan: Plan) -> list[float]:
    """Frequencies (Hz) of the plan that the record holds no point for, ascending."""
    measured = [p.freq_hz for p in record.points]
    return [
        f
        for f in (p.freq_hz for p in plan.points())
        if not any(math.isclose(f, m, rel_tol=FREQ_REL_TOL) for m in measured)
    ]


def _uncertainty_inputs(plan: Plan) -> Any:
    inputs = plan.uncertainty
    if inputs is None or isinstance(inputs, Mapping):
        return None if inputs is None else _inputs_from_dict(inputs)
    return inputs


def _inputs_from_dict(data: Mapping[str, Any]) -> Any:
    from noisebench.science.uncertainty import UncertaintyInputs

    return UncertaintyInputs.from_dict(data)


def _limit_mask(plan: Plan) -> Any:
    mask = plan.limits
    if mask is None or not isinstance(mask, Mapping):
        return mask
    from noisebench.science.limits import LimitMask

    return LimitMask.from_dict(mask)


def _budget_for(point: PointResult, inputs: Any, plan: Plan) -> dict[str, Any]:
    from noisebench.science.uncertainty import budget_for_point

    return budget_for_point(point, inputs, base_dir=plan.base_dir).to_dict()


def _complete_budgets(
    record: RunRecord, inputs: Any, plan: Plan
) -> tuple[list[dict[str, Any]], list[str]]:
    """The record's budgets plus one for every point that has none; and the warnings."""
    have = record.budgets_by_freq()
    budgets = list(record.budgets)
    warnings: list[str] = []
    for point in record.points:
        if point.freq_hz in have:
            continue
        try:
            budgets.append(_budget_for(point, inputs, plan))
        except (InputError, MeasurementError) as exc:
            text = f"no uncertainty budget at {point.freq_hz:.9g} Hz: {exc}"
            logger.warning(text)
            warnings.append(text)
    budgets.sort(key=lambda b: float(b.get("freq_hz", 0.0)))
    return budgets, warnings


def _judge(
    record: RunRecord, budgets: list[dict[str, Any]], mask: Any, inputs: Any, plan: Plan
) -> dict[str, Any]:
    from noisebench.science.limits import judge

    by_freq = {b.get("freq_hz"): b for b in budgets}
    coverage = getattr(inputs, "coverage_factor", None) or 2.0
    verdict = judge(record.points, by_freq, mask, coverage_factor=coverage).to_dict()
    missing = missing_freqs_hz(record, plan)
    if missing:
        verdict["notes"] = list(verdict.get("notes") or []) + [
            INCOMPLETE_NOTE.format(missing=len(missing), total=len(plan.points()))
        ]
        if verdict.get("unit") == "pass":
            verdict["unit"] = "indeterminate"
    return verdict


def apply_budgets_and_verdict(record: RunRecord, plan: Plan) -> RunRecord:
    """A copy of ``record`` with a budget for every point and the verdict from those budgets.

    Without an ``[uncertainty]`` section the budgets are left as they are; without
    ``[limits]`` the verdict is left as it is. A point whose budget cannot be computed keeps
    none (its NF is then judged with ``k * u_nf_db``, which the verdict notes) and a line in
    ``record.warnings`` says why. A record without any point (every point skipped or the run
    stopped at once) is ``indeterminate``, never unjudged. See the module docstring for the
    incomplete-run rule. No file is written (see :func:`save_record`).
    """
    if not isinstance(record, RunRecord):
        raise InputError(
            "record",
            f"must be a RunRecord (got {type(record).__name__})",
            fix="pass the record returned by the sequencer or load_run()",
        )
    inputs = _uncertainty_inputs(plan)
    mask = _limit_mask(plan)
    budgets: list[dict[str, Any]] = list(record.budgets)
    warnings: list[str] = []
    if inputs is not None:
        budgets, warnings = _complete_budgets(record, inputs, plan)
    verdict = record.verdict
    if mask is not None:
        verdict = _judge(record, budgets, mask, inputs, plan)
    new_warnings = [w for w in warnings if w not in record.warnings]
    return record.model_copy(
        update={
            "budgets": budgets,
            "verdict": verdict,
            "warnings": list(record.warnings) + new_warnings,
        }
    )


def failing_points(record: RunRecord) -> list[dict[str, Any]]:
    """The points whose verdict is not ``pass`` (``fail``/``indeterminate``), with why.

    Each entry: ``freq_hz``, ``verdict``, ``nf_db``, ``U_nf_db``, ``gain_db`` and ``checks``
    (only the checks that did not pass: quantity, limit, value, U, verdict, margin_db, note).
    Points outside every band (``not_judged``) are left out.
    """
    out = []
    for entry in (record.verdict or {}).get("points") or []:
        if entry.get("verdict") in ("pass", "not_judged", None):
            continue
        checks = [c for c in entry.get("checks") or [] if c.get("verdict") != "pass"]
        out.append(
            {
                "freq_hz": entry.get("freq_hz"),
                "verdict": entry.get("verdict"),
                "nf_db": entry.get("nf_db"),
                "U_nf_db": entry.get("U_nf_db"),
                "gain_db": entry.get("gain_db"),
                "checks": checks,
            }
        )
    return out


def annotate_record(record: RunRecord, **notes: Any) -> RunRecord:
    """A copy of ``record`` with ``notes`` merged into ``info.notes`` (None values skipped)."""
    merged = {**record.info.notes, **{k: v for k, v in notes.items() if v is not None}}
    info = RunInfo.model_validate({**record.info.model_dump(), "notes": merged})
    return record.model_copy(update={"info": info})


def save_record(record: RunRecord, folder: Path) -> RunRecord:
    """Rewrite the run folder's ``results.json``, ``results.csv`` and ``run.json`` (atomic)."""
    folder = Path(folder)
    if not (folder / RUN_INFO_FILE).exists():
        raise InputError(
            "folder",
            f"{folder} holds no {RUN_INFO_FILE}",
            fix="save into the folder the run was written to",
        )
    write_results(record, folder)
    write_atomic(folder / RUN_INFO_FILE, record.info.model_dump_json(indent=2))
    return record


# --------------------------------------------------------------------------- narrowed plans


def _segment_of(plan: Plan, freq_hz: float) -> int | None:
    """Index of the segment whose settings apply at ``freq_hz`` (None: the plan-wide ones)."""
    import numpy as np

    segments = plan.sweep.segments
    for i, seg in enumerate(segments):
        if np.any(np.isclose(seg.frequencies_hz(), freq_hz, rtol=FREQ_REL_TOL, atol=0.0)):
            return i
    plain = plan.sweep.freqs_hz or []
    if any(math.isclose(f, freq_hz, rel_tol=FREQ_REL_TOL) for f in plain):
        return None
    for i, seg in enumerate(segments):
        freqs = seg.frequencies_hz()
        if freqs.min() * (1 - FREQ_REL_TOL) <= freq_hz <= freqs.max() * (1 + FREQ_REL_TOL):
            return i
    return None


def plan_for_frequencies(plan: Plan, freqs_hz: Any) -> Plan:
    """``plan`` measured at ``freqs_hz`` (Hz) only, each with the settings that apply there.

    A frequency inside a segment's range takes that segment's acquisition settings, any other
    the plan-wide ``[acquisition]``. The narrowed plan is checked like a loaded one
    (:class:`~noisebench.running.plan.PlanError` naming every problem, e.g. outside the ENR table).
    """
    from noisebench.running.plan import PlanError, Segment, SweepSection
    from noisebench.running.plan_checks import cross_check

    values = [freqs_hz] if isinstance(freqs_hz, (int, float)) else list(freqs_hz)
    if not values:
        raise InputError("freqs_hz", "is empty", fix="give at least one frequency in Hz")
    for i, f in enumerate(values):
        if isinstance(f, bool) or not isinstance(f, (int, float)) or not math.isfinite(f) or f <= 0:
            raise InputError(f"freqs_hz[{i}]", f"must be a finite frequency > 0 Hz (got {f!r})")
    plain: list[float] = []
    by_segment: dict[int, list[float]] = {}
    for f in sorted(float(v) for v in values):
        index = _segment_of(plan, f)
        (plain if index is None else by_segment.setdefault(index, [])).append(f)
    segments = [
        Segment(freqs_hz=fs, **plan.sweep.segments[i].overrides())
        for i, fs in sorted(by_segment.items())
    ]
    narrowed = plan.model_copy(
        update={"sweep": SweepSection(freqs_hz=plain or None, segments=segments)}
    )
    problems = cross_check(narrowed)
    if problems:
        raise PlanError(problems, source="narrowed plan")
    return narrowed
