"""A second simulated analyzer dialect, ``compact``: same bench, other commands and habits.

It exists to prove that a profile, not code, adapts noisebench to an analyzer it has never seen
(``noisebench/drivers/profiles/sim_compact.toml`` describes it). Our own spellings, chosen to
differ from the generic dialect (``SCPI.md``) in every trait a real instrument tends to have:

=========================  ==================================================================
trait                      compact dialect
=========================  ==================================================================
frequencies                ``TUNing:CENTre`` / ``TUNing:SPAN`` in MHz (plain numbers)
resolution bandwidth       ``FILTer:RESolution`` Hz, rounded to 1-3-10 (nearest on a log scale),
                           10 Hz .. 3 MHz; ``FILTer:VIDeo[:AUTO]``; Gaussian filter only
trace points               ``TRACe:LENGth``, clamped to 11 .. 20001 (no error)
detector                   ``TRACe:DETector POINt|POWer``; replies ``PNT`` / ``PWR``;
                           ``TRACe:DETector:COUNt?`` samples per point
averaging                  ``TRACe:MEAN[:STATe]`` (OFF at power-on: one sweep per trace),
                           ``TRACe:MEAN:COUNt`` 1 .. 10 000, ``TRACe:MEAN:SCALe
                           POWer|LOGarithmic|VOLTage``
reference level            ``LEVel:REFerence`` dBm; no attenuator or preamplifier commands
acquisition                ``ACQuire:SINGle`` (overlapped), ``ACQuire:CONTinuous``; no abort
trace transfer             ``TRACe:VALues?``; ``TRACe:ENCoding BINary|TEXT``; binary is
                           REAL,32 big-endian, with no byte-order command
marker                     ``MARKer:POSition`` MHz; ``MARKer:NOISe ON|OFF`` (a switch, density
                           in dBm/Hz when ON); ``MARKer:LEVel?``; no band-power marker
=========================  ==================================================================

``*IDN?``, ``*OPC?``, ``*CLS``, ``SYSTem:ERRor?``, ``OUTPut:NOISe`` (noise-source drive) and
``SIMulate:PATH`` are as in the generic dialect. The RBW rounding is written here on its own
(not with the profile's quantisation code) so that a mistake in one cannot hide in the other.
"""

from __future__ import annotations

import math
from typing import Any

from noisebench.bench.acquisition import AveragingScale, Detector, FilterKind

from .analyzer import REF_LEVEL_RANGE_DBM
from .scpi_analyzer import MAX_FREQ_HZ, AnalyzerScpi, DataFormat, MarkerFunction
from .scpi_instruments import Call
from .scpi_parser import ScpiError, format_number, match_choice, parse_integer

__all__ = ["CompactAnalyzerScpi", "round_1_3_10"]

MAX_AVERAGES = 10_000
MIN_POINTS, MAX_POINTS = 11, 20_001
RBW_RANGE_HZ = (10.0, 3e6)
_DETECTORS = {"POINt": Detector.SAMPLE, "POWer": Detector.RMS}
_DETECTOR_REPLIES = {Detector.SAMPLE: "PNT", Detector.RMS: "PWR"}
_SCALES = {
    "POWer": AveragingScale.POWER,
    "LOGarithmic": AveragingScale.LOG_POWER,
    "VOLTage": AveragingScale.VOLTAGE,
}


def round_1_3_10(value_hz: float) -> float:
    """Nearest of 1, 3 x 10^k on a log scale (ties go up), within the RBW range."""
    lo, hi = RBW_RANGE_HZ
    v = min(max(float(value_hz), lo), hi)
    decade = 10.0 ** math.floor(math.log10(v))
    best = min((1.0, 3.0, 10.0), key=lambda m: (abs(math.log(v / (m * decade))), -m))
    return float(f"{best * decade:.6g}")


class CompactAnalyzerScpi(AnalyzerScpi):
    """The simulated analyzer speaking the compact dialect (see module doc)."""

    def __init__(self, *args: Any, **kwargs: Any) -> None:
        self.averaging_on = False
        self.mean_count = 1
        super().__init__(*args, **kwargs)

    # ------------------------------------------------------------------ state
    def reset(self) -> None:
        super().reset()
        setter = getattr(self.analyzer, "set_filter_shape", None)
        if setter is not None and self._settings().rbw_filter.kind is not FilterKind.GAUSSIAN:
            setter(FilterKind.GAUSSIAN, None)
        self.averaging_on = False
        self.mean_count = 1
        self._configure(rbw_hz=round_1_3_10(self._settings().rbw_hz))

    def _configure(self, **changes: Any) -> None:
        if "averages" in changes:
            self.mean_count = int(changes["averages"])
        changes["averages"] = self.mean_count if self.averaging_on else 1
        super()._configure(**changes)

    def _set_averaging(self, on: bool) -> None:
        self.averaging_on = bool(on)
        self._configure()

    def _set_points(self, call: Call) -> None:
        value = parse_integer(call.one())
        if not isinstance(value, int):
            raise ScpiError(-224, "TRACe:LENGth takes a number")
        self._configure(points=min(max(value, MIN_POINTS), MAX_POINTS))

    def _set_detector(self, call: Call) -> None:
        self._configure(detector=match_choice(call.one(), _DETECTORS))

    def _get_detector(self, call: Call) -> str:
        call.none()
        detector = self._settings().detector
        if detector not in _DETECTOR_REPLIES:  # a power-on default this dialect cannot name
            return "PWR"
        return _DETECTOR_REPLIES[detector]

    def _set_encoding(self, call: Call) -> None:
        kind = match_choice(call.one(), {"BINary": "BIN", "TEXT": "TEXT"})
        self.data_format = DataFormat.REAL32 if kind == "BIN" else DataFormat.ASCII

    def _get_encoding(self, call: Call) -> str:
        call.none()
        return "TEXT" if self.data_format is DataFormat.ASCII else "BIN"

    def _marker_level(self) -> str:
        return self._get_marker_y(Call("MARKer:LEVel", (), (1,), True))

    # ------------------------------------------------------------------ command table
    def _add_commands(self) -> None:
        s = self._settings
        f_lo, f_hi = self._spec("min_freq_hz", 1.0), self._spec("max_freq_hz", MAX_FREQ_HZ)
        self.add_numeric(
            "TUNing:CENTre",
            unit=None,
            low=f_lo / 1e6,
            high=f_hi / 1e6,
            default=1000.0,
            get=lambda: s().center_hz / 1e6,
            put=lambda v: self._configure(center_hz=v * 1e6),
        )
        self.add_numeric(
            "TUNing:SPAN",
            unit=None,
            low=0.0,
            high=(f_hi - f_lo) / 1e6,
            default=10.0,
            get=lambda: s().span_hz / 1e6,
            put=lambda v: self._configure(span_hz=v * 1e6),
        )
        self.add_numeric(
            "FILTer:RESolution",
            unit="HZ",
            low=RBW_RANGE_HZ[0],
            high=RBW_RANGE_HZ[1],
            default=1e6,
            get=lambda: s().rbw_hz,
            put=lambda v: self._configure(rbw_hz=round_1_3_10(v)),
        )
        self.add_numeric(
            "FILTer:VIDeo",
            unit="HZ",
            low=1.0,
            high=10.0 * RBW_RANGE_HZ[1],
            default=1e6,
            get=self._vbw,
            put=lambda v: self._configure(vbw_hz=v),
        )
        self.add_bool(
            "FILTer:VIDeo:AUTO",
            get=lambda: self.request.vbw_hz is None,
            put=lambda on: self._configure(vbw_hz=None if on else self._vbw()),
        )
        self.add("TRACe:LENGth", self._set_points, lambda call: format_number(s().points))
        self.add("TRACe:DETector", self._set_detector, self._get_detector)
        self.add_query("TRACe:DETector:COUNt", lambda: format_number(s().detector_samples or 1.0))
        self.add_bool("TRACe:MEAN[:STATe]", get=lambda: self.averaging_on, put=self._set_averaging)
        self.add_numeric(
            "TRACe:MEAN:COUNt",
            unit=None,
            low=1,
            high=MAX_AVERAGES,
            default=1,
            integer=True,
            get=lambda: self.mean_count,
            put=lambda v: self._configure(averages=int(v)),
        )
        self.add_choice(
            "TRACe:MEAN:SCALe",
            _SCALES,
            get=lambda: s().averaging_scale,
            put=lambda v: self._configure(averaging_scale=v),
        )
        self.add_numeric(
            "LEVel:REFerence",
            unit="DBM",
            low=REF_LEVEL_RANGE_DBM[0],
            high=REF_LEVEL_RANGE_DBM[1],
            default=0.0,
            get=lambda: s().ref_level_dbm or 0.0,
            put=lambda v: self._configure(ref_level_dbm=v),
        )
        self.add_bool("ACQuire:CONTinuous", get=lambda: self.continuous, put=self._set_continuous)
        self.add_event("ACQuire:SINGle", self._initiate)
        self.add_query(
            "STATus:OPERation:CONDition",
            lambda: str(16 if self.operation_pending() else 0),
        )
        self.add("TRACe:ENCoding", self._set_encoding, self._get_encoding)
        self.add("TRACe:VALues", None, self._trace_data)
        self.add_numeric(
            "MARKer:POSition",
            unit=None,
            low=1e-6,
            high=MAX_FREQ_HZ / 1e6,
            default=1000.0,
            get=lambda: self._marker_x(self.markers[1]) / 1e6,
            put=lambda v: setattr(self.markers[1], "x_hz", v * 1e6),
        )
        self.add_bool(
            "MARKer:NOISe[:STATe]",
            get=lambda: self.markers[1].function is MarkerFunction.NOISE,
            put=lambda on: setattr(
                self.markers[1], "function", MarkerFunction.NOISE if on else MarkerFunction.OFF
            ),
        )
        self.add_query("MARKer:LEVel", self._marker_level)
        self.add_bool(
            "OUTPut:NOISe[:STATe]", get=lambda: self.noise_drive, put=self._set_noise_drive
        )
        self.add("SIMulate:PATH", self._set_path, self._get_path)
