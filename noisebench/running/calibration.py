"""Stored calibrations: the analyzer floor (gain method) and the system calibration (Y-factor).

How long to calibrate: a calibration is averaged until its own contribution to the NF of a
*design DUT* is below ``target_ratio x target_u_nf_db``. The design DUT is noiseless
(Te = 0, the worst case for the relative effect of the second stage) with the design gain:
the DUT's known gain for the gain method (file or constant), else ``expect.dut_gain_db``, else
10 dB (the low-gain threshold of the methods: below it points are flagged anyway). The
calibration's contribution falls roughly as 1/G, so a DUT with more gain than the design gain
gets a calibration that is better than needed, never worse.

A calibration is measured once with given analyzer settings and kept with those settings and
its time. It is reused while it is valid: same settings in everything that changes the
analyzer's own noise (RBW and filter shape, VBW, detector, averaging scale, reference level,
attenuation, preamp, sweep mode), every frequency covered, and younger than ``max_age_s``
(on the bench's own clock when it keeps one, see :meth:`CalibrationEntry.age_s`).
Otherwise it is measured again. The store serialises to the dict kept in the run's
``run.json`` so an interrupted run resumes with its calibration.
"""

from __future__ import annotations

import bisect
import math
from collections.abc import Iterable, Sequence
from datetime import datetime, timezone
from enum import Enum
from typing import Any, overload

from pydantic import (
    BaseModel,
    ConfigDict,
    Field,
    SerializerFunctionWrapHandler,
    field_serializer,
    model_validator,
)

from noisebench.bench.acquisition import AcquisitionSettings
from noisebench.errors import InputError, MeasurementError
from noisebench.science.density import NoiseDensity
from noisebench.science.physics import BOLTZMANN_J_PER_K, DB_PER_NEPER_POWER, T0_K, ratio_from_db
from noisebench.units import format_frequency

SETTINGS_THAT_MATTER = (
    "rbw_hz",
    "rbw_filter",
    "vbw_hz",
    "detector",
    "averaging_scale",
    "ref_level_dbm",
    "attenuation_db",
    "preamp",
    "mode",
)
"""Applied settings that change the analyzer's own noise density (centre, span, points and
averages do not)."""

FREQ_REL_TOL = 1e-9


class CalibrationKind(str, Enum):
    FLOOR = "floor"  # analyzer input terminated: the gain method's second-stage reading
    SYSTEM = "system"  # noise source straight into the analyzer: Y-factor second stage


def _now() -> datetime:
    return datetime.now(timezone.utc)


def settings_match(a: AcquisitionSettings, b: AcquisitionSettings) -> bool:
    """True when two applied settings give the same analyzer noise (see SETTINGS_THAT_MATTER)."""
    return all(getattr(a, name) == getattr(b, name) for name in SETTINGS_THAT_MATTER)


class DumpedDensities(Sequence[NoiseDensity]):
    """A calibration's densities kept as their JSON dicts (``model_dump(mode="json")``, one
    settings dict per settings object) and validated back into :class:`NoiseDensity` when
    read: a dict is a third of a model's memory, and :meth:`CalibrationStore.to_dict` hands
    the same dicts to the run store instead of a second copy (a long sweep's calibration is
    held once). The dicts are shared: never change them."""

    def __init__(self, dumped: list[dict[str, Any]]) -> None:
        self.dumped = dumped

    @classmethod
    def of(cls, densities: Sequence[NoiseDensity], shared: dict[int, Any]) -> DumpedDensities:
        if isinstance(densities, DumpedDensities):
            return densities
        return cls([_dumped(d, shared) for d in densities])

    def __len__(self) -> int:
        return len(self.dumped)

    @overload
    def __getitem__(self, index: int) -> NoiseDensity: ...

    @overload
    def __getitem__(self, index: slice) -> list[NoiseDensity]: ...

    def __getitem__(self, index: int | slice) -> NoiseDensity | list[NoiseDensity]:
        if isinstance(index, slice):
            return [NoiseDensity.model_validate(d) for d in self.dumped[index]]
        return NoiseDensity.model_validate(self.dumped[index])

    def __eq__(self, other: object) -> bool:
        if isinstance(other, DumpedDensities):
            return self.dumped == other.dumped
        if not isinstance(other, Sequence) or isinstance(other, (str, bytes)):
            return NotImplemented
        return len(self) == len(other) and all(a == b for a, b in zip(self, other, strict=True))

    __hash__ = None  # type: ignore[assignment]

    def __repr__(self) -> str:
        return f"DumpedDensities({len(self)} densities)"


def _dumped(d: NoiseDensity, shared: dict[int, Any]) -> dict[str, Any]:
    """``d.model_dump(mode="json")`` with the settings dict shared by every density of the
    same settings object (``shared`` maps its id to the dict)."""
    out = d.model_dump(mode="json", exclude={"settings"})
    settings = None
    if d.settings is not None:
        settings = shared.get(id(d.settings))
        if settings is None:
            settings = shared[id(d.settings)] = d.settings.model_dump(mode="json")
    return {k: settings if k == "settings" else out[k] for k in type(d).model_fields}


class CalibrationEntry(BaseModel):
    """One calibration: densities per frequency measured with one set of applied settings.

    ``densities`` maps a reading name to one density per frequency of ``freqs_hz``:
    ``{"floor": [...]}`` or ``{"hot": [...], "cold": [...]}``. Temperatures in K. They are
    kept as :class:`DumpedDensities` (the entry's JSON form, read back one density at a time).
    """

    model_config = ConfigDict(extra="forbid")

    kind: CalibrationKind
    settings: AcquisitionSettings
    freqs_hz: list[float] = Field(min_length=1)
    densities: dict[str, Sequence[NoiseDensity]]
    measured_at: datetime = Field(default_factory=_now)
    measured_at_clock: tuple[str, float] | None = Field(
        default=None,
        description="(clock id, seconds): the bench's instrument clock when measured (a "
        "simulated bench); the id tells this bench's clock from another session's",
    )
    cold_temperature_k: float | None = Field(default=None, gt=0)
    instrument_time_s: float | None = Field(default=None, ge=0)
    stopped_by: str = Field(default="target", description="target, time_limit or max_averages")
    summary: list[dict[str, Any]] = Field(default_factory=list)

    @model_validator(mode="after")
    def _keep_dumped(self) -> CalibrationEntry:
        shared: dict[int, Any] = {}
        self.__dict__["densities"] = {
            name: DumpedDensities.of(ds, shared) for name, ds in self.densities.items()
        }
        return self

    @field_serializer("densities", mode="wrap")
    def _densities_as_lists(self, value: Any, handler: SerializerFunctionWrapHandler) -> Any:
        return handler({name: list(ds) for name, ds in value.items()})

    def index_of(self, freq_hz: float) -> int | None:
        for i, f in enumerate(self.freqs_hz):
            if math.isclose(f, freq_hz, rel_tol=FREQ_REL_TOL):
                return i
        return None

    def covers(self, freqs_hz: Iterable[float]) -> bool:
        return all(self.index_of(f) is not None for f in freqs_hz)

    def reading(self, name: str, freq_hz: float) -> NoiseDensity:
        """The stored density ``name`` at ``freq_hz``."""
        i = self.index_of(freq_hz)
        if i is None or name not in self.densities:
            raise InputError(
                "calibration",
                f"no {name!r} reading at {format_frequency(freq_hz, 9)}",
                fix="calibrate at the frequencies you measure",
            )
        return self.densities[name][i]

    def age_s(self, now: datetime | None = None, clock: tuple[str, float] | None = None) -> float:
        """Age in seconds: the bench's instrument time when both this entry and the caller
        read the same clock (a simulated bench keeps its own time: a run of simulated hours
        ages its calibration by hours, and the decision repeats exactly); else wall time (real
        benches, and a calibration made in another session)."""
        mine = self.measured_at_clock
        if clock is not None and mine is not None and clock[0] == mine[0]:
            return clock[1] - mine[1]
        return ((now or _now()) - self.measured_at).total_seconds()

    def valid_for(
        self,
        kind: CalibrationKind,
        settings: AcquisitionSettings,
        freqs_hz: Iterable[float],
        *,
        max_age_s: float,
        now: datetime | None = None,
        clock: tuple[str, float] | None = None,
    ) -> bool:
        return (
            self.kind is kind
            and settings_match(self.settings, settings)
            and self.covers(freqs_hz)
            and self.age_s(now, clock) <= max_age_s
        )


def _plain_json(value: Any) -> bool:
    """True when ``value`` is already what ``model_dump(mode="json")`` gives for it: plain
    dicts with string keys, lists, strings, booleans, ints and finite floats (no subclasses:
    a numpy float or an enum is dumped as something else)."""
    kind = type(value)
    if kind is float:
        return math.isfinite(value)
    if kind in (str, int, bool) or value is None:
        return True
    if kind is list:
        return all(_plain_json(v) for v in value)
    if kind is dict:
        return all(type(k) is str and _plain_json(v) for k, v in value.items())
    return False


class CalibrationStore:
    """The calibrations of a bench session (shared by runs on the same bench).

    Look-ups go through an index of every entry's frequencies (sorted, searched by bisection):
    only the entries holding the first asked frequency are checked, newest first, so a sweep
    that looks up each of its N groups costs N log N instead of N^2 entry checks. The index is
    rebuilt whenever ``entries`` changed (it is a public list: a resumed run prepends the
    stored calibrations)."""

    def __init__(self, entries: Iterable[CalibrationEntry] = ()) -> None:
        self.entries: list[CalibrationEntry] = list(entries)
        self._index_of: list[int] = []  # id() of each entry when the index was built
        self._freqs: list[float] = []  # every entry's frequencies, sorted
        self._owners: list[int] = []  # position in ``entries`` of each of ``_freqs``

    def _candidates(self, freqs: list[float]) -> list[CalibrationEntry]:
        """Entries holding ``freqs[0]`` (within the match tolerance), newest first; every
        entry when ``freqs`` is empty."""
        if not freqs:
            return list(reversed(self.entries))
        ids = [id(e) for e in self.entries]
        if ids != self._index_of:
            pairs = sorted((f, i) for i, e in enumerate(self.entries) for f in e.freqs_hz)
            self._freqs = [f for f, _ in pairs]
            self._owners = [i for _, i in pairs]
            self._index_of = ids
        f = freqs[0]
        slack = 2 * FREQ_REL_TOL * abs(f)  # wider than math.isclose's: valid_for decides
        lo = bisect.bisect_left(self._freqs, f - slack)
        hi = bisect.bisect_right(self._freqs, f + slack)
        positions = sorted(set(self._owners[lo:hi]), reverse=True)
        return [self.entries[i] for i in positions]

    def find(
        self,
        kind: CalibrationKind,
        settings: AcquisitionSettings,
        freqs_hz: Iterable[float],
        *,
        max_age_s: float,
        clock: tuple[str, float] | None = None,
    ) -> CalibrationEntry | None:
        """The newest valid calibration for these settings and frequencies, or None."""
        freqs = list(freqs_hz)
        for entry in self._candidates(freqs):
            if entry.valid_for(kind, settings, freqs, max_age_s=max_age_s, clock=clock):
                return entry
        return None

    def expired(
        self,
        kind: CalibrationKind,
        settings: AcquisitionSettings,
        freqs_hz: Iterable[float],
        *,
        clock: tuple[str, float] | None = None,
    ) -> CalibrationEntry | None:
        """The newest calibration that would fit but for its age (None: there is none)."""
        freqs = list(freqs_hz)
        for entry in self._candidates(freqs):
            if entry.valid_for(kind, settings, freqs, max_age_s=math.inf, clock=clock):
                return entry
        return None

    def add(self, entry: CalibrationEntry) -> None:
        self.entries.append(entry)

    def to_dict(self) -> dict[str, Any]:
        """JSON-able form (for ``RunWriter.save_calibration``): ``model_dump(mode="json")`` of
        each entry, except that densities sharing one settings object share one settings
        dict (the same JSON; a long sweep's calibration then holds one per group, not one per
        reading), and the densities, frequencies and summary are the entry's own dicts and
        lists (shared: never change them; a frequency or summary that is not plain JSON, e.g.
        a numpy float, is dumped as before)."""
        entries = []
        for e in self.entries:
            out = e.model_dump(mode="json", exclude={"densities"})
            shared: dict[int, Any] = {}
            out["densities"] = {
                n: DumpedDensities.of(ds, shared).dumped for n, ds in e.densities.items()
            }  # the entry's own dicts, not copies (see DumpedDensities)
            for name in ("freqs_hz", "summary"):  # the entry's own lists when already JSON
                own = getattr(e, name)
                if _plain_json(own) and own == out[name]:
                    out[name] = own
            entries.append({k: out[k] for k in type(e).model_fields})
        return {"entries": entries}

    @classmethod
    def from_dict(cls, data: dict[str, Any] | None) -> CalibrationStore:
        """Rebuild from :meth:`to_dict` output (None or foreign dicts give an empty store)."""
        if not data or "entries" not in data:
            return cls()
        return cls(CalibrationEntry.model_validate(e) for e in data["entries"])


# --------------------------------------------------------------------------- sizing


DEFAULT_DESIGN_GAIN_DB = 10.0


def floor_design_u_db(
    floor: NoiseDensity, path_gain_db: float, *, source_temperature_k: float, t0_k: float = T0_K
) -> float:
    """NF uncertainty (dB) that the floor reading alone gives a noiseless DUT of this gain."""
    from noisebench.science.methods.gain import gain_method_point

    ts = source_temperature_k
    analyzer_noise = max(floor.density_w_per_hz - BOLTZMANN_J_PER_K * ts, 0.0)
    dut_density = BOLTZMANN_J_PER_K * ts * float(ratio_from_db(path_gain_db)) + analyzer_noise
    dut = NoiseDensity(freq_hz=floor.freq_hz, density_w_per_hz=dut_density, u_density_w_per_hz=0.0)
    try:
        point = gain_method_point(
            dut, path_gain_db, floor=floor, source_temperature_k=ts, t0_k=t0_k
        )
    except MeasurementError:
        return floor.relative_u * DB_PER_NEPER_POWER
    return point.u_nf_db


def system_design_u_db(
    hot: NoiseDensity,
    cold: NoiseDensity,
    enr_db: float,
    *,
    cold_temperature_k: float,
    design_gain_db: float,
    t0_k: float = T0_K,
) -> float:
    """NF uncertainty (dB) that the system calibration alone gives a noiseless design DUT.

    With the DUT (gain G, Te = 0) the readings scale as ``G Th + Te2`` and ``G Tc + Te2``
    in the units of the calibration readings ``Th + Te2`` and ``Tc + Te2``."""
    from noisebench.science.methods.yfactor import (
        calibrate_point,
        hot_temperature_k,
        y_factor_point,
    )

    tc = cold_temperature_k
    try:
        # the u a weak pair would have, to plan the next round; the significance of the pair
        # is the loop's own stop condition (sequencer_calibration), and is checked again when
        # the calibration is used
        cal = calibrate_point(
            hot, cold, enr_db, cold_temperature_k=tc, t0_k=t0_k, require_significant_y=False
        )
    except MeasurementError:
        return math.inf
    g = float(ratio_from_db(design_gain_db))
    th = float(hot_temperature_k(ratio_from_db(enr_db), tc, t0_k))
    scale = cold.density_w_per_hz / (tc + cal.te_k)
    f = hot.freq_hz
    dut_hot = NoiseDensity(
        freq_hz=f, density_w_per_hz=scale * (g * th + cal.te_k), u_density_w_per_hz=0.0
    )
    dut_cold = NoiseDensity(
        freq_hz=f, density_w_per_hz=scale * (g * tc + cal.te_k), u_density_w_per_hz=0.0
    )
    point = y_factor_point(
        dut_hot,
        dut_cold,
        enr_db,
        cold_temperature_k=tc,
        calibration=cal,
        t0_k=t0_k,
        require_significant_y=False,
    )
    return point.u_nf_db
