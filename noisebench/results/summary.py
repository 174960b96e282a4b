"""The plain-text summary of a run (what `noisebench show` prints)."""

from __future__ import annotations

from noisebench.results.records import RunRecord
from noisebench.science.point import PointResult

# ----------------------------------------------------------------------------- summary


def _fmt(value: float | None, digits: int = 3, unit: str = "") -> str:
    if value is None:
        return "-"
    return f"{value:.{digits}f}{unit}"


def _fmt_freq(freq_hz: float) -> str:
    from noisebench.units import format_frequency

    return format_frequency(freq_hz)


def nf_extremes(record: RunRecord) -> tuple[PointResult, PointResult] | None:
    """The points with the lowest and highest NF, or ``None`` without points."""
    if not record.points:
        return None
    return (min(record.points, key=lambda p: p.nf_db), max(record.points, key=lambda p: p.nf_db))


def format_summary(record: RunRecord, *, table: bool = False) -> str:
    """A plain-text summary of a run for terminals and logs (no colour, no Rich).

    With ``table=True`` a per-point table follows the summary.
    """
    info = record.info
    rows: list[tuple[str, str]] = [
        (
            "DUT",
            f"{info.dut_id or '-'}    operator {info.operator or '-'}    "
            f"station {info.station or '-'}",
        ),
        (
            "started",
            info.started_at.isoformat(timespec="seconds")
            + (f"    ended {info.ended_at.isoformat(timespec='seconds')}" if info.ended_at else ""),
        ),
    ]
    rows += [
        (role.replace("_", " "), identity) for role, identity in sorted(info.identities.items())
    ]
    rows.append(
        (
            "points",
            f"{len(record.points)}"
            + (
                f" ({_fmt_freq(record.points[0].freq_hz)}"
                f" to {_fmt_freq(record.points[-1].freq_hz)})"
                if record.points
                else ""
            ),
        )
    )
    extremes = nf_extremes(record)
    if extremes:
        low, high = extremes
        rows.append(
            (
                "NF",
                f"min {low.nf_db:.3f} dB at {_fmt_freq(low.freq_hz)}, "
                f"max {high.nf_db:.3f} dB at {_fmt_freq(high.freq_hz)}",
            )
        )
        gains = [p.gain_db for p in record.points if p.gain_db is not None]
        if gains:
            rows.append(("gain", f"{min(gains):.3f} to {max(gains):.3f} dB"))
        flagged = sum(1 for p in record.points if p.flags)
        if flagged:
            rows.append(("flagged", f"{flagged} of {len(record.points)} points"))
    if record.verdict:
        rows.append(("verdict", str(record.verdict.get("unit", "-")).upper()))
    rows += [("warning", warning) for warning in record.warnings]
    width = max(len(label) for label, _ in rows) + 2
    lines = [
        f"Run {info.run_id}: {info.method.value.replace('_', '-')} method, status {info.status}"
    ]
    lines += [f"  {label:<{width}}{text}" for label, text in rows]
    if table and record.points:
        lines.append("")
        lines.extend(_summary_table(record))
    return "\n".join(lines)


def _summary_table(record: RunRecord) -> list[str]:
    header = (
        f"{'freq':>14} {'NF dB':>8} {'u dB':>7} {'U dB':>7} {'Te K':>9} "
        f"{'gain dB':>8} {'verdict':>13}  flags"
    )
    rows = [header, "-" * len(header)]
    budgets, verdicts = record.budgets_by_freq(), record.verdicts_by_freq()
    for point in record.points:
        budget = budgets.get(point.freq_hz) or {}
        verdict = verdicts.get(point.freq_hz) or {}
        rows.append(
            f"{_fmt_freq(point.freq_hz):>14} {point.nf_db:>8.3f} {point.u_nf_db:>7.3f} "
            f"{_fmt(budget.get('U_expanded_db')):>7} {point.te_k:>9.1f} "
            f"{_fmt(point.gain_db):>8} {str(verdict.get('verdict', '-')):>13}  "
            + ",".join(f.value for f in point.flags)
        )
    return rows
