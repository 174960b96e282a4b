"""Propagation of uncertainty through a measurement model: GUM and Monte Carlo.

Generic machinery, used by :mod:`noisebench.science.uncertainty` for the noise-figure budgets:

* type-B evaluation (:class:`TypeB`, :func:`standard_uncertainty_from_half_width`,
  :func:`standard_uncertainty_from_expanded`) [JCGM 100:2008 §4.3];
* a model is a vectorized callable taking one keyword array per :class:`InputQuantity`;
* :func:`propagate_gum`: sensitivities by central differences (all in one model call) and the
  law of propagation of uncertainty with correlations, ``u_c^2 = c^T V c`` [JCGM 100:2008 §5];
* :func:`propagate_monte_carlo`: M draws per input from its distribution (normal, rectangular,
  arcsine, or the exact phase-uniform mismatch form), seeded, vectorized in chunks; mean,
  standard deviation, probabilistically symmetric coverage interval; optional adaptive M
  (§7.9) and validation of the GUM interval (§8) [JCGM 101:2008].

No I/O; numpy only (scipy for the normal quantile).
"""

from __future__ import annotations

import logging
import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from enum import Enum
from typing import Any

import numpy as np
from pydantic import BaseModel, ConfigDict, Field, model_validator
from scipy.special import ndtri

from noisebench.errors import InputError, MeasurementError

logger = logging.getLogger(__name__)

__all__ = [
    "Distribution",
    "GumResult",
    "InputQuantity",
    "Model",
    "MonteCarloResult",
    "MonteCarloSettings",
    "TypeB",
    "as_type_b",
    "propagate_gum",
    "propagate_monte_carlo",
    "sample_input",
    "sensitivity_coefficients",
    "standard_uncertainty_from_expanded",
    "standard_uncertainty_from_half_width",
]

Model = Callable[..., np.ndarray]
"""A measurement model: keyword arrays (one per :attr:`InputQuantity.key`) -> output array."""


# =========================================================================== distributions


class Distribution(str, Enum):
    """Probability distribution of an input quantity (JCGM 100:2008 §4.3; JCGM 101:2008 §6.4)."""

    NORMAL = "normal"
    RECTANGULAR = "rectangular"  # uniform on [-a, a]: u = a/sqrt(3)
    U_SHAPED = "u_shaped"  # arcsine on [-a, a]: u = a/sqrt(2)


def standard_uncertainty_from_half_width(
    half_width: float, distribution: Distribution | str
) -> float:
    """Type-B standard uncertainty from the half-width ``a`` of a bounded distribution.

    Rectangular: ``a/sqrt(3)``; U-shaped (arcsine): ``a/sqrt(2)`` [JCGM 100:2008 §4.3.7, §4.3.9].
    A normal distribution has no half-width: give an expanded uncertainty and its k instead.
    """
    _finite_nonneg("half_width", half_width)
    dist = _distribution("distribution", distribution)
    if dist is Distribution.RECTANGULAR:
        return float(half_width) / math.sqrt(3.0)
    if dist is Distribution.U_SHAPED:
        return float(half_width) / math.sqrt(2.0)
    raise InputError(
        "distribution",
        "a normal distribution has no half-width",
        value=distribution,
        fix="give 'expanded' with its coverage factor 'k', or 'u' directly",
    )


def standard_uncertainty_from_expanded(expanded: float, k: float) -> float:
    """Type-B standard uncertainty ``U/k`` from a certificate's expanded uncertainty."""
    _finite_nonneg("expanded", expanded)
    if not (math.isfinite(k) and k > 0):
        raise InputError(
            "k",
            f"must be > 0 (got {k!r})",
            value=k,
            fix="use the coverage factor printed on the certificate (often 2)",
        )
    return float(expanded) / float(k)


def _distribution(field: str, value: Distribution | str) -> Distribution:
    try:
        return Distribution(value)
    except ValueError:
        names = ", ".join(d.value for d in Distribution)
        raise InputError(
            field, f"unknown distribution {value!r}", value=value, fix=f"use one of: {names}"
        ) from None


def _finite_nonneg(field: str, value: float) -> None:
    if not isinstance(value, (int, float)) or not math.isfinite(value) or value < 0:
        raise InputError(
            field,
            f"must be a finite number >= 0 (got {value!r})",
            value=value,
            fix="give a standard uncertainty or half-width as a positive number",
        )


class TypeB(BaseModel):
    """An uncertainty as a data sheet or certificate states it; exactly one of three forms.

    * ``u``: the standard uncertainty itself;
    * ``half_width``: the half-width ``a`` of a rectangular or U-shaped distribution;
    * ``expanded`` with ``k``: a certificate's expanded uncertainty (normal distribution).

    ``distribution`` shapes the Monte Carlo draws; when omitted the quantity's documented
    default applies (see :class:`UncertaintyInputs`). A bare number in a plan means ``u``.
    """

    model_config = ConfigDict(extra="forbid", allow_inf_nan=False, frozen=True)

    u: float | None = Field(default=None, ge=0)
    half_width: float | None = Field(default=None, ge=0)
    expanded: float | None = Field(default=None, ge=0)
    k: float | None = Field(default=None, gt=0)
    distribution: Distribution | None = None

    @model_validator(mode="after")
    def _one_form(self) -> TypeB:
        given = [n for n in ("u", "half_width", "expanded") if getattr(self, n) is not None]
        if len(given) != 1:
            raise ValueError(
                "give exactly one of 'u', 'half_width', or 'expanded' with 'k' "
                f"(got {', '.join(given) or 'none'})"
            )
        if (self.expanded is None) != (self.k is None):
            raise ValueError(
                "'expanded' and 'k' go together (k is the certificate's coverage factor, often 2)"
            )
        if self.half_width is not None and self.distribution is Distribution.NORMAL:
            raise ValueError("a normal distribution has no half-width: give 'expanded' and 'k'")
        if self.expanded is not None and self.distribution not in (None, Distribution.NORMAL):
            raise ValueError("an expanded uncertainty with k implies a normal distribution")
        return self

    def shape(self, default: Distribution) -> Distribution:
        """The distribution to use: as stated; rectangular for a bare half-width; else default."""
        if self.distribution is not None:
            return self.distribution
        if self.half_width is not None:
            return Distribution.RECTANGULAR
        if self.expanded is not None:
            return Distribution.NORMAL
        return default

    def standard_uncertainty(self, default: Distribution = Distribution.NORMAL) -> float:
        """Standard uncertainty in the quantity's unit (type-B conversion applied)."""
        if self.u is not None:
            return float(self.u)
        if self.half_width is not None:
            return standard_uncertainty_from_half_width(self.half_width, self.shape(default))
        assert self.expanded is not None and self.k is not None
        return standard_uncertainty_from_expanded(self.expanded, self.k)


def as_type_b(value: Any) -> Any:
    """A bare number (a standard uncertainty) becomes ``TypeB(u=value)``."""
    if isinstance(value, bool):
        return value  # let pydantic refuse it
    if isinstance(value, (int, float)):
        return {"u": value}
    return value


# =========================================================================== Monte Carlo settings


class MonteCarloSettings(BaseModel):
    """Monte Carlo propagation settings (JCGM 101:2008).

    ``trials`` is M (or the batch size when ``adaptive``); ``seed`` makes runs reproducible
    (the budgets of :mod:`noisebench.science.uncertainty` mix each point's frequency into it, so
    every
    point draws its own stream). The adaptive procedure
    (§7.9) adds batches until mean, standard deviation and both interval ends are stable to
    ``significant_digits`` of the standard uncertainty, or ``max_trials`` is reached.
    """

    model_config = ConfigDict(extra="forbid", allow_inf_nan=False)

    trials: int = Field(default=100_000, ge=1)
    seed: int = Field(default=2024, ge=0)
    coverage: float = Field(default=0.95, gt=0, lt=1)
    adaptive: bool = False
    significant_digits: int = Field(default=2, ge=1, le=4)
    max_trials: int = Field(default=2_000_000, ge=1)

    @model_validator(mode="after")
    def _enough_trials(self) -> MonteCarloSettings:
        need = _min_trials(self.coverage)
        if self.trials < need:
            raise ValueError(
                f"trials must be >= 100/(1 - coverage) = {need} for a "
                f"{self.coverage:g} coverage interval (JCGM 101:2008 §7.9)"
            )
        if self.max_trials < self.trials:
            raise ValueError("max_trials must be >= trials")
        return self


def _min_trials(coverage: float) -> int:
    return math.ceil(100.0 / (1.0 - coverage) - 1e-9)


# =========================================================================== engine


@dataclass(frozen=True)
class InputQuantity:
    """One input of a measurement model.

    ``key`` is the model's keyword; ``value`` the best estimate (deviations use 0); ``u`` the
    standard uncertainty, ``unit`` their unit; ``step`` the central-difference step (same unit).
    ``mismatch_rho`` (U-shaped mismatch only) makes the Monte Carlo draw the exact dB value
    ``20*log10|1 + rho*exp(j*phi)|`` with a uniform phase instead of a symmetric arcsine.
    """

    key: str
    name: str
    u: float
    unit: str
    step: float
    value: float = 0.0
    distribution: Distribution = Distribution.NORMAL
    mismatch_rho: float | None = None

    def __post_init__(self) -> None:
        for field in ("u", "step", "value"):
            value = getattr(self, field)
            if not math.isfinite(value):
                raise InputError(f"{self.name}.{field}", f"must be finite (got {value!r})")
        if self.u < 0:
            raise InputError(
                f"{self.name}.u",
                f"must be >= 0 (got {self.u!r})",
                fix="a standard uncertainty is never negative",
            )
        if self.step <= 0:
            raise InputError(f"{self.name}.step", f"must be > 0 (got {self.step!r})")


class GumResult(BaseModel):
    """Result of :func:`propagate_gum` (output in the model's unit, dB here)."""

    model_config = ConfigDict(frozen=True)

    value: float
    sensitivities: list[float]
    contributions: list[float]  # signed c_i * u_i
    u_combined: float


def _evaluate(model: Model, quantities: Sequence[InputQuantity], columns: np.ndarray) -> np.ndarray:
    with np.errstate(all="ignore"):
        out = model(**{q.key: columns[:, i] for i, q in enumerate(quantities)})
    return np.asarray(out, dtype=float)


def sensitivity_coefficients(
    model: Model, quantities: Sequence[InputQuantity]
) -> tuple[float, np.ndarray]:
    """``(y(x0), c)`` with ``c_i = dy/dx_i`` by central differences, in one model call."""
    _unique_keys(quantities)
    n = len(quantities)
    nominal = np.array([q.value for q in quantities], dtype=float)
    steps = np.array([q.step for q in quantities], dtype=float)
    grid = np.tile(nominal, (2 * n + 1, 1))
    rows = np.arange(n)
    grid[1 + 2 * rows, rows] += steps
    grid[2 + 2 * rows, rows] -= steps
    y = _evaluate(model, quantities, grid)
    if not np.all(np.isfinite(y)):
        bad = [
            quantities[i].name
            for i in range(n)
            if not (np.isfinite(y[1 + 2 * i]) and np.isfinite(y[2 + 2 * i]))
        ]
        where = f" (near {', '.join(bad)})" if bad and np.isfinite(y[0]) else ""
        raise MeasurementError(
            "the measurement model has no finite value at the best "
            f"estimates{where} (for a noise figure: Y <= 1, or the DUT "
            "reading not above the floor)"
        )
    c = (y[1::2] - y[2::2]) / (2.0 * steps)
    return float(y[0]), c


def _unique_keys(quantities: Sequence[InputQuantity]) -> None:
    keys = [q.key for q in quantities]
    if len(set(keys)) != len(keys):
        raise InputError(
            "quantities",
            f"duplicate model keys in {keys}",
            fix="give every input quantity its own key",
        )


def _correlation_matrix(
    quantities: Sequence[InputQuantity], correlation: Mapping[tuple[str, str], float] | None
) -> np.ndarray:
    n = len(quantities)
    r = np.eye(n)
    if not correlation:
        return r
    index = {q.key: i for i, q in enumerate(quantities)}
    for (a, b), rho in correlation.items():
        if a not in index or b not in index or a == b:
            raise InputError(
                "correlation",
                f"pair ({a!r}, {b!r}) does not name two inputs",
                fix=f"use keys from {sorted(index)}",
            )
        if not (math.isfinite(rho) and -1.0 <= rho <= 1.0):
            raise InputError("correlation", f"r({a}, {b}) = {rho!r} is outside [-1, 1]")
        r[index[a], index[b]] = r[index[b], index[a]] = rho
    if np.linalg.eigvalsh(r).min() < -1e-12:
        raise InputError(
            "correlation",
            "the correlation matrix is not positive semi-definite",
            fix="check the correlation coefficients for consistency",
        )
    return r


def propagate_gum(
    model: Model,
    quantities: Sequence[InputQuantity],
    *,
    correlation: Mapping[tuple[str, str], float] | None = None,
) -> GumResult:
    """Law of propagation of uncertainty, ``u_c^2 = c^T V c`` with V = D R D [JCGM 100:2008 §5].

    ``correlation`` maps key pairs to correlation coefficients r(x_i, x_j) (§5.2.2).
    """
    value, c = sensitivity_coefficients(model, quantities)
    u = np.array([q.u for q in quantities], dtype=float)
    r = _correlation_matrix(quantities, correlation)
    cu = c * u
    variance = float(cu @ r @ cu)
    return GumResult(
        value=value,
        sensitivities=c.tolist(),
        contributions=cu.tolist(),
        u_combined=math.sqrt(max(variance, 0.0)),
    )


def sample_input(quantity: InputQuantity, rng: np.random.Generator, size: int) -> np.ndarray:
    """``size`` draws of one input from its distribution (JCGM 101:2008 §6.4)."""
    q = quantity
    if q.distribution is Distribution.NORMAL:
        return q.value + q.u * rng.standard_normal(size)
    if q.distribution is Distribution.RECTANGULAR:
        return q.value + q.u * math.sqrt(3.0) * rng.uniform(-1.0, 1.0, size)
    phase = rng.uniform(0.0, 2.0 * math.pi, size)
    if q.mismatch_rho is not None:
        rho = q.mismatch_rho
        return q.value + 10.0 * np.log10(1.0 + rho * rho + 2.0 * rho * np.cos(phase))
    return q.value + q.u * math.sqrt(2.0) * np.cos(phase)


def _draw(
    quantities: Sequence[InputQuantity], r: np.ndarray, rng: np.random.Generator, size: int
) -> np.ndarray:
    columns = np.empty((size, len(quantities)))
    for i, q in enumerate(quantities):
        columns[:, i] = sample_input(q, rng, size)
    correlated = np.flatnonzero(np.any(np.abs(r - np.eye(len(quantities))) > 0, axis=1))
    if correlated.size:
        normal = [quantities[int(i)].distribution is Distribution.NORMAL for i in correlated]
        if not all(normal):
            raise InputError(
                "correlation",
                "Monte Carlo correlation is supported between normally distributed inputs only",
                fix="make the correlated inputs normal, or use the GUM method",
            )
        sub = r[np.ix_(correlated, correlated)]
        w, v = np.linalg.eigh(sub)
        root = v * np.sqrt(np.clip(w, 0.0, None))
        u = np.array([quantities[int(i)].u for i in correlated])
        nominal = np.array([quantities[int(i)].value for i in correlated])
        z = (columns[:, correlated] - nominal) / np.where(u > 0, u, 1.0)
        columns[:, correlated] = nominal + (z @ root.T) * u
    return columns


class MonteCarloResult(BaseModel):
    """Summary of a Monte Carlo propagation (output unit dB) [JCGM 101:2008 §7.6-§7.9, §8]."""

    model_config = ConfigDict(frozen=True)

    trials: int
    seed: int | None
    coverage: float
    mean: float
    std: float
    interval_low: float
    interval_high: float
    adaptive: bool = False
    converged: bool | None = None
    numerical_tolerance: float | None = None
    gum_validated: bool | None = None

    @property
    def half_width(self) -> float:
        """Half the length of the coverage interval (the Monte Carlo 'expanded uncertainty')."""
        return (self.interval_high - self.interval_low) / 2.0


def _numerical_tolerance(u: float, digits: int) -> float:
    """delta = 1/2 * 10**l with u = c * 10**l and c having ``digits`` digits (JCGM 101 §7.9.2)."""
    if u <= 0:
        return 0.0
    exponent = math.floor(math.log10(u)) - (digits - 1)
    return 0.5 * 10.0**exponent


def _batch(
    model: Model,
    quantities: Sequence[InputQuantity],
    r: np.ndarray,
    rng: np.random.Generator,
    size: int,
    chunk: int = 100_000,
) -> np.ndarray:
    parts = []
    for start in range(0, size, chunk):
        columns = _draw(quantities, r, rng, min(chunk, size - start))
        parts.append(_evaluate(model, quantities, columns))
    y = np.concatenate(parts)
    bad = ~np.isfinite(y)
    if np.any(bad):
        raise MeasurementError(
            f"{bad.mean():.3%} of the Monte Carlo trials give no finite "
            "result (for a noise figure: Y close to 1 or the DUT noise near "
            "the floor for these uncertainties); the output is not defined"
        )
    return y


def _summary(y: np.ndarray, coverage: float) -> tuple[float, float, float, float]:
    low, high = np.quantile(y, [(1.0 - coverage) / 2.0, (1.0 + coverage) / 2.0])
    return float(np.mean(y)), float(np.std(y, ddof=1)), float(low), float(high)


def propagate_monte_carlo(
    model: Model,
    quantities: Sequence[InputQuantity],
    *,
    settings: MonteCarloSettings | None = None,
    correlation: Mapping[tuple[str, str], float] | None = None,
    gum: GumResult | None = None,
) -> MonteCarloResult:
    """Propagate the distributions through ``model`` [JCGM 101:2008].

    Fixed M: ``settings.trials`` draws. Adaptive (§7.9): batches of
    ``max(trials, 100/(1-p))`` until twice the standard deviation of the batch means, standard
    deviations and interval ends is within the numerical tolerance of ``significant_digits``.
    With ``gum`` the GUM interval ``y +/- k_p u_c`` is validated against it (§8).
    """
    s = settings or MonteCarloSettings()
    _unique_keys(quantities)
    r = _correlation_matrix(quantities, correlation)
    rng = np.random.default_rng(s.seed)
    if not s.adaptive:
        y = _batch(model, quantities, r, rng, s.trials)
        mean, std, low, high = _summary(y, s.coverage)
        return _mc_result(s, y.size, mean, std, low, high, None, gum)
    batch = max(s.trials, _min_trials(s.coverage))
    draws: list[np.ndarray] = []
    stats: list[tuple[float, float, float, float]] = []
    converged = False
    while sum(d.size for d in draws) + batch <= s.max_trials or not draws:
        draws.append(_batch(model, quantities, r, rng, batch))
        stats.append(_summary(draws[-1], s.coverage))
        if len(stats) < 2:
            continue
        spread = 2.0 * np.std(np.array(stats), axis=0, ddof=1) / math.sqrt(len(stats))
        u_all = float(np.std(np.concatenate(draws), ddof=1))
        if np.all(spread <= _numerical_tolerance(u_all, s.significant_digits)):
            converged = True
            break
    y = np.concatenate(draws)
    mean, std, low, high = _summary(y, s.coverage)
    if not converged:
        logger.debug(
            "adaptive Monte Carlo stopped at max_trials=%d before converging", s.max_trials
        )
    return _mc_result(s, y.size, mean, std, low, high, converged, gum)


def _mc_result(
    s: MonteCarloSettings,
    trials: int,
    mean: float,
    std: float,
    low: float,
    high: float,
    converged: bool | None,
    gum: GumResult | None,
) -> MonteCarloResult:
    delta = _numerical_tolerance(std, s.significant_digits)
    validated = None
    if gum is not None:
        k_p = float(ndtri((1.0 + s.coverage) / 2.0))
        d_low = abs(gum.value - k_p * gum.u_combined - low)
        d_high = abs(gum.value + k_p * gum.u_combined - high)
        validated = bool(d_low <= delta and d_high <= delta)
    return MonteCarloResult(
        trials=trials,
        seed=s.seed,
        coverage=s.coverage,
        mean=mean,
        std=std,
        interval_low=low,
        interval_high=high,
        adaptive=s.adaptive,
        converged=converged,
        numerical_tolerance=delta,
        gum_validated=validated,
    )
