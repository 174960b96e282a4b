"""Artefacts of sampled receivers: DC / LO leakage, IQ imbalance, clipping, anti-alias edges.

Pure functions on sample arrays (full-scale units).

* **DC offset / LO leakage.** A direct-conversion receiver puts a line at the centre of a
  complex capture. The constant part is removed by subtracting the capture mean; the bins
  within a guard around the centre are left out of every band (what remains of the leakage,
  its drift and the LO's phase-noise skirt), and reported like an excluded spur.
* **IQ imbalance.** With gain and phase mismatch between the rails the receiver outputs
  ``x = mu s + nu conj(s)``: every spectral component at +f leaks into -f at the image
  rejection ratio ``IRR = |mu|^2 / |nu|^2``. Receiver noise ``s`` is circular
  (``E[s^2] = 0``), so the circularity coefficient ``c = E[x^2] / E[|x|^2] = 2 beta / (1 +
  |beta|^2)`` with ``beta = nu / conj(mu)`` gives the imbalance blindly; ``y = x - beta conj(x)
  = mu (1 - |beta|^2) s`` removes it (widely linear correction; the moment relation follows
  from the model in two lines, see :func:`image_ratio`). Images of strong lines that remain are
  found by the estimator's spur search.
* **Clipping.** Samples at the converter's full scale make the spectrum wrong everywhere; a
  capture with more than :data:`MAX_CLIPPED_FRACTION` of them is refused. A capture can also
  be clipped below the declared full scale (a wrong full-scale in the metadata, a limiter or
  AGC stage ahead of the converter): its rails then pile up at one extreme value, which
  Gaussian noise never does (the largest |I| or |Q| of a capture occurs once or twice, and a
  quantised rail at 5 sigma holds a few codes' worth of a 1e-6 tail), so more than
  :data:`PILEUP_MIN_COUNT` samples (and :data:`MAX_CLIPPED_FRACTION`) sharing the extreme value
  of a rail is refused too (:func:`rail_pileup_fraction`).
* **Anti-alias roll-off.** Only the declared flat share of the sample rate is used; a band
  reaching beyond it is refused with the usable range in the message.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

#: share of samples at full scale above which a capture is refused (a few in a million can be
#: noise peaks of a correctly set receiver: Gaussian noise 4.9 sigma below full scale)
MAX_CLIPPED_FRACTION = 1e-5
#: the rail magnitude counted as clipped, relative to full scale
CLIP_LEVEL = 0.999
#: samples sharing a rail's extreme magnitude above which a capture is clipped wherever its
#: full scale is (Gaussian noise: about one; see the module docstring)
PILEUP_MIN_COUNT = 16
#: image rejection (dB) above which no IQ correction is applied (the image is negligible)
IQ_CORRECTION_ABOVE_DB = 80.0
#: the circularity |c| must exceed this many times its rms for proper noise, sqrt(2/N), before
#: a correction is applied (|c|^2 of proper noise is about exponential: false alarm e^-16)
IQ_SIGNIFICANCE = 4.0


def clipped_fraction(samples: np.ndarray, full_scale: float = 1.0) -> float:
    """Share of samples with a rail (I, Q or the real value) at or beyond full scale."""
    x = np.asarray(samples)
    limit = CLIP_LEVEL * float(full_scale)
    if np.iscomplexobj(x):
        hit = (np.abs(x.real) >= limit) | (np.abs(x.imag) >= limit)
    else:
        hit = np.abs(x) >= limit
    return float(np.count_nonzero(hit)) / max(x.size, 1)


def rail_pileup_fraction(samples: np.ndarray) -> float:
    """Share of samples whose I, Q (or real) magnitude equals that rail's largest magnitude in
    the capture, 0 when no more than :data:`PILEUP_MIN_COUNT` do (noise peaks)."""
    x = np.asarray(samples)
    rails = [x.real, x.imag] if np.iscomplexobj(x) else [x]
    worst = 0
    for rail in rails:
        magnitude = np.abs(rail)
        top = float(magnitude.max(initial=0.0))
        if top <= 0:
            continue
        worst = max(worst, int(np.count_nonzero(magnitude >= top * (1.0 - 1e-9))))
    if worst <= PILEUP_MIN_COUNT:
        return 0.0
    return worst / max(x.size, 1)


def remove_dc(samples: np.ndarray) -> tuple[np.ndarray, complex]:
    """(samples minus their mean, the mean in full-scale units)."""
    x = np.asarray(samples)
    mean = x.mean()
    return x - mean, complex(mean)


@dataclass(frozen=True)
class ImageEstimate:
    """IQ imbalance seen in a capture: ``beta = nu / conj(mu)``, image rejection in dB.

    ``significant``: the circularity exceeds what proper noise of this length shows by chance
    (:data:`IQ_SIGNIFICANCE` times its rms), so the estimate is worth correcting with."""

    beta: complex
    significant: bool = False

    @property
    def image_rejection_db(self) -> float:
        """10 log10(|mu|^2 / |nu|^2) = -20 log10|beta| (inf when perfectly balanced)."""
        b = abs(self.beta)
        return math.inf if b == 0 else -20.0 * math.log10(b)


def image_ratio(samples: np.ndarray) -> ImageEstimate:
    """Blind IQ-imbalance estimate of a noise capture from its circularity.

    ``E[x^2] = 2 mu nu E|s|^2`` and ``E|x|^2 = (|mu|^2 + |nu|^2) E|s|^2``, so
    ``c = 2 beta / (1 + |beta|^2)``; solving for ``|beta| < 1``:
    ``beta = c (1 - sqrt(1 - |c|^2)) / |c|^2``.
    """
    x = np.asarray(samples)
    if not np.iscomplexobj(x):
        return ImageEstimate(0j)
    power = float(np.mean(np.abs(x) ** 2))
    if power <= 0:
        return ImageEstimate(0j)
    c = complex(np.mean(x * x)) / power
    mag2 = abs(c) ** 2
    if mag2 == 0:
        return ImageEstimate(0j)
    significant = mag2 > IQ_SIGNIFICANCE**2 * 2.0 / x.size
    mag2 = min(mag2, 1.0)
    return ImageEstimate(c * (1.0 - math.sqrt(1.0 - mag2)) / mag2, significant)


def correct_image(samples: np.ndarray, estimate: ImageEstimate) -> np.ndarray:
    """``y = (x - beta conj(x)) / (1 - |beta|^2)``: image removed, the wanted gain |mu| kept."""
    b = estimate.beta
    if b == 0:
        return np.asarray(samples)
    x = np.asarray(samples)
    return (x - b * np.conj(x)) / (1.0 - abs(b) ** 2)


def usable_offsets_hz(sample_rate_hz: float, usable_fraction: float, complex_capture: bool):
    """(lowest, highest) usable offset from the capture centre inside the flat passband, Hz.

    Complex: +/- fraction * fs / 2 about the centre. Real: the first Nyquist zone is 0..fs/2 with
    the centre at fs/4; the usable part is +/- fraction * fs / 4 about it.
    """
    half = usable_fraction * sample_rate_hz / (2.0 if complex_capture else 4.0)
    return -half, half
