"""One exception tree for everything noisebench raises on purpose.

``NoisebenchError``
 ├── ``InputError``          bad user input: names the field, the bad value and the fix
 ├── ``MeasurementError``    the physics refuses (hot <= cold, Y too close to 1, ...)
 ├── ``CommunicationError``  transport faults (timeout, dropped connection); keeps the VISA code
 │    └── ``InstrumentTimeout``
 ├── ``InstrumentError``     the instrument reported an error (SCPI error-queue entry)
 └── ``SafetyError``         an action was refused because it could harm the bench

Context (instrument, command, frequency point) is added with :meth:`NoisebenchError.add_context`
as the error travels up; the CLI prints ``str(error)`` as one line.
"""

from __future__ import annotations

from typing import Any


class NoisebenchError(Exception):
    """Base class of all noisebench errors."""

    def __init__(self, message: str, **context: Any) -> None:
        super().__init__(message)
        self.message = message
        self.context: dict[str, Any] = {k: v for k, v in context.items() if v is not None}

    def add_context(self, **context: Any) -> NoisebenchError:
        """Attach more context (only keys not already present); returns ``self`` for re-raise."""
        for key, value in context.items():
            if value is not None and key not in self.context:
                self.context[key] = value
        return self

    def __str__(self) -> str:
        if not self.context:
            return self.message
        ctx = ", ".join(f"{k}={v}" for k, v in self.context.items())
        return f"{self.message} [{ctx}]"


class InputError(NoisebenchError, ValueError):
    """Invalid input. ``field`` names the offending quantity, ``fix`` says what to do."""

    def __init__(
        self, field: str, message: str, *, value: Any = None, fix: str | None = None, **context: Any
    ) -> None:
        self.field = field
        self.value = value
        self.fix = fix
        text = f"{field}: {message}"
        if fix:
            text += f" ({fix})"
        super().__init__(text, **context)


class MeasurementError(NoisebenchError):
    """The measured data cannot give a trustworthy result (e.g. hot <= cold)."""


class YNotSignificantError(MeasurementError):
    """Hot minus cold is within a few standard uncertainties of zero: no usable Y-factor.

    A dead or disconnected noise source; more averages can only help when the source is
    alive but weak, so an adaptive loop may average on and refuse when it has to stop.
    ``significance`` is (Y - 1)/u(Y) of the refused pair (it grows as the square root of the
    averages), so a loop can size its next round."""

    def __init__(self, message: str, *, significance: float, **context: Any) -> None:
        super().__init__(message, **context)
        self.significance = significance


class CommunicationError(NoisebenchError):
    """Transport-level failure. ``visa_code`` keeps pyvisa's error code when there is one."""

    def __init__(self, message: str, *, visa_code: int | None = None, **context: Any) -> None:
        self.visa_code = visa_code
        super().__init__(message, visa_code=visa_code, **context)


class InstrumentTimeout(CommunicationError):
    """The instrument did not answer within the timeout."""


class UnverifiedStep(CommunicationError):
    """A step's acquisitions whose error-queue read never came: the connection was remade in
    the middle of a step that reads the queue once at its end (``[common] error_batch``), and
    an instrument that rebooted lost the entries. The step's readings are discarded and the
    step is read again (the sequencer retries it)."""


class InstrumentError(NoisebenchError):
    """The instrument reported an error-queue entry (``code``, ``text``) after ``command``."""

    def __init__(self, code: int, text: str, *, command: str | None = None, **context: Any) -> None:
        self.code = code
        self.text = text
        self.command = command
        msg = f"instrument error {code}, {text!r}"
        if command:
            msg += f" after {command!r}"
        super().__init__(msg, **context)


class SafetyError(NoisebenchError):
    """An action was refused because it could damage an instrument or the DUT."""


def require_finite(field: str, value: Any) -> None:
    """Raise :class:`InputError` if ``value`` (scalar or array) holds NaN or inf."""
    import numpy as np

    arr = np.asarray(value, dtype=float)
    if not np.all(np.isfinite(arr)):
        raise InputError(
            field,
            "must be finite (got NaN or inf)",
            value=value,
            fix="check the reading or the table it came from",
        )


def require_positive(field: str, value: Any, *, allow_zero: bool = False) -> None:
    """Raise :class:`InputError` unless every element of ``value`` is finite and > 0 (or >= 0)."""
    import numpy as np

    require_finite(field, value)
    arr = np.asarray(value, dtype=float)
    bad = arr < 0 if allow_zero else arr <= 0
    if np.any(bad):
        rel = ">= 0" if allow_zero else "> 0"
        raise InputError(field, f"must be {rel} (got {arr[bad].ravel()[0]!r})", value=value)


def input_error_from_validation(exc: Any, section: str, *, fix: str | None = None) -> InputError:
    """One :class:`InputError` from a pydantic ``ValidationError`` of a plan section: the first
    problem's key path (``section.key[i]``) as the field, every problem in the message."""
    problems = []
    for err in exc.errors(include_url=False):
        loc = "".join(f"[{p}]" if isinstance(p, int) else f".{p}" for p in err.get("loc", ()))
        problems.append(
            (f"{section}{loc}", str(err.get("msg", "invalid")).removeprefix("Value error, "))
        )
    field, message = problems[0]
    if len(problems) > 1:
        message += "; also " + "; ".join(f"{f}: {m}" for f, m in problems[1:])
    return InputError(field, message, fix=fix or f"correct the [{section}] section")
