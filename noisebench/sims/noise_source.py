"""The simulated noise source and the DC supply that can drive it.

The source is hot while its drive voltage lies inside the rated window; the drive comes from the
analyzer's noise-drive output (nominal voltage) or from the DC supply (whatever the supply really
delivers, current limit included). A change of drive starts a linear transition of
``transition_time_s`` on the simulated clock: a trace taken before it completes sees a source
between cold and hot. ``set_hot`` (the :class:`noisebench.bench.instruments.NoiseSource` interface)
switches the analyzer drive and then waits ``settle_time_s`` of simulated time when the drive or
the state changed (a safe state commanding a cold source cold waits nothing).

A drive above ``max_drive_v`` damages the simulated diode: it stays cold from then on (logged).
``stuck = True`` makes the source ignore every drive change (a fault switch for tests).
"""

from __future__ import annotations

import logging
import threading
from collections.abc import Callable

import numpy as np

from noisebench.bench.instruments import Instrument, NoiseSource
from noisebench.errors import InputError
from noisebench.sims.clock import SimClock
from noisebench.sims.models import NoiseSourceModel
from noisebench.sims.scenario import NoiseSourceSpec, SupplySpec

logger = logging.getLogger(__name__)

ANALYZER_DRIVE = "analyzer"
SUPPLY_DRIVE = "supply"


class SimNoiseSource(NoiseSource):
    """A diode noise source whose hot/cold state is a function of simulated time."""

    def __init__(self, spec: NoiseSourceSpec, model: NoiseSourceModel, clock: SimClock) -> None:
        super().__init__()
        self.spec = spec
        self.model = model
        self.clock = clock
        self.stuck = bool(spec.stuck)
        self.damaged = False
        # switches the drive (the bench's analyzer); set by the bench
        self.drive_switch: Callable[[bool], None] | None = None
        self._drives: dict[str, float] = {ANALYZER_DRIVE: 0.0, SUPPLY_DRIVE: 0.0}
        self._settle_s = float(spec.settle_time_s)
        self._state_lock = threading.Lock()
        self._from = 0.0  # hot fraction when the last transition started
        self._target = 0.0
        self._t_switch = -np.inf

    # ------------------------------------------------------------ NoiseSource ----------------

    @property
    def identity(self) -> str:
        return f"noisebench,simulated noise source,{self.spec.serial},0.1"

    def set_hot(self, hot: bool) -> None:
        """Drive on (hot) or off (cold) through the analyzer drive, then wait the settle time
        when the drive or the state changed (commanding the state the source is already in, as
        a safe state does, starts no transition and waits nothing)."""
        with self.lock:
            before = (self._drives[ANALYZER_DRIVE], self._target)
            if self.drive_switch is not None:
                self.drive_switch(bool(hot))
            else:
                self.set_drive(ANALYZER_DRIVE, self.spec.nominal_drive_v if hot else 0.0)
            if (self._drives[ANALYZER_DRIVE], self._target) != before:
                self.clock.advance(self._settle_s)

    @property
    def is_hot(self) -> bool:
        """True while the drive is on and valid (the commanded state, not the transition)."""
        return self._target == 1.0

    @property
    def settle_time_s(self) -> float:
        return self._settle_s

    @settle_time_s.setter
    def settle_time_s(self, value: float) -> None:
        if not value >= 0:
            raise InputError("settle_time_s", "must be >= 0", value=value)
        self._settle_s = float(value)

    @property
    def cold_temperature_k(self) -> float:
        """Physical temperature of the source (its cold noise temperature), K."""
        return self.model.physical_temperature_k

    def close(self) -> None:
        """Drive off (all drive inputs). Idempotent."""
        with self.lock:
            for name in list(self._drives):
                self.set_drive(name, 0.0)

    # ------------------------------------------------------------ drive and state -----------

    @property
    def drive_v(self) -> float:
        """Voltage across the drive input, V (the larger of the drive inputs)."""
        return max(self._drives.values())

    def set_drive(self, name: str, volts: float) -> None:
        """Set one drive input (``"analyzer"`` or ``"supply"``) to ``volts``; update the state."""
        if name not in self._drives:
            raise InputError(
                "drive", f"unknown drive input {name!r}", fix=f"use one of {sorted(self._drives)}"
            )
        with self._state_lock:
            self._drives[name] = float(volts)
            v = self.drive_v
            if v > self.spec.max_drive_v and not self.damaged:
                self.damaged = True
                logger.error(
                    "noise source %s driven at %.2f V, above its %.1f V maximum: damaged",
                    self.spec.serial,
                    v,
                    self.spec.max_drive_v,
                )
            lo, hi = self.spec.drive_window_v
            target = 1.0 if (lo <= v <= hi and not self.damaged) else 0.0
            if self.stuck or target == self._target:
                return
            now = self.clock.now_s
            self._from = float(self._fraction(np.asarray(now)))
            self._target = target
            self._t_switch = now

    def _fraction(self, t_s: np.ndarray) -> np.ndarray:
        tt = self.spec.transition_time_s
        if tt <= 0:
            return np.where(t_s >= self._t_switch, self._target, self._from)
        ramp = np.clip((t_s - self._t_switch) / tt, 0.0, 1.0)
        return self._from + (self._target - self._from) * ramp

    def hot_fraction(self, t_s: np.ndarray | float) -> np.ndarray:
        """State between cold (0) and hot (1) at simulated times ``t_s``, times the output
        drift (the excess noise is linear in this fraction)."""
        t = np.asarray(t_s, dtype=float)
        with self._state_lock:
            return self._fraction(t) * self._output_drift(t)

    def steady_hot_fraction(self, t_start_s: float, t_stop_s: float) -> float | None:
        """The state if no transition overlaps [t_start_s, t_stop_s], else None (with the
        output drift at the middle of the interval)."""
        with self._state_lock:
            if t_start_s >= self._t_switch + self.spec.transition_time_s:
                return self._target * float(self._output_drift(0.5 * (t_start_s + t_stop_s)))
            return None

    def _output_drift(self, t_s: np.ndarray | float) -> np.ndarray:
        """Factor on the excess noise output at simulated times ``t_s`` (1: no drift)."""
        t = np.asarray(t_s, dtype=float)
        db = self.spec.output_drift_db_per_s * t + self.spec.output_drift_db_per_s2 * t**2
        return 10.0 ** (db / 10.0)


class SimSupply(Instrument):
    """A DC supply (voltage, current limit, output) whose load is the noise source's drive.

    The drive input behaves as a resistor of ``drive_load_ohm``; when it would draw more than
    the current limit the supply holds the limit and the voltage collapses (constant current).
    """

    def __init__(self, spec: SupplySpec, source: SimNoiseSource) -> None:
        super().__init__()
        self.spec = spec
        self.source = source
        self._set_v = 0.0
        self._limit_a = 0.1
        self._on = False

    @property
    def identity(self) -> str:
        return self.spec.identity

    def set_voltage(self, volts: float) -> None:
        """Programmed output voltage, V."""
        volts = float(volts)
        if not 0.0 <= volts <= self.spec.max_voltage_v:
            raise InputError(
                "supply.voltage_v",
                f"{volts!r} V is outside 0..{self.spec.max_voltage_v} V",
                value=volts,
            )
        with self.lock:
            self._set_v = volts
            self._update()

    def set_current_limit(self, amps: float) -> None:
        """Current limit, A."""
        amps = float(amps)
        if not 0.0 < amps <= self.spec.max_current_a:
            raise InputError(
                "supply.current_limit_a",
                f"{amps!r} A is outside 0..{self.spec.max_current_a} A",
                value=amps,
            )
        with self.lock:
            self._limit_a = amps
            self._update()

    def set_output(self, on: bool) -> None:
        with self.lock:
            self._on = bool(on)
            self._update()

    @property
    def output_on(self) -> bool:
        return self._on

    @property
    def voltage_setting_v(self) -> float:
        return self._set_v

    @property
    def current_limit_a(self) -> float:
        return self._limit_a

    def measure_voltage(self) -> float:
        """Voltage at the output terminals, V."""
        if not self._on:
            return 0.0
        r = self.source.spec.drive_load_ohm
        return min(self._set_v, self._limit_a * r)

    def measure_current(self) -> float:
        """Output current, A."""
        return self.measure_voltage() / self.source.spec.drive_load_ohm

    def _update(self) -> None:
        self.source.set_drive("supply", self.measure_voltage())

    def close(self) -> None:
        """Output off (safe state). Idempotent."""
        self.set_output(False)
