"""The simulated sampled receiver: sample blocks with the simulated bench's physics.

:class:`SimSampleReceiver` implements the sample-source protocol of
:mod:`noisebench.sampled.source` on a :class:`~noisebench.sims.bench.SimulatedBench`: what the
receiver input sees (DUT, noise source, cables, mismatch, spurs and interference, the generator's
tone) comes from the bench's own models (``spectrum_at_analyzer``); the receiver adds its own
noise (``nf_db``), an anti-alias filter, an LO leakage offset, IQ gain/phase imbalance and a
converter that clips at full scale.

Synthesis, written independently of the Welch code under test: Gaussian noise with the wanted
density ``S(f)`` (W/Hz) is drawn in the frequency domain of the whole capture (``E|X_k|^2 =
S(f_k) fs N`` for complex baseband, so that ``mean |x|^2 = integral S df``) and transformed back
with one inverse FFT; the noise source's excess noise is a second, independent process whose
amplitude follows ``sqrt(hot fraction)`` in time, so captures during settling are wrong as on a
bench. Tones are complex exponentials. The IQ imbalance is applied to the rails
(``Q' = g (Q cos phi + I sin phi)``) and the result renormalised to the wanted-signal gain, so
the declared scale stays right. Everything random comes from the seed.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from noisebench.errors import InputError
from noisebench.sampled.source import CaptureRequest, SampleBlock, SourceInfo
from noisebench.sims.models import BOLTZMANN_J_PER_K, te_from_nf_db


@dataclass(frozen=True)
class ReceiverSpec:
    """The simulated receiver. Every number is invented for the demo.

    ``full_scale_dbm``: power at the receiver input of a signal at mean |x|^2 = 1.
    ``antialias_cutoff`` (fraction of fs) and ``antialias_order``: Butterworth magnitude
    ``1 / (1 + (f / fc)^(2 n))``. ``dc_offset_dbfs``: LO leakage line at the centre.
    ``iq_gain_db`` / ``iq_phase_deg``: rail mismatch. ``bits``: converter resolution (None:
    no quantisation).
    """

    sample_rate_hz: float = 2e6
    complex_samples: bool = True
    nf_db: float = 6.0
    full_scale_dbm: float = -45.0
    scale_error_db: float = 0.0
    antialias_cutoff: float = 0.46
    antialias_order: int = 16
    usable_fraction: float = 0.7
    dc_offset_dbfs: float | None = -45.0
    iq_gain_db: float = 0.3
    iq_phase_deg: float = 2.0
    bits: int | None = None
    identity: str = "noisebench,simulated sampled receiver,DEMO-RX-0001,0.1"

    @property
    def scale_w_per_fs2(self) -> float:
        """The scale the receiver declares (W per full-scale unit squared)."""
        return 1e-3 * 10 ** (self.full_scale_dbm / 10)

    def te_k(self) -> float:
        return float(te_from_nf_db(self.nf_db))

    def antialias_power(self, offset_hz: np.ndarray) -> np.ndarray:
        fc = self.antialias_cutoff * self.sample_rate_hz
        return 1.0 / (1.0 + (np.abs(offset_hz) / fc) ** (2 * self.antialias_order))

    def image_coefficients(self) -> tuple[complex, complex]:
        """(mu, nu) of the rails' mismatch: x' = mu x + nu conj(x)."""
        g = 10 ** (self.iq_gain_db / 20)
        phi = math.radians(self.iq_phase_deg)
        # I' = I, Q' = g (Q cos phi + I sin phi); with I = (x + x*)/2, Q = (x - x*)/(2j):
        # x' = x (1 + g e^{j phi}) / 2 + x* (1 - g e^{-j phi}) / 2
        mu = 0.5 * (1 + g * complex(math.cos(phi), math.sin(phi)))
        nu = 0.5 * (1 - g * complex(math.cos(phi), -math.sin(phi)))
        return mu, nu


class SimSampleReceiver:
    """A sample source (tunable, live) on a simulated bench; see the module docstring."""

    def __init__(self, bench, spec: ReceiverSpec | None = None, *, seed: int = 0) -> None:
        from noisebench.sims.bench import _AnalyzerConnector

        self.bench = bench
        self.spec = spec or ReceiverSpec()
        self._input = _AnalyzerConnector(bench)
        self._rng = np.random.default_rng(np.random.SeedSequence([int(seed), 16]))
        self.info = SourceInfo(
            identity=self.spec.identity,
            sample_rate_hz=self.spec.sample_rate_hz,
            tunable=True,
            complex_samples=self.spec.complex_samples,
            scale_known=True,
            full_scale_dbm=self.spec.full_scale_dbm,
            usable_fraction=self.spec.usable_fraction,
        )

    def close(self) -> None:
        """Nothing to release (the bench's own close puts the source and generator off)."""

    # ------------------------------------------------------------------ synthesis

    def _offsets(self, n: int) -> np.ndarray:
        fs = self.spec.sample_rate_hz
        if self.spec.complex_samples:
            return np.fft.fftfreq(n, 1.0 / fs)
        return np.fft.rfftfreq(n, 1.0 / fs)

    def _rf(self, center_hz: float, offsets: np.ndarray) -> np.ndarray:
        fs = self.spec.sample_rate_hz
        return center_hz + offsets - (0.0 if self.spec.complex_samples else fs / 4)

    def _noise(self, density_fs2_per_hz: np.ndarray, n: int) -> np.ndarray:
        """Gaussian noise of ``n`` samples with the given density on the FFT grid."""
        fs = self.spec.sample_rate_hz
        rng = self._rng
        if self.spec.complex_samples:
            amp = np.sqrt(density_fs2_per_hz * fs * n / 2.0)
            spec = amp * (rng.standard_normal(n) + 1j * rng.standard_normal(n))
            return np.fft.ifft(spec)
        m = density_fs2_per_hz.size
        amp = np.sqrt(density_fs2_per_hz * fs * n / 4.0)
        spec = amp * (rng.standard_normal(m) + 1j * rng.standard_normal(m))
        spec[0] = spec[0].real * math.sqrt(2.0)
        if n % 2 == 0:
            spec[-1] = spec[-1].real * math.sqrt(2.0)
        return np.fft.irfft(spec, n)

    def capture(self, request: CaptureRequest) -> SampleBlock:
        sp = self.spec
        fs = sp.sample_rate_hz
        if abs(request.sample_rate_hz - fs) > 1e-9 * fs:
            raise InputError(
                "sample_rate_hz", f"the simulated receiver runs at {fs:g} samples/s only"
            )
        n = int(request.samples)
        lowest = request.center_hz - (fs / 2 if sp.complex_samples else fs / 4)
        if lowest <= 0:
            raise InputError(
                "center_hz",
                f"{request.center_hz:g} Hz is too low for {fs:g} samples/s",
                fix="tune higher",
            )
        clock = self.bench.clock
        t0 = clock.now_s
        duration = n / fs
        offsets = self._offsets(n)
        rf = self._rf(request.center_hz, offsets)
        seen = self._input.spectrum(rf)
        true_scale = sp.scale_w_per_fs2 * 10 ** (sp.scale_error_db / 10)
        shape = sp.antialias_power(offsets - (0.0 if sp.complex_samples else fs / 4))
        base = BOLTZMANN_J_PER_K * (seen.base_k + sp.te_k()) * shape / true_scale
        excess = BOLTZMANN_J_PER_K * seen.excess_k * shape / true_scale
        x = self._noise(base, n)
        steady = self._input.steady_hot_fraction(t0, t0 + duration)
        if steady is None:
            times = t0 + np.arange(n) / fs
            hot = np.clip(self._input.hot_fraction(times), 0.0, 1.0)
        else:
            hot = steady
        if np.any(np.asarray(hot) > 0):
            x = x + np.sqrt(hot) * self._noise(excess, n)
        t = np.arange(n) / fs
        for f_tone, p_w in seen.tones:
            off = f_tone - request.center_hz + (0.0 if sp.complex_samples else fs / 4)
            inside = abs(off) < fs / 2 if sp.complex_samples else 0 < off < fs / 2
            if not inside:
                continue
            centre_off = off - (0.0 if sp.complex_samples else fs / 4)
            p_fs = p_w * float(sp.antialias_power(np.array([centre_off]))[0]) / true_scale
            phase = self._rng.uniform(0, 2 * math.pi)
            if sp.complex_samples:
                x = x + math.sqrt(p_fs) * np.exp(1j * (2 * math.pi * off * t + phase))
            else:
                x = x + math.sqrt(2 * p_fs) * np.cos(2 * math.pi * off * t + phase)
        if sp.complex_samples:
            x = self._impair(x)
        x = self._convert(x)
        clock.advance(duration)
        state = "hot" if self.bench.noise_source.is_hot else "cold"
        return SampleBlock(
            samples=x,
            sample_rate_hz=fs,
            center_hz=request.center_hz,
            scale_w_per_fs2=sp.scale_w_per_fs2,
            time_s=t0,
            full_scale=1.0,
            label=f"sim {self.bench.path.value} {state}",
        )

    def _impair(self, x: np.ndarray) -> np.ndarray:
        sp = self.spec
        if sp.dc_offset_dbfs is not None:
            x = x + 10 ** (sp.dc_offset_dbfs / 20) * np.exp(1j * 0.7)
        g = 10 ** (sp.iq_gain_db / 20)
        phi = math.radians(sp.iq_phase_deg)
        i, q = x.real, x.imag
        q2 = g * (q * math.cos(phi) + i * math.sin(phi))
        mu, _ = sp.image_coefficients()
        return (i + 1j * q2) / mu

    def _convert(self, x: np.ndarray) -> np.ndarray:
        bits = self.spec.bits
        if np.iscomplexobj(x):
            re, im = np.clip(x.real, -1, 1), np.clip(x.imag, -1, 1)
            if bits is not None:
                step = 2.0 ** (1 - bits)
                re, im = np.round(re / step) * step, np.round(im / step) * step
            return re + 1j * im
        out = np.clip(x, -1, 1)
        if bits is not None:
            step = 2.0 ** (1 - bits)
            out = np.round(out / step) * step
        return out


# --------------------------------------------------------------------------- recording


def calibrate_tone_scale(
    receiver: SimSampleReceiver,
    freq_hz: float,
    level_dbm: float,
    samples: int = 1 << 18,
    u_level_db: float | None = 0.1,
):
    """Measure the receiver's scale with the bench generator, as an operator would: the tone goes
    through the THROUGH path, and its power at the receiver input is the generator level less
    the output cable's loss (the bench's own value, as an operator reads it from the cable's
    data). ``u_level_db``: the generator's level accuracy the operator states (an invented demo
    value by default). Returns a :class:`~noisebench.sampled.scale.ScaleCalibration`."""
    from noisebench.sampled.scale import scale_from_tone
    from noisebench.sims.bench import Path as SimPath

    bench = receiver.bench
    previous = bench.path
    bench.set_path(SimPath.THROUGH)
    bench.noise_source.set_hot(False)
    offset = 0.1 * receiver.spec.sample_rate_hz
    try:
        bench.generator.set_cw(freq_hz, level_dbm)
        bench.generator.set_output(True)
        block = receiver.capture(
            CaptureRequest(freq_hz - offset, 0.0, receiver.spec.sample_rate_hz, samples)
        )
    finally:
        bench.generator.set_output(False)
        bench.set_path(previous)
    loss_db = float(bench.truth(freq_hz)["output_loss_db"][0])
    cal = scale_from_tone(
        block,
        freq_hz,
        level_dbm - loss_db,
        u_level_db=u_level_db,
        reference=f"generator {level_dbm:g} dBm at {freq_hz:.9g} Hz less {loss_db:.3f} dB cable",
    )
    return cal.model_copy(update={"source_identity": receiver.info.identity})


def record_sigmf(
    receiver: SimSampleReceiver,
    folder,
    centers_hz,
    *,
    samples_per_state: int,
    connections=("through", "dut", "termination"),
    datatype: str = "cf32_le",
    scale=None,
    settle_s: float | None = None,
) -> list:
    """Write one SigMF recording per centre frequency into ``folder``: for each connection the
    noise source cold then hot (termination: once), ``samples_per_state`` settled samples each,
    annotated with noisebench's connection / state keys (see :mod:`noisebench.sampled.sigmf_io`).
    The bench clock runs past each switch's settling before a capture starts, as a recorder
    that annotates only settled samples would. Returns the meta file paths."""
    from pathlib import Path as FsPath

    from noisebench.sampled.sigmf_io import write_recording
    from noisebench.sims.bench import Path as SimPath

    bench = receiver.bench
    out_dir = FsPath(folder)
    out_dir.mkdir(parents=True, exist_ok=True)
    source = bench.noise_source
    wait = (
        settle_s if settle_s is not None else source.settle_time_s + source.spec.transition_time_s
    )
    written = []
    fs = receiver.spec.sample_rate_hz
    for center in centers_hz:
        blocks = []
        for connection in connections:
            bench.set_path(SimPath(connection))
            states = ("cold",) if connection == "termination" else ("cold", "hot")
            for state in states:
                source.set_hot(state == "hot")
                bench.clock.advance(wait)
                block = receiver.capture(CaptureRequest(float(center), 0.0, fs, samples_per_state))
                blocks.append((block, connection, state))
        source.set_hot(False)
        name = out_dir / f"{bench.scenario.name}_{center / 1e6:.6f}MHz"
        written.append(
            write_recording(
                name,
                blocks,
                datatype=datatype,
                scale=scale,
                cold_temperature_k=source.cold_temperature_k,
                usable_fraction=receiver.spec.usable_fraction,
                description=f"simulated hot/cold recording of scenario {bench.scenario.name!r} "
                f"(seed {bench.seed}) at {center:.9g} Hz",
            )
        )
    bench.set_path(SimPath.DUT)
    return written
