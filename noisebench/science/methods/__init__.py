"""Gain-method and Y-factor noise-figure methods: NoiseDensity in, PointResult out.

``gain_method_point`` (one density with the DUT input terminated, plus the analyzer floor) and
``y_factor_point`` (hot/cold densities, plus an optional system calibration from
``calibrate_point``) are the point-level entry points; ``gain_method_te_k``/``gain_method_nf_db``
and ``y_factor_sweep``/``y_factor_nf_db`` are the vectorized array forms.
"""

from noisebench.science.methods.gain import gain_method_nf_db, gain_method_point, gain_method_te_k
from noisebench.science.methods.yfactor import (
    DEFAULT_Y_MIN_DB,
    CalibrationPoint,
    EnrReference,
    SystemCalibration,
    YFactorSweep,
    calibrate_point,
    hot_temperature_k,
    noise_factor_from_y,
    te_from_y_k,
    y_factor,
    y_factor_nf_db,
    y_factor_point,
    y_factor_sweep,
)

__all__ = [
    "DEFAULT_Y_MIN_DB",
    "CalibrationPoint",
    "EnrReference",
    "SystemCalibration",
    "YFactorSweep",
    "calibrate_point",
    "gain_method_nf_db",
    "gain_method_point",
    "gain_method_te_k",
    "hot_temperature_k",
    "noise_factor_from_y",
    "te_from_y_k",
    "y_factor",
    "y_factor_nf_db",
    "y_factor_point",
    "y_factor_sweep",
]
