"""Instrument profiles: every SCPI string of a driver in one TOML file, next to its validator.

A profile is a data file (``noisebench/drivers/profiles/<name>.toml``, or any path) with up to three
instrument sections, ``[analyzer]``, ``[generator]`` and ``[supply]``, plus the shared
``[connection]``, ``[common]`` and ``[errors]`` tables. Each *setting* declares how it is set
(``set``: a template with exactly one ``{value}`` field and an optional number format),
how it is read back (``get``), and what values are valid (``min``/``max`` for numbers, a
``choices`` map from our values to instrument tokens for enumerations; ``replies`` maps extra
reply tokens back). A setting the instrument cannot report may declare ``fixed`` instead
(e.g. the documented filter shape). Supporting a new instrument is a new profile, not new
Python.

Safety of the command strings: templates come from the profile and are checked when it is
loaded (one line, printable ASCII, one ``{value}`` field, a number format limited to digits,
precision and type). The value spliced in is always a validated number, a profile token or,
for free text (labels), a string restricted to letters, digits, space and ``_ . + - /``:
nothing a user types can add a ``;``, a quote or a newline to a command.

Size: one job, the profile schema: the TOML sections and their setting types must be validated
together (cross-section dependencies, enum keys, command templates), and pydantic needs them in
one namespace to resolve the nested models.
"""

from __future__ import annotations

import math
import re
import string
import sys
from collections.abc import Mapping
from enum import Enum
from importlib import resources
from pathlib import Path
from typing import TYPE_CHECKING, Any, ClassVar, Literal

from pydantic import (
    BaseModel,
    ConfigDict,
    Field,
    PrivateAttr,
    ValidationError,
    field_validator,
    model_validator,
)

from noisebench.bench.acquisition import AveragingScale, Detector, SweepMode, TraceUnit
from noisebench.errors import CommunicationError, InputError
from noisebench.user_files import MAX_PROFILE_BYTES, read_user_text

from .quantize import decade_sequence, parse_sequence, quantized, reply_unit_scale, unit_scale

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - Python 3.10
    import tomli as tomllib

__all__ = [
    "AnalyzerProfile",
    "BoolSetting",
    "EnumSetting",
    "FixedBy",
    "FloatSetting",
    "GeneratorProfile",
    "InstrumentProfile",
    "IntSetting",
    "ProfileError",
    "ReplyError",
    "SupplyProfile",
    "TextSetting",
    "available_profiles",
    "load_profile",
    "parse_profile",
    "safe_text",
]

_PRINTABLE = re.compile(r"^[\x20-\x7e]+$")
_TOKEN = re.compile(r"^[A-Za-z0-9*][A-Za-z0-9_.+\-,]*$")
_TEXT = re.compile(r"^[A-Za-z0-9 _.+\-/]*$")
# fill restricted to '0' or ' ', so a format spec cannot smuggle characters into a command
_FORMAT_SPEC = re.compile(r"^(?:[0 ]?[<>=^])?[+\- ]?#?0?\d*[,_]?(?:\.\d+)?[eEfFgGd]?$")
_NAN_SCPI = 9.91e37  # SCPI-1999 representation of NaN (9.9e37 is +infinity)


class ReplyError(CommunicationError):
    """An instrument reply that the profile cannot parse (wrong profile, or a desynchronised
    session answering an earlier query)."""


class ProfileError(InputError):
    """A profile file failed validation. ``problems`` lists ``(key path, message)`` pairs."""

    def __init__(self, source: str, problems: list[tuple[str, str]]) -> None:
        self.source = source
        self.problems = problems
        text = "; ".join(f"{key}: {msg}" if key else msg for key, msg in problems)
        first = problems[0][0] if problems else ""
        super().__init__(
            f"profile {source}" + (f" [{first}]" if first else ""),
            text,
            fix="edit the profile: compare with noisebench/drivers/profiles/generic.toml and "
            "its documentation at the top of that file",
        )


# ----------------------------------------------------------------------------- checks


def _check_command(text: str, what: str) -> str:
    if not text or not _PRINTABLE.fullmatch(text):
        raise ValueError(f"{what} must be one line of printable ASCII (got {text!r})")
    return text


def _template_fields(template: str) -> list[tuple[str, str]]:
    """(field name, format spec) of every replacement field; a conversion counts as a bad name."""
    try:
        parsed = list(string.Formatter().parse(template))
    except ValueError as exc:
        raise ValueError(f"template {template!r} is not a valid format string: {exc}") from None
    return [
        (name if not conv else f"{name}!{conv}", spec or "")
        for _, name, spec, conv in parsed
        if name is not None
    ]


def _check_template(template: str, sample: Any) -> str:
    _check_command(template, "set template")
    fields = _template_fields(template)
    if [f for f, _ in fields] != ["value"]:
        raise ValueError(
            f"set template {template!r} must contain exactly one '{{value}}' field "
            "(e.g. 'FREQ:CENT {value:.12g}')"
        )
    spec = fields[0][1]
    if not _FORMAT_SPEC.fullmatch(spec):
        raise ValueError(
            f"format spec {spec!r} in {template!r} is not allowed (use digits, "
            "precision and a type such as '.12g', '.3f' or 'd')"
        )
    try:
        template.format(value=sample)
    except (ValueError, TypeError) as exc:
        raise ValueError(
            f"format spec {spec!r} in {template!r} does not fit a "
            f"{type(sample).__name__} value: {exc}"
        ) from None
    return template


def _check_query(query: str) -> str:
    _check_command(query, "query")
    if "{" in query or "}" in query:
        raise ValueError(f"query {query!r} must not contain braces")
    return query


def _check_token(token: str, what: str) -> str:
    if not _TOKEN.fullmatch(token):
        raise ValueError(f"{what} {token!r} must be letters, digits and '_ . + - ,' only")
    return token


def safe_text(field: str, value: str, *, max_length: int = 32) -> str:
    """Return ``value`` if it is safe inside a SCPI string argument, else raise InputError."""
    if not isinstance(value, str):
        raise InputError(field, f"must be text (got {type(value).__name__})", value=value)
    if len(value) > max_length or not _TEXT.fullmatch(value):
        raise InputError(
            field,
            f"{value!r} cannot be sent to the instrument",
            value=value,
            fix=f"use at most {max_length} letters, digits, spaces or '_ . + - /' "
            "(no ';', quotes or line breaks)",
        )
    return value


def _unquote(reply: str) -> str:
    text = reply.strip()
    if len(text) >= 2 and text[0] == text[-1] and text[0] in "\"'":
        text = text[1:-1]
    return text.strip()


def _short_form(token: str) -> str:
    """SCPI short form of a mixed-case mnemonic: 'SAMPle' -> 'SAMP' (all-caps: unchanged)."""
    short = "".join(ch for ch in token if not ch.islower())
    return short if short else token.upper()


# ----------------------------------------------------------------------------- settings


class FixedBy(BaseModel):
    """A value the instrument cannot report that depends on another setting's choice:
    ``fixed = { by = "detector", values = { sample = 1, rms = 32 } }`` (``"*"``: any other)."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    by: str = Field(pattern=r"^[a-z_]+$")
    values: dict[str, Any]

    @model_validator(mode="after")
    def _check(self) -> FixedBy:
        if not self.values:
            raise ValueError("fixed.values needs at least one entry")
        return self

    def pick(self, choice: str, name: str, profile: str) -> Any:
        if choice in self.values:
            return self.values[choice]
        if "*" in self.values:
            return self.values["*"]
        raise InputError(
            name,
            f"profile {profile} gives no fixed value for {self.by} = {choice!r}",
            fix=f"add {choice} = ... (or '*' = ...) to fixed.values of {name}",
        )


class _Setting(BaseModel):
    """One instrument setting: how to set it, read it back, and which values are valid."""

    model_config = ConfigDict(extra="forbid", frozen=True, populate_by_name=True)

    set_cmd: str | None = Field(default=None, alias="set")
    get_cmd: str | None = Field(default=None, alias="get")
    unit: str | None = None
    _name: str = PrivateAttr(default="setting")
    _profile: str = PrivateAttr(default="profile")
    _SAMPLE: ClassVar[Any] = "X"  # value used to try the set template when loading

    @field_validator("unit")
    @classmethod
    def _known_unit(cls, value: str | None) -> str | None:
        unit_scale(value)  # ValueError names the known units
        return value

    @model_validator(mode="after")
    def _check_commands(self) -> _Setting:
        if self.set_cmd is not None:
            _check_template(self.set_cmd, self._SAMPLE)
        if self.get_cmd is not None:
            _check_query(self.get_cmd)
        fixed = getattr(self, "fixed", None)
        if fixed is not None and (self.set_cmd or self.get_cmd):
            raise ValueError(
                "'fixed' declares a value the instrument cannot report: "
                "do not combine it with 'set' or 'get'"
            )
        return self

    def _bind(self, name: str, profile: str) -> None:
        self._name = name
        self._profile = profile

    @property
    def name(self) -> str:
        """The setting's key in the profile (e.g. ``rbw_hz``)."""
        return self._name

    @property
    def writable(self) -> bool:
        return self.set_cmd is not None

    @property
    def readable(self) -> bool:
        return self.get_cmd is not None or getattr(self, "fixed", None) is not None

    def fixed_value(self, context: Mapping[str, Any] | None = None) -> Any:
        """The profile's ``fixed`` value; for ``fixed = { by = ... }`` the entry for the other
        setting's current choice in ``context`` (``{name: our value}``)."""
        fixed = getattr(self, "fixed", None)
        if isinstance(fixed, FixedBy):
            if context is None or fixed.by not in context:
                raise InputError(
                    self._name,
                    f"depends on {fixed.by}, whose value is not known here",
                    fix=f"read {fixed.by} before {self._name}",
                )
            choice = context[fixed.by]
            choice = choice.value if isinstance(choice, Enum) else choice
            if isinstance(choice, bool):
                choice = "on" if choice else "off"
            return self._coerce_fixed(fixed.pick(str(choice), self._name, self._profile))
        return fixed

    def _coerce_fixed(self, value: Any) -> Any:
        return value

    def command(self, value: Any) -> str:
        """The set command for ``value`` (validated and formatted); InputError if invalid."""
        if self.set_cmd is None:
            raise InputError(
                self._name,
                f"profile {self._profile} cannot set it",
                value=value,
                fix=f"add a 'set' template for {self._name}",
            )
        return self.set_cmd.format(value=self._render(value))

    def query(self) -> str:
        """The read-back query; InputError when the profile has none."""
        if self.get_cmd is None:
            raise InputError(
                self._name,
                f"profile {self._profile} cannot read it back",
                fix=f"add a 'get' query for {self._name}",
            )
        return self.get_cmd

    def parse(self, reply: str, context: Mapping[str, Any] | None = None) -> Any:
        """Convert an instrument reply to our value; ReplyError if it does not parse.
        ``context`` holds the values of other settings a ``fixed = { by = ... }`` needs."""
        raise NotImplementedError

    def _render(self, value: Any) -> Any:
        raise NotImplementedError

    def _reply_error(self, reply: str, expected: str) -> ReplyError:
        return ReplyError(
            f"reply {reply!r} to {self.get_cmd!r} is not {expected}",
            setting=self._name,
            profile=self._profile,
        )


class _Numeric(_Setting):
    """Range, quantisation and unit shared by real and integer settings (see
    :mod:`noisebench.drivers.quantize`)."""

    if TYPE_CHECKING:  # declared by FloatSetting and IntSetting with their own number type
        min: float | None
        max: float | None

        def validate_value(self, value: Any) -> float: ...

    allowed: list[float] | None = None
    sequence: str | None = None
    step: float | None = Field(default=None, gt=0)
    rounding: Literal["nearest", "up", "down"] = "nearest"
    out_of_range: Literal["refuse", "clamp"] = "refuse"

    @model_validator(mode="after")
    def _check_range(self) -> _Numeric:
        lo, hi = self.min, self.max
        for bound in (lo, hi):
            if bound is not None and not math.isfinite(bound):
                raise ValueError("min and max must be finite")
        if lo is not None and hi is not None and lo > hi:
            raise ValueError(f"min {lo} is above max {hi}")
        rules = [n for n in ("allowed", "sequence", "step") if getattr(self, n) is not None]
        if len(rules) > 1:
            raise ValueError(f"declare one quantisation rule, not {rules}")
        if self.allowed is not None:
            if not self.allowed or not all(math.isfinite(v) for v in self.allowed):
                raise ValueError("allowed must list finite values")
        if self.sequence is not None:
            parse_sequence(self.sequence)
            if lo is None or hi is None or lo <= 0:
                raise ValueError(f"sequence {self.sequence!r} needs min > 0 and max")
        if self.out_of_range == "clamp" and (lo is None or hi is None):
            raise ValueError("out_of_range = 'clamp' needs min and max")
        return self

    @property
    def scale(self) -> float:
        """Our SI value = instrument value x scale (``unit = "MHz"``: 1e6)."""
        return unit_scale(self.unit)

    def allowed_values(self) -> list[float] | None:
        """The values the instrument accepts (list or sequence), else None."""
        if self.allowed is not None:
            return sorted(float(v) for v in self.allowed)
        if self.sequence is not None:
            assert self.min is not None and self.max is not None  # checked with the sequence
            return decade_sequence(parse_sequence(self.sequence), self.min, self.max)
        return None

    def applied(self, value: Any) -> Any:
        """The value the instrument will apply for ``value`` (clamped/rounded by the profile's
        rules); InputError when the profile refuses it."""
        number = self.validate_value(value)
        result = quantized(
            number,
            allowed=self.allowed_values(),
            step=self.step,
            rounding=self.rounding,
            low=self.min,
            high=self.max,
            clamp=self.out_of_range == "clamp",
        )
        return self._number_type(result)

    def describe_rule(self) -> str:
        """The profile's quantisation rule in words (for messages)."""
        if self.sequence is not None:
            return f"sequence {self.sequence}"
        if self.allowed is not None:
            return f"allowed values {self.allowed}"
        if self.step is not None:
            return f"steps of {self.step:g}"
        return "clamped to its range" if self.out_of_range == "clamp" else "as sent"

    def _number_type(self, value: float) -> Any:
        return value

    def _out_of_range(self, number: float, value: Any) -> bool:
        lo, hi = self.min, self.max
        if self.out_of_range == "clamp":
            return False
        return (lo is not None and number < lo) or (hi is not None and number > hi)

    def _parse_number(self, reply: str, expected: str) -> float:
        text = _unquote(reply)
        match = _NUMBER_WITH_UNIT.fullmatch(text)
        if not match:
            raise self._reply_error(reply, expected)
        number = float(match.group(1))
        if not math.isfinite(number) or abs(number) >= 9.9e37:
            raise self._reply_error(reply, "a finite number (SCPI NaN/infinity)")
        if match.group(2):
            try:
                return number * reply_unit_scale(match.group(2), self.unit)
            except ValueError as exc:
                expected = f"a number in {self.unit or 'its unit'} ({exc})"
                raise self._reply_error(reply, expected) from None
        return number * self.scale


_NUMBER_WITH_UNIT = re.compile(r"^([+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?)\s*([A-Za-z]+)?$")


class FloatSetting(_Numeric):
    """A real-valued setting in SI units (Hz, s, dB, dBm, V, A); ``unit`` is the instrument's."""

    min: float | None = None
    max: float | None = None
    fixed: float | FixedBy | None = None
    _SAMPLE: ClassVar[Any] = 1.5

    def _coerce_fixed(self, value: Any) -> float:
        return float(value)

    def validate_value(self, value: Any) -> float:
        try:
            number = float(value)
        except (TypeError, ValueError):
            raise InputError(self._name, f"must be a number (got {value!r})", value=value) from None
        if not math.isfinite(number):
            raise InputError(self._name, f"must be finite (got {value!r})", value=value)
        if self._out_of_range(number, value):
            low = "-inf" if self.min is None else f"{self.min:g}"
            high = "inf" if self.max is None else f"{self.max:g}"
            unit = f" {self.unit}" if self.unit else ""
            raise InputError(
                self._name,
                f"{number:g}{unit} is outside the range [{low}, "
                f"{high}]{unit} of profile {self._profile}",
                value=value,
                fix="choose a value inside the instrument's range",
            )
        return number

    def _render(self, value: Any) -> float:
        return self.applied(value) / self.scale

    def parse(self, reply: str, context: Mapping[str, Any] | None = None) -> float:
        if self.fixed is not None and self.get_cmd is None:
            return float(self.fixed_value(context))
        return self._parse_number(reply, "a number")


class IntSetting(_Numeric):
    """An integer setting (points, averages, poles)."""

    min: int | None = None
    max: int | None = None
    fixed: int | FixedBy | None = None
    _SAMPLE: ClassVar[Any] = 7

    def _coerce_fixed(self, value: Any) -> int:
        return int(value)

    def _number_type(self, value: float) -> int:
        return int(round(value))

    def validate_value(self, value: Any) -> int:
        if (
            isinstance(value, bool)
            or not isinstance(value, (int, float))
            or (isinstance(value, float) and not value.is_integer())
        ):
            raise InputError(self._name, f"must be an integer (got {value!r})", value=value)
        number = int(value)
        if self._out_of_range(number, value):
            raise InputError(
                self._name,
                f"{number} is outside the range [{self.min}, "
                f"{self.max}] of profile {self._profile}",
                value=value,
                fix="choose a value inside the instrument's range",
            )
        return number

    def _render(self, value: Any) -> int:
        return self.applied(value)

    def parse(self, reply: str, context: Mapping[str, Any] | None = None) -> int:
        if self.fixed is not None and self.get_cmd is None:
            return int(self.fixed_value(context))
        number = self._parse_number(reply, "an integer")
        if not number.is_integer():
            raise self._reply_error(reply, "an integer")
        return int(number)


class BoolSetting(_Setting):
    """An ON/OFF setting. Replies ``1``/``0`` and the profile's tokens are understood."""

    true: str = "ON"
    false: str = "OFF"
    fixed: bool | FixedBy | None = None

    def _coerce_fixed(self, value: Any) -> bool:
        if not isinstance(value, bool):
            raise InputError(self._name, f"fixed value {value!r} must be true or false")
        return value

    @model_validator(mode="after")
    def _check_tokens(self) -> BoolSetting:
        _check_token(self.true, "true token")
        _check_token(self.false, "false token")
        if self.true.upper() == self.false.upper():
            raise ValueError("true and false tokens must differ")
        return self

    def _render(self, value: Any) -> str:
        if not isinstance(value, bool):
            raise InputError(self._name, f"must be true or false (got {value!r})", value=value)
        return self.true if value else self.false

    def parse(self, reply: str, context: Mapping[str, Any] | None = None) -> bool:
        if self.fixed is not None and self.get_cmd is None:
            return bool(self.fixed_value(context))
        text = _unquote(reply).upper()
        trues = {"1", "ON", self.true.upper(), _short_form(self.true)}
        falses = {"0", "OFF", self.false.upper(), _short_form(self.false)}
        if text in trues:
            return True
        if text in falses:
            return False
        raise self._reply_error(reply, f"one of {sorted(trues | falses)}")


class EnumSetting(_Setting):
    """A choice among named values. ``choices`` maps our value to the instrument token (SCPI
    mixed case such as ``SAMPle`` is understood in replies in both short and long form);
    ``replies`` maps further reply tokens to our values."""

    choices: dict[str, str] = Field(default_factory=dict)
    replies: dict[str, str] = Field(default_factory=dict)
    fixed: str | None = None

    @model_validator(mode="after")
    def _check_choices(self) -> EnumSetting:
        if not self.choices and self.fixed is None:
            raise ValueError("an enumerated setting needs 'choices' (or 'fixed')")
        seen: dict[str, str] = {}
        for ours, token in self.choices.items():
            _check_token(token, f"token for {ours!r}")
            for form in {token.upper(), _short_form(token)}:
                if form in seen and seen[form] != ours:
                    raise ValueError(
                        f"reply token {form!r} would mean both {seen[form]!r} and {ours!r}"
                    )
                seen[form] = ours
        for token, ours in self.replies.items():
            _check_token(token, "reply token")
            if ours not in self.choices:
                raise ValueError(f"reply {token!r} maps to {ours!r}, which is not in choices")
        return self

    def _render(self, value: Any) -> str:
        key = value.value if isinstance(value, Enum) else value
        if key not in self.choices:
            raise InputError(
                self._name,
                f"{key!r} is not available in profile {self._profile}",
                value=value,
                fix=f"use one of {sorted(self.choices)}",
            )
        return self.choices[key]

    def parse(self, reply: str, context: Mapping[str, Any] | None = None) -> str:
        if self.fixed is not None and self.get_cmd is None:
            return self.fixed
        text = _unquote(reply).upper()
        for token, ours in self.replies.items():
            if token.upper() == text:
                return ours
        for ours, token in self.choices.items():
            if text in (token.upper(), _short_form(token)):
                return ours
        raise self._reply_error(reply, f"one of the tokens {sorted(self.choices.values())}")


class TextSetting(_Setting):
    """Free text (a window name read back, a label shown on the instrument's screen). Values
    sent are restricted by :func:`safe_text`; put quotes in the template if the instrument
    wants a string argument."""

    fixed: str | None = None
    max_length: int = Field(default=32, ge=1, le=200)

    def _render(self, value: Any) -> str:
        return safe_text(self._name, value, max_length=self.max_length)

    def parse(self, reply: str, context: Mapping[str, Any] | None = None) -> str:
        if self.fixed is not None and self.get_cmd is None:
            return self.fixed
        return _unquote(reply)


def _bind_settings(model: BaseModel, profile: str, prefix: str = "") -> None:
    for name in type(model).model_fields:
        value = getattr(model, name)
        if isinstance(value, _Setting):
            value._bind(prefix + name, profile)


def _require_enum_keys(setting: EnumSetting | None, allowed: set[str], where: str) -> None:
    if setting is None:
        return
    keys = set(setting.choices) | ({setting.fixed} if setting.fixed else set())
    unknown = keys - allowed
    if unknown:
        raise ValueError(f"{where}: unknown value(s) {sorted(unknown)}; allowed: {sorted(allowed)}")


def _enum_values(cls: type[Enum]) -> set[str]:
    return {member.value for member in cls}


# ----------------------------------------------------------------------------- sections


class _Section(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


def _not_available(value: Any) -> Any:
    """``false`` in a profile means "this instrument has no such command" (stored as None);
    ``true`` is refused (it names no command)."""
    if value is False:
        return None
    if value is True:
        raise ValueError("use false for 'not available', or the command text")
    return value


def _check_init(commands: list[str]) -> list[str]:
    for command in commands:
        _check_command(command, "init command")
    return commands


def _check_dependencies(section: BaseModel, choices_of: Mapping[str, set[str]]) -> None:
    """Every ``fixed = { by = ... }`` names a known enumerated setting and its choices."""
    for name in type(section).model_fields:
        setting = getattr(section, name)
        fixed = getattr(setting, "fixed", None)
        if not isinstance(fixed, FixedBy):
            continue
        if fixed.by not in choices_of:
            raise ValueError(
                f"{name}.fixed.by = {fixed.by!r} is not an enumerated setting of this "
                f"section (one of {sorted(choices_of)})"
            )
        unknown = set(fixed.values) - choices_of[fixed.by] - {"*"}
        if unknown:
            raise ValueError(
                f"{name}.fixed.values: {sorted(unknown)} are not choices of {fixed.by} "
                f"({sorted(choices_of[fixed.by])})"
            )
        for value in fixed.values.values():
            setting._coerce_fixed(value)


class ConnectionProfile(_Section):
    """Terminations and default timeout of every instrument in the file."""

    read_termination: str = "\n"
    write_termination: str = "\n"
    timeout_s: float = Field(default=5.0, gt=0, le=3600)
    binary_reader: str = Field(
        default="fast",
        pattern="^(fast|pyvisa)$",
        description="'fast': header then exact payload read; "
        "'pyvisa': pyvisa's query_binary_values",
    )
    baud_rate: int | None = Field(
        default=None, ge=50, le=10_000_000, description="serial (ASRL) resources only"
    )

    @model_validator(mode="after")
    def _check(self) -> ConnectionProfile:
        for term in (self.read_termination, self.write_termination):
            if term not in ("\n", "\r\n", "\r"):
                raise ValueError(f"terminations must be '\\n', '\\r\\n' or '\\r' (got {term!r})")
        return self


class CommonProfile(_Section):
    """IEEE 488.2 common commands and the SCPI error queue."""

    identify: str = "*IDN?"
    clear_status: str | None = "*CLS"
    operation_complete: str = "*OPC?"
    wait: str | None = Field(
        default="*WAI",
        description="IEEE 488.2 wait-to-continue (mandatory there): with compound lines one "
        "acquisition is one line, held settings, start, this, the trace query and the error "
        "query; false: the start and *OPC? go in one line and the trace in another",
    )
    error_query: str = "SYST:ERR?"
    error_check: str = Field(
        default="each",
        pattern="^(each|step)$",
        description="'each': read the error queue after every command "
        "(names the culprit); 'step': after each step",
    )
    max_error_entries: int = Field(default=32, ge=1, le=1000)
    compound: bool = Field(
        default=False,
        description="with error_check = 'step': settings whose read-back is already known "
        "go out in one compound line with the acquisition start (SCPI-1999 ';' program "
        "message units); an error in it is traced to its command by re-sending each alone. "
        "Ignored with 'each' (bringing up an instrument checks every command alone)",
    )
    error_batch: int = Field(
        default=1,
        ge=1,
        le=1000,
        description="with compound = true (and error_check = 'step'): the most acquisitions "
        "of one sequencer step (a pass of a sweep-level block) taken before the error queue "
        "is read; the traces are accepted only after a clean read covering them. 1: every "
        "acquisition reads it. At most the instrument's error-queue depth and "
        "max_error_entries. Ignored without compound lines, like compound itself",
    )
    retry_window_s: float = Field(
        default=60.0,
        ge=0,
        le=3600,
        description="how long recovery keeps trying to reach an instrument that stopped "
        "answering (a reboot takes tens of seconds)",
    )
    first_backoff_s: float = Field(default=0.5, gt=0, le=600)
    max_backoff_s: float = Field(default=8.0, gt=0, le=600)

    _optional = field_validator("clear_status", "wait", mode="before")(_not_available)

    @model_validator(mode="after")
    def _check(self) -> CommonProfile:
        for key in ("identify", "operation_complete", "error_query"):
            _check_query(getattr(self, key))
        for key in ("clear_status", "wait"):
            if getattr(self, key) is not None:
                _check_query(getattr(self, key))
        if self.error_batch > self.max_error_entries:
            raise ValueError(
                f"error_batch {self.error_batch} exceeds max_error_entries "
                f"{self.max_error_entries}: keep it within the error-queue depth"
            )
        return self


class AnalyzerSettings(_Section):
    """What the analyzer can set and report. Keys are fixed; unused ones are omitted."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    continuous: BoolSetting | None = None
    mode: EnumSetting | None = None
    center_hz: FloatSetting | None = None
    span_hz: FloatSetting | None = None
    start_hz: FloatSetting | None = None
    stop_hz: FloatSetting | None = None
    rbw_shape: EnumSetting | None = None
    rbw_poles: IntSetting | None = None
    fft_window: TextSetting | None = None
    rbw_hz: FloatSetting
    vbw_hz: FloatSetting | None = None
    vbw_auto: BoolSetting | None = None
    points: IntSetting
    detector: EnumSetting
    detector_samples: FloatSetting | None = None
    averaging_on: BoolSetting | None = None
    averaging_scale: EnumSetting
    averages: IntSetting
    ref_level_dbm: FloatSetting | None = None
    attenuation_db: FloatSetting | None = None
    preamp: BoolSetting | None = None
    sweep_time_s: FloatSetting | None = None
    sweep_time_auto: BoolSetting | None = None

    @field_validator("*", mode="before")
    @classmethod
    def _optional(cls, value: Any) -> Any:
        return _not_available(value)

    @model_validator(mode="after")
    def _check(self) -> AnalyzerSettings:
        _require_enum_keys(self.mode, _enum_values(SweepMode), "mode")
        _require_enum_keys(self.rbw_shape, {"gaussian", "synchronous"}, "rbw_shape")
        _require_enum_keys(self.detector, _enum_values(Detector), "detector")
        _require_enum_keys(self.averaging_scale, _enum_values(AveragingScale), "averaging_scale")
        centre = self.center_hz is not None and self.span_hz is not None
        edges = self.start_hz is not None and self.stop_hz is not None
        if not (centre or edges):
            raise ValueError("declare center_hz and span_hz, or start_hz and stop_hz")
        for name in ("rbw_hz", "points", "detector", "averaging_scale", "averages"):
            if not getattr(self, name).readable:
                raise ValueError(
                    f"{name} needs a 'get' query (or 'fixed'): the physics uses "
                    "the value the instrument applied"
                )
        if self.rbw_shape is None or not self.rbw_shape.readable:
            raise ValueError(
                "rbw_shape needs a 'get' query or a 'fixed' shape: the noise "
                "bandwidth depends on it"
            )
        if "synchronous" in set(self.rbw_shape.choices) | {self.rbw_shape.fixed}:
            if self.rbw_poles is None or not self.rbw_poles.readable:
                raise ValueError("a synchronous rbw_shape needs rbw_poles ('get' or 'fixed')")
        if self.mode is not None and "fft" in self.mode.choices:
            if self.fft_window is None or not self.fft_window.readable:
                raise ValueError("FFT mode needs fft_window ('get' or 'fixed')")
        enums = {
            n: set(s.choices) | ({s.fixed} if s.fixed else set())
            for n in type(self).model_fields
            if isinstance(s := getattr(self, n), EnumSetting)
        }
        _check_dependencies(self, enums)
        return self


class AcquisitionProfile(_Section):
    """How one complete (averaged) acquisition is started and awaited."""

    start: str = "INIT:IMM"
    abort: str | None = "ABOR"
    poll_start: str | None = Field(
        default=None,
        description="start command that sets the operation-complete event "
        "bit, e.g. 'INIT:IMM;*OPC' (enables status polling)",
    )
    read: str | None = Field(
        default=None,
        description="one query that starts an acquisition, waits for it and returns its "
        "trace (SCPI-1999 measurement instruction READ? = ABORt;INITiate;FETCh?), e.g. "
        "'READ?'; with compound lines one acquisition is held settings, this and the error "
        "query (with error_check 'each' it goes alone, then the error query); false (the "
        "default): not available, start, wait and trace query are sent",
    )
    poll_query: str = "*ESR?"
    poll_mask: int = Field(default=1, ge=1, le=255)
    poll_above_s: float = Field(
        default=30.0,
        ge=0,
        description="poll the status instead of a blocking *OPC? "
        "when one acquisition takes longer than this",
    )
    poll_interval_s: float = Field(default=0.2, gt=0, le=60)
    timeout_factor: float = Field(default=1.5, ge=1.0, le=100)
    timeout_extra_s: float = Field(default=2.0, ge=0, le=3600)
    sweep_overhead_s: float = Field(
        default=0.0, ge=0, le=60, description="per-sweep time beyond the reported sweep time"
    )
    sweep_time_factor: float = Field(
        default=2.5,
        gt=0,
        le=100,
        description="k in ST = k*span/RBW^2 when the instrument "
        "cannot report its sweep time (common practice)",
    )

    _optional = field_validator("abort", "poll_start", "read", mode="before")(_not_available)

    @model_validator(mode="after")
    def _check(self) -> AcquisitionProfile:
        _check_command(self.start, "start")
        for cmd in (self.abort, self.poll_start):
            if cmd is not None:
                _check_command(cmd, "command")
        _check_query(self.poll_query)
        if self.read is not None:
            _check_query(self.read)
            if ";" in self.read or not self.read.split()[0].endswith("?"):
                raise ValueError(
                    f"read must be one query whose header ends in '?', e.g. 'READ?' "
                    f"(got {self.read!r}); false if the instrument has none"
                )
        return self


class TraceProfile(_Section):
    """Trace transfer: binary (IEEE 488.2 definite-length block) or ASCII."""

    query: str = "TRAC? TRACE1"
    transfer: str = Field(default="binary", pattern="^(binary|ascii)$")
    binary_format: str | None = "FORM REAL,32"
    byte_order: str | None = "FORM:BORD NORM"
    datatype: str = Field(default="f", pattern="^(f|d)$", description="f: float32, d: float64")
    big_endian: bool = True
    ascii_format: str | None = "FORM ASC"
    unit: TraceUnit = TraceUnit.DBM
    transfer_rate_bytes_per_s: float = Field(
        default=1e6, gt=0, description="conservative rate used to size the transfer timeout"
    )

    _optional = field_validator("binary_format", "byte_order", "ascii_format", mode="before")(
        _not_available
    )

    @model_validator(mode="after")
    def _check(self) -> TraceProfile:
        _check_query(self.query)
        for cmd in (self.binary_format, self.byte_order, self.ascii_format):
            if cmd is not None:
                _check_command(cmd, "format command")
        if self.transfer == "binary" and self.binary_format is None:
            raise ValueError("binary transfer needs binary_format")
        if self.transfer == "ascii" and self.ascii_format is None:
            raise ValueError("ascii transfer needs ascii_format")
        return self


class MarkerProfile(_Section):
    """Marker commands: position, function (band power / noise density) - or an on/off
    ``noise`` switch for instruments whose noise marker is a switch - band, value."""

    frequency: FloatSetting
    function: EnumSetting | None = None
    noise: BoolSetting | None = Field(
        default=None, description="on/off noise-density marker (instead of 'function')"
    )
    band: FloatSetting | None = None
    value: str = "CALC:MARK:Y?"
    corrected: BoolSetting | None = Field(
        default=None,
        description="whether the reading already has the detector and noise-"
        "bandwidth corrections applied ('get' or 'fixed')",
    )

    _optional = field_validator("band", "corrected", "noise", "function", mode="before")(
        _not_available
    )

    @model_validator(mode="after")
    def _check(self) -> MarkerProfile:
        _check_query(self.value)
        if (self.function is None) == (self.noise is None):
            raise ValueError("declare the marker's 'function' or its on/off 'noise' switch")
        if self.noise is not None and not self.noise.writable:
            raise ValueError("marker.noise needs a 'set' template")
        _require_enum_keys(self.function, {"off", "band_power", "noise_density"}, "function")
        _check_dependencies(self, {"function": set(self.kinds) | {"off"}})
        if self.corrected is None or not self.corrected.readable:
            raise ValueError(
                "marker.corrected needs a 'get' query or 'fixed': the estimator "
                "must know whether the instrument already corrected the reading"
            )
        return self

    @property
    def kinds(self) -> tuple[str, ...]:
        """Marker kinds this instrument offers (``band_power``, ``noise_density``)."""
        if self.function is not None:
            return tuple(k for k in ("band_power", "noise_density") if k in self.function.choices)
        return ("noise_density",)


class AnalyzerProfile(_Section):
    """The ``[analyzer]`` section."""

    settings: AnalyzerSettings
    apply_order: list[str] = Field(default_factory=lambda: list(DEFAULT_APPLY_ORDER))
    acquisition: AcquisitionProfile = Field(default_factory=AcquisitionProfile)
    trace: TraceProfile = Field(default_factory=TraceProfile)
    marker: MarkerProfile | None = None
    noise_drive: BoolSetting | None = None
    sim_path: EnumSetting | None = None
    max_input_power_dbm: float | None = None
    init: list[str] = Field(
        default_factory=list,
        description="commands sent once after connecting and after every reconnect",
    )

    _optional = field_validator("marker", "noise_drive", "sim_path", mode="before")(_not_available)
    _init = field_validator("init")(_check_init)

    @model_validator(mode="after")
    def _check(self) -> AnalyzerProfile:
        known = set(AnalyzerSettings.model_fields)
        unknown = [n for n in self.apply_order if n not in known]
        if unknown:
            raise ValueError(f"apply_order names unknown settings {unknown}")
        if len(set(self.apply_order)) != len(self.apply_order):
            raise ValueError("apply_order lists a setting twice")
        _require_enum_keys(self.sim_path, {"dut", "through", "termination"}, "sim_path")
        return self


class GeneratorSettings(_Section):
    frequency_hz: FloatSetting
    level_dbm: FloatSetting
    output: BoolSetting


class GeneratorProfile(_Section):
    """The ``[generator]`` section."""

    settings: GeneratorSettings
    init: list[str] = Field(default_factory=list)
    _init = field_validator("init")(_check_init)


class SupplySettings(_Section):
    voltage_v: FloatSetting
    current_limit_a: FloatSetting
    output: BoolSetting


class SupplyProfile(_Section):
    """The ``[supply]`` section (DC supply that drives a noise source)."""

    settings: SupplySettings
    init: list[str] = Field(default_factory=list)
    _init = field_validator("init")(_check_init)
    measure_voltage: str | None = None
    measure_current: str | None = None
    voltage_tolerance_v: float = Field(default=0.5, gt=0)

    @model_validator(mode="after")
    def _check(self) -> SupplyProfile:
        for cmd in (self.measure_voltage, self.measure_current):
            if cmd is not None:
                _check_query(cmd)
        return self


class ProfileMeta(_Section):
    name: str = Field(pattern=r"^[A-Za-z0-9_\-]+$")
    description: str = ""
    format: int = Field(default=1, ge=1, le=1)


class InstrumentProfile(_Section):
    """A validated profile file. Use :func:`load_profile` to read one."""

    profile: ProfileMeta
    connection: ConnectionProfile = Field(default_factory=ConnectionProfile)
    common: CommonProfile = Field(default_factory=CommonProfile)
    analyzer: AnalyzerProfile | None = None
    generator: GeneratorProfile | None = None
    supply: SupplyProfile | None = None
    _source: str = PrivateAttr(default="<memory>")

    @model_validator(mode="after")
    def _check(self) -> InstrumentProfile:
        if self.analyzer is None and self.generator is None and self.supply is None:
            raise ValueError("a profile needs at least one of [analyzer], [generator], [supply]")
        return self

    @property
    def name(self) -> str:
        return self.profile.name

    @property
    def source(self) -> str:
        """Where the profile was read from (file path or '<memory>')."""
        return self._source

    def section(self, kind: str) -> Any:
        """The ``analyzer``/``generator``/``supply`` section; ProfileError if absent."""
        value = getattr(self, kind, None)
        if value is None:
            raise ProfileError(self._source, [(kind, f"this profile has no [{kind}] section")])
        return value

    def _bind(self, source: str) -> None:
        self._source = source
        name = self.profile.name
        if self.analyzer is not None:
            _bind_settings(self.analyzer.settings, name)
            if self.analyzer.marker is not None:
                _bind_settings(self.analyzer.marker, name, "marker.")
            _bind_settings(self.analyzer, name)
        if self.generator is not None:
            _bind_settings(self.generator.settings, name)
        if self.supply is not None:
            _bind_settings(self.supply.settings, name)


DEFAULT_APPLY_ORDER: tuple[str, ...] = (
    "continuous",
    "mode",
    "center_hz",
    "span_hz",
    "start_hz",
    "stop_hz",
    "rbw_hz",
    "vbw_auto",
    "vbw_hz",
    "points",
    "detector",
    "averaging_on",
    "averaging_scale",
    "averages",
    "ref_level_dbm",
    "attenuation_db",
    "preamp",
    "sweep_time_auto",
    "sweep_time_s",
)


# ----------------------------------------------------------------------------- loading


def _problems(exc: ValidationError) -> list[tuple[str, str]]:
    out = []
    for err in exc.errors():
        loc = ".".join(str(p) for p in err["loc"] if not str(p).startswith("function-"))
        msg = err["msg"]
        if msg.startswith("Value error, "):
            msg = msg[len("Value error, ") :]
        if err["type"] == "extra_forbidden":
            msg = "unknown key (check the spelling against generic.toml)"
        out.append((loc, msg))
    return out


def parse_profile(text: str, source: str = "<memory>") -> InstrumentProfile:
    """Parse and validate profile TOML ``text``; ProfileError lists every problem with its key."""
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ProfileError(source, [("", f"not valid TOML: {exc}")]) from None
    try:
        profile = InstrumentProfile.model_validate(data)
    except ValidationError as exc:
        raise ProfileError(source, _problems(exc)) from None
    profile._bind(source)
    return profile


def _packaged(name: str) -> Path | None:
    path = resources.files("noisebench.drivers").joinpath("profiles").joinpath(f"{name}.toml")
    return Path(str(path)) if path.is_file() else None


def available_profiles() -> list[str]:
    """Names of the profiles shipped with noisebench."""
    folder = resources.files("noisebench.drivers").joinpath("profiles")
    return sorted(p.name[:-5] for p in folder.iterdir() if p.name.endswith(".toml"))


def load_profile(profile: str | Path | InstrumentProfile = "generic") -> InstrumentProfile:
    """Load a profile by packaged name (``"generic"``) or by path to a ``.toml`` file."""
    if isinstance(profile, InstrumentProfile):
        return profile
    path = Path(profile)
    if not path.is_file():
        packaged = (
            _packaged(str(profile)) if re.fullmatch(r"[A-Za-z0-9_\-]+", str(profile)) else None
        )
        if packaged is None:
            raise InputError(
                "profile",
                f"no profile file or packaged profile {str(profile)!r}",
                value=str(profile),
                fix=f"give a path to a .toml file or one of {available_profiles()}",
            )
        path = packaged
    text = read_user_text(path, MAX_PROFILE_BYTES, field=f"profile {path}", what="profile")
    return parse_profile(text, source=str(path))
