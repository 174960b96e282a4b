"""A live check of one analyzer against one profile, before a first run (``noisebench probe``).

:func:`probe_analyzer` connects with the profile and, without switching any noise source or
generator on (the analyzer's noise-source drive is only read, never set), checks:

1. identity (``*IDN?``) and the ``init`` sequence;
2. every declared setting the profile can set: a test value is sent AS IS (not rounded by the
   profile), the error queue is read, the value is read back and compared with what the
   profile's quantisation rules and unit predict; enumerations are tried choice by choice;
3. the averaging switch (state found at connect), and the abort command;
4. one averaged trace: binary and ASCII transfer, byte order, values plausible for a terminated
   input (finite, far below 0 dBm) whose scatter matches what the detector/averaging model
   predicts for the applied settings (:mod:`noisebench.science.detection`);
5. the marker, if declared, and the time of one acquisition against the driver's expectation.

Each check gives one :class:`ProbeResult` (``ok``, ``FAIL`` or ``note``) and, for a failure,
the profile line to change. :func:`format_probe` prints them as a table. The probe runs against
the SCPI simulator in the tests (both dialects), which is how it is tested.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from noisebench.bench.acquisition import (
    AcquisitionRequest,
    AveragingScale,
    Detector,
    MarkerKind,
)
from noisebench.errors import InputError, NoisebenchError
from noisebench.units import format_frequency

from .analyzer import ScpiAnalyzer
from .profile import BoolSetting, EnumSetting, InstrumentProfile, IntSetting, load_profile
from .quantize import UNIT_SCALES

__all__ = ["ProbeResult", "format_probe", "probe_analyzer"]

#: scatter of the trace within this factor of the model's prediction counts as plausible
SCATTER_TOLERANCE = 2.0
#: a terminated analyzer input reads far below this (dBm per point)
PLAUSIBLE_MAX_DBM = -20.0
PLAUSIBLE_MIN_DBM = -220.0


@dataclass(frozen=True)
class ProbeResult:
    """One probe check: ``status`` is ``ok``, ``FAIL`` or ``note``; ``fix`` the profile line
    to change (for a failure)."""

    check: str
    status: str
    detail: str
    fix: str = ""


def _rel_close(a: float, b: float, tol: float = 1e-6) -> bool:
    return math.isclose(a, b, rel_tol=tol, abs_tol=1e-9)


def _unit_hint(sent_si: float, got_si: float) -> str:
    """A unit that explains a read-back off by a power of 1000."""
    if got_si == 0 or sent_si == 0:
        return ""
    ratio = got_si / sent_si
    for factor, unit in ((1e-3, "kHz"), (1e-6, "MHz"), (1e-9, "GHz"), (1e3, "ms"), (1e6, "us")):
        if _rel_close(ratio, factor, 1e-3):
            return unit
    return ""


class _Probe:
    def __init__(self, sa: ScpiAnalyzer) -> None:
        self.sa = sa
        self.spec = sa.spec
        self.name = sa.profile.name
        self.results: list[ProbeResult] = []

    def add(self, check: str, status: str, detail: str, fix: str = "") -> None:
        self.results.append(ProbeResult(check, status, detail, fix))

    # -- helpers -------------------------------------------------------------------------
    def _errors(self) -> list[tuple[int, str]]:
        return self.sa._channel.read_error_queue()

    def _send_raw(self, setting: Any, value: Any) -> str:
        """The set command for ``value`` without the profile's rounding (the instrument's own
        rounding is what we want to see)."""
        if isinstance(setting, (EnumSetting, BoolSetting)):
            return setting.command(value)
        number = setting.validate_value(value) if setting.out_of_range == "refuse" else value
        assert setting.set_cmd is not None  # only writable settings are probed
        if isinstance(setting, IntSetting):
            return setting.set_cmd.format(value=int(number))
        return setting.set_cmd.format(value=float(number) / setting.scale)

    # -- checks --------------------------------------------------------------------------
    def averaging_state(self) -> None:
        setting = self.spec.settings.averaging_on
        if setting is None or not setting.readable:
            self.add(
                "averaging on/off",
                "note",
                "no averaging_on setting: the run assumes the instrument always averages",
                "add [analyzer.settings.averaging_on] if it has an averaging switch",
            )
            return
        state = self.sa._channel.get(setting)
        self.add(
            "averaging on/off",
            "ok",
            f"{'ON' if state else 'OFF'} at connect; every configure switches it ON",
        )

    def numeric(self, key: str, value: float, unit: str = "") -> None:
        setting = getattr(self.spec.settings, key)
        if setting is None or not setting.writable:
            return
        section = f"[analyzer.settings.{key}]"
        try:
            command = self._send_raw(setting, value)
            predicted = setting.applied(value)
        except InputError as exc:
            self.add(key, "note", f"test value {value:g} refused by the profile: {exc.message}")
            return
        self.sa._channel.transport.write(command)
        errors = self._errors()
        if errors:
            unit = self._unit_that_works(setting, float(value))
            self.add(
                key,
                "FAIL",
                f"{command!r} gave error {errors[0][0]},{errors[0][1]!r}",
                f'{section} unit = "{unit}"'
                if unit
                else f"{section} set = ... (check the header and number format)",
            )
            return
        if not setting.readable:
            self.add(key, "note", f"{command!r} accepted; no read-back ('get') declared")
            return
        try:
            got = self.sa._channel.get(setting)
        except NoisebenchError as exc:
            self.add(key, "FAIL", f"read-back failed: {exc.message}", f"{section} get = ...")
            return
        if _rel_close(float(got), float(predicted)):
            rounded = "" if _rel_close(float(got), float(value)) else f" (sent {value:g})"
            shown = f"{got:g} {unit}".strip()
            self.add(key, "ok", f"applied {shown}{rounded}, as the profile predicts")
            return
        hint = _unit_hint(float(value), float(got))
        if hint:
            fix = f'{section} unit = "{hint}"'
        elif _rel_close(float(got), float(value)):
            fix = f"{section}: remove the quantisation rule ({setting.describe_rule()})"
        else:
            fix = f'{section} sequence = "..." / allowed = [...] / step = ... (it rounds)'
        self.add(
            key,
            "FAIL",
            f"sent {value:g} {unit}, instrument applied {got:g}, profile predicts {predicted:g}",
            fix,
        )

    def _unit_that_works(self, setting: Any, value_si: float) -> str:
        """The unit in which the instrument accepts ``value_si`` and reads it back, if any."""
        if isinstance(setting, IntSetting) or not setting.readable:
            return ""
        base = {"Hz": "Hz", "kHz": "Hz", "MHz": "Hz", "GHz": "Hz", "s": "s", "ms": "s"}.get(
            setting.unit or "", ""
        )
        candidates = {"Hz": ("kHz", "MHz", "GHz", "Hz"), "s": ("ms", "us", "s")}.get(base, ())
        for unit in candidates:
            if unit == setting.unit:
                continue
            scale = UNIT_SCALES[unit]
            self.sa._channel.transport.write(setting.set_cmd.format(value=value_si / scale))
            if self._errors():
                continue
            raw = self.sa._channel.transport.query(setting.get_cmd)
            try:
                if _rel_close(float(raw.strip()) * scale, value_si, 1e-6):
                    return unit
            except ValueError:
                continue
        return ""

    def choices(self, key: str) -> None:
        setting = getattr(self.spec.settings, key)
        if setting is None or not setting.writable or not isinstance(setting, EnumSetting):
            return
        bad: list[str] = []
        for ours in setting.choices:
            try:
                self.sa._channel.transport.write(setting.command(ours))
                errors = self._errors()
                got = self.sa._channel.get(setting) if setting.readable else ours
            except NoisebenchError as exc:
                bad.append(f"{ours}: {exc.message}")
                continue
            if errors:
                bad.append(f"{ours}: error {errors[0][0]},{errors[0][1]!r}")
            elif got != ours:
                bad.append(f"{ours}: reads back as {got!r}")
        if bad:
            self.add(
                key,
                "FAIL",
                "; ".join(bad),
                f"[analyzer.settings.{key}] choices/replies (token or reply alias)",
            )
        else:
            self.add(key, "ok", f"{', '.join(setting.choices)} set and read back")

    def averages_limit(self) -> None:
        """The profile's ``averages.max`` against the instrument: the maximum is accepted and
        one more is refused (or clamped); above it the run combines several traces."""
        setting = self.spec.settings.averages
        if setting.max is None or setting.set_cmd is None:  # no maximum, or not writable
            self.add("averages max", "note", "no maximum declared: one trace per reading")
            return
        transport = self.sa._channel.transport
        transport.write(setting.set_cmd.format(value=int(setting.max)))
        at_max = self._errors()
        transport.write(setting.set_cmd.format(value=int(setting.max) + 1))
        above = self._errors()
        got = self.sa._channel.get(setting) if setting.readable else None
        section = "[analyzer.settings.averages]"
        if at_max:
            self.add(
                "averages max",
                "FAIL",
                f"{setting.max} refused ({at_max[0][0]},{at_max[0][1]!r})",
                f"{section} max = (lower: the instrument's own maximum)",
            )
        elif not above and got is not None and got > setting.max:
            self.add(
                "averages max",
                "FAIL",
                f"{setting.max + 1} accepted and applied ({got})",
                f"{section} max = (higher: the instrument allows more)",
            )
        else:
            how = "refused" if above else f"clamped to {got}"
            self.add(
                "averages max",
                "ok",
                f"{setting.max} per trace ({setting.max + 1} {how}); more are taken as several "
                "traces",
            )

    def abort(self) -> None:
        abort = self.spec.acquisition.abort
        if abort is None:
            self.add("abort", "note", "not available (abort = false): timeouts wait it out")
            return
        self.sa._channel.transport.write(abort)
        errors = self._errors()
        if errors:
            self.add(
                "abort",
                "FAIL",
                f"{abort!r} gave error {errors[0][0]},{errors[0][1]!r}",
                "[analyzer.acquisition] abort = false (if it has none)",
            )
        else:
            self.add("abort", "ok", f"{abort!r} accepted")

    def trace(self, request: AcquisitionRequest) -> None:
        sa, tr = self.sa, self.spec.trace
        read = self.spec.acquisition.read
        settings = sa.configure(request)
        self.add(
            "configure",
            "ok",
            f"RBW {format_frequency(settings.rbw_hz)}, {settings.points} points, "
            f"{settings.averages} "
            f"averages, {settings.detector.value}, {settings.averaging_scale.value} scale",
        )
        started = time.monotonic()
        try:
            trace = sa.acquire_trace()
        except NoisebenchError as exc:
            if tr.transfer == "binary" and self._other_order_plausible():
                flipped = str(not tr.big_endian).lower()
                self.add(
                    "trace format",
                    "FAIL",
                    f"{exc.message}; read with the other byte order the values are plausible",
                    f"[analyzer.trace] big_endian = {flipped}",
                )
            elif read is not None and read in (
                getattr(exc, "command", None),
                exc.context.get("command"),
            ):
                self.add(
                    "trace",
                    "FAIL",
                    f"{exc.message} (the single read query {read!r})",
                    "[analyzer.acquisition] read = false (if it has no such query)",
                )
            else:
                self.add("trace", "FAIL", exc.message, "[analyzer.trace] query / datatype")
            return
        elapsed = time.monotonic() - started
        if read is not None and sa._fetched_by == read:  # (binary, no status polling)
            self.add("read query", "ok", f"{read!r} started, waited and answered the trace")
        values = np.asarray(trace.values, dtype=float)
        self._plausible(trace, tr)
        expected = sa.expected_acquisition_time_s()
        self.add(
            "timing",
            "ok",
            f"one acquisition took {elapsed:.3g} s wall (driver expects {expected:.3g} s "
            f"instrument time; timeout {sa.acquisition_timeout_s():.3g} s)",
        )
        if tr.transfer == "binary" and tr.ascii_format is not None:
            sa.set_trace_transfer("ascii")
            try:
                again = sa.acquire_trace()
            finally:
                sa.set_trace_transfer("binary")
            level_diff = abs(float(np.mean(again.values)) - float(np.mean(values)))
            self.add(
                "ascii transfer",
                "ok" if level_diff < 1.0 else "FAIL",
                f"mean level {np.mean(again.values):.2f} dBm (binary {np.mean(values):.2f})",
                "" if level_diff < 1.0 else "[analyzer.trace] ascii_format / binary settings",
            )

    def _other_order_plausible(self) -> bool:
        """Read the last trace again with the other byte order: plausible noise values?"""
        tr = self.spec.trace
        try:
            values = self.sa.transport.query_binary(
                tr.query, datatype=tr.datatype, big_endian=not tr.big_endian
            )
        except NoisebenchError:
            return False
        finite = np.all(np.isfinite(values))
        mean = float(np.mean(values, dtype=np.float64))  # float32 blocks: no overflow
        return bool(finite and PLAUSIBLE_MIN_DBM < mean < PLAUSIBLE_MAX_DBM)

    def _plausible(self, trace: Any, tr: Any) -> None:
        from noisebench.science.estimator import estimate_density

        values, settings = np.asarray(trace.values, dtype=float), trace.settings

        order = "big-endian" if tr.big_endian else "little-endian"
        fmt = f"{tr.transfer}" + (f" {order}" if tr.transfer == "binary" else "")
        mean = float(np.mean(values))
        if not (PLAUSIBLE_MIN_DBM < mean < PLAUSIBLE_MAX_DBM and np.all(np.isfinite(values))):
            self.add(
                "trace format",
                "FAIL",
                f"{fmt}: mean {mean:.3g} dBm is not a terminated input's noise level",
                f"[analyzer.trace] big_endian = {str(not tr.big_endian).lower()}"
                if tr.transfer == "binary"
                else "[analyzer.trace] unit / query",
            )
            return
        self.add("trace format", "ok", f"{fmt}, {values.size} points, mean {mean:.1f} dBm")
        try:
            density = estimate_density(trace)
        except NoisebenchError as exc:
            self.add("trace scatter", "note", f"not estimated: {exc.message}")
            return
        ratio = density.scatter_ratio
        if ratio is None:
            self.add("trace scatter", "note", "the model gives no scatter for these settings")
            return
        ok = 1 / SCATTER_TOLERANCE < ratio < SCATTER_TOLERANCE
        self.add(
            "trace scatter",
            "ok" if ok else "FAIL",
            f"scatter {ratio:.2f} x what {settings.averages} averages of the "
            f"{settings.detector.value} detector predict",
            ""
            if ok
            else "[analyzer.settings.averaging_on] / averages / detector_samples (the "
            "instrument does not average as it reports)",
        )

    def marker(self, center_hz: float) -> None:
        marker = self.spec.marker
        if marker is None:
            self.add("marker", "note", "none declared: the trace method is used")
            return
        kind = MarkerKind(marker.kinds[-1])
        try:
            reading = self.sa.read_marker(center_hz, kind)
        except NoisebenchError as exc:
            self.add("marker", "FAIL", f"{kind.value}: {exc.message}", "[analyzer.marker] ...")
            return
        unit = "dBm/Hz" if kind is MarkerKind.NOISE_DENSITY else "dBm"
        plausible = reading.value_db < (-100 if kind is MarkerKind.NOISE_DENSITY else -20)
        self.add(
            "marker",
            "ok" if plausible else "FAIL",
            f"{kind.value} {reading.value_db:.1f} {unit}, corrected="
            f"{reading.instrument_corrected} (offers {', '.join(marker.kinds)})",
            "" if plausible else "[analyzer.marker] value / function tokens",
        )


def _test_request(profile: InstrumentProfile) -> AcquisitionRequest:
    assert profile.analyzer is not None  # the analyzer was opened with this profile
    s = profile.analyzer.settings
    centre_setting = s.center_hz or s.start_hz
    assert centre_setting is not None  # the profile declares center_hz or start_hz
    low = centre_setting.min or 1e6
    high = centre_setting.max or 1e10
    center = min(max(1e9, low * 10), high / 2)
    detectors = set(s.detector.choices) | ({s.detector.fixed} if s.detector.fixed else set())
    detector = Detector.RMS if "rms" in detectors else Detector(sorted(detectors)[0])
    scales = set(s.averaging_scale.choices) | (
        {s.averaging_scale.fixed} if s.averaging_scale.fixed else set()
    )
    scale = AveragingScale.POWER if "power" in scales else AveragingScale(sorted(scales)[0])
    return AcquisitionRequest(
        center_hz=center,
        span_hz=2e6,
        rbw_hz=100e3,
        points=401,
        detector=detector,
        averaging_scale=scale,
        averages=16,
    )


def probe_analyzer(
    resource: str,
    profile: str | Path | InstrumentProfile = "generic",
    *,
    timeout_s: float = 5.0,
    visa_library: str = "@py",
) -> list[ProbeResult]:
    """Connect to the analyzer at ``resource`` with ``profile`` and check it (module doc)."""
    from . import open_analyzer

    loaded = load_profile(profile)
    try:
        sa = open_analyzer(
            resource, loaded, timeout_s=timeout_s, visa_library=visa_library, retries=0
        )
    except NoisebenchError as exc:
        return [
            ProbeResult(
                "connect",
                "FAIL",
                exc.message,
                "[connection] terminations / timeout_s, [common] identify",
            )
        ]
    probe = _Probe(sa)
    try:
        probe.add("identity", "ok", sa.identity)
        if sa.spec.init:
            probe.add("init", "ok", f"{len(sa.spec.init)} command(s) accepted: {sa.spec.init}")
        if sa.spec.noise_drive is not None and sa.spec.noise_drive.readable:
            on = sa.read_noise_drive()
            probe.add("noise drive", "note", f"{'ON' if on else 'off'} (read only, not switched)")
        request = _test_request(loaded)
        probe.averaging_state()
        probe.numeric("center_hz", request.center_hz, "Hz")
        probe.numeric("span_hz", 2.2e6, "Hz")
        probe.numeric("rbw_hz", 200e3, "Hz")
        probe.numeric("vbw_hz", 200e3, "Hz")
        probe.numeric("points", 401)
        probe.numeric("averages", 7)
        probe.numeric("ref_level_dbm", -20.0, "dBm")
        probe.numeric("attenuation_db", 10.0, "dB")
        for key in ("detector", "averaging_scale", "mode"):
            probe.choices(key)
        probe.averages_limit()
        probe.abort()
        probe.trace(request)
        probe.marker(request.center_hz)
        leftover = probe._errors()
        if leftover:
            probe.add("error queue", "FAIL", f"left: {leftover}")
    except NoisebenchError as exc:
        probe.add("probe", "FAIL", f"stopped: {exc.message}")
    finally:
        sa.close()
    return probe.results


def format_probe(results: list[ProbeResult], *, resource: str = "", profile: str = "") -> str:
    """The probe results as a table, then the profile lines to change."""
    head = f"probe of {resource} with profile {profile}" if resource else "probe"
    width = max([len(r.check) for r in results] + [5])
    lines = [head, f"{'check':<{width}}  result  detail"]
    for r in results:
        lines.append(f"{r.check:<{width}}  {r.status:<6}  {r.detail}")
    fixes = [r for r in results if r.status == "FAIL" and r.fix]
    if fixes:
        lines.append("to change in the profile:")
        lines += [f"  {r.check}: {r.fix}" for r in fixes]
    failed = sum(r.status == "FAIL" for r in results)
    lines.append(
        f"{len(results)} checks, {failed} failed" if failed else f"{len(results)} checks, all ok"
    )
    return "\n".join(lines)
