"""Plans for frequency-converting DUTs: the ``[conversion]`` section, its checks, the per-point
frequency plan and the LO control.

A conversion plan measures at the IF (the analyzer's frequency) and reports at the RF. The
sweep section lists RF frequencies in the ``fixed_lo`` and ``fixed_if`` modes; ``triples``
lists (RF, LO, IF) itself. Key names (ours)::

    [conversion]
    mode = "fixed_if"            # fixed_lo | fixed_if | triples
    if_hz = 400e6                # fixed_if; lo_hz = ... for fixed_lo
    sideband = "upper"           # RF above the LO ("upper") or below ("lower")
    nf_type = "ssb"              # ssb | dsb: which figure nf_db holds (both are stored)
    image_rejection_db = 14.0    # or "none", "equal", or a CSV of freq_hz,image_rejection_db (RF)
    u_image_rejection_db = 0.5
    lo_leakage_dbm = -30         # expected LO line at the IF port (power guard)
    lo_harmonics = 3             # LO, 2 LO, 3 LO are excluded as known lines
    lo = { source = "generator", level_dbm = 10, settle_time_s = 0.05 }

The LO generator is the bench's ``lo`` role (``[bench] lo = { resource = ... }``; on a
``sim://`` bench the simulator's LO generator); ``source = "external"`` means the LO is fixed
inside the DUT or driven by something else: nothing is controlled, the plan only declares it.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any, Literal

import numpy as np
from pydantic import BaseModel, ConfigDict, Field, model_validator

from noisebench.errors import InputError
from noisebench.science.conversion import (
    FrequencyPlan,
    plan_fixed_if,
    plan_fixed_lo,
    plan_triples,
)
from noisebench.science.ranges import frequency_column_problem
from noisebench.science.tables import (
    FREQ_COLUMNS,
    read_table_text,
    scan_csv_table,
    separator_problem,
)
from noisebench.units import format_frequency, format_frequency_range

__all__ = [
    "LoSettings",
    "ConversionSection",
    "ImageRejection",
    "frequency_plan",
    "conversion_problems",
    "LoControl",
    "leakage_lines_hz",
    "tone_leakage_problems",
]

DEFAULT_KEEPOUT_RBW = 5.0
"""Default half-width of the LO-leakage keep-out band, in RBWs of the point's acquisition: a
Gaussian RBW filter's skirt is ~60 dB down at 2.6 RBW from a line, so 5 RBW keeps the skirt
of a strong leakage line below the noise of a band next to it (common practice)."""


class LoSettings(BaseModel):
    """The LO: from the bench's LO generator (level and settling set by the plan) or external."""

    model_config = ConfigDict(extra="forbid", allow_inf_nan=False)

    source: Literal["generator", "external"] = "generator"
    level_dbm: float | None = Field(default=None, ge=-40, le=30)
    settle_time_s: float = Field(default=0.05, ge=0, le=60)

    @model_validator(mode="after")
    def _level(self) -> LoSettings:
        if self.source == "generator" and self.level_dbm is None:
            raise InputError(
                "conversion.lo.level_dbm",
                "is needed when the LO comes from the generator",
                fix="give the LO drive the converter needs, e.g. level_dbm = 10",
            )
        return self


class ConversionSection(BaseModel):
    """How the DUT converts frequency; see the module docstring for the keys."""

    model_config = ConfigDict(extra="forbid", allow_inf_nan=False)

    mode: Literal["fixed_lo", "fixed_if", "triples"]
    lo_hz: float | None = Field(default=None, gt=0)
    if_hz: float | None = Field(default=None, gt=0)
    sideband: Literal["lower", "upper"] | None = None
    triples: list[list[float]] | None = None
    nf_type: Literal["ssb", "dsb"] = "ssb"
    image_rejection_db: float | str
    u_image_rejection_db: float = Field(default=0.0, ge=0, le=20)
    lo: LoSettings = Field(default_factory=LoSettings)
    lo_leakage_dbm: float | None = Field(default=None, le=40)
    lo_harmonics: int = Field(default=3, ge=1, le=20)
    leakage_keepout_hz: float | None = Field(default=None, gt=0)

    @model_validator(mode="after")
    def _mode_keys(self) -> ConversionSection:
        need = {"fixed_lo": ("lo_hz",), "fixed_if": ("if_hz", "sideband"), "triples": ("triples",)}
        forbid = {
            "fixed_lo": ("if_hz", "triples"),
            "fixed_if": ("lo_hz", "triples"),
            "triples": ("lo_hz", "if_hz", "sideband"),
        }
        for key in need[self.mode]:
            if getattr(self, key) is None:
                raise InputError(
                    f"conversion.{key}", f"is needed in mode {self.mode!r}", fix=_MODE_FIX
                )
        for key in forbid[self.mode]:
            if getattr(self, key) is not None:
                raise InputError(
                    f"conversion.{key}", f"does not belong to mode {self.mode!r}", fix=_MODE_FIX
                )
        if self.triples is not None:
            for i, t in enumerate(self.triples):
                if len(t) != 3 or any(not (math.isfinite(x) and x > 0) for x in t):
                    raise InputError(
                        f"conversion.triples[{i}]",
                        f"must be [rf_hz, lo_hz, if_hz], three frequencies > 0 (got {t!r})",
                    )
        rejection = self.image_rejection_db
        if isinstance(rejection, str) and rejection in ("none", "equal"):
            pass
        elif isinstance(rejection, float):
            check_rejection_db("conversion.image_rejection_db", rejection)
        return self


_MODE_FIX = "fixed_lo: lo_hz; fixed_if: if_hz and sideband; triples: triples = [[rf, lo, if], ...]"


# --------------------------------------------------------------------------- frequency plan


def frequency_plan(section: ConversionSection, rf_hz: Sequence[float] | None) -> FrequencyPlan:
    """The per-point (RF, LO, IF, image, sideband) of the plan; InputError naming the key."""
    try:
        if section.mode == "triples":
            t = np.asarray(section.triples, dtype=float)
            return plan_triples(t[:, 0], t[:, 1], t[:, 2])
        if not rf_hz:
            raise InputError("sweep", "lists no RF frequencies", fix="add sweep points (RF)")
        if section.mode == "fixed_lo":
            fp = plan_fixed_lo(list(rf_hz), float(section.lo_hz))  # type: ignore[arg-type]
            if section.sideband is not None and fp.sideband[0].value != section.sideband:
                raise InputError(
                    "conversion.sideband",
                    f"is {section.sideband!r} but the RF lies on the "
                    f"{fp.sideband[0].value} side of the LO",
                    fix="correct the sideband or the LO",
                )
            return fp
        return plan_fixed_if(list(rf_hz), float(section.if_hz), str(section.sideband))  # type: ignore[arg-type]
    except InputError as exc:
        if exc.field.startswith(("conversion", "sweep")):
            raise
        text = str(exc)
        text = text[len(exc.field) + 2 :] if text.startswith(f"{exc.field}: ") else text
        raise InputError(f"conversion.{exc.field}", text) from None


def leakage_lines_hz(lo_hz: float, harmonics: int) -> list[float]:
    """The LO leakage lines at the IF port: n LO for n = 1..harmonics, Hz."""
    return [n * float(lo_hz) for n in range(1, int(harmonics) + 1)]


# --------------------------------------------------------------------------- image response


class ImageRejection:
    """The converter's image rejection versus RF, dB (None: no image response)."""

    def __init__(self, section: ConversionSection, resolve_path: Callable[[str], Path]) -> None:
        value = section.image_rejection_db
        self.u_db = section.u_image_rejection_db
        self._const: float | None = None
        self._none = False
        self._table: tuple[np.ndarray, np.ndarray] | None = None
        self.description: str
        if isinstance(value, (int, float)):
            self._const = float(value)
            self.description = f"{self._const:g} dB"
        elif value == "none":
            self._none = True
            self.description = "none (no image response)"
        elif value == "equal":
            self._const = 0.0
            self.description = "equal responses (0 dB)"
        else:
            self._table = _read_rejection_csv(resolve_path(value), value)
            self.description = f"table {value}"

    def at(self, rf_hz: float) -> float | None:
        """Image rejection at ``rf_hz``, dB; None when the converter has no image response."""
        if self._none:
            return None
        if self._const is not None:
            return self._const
        freq, rej = self._table  # type: ignore[misc]
        if not freq[0] * (1 - 1e-9) <= rf_hz <= freq[-1] * (1 + 1e-9):
            raise InputError(
                "conversion.image_rejection_db",
                f"table covers {format_frequency_range(freq[0], freq[-1])}, not the RF "
                f"{format_frequency(rf_hz)}",
                fix="extend the image-rejection table over the RF sweep",
            )
        return float(np.interp(rf_hz, freq, rej))

    def covers(self, rf_hz: Sequence[float]) -> list[str]:
        problems = []
        for f in rf_hz:
            try:
                self.at(float(f))
            except InputError as exc:
                problems.append(str(exc))
                break
        return problems


REJECTION_RANGE_DB = (-3.0, 200.0)
"""Image rejection accepted, dB: the image response BELOW the signal response. Down to -3 dB a
double-sideband mixer's imbalance (common practice); further below, the image would be the
stronger response, which means the sign was slipped (-20 written for 20 dB) or the plan's
sideband is the wrong one; above 200 dB a unit or column mix-up."""


def check_rejection_db(field: str, value: float) -> None:
    """InputError naming ``field`` when ``value`` (dB) is outside ``REJECTION_RANGE_DB``."""
    lo, hi = REJECTION_RANGE_DB
    if lo <= value <= hi:
        return
    if value < lo:
        raise InputError(
            field,
            f"{value:g} dB says the image response is {-value:g} dB ABOVE the signal response; "
            "the image rejection is the image response in dB below the signal (positive)",
            fix=f"give {-value:g} if the image is {-value:g} dB weaker; if the image really is "
            'the stronger response, the plan measures the other sideband (check "sideband")',
        )
    raise InputError(
        field,
        f"{value:g} dB is outside {lo:g}..{hi:g} dB",
        fix='use "none" for no image response, "equal" for equal responses',
    )


def _rejection_header(line: str, where: str) -> list[str]:
    cols = [c.strip().lower() for c in line.split(",")]
    separator = separator_problem(line)
    if separator is not None:
        raise InputError(
            f"{where}, header",
            f"columns are separated by {separator!r}",
            fix="this format uses commas (and '.' as the decimal point)",
        )
    freq = [c for c in cols if c in FREQ_COLUMNS]
    if len(freq) != 1 or sorted(cols) != sorted([freq[0], "image_rejection_db"]):
        raise InputError(
            f"{where}, header",
            f"must be a frequency column and image_rejection_db (got {','.join(cols)})",
            fix="e.g. 'freq_hz,image_rejection_db': one RF frequency and its rejection per row",
        )
    return cols


def _read_rejection_csv(path: Path, label: str) -> tuple[np.ndarray, np.ndarray]:
    """Image rejection (dB) versus RF (Hz) from our table format (:func:`scan_csv_table`, the
    reader of the gain and loss tables): ``# key: value`` lines, then a frequency column
    (``freq_hz``/``freq_khz``/``freq_mhz``/``freq_ghz``) and ``image_rejection_db``."""
    text, name = read_table_text(path, None, what="image-rejection table", text_label=label)
    try:
        table = scan_csv_table(
            text,
            name,
            what="image-rejection table",
            parse_header=_rejection_header,
            header_example="freq_hz,image_rejection_db",
        )
        freq, rej = table.freq_hz(), table.column("image_rejection_db")
        slip = frequency_column_problem(freq, table.freq_column or "")
        if slip is not None:
            raise InputError(f"{table.where(0)}, {table.freq_column}", slip)
        for i, (f, r) in enumerate(zip(freq, rej, strict=True)):
            if not f > 0:
                raise InputError(f"{table.where(i)}, {table.freq_column}", "must be > 0")
            if i and not f > freq[i - 1]:
                raise InputError(
                    f"{table.where(i)}, {table.freq_column}",
                    f"not strictly ascending (follows {format_frequency(freq[i - 1])})",
                )
            check_rejection_db(f"{table.where(i)}, image_rejection_db", float(r))
    except InputError as exc:
        raise InputError("conversion.image_rejection_db", str(exc)) from None
    return np.asarray(freq), np.asarray(rej)


# --------------------------------------------------------------------------- plan checks


def conversion_problems(
    section: ConversionSection,
    fp: FrequencyPlan,
    *,
    band_hz: Sequence[float],
    rbw_hz: Sequence[float],
    analyzer_range_hz: tuple[float, float] | None,
    enr_range_hz: tuple[float, float] | None,
    lo_range_hz: tuple[float, float] | None,
    image_rejection: ImageRejection | None,
    y_factor: bool,
) -> list[str]:
    """Every problem of a conversion plan, one ``key: message (fix)`` line each.

    ``band_hz``/``rbw_hz``: each point's integrated band and RBW (for the keep-out);
    ranges ``(min, max)`` in Hz when known: the analyzer's input, the ENR table, the LO
    generator.
    """
    problems: list[str] = []

    def first(label: str, bad: np.ndarray, text: Callable[[int], str]) -> None:
        if np.any(bad):
            problems.append(f"{label}: {text(int(np.flatnonzero(bad)[0]))}")

    if analyzer_range_hz is not None:
        lo, hi = analyzer_range_hz
        first(
            "conversion",
            (fp.if_hz < lo) | (fp.if_hz > hi),
            lambda i: (
                f"IF {format_frequency(fp.if_hz[i])} (RF {format_frequency(fp.rf_hz[i])}) is "
                "outside the "
                f"analyzer's {format_frequency_range(lo, hi)} (choose an IF the analyzer can read)"
            ),
        )
    if enr_range_hz is not None and y_factor:
        lo, hi = enr_range_hz[0] * (1 - 1e-9), enr_range_hz[1] * (1 + 1e-9)
        first(
            "enr.table",
            (fp.rf_hz < lo) | (fp.rf_hz > hi),
            lambda i: (
                f"does not cover the RF {format_frequency(fp.rf_hz[i])} "
                f"({format_frequency_range(enr_range_hz[0], enr_range_hz[1])}; use a table over "
                "the RF band)"
            ),
        )
        first(
            "enr.table",
            (fp.if_hz < lo) | (fp.if_hz > hi),
            lambda i: (
                f"does not cover the IF {format_frequency(fp.if_hz[i])}, where the analyzer is "
                "calibrated (use a source calibrated down to the IF)"
            ),
        )
        if image_rejection is not None:
            has_image = np.array([image_rejection.at(float(f)) is not None for f in fp.rf_hz])
            first(
                "enr.table",
                has_image & ((fp.image_hz < lo) | (fp.image_hz > hi)),
                lambda i: (
                    f"does not cover the image {format_frequency(fp.image_hz[i])} of RF "
                    f"{format_frequency(fp.rf_hz[i])}, whose share of the source's noise needs "
                    "ENR(image) "
                    '(extend the table, or declare image_rejection_db = "none" behind an '
                    "image-reject filter)"
                ),
            )
    if lo_range_hz is not None and section.lo.source == "generator":
        lo, hi = lo_range_hz
        first(
            "conversion.lo",
            (fp.lo_hz < lo) | (fp.lo_hz > hi),
            lambda i: (
                f"LO {format_frequency(fp.lo_hz[i])} is outside the LO generator's "
                f"{format_frequency_range(lo, hi)} (use another sideband or generator)"
            ),
        )
    bands = np.broadcast_to(np.asarray(band_hz, dtype=float), fp.rf_hz.shape)
    rbws = np.broadcast_to(np.asarray(rbw_hz, dtype=float), fp.rf_hz.shape)
    keep = (
        np.full(fp.rf_hz.shape, section.leakage_keepout_hz)
        if section.leakage_keepout_hz is not None
        else DEFAULT_KEEPOUT_RBW * rbws
    )
    n = np.arange(1, section.lo_harmonics + 1)
    lines = fp.lo_hz[:, None] * n[None, :]
    reach = (keep + bands / 2)[:, None]
    if_hit = np.abs(fp.if_hz[:, None] - lines) <= reach
    first(
        "conversion",
        np.asarray(if_hit.any(axis=1)),
        lambda i: (
            f"the IF band {format_frequency(fp.if_hz[i])} +/- {format_frequency(bands[i] / 2, 3)} "
            "(RF "
            f"{format_frequency(fp.rf_hz[i])}) overlaps LO leakage at "
            f"{format_frequency(lines[i][if_hit[i]][0])} +/- {format_frequency(keep[i], 3)} "
            "(move the IF or the LO, or narrow the span)"
        ),
    )
    image_hit = np.abs(fp.image_hz[:, None] - lines) <= reach
    first(
        "conversion",
        np.asarray(image_hit.any(axis=1)),
        lambda i: (
            f"the image {format_frequency(fp.image_hz[i])} (RF {format_frequency(fp.rf_hz[i])}) "
            "overlaps LO "
            f"leakage at {format_frequency(lines[i][image_hit[i]][0])} (move the LO or the IF)"
        ),
    )
    if image_rejection is not None:
        problems += image_rejection.covers([float(f) for f in fp.rf_hz])
    return problems


def tone_leakage_problems(
    section: ConversionSection, fp: FrequencyPlan, *, band_rbw: float, rbw_hz: float
) -> list[str]:
    """The measured conversion gain's tone at the IF: its marker band (``band_rbw`` x
    ``rbw_hz``) plus the keep-out (``leakage_keepout_hz``, else 5 of the tone's RBW) must not
    reach an LO leakage line ``n LO``; one ``key: message (fix)`` line for the first point."""
    half = band_rbw * rbw_hz / 2.0
    keep = (
        section.leakage_keepout_hz
        if section.leakage_keepout_hz is not None
        else DEFAULT_KEEPOUT_RBW * rbw_hz
    )
    n = np.arange(1, section.lo_harmonics + 1)
    lines = fp.lo_hz[:, None] * n[None, :]
    hit = np.abs(fp.if_hz[:, None] - lines) <= half + keep
    if not np.any(hit):
        return []
    i = int(np.flatnonzero(hit.any(axis=1))[0])
    return [
        f"gain.rbw_hz: the conversion-gain tone at the IF {format_frequency(fp.if_hz[i])} "
        f"(RF {format_frequency(fp.rf_hz[i])}, band +/- {format_frequency(half, 3)}) overlaps "
        f"LO leakage at {format_frequency(lines[i][hit[i]][0])} +/- {format_frequency(keep, 3)} "
        "(move the IF or the LO, or narrow gain.rbw_hz)"
    ]


# --------------------------------------------------------------------------- LO control


class LoControl:
    """Sets the LO per point (frequency, level, settling) and switches it off at the end.

    ``generator``: the bench's LO generator (None for an external LO). ``wait``: how settling
    passes (the simulator's clock, or a real sleep on hardware).
    """

    def __init__(
        self,
        settings: LoSettings,
        generator: Any | None,
        *,
        wait: Callable[[float], None] = time.sleep,
    ) -> None:
        if settings.source == "generator" and generator is None:
            raise InputError(
                "bench.lo",
                "the plan drives the LO from a generator but the bench has no LO generator",
                fix='name it in [bench] lo = { resource = "..." }, or set conversion.lo.source '
                '= "external"',
            )
        self.settings = settings
        self.generator = generator if settings.source == "generator" else None
        self.wait = wait
        self.lo_hz: float | None = None

    @property
    def level_dbm(self) -> float | None:
        return self.settings.level_dbm if self.generator is not None else None

    def set(self, lo_hz: float) -> float:
        """Tune the LO to ``lo_hz`` and let it settle; returns the settling time spent, s."""
        if self.generator is None:
            self.lo_hz = float(lo_hz)
            return 0.0
        if self.lo_hz == float(lo_hz) and self.generator.output_on:
            return 0.0
        self.generator.set_cw(float(lo_hz), float(self.settings.level_dbm))  # type: ignore[arg-type]
        if not self.generator.output_on:
            self.generator.set_output(True)
        self.lo_hz = float(lo_hz)
        settle = self.settings.settle_time_s
        if settle > 0:
            self.wait(settle)
        return settle

    def off(self) -> None:
        """LO output off (safe state). Never raises."""
        if self.generator is None:
            return
        try:
            self.generator.set_output(False)
        except Exception:  # noqa: BLE001 - safe state is best effort
            pass
        self.lo_hz = None


def limit_nf_type_problems(held: str, limits: Any) -> list[str]:
    """A converter's NF limit must say which figure it bounds (SSB or DSB: up to 3 dB apart),
    and the plan must measure that one; otherwise no verdict could be defended."""
    if limits is None or all(band.nf_max_db is None for band in limits.bands):
        return []
    if limits.nf_type is None:
        return [
            "limits.nf_type: a frequency-converting DUT has an SSB and a DSB noise figure (up "
            'to 3 dB apart); say which one the NF limit bounds: nf_type = "ssb" or "dsb" '
            f'(the plan measures conversion.nf_type = "{held}")'
        ]
    if limits.nf_type != held:
        return [
            f"limits.nf_type: the limit bounds the {limits.nf_type.upper()} figure but the "
            f"plan measures the {held.upper()} one; set conversion.nf_type = "
            f'"{limits.nf_type}" (both figures are stored, nf_db holds that one)'
        ]
    return []
