"""Simulated instrument time.

Every simulated instrument shares one :class:`SimClock`. Acquisitions, settling waits and
retuning advance it by the time a real instrument would take, so the sequencer's timing logic
(time limits, settle times, adaptive averaging) is exercised without waiting in real time.

``real_time_factor`` lets a server front end (the SCPI simulator) also count wall-clock time:
with ``real_time_factor=1`` a client that sleeps 50 ms between commands sees 50 ms pass on the
simulated clock too (e.g. for noise-source settling).
"""

from __future__ import annotations

import threading
import time

from noisebench.errors import InputError


class SimClock:
    """Monotonic simulated time in seconds, starting at ``start_s``."""

    def __init__(self, start_s: float = 0.0, real_time_factor: float = 0.0) -> None:
        if real_time_factor < 0:
            raise InputError(
                "real_time_factor",
                "must be >= 0",
                value=real_time_factor,
                fix="use 0 (pure simulated time) or 1 (also count wall time)",
            )
        self._lock = threading.Lock()
        self._advanced_s = float(start_s)
        self._wall_origin = time.monotonic()
        self.real_time_factor = float(real_time_factor)

    @property
    def now_s(self) -> float:
        """Current simulated time, seconds."""
        with self._lock:
            return self._advanced_s + self._wall_part()

    def _wall_part(self) -> float:
        if self.real_time_factor == 0.0:
            return 0.0
        return (time.monotonic() - self._wall_origin) * self.real_time_factor

    def advance(self, seconds: float) -> float:
        """Let ``seconds`` of instrument time pass; returns the new time, seconds."""
        seconds = float(seconds)
        if not seconds >= 0.0:  # also catches NaN
            raise InputError(
                "seconds", f"must be >= 0 (got {seconds!r})", fix="time only moves forward"
            )
        with self._lock:
            self._advanced_s += seconds
            return self._advanced_s + self._wall_part()

    def __repr__(self) -> str:
        return f"SimClock(now_s={self.now_s:.6f})"
