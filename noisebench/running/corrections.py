"""What the methods need besides the densities: losses, ENR, temperatures, the DUT gain.

:func:`resolve_corrections` turns a plan's ``[corrections]``, ``[enr]`` and ``[gain]`` sections
and the bench into frequency functions: the input and output losses in dB (a constant, our
CSV loss/gain format, or Touchstone ``|S21|`` through :mod:`noisebench.science.gain_files`), the ENR
of the noise source (:mod:`noisebench.science.enr`, refused or clamped outside its table) and the
source/termination temperature (a number, or read from the bench: the noise source's
physical temperature for the Y-factor method, the ambient for the gain method).

Reference planes: ``input_loss`` lies between the noise source (or termination) and the DUT
input, outside the THROUGH path; ``output_loss`` lies after the DUT. A file or constant DUT
gain is the DUT's own; a measured one (substitution against THROUGH) spans the input loss and
the DUT, see :meth:`noisebench.running.sequencer.Sequencer._stated_gain`.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

from noisebench.bench.registry import BenchSession
from noisebench.errors import InputError
from noisebench.running.plan import Plan
from noisebench.science.methods.yfactor import EnrReference
from noisebench.science.point import Method
from noisebench.science.ranges import check_range
from noisebench.units import format_frequency


@dataclass
class Corrections:
    """Frequency-dependent losses, the ENR, temperatures (K) and the DUT gain source."""

    t0_k: float
    source_temperature_k: float
    input_loss_temperature_k: float | None
    output_loss_temperature_k: float | None
    input_loss: Callable[[float], float]
    output_loss: Callable[[float], float]
    enr_table: Any = None
    enr_extrapolate: str = "refuse"
    gain: Callable[[float], tuple[float, float]] | None = None
    # enr_at's answers per (table, rule, frequency); the table itself kept to check identity
    _enr_cache: dict[tuple[int, str, float], tuple[Any, tuple[float, float | None, bool]]] = field(
        default_factory=dict, repr=False, compare=False
    )

    def enr_at(self, freq_hz: float) -> tuple[float, float | None, bool]:
        """(ENR dB, its standard uncertainty dB, extrapolated?) at ``freq_hz``.

        The uncertainty is None when the table has no ``u_enr_db`` column: unknown, not zero,
        so that budgets list the ENR term as omitted instead of showing it as exact."""
        if self.enr_table is None:
            raise InputError("enr.table", "no ENR table", fix="name the ENR table in the plan")
        # a point asks for its ENR several times (calibration sizing, summary, decisions,
        # result): kept per frequency for this table and rule (refusals are not kept)
        key = (id(self.enr_table), self.enr_extrapolate, freq_hz)
        cache = self._enr_cache
        found = cache.get(key)
        if found is not None and found[0] is self.enr_table:
            return found[1]
        value = self.enr_table.at(freq_hz, extrapolate=self.enr_extrapolate)
        u = None if value.u_enr_db is None else float(value.u_enr_db)
        result = (float(value.enr_db), u, bool(value.extrapolated))
        if len(cache) >= 4096:
            cache.clear()
        cache[key] = (self.enr_table, result)
        return result

    @property
    def enr_reference(self) -> EnrReference:
        """How the ENR table turns into a hot temperature: its ``enr_reference`` header
        (``"t0"`` or ``"absolute"``, see :mod:`noisebench.science.methods.yfactor`), else
        ``"t0"``."""
        metadata = getattr(self.enr_table, "metadata", None)
        reference = getattr(metadata, "enr_reference", None) or "t0"
        return "absolute" if reference == "absolute" else "t0"

    def max_enr_db(self) -> float:
        return float(max(self.enr_table.enr_db)) if self.enr_table is not None else 0.0


def _loss_function(plan: Plan, key: str, value: float | str) -> Callable[[float], float]:
    if not isinstance(value, str):
        constant = float(value)
        return lambda freq_hz: constant
    from noisebench.science.gain_files import load_gain_table

    table = load_gain_table(plan.resolve_path(value))

    def loss_db(freq_hz: float) -> float:
        loss = float(table.at(freq_hz).loss_db)
        if loss < -1e-3:
            raise InputError(
                key,
                f"{value} gives a gain of {-loss:.3f} dB at {format_frequency(freq_hz)}, not a "
                "loss",
                fix="give loss_db >= 0, or a cable's |S21| (<= 0 dB)",
            )
        return max(loss, 0.0)

    return loss_db


def _gain_function(plan: Plan) -> Callable[[float], tuple[float, float]] | None:
    """The DUT's own gain (dB) and its standard uncertainty (dB) from a file or a constant."""
    spec = plan.gain
    if spec is None or plan.method is not Method.GAIN:
        return None
    if spec.source == "constant":
        value, u = float(spec.value_db), spec.u_gain_db  # type: ignore[arg-type]
        return lambda freq_hz: (value, u)
    if spec.source == "file":
        from noisebench.science.gain_files import load_gain_table

        table = load_gain_table(plan.resolve_path(str(spec.file)))

        def from_file(freq_hz: float) -> tuple[float, float]:
            entry = table.at(freq_hz)
            u = spec.u_gain_db if entry.u_gain_db is None else entry.u_gain_db
            return float(entry.gain_db), float(u)

        return from_file
    return None  # measured: filled in by the sequencer


def bench_temperature_k(session: BenchSession, *, prefer_source: bool) -> float | None:
    """The bench's physical temperature: the noise source's (cold) or the ambient, K."""
    source = session.bench.noise_source
    source_t = source.cold_temperature_k if source is not None else None
    ambient = session.bench.ambient_k
    first, second = (source_t, ambient) if prefer_source else (ambient, source_t)
    return first if first is not None else second


def resolve_corrections(plan: Plan, session: BenchSession) -> Corrections:
    """Everything the methods need besides the densities, from the plan and the bench."""
    c = plan.corrections
    if c.source_temperature_k == "bench":
        ts = bench_temperature_k(session, prefer_source=plan.method is Method.Y_FACTOR)
        if ts is None:
            raise InputError(
                "corrections.source_temperature_k",
                "the bench cannot report the source temperature",
                fix="give it in kelvin, e.g. 296.5",
            )
        check_range(  # a bench that reports degrees Celsius, or a broken sensor
            "physical_temperature_k",
            "corrections.source_temperature_k",
            ts,
            on_purpose=c.cryogenic,
        )
    else:
        ts = float(c.source_temperature_k)
    enr_table = None
    if plan.method is Method.Y_FACTOR:
        if plan.enr.table is not None:
            from noisebench.science.enr import EnrTable

            enr_table = EnrTable.from_csv(plan.resolve_path(plan.enr.table))
        elif session.enr_table is not None:  # the bench knows its source's table
            enr_table = session.enr_table
        else:
            raise InputError("enr.table", "the Y-factor method needs the ENR table")
    return Corrections(
        t0_k=c.t0_k,
        source_temperature_k=ts,
        input_loss_temperature_k=c.input_loss_temperature_k,
        output_loss_temperature_k=c.output_loss_temperature_k,
        input_loss=_loss_function(plan, "corrections.input_loss", c.input_loss),
        output_loss=_loss_function(plan, "corrections.output_loss", c.output_loss),
        enr_table=enr_table,
        enr_extrapolate=plan.enr.extrapolate,
        gain=_gain_function(plan),
    )
