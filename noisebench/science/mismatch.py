"""Mismatch between two reflection coefficients (common practice, first order) and reflection
coefficients read from Touchstone files (through scikit-rf)."""

from __future__ import annotations

import logging
import math
from functools import lru_cache
from pathlib import Path
from typing import Any

import numpy as np
from pydantic import (
    BaseModel,
    ConfigDict,
    Field,
)

from noisebench.errors import InputError
from noisebench.science.propagation import (
    Distribution,
    standard_uncertainty_from_half_width,
)
from noisebench.units import format_frequency, format_frequency_range
from noisebench.user_files import MAX_TOUCHSTONE_BYTES, check_file_size, check_row_count

logger = logging.getLogger(__name__)

# =========================================================================== mismatch


def gamma_from_vswr(vswr: float | np.ndarray) -> float | np.ndarray:
    """Reflection magnitude ``|Gamma| = (VSWR - 1)/(VSWR + 1)`` (dimensionless)."""
    arr = np.asarray(vswr, dtype=float)
    if not np.all(np.isfinite(arr)) or np.any(arr < 1):
        raise InputError(
            "vswr",
            f"must be a finite number >= 1 (got {vswr!r})",
            value=vswr,
            fix="a VSWR is 1 for a perfect match and grows with the reflection",
        )
    out = (arr - 1.0) / (arr + 1.0)
    return float(out) if out.ndim == 0 else out


def vswr_from_gamma(gamma: float | np.ndarray) -> float | np.ndarray:
    """VSWR ``(1 + |Gamma|)/(1 - |Gamma|)`` from a reflection magnitude in [0, 1)."""
    arr = _gamma_array("gamma", gamma)
    out = (1.0 + arr) / (1.0 - arr)
    return float(out) if out.ndim == 0 else out


def _gamma_array(field: str, gamma: Any) -> np.ndarray:
    arr = np.asarray(gamma, dtype=float)
    if not np.all(np.isfinite(arr)) or np.any(arr < 0) or np.any(arr >= 1):
        raise InputError(
            field,
            f"must be a reflection magnitude in [0, 1) (got {gamma!r})",
            value=gamma,
            fix="give |Gamma| (not dB); convert a VSWR with gamma_from_vswr or use the *_vswr key",
        )
    return arr


def mismatch_limits_db(gamma_source: float, gamma_load: float) -> tuple[float, float]:
    """Mismatch limits ``(20log10(1 + |Gs||Gl|), 20log10(1 - |Gs||Gl|))``, dB.

    Reference: Harris & Warner 1981 (docs/references.md §9).
    """
    rho = float(_gamma_array("gamma_source", gamma_source) * _gamma_array("gamma_load", gamma_load))
    return 20.0 * math.log10(1.0 + rho), 20.0 * math.log10(1.0 - rho)


def mismatch_standard_uncertainty_db(gamma_source: float, gamma_load: float) -> float:
    """Standard uncertainty of the mismatch term in dB: U-shaped, ``a/sqrt(2)``.

    ``a`` is half the width of the limits of :func:`mismatch_limits_db`; to first order this is
    ``DB_PER_NEPER_POWER * sqrt(2) * |Gs||Gl|`` (docs/references.md §9).
    """
    upper, lower = mismatch_limits_db(gamma_source, gamma_load)
    return standard_uncertainty_from_half_width((upper - lower) / 2.0, Distribution.U_SHAPED)


def mismatch_power_ratio_std(gamma_source: float, gamma_load: float) -> float:
    """Standard deviation of the mismatch power ratio ``|1 + Gs*Gl|**2``: ``sqrt(2)|Gs||Gl|``.

    Exact for a uniformly distributed phase: the ratio is ``1 + rho**2 + 2*rho*cos(phi)``.
    """
    rho = float(_gamma_array("gamma_source", gamma_source) * _gamma_array("gamma_load", gamma_load))
    return math.sqrt(2.0) * rho


class Reflections(BaseModel):
    """Reflection magnitudes |Gamma| (dimensionless, [0, 1)) at one frequency; None = unknown."""

    model_config = ConfigDict(extra="forbid", allow_inf_nan=False, frozen=True)

    source_hot: float | None = Field(default=None, ge=0, lt=1)
    source_cold: float | None = Field(default=None, ge=0, lt=1)
    dut_input: float | None = Field(default=None, ge=0, lt=1)
    dut_output: float | None = Field(default=None, ge=0, lt=1)
    analyzer_input: float | None = Field(default=None, ge=0, lt=1)

    @property
    def source(self) -> float | None:
        """The noise source's reflection: the larger of hot and cold (conservative)."""
        known = [g for g in (self.source_hot, self.source_cold) if g is not None]
        return max(known) if known else None


def load_reflection_file(path: str | Path, port: int = 1) -> tuple[np.ndarray, np.ndarray]:
    """``(freq_hz, |S_pp|)`` from a Touchstone file (scikit-rf); port 1 -> S11, 2 -> S22."""
    path = Path(path).expanduser()
    try:
        stat = path.stat()
    except OSError as exc:
        raise InputError(
            "touchstone",
            f"cannot read {str(path)!r}: {exc.strerror}",
            value=str(path),
            fix="check the path (relative to the plan)",
        ) from None
    check_file_size(path, MAX_TOUCHSTONE_BYTES, field="touchstone", what="Touchstone file")
    freq, mag = _load_reflection_cached(str(path.resolve()), stat.st_mtime_ns, port)
    return freq.copy(), mag.copy()


@lru_cache(maxsize=32)
def _load_reflection_cached(path: str, mtime_ns: int, port: int) -> tuple[np.ndarray, np.ndarray]:
    try:
        import skrf
    except ImportError:  # pragma: no cover - scikit-rf is installed in the dev environment
        raise InputError(
            "touchstone",
            "reading Touchstone files needs scikit-rf",
            fix="pip install scikit-rf, or give |Gamma| values instead",
        ) from None
    logger.debug("reading reflections from %s (port %d)", path, port)
    try:
        net = skrf.Network(path)
    except Exception as exc:  # noqa: BLE001 - scikit-rf raises assorted types for bad files
        raise InputError(
            "touchstone",
            f"{path}: not a readable Touchstone file ({exc})",
            value=path,
            fix="export the file as .s1p/.s2p",
        ) from None
    check_row_count(len(net.f), field="touchstone", what="Touchstone reflection table")
    if port < 1 or port > net.nports:
        raise InputError(
            "touchstone",
            f"{path} has {net.nports} port(s), no port {port}",
            value=path,
            fix="use an .s2p for the DUT, an .s1p for one-ports",
        )
    # magnitude vs frequency is interpolated directly (never the Cartesian S values)
    return np.asarray(net.f, dtype=float), np.abs(net.s[:, port - 1, port - 1]).astype(float)


def _reflection_at(path: str | Path, port: int, freq_hz: float, base_dir: Path | None) -> float:
    full = Path(path).expanduser()
    if not full.is_absolute() and base_dir is not None:
        full = base_dir / full
    freq, mag = load_reflection_file(full, port)
    if freq_hz < freq[0] or freq_hz > freq[-1]:
        raise InputError(
            "touchstone",
            f"{full}: {format_frequency(freq_hz)} is outside the file's range "
            f"{format_frequency_range(freq[0], freq[-1])}",
            value=freq_hz,
            fix="use a file that covers the sweep, or give |Gamma| directly",
        )
    value = float(np.interp(freq_hz, freq, mag))
    return float(_gamma_array(f"{full} |S{port}{port}|", value))
