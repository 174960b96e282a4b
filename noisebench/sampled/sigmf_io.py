"""SigMF recordings as a sample source: a folder of hot/cold captures measured like a live bench.

A folder holds SigMF recordings (``name.sigmf-meta`` + ``name.sigmf-data``, read and written
with the ``sigmf`` package). The open SigMF core fields give the sample rate
(``core:sample_rate``), the sample format (``core:datatype``: ``cf32_le``, ``ci16_le``, ``rf32_le``
... complex or real) and each capture's centre (``core:frequency``). noisebench adds its own
keys in the ``noisebench`` extension namespace (declared in ``core:extensions``):

annotations (a sample range of a capture; only annotated ranges are used):
    ``noisebench:connection``  ``"dut"``, ``"through"`` (noise source straight into the
                               receiver) or ``"termination"`` (matched load)
    ``noisebench:state``       ``"hot"`` or ``"cold"`` (noise source drive on / off)
global:
    ``noisebench:scale``               a receiver scale calibration (:class:`ScaleCalibration`)
    ``noisebench:cold_temperature_k``  physical temperature of the noise source, K
    ``noisebench:usable_fraction``     share of the sample rate in the flat passband
    ``noisebench:dc_guard_hz``         half-width left out around the centre (LO leakage)

How the bench maps onto a folder: moving the cables (:class:`~noisebench.bench.registry.Connection`)
selects the annotations of that connection; switching the noise source selects ``hot`` or
``cold``. Each acquisition reads the next unread samples of a matching range, so no sample is
used twice; a recorder annotates only settled samples (the switching transients are simply
left out of every range), which is why the recorded source has no settling time.
"""

from __future__ import annotations

import logging
import math
import threading
import warnings
from collections.abc import Iterable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from noisebench.bench.instruments import NoiseSource
from noisebench.errors import InputError, MeasurementError
from noisebench.sampled.scale import ScaleCalibration
from noisebench.sampled.source import (
    CaptureRequest,
    RecordingsExhausted,
    SampleBlock,
    SourceInfo,
)
from noisebench.units import format_frequency, format_frequency_range

logger = logging.getLogger(__name__)

NAMESPACE = "noisebench"
KEY_CONNECTION = "noisebench:connection"
KEY_STATE = "noisebench:state"
KEY_SCALE = "noisebench:scale"
KEY_COLD_K = "noisebench:cold_temperature_k"
KEY_USABLE = "noisebench:usable_fraction"
KEY_DC_GUARD = "noisebench:dc_guard_hz"
CONNECTIONS = ("dut", "through", "termination")
STATES = ("hot", "cold")
EXTENSION = {"name": NAMESPACE, "version": "0.1.0", "optional": True}
META_SUFFIX = ".sigmf-meta"
DATA_SUFFIX = ".sigmf-data"


def _sigmf():
    try:
        import sigmf  # noqa: F401
        from sigmf import sigmffile
    except ImportError:  # pragma: no cover - optional extra
        raise InputError(
            "bench.analyzer.resource",
            "SigMF recordings need the sigmf package",
            fix='pip install "noisebench[sigmf]"',
        ) from None
    return sigmffile


@dataclass
class RecordedRange:
    """One annotated range of one capture: where, what state, how much is read already."""

    path: Path
    start: int
    count: int
    center_hz: float
    connection: str
    state: str
    handle: Any = field(repr=False, default=None)
    read: int = 0

    @property
    def left(self) -> int:
        return self.count - self.read


@dataclass
class BenchState:
    """What the recorded bench is doing: the connection and the noise source state."""

    connection: str = "dut"
    hot: bool = False

    @property
    def state(self) -> str:
        return "hot" if self.hot else "cold"


class SigmfRecordings:
    """A folder of SigMF recordings as a (non-tunable, finite) sample source."""

    def __init__(self, folder: str | Path, *, state: BenchState | None = None) -> None:
        self.folder = Path(folder)
        self.state = state or BenchState()
        self._lock = threading.Lock()
        self.ranges: list[RecordedRange] = []
        self._open()

    # ------------------------------------------------------------------ reading the folder

    def _open(self) -> None:
        sigmffile = _sigmf()
        if not self.folder.is_dir():
            raise InputError(
                "bench.analyzer.resource",
                f"sigmf://{self.folder}: no such folder",
                fix="name a folder holding .sigmf-meta / .sigmf-data pairs",
            )
        metas = sorted(self.folder.glob("*" + META_SUFFIX))
        if not metas:
            raise InputError(
                "bench.analyzer.resource",
                f"sigmf://{self.folder}: no {META_SUFFIX} files in the folder",
                fix="record hot/cold captures there first",
            )
        rates: set[float] = set()
        kinds: set[bool] = set()
        globals_: dict[str, set] = {KEY_SCALE: set(), KEY_COLD_K: set(), KEY_USABLE: set()}
        guard: set[float] = set()
        for meta in metas:
            try:
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore")
                    handle = sigmffile.fromfile(str(meta))
            except Exception as exc:  # noqa: BLE001 - the package raises many kinds
                raise InputError(
                    "bench.analyzer.resource",
                    f"{meta.name}: not a readable SigMF recording ({type(exc).__name__}: "
                    f"{str(exc).splitlines()[0] if str(exc) else ''})",
                    fix="check the .sigmf-meta file and its .sigmf-data partner",
                ) from None
            info = handle.get_global_info()
            rate = info.get("core:sample_rate")
            datatype = str(info.get("core:datatype", ""))
            if not isinstance(rate, (int, float)) or not rate > 0:
                raise InputError(
                    "core:sample_rate", f"{meta.name}: missing or not > 0", fix="add the rate"
                )
            _check_rate(meta, handle, float(rate))
            rates.add(float(rate))
            kinds.add(datatype.startswith("c"))
            for key in globals_:
                if key in info:
                    value = info[key]
                    globals_[key].add(_freeze(value) if isinstance(value, dict) else float(value))
                elif key == KEY_SCALE:
                    globals_[key].add(None)
            guard.add(float(info.get(KEY_DC_GUARD, 0.0)))
            self.ranges += _ranges_of(meta, handle)
        if len(rates) > 1 or len(kinds) > 1:
            raise InputError(
                "bench.analyzer.resource",
                f"sigmf://{self.folder}: recordings differ in sample rate or sample kind "
                f"(rates {sorted(rates)})",
                fix="keep one receiver set-up per folder",
            )
        if not self.ranges:
            raise InputError(
                "bench.analyzer.resource",
                f"sigmf://{self.folder}: no annotated ranges ({KEY_CONNECTION} / {KEY_STATE})",
                fix="annotate the settled hot and cold sample ranges of each recording",
            )
        self.sample_rate_hz = rates.pop()
        self.complex_samples = kinds.pop()
        self.scale = _one_scale(globals_[KEY_SCALE], self.folder)
        self.cold_temperature_k = _one_value(globals_[KEY_COLD_K], KEY_COLD_K, self.folder)
        usable = _one_value(globals_[KEY_USABLE], KEY_USABLE, self.folder)
        self.info = SourceInfo(
            identity=f"SigMF recordings {self.folder.name}",
            sample_rate_hz=self.sample_rate_hz,
            tunable=False,
            complex_samples=self.complex_samples,
            scale_known=self.scale is not None,
            usable_fraction=0.8 if usable is None else usable,
            dc_guard_hz=max(guard),
            finite=True,
        )

    def close(self) -> None:
        """Recordings hold no instrument; the files are memory-mapped and released with us."""

    # ------------------------------------------------------------------ the protocol

    def centers_hz(self) -> list[float]:
        return sorted({r.center_hz for r in self.ranges})

    def _half_usable_hz(self) -> float:
        div = 2.0 if self.complex_samples else 4.0
        return self.info.usable_fraction * self.sample_rate_hz / div

    def center_for(self, center_hz: float, span_hz: float) -> float:
        """The capture centre whose usable band covers ``center_hz +/- span_hz/2`` (nearest)."""
        half = self._half_usable_hz()
        fits = [
            c
            for c in self.centers_hz()
            if center_hz - span_hz / 2 >= c - half - 1e-9 and center_hz + span_hz / 2 <= c + half
        ]
        if not fits:
            raise InputError(
                "sweep",
                "no recording covers "
                + format_frequency_range(center_hz - span_hz / 2, center_hz + span_hz / 2, 9)
                + " (recorded centres "
                + ", ".join(format_frequency(c, 9) for c in self.centers_hz())
                + f", usable +/- {format_frequency(half)} each)",
                fix="measure at recorded frequencies or narrow span_hz",
            )
        return min(fits, key=lambda c: abs(c - center_hz))

    def remaining_samples(self, center_hz: float, connection: str, state: str) -> int:
        return sum(r.left for r in self._matching(center_hz, connection, state))

    def _matching(self, center_hz: float, connection: str, state: str) -> list[RecordedRange]:
        tol = 1e-9 * self.sample_rate_hz
        return [
            r
            for r in self.ranges
            if abs(r.center_hz - center_hz) <= tol
            and r.connection == connection
            and (r.state == state or connection == "termination")
        ]

    def capture(self, request: CaptureRequest) -> SampleBlock:
        with self._lock:
            connection, state = self.state.connection, self.state.state
            candidates = self._matching(request.center_hz, connection, state)
            if not candidates:
                raise MeasurementError(
                    f"no {state} recording on the {connection} connection at "
                    f"{format_frequency(request.center_hz, 9)} in sigmf://{self.folder}",
                    fix=f"record it, annotated {KEY_CONNECTION}={connection!r} "
                    f"{KEY_STATE}={state!r}",
                )
            usable = [r for r in candidates if r.left > 0]
            if not usable:
                raise RecordingsExhausted(0)
            rng = (
                max(usable, key=lambda r: r.left) if usable[0].left < request.samples else usable[0]
            )
            n = min(int(request.samples), rng.left)
            x = rng.handle.read_samples(rng.start + rng.read, n)
            rng.read += n
            return SampleBlock(
                samples=np.asarray(x),
                sample_rate_hz=self.sample_rate_hz,
                center_hz=rng.center_hz,
                scale_w_per_fs2=None if self.scale is None else self.scale.scale_w_per_fs2,
                full_scale=1.0,
                label=f"{rng.path.name}[{rng.start + rng.read - n}:{rng.start + rng.read}] "
                f"{connection} {state}",
            )


def _freeze(value: dict) -> str:
    import json

    return json.dumps(value, sort_keys=True)


def _one_scale(values: set, folder: Path) -> ScaleCalibration | None:
    if values == {None} or not values:
        return None
    if len(values) > 1:
        raise InputError(
            KEY_SCALE,
            f"sigmf://{folder}: recordings carry different scales (or some none)",
            fix="calibrate once and store the same scale in every recording of the folder",
        )
    import json

    return ScaleCalibration.model_validate(json.loads(next(iter(values))))


def _one_value(values: set, key: str, folder: Path) -> float | None:
    if not values:
        return None
    if len(values) > 1:
        raise InputError(key, f"sigmf://{folder}: recordings disagree ({sorted(values)})")
    return float(next(iter(values)))


RATE_RANGE_HZ = (1e3, 1e11)
"""Sample rates a receiver recording can have (common practice: audio-rate SDRs start near
1 kS/s, the fastest converters sample tens of GS/s); outside, the rate is in the wrong unit."""


def _check_rate(meta: Path, handle: Any, rate: float) -> None:
    """Refuse a sample rate no receiver has, or one the recording's own capture times
    contradict: consecutive captures stamped with ``core:datetime`` (SigMF core) cannot hold
    more samples than the rate fills in the time between their stamps (gaps for retuning are
    allowed, so only a rate too low is seen; a 2x error, samples/s given as complex pairs or
    the decimated rate, shows at once)."""
    lo, hi = RATE_RANGE_HZ
    if not lo <= rate <= hi:
        raise InputError(
            "core:sample_rate",
            f"{meta.name}: {rate:g} samples/s is outside the {lo:g}..{hi:g} a receiver records at",
            fix="give the rate in samples per second (Hz)",
        )
    from datetime import datetime

    captures = handle.get_captures()
    stamps = []
    for capture in captures:
        text = capture.get("core:datetime")
        if not isinstance(text, str):
            return
        try:
            stamps.append(datetime.fromisoformat(text.replace("Z", "+00:00")))
        except ValueError:
            raise InputError(
                "core:datetime",
                f"{meta.name}: {text!r} is not an ISO 8601 time",
                fix="write e.g. 2026-12-05T09:00:00.000Z",
            ) from None
    starts = [int(c.get("core:sample_start", 0)) for c in captures]
    for i in range(len(captures) - 1):
        between_s = (stamps[i + 1] - stamps[i]).total_seconds()
        held_s = (starts[i + 1] - starts[i]) / rate
        if held_s > between_s * (1 + 1e-6) + 1e-3:  # 1 ms: stamps are often rounded to it
            raise InputError(
                "core:sample_rate",
                f"{meta.name}: at {rate:g} samples/s capture {i} would last {held_s:.6g} s, but "
                f"the next one starts {between_s:.6g} s later (core:datetime): the rate is too "
                "low for the recording's length",
                fix="check the rate the receiver really ran at (e.g. complex pairs vs "
                "real samples, the rate before decimation)",
            )


def _ranges_of(meta: Path, handle: Any) -> list[RecordedRange]:
    captures = handle.get_captures()
    total = int(handle.sample_count)
    starts = [int(c.get("core:sample_start", 0)) for c in captures] + [total]
    out = []
    for ann in handle.get_annotations():
        connection = ann.get(KEY_CONNECTION)
        state = ann.get(KEY_STATE, "cold")
        if connection is None:
            continue
        if connection not in CONNECTIONS or state not in STATES:
            raise InputError(
                KEY_CONNECTION if connection not in CONNECTIONS else KEY_STATE,
                f"{meta.name}: {connection!r}/{state!r} is not one of {CONNECTIONS} / {STATES}",
            )
        start = int(ann["core:sample_start"])
        count = int(ann.get("core:sample_count", total - start))
        # the capture this range lies in gives the centre; a range may not straddle captures
        idx = max(i for i, s in enumerate(starts[:-1]) if s <= start)
        if start + count > starts[idx + 1]:
            raise InputError(
                "core:sample_count",
                f"{meta.name}: annotation at {start} runs past its capture",
                fix="split it at the capture boundary",
            )
        freq = captures[idx].get("core:frequency")
        if not isinstance(freq, (int, float)) or not math.isfinite(freq) or freq <= 0:
            raise InputError(
                "core:frequency", f"{meta.name}: capture {idx} has no centre frequency"
            )
        out.append(RecordedRange(meta, start, count, float(freq), connection, state, handle=handle))
    return out


class RecordedNoiseSource(NoiseSource):
    """The noise source of a recorded bench: switching it selects hot or cold recordings."""

    def __init__(self, state: BenchState, cold_temperature_k: float | None, label: str) -> None:
        super().__init__()
        self._state = state
        self._cold_k = cold_temperature_k
        self._label = label

    @property
    def identity(self) -> str:
        return f"noisebench,recorded noise source,{self._label},0"

    def set_hot(self, hot: bool) -> None:
        self._state.hot = bool(hot)

    @property
    def is_hot(self) -> bool:
        return self._state.hot

    @property
    def settle_time_s(self) -> float:
        return 0.0

    @property
    def cold_temperature_k(self) -> float | None:
        return self._cold_k

    def close(self) -> None:
        self._state.hot = False


# --------------------------------------------------------------------------- writing


def write_recording(
    path: str | Path,
    blocks: Iterable[tuple[SampleBlock, str, str]],
    *,
    datatype: str = "cf32_le",
    scale: ScaleCalibration | None = None,
    cold_temperature_k: float | None = None,
    usable_fraction: float | None = None,
    description: str = "",
) -> Path:
    """Write ``(block, connection, state)`` blocks as one SigMF recording at ``path`` (no
    suffix). All blocks share a sample rate; each block becomes a capture (its centre) with one
    annotation (connection, state). ``datatype``: ``cf32_le`` or ``ci16_le`` (complex),
    ``rf32_le`` (real). Returns the meta file's path."""
    sigmffile = _sigmf()
    base = Path(path)
    items = list(blocks)
    if not items:
        raise InputError("blocks", "nothing to write")
    rate = items[0][0].sample_rate_hz
    data_path = base.with_name(base.name + DATA_SUFFIX)
    chunks = []
    for block, connection, state in items:
        if block.sample_rate_hz != rate:
            raise InputError("blocks", "all blocks of one recording need one sample rate")
        if connection not in CONNECTIONS or state not in STATES:
            raise InputError(
                "connection", f"{connection!r}/{state!r} not in {CONNECTIONS}/{STATES}"
            )
        chunks.append(_encode(block.samples, datatype))
    with open(data_path, "wb") as fh:
        for chunk in chunks:
            fh.write(chunk.tobytes())
    global_info: dict[str, Any] = {
        "core:datatype": datatype,
        "core:sample_rate": float(rate),
        "core:description": description or "noisebench hot/cold recording",
        "core:recorder": "noisebench",
        "core:extensions": [dict(EXTENSION)],
    }
    if scale is not None:
        global_info[KEY_SCALE] = scale.model_dump(mode="json")
    if cold_temperature_k is not None:
        global_info[KEY_COLD_K] = float(cold_temperature_k)
    if usable_fraction is not None:
        global_info[KEY_USABLE] = float(usable_fraction)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        meta = sigmffile.SigMFFile(data_file=str(data_path), global_info=global_info)
        start = 0
        for block, connection, state in items:
            n = block.samples.size
            meta.add_capture(start, metadata={"core:frequency": float(block.center_hz)})
            meta.add_annotation(start, n, metadata={KEY_CONNECTION: connection, KEY_STATE: state})
            start += n
        meta_path = base.with_name(base.name + META_SUFFIX)
        meta.tofile(str(meta_path), overwrite=True)
    return meta_path


def _encode(samples: np.ndarray, datatype: str) -> np.ndarray:
    x = np.asarray(samples)
    if datatype == "cf32_le":
        return x.astype("<c8")
    if datatype == "ci16_le":
        rails = np.stack([x.real, x.imag], axis=1).ravel()
        return np.clip(np.round(rails * 32768.0), -32768, 32767).astype("<i2")
    if datatype == "rf32_le":
        if np.iscomplexobj(x):
            raise InputError("datatype", "rf32_le holds real samples; the blocks are complex")
        return x.astype("<f4")
    raise InputError(
        "datatype", f"{datatype!r} is not written here", fix="use cf32_le, ci16_le or rf32_le"
    )
