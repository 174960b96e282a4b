"""The simulator shares no formula with the code it tests (project rule: an error must not cancel).

``noisebench/sims/`` is the truth the measurement code is checked against. These tests parse every
module of it and refuse imports of the measurement code (science, running, results, front ends,
drivers); the few imports of data models that are the bench's interface are listed below with
the reason. Where the simulator now derives a quantity itself (constants, RBW shapes, detector
bias, marker weights), it is compared with the science side here: two independent derivations
that agree, and each checked against an outside reference where one exists.
"""

from __future__ import annotations

import ast
import math
from pathlib import Path

import numpy as np
import pytest
import scipy.constants

from noisebench.bench.acquisition import (
    AcquisitionSettings,
    AveragingScale,
    Detector,
    RbwFilter,
    SweepMode,
)
from noisebench.science import filters, physics
from noisebench.science.detection import point_model_for
from noisebench.science.estimator import band_weights_hz
from noisebench.sims import models, rbw_shapes
from noisebench.sims.analyzer import cell_weights_hz, detector_mean_ratio

SIMS = Path(__file__).resolve().parents[1] / "noisebench" / "sims"

# Layers whose code the simulator is used to test: never imported by it.
FORBIDDEN = (
    "noisebench.science",
    "noisebench.running",
    "noisebench.results",
    "noisebench.frontends",
    "noisebench.drivers",
    "noisebench.sampled",
)

# (simulator module, imported module) -> why the import cannot make an error cancel.
ALLOWED = {
    ("samples.py", "noisebench.sampled.source"): (
        "the sampled back end's interface: the capture request and sample-block data types the "
        "simulated receiver must accept and return"
    ),
    ("address.py", "noisebench.sampled.address"): (
        "the option names of a sampled-receiver address, so a simulated address takes the same "
        "options as a real one (parsing, no physics)"
    ),
    ("samples.py", "noisebench.sampled.sigmf_io"): (
        "writes the simulated samples as SigMF files (a file format, no physics)"
    ),
    ("samples.py", "noisebench.sampled.scale"): (
        "calibrate_tone_scale plays the operator: it runs the code under test on simulated "
        "samples; the tests compare what it finds with the simulator's own truth"
    ),
}

# Formula-bearing members of the shared acquisition data model (they evaluate science/filters.py):
# the simulator uses its own forms in sims/rbw_shapes.py instead.
FILTER_FORMULAS = {"enbw_hz", "enbw_ratio", "stat_bw_hz", "stat_bw_ratio", "power_response"}


def _sim_modules() -> list[Path]:
    return sorted(SIMS.rglob("*.py"))


def _imported_modules(path: Path) -> list[tuple[int, str]]:
    package = "noisebench.sims" if path.parent == SIMS else None
    found = []
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.ImportFrom):
            module = node.module or ""
            if node.level:  # relative: resolve against noisebench.sims
                assert package is not None, f"{path}: relative import outside sims/"
                base = package.rsplit(".", node.level - 1)[0]
                module = f"{base}.{module}" if module else base
            found.append((node.lineno, module))
        elif isinstance(node, ast.Import):
            found.extend((node.lineno, alias.name) for alias in node.names)
    return found


@pytest.mark.parametrize("path", _sim_modules(), ids=lambda p: p.name)
def test_simulator_module_imports_no_code_under_test(path):
    bad = [
        f"line {line}: imports {module}"
        for line, module in _imported_modules(path)
        if module.startswith(FORBIDDEN)
        and not any(
            path.name == name and (module == allowed or module.startswith(allowed + "."))
            for name, allowed in ALLOWED
        )
    ]
    assert not bad, f"noisebench/sims/{path.name}: " + "; ".join(bad)


def test_every_listed_exception_is_still_needed():
    used = {
        (path.name, module)
        for path in _sim_modules()
        for _, module in _imported_modules(path)
        if module.startswith(FORBIDDEN)
    }
    assert set(ALLOWED) <= used, f"stale exceptions: {sorted(set(ALLOWED) - used)}"


def test_the_import_check_would_see_a_forbidden_import(tmp_path):
    probe = tmp_path / "probe.py"
    probe.write_text("def f():\n    from noisebench.science.physics import te_k_from_nf_db\n")
    assert _imported_modules(probe) == [(2, "noisebench.science.physics")]


@pytest.mark.parametrize("path", _sim_modules(), ids=lambda p: p.name)
def test_simulator_never_evaluates_the_estimators_filter_formulas(path):
    tree = ast.parse(path.read_text(encoding="utf-8"))
    bad = [
        f"line {node.lineno}: .{node.attr}"
        for node in ast.walk(tree)
        if isinstance(node, ast.Attribute)
        and node.attr in FILTER_FORMULAS
        and not (isinstance(node.value, ast.Name) and node.value.id == "rbw_shapes")
    ]
    assert not bad, f"noisebench/sims/{path.name}: " + "; ".join(bad)


# ------------------------------------------------- the two derivations agree -----------------


def test_simulator_constants_are_the_si_values():
    # reference: CODATA 2018 (scipy.constants), exact since the 2019 SI; T0 = 290 K (IEEE Std 100)
    assert models.BOLTZMANN_J_PER_K == scipy.constants.k == 1.380649e-23
    assert models.T0_K == 290.0


@pytest.mark.parametrize("nf_db", [0.1, 1.0, 3.0103, 10.0, 25.0])
def test_simulator_nf_and_te_agree_with_physics(nf_db):
    te = float(models.te_from_nf_db(nf_db))
    assert te == pytest.approx(float(physics.te_k_from_nf_db(nf_db, physics.T0_K)), rel=1e-12)
    assert float(models.nf_db_from_te(te)) == pytest.approx(nf_db, abs=1e-12)
    # reference: F = 2 (3.0103 dB) is Te = T0 (IRE 1959 definition of noise figure)
    if nf_db == 3.0103:
        assert te == pytest.approx(290.0, rel=1e-4)


FILTERS = [
    RbwFilter(kind="gaussian"),
    RbwFilter(kind="synchronous", poles=1),
    RbwFilter(kind="synchronous", poles=4),
    RbwFilter(kind="synchronous", poles=5),
    RbwFilter(kind="fft", window="hann"),
    RbwFilter(kind="fft", window="flattop"),
    RbwFilter(kind="fft", window="blackmanharris"),
]


@pytest.mark.parametrize("filt", FILTERS, ids=lambda f: f"{f.kind.value}-{f.poles or f.window}")
def test_simulator_rbw_shapes_agree_with_the_estimators(filt):
    # numerical integration (sims) vs closed forms / padded-FFT interpolation (science); the
    # science side's window B3 is interpolated on a 1/64-bin grid, hence 2e-5 for FFT windows
    tol = 2e-5 if filt.kind.value == "fft" else 1e-9
    assert rbw_shapes.enbw_ratio(filt) == pytest.approx(filters.enbw_ratio(filt), rel=tol)
    assert rbw_shapes.stat_bw_ratio(filt) == pytest.approx(filters.stat_bw_ratio(filt), rel=tol)
    x = np.linspace(-2.0, 2.0, 41)
    assert np.allclose(rbw_shapes.power_response(filt, x), filt.power_response(x, 1.0), atol=5e-5)
    assert float(rbw_shapes.power_response(filt, 0.5)) == pytest.approx(0.5, abs=2e-5)  # B3


def test_simulator_rbw_shapes_match_published_values():
    # reference: Gaussian ENBW/B3 = sqrt(pi / (4 ln 2)) = 1.0645 (closed form of the integral);
    # Hann window ENBW = 1.5 bins, B3 = 1.44 bins (Harris 1978, Proc. IEEE 66(1), table 1)
    assert rbw_shapes.enbw_ratio(FILTERS[0]) == pytest.approx(1.0645, abs=1e-4)
    hann = FILTERS[4]
    assert rbw_shapes.window_b3_bins("hann") == pytest.approx(1.44, abs=0.005)
    enbw_bins = rbw_shapes.enbw_ratio(hann) * rbw_shapes.window_b3_bins("hann")
    assert enbw_bins == pytest.approx(1.5, rel=1e-9)
    # one pole: ENBW = (pi/2) B3 (Lorentzian integral, closed form)
    assert rbw_shapes.enbw_ratio(FILTERS[1]) == pytest.approx(math.pi / 2, rel=1e-9)


def _settings(detector, scale, averages, samples, vbw_hz=None):
    return AcquisitionSettings(
        center_hz=1e9,
        span_hz=1e6,
        rbw_hz=1e5,
        vbw_hz=vbw_hz,
        detector=detector,
        averaging_scale=scale,
        averages=averages,
        points=101,
        ref_level_dbm=-30.0,
        attenuation_db=0.0,
        preamp=False,
        mode=SweepMode.SWEPT,
        sweep_time_s=0.01,
        detector_samples=float(samples),
    )


CASES = [
    (det, scale, n, k)
    for det in (Detector.RMS, Detector.AVERAGE, Detector.SAMPLE)
    for scale in AveragingScale
    for n in (1, 4, 100)
    for k in (1, 7, 300)
    if not (det is Detector.SAMPLE and k > 1)
]


@pytest.mark.parametrize("det,scale,n,k", CASES)
def test_simulator_detector_bias_agrees_with_the_estimators(det, scale, n, k):
    s = _settings(det, scale, n, k)
    ours = detector_mean_ratio(s)
    assert ours == pytest.approx(point_model_for(s).mean_ratio(), rel=1e-9)


def test_simulator_detector_bias_matches_published_values():
    # reference: many single looks averaged on the log scale read low by 10 log10(e) * Euler's
    # gamma = 2.507 dB; on the voltage scale by 10 log10(4 / pi) = 1.049 dB (mean of a Rayleigh
    # envelope); one trace alone is unbiased (its mean is the power itself)
    for n, log_db, volt_db in ((1, 0.0, 0.0), (100_000, -2.5068, -1.0491)):
        log1 = _settings(Detector.SAMPLE, AveragingScale.LOG_POWER, n, 1)
        assert 10 * math.log10(detector_mean_ratio(log1)) == pytest.approx(log_db, abs=2e-4)
        volt1 = _settings(Detector.SAMPLE, AveragingScale.VOLTAGE, n, 1)
        assert 10 * math.log10(detector_mean_ratio(volt1)) == pytest.approx(volt_db, abs=2e-4)
    assert detector_mean_ratio(_settings(Detector.PEAK, AveragingScale.POWER, 1, 5)) is None


@pytest.mark.parametrize(
    "center,band", [(1e9, 5e4), (1e9 + 3333.0, 1.23e5), (1e9 - 4.9e5, 2e4), (1e9, 1e6)]
)
def test_simulator_marker_weights_agree_with_the_estimators(center, band):
    freq = np.linspace(1e9 - 5e5, 1e9 + 5e5, 101)
    ours = cell_weights_hz(freq, center, band)
    assert np.allclose(ours, band_weights_hz(freq, center, band), rtol=0, atol=1e-6)
    assert ours.sum() == pytest.approx(min(band, 1e6 + 1e4), rel=1e-12)  # cells cover the span
