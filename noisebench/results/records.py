"""What a run folder holds, as models: the run description (`run.json`) and the whole record
of a run; file names, CSV columns and the meaning of each point flag."""

from __future__ import annotations

import itertools
import logging
import math
from collections.abc import Iterable, Sequence
from datetime import datetime, timezone
from enum import Enum
from pathlib import Path
from typing import Annotated, Any, Literal, TypeVar

from pydantic import (
    BaseModel,
    ConfigDict,
    Field,
    SerializerFunctionWrapHandler,
    ValidationInfo,
    ValidatorFunctionWrapHandler,
    WrapValidator,
    field_serializer,
    field_validator,
)

from noisebench.errors import InputError
from noisebench.science.point import Method, PointFlag, PointResult
from noisebench.units import format_frequency

logger = logging.getLogger(__name__)

RUN_INFO_FILE = "run.json"
JOURNAL_FILE = "points.jsonl"
RESULTS_JSON_FILE = "results.json"
RESULTS_CSV_FILE = "results.csv"
PLOTS_DIR = "plots"
REPORT_FILE = "report.html"

RunStatus = Literal["running", "complete", "interrupted", "failed"]
FINAL_STATUSES: tuple[str, ...] = ("complete", "interrupted", "failed")

#: The fixed CSV columns, in order. Optional columns follow when budgets or a verdict exist.
CSV_COLUMNS: tuple[str, ...] = (
    "freq_hz",
    "nf_db",
    "u_nf_db",
    "te_k",
    "u_te_k",
    "gain_db",
    "u_gain_db",
    "y_db",
    "floor_margin_db",
    "enr_db",
    "averages",
    "instrument_time_s",
    "flags",
    "floor_correction_db",
    "source_temperature_k",
)

CSV_CONVERSION_COLUMNS: tuple[str, ...] = (
    "rf_hz",
    "lo_hz",
    "if_hz",
    "image_hz",
    "sideband",
    "nf_type",
    "nf_ssb_db",
    "nf_dsb_db",
    "image_rejection_db",
    "image_correction_db",
    "gain_source",
    "measured_gain_db",
    "u_measured_gain_db",
)
"""Columns of a frequency-converting DUT's run (``freq_hz`` is then the RF): the frequency plan,
which figure ``nf_db`` holds, both figures and the image correction applied (NF_SSB - NF_DSB);
gain method: where the conversion gain came from and, measured, its value between the THROUGH
planes with its u."""
CSV_BUDGET_COLUMNS: tuple[str, ...] = ("U_nf_db", "coverage_k", "budget_method")
CSV_VERDICT_COLUMNS: tuple[str, ...] = ("verdict", "limit")

#: What each point flag means, in words (for reports and summaries).
FLAG_DESCRIPTIONS: dict[PointFlag, str] = {
    PointFlag.Y_TOO_SMALL: "Y-factor close to 1: the noise figure is very sensitive to jitter; "
    "use a higher-ENR source or more averages.",
    PointFlag.NEAR_ANALYZER_FLOOR: "DUT noise only a few dB above the analyzer's own noise: "
    "the floor correction is large and adds uncertainty.",
    PointFlag.ENR_EXTRAPOLATED: "Frequency outside the ENR table (the point never passes): the "
    "ENR was clamped to the nearest table value.",
    PointFlag.SPURS_EXCLUDED: "Narrowband lines were found in the band and left out of the "
    "noise estimate.",
    PointFlag.TIME_LIMIT: "The time limit was reached before the target uncertainty.",
    PointFlag.EXCESS_SCATTER: "The trace scattered more than noise statistics predict "
    "(drift, interference or an unstable DUT).",
    PointFlag.LOW_GAIN: "Low DUT gain: the second-stage correction is large.",
    PointFlag.COMPRESSION_RISK: "Total noise power is near the analyzer's input limit: "
    "check linearity (e.g. add 3 dB attenuation).",
    PointFlag.NEGATIVE_TE: "The corrected noise temperature came out below zero (within "
    "4 u; further below is refused), which no working DUT does: the point never passes; "
    "check calibration, losses and the DUT supply.",
    PointFlag.DRIFT: "The hot/cold readings drifted in a way the symmetric schedule cannot "
    "cancel (the point never passes): repeat after warm-up or in a stabler setting.",
    PointFlag.GAIN_NOT_MEASURED: "The gain is the stated one (gain file or constant), not "
    "measured on this unit: a gain limit is not judged (indeterminate).",
    PointFlag.CAL_Y_TOO_SMALL: "The system calibration used here had a Y-factor close to 1: "
    "its second-stage correction is noisy; use a higher-ENR source.",
    PointFlag.CAL_TIME_LIMIT: "The calibration used here stopped at its time limit before its "
    "target uncertainty.",
    PointFlag.CAL_EXCESS_SCATTER: "A calibration reading used here scattered more than noise "
    "statistics predict.",
    PointFlag.CAL_SPURS_EXCLUDED: "Narrowband lines were removed from a calibration reading "
    "used here.",
    PointFlag.CAL_NEAR_ANALYZER_FLOOR: "The calibration used here was close to the analyzer floor.",
}


# ----------------------------------------------------------------------------- models


def _utc_now() -> datetime:
    return datetime.now(timezone.utc)


T = TypeVar("T")


class StoredSequence(Sequence[T]):
    """A read-only sequence whose items stay on disk until asked for (a finished run's points
    and budgets, read from its journal: :mod:`noisebench.results.stored`). A
    :class:`RunRecord` keeps one as it is instead of copying it into a list, so a long run's
    record costs a few bytes per point; iterating reads the items one at a time."""

    __hash__ = None  # type: ignore[assignment]

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, Sequence) or isinstance(other, (str, bytes)):
            return NotImplemented
        return len(self) == len(other) and all(a == b for a, b in zip(self, other, strict=True))

    def __copy__(self) -> StoredSequence[T]:
        return self  # read-only: a copy would be the same items

    def __deepcopy__(self, memo: dict[int, Any]) -> StoredSequence[T]:
        return self


def _keep_stored(value: Any, handler: ValidatorFunctionWrapHandler) -> Any:
    """A :class:`StoredSequence` as it is (its items were checked when it was made)."""
    return value if isinstance(value, StoredSequence) else handler(value)


class RunInfo(BaseModel):
    """Everything about a run except the points: identity, provenance, settings, calibration.

    Temperatures in K. ``plan`` is the validated plan as a JSON-able dict; ``identities`` the
    instruments' identification strings by role; ``applied_settings`` the
    ``AcquisitionSettings`` dumps really used (per segment/group); ``calibration`` the latest
    calibration saved (see :attr:`RunRecord.calibrations` for all of them).
    """

    model_config = ConfigDict(extra="forbid")

    run_id: str = Field(min_length=1)
    method: Method
    dut_id: str | None = None
    operator: str | None = None
    station: str | None = None
    plan: dict[str, Any] = Field(default_factory=dict)
    identities: dict[str, str] = Field(default_factory=dict)
    versions: dict[str, str] = Field(default_factory=dict)
    started_at: datetime = Field(default_factory=_utc_now)
    ended_at: datetime | None = None
    status: RunStatus = "running"
    ambient_k: float | None = Field(default=None, gt=0)
    cold_temperature_k: float | None = Field(default=None, gt=0)
    applied_settings: list[dict[str, Any]] = Field(default_factory=list)
    calibration: dict[str, Any] | None = None
    notes: dict[str, Any] = Field(default_factory=dict)
    resumed_at: list[datetime] = Field(default_factory=list)
    format_version: int = 1

    @field_validator("plan", "applied_settings", "calibration", "notes", mode="before")
    @classmethod
    def _plain_json(cls, value: Any, info: ValidationInfo) -> Any:
        """Accept models, numpy values and enums; store plain JSON types."""
        return _jsonable(value, info.field_name or "info")


class RunRecord(BaseModel):
    """A whole run: info, points (sorted by frequency), budgets, verdict.

    ``budgets`` are the uncertainty engineer's dicts (one per frequency, with ``freq_hz``);
    ``verdict`` the limits engineer's dict (``unit``, ``points``, ``limits``).
    ``calibrations`` holds every calibration saved during the run, oldest first.
    ``warnings`` lists what loading had to work around (torn journal line, duplicates, ...).
    The record a run returns reads its ``points`` and ``budgets`` from the journal as they are
    asked for (a :class:`StoredSequence`: a long run's record is not held in memory); one
    loaded from ``results.json`` or built by hand holds lists.
    """

    model_config = ConfigDict(extra="forbid")

    info: RunInfo
    points: Annotated[Sequence[PointResult], WrapValidator(_keep_stored)]
    budgets: Annotated[Sequence[dict[str, Any]], WrapValidator(_keep_stored)] = Field(
        default_factory=list
    )
    verdict: dict[str, Any] | None = None
    calibrations: list[dict[str, Any]] = Field(default_factory=list)
    warnings: list[str] = Field(default_factory=list)

    @field_validator("budgets", "verdict", "calibrations", mode="before")
    @classmethod
    def _plain_json(cls, value: Any, info: ValidationInfo) -> Any:
        """Accept budget/verdict objects (``to_dict``), models and numpy values."""
        if isinstance(value, StoredSequence):
            return value  # plain JSON read from the journal
        return _jsonable(value, info.field_name or "record")

    @field_serializer("points", "budgets", mode="wrap")
    def _stored_as_list(self, value: Any, handler: SerializerFunctionWrapHandler) -> Any:
        """A :class:`StoredSequence` dumps like the list it stands for."""
        return handler(list(value) if isinstance(value, StoredSequence) else value)

    def budgets_by_freq(self) -> dict[float, dict[str, Any]]:
        """The budgets keyed by their ``freq_hz`` (first one wins)."""
        out: dict[float, dict[str, Any]] = {}
        for budget in self.budgets:
            freq = budget.get("freq_hz")
            if freq is not None:  # an entry without a frequency matches no point
                out.setdefault(freq, budget)
        return out

    def verdicts_by_freq(self) -> dict[float, dict[str, Any]]:
        """The per-point verdict entries keyed by ``freq_hz`` (empty without a verdict)."""
        out: dict[float, dict[str, Any]] = {}
        for entry in (self.verdict or {}).get("points") or []:
            if isinstance(entry, dict) and entry.get("freq_hz") is not None:
                out.setdefault(entry["freq_hz"], entry)
        return out

    def budget_at(self, freq_hz: float) -> dict[str, Any] | None:
        """The budget stored for ``freq_hz`` (exact match), or ``None``."""
        return self.budgets_by_freq().get(freq_hz)

    def verdict_at(self, freq_hz: float) -> dict[str, Any] | None:
        """The verdict entry for ``freq_hz`` (exact match), or ``None``."""
        return self.verdicts_by_freq().get(freq_hz)


def _jsonable(value: Any, where: str) -> Any:
    """Plain JSON types from numpy scalars/arrays, enums, paths, datetimes and models.

    Non-finite floats become ``None`` with a warning (JSON has no NaN). Dicts and lists that
    are already plain JSON are returned as they are, not copied (a long run's calibration
    would otherwise be copied at every step); treat the result as shared.
    """
    return _plain(value, (where,))


_SCALARS = (str, int, bool, type(None))


def _where(path: tuple) -> str:
    """``a.b[2].c`` from a path of names (str) and list indices (int)."""
    text = str(path[0])
    for part in path[1:]:
        text += f"[{part}]" if isinstance(part, int) else f".{part}"
    return text


def _plain(value: Any, path: tuple) -> Any:
    """:func:`_jsonable` with the location kept as a path (formatted only for a message)."""
    kind = type(value)
    if kind is float:
        if math.isfinite(value):
            return value
        logger.warning("%s is %r: stored as null (JSON has no NaN/inf)", _where(path), value)
        return None
    if kind in _SCALARS:
        return value
    if kind is dict:  # copied only where something changes: a plain tree is returned as is
        copy: dict[str, Any] | None = None
        for index, (k, v) in enumerate(value.items()):
            key = k if type(k) is str else str(k)
            new = _plain(v, (*path, key))
            if copy is None:
                if new is v and key is k:
                    continue
                copy = {str(kk): vv for kk, vv in itertools.islice(value.items(), index)}
            copy[key] = new
        return value if copy is None else copy
    if kind is list:
        items: list[Any] | None = None
        for index, v in enumerate(value):
            new = _plain(v, (*path, index))
            if items is None:
                if new is v:
                    continue
                items = value[:index]
            items.append(new)
        return value if items is None else items
    if kind is tuple:
        return [_plain(v, (*path, i)) for i, v in enumerate(value)]
    to_dict = getattr(value, "to_dict", None)
    if callable(to_dict):  # e.g. uncertainty budgets and verdicts: their documented shape
        return _plain(to_dict(), path)
    if isinstance(value, BaseModel):
        return _plain(value.model_dump(mode="python"), path)
    if isinstance(value, dict):
        return {str(k): _plain(v, (*path, str(k))) for k, v in value.items()}
    if isinstance(value, (list, tuple, set, frozenset)):
        return [_plain(v, (*path, i)) for i, v in enumerate(value)]
    if isinstance(value, Enum):
        return value.value
    if isinstance(value, (datetime, Path)):
        return value.isoformat() if isinstance(value, datetime) else str(value)
    if hasattr(value, "tolist") and not isinstance(value, (str, bytes)):  # numpy
        return _plain(value.tolist(), path)
    if isinstance(value, bool) or value is None or isinstance(value, (str, int)):
        return value
    if isinstance(value, float):
        if math.isfinite(value):
            return value
        logger.warning("%s is %r: stored as null (JSON has no NaN/inf)", _where(path), value)
        return None
    raise InputError(
        _where(path),
        f"cannot be stored as JSON (type {type(value).__name__})",
        fix="store numbers, strings, lists or dicts",
    )


def _clean_point(point: PointResult) -> PointResult:
    """Refuse non-finite numbers in a point; return a copy with JSON-able notes."""
    if not isinstance(point, PointResult):
        raise InputError("point", f"must be a PointResult (got {type(point).__name__})")
    numbers = {
        name: getattr(point, name)
        for name in (
            "freq_hz",
            "nf_db",
            "te_k",
            "gain_db",
            "y_db",
            "u_nf_db",
            "u_te_k",
            "u_gain_db",
            "floor_margin_db",
            "floor_correction_db",
            "enr_db",
            "source_temperature_k",
            "instrument_time_s",
        )
    }
    numbers.update({f"densities_w_per_hz.{k}": v for k, v in point.densities_w_per_hz.items()})
    for name, value in numbers.items():
        if value is not None and not math.isfinite(value):
            raise InputError(
                f"point.{name}",
                f"is {value!r} at {format_frequency(point.freq_hz, 12)}",
                fix="store only finite results; flag or skip the point instead",
            )
    notes = _jsonable(point.notes, "point.notes")
    return point.model_copy(update={"notes": notes})


def _sorted_points(points: Iterable[PointResult]) -> list[PointResult]:
    return sorted(points, key=lambda p: p.freq_hz)


def _sorted_budgets(budgets: Iterable[dict[str, Any]]) -> list[dict[str, Any]]:
    return sorted(budgets, key=lambda b: b.get("freq_hz", math.inf))
