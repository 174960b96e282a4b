"""Noise figure from sampled data: digitizers, SDR receivers and IQ recordings.

:class:`SampledAnalyzer` turns sample blocks into Welch density traces behind the abstract
:class:`~noisebench.bench.instruments.Analyzer`, so every method, correction, budget, report and
database feature works on it unchanged. Samples come from a :class:`SampleSource`: SigMF
recordings (:mod:`noisebench.sampled.sigmf_io`), the simulated receiver
(:mod:`noisebench.sims.samples`) or a lab's own code registered with :func:`register_source`.
"""

from noisebench.sampled.analyzer import SampledAnalyzer
from noisebench.sampled.scale import (
    ScaleCalibration,
    load_scale,
    scale_from_noise_pair,
    scale_from_tone,
)
from noisebench.sampled.source import (
    CaptureRequest,
    SampleBlock,
    SampleSource,
    SourceInfo,
    open_registered,
    register_source,
    registered_sources,
    unregister_source,
)
from noisebench.sampled.welch import SUPPORTED_WINDOWS

__all__ = [
    "SUPPORTED_WINDOWS",
    "CaptureRequest",
    "SampleBlock",
    "SampleSource",
    "SampledAnalyzer",
    "ScaleCalibration",
    "SourceInfo",
    "load_scale",
    "open_registered",
    "register_source",
    "registered_sources",
    "scale_from_noise_pair",
    "scale_from_tone",
    "unregister_source",
]
