"""A noise density estimate: the estimator's output and the methods' input."""

from __future__ import annotations

from pydantic import BaseModel, ConfigDict, Field

from noisebench.bench.acquisition import AcquisitionSettings


class NoiseDensity(BaseModel):
    """Available noise power density at ``freq_hz`` in W/Hz with its standard uncertainty.

    ``u_density_w_per_hz`` is the statistical (type A) standard uncertainty of the estimate.
    ``independent_samples`` is the effective number of independent power samples behind it.
    ``scatter_ratio`` is the observed scatter in the trace over the scatter the statistics
    predict (about 1 for clean Gaussian noise; well above 1 means drift or interference).
    Every number must be finite (the one non-finite guard for both methods).
    """

    model_config = ConfigDict(extra="forbid", allow_inf_nan=False)

    freq_hz: float = Field(gt=0)
    density_w_per_hz: float = Field(gt=0)
    u_density_w_per_hz: float = Field(ge=0)
    independent_samples: float | None = Field(default=None, gt=0)
    band_hz: float | None = Field(default=None, ge=0)
    bins_used: int | None = Field(default=None, ge=0)
    excluded_freq_hz: list[float] = Field(default_factory=list)
    scatter_ratio: float | None = Field(default=None, ge=0)
    bias_correction_db: float = 0.0
    settings: AcquisitionSettings | None = None
    acquisition_time_s: float | None = Field(default=None, ge=0)

    @property
    def relative_u(self) -> float:
        """Relative standard uncertainty u/N (dimensionless)."""
        return self.u_density_w_per_hz / self.density_w_per_hz

    @property
    def density_dbm_per_hz(self) -> float:
        import math

        return 10.0 * math.log10(self.density_w_per_hz / 1e-3)
