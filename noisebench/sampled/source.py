"""Where samples come from: the small protocol a lab implements for its receiver.

A sample source is anything with a :class:`SourceInfo` (what it is and what it can do, declared
once) and a ``capture(request) -> SampleBlock`` method. Three kinds ship with noisebench:

* SigMF recordings (:mod:`noisebench.sampled.sigmf_io`, address ``sigmf://folder``);
* the simulated receiver (:mod:`noisebench.sims.samples`, address ``sim-samples://scenario``);
* your own acquisition code, registered under a name (address ``samples://name``)::

      from noisebench.sampled import CaptureRequest, SampleBlock, SourceInfo, register_source

      class MyReceiver:
          info = SourceInfo(identity="lab SDR #3", sample_rate_hz=2e6, tunable=True)

          def capture(self, request: CaptureRequest) -> SampleBlock:
              iq = my_driver.read(request.center_hz, request.sample_rate_hz, request.samples)
              return SampleBlock(samples=iq, sample_rate_hz=2e6, center_hz=request.center_hz,
                                 scale_w_per_fs2=None)   # None: not calibrated (Y-factor only)

          def close(self) -> None:
              my_driver.stop()

      register_source("lab-sdr", lambda: MyReceiver())

Units: Hz, seconds; samples in full-scale units (``|x| = 1`` at full scale);
``scale_w_per_fs2`` is the power in W at the reference plane of a signal whose mean ``|x|^2``
is 1 (for real samples: mean ``x^2``).
"""

from __future__ import annotations

import math
import threading
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Protocol, runtime_checkable

import numpy as np

from noisebench.errors import InputError


@dataclass(frozen=True)
class CaptureRequest:
    """What the analyzer asks a source for: ``samples`` samples tuned to ``center_hz``."""

    center_hz: float
    span_hz: float
    sample_rate_hz: float
    samples: int


@dataclass
class SampleBlock:
    """One contiguous capture.

    ``samples`` complex baseband about ``center_hz`` or real (then ``center_hz`` is the RF
    frequency of fs/4, the middle of the first Nyquist zone). ``scale_w_per_fs2``: W at the
    reference plane per full-scale unit squared (None: unknown, ratios only). ``time_s``: when
    the capture started, seconds (None: not known). ``full_scale``: the magnitude at which the
    converter clips, in the same units as the samples (per I or Q rail).
    """

    samples: np.ndarray
    sample_rate_hz: float
    center_hz: float
    scale_w_per_fs2: float | None = None
    time_s: float | None = None
    full_scale: float = 1.0
    label: str = ""
    notes: dict = field(default_factory=dict)

    def __post_init__(self) -> None:
        x = np.asarray(self.samples)
        if x.ndim != 1 or x.size == 0:
            raise InputError(
                "samples", f"must be a non-empty one-dimensional array (got shape {x.shape})"
            )
        if not np.issubdtype(x.dtype, np.number):
            raise InputError("samples", f"must be numbers (got dtype {x.dtype})")
        if not np.all(np.isfinite(x)):
            raise InputError(
                "samples", "hold NaN or infinite values", fix="discard the capture and re-read it"
            )
        self.samples = x.astype(np.complex128 if np.iscomplexobj(x) else np.float64, copy=False)
        for name in ("sample_rate_hz", "center_hz"):
            value = float(getattr(self, name))
            if not (math.isfinite(value) and value > 0):
                raise InputError(name, f"must be a finite frequency > 0 (got {value!r})")
        if self.scale_w_per_fs2 is not None:
            s = float(self.scale_w_per_fs2)
            if not (math.isfinite(s) and s > 0):
                raise InputError(
                    "scale_w_per_fs2",
                    f"must be a finite power > 0 (got {self.scale_w_per_fs2!r})",
                    fix="give W per full-scale unit squared, or None when not calibrated",
                )

    @property
    def is_complex(self) -> bool:
        return bool(np.iscomplexobj(self.samples))

    @property
    def duration_s(self) -> float:
        return self.samples.size / self.sample_rate_hz


@dataclass(frozen=True)
class SourceInfo:
    """What a source declares about itself (capabilities are stated, never probed).

    ``tunable``: it can retune to the centre the analyzer asks for (a live receiver); a
    recording is not (it then implements ``center_for``). ``sample_rate_hz``: its rate.
    ``complex_samples``: complex baseband (else real samples). ``scale_known``: every block
    carries a calibrated ``scale_w_per_fs2``; ``full_scale_dbm`` is then the power of a tone at
    full scale, dBm. ``usable_fraction``:
    share of the sample rate inside the anti-alias filter's flat passband (band edges beyond it
    are never used). ``dc_guard_hz``: half-width around the centre of a complex capture left out
    for LO leakage and its phase-noise skirt (at least the window's main lobe is always left
    out). ``finite``: recorded samples that can run out (nothing is switched live).
    """

    identity: str
    sample_rate_hz: float
    tunable: bool = False
    complex_samples: bool = True
    scale_known: bool = False
    full_scale_dbm: float | None = None
    usable_fraction: float = 0.8
    dc_guard_hz: float = 0.0
    finite: bool = False

    def __post_init__(self) -> None:
        if not 0.0 < float(self.usable_fraction) <= 1.0:
            raise InputError(
                "usable_fraction",
                f"must be in (0, 1] (got {self.usable_fraction!r})",
                fix="give the share of the sample rate inside the flat passband, e.g. 0.8",
            )
        if not float(self.dc_guard_hz) >= 0.0:
            raise InputError("dc_guard_hz", f"must be >= 0 (got {self.dc_guard_hz!r})")


@runtime_checkable
class SampleSource(Protocol):
    """The protocol a sample source implements."""

    @property
    def info(self) -> SourceInfo: ...

    def capture(self, request: CaptureRequest) -> SampleBlock: ...

    def close(self) -> None: ...


class RecordingsExhausted(Exception):
    """Internal: a finite source has fewer samples left than asked (carries what is left)."""

    def __init__(self, left: int) -> None:
        super().__init__(left)
        self.left = int(left)


# --------------------------------------------------------------------------- registry

_REGISTRY: dict[str, Callable[[], SampleSource]] = {}
_REGISTRY_LOCK = threading.Lock()


def register_source(name: str, factory: Callable[[], SampleSource]) -> None:
    """Make ``samples://<name>`` in a plan open ``factory()`` (called once per run)."""
    key = str(name).strip()
    if not key or "/" in key or "?" in key:
        raise InputError(
            "name", f"{name!r} is not a usable source name", fix="use letters, digits, '-', '_'"
        )
    if not callable(factory):
        raise InputError("factory", "must be callable (returning a sample source)")
    with _REGISTRY_LOCK:
        _REGISTRY[key] = factory


def unregister_source(name: str) -> None:
    with _REGISTRY_LOCK:
        _REGISTRY.pop(str(name).strip(), None)


def registered_sources() -> list[str]:
    with _REGISTRY_LOCK:
        return sorted(_REGISTRY)


def open_registered(name: str) -> SampleSource:
    """The source registered as ``name``, or made by ``module:factory`` (importable, called with
    no arguments); InputError listing the registered names otherwise."""
    with _REGISTRY_LOCK:
        factory = _REGISTRY.get(name)
        names = sorted(_REGISTRY)
    if factory is None and ":" in name:
        factory = _import_factory(name)
    if factory is None:
        raise InputError(
            "bench.analyzer.resource",
            f"no sample source registered as {name!r} (registered: {names or 'none'})",
            fix="call noisebench.sampled.register_source(name, factory) before the run",
        )
    source = factory()
    if not isinstance(source, SampleSource):
        raise InputError(
            "bench.analyzer.resource",
            f"the factory registered as {name!r} returned {type(source).__name__}, "
            "which has no info / capture()",
            fix="return an object with an info attribute and a capture(request) method",
        )
    return source


def _import_factory(target: str) -> Callable[[], SampleSource]:
    import importlib

    module_name, _, attr = target.partition(":")
    try:
        module = importlib.import_module(module_name)
    except ImportError as exc:
        raise InputError(
            "bench.analyzer.resource",
            f"cannot import {module_name!r} for samples://{target} ({exc})",
            fix="put the module on PYTHONPATH, or register the source by name",
        ) from None
    factory = getattr(module, attr, None)  # a user-named attribute, looked up once
    if not callable(factory):
        raise InputError(
            "bench.analyzer.resource",
            f"{module_name!r} has no callable {attr!r} for samples://{target}",
            fix="name a function or class returning a sample source",
        )
    return factory
