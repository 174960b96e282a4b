"""Pure unit tests of the shared contract: error tree, acquisition models, bench safe state."""

from __future__ import annotations

import numpy as np
import pytest

from noisebench.bench.acquisition import (
    AcquisitionRequest,
    AcquisitionSettings,
    AveragingScale,
    Detector,
    Trace,
)
from noisebench.bench.instruments import Analyzer, Bench, Generator, NoiseSource
from noisebench.errors import (
    CommunicationError,
    InputError,
    InstrumentError,
    InstrumentTimeout,
    NoisebenchError,
    require_positive,
)


def _settings(**kw) -> AcquisitionSettings:
    base = dict(
        center_hz=1e9,
        span_hz=2e6,
        rbw_hz=1e5,
        detector=Detector.RMS,
        averaging_scale=AveragingScale.POWER,
        averages=10,
        points=21,
    )
    base.update(kw)
    return AcquisitionSettings(**base)


def test_error_tree_and_context():
    err = InputError("sweep.rbw_hz", "must be > 0", value=-1, fix="set a positive RBW")
    assert isinstance(err, NoisebenchError) and isinstance(err, ValueError)
    assert str(err) == "sweep.rbw_hz: must be > 0 (set a positive RBW)"
    err.add_context(freq_hz=1e9)
    assert str(err).endswith("[freq_hz=1000000000.0]")
    ie = InstrumentError(-222, "Data out of range", command="BAND 0")
    assert ie.code == -222 and "BAND 0" in str(ie)
    assert issubclass(InstrumentTimeout, CommunicationError)
    assert CommunicationError("x", visa_code=-1073807339).visa_code == -1073807339


@pytest.mark.parametrize("bad", [0.0, -1.0, float("nan"), float("inf")])
def test_require_positive_names_field(bad):
    with pytest.raises(InputError, match="gain_lin"):
        require_positive("gain_lin", bad)


def test_settings_frequencies_and_enbw():
    s = _settings()
    f = s.frequencies_hz()
    assert f[0] == pytest.approx(999e6) and f[-1] == pytest.approx(1001e6) and f.size == 21
    # Gaussian ENBW = sqrt(pi / (4 ln 2)) * B3 (docs/references.md section 6a)
    assert s.enbw_hz == pytest.approx(np.sqrt(np.pi / (4 * np.log(2))) * 1e5)
    zero = _settings(span_hz=0.0, points=5)
    assert np.all(zero.frequencies_hz() == 1e9)


def test_trace_validation_names_field():
    s = _settings(points=3)
    # pydantic wraps the InputError in a ValidationError (also a ValueError) that keeps its text
    with pytest.raises(ValueError, match="trace.values: has 2 points"):
        Trace(freq_hz=[1, 2, 3], values=[1, 2], settings=s)
    t = Trace(freq_hz=[1, 2, 3], values=[-100, -101, -102], settings=s)
    again = Trace.model_validate_json(t.model_dump_json())
    assert np.array_equal(again.values, t.values)
    assert again.settings == s


def test_request_rejects_bad_values():
    with pytest.raises(ValueError, match="rbw_hz"):
        AcquisitionRequest(center_hz=1e9, span_hz=1e6, rbw_hz=0)
    with pytest.raises(ValueError, match="extra"):
        AcquisitionRequest(center_hz=1e9, span_hz=1e6, rbw_hz=1e3, bogus=1)


def test_abstract_interfaces_fail_fast():
    for cls in (Analyzer, NoiseSource, Generator):
        with pytest.raises(TypeError):
            cls()


class _Source(NoiseSource):
    def __init__(self, fail=False):
        super().__init__()
        self.hot = True
        self.fail = fail
        self.closed = False

    identity = "test,source"

    def set_hot(self, hot):
        if self.fail:
            raise RuntimeError("relay stuck")
        self.hot = hot

    @property
    def is_hot(self):
        return self.hot

    @property
    def settle_time_s(self):
        return 0.0

    def close(self):
        self.closed = True


class _Gen(Generator):
    identity = "test,gen"

    def __init__(self):
        super().__init__()
        self.on = True

    def set_cw(self, freq_hz, level_dbm):
        pass

    def set_output(self, on):
        self.on = on

    @property
    def output_on(self):
        return self.on

    def close(self):
        self.on = False


def test_bench_safe_state_even_when_one_instrument_fails():
    class _An(Analyzer):
        identity = "test,an"
        settings = None

        def configure(self, request):
            raise NotImplementedError

        def acquire_trace(self):
            raise NotImplementedError

        def read_marker(self, freq_hz, kind, band_hz=None):
            raise NotImplementedError

        def expected_acquisition_time_s(self):
            return 0.0

        def close(self):
            pass

    src_bad, gen = _Source(fail=True), _Gen()
    bench = Bench(analyzer=_An(), noise_source=src_bad, generator=gen)
    bench.safe_state()  # must not raise although the source fails
    assert gen.on is False
    good = _Source()
    Bench(analyzer=_An(), noise_source=good).close()
    assert good.hot is False and good.closed
