"""Benchmark of the measurement core: point functions versus the vectorized sweep forms.

Prints, from one run on this machine: the time per point of ``gain_method_point`` and
``y_factor_point`` (with uncertainty propagation and flags), the time per point of the array
forms ``gain_method_nf_db`` / ``y_factor_sweep`` over a 10 001-point sweep, and their ratio.
Usage: ``python scripts/bench_methods.py [--points N]``.
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from noisebench.science.density import NoiseDensity
from noisebench.science.methods import (
    calibrate_point,
    gain_method_nf_db,
    gain_method_point,
    y_factor_point,
    y_factor_sweep,
)
from noisebench.science.physics import BOLTZMANN_J_PER_K as K
from noisebench.science.physics import T0_K as T0


def _synthetic(n: int) -> dict[str, np.ndarray]:
    """Densities of an invented 20 dB / 2 dB DUT on a 12 dB analyzer, ENR 15 dB, Tc 296 K."""
    rng = np.random.default_rng(1)
    te1 = T0 * (10 ** (rng.uniform(1.5, 2.5, n) / 10) - 1)
    g1 = 10 ** (rng.uniform(18, 22, n) / 10)
    te2 = T0 * (10**1.2 - 1)
    tc = 296.0
    th = T0 * 10**1.5 + tc
    return {
        "freq": np.linspace(1e9, 6e9, n),
        "hot": K * ((th + te1) * g1 + te2),
        "cold": K * ((tc + te1) * g1 + te2),
        "hot_cal": K * (th + te2) + 0 * te1,
        "cold_cal": K * (tc + te2) + 0 * te1,
        "floor": K * (tc + te2) + 0 * te1,
        "gain": g1,
        "tc": np.full(n, tc),
    }


def _per_point(func, n: int) -> float:
    t = time.perf_counter()
    for i in range(n):
        func(i)
    return (time.perf_counter() - t) / n


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--points", type=int, default=10_001)
    parser.add_argument("--loop-points", type=int, default=500)
    args = parser.parse_args(argv)
    d = _synthetic(args.points)

    def nd(key: str, i: int) -> NoiseDensity:
        return NoiseDensity(
            freq_hz=d["freq"][i], density_w_per_hz=d[key][i], u_density_w_per_hz=0.01 * d[key][i]
        )

    def y_point(i: int) -> None:
        cal = calibrate_point(nd("hot_cal", i), nd("cold_cal", i), 15.0, cold_temperature_k=296.0)
        y_factor_point(nd("hot", i), nd("cold", i), 15.0, cold_temperature_k=296.0, calibration=cal)

    def g_point(i: int) -> None:
        gain_method_point(
            nd("cold", i),
            10 * np.log10(d["gain"][i]),
            floor=nd("floor", i),
            source_temperature_k=296.0,
        )

    m = min(args.loop_points, args.points)
    y_loop, g_loop = _per_point(y_point, m), _per_point(g_point, m)
    t = time.perf_counter()
    y_factor_sweep(
        d["hot"],
        d["cold"],
        15.0,
        cold_temperature_k=296.0,
        hot_cal_w_per_hz=d["hot_cal"],
        cold_cal_w_per_hz=d["cold_cal"],
        freq_hz=d["freq"],
    )
    y_vec = (time.perf_counter() - t) / args.points
    t = time.perf_counter()
    gain_method_nf_db(d["cold"], d["gain"], n_floor_w_per_hz=d["floor"], source_temperature_k=296.0)
    g_vec = (time.perf_counter() - t) / args.points
    print(
        f"Y-factor: calibrate+point {y_loop * 1e3:.3f} ms/point, sweep of {args.points} "
        f"points {y_vec * 1e6:.3f} us/point, ratio {y_loop / y_vec:.0f}x"
    )
    print(
        f"gain method: point {g_loop * 1e3:.3f} ms/point, array of {args.points} points "
        f"{g_vec * 1e6:.3f} us/point, ratio {g_loop / g_vec:.0f}x"
    )


if __name__ == "__main__":
    main()
