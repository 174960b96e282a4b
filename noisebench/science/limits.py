"""Limit masks and pass / fail / indeterminate verdicts with guard bands from the uncertainty.

A :class:`LimitMask` (the plan's ``[limits]`` section) is a list of frequency bands, each with
any of: a maximum NF, a minimum and/or maximum gain, and a maximum gain flatness (max - min gain
over the band's measured points). Bands may overlap; every band that contains a point applies.
Band edges are inclusive.

Decision rules (conformity assessment, JCGM 106:2012 (cited from memory); common practice in
test):

``guarded`` (default)
    the expanded uncertainty U is a guard band. For an upper limit L:
    PASS when ``value + U <= L``, FAIL when ``value - U > L``, INDETERMINATE otherwise
    (the limit lies inside the coverage interval). A lower limit mirrors it:
    PASS when ``value - U >= L``, FAIL when ``value + U < L``.
``simple``
    shared risk, no guard band: PASS when ``value <= L`` (upper) or ``value >= L`` (lower),
    FAIL otherwise. U is still reported.

Comparisons are exact (no tolerance): ``value + U == L`` passes, ``value - U == L`` is
indeterminate under the guarded rule. Flatness is judged per band with
``U_flatness = sqrt(U_max**2 + U_min**2)`` from the gains at the band's extreme points (their
errors taken as independent, the conservative choice); it needs at least two measured gains.
A gain that was stated, not measured (a point flagged ``gain_not_measured``) is no measured
gain: its gain and flatness checks are INDETERMINATE (see ``GAIN_CHECK_BLOCKING_FLAGS``).

Aggregation per unit: FAIL if any check fails; else INDETERMINATE if any check is
indeterminate, a required quantity was not measured, or (``require_coverage``) a band holds no
measured point; else PASS. Points outside every band are "not_judged".

The expanded uncertainty of each point's NF comes from its budget (:class:`~noisebench.
uncertainty.Budget` or its dict), or a number, or else ``k * point.u_nf_db`` (statistical part
only, noted in the verdict's ``notes``); the gain's from ``k * point.u_gain_db``. A Monte Carlo
budget's coverage interval is used as it is, asymmetric (:func:`decide_interval`): PASS when
its upper end is within an upper limit, FAIL when its lower end is beyond it.

Size: one job, limit masks and verdicts: the mask schema, the guard-band rule and the verdict
per quantity share the band look-ups.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from enum import Enum
from typing import Any, Literal, TypeGuard

from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

from noisebench.errors import InputError, input_error_from_validation
from noisebench.science.point import (
    GAIN_CHECK_BLOCKING_FLAGS,
    VERDICT_BLOCKING_FLAGS,
    PointResult,
)
from noisebench.science.ranges import check_range, warn_unusual
from noisebench.units import format_frequency, format_frequency_range

__all__ = [
    "BandVerdict",
    "Check",
    "DecisionRule",
    "LimitBand",
    "LimitMask",
    "PointVerdict",
    "UnitVerdict",
    "Verdict",
    "decide",
    "decide_interval",
    "judge",
]

DEFAULT_COVERAGE_FACTOR = 2.0
"""k used for ``k * u`` when a point has no budget (about 95 % for a normal distribution)."""


class DecisionRule(str, Enum):
    GUARDED = "guarded"  # guard band = expanded uncertainty (JCGM 106:2012)
    SIMPLE = "simple"  # shared risk: the measured value alone decides


class Verdict(str, Enum):
    PASS = "pass"
    FAIL = "fail"
    INDETERMINATE = "indeterminate"
    NOT_JUDGED = "not_judged"


_SEVERITY = {Verdict.NOT_JUDGED: 0, Verdict.PASS: 1, Verdict.INDETERMINATE: 2, Verdict.FAIL: 3}


def _worst(verdicts: Sequence[Verdict]) -> Verdict:
    return max(verdicts, key=_SEVERITY.__getitem__, default=Verdict.NOT_JUDGED)


def decide(
    value: float,
    expanded: float,
    limit: float,
    kind: Literal["max", "min"],
    rule: DecisionRule | str = DecisionRule.GUARDED,
) -> Verdict:
    """Verdict of one value (dB) with expanded uncertainty ``expanded`` (dB) against one limit.

    ``kind="max"``: ``limit`` is an upper limit; ``"min"``: a lower limit. See the module
    docstring for the rules; comparisons are exact.
    """
    _finite_number("expanded", expanded)
    if expanded < 0:
        raise InputError(
            "expanded",
            f"must be >= 0 (got {expanded!r})",
            fix="an expanded uncertainty is never negative",
        )
    _finite_number("value", value)
    return decide_interval(value, value - expanded, value + expanded, limit, kind, rule)


def decide_interval(
    value: float,
    low: float,
    high: float,
    limit: float,
    kind: Literal["max", "min"],
    rule: DecisionRule | str = DecisionRule.GUARDED,
) -> Verdict:
    """Verdict from a coverage interval ``[low, high]`` (dB) of the measurand.

    Guarded: an upper limit passes when ``high <= limit`` and fails when ``low > limit``; a
    lower limit passes when ``low >= limit`` and fails when ``high < limit``. This is how an
    asymmetric Monte Carlo interval (JCGM 101:2008) is used. Simple: ``value`` alone decides.
    """
    for field, x in (("value", value), ("low", low), ("high", high), ("limit", limit)):
        _finite_number(field, x)
    if low > high:
        raise InputError(
            "low", f"interval [{low!r}, {high!r}] is reversed", fix="pass the lower end first"
        )
    rule = _rule(rule)
    if kind not in ("max", "min"):
        raise InputError("kind", f"must be 'max' or 'min' (got {kind!r})")
    if rule is DecisionRule.SIMPLE:
        ok = value <= limit if kind == "max" else value >= limit
        return Verdict.PASS if ok else Verdict.FAIL
    if kind == "max":
        if high <= limit:
            return Verdict.PASS
        return Verdict.FAIL if low > limit else Verdict.INDETERMINATE
    if low >= limit:
        return Verdict.PASS
    return Verdict.FAIL if high < limit else Verdict.INDETERMINATE


def _finite_number(field: str, x: Any) -> None:
    if isinstance(x, bool) or not (isinstance(x, (int, float)) and math.isfinite(x)):
        raise InputError(field, f"must be a finite number (got {x!r})", value=x)


def _rule(rule: DecisionRule | str) -> DecisionRule:
    try:
        return DecisionRule(rule)
    except ValueError:
        raise InputError(
            "decision_rule",
            f"unknown rule {rule!r}",
            fix="use 'guarded' (guard band = U) or 'simple' (no guard band)",
        ) from None


# =========================================================================== the mask


_LIMIT_KEYS = ("nf_max_db", "gain_min_db", "gain_max_db", "flatness_db")


class LimitBand(BaseModel):
    """One frequency band (Hz, edges inclusive) and the limits (dB) that apply inside it."""

    model_config = ConfigDict(extra="forbid", allow_inf_nan=False)

    start_hz: float = Field(gt=0)
    stop_hz: float = Field(gt=0)
    nf_max_db: float | None = None
    gain_min_db: float | None = None
    gain_max_db: float | None = None
    flatness_db: float | None = Field(default=None, gt=0)
    name: str | None = Field(default=None, max_length=80)

    @field_validator("stop_hz")
    @classmethod
    def _after_start(cls, stop: float, info: Any) -> float:
        start = info.data.get("start_hz")
        if start is not None and not stop > start:
            raise ValueError(f"must be above start_hz ({format_frequency(start, 12)})")
        return stop

    @field_validator("nf_max_db", "gain_min_db", "gain_max_db")
    @classmethod
    def _plausible(cls, value: float | None, info: Any) -> float | None:
        if value is None:
            return value
        key = "limit_nf_db" if info.field_name == "nf_max_db" else "limit_gain_db"
        check_range(key, info.field_name, value, warn=False)
        warn_unusual(key, f"limits.bands[].{info.field_name}", value)
        return value

    @field_validator("gain_max_db")
    @classmethod
    def _above_min(cls, gmax: float | None, info: Any) -> float | None:
        gmin = info.data.get("gain_min_db")
        if gmax is not None and gmin is not None and gmax < gmin:
            raise ValueError(f"must be >= gain_min_db ({gmin!r} dB)")
        return gmax

    @model_validator(mode="after")
    def _some_limit(self) -> LimitBand:
        if all(getattr(self, k) is None for k in _LIMIT_KEYS):
            raise ValueError("a band needs at least one limit: " + ", ".join(_LIMIT_KEYS))
        return self

    def contains(self, freq_hz: float) -> bool:
        return self.start_hz <= freq_hz <= self.stop_hz


class LimitMask(BaseModel):
    """Limit bands plus the decision rule (the plan's ``[limits]`` section).

    ``require_coverage``: a band that holds no measured point makes the unit indeterminate
    (its limits were never verified). :meth:`from_dict` raises :class:`InputError` naming the
    key (e.g. ``limits.bands[1].stop_hz``); the constructor raises pydantic's ValidationError
    (with the same locations) so that a plan can collect every problem at once.
    """

    model_config = ConfigDict(extra="forbid", allow_inf_nan=False)

    bands: list[LimitBand] = Field(min_length=1)
    decision_rule: DecisionRule = DecisionRule.GUARDED
    require_coverage: bool = True
    nf_type: Literal["ssb", "dsb"] | None = Field(
        default=None,
        description="which noise figure of a frequency-converting DUT the NF limits bound "
        "(single or double sideband: they differ by up to 3 dB); required for a converter, "
        "whose points are judged only against a limit of their own nf_type",
    )

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> LimitMask:
        """Build from a plan table; :class:`InputError` naming the first bad key path."""
        if not isinstance(data, Mapping):
            raise InputError(
                "limits",
                f"must be a table (got {type(data).__name__})",
                fix="write [limits] with [[limits.bands]] entries",
            )
        try:
            return cls.model_validate(dict(data))
        except ValidationError as exc:
            raise input_error_from_validation(exc, "limits") from None

    def limit_lines(self) -> list[dict[str, Any]]:
        """The bands as JSON-able dicts (what plots draw as limit lines)."""
        return [band.model_dump(mode="json", exclude_none=True) for band in self.bands]

    def judge(
        self,
        points: Sequence[PointResult],
        uncertainties: Any = None,
        *,
        rule: DecisionRule | str | None = None,
        coverage_factor: float = DEFAULT_COVERAGE_FACTOR,
    ) -> UnitVerdict:
        """Shortcut for :func:`judge` with this mask."""
        return judge(points, uncertainties, self, rule=rule, coverage_factor=coverage_factor)


# =========================================================================== results


class Check(BaseModel):
    """One comparison: ``quantity`` (``nf_db``/``gain_db``/``flatness_db``) against a limit."""

    model_config = ConfigDict(frozen=True)

    quantity: Literal["nf_db", "gain_db", "flatness_db"]
    kind: Literal["max", "min"]
    limit: float
    value: float | None  # None: the quantity was not measured
    U: float | None
    verdict: Verdict
    band: int
    margin_db: float | None = None  # distance to the limit, positive on the good side
    note: str | None = None

    def to_dict(self) -> dict[str, Any]:
        return {
            "quantity": self.quantity,
            "kind": self.kind,
            "limit": self.limit,
            "value": self.value,
            "U": self.U,
            "verdict": self.verdict.value,
            "band": self.band,
            "margin_db": self.margin_db,
            "note": self.note,
        }


class PointVerdict(BaseModel):
    """The verdict of one frequency point: the worst of its checks."""

    model_config = ConfigDict(frozen=True)

    freq_hz: float
    verdict: Verdict
    nf_db: float
    U_nf_db: float
    nf_interval_db: tuple[float, float]  # the coverage interval the guard band used
    gain_db: float | None = None
    U_gain_db: float | None = None
    limit: float | None = None  # the tightest NF limit that applied (for tables / CSV)
    checks: list[Check] = Field(default_factory=list)

    def to_dict(self) -> dict[str, Any]:
        return {
            "freq_hz": self.freq_hz,
            "verdict": self.verdict.value,
            "limit": self.limit,
            "nf_db": self.nf_db,
            "U_nf_db": self.U_nf_db,
            "nf_interval_db": list(self.nf_interval_db),
            "gain_db": self.gain_db,
            "U_gain_db": self.U_gain_db,
            "checks": [c.to_dict() for c in self.checks],
        }


class BandVerdict(BaseModel):
    """Per band: how many points it judged, the flatness check, and its worst verdict."""

    model_config = ConfigDict(frozen=True)

    band: int
    name: str | None
    start_hz: float
    stop_hz: float
    points: int
    verdict: Verdict
    flatness: Check | None = None

    def to_dict(self) -> dict[str, Any]:
        return {
            "band": self.band,
            "name": self.name,
            "start_hz": self.start_hz,
            "stop_hz": self.stop_hz,
            "points": self.points,
            "verdict": self.verdict.value,
            "flatness": self.flatness.to_dict() if self.flatness else None,
        }


class UnitVerdict(BaseModel):
    """The verdict of the unit under test, with every point, band and limit line."""

    model_config = ConfigDict(frozen=True)

    unit: Verdict
    rule: DecisionRule
    points: list[PointVerdict]
    bands: list[BandVerdict]
    limits: list[dict[str, Any]]
    notes: list[str] = Field(default_factory=list)

    def to_dict(self) -> dict[str, Any]:
        """JSON-able dict in the shape stored in ``RunRecord.verdict``."""
        return {
            "unit": self.unit.value,
            "rule": self.rule.value,
            "points": [p.to_dict() for p in self.points],
            "bands": [b.to_dict() for b in self.bands],
            "limits": list(self.limits),
            "notes": list(self.notes),
        }


# =========================================================================== judging


@dataclass(frozen=True)
class _NfGuard:
    """Expanded uncertainty of one point's NF: half-width U, interval, k, and where from."""

    expanded: float
    low: float
    high: float
    k: float
    statistical_only: bool = False


def _guard_for(point: PointResult, given: Any, k_default: float) -> _NfGuard:
    """The NF guard of one point from a Budget, a budget dict, a number (U, dB) or None."""
    nf = point.nf_db
    if given is None:
        u = k_default * point.u_nf_db
        return _NfGuard(u, nf - u, nf + u, k_default, statistical_only=True)
    if isinstance(given, bool):
        raise InputError(
            "uncertainties",
            f"got a bool for {format_frequency(point.freq_hz)}",
            fix="pass budgets, expanded uncertainties in dB, or None",
        )
    if isinstance(given, (int, float)):
        u = _checked_u(point, float(given))
        return _NfGuard(u, nf - u, nf + u, k_default)
    data = given.to_dict() if hasattr(given, "to_dict") else given
    if not isinstance(data, Mapping) or "U_expanded_db" not in data:
        raise InputError(
            "uncertainties",
            f"entry for {format_frequency(point.freq_hz)} is neither a budget nor a number",
            fix="pass Budget objects or their dicts",
        )
    budget_freq = data.get("freq_hz")
    if isinstance(budget_freq, (int, float)) and not math.isclose(
        budget_freq, point.freq_hz, rel_tol=1e-9
    ):
        raise InputError(
            "uncertainties",
            f"budget at {format_frequency(budget_freq, 9)} given for the point at "
            f"{format_frequency(point.freq_hz, 9)}",
            fix="keep budgets in the points' order",
        )
    u = _checked_u(point, data["U_expanded_db"])
    k = data.get("k")
    k = float(k) if isinstance(k, (int, float)) and k > 0 else k_default
    interval = (data.get("monte_carlo") or {}).get("interval_db")
    if data.get("method") == "monte_carlo" and _is_interval(interval):
        return _NfGuard(u, float(interval[0]), float(interval[1]), k)
    return _NfGuard(u, nf - u, nf + u, k)


def _is_interval(value: Any) -> TypeGuard[Sequence[float]]:
    return (
        isinstance(value, (list, tuple))
        and len(value) == 2
        and all(isinstance(v, (int, float)) and math.isfinite(v) for v in value)
        and value[0] <= value[1]
    )


def _checked_u(point: PointResult, value: Any) -> float:
    if not (isinstance(value, (int, float)) and math.isfinite(value) and value >= 0):
        raise InputError(
            "uncertainties",
            f"expanded uncertainty {value!r} for "
            f"{format_frequency(point.freq_hz)} must be a finite number >= 0 dB",
        )
    return float(value)


def _aligned(points: Sequence[PointResult], uncertainties: Any) -> list[Any]:
    if uncertainties is None:
        return [None] * len(points)
    if isinstance(uncertainties, Mapping):
        return [uncertainties.get(p.freq_hz) for p in points]
    items = list(uncertainties)
    if len(items) != len(points):
        raise InputError(
            "uncertainties",
            f"{len(items)} entries for {len(points)} points",
            fix="give one budget (or U, or None) per point, in the same order",
        )
    return items


def _margin(value: float, limit: float, kind: str) -> float:
    return limit - value if kind == "max" else value - limit


def _point_checks(
    point: PointResult, guard: _NfGuard, u_gain: float | None, mask: LimitMask, rule: DecisionRule
) -> list[Check]:
    checks = []
    for i, band in enumerate(mask.bands):
        if not band.contains(point.freq_hz):
            continue
        if band.nf_max_db is not None:
            unfit = _unfit_nf_type(point, mask)
            checks.append(
                Check(
                    quantity="nf_db",
                    kind="max",
                    limit=band.nf_max_db,
                    value=point.nf_db,
                    U=guard.expanded,
                    band=i,
                    margin_db=_margin(point.nf_db, band.nf_max_db, "max"),
                    verdict=Verdict.INDETERMINATE
                    if unfit
                    else decide_interval(
                        point.nf_db, guard.low, guard.high, band.nf_max_db, "max", rule
                    ),
                    note=unfit,
                )
            )
        gain_limits: tuple[tuple[Literal["max", "min"], float | None], ...] = (
            ("min", band.gain_min_db),
            ("max", band.gain_max_db),
        )
        for kind, limit in gain_limits:
            if limit is not None:
                checks.append(_gain_check(point, u_gain, kind, limit, i, rule))
    return _withhold_pass(point, checks)


def _unfit_nf_type(point: PointResult, mask: LimitMask) -> str | None:
    """Why a converter's NF cannot be judged against this mask (None: it can). Its SSB and
    DSB figures differ by up to 3 dB, so a limit that does not say which it bounds, or bounds
    the other one, decides nothing - PASS and FAIL alike."""
    if point.conversion is None:
        return None  # one response: the SSB and DSB figures are the same number
    held = point.conversion.nf_type
    if mask.nf_type is None:
        return (
            f"the NF limit does not say SSB or DSB; the point holds the {held.upper()} figure "
            f'(set limits.nf_type = "{held}" if that is what the limit bounds)'
        )
    if mask.nf_type != held:
        return (
            f"the NF limit bounds the {mask.nf_type.upper()} figure; the point holds the "
            f'{held.upper()} one (measure with conversion.nf_type = "{mask.nf_type}")'
        )
    return None


def _withhold_pass(point: PointResult, checks: list[Check]) -> list[Check]:
    """A check that would pass becomes INDETERMINATE when the point carries a flag that says
    its number cannot be trusted (``VERDICT_BLOCKING_FLAGS``, the flag policy)."""
    blocking = [f.value for f in point.flags if f in VERDICT_BLOCKING_FLAGS]
    if not blocking:
        return checks
    note = f"pass withheld: the point is flagged {', '.join(blocking)}"
    return [
        c.model_copy(
            update={
                "verdict": Verdict.INDETERMINATE,
                "note": note if c.note is None else f"{c.note}; {note}",
            }
        )
        if c.verdict is Verdict.PASS
        else c
        for c in checks
    ]


def _gain_check(
    point: PointResult,
    u_gain: float | None,
    kind: Literal["max", "min"],
    limit: float,
    band: int,
    rule: DecisionRule,
) -> Check:
    if point.gain_db is None:
        return Check(
            quantity="gain_db",
            kind=kind,
            limit=limit,
            value=None,
            U=None,
            band=band,
            verdict=Verdict.INDETERMINATE,
            note="gain not measured at this point",
        )
    unfit = _unfit_gain(point)
    if unfit is not None:
        return Check(
            quantity="gain_db",
            kind=kind,
            limit=limit,
            value=point.gain_db,
            U=None,
            band=band,
            verdict=Verdict.INDETERMINATE,
            note=unfit,
        )
    u = u_gain if u_gain is not None else 0.0
    return Check(
        quantity="gain_db",
        kind=kind,
        limit=limit,
        value=point.gain_db,
        U=u,
        band=band,
        verdict=decide(point.gain_db, u, limit, kind, rule),
        margin_db=_margin(point.gain_db, limit, kind),
        note=None if u_gain is not None else "gain has no uncertainty",
    )


STATED_GAIN_NOTE = (
    "gain stated ([gain] source = file/constant), not measured: a gain limit cannot be "
    'checked; set [gain] source = "measure" (or use the Y-factor method) or drop the limit'
)


def _unfit_gain(point: PointResult) -> str | None:
    """Why the point's gain cannot be judged against a gain limit (None: it can)."""
    if any(f in GAIN_CHECK_BLOCKING_FLAGS for f in point.flags):
        return STATED_GAIN_NOTE
    return None


def _flatness_check(
    index: int, band: LimitBand, judged: list[tuple[PointResult, float | None]], rule: DecisionRule
) -> Check:
    assert band.flatness_db is not None
    gains = [(p.gain_db, u) for p, u in judged if p.gain_db is not None and _unfit_gain(p) is None]
    if len(gains) < 2:
        stated = any(_unfit_gain(p) is not None for p, _ in judged)
        return Check(
            quantity="flatness_db",
            kind="max",
            limit=band.flatness_db,
            value=None,
            U=None,
            band=index,
            verdict=Verdict.INDETERMINATE,
            note=STATED_GAIN_NOTE
            if stated
            else f"flatness needs >= 2 measured gains in the band (has {len(gains)})",
        )
    high = max(gains, key=lambda g: g[0])
    low = min(gains, key=lambda g: g[0])
    flatness = high[0] - low[0]
    u_flat = math.hypot(high[1] or 0.0, low[1] or 0.0)
    note = None if high[1] is not None and low[1] is not None else "a gain has no uncertainty"
    return Check(
        quantity="flatness_db",
        kind="max",
        limit=band.flatness_db,
        value=flatness,
        U=u_flat,
        band=index,
        verdict=decide(flatness, u_flat, band.flatness_db, "max", rule),
        margin_db=band.flatness_db - flatness,
        note=note,
    )


def judge(
    points: Sequence[PointResult],
    uncertainties: Any,
    mask: LimitMask,
    *,
    rule: DecisionRule | str | None = None,
    coverage_factor: float = DEFAULT_COVERAGE_FACTOR,
) -> UnitVerdict:
    """Judge ``points`` against ``mask``.

    ``uncertainties``: one entry per point (same order) or a mapping freq_hz -> entry; an entry
    is a :class:`~noisebench.science.uncertainty.Budget`, its dict (``U_expanded_db``, ``k``), an
    expanded uncertainty in dB, or None (then ``coverage_factor * u_nf_db``). The gain's
    expanded uncertainty is ``k * u_gain_db`` with the budget's k. ``rule`` overrides the mask's.
    """
    if not isinstance(mask, LimitMask):
        raise InputError(
            "mask",
            f"must be a LimitMask (got {type(mask).__name__})",
            fix="build it with LimitMask.from_dict(plan['limits'])",
        )
    if not (math.isfinite(coverage_factor) and coverage_factor > 0):
        raise InputError("coverage_factor", f"must be > 0 (got {coverage_factor!r})")
    chosen = _rule(rule) if rule is not None else mask.decision_rule
    points = list(points)
    for p in points:
        if not isinstance(p, PointResult):
            raise InputError("points", f"must be PointResult objects (got {type(p).__name__})")
    notes: list[str] = []
    verdicts: list[PointVerdict] = []
    gain_u: dict[int, float | None] = {}
    statistical_only = 0
    for index, (point, given) in enumerate(
        zip(points, _aligned(points, uncertainties), strict=True)
    ):
        guard = _guard_for(point, given, coverage_factor)
        statistical_only += guard.statistical_only
        u_gain = None if point.u_gain_db is None else guard.k * point.u_gain_db
        gain_u[index] = u_gain
        checks = _point_checks(point, guard, u_gain, mask, chosen)
        nf_limits = [c.limit for c in checks if c.quantity == "nf_db"]
        verdicts.append(
            PointVerdict(
                freq_hz=point.freq_hz,
                verdict=_worst([c.verdict for c in checks]),
                nf_db=point.nf_db,
                U_nf_db=guard.expanded,
                nf_interval_db=(guard.low, guard.high),
                gain_db=point.gain_db,
                U_gain_db=u_gain,
                limit=min(nf_limits) if nf_limits else None,
                checks=checks,
            )
        )
    if statistical_only:
        notes.append(
            f"{statistical_only} point(s) without a budget: U = {coverage_factor:g} * "
            "u_nf_db (statistical part only)"
        )
    bands = _band_verdicts(points, gain_u, verdicts, mask, chosen, notes)
    unit = _unit_verdict(verdicts, bands, notes)
    return UnitVerdict(
        unit=unit, rule=chosen, points=verdicts, bands=bands, limits=mask.limit_lines(), notes=notes
    )


def _band_verdicts(
    points: list[PointResult],
    gain_u: dict[int, float | None],
    verdicts: list[PointVerdict],
    mask: LimitMask,
    rule: DecisionRule,
    notes: list[str],
) -> list[BandVerdict]:
    out = []
    for i, band in enumerate(mask.bands):
        members = [j for j, p in enumerate(points) if band.contains(p.freq_hz)]
        flat = None
        if band.flatness_db is not None:
            flat = _flatness_check(i, band, [(points[j], gain_u[j]) for j in members], rule)
        own = [c.verdict for j in members for c in verdicts[j].checks if c.band == i]
        if flat is not None:
            own.append(flat.verdict)
        verdict = _worst(own)
        if not members:
            label = band.name or f"bands[{i}]"
            notes.append(
                f"{label} ({format_frequency_range(band.start_hz, band.stop_hz)}) holds no "
                "measured point"
            )
            verdict = Verdict.INDETERMINATE if mask.require_coverage else Verdict.NOT_JUDGED
        out.append(
            BandVerdict(
                band=i,
                name=band.name,
                start_hz=band.start_hz,
                stop_hz=band.stop_hz,
                points=len(members),
                verdict=verdict,
                flatness=flat,
            )
        )
    return out


def _unit_verdict(
    points: list[PointVerdict], bands: list[BandVerdict], notes: list[str]
) -> Verdict:
    verdict = _worst([p.verdict for p in points] + [b.verdict for b in bands])
    if verdict is Verdict.NOT_JUDGED:
        notes.append("no measured point lies inside any band")
        return Verdict.INDETERMINATE
    return verdict
