"""Numerical first-order propagation: the independent check of the analytic sensitivities.

The point functions once differentiated their models this way (central differences, step 1e-6
of each input's magnitude); they now chain the hand-derived partials of docs/references.md §20.
This keeps the numerical form in the tests, where it differentiates the PUBLIC array forms
(``y_factor_sweep``, ``converter_*_sweep``, the gain-method kernels) that share no derivative
code with the point functions. Truncation error of the central difference ~ step^2 (1e-12
relative), rounding ~ eps / step (1e-10 relative, times the model's condition number).
"""

from __future__ import annotations

from collections.abc import Callable, Mapping

REL_STEP = 1e-6


def numeric_sensitivities(
    model: Callable[..., Mapping[str, float]],
    values: Mapping[str, float],
    uncertainties: Mapping[str, float],
    scales: Mapping[str, float] | None = None,
) -> dict[str, dict[str, float]]:
    """``{output: {input: d output / d input}}`` by central differences for each input named
    in ``uncertainties``, one at a time (the model is called with plain floats, so it need not
    be vectorized). Step: 1e-6 of the input's magnitude, of its uncertainty or of its
    ``scales`` entry, the largest (an input near 0, like a 0 dB rejection, still moves by
    1e-6 of its natural scale, 1 dB for a dB value)."""
    out: dict[str, dict[str, float]] = {}
    for name, u in uncertainties.items():
        x = float(values[name])
        step = REL_STEP * max(abs(x), float(u), (scales or {}).get(name, 0.0))
        if step == 0.0:
            step = REL_STEP
        up = model(**{**values, name: x + step})
        down = model(**{**values, name: x - step})
        for key in up:
            out.setdefault(key, {})[name] = (float(up[key]) - float(down[key])) / (2.0 * step)
    return out


def contributions(
    sensitivities: Mapping[str, float], uncertainties: Mapping[str, float]
) -> dict[str, float]:
    """Signed contributions ``c_i u_i`` (JCGM 100:2008 §5.1.3)."""
    return {k: sensitivities[k] * u for k, u in uncertainties.items()}
