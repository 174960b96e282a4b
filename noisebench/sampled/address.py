"""Sampled-receiver addresses in a plan's ``bench.analyzer.resource``.

``sigmf://<folder>[?options]``          a folder of SigMF hot/cold recordings
``samples://<name>[?options]``          a source registered with ``register_source(name, ...)``
``samples://<module>:<factory>[?...]``  a factory in an importable module (for ``noisebench run``)
``sim://<scenario>?seed=N&receiver=sampled[&options]``   the simulated sampled receiver

Options (all addresses): ``window`` (one of the supported windows, default ``hann``),
``overlap`` (segment overlap fraction, default the window's), ``scale`` (a scale calibration
JSON file, :mod:`noisebench.sampled.scale`), ``iq_correction`` (``on``/``off``, default on).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from urllib.parse import parse_qs, urlsplit

from noisebench.errors import InputError
from noisebench.sampled.welch import DEFAULT_WINDOW, check_window

SCHEMES = ("sigmf", "samples")
OPTIONS = ("window", "overlap", "scale", "iq_correction")


@dataclass(frozen=True)
class SampledOptions:
    """How samples become a density (the same for every kind of sampled source)."""

    window: str = DEFAULT_WINDOW
    overlap: float | None = None
    scale: str | None = None
    iq_correction: bool = True


@dataclass(frozen=True)
class SampledAddress:
    """A parsed ``sigmf://`` or ``samples://`` address."""

    scheme: str
    target: str  # folder (sigmf) or registered name / module:factory (samples)
    options: SampledOptions


def is_sampled(resource: str) -> bool:
    """True for ``sigmf://`` and ``samples://`` addresses (not the simulated receiver)."""
    return urlsplit(str(resource)).scheme in SCHEMES


def parse_options(query: dict[str, list[str]], resource: str) -> SampledOptions:
    """The sampled options of a parsed query string (unknown keys are the caller's business)."""

    def last(key: str) -> str | None:
        return query[key][-1] if key in query else None

    window = last("window")
    if window is not None:
        try:
            window = check_window(window)
        except InputError as exc:
            raise InputError("resource", f"{exc.message} in {resource!r}") from None
    overlap_text = last("overlap")
    overlap = None
    if overlap_text is not None:
        try:
            overlap = float(overlap_text)
        except ValueError:
            overlap = math.nan
        if not 0.0 <= overlap < 1.0:
            raise InputError(
                "resource",
                f"overlap {overlap_text!r} in {resource!r} is not a fraction in [0, 1)",
                fix="e.g. overlap=0.5",
            )
    iq_text = (last("iq_correction") or "on").lower()
    if iq_text not in ("on", "off"):
        raise InputError(
            "resource", f"iq_correction={iq_text!r} in {resource!r}", fix="use on or off"
        )
    return SampledOptions(
        window=window or DEFAULT_WINDOW,
        overlap=overlap,
        scale=last("scale") or None,
        iq_correction=iq_text == "on",
    )


def parse_sampled_address(resource: str) -> SampledAddress:
    """Parse ``sigmf://`` / ``samples://``; InputError naming what is wrong."""
    parts = urlsplit(str(resource))
    if parts.scheme not in SCHEMES:
        raise InputError("resource", f"{resource!r} is not a sigmf:// or samples:// address")
    target = parts.netloc + parts.path
    if parts.scheme == "samples":
        target = target.strip("/")
    if not target:
        example = "sigmf://recordings" if parts.scheme == "sigmf" else "samples://lab-sdr"
        raise InputError("resource", f"{resource!r} names nothing", fix=f"e.g. {example}")
    query = parse_qs(parts.query, keep_blank_values=True)
    unknown = sorted(set(query) - set(OPTIONS))
    if unknown:
        raise InputError(
            "resource",
            f"unknown option {unknown[0]!r} in {resource!r}",
            fix=f"options are {', '.join(OPTIONS)}",
        )
    return SampledAddress(parts.scheme, target, parse_options(query, resource))
