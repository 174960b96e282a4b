"""Receiver scale calibration: full-scale units to watts at the reference plane.

``scale_w_per_fs2`` is the power in W at the reference plane (the receiver's input connector, or
wherever the calibration signal was applied) of a signal whose mean ``|x|^2`` is 1 full-scale
unit squared. Two ways to measure it:

* **a known tone** (:func:`scale_from_tone`): a generator at a known level; the tone's power is
  the Welch density integrated over its main lobe, less the noise under it;
* **two known noise levels** (:func:`scale_from_noise_pair`): a noise source hot and cold (or two
  terminations at known temperatures): ``k (T_hot - T_cold)`` per Hz over the density
  difference, so the receiver's own noise cancels.

Only the gain method needs it (it reads absolute densities); the Y-factor method uses ratios of
densities read with one scale and does not. A calibration is kept as JSON
(:meth:`ScaleCalibration.save` / :func:`load_scale`) or in a SigMF recording's global metadata
(key ``noisebench:scale``), and named in a plan as ``?scale=<file>`` on the resource.
"""

from __future__ import annotations

import json
import math
from datetime import datetime, timezone
from pathlib import Path
from typing import Literal

import numpy as np
from pydantic import BaseModel, ConfigDict, Field, ValidationError
from scipy.constants import k as BOLTZMANN_J_PER_K

from noisebench.errors import InputError, MeasurementError
from noisebench.sampled import artefacts
from noisebench.sampled.source import SampleBlock
from noisebench.sampled.welch import DEFAULT_WINDOW, plan_segments, welch_density
from noisebench.units import format_frequency, format_frequency_range

#: a tone must stand this far above the noise in its integration band, dB
MIN_TONE_SNR_DB = 30.0
#: the tone's integration band, in bins either side of its frequency (covers the main lobe of
#: every supported window, flat top included)
TONE_HALF_BINS = 8


def _now() -> datetime:
    return datetime.now(timezone.utc)


class ScaleCalibration(BaseModel):
    """W per full-scale unit squared at the reference plane, with how it was found."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    scale_w_per_fs2: float = Field(gt=0, allow_inf_nan=False)
    method: Literal["tone", "noise_pair", "declared"]
    u_rel: float | None = Field(
        default=None, ge=0, description="relative standard uncertainty from the capture's noise"
    )
    u_reference_db: float | None = Field(
        default=None,
        ge=0,
        description="standard uncertainty of the reference (tone level, noise temperatures), dB",
    )
    freq_hz: float | None = Field(default=None, gt=0)
    reference: str = ""
    source_identity: str = ""
    measured_at: datetime = Field(default_factory=_now)

    @property
    def full_scale_dbm(self) -> float:
        """Power at the reference plane of a signal at mean |x|^2 = 1, dBm."""
        return 10.0 * math.log10(self.scale_w_per_fs2 / 1e-3)

    @property
    def u_db(self) -> float | None:
        """Standard uncertainty of the scale, dB: the capture's noise and the reference's, RSS
        (None when the reference's uncertainty was not given: unknown, not zero)."""
        if self.u_reference_db is None:
            return None
        noise_db = 10.0 / math.log(10.0) * (self.u_rel or 0.0)
        return math.hypot(noise_db, self.u_reference_db)

    def describe(self) -> str:
        u = f", u {self.u_db:.3f} dB" if self.u_db is not None else ", u of the reference not given"
        return f"{self.method}, 0 dBFS = {self.full_scale_dbm:.2f} dBm{u}"

    def save(self, path: str | Path) -> Path:
        out = Path(path)
        tmp = out.with_suffix(out.suffix + ".tmp")
        tmp.write_text(self.model_dump_json(indent=2) + "\n", encoding="utf-8")
        tmp.replace(out)
        return out


def load_scale(path: str | Path) -> ScaleCalibration:
    """Read a scale calibration written by :meth:`ScaleCalibration.save`."""
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8-sig")
    except OSError as exc:
        raise InputError(
            "scale", f"cannot read {str(p)!r}: {exc.strerror}", fix="check the path"
        ) from None
    try:
        return ScaleCalibration.model_validate(json.loads(text))
    except (json.JSONDecodeError, ValidationError) as exc:
        first = str(exc).splitlines()[0]
        raise InputError(
            "scale", f"{str(p)!r} is not a scale calibration: {first}", fix="re-run the calibration"
        ) from None


def _density(block: SampleBlock, rbw_hz: float, window: str):
    x = block.samples
    if block.is_complex:
        x, _ = artefacts.remove_dc(x)
    plan = plan_segments(block.sample_rate_hz, rbw_hz, 1, window=window)
    plan = plan.with_segments(max(1, plan.segments_in(x.size)))
    offsets, psd, _ = welch_density(x, plan)
    rf = block.center_hz + offsets - (0.0 if block.is_complex else block.sample_rate_hz / 4)
    return plan, rf, psd


def scale_from_tone(
    block: SampleBlock,
    tone_freq_hz: float,
    tone_power_dbm: float,
    *,
    rbw_hz: float | None = None,
    window: str = DEFAULT_WINDOW,
    reference: str = "",
    u_level_db: float | None = None,
) -> ScaleCalibration:
    """Scale from a capture of a tone of known power (dBm at the reference plane; its standard
    uncertainty ``u_level_db``, e.g. the generator's level accuracy, goes with the scale)."""
    fs = block.sample_rate_hz
    rbw = rbw_hz if rbw_hz is not None else fs / 1024
    plan, rf, psd = _density(block, rbw, window)
    k = int(np.argmin(np.abs(rf - tone_freq_hz)))
    if abs(rf[k] - tone_freq_hz) > plan.bin_hz:
        raise InputError(
            "tone_freq_hz",
            f"{format_frequency(tone_freq_hz, 9)} is outside the capture "
            f"({format_frequency_range(rf[0], rf[-1], 9)})",
            fix="tune the receiver to the tone",
        )
    lo, hi = max(0, k - TONE_HALF_BINS), min(psd.size, k + TONE_HALF_BINS + 1)
    floor = float(np.median(np.delete(psd, np.arange(lo, hi))))
    band = psd[lo:hi]
    tone_fs2 = float(np.sum(band - floor) * plan.bin_hz)
    noise_fs2 = floor * plan.bin_hz * band.size
    if tone_fs2 <= 0 or 10 * math.log10(tone_fs2 / max(noise_fs2, 1e-300)) < MIN_TONE_SNR_DB:
        raise MeasurementError(
            f"the tone at {format_frequency(tone_freq_hz, 9)} is less than {MIN_TONE_SNR_DB:g} dB "
            "above the "
            "noise in its band",
            fix="raise the generator level (staying below the receiver's full scale)",
        )
    p_w = 1e-3 * 10 ** (tone_power_dbm / 10)
    # noise in the band scatters the tone estimate: relative u ~ sqrt(noise/tone / K_eff)
    u_rel = math.sqrt(noise_fs2 / tone_fs2 / max(plan.equivalent_samples, 1.0))
    return ScaleCalibration(
        scale_w_per_fs2=p_w / tone_fs2,
        method="tone",
        u_rel=u_rel,
        u_reference_db=u_level_db,
        freq_hz=float(tone_freq_hz),
        reference=reference
        or f"tone {tone_power_dbm:g} dBm at {format_frequency(tone_freq_hz, 9)}",
    )


def scale_from_noise_pair(
    hot: SampleBlock,
    cold: SampleBlock,
    hot_k: float,
    cold_k: float,
    *,
    rbw_hz: float | None = None,
    window: str = DEFAULT_WINDOW,
    usable_fraction: float = 0.8,
    reference: str = "",
    u_temperature_k: float | None = None,
) -> ScaleCalibration:
    """Scale from two captures of known noise temperatures (K, available at the reference plane).

    ``scale = k (T_hot - T_cold) / (D_hot - D_cold)`` with ``D`` the mean Welch density over the
    usable band (LO guard excluded), full-scale^2/Hz. ``u_temperature_k``: standard uncertainty
    of the temperature difference, K (goes with the scale).
    """
    if not hot_k > cold_k:
        raise InputError("hot_k", f"must exceed cold_k ({hot_k!r} <= {cold_k!r})")
    fs = hot.sample_rate_hz
    rbw = rbw_hz if rbw_hz is not None else fs / 256
    plan, rf_h, d_h = _density(hot, rbw, window)
    _, rf_c, d_c = _density(cold, rbw, window)
    if rf_h.shape != rf_c.shape or not np.allclose(rf_h, rf_c):
        raise InputError("cold", "hot and cold captures must share centre and sample rate")
    lo, hi = artefacts.usable_offsets_hz(fs, usable_fraction, hot.is_complex)
    off = rf_h - hot.center_hz + (0.0 if hot.is_complex else 0.0)
    use = (off >= lo) & (off <= hi)
    if hot.is_complex:
        use &= np.abs(off) > 4 * plan.bin_hz
    n = int(np.count_nonzero(use))
    diff = float(np.mean(d_h[use]) - np.mean(d_c[use]))
    if diff <= 0:
        raise MeasurementError("the hot capture is not above the cold one: no scale")
    # u: each mean over n roughly independent bins of K_eff samples
    k_eff = plan.equivalent_samples
    u_abs = math.sqrt((np.mean(d_h[use]) ** 2 + np.mean(d_c[use]) ** 2) / (n * k_eff))
    return ScaleCalibration(
        scale_w_per_fs2=BOLTZMANN_J_PER_K * (hot_k - cold_k) / diff,
        method="noise_pair",
        u_rel=u_abs / diff,
        u_reference_db=(
            None
            if u_temperature_k is None
            else 10.0 / math.log(10.0) * u_temperature_k / (hot_k - cold_k)
        ),
        freq_hz=float(hot.center_hz),
        reference=reference or f"noise {hot_k:.1f} K / {cold_k:.1f} K",
    )
