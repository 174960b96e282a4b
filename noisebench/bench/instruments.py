"""The abstract bench: what the sequencer needs from an analyzer, a noise source, a generator.

Concrete back ends live in ``noisebench.drivers`` (SCPI over pyvisa) and in the simulated
bench's package. The core never imports either; :mod:`noisebench.bench.registry` picks one
by address.
"""

from __future__ import annotations

import threading
from abc import ABC, abstractmethod
from dataclasses import dataclass, field

from noisebench.bench.acquisition import (
    AcquisitionRequest,
    AcquisitionSettings,
    MarkerKind,
    MarkerReading,
    Trace,
)


class Instrument(ABC):
    """Anything on the bench. Owns a lock; ``close`` must leave it in a safe state."""

    def __init__(self) -> None:
        self.lock = threading.RLock()

    @property
    @abstractmethod
    def identity(self) -> str:
        """Identification string (``*IDN?`` reply or a simulator's equivalent)."""

    @abstractmethod
    def close(self) -> None:
        """Put the instrument in its safe state and release the connection. Idempotent."""

    def __enter__(self):
        return self

    def __exit__(self, *exc) -> None:
        self.close()


class Analyzer(Instrument):
    """A spectrum analyzer that acquires averaged noise traces and marker readings."""

    @abstractmethod
    def configure(self, request: AcquisitionRequest) -> AcquisitionSettings:
        """Apply ``request`` and return the settings the instrument really applied."""

    @property
    @abstractmethod
    def settings(self) -> AcquisitionSettings | None:
        """The settings last applied (``None`` before the first ``configure``)."""

    @abstractmethod
    def acquire_trace(self) -> Trace:
        """Run one complete (averaged) acquisition with the applied settings; return the trace."""

    @abstractmethod
    def read_marker(
        self, freq_hz: float, kind: MarkerKind, band_hz: float | None = None
    ) -> MarkerReading:
        """Acquire and read a marker at ``freq_hz`` (band power over ``band_hz``, or density)."""

    @abstractmethod
    def expected_acquisition_time_s(self) -> float:
        """Instrument time one ``acquire_trace`` takes with the applied settings, seconds."""

    @property
    def max_input_power_dbm(self) -> float | None:
        """Rated maximum total RF input power, dBm, when known (None: unknown)."""
        return None

    @property
    def max_averages_per_trace(self) -> int | None:
        """Most trace averages one acquisition can do (None: no known limit). Above it the
        sequencer takes several traces and combines them
        (:func:`noisebench.science.trace_combine.combine_traces`)."""
        return None

    @property
    def full_scale_dbm(self) -> float | None:
        """Highest input power read without clipping (a sampled receiver's converter full
        scale for a tone), dBm; None when the instrument has no such hard limit or it is not
        known."""
        return None

    @property
    def level_uncertainty_db(self) -> float | None:
        """Standard uncertainty of absolute levels when the instrument knows it (a sampled
        receiver's scale calibration), dB; None: not known here (the plan's
        ``uncertainty.absolute_amplitude_db`` applies)."""
        return None

    @property
    def absolute_level(self) -> bool:
        """True when trace levels are absolute densities at the input (W/Hz). A sampled receiver
        without a scale calibration reads ratios only: enough for the Y-factor method, refused
        by the gain method."""
        return True

    @property
    def replays_recordings(self) -> bool:
        """True when the data were recorded earlier (nothing is switched live, so the
        pre-switch power checks do not apply)."""
        return False

    def run_notes(self) -> dict:
        """What the instrument wants recorded with the run (shown under the report's notes)."""
        return {}

    def predict(self, request: AcquisitionRequest) -> AcquisitionRequest:
        """``request`` as the instrument will apply it (RBW rounded, points clamped, ...), without
        touching the instrument. The default assumes it applies what it is asked."""
        return request

    def begin_step(self) -> None:
        """A step of several acquisitions starts: the sequencer holds their traces and accepts
        them only after :meth:`end_step` returned. An instrument that checks for errors once
        per step (a SCPI profile's ``error_batch``) may leave the check to the step's end;
        the default checks every acquisition itself and needs nothing here."""

    def end_step(self, *, check: bool = True) -> None:
        """The step ends: with ``check``, confirm that nothing sent for its acquisitions failed
        (raises :class:`~noisebench.errors.InstrumentError` naming the command, or
        :class:`~noisebench.errors.UnverifiedStep` when the check was lost to a reconnect);
        ``check=False`` abandons the step (its traces are discarded). Default: nothing to do."""


class NoiseSource(Instrument):
    """A switchable noise source (hot = drive on, cold = drive off)."""

    @abstractmethod
    def set_hot(self, hot: bool) -> None:
        """Switch the drive on (hot) or off (cold) and wait ``settle_time_s``."""

    @property
    @abstractmethod
    def is_hot(self) -> bool:
        """True while the drive is on."""

    @property
    @abstractmethod
    def settle_time_s(self) -> float:
        """Time allowed after each switch before measuring, seconds."""

    @property
    def cold_temperature_k(self) -> float | None:
        """Physical temperature of the source when it is read from the bench (None: unknown)."""
        return None


class Generator(Instrument):
    """A CW signal generator for gain measurements."""

    @abstractmethod
    def set_cw(self, freq_hz: float, level_dbm: float) -> None:
        """Set the CW frequency (Hz) and level (dBm)."""

    @abstractmethod
    def set_output(self, on: bool) -> None:
        """Switch the RF output on or off."""

    @property
    @abstractmethod
    def output_on(self) -> bool:
        """True while the RF output is on."""


@dataclass
class Bench:
    """The instruments of one measurement. ``ambient_k`` is the room / termination temperature."""

    analyzer: Analyzer
    noise_source: NoiseSource | None = None
    generator: Generator | None = None
    ambient_k: float | None = None
    extras: dict = field(default_factory=dict)
    lo_generator: Generator | None = None  # the LO of a frequency-converting DUT

    def identities(self) -> dict[str, str]:
        out = {"analyzer": self.analyzer.identity}
        if self.noise_source is not None:
            out["noise_source"] = self.noise_source.identity
        if self.generator is not None:
            out["generator"] = self.generator.identity
        if self.lo_generator is not None:
            out["lo_generator"] = self.lo_generator.identity
        return out

    def safe_state(self) -> None:
        """Noise source off, generator and LO outputs off. Never raises."""
        source, generator, lo = self.noise_source, self.generator, self.lo_generator
        for action in (
            (lambda: source.set_hot(False)) if source else None,
            (lambda: generator.set_output(False)) if generator else None,
            (lambda: lo.set_output(False)) if lo else None,
        ):
            if action is None:
                continue
            try:
                action()
            except Exception:  # noqa: BLE001 - safe state is best effort
                pass

    def close(self) -> None:
        self.safe_state()
        for inst in (self.noise_source, self.generator, self.lo_generator, self.analyzer):
            if inst is not None:
                try:
                    inst.close()
                except Exception:  # noqa: BLE001
                    pass
