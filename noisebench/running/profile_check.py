"""The plan checked against the analyzer's profile before any instrument is touched.

Every setting a plan asks for (per segment: detector, averaging scale, sweep mode, RBW, VBW,
span, trace points, sweep time, attenuation, preamplifier, reference level, the point
frequencies and the averages) is compared with the profile's choices, ranges and quantisation
rules. A request the instrument cannot do is an ERROR (``validate`` fails, ``run`` refuses
before connecting); one it will do differently (an RBW rounded to the profile's sequence, a
trace length clamped, averages split over several traces) is a WARNING. Each is one line that
names the plan key, the profile, and what to change; repeated lines (several segments with the
same setting) are reported once.

Only a bench that loads a profile (a VISA address, not ``sim://``) is checked here; the
in-process simulator has its own range check in :mod:`noisebench.running.plan`.
"""

from __future__ import annotations

from dataclasses import dataclass
from enum import Enum
from typing import Any

from noisebench.errors import InputError
from noisebench.units import format_frequency, format_frequency_range

__all__ = [
    "ProfileFinding",
    "applied_plan",
    "check_plan_against_profile",
    "profile_errors",
    "profile_warnings",
]


@dataclass(frozen=True)
class ProfileFinding:
    """One line about a plan setting and the profile; ``level`` is "error" or "warning"."""

    level: str
    text: str


def _value(value: Any) -> Any:
    return value.value if isinstance(value, Enum) else value


def _fmt(value: Any, unit: str = "") -> str:
    if isinstance(value, float):
        return f"{value:.6g}{(' ' + unit) if unit else ''}"
    return f"{_value(value)!r}"


def _profile_of(plan: Any) -> Any | None:
    """The analyzer profile a real bench would load, or None (``sim://`` or unloadable: the
    plan's own profile check reports the latter)."""
    from noisebench.bench.registry import analyzer_profile

    return analyzer_profile(plan.bench)


def check_plan_against_profile(plan: Any) -> list[ProfileFinding]:
    """Every request of ``plan`` checked against its analyzer profile (module doc)."""
    profile = _profile_of(plan)
    if profile is None or profile.analyzer is None:
        return []
    findings: list[ProfileFinding] = []
    if plan.sweep.freqs_hz is not None or not plan.sweep.segments:
        findings += _check_policy(plan.acquisition, "acquisition.", profile)
    for index in range(len(plan.sweep.segments)):
        try:
            policy = plan.segment_policy(index)
        except (ValueError, InputError):  # reported by the plan's own checks
            continue
        findings += _check_policy(policy, f"sweep.segments[{index}].", profile)
    findings += _check_frequencies(plan, profile)
    unique: list[ProfileFinding] = []
    seen: set[str] = set()
    for finding in findings:
        key = finding.text.split(": ", 1)[-1]  # the same problem in several segments: once
        if key not in seen:
            seen.add(key)
            unique.append(finding)
    return unique


def profile_errors(plan: Any) -> list[str]:
    """The error lines of :func:`check_plan_against_profile`."""
    return [f.text for f in check_plan_against_profile(plan) if f.level == "error"]


def profile_warnings(plan: Any) -> list[str]:
    """The warning lines of :func:`check_plan_against_profile`."""
    return [f.text for f in check_plan_against_profile(plan) if f.level == "warning"]


# ----------------------------------------------------------------------------- per policy


def _check_policy(policy: Any, where: str, profile: Any) -> list[ProfileFinding]:
    s = profile.analyzer.settings
    name = profile.name
    out: list[ProfileFinding] = []

    def error(key: str, text: str) -> None:
        out.append(ProfileFinding("error", f"{where}{key}: {text}"))

    def warn(key: str, text: str) -> None:
        out.append(ProfileFinding("warning", f"{where}{key}: {text}"))

    for key, setting in (
        ("detector", s.detector),
        ("averaging_scale", s.averaging_scale),
        ("mode", s.mode),
    ):
        wanted = _value(getattr(policy, key))
        if setting is None:
            if key == "mode" and wanted == "swept":
                continue
            error(key, f"{wanted!r} cannot be set: profile {name} has no {key} setting")
            continue
        offered = sorted(setting.choices) if setting.writable else [setting.fixed]
        if wanted not in offered:
            error(
                key,
                f"{wanted!r} is not available in profile {name} (it offers "
                f"{', '.join(map(str, offered))}); choose one of them in the plan, or add "
                f"{wanted} to choices of [analyzer.settings.{key}]",
            )

    numeric = (
        ("rbw_hz", "rbw_hz", "Hz"),
        ("vbw_hz", "vbw_hz", "Hz"),
        ("span_hz", "span_hz", "Hz"),
        ("trace_points", "points", ""),
        ("attenuation_db", "attenuation_db", "dB"),
        ("ref_level_dbm", "ref_level_dbm", "dBm"),
    )
    for key, setting_name, unit in numeric:
        wanted = getattr(policy, key)
        if wanted is None:
            continue
        setting = getattr(s, setting_name, None)
        if setting_name == "span_hz" and setting is None:
            continue  # start/stop instruments: the span is checked through the frequencies
        if setting is None or not setting.writable:
            error(
                key,
                f"{_fmt(wanted, unit)} requested, but profile {name} cannot set "
                f"{setting_name} (remove {key} from the plan, or add a 'set' template to "
                f"[analyzer.settings.{setting_name}])",
            )
            continue
        try:
            applied = setting.applied(wanted)
        except InputError as exc:
            error(key, f"{exc.message}")
            continue
        if applied != wanted:
            warn(
                key,
                f"{_fmt(wanted, unit)} will be applied as {_fmt(applied, unit)} by profile "
                f"{name} ({setting.describe_rule()}); the run uses the applied value",
            )

    if policy.preamp is True and (s.preamp is None or not s.preamp.writable):
        error("preamp", f"true requested, but profile {name} has no preamplifier switch")
    if policy.sweep_time_s is not None and (s.sweep_time_s is None or not s.sweep_time_s.writable):
        warn(
            "sweep_time_s",
            f"profile {name} cannot set the sweep time; the instrument chooses it "
            "(remove sweep_time_s from the plan to silence this)",
        )
    limit = s.averages.max
    if limit is not None and policy.max_averages > limit:
        warn(
            "max_averages",
            f"{policy.max_averages} is above profile {name}'s {limit} per trace: points that "
            f"need more take several traces of at most {limit}, combined on the "
            f"{_value(policy.averaging_scale)} scale (the estimate includes their time)",
        )
    return out


def _check_frequencies(plan: Any, profile: Any) -> list[ProfileFinding]:
    s = profile.analyzer.settings
    setting = s.center_hz if s.center_hz is not None else s.start_hz
    if setting is None:
        return []
    low, high = setting.min, setting.max
    freqs = [float(f) for f in plan.freqs_hz()]
    outside = [f for f in freqs if (low is not None and f < low) or (high is not None and f > high)]
    if not outside:
        return []
    return [
        ProfileFinding(
            "error",
            f"sweep: {len(outside)} point(s) from {format_frequency(min(outside))} lie outside "
            f"profile {profile.name}'s range {format_frequency_range(low, high)} of "
            f"{setting.name} (move the "
            "points, or correct min/max in the profile)",
        )
    ]


# ----------------------------------------------------------------------------- applied plan

_ROUNDED = (("rbw_hz", "rbw_hz"), ("vbw_hz", "vbw_hz"), ("trace_points", "points"))


def applied_plan(plan: Any) -> Any:
    """``plan`` with every RBW, VBW and trace length as the analyzer's profile says the
    instrument applies them (for ``estimate``: the forecast then uses what will be measured).
    Unchanged for ``sim://`` benches and for settings the profile cannot set."""
    profile = _profile_of(plan)
    if profile is None or profile.analyzer is None:
        return plan
    s = profile.analyzer.settings

    def rounded(values: dict[str, Any]) -> dict[str, Any]:
        changes = {}
        for key, setting_name in _ROUNDED:
            wanted = values.get(key)
            setting = getattr(s, setting_name, None)
            if wanted is None or setting is None or not setting.writable:
                continue
            try:
                applied = setting.applied(wanted)
            except InputError:
                continue  # refused: validate reports it
            if applied != wanted:
                changes[key] = applied
        return changes

    acquisition = plan.acquisition.model_copy(update=rounded(plan.acquisition.model_dump()))
    segments = [seg.model_copy(update=rounded(seg.model_dump())) for seg in plan.sweep.segments]
    sweep = plan.sweep.model_copy(update={"segments": segments})
    return plan.model_copy(update={"acquisition": acquisition, "sweep": sweep})
