"""The uncertainty budget: the inputs over the sweep, the classic budget table at the point
with the largest U, Monte Carlo facts, and the signed contributions per frequency (up to
``DETAIL_ROWS_MAX`` points)."""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping, Sequence
from typing import Any

from noisebench.results.plots import (
    coverage_text,
)
from noisebench.results.report.cells import (
    DETAIL_ROWS_MAX,
    Column,
    FrequencyColumn,
    Strong,
    Table,
    _budget_list,
    _freq,
    _grid,
    _is_number,
    _num,
    _number_or,
    _range,
    _sig,
    _table,
    label,
    value_node,
)
from noisebench.results.store import (
    RunRecord,
)

DISTRIBUTION_WORDS = {
    "u_shaped": "U-shaped (arcsine)",
    "normal": "normal",
    "rectangular": "rectangular",
    "triangular": "triangular",
}


def _contributions(budget: Mapping[str, Any]) -> list[Mapping[str, Any]]:
    return [
        c
        for c in budget.get("contributions") or []
        if isinstance(c, Mapping) and _is_number(c.get("contribution_db"))
    ]


def _largest(budget: Mapping[str, Any]) -> str:
    items = _contributions(budget)
    if not items:
        return "-"
    top = max(items, key=lambda c: abs(c["contribution_db"]))
    return f"{top.get('name', '?')} ({top['contribution_db']:+.4f} dB)"


def _share(contribution_db: float, u_c: Any) -> str:
    if not (_is_number(u_c) and u_c > 0):
        return "-"
    return f"{100 * contribution_db**2 / u_c**2:.1f}"


def _method_text(budgets: Sequence[Mapping[str, Any]]) -> str:
    methods = {str(b.get("method", "-")) for b in budgets}
    parts = []
    if "gum" in methods:
        parts.append("GUM law of propagation (JCGM 100:2008)")
    if "monte_carlo" in methods:
        mc = [b["monte_carlo"] for b in budgets if isinstance(b.get("monte_carlo"), Mapping)]
        trials = sorted({m.get("trials") for m in mc if _is_number(m.get("trials"))})
        coverage = {m.get("coverage") for m in mc if _is_number(m.get("coverage"))}
        validated = sum(1 for m in mc if m.get("gum_validated") is True)
        text = "Monte Carlo propagation (JCGM 101:2008)"
        if trials:
            text += f", {trials[0]}" + (f" to {trials[-1]}" if len(trials) > 1 else "") + " trials"
        if len(coverage) == 1:
            text += f", {100 * coverage.pop():g} % coverage interval"
        text += f"; GUM result validated at {validated} of {len(mc)} points"
        parts.append(text)
    others = methods - {"gum", "monte_carlo"}
    parts += sorted(others)
    return "; ".join(parts)


def _distribution(name: Any) -> str:
    return DISTRIBUTION_WORDS.get(str(name), str(name))


def _sweep_contributions(budgets: Sequence[Mapping[str, Any]]) -> Table:
    """One row per input: its distribution, u, and the range of its contribution over the sweep."""
    lines: dict[str, list[Mapping[str, Any]]] = {}
    shares: dict[str, list[float]] = {}
    for budget in budgets:
        u_c = budget.get("u_combined_db")
        for c in _contributions(budget):
            name = str(c.get("name", "?"))
            lines.setdefault(name, []).append(c)
            if _is_number(u_c) and u_c > 0:
                shares.setdefault(name, []).append(100 * c["contribution_db"] ** 2 / u_c**2)
    order = sorted(
        lines, key=lambda n: max(abs(c["contribution_db"]) for c in lines[n]), reverse=True
    )
    rows = []
    for name in order:
        items = lines[name]
        us = [c.get("u") for c in items if _is_number(c.get("u"))]
        units = {str(c.get("unit", "")) for c in items}
        dists = {str(c.get("distribution", "-")) for c in items}
        rows.append(
            [
                name,
                ", ".join(sorted(_distribution(d) for d in dists)),
                _range(us, 4) if us else "-",
                ", ".join(sorted(units)),
                _range([abs(c["contribution_db"]) for c in items], 4),
                _range(shares.get(name, []), 1),
            ]
        )
    headers = [
        ("Input quantity", False),
        ("Distribution", False),
        ("u(xᵢ)", True),
        ("Unit of u", False),
        ("|cᵢ·u(xᵢ)| (dB)", True),
        ("Share of u_c² (%)", True),
    ]
    return _table(headers, rows)


def _budget_at(budget: Mapping[str, Any]) -> Table:
    """The classic budget table at one frequency."""
    lines = sorted(_contributions(budget), key=lambda c: abs(c["contribution_db"]), reverse=True)
    u_c = budget.get("u_combined_db")
    headers = [
        ("Input quantity", False),
        ("Distribution", False),
        ("u(xᵢ)", True),
        ("Unit of u", False),
        ("Sensitivity cᵢ (dB per unit)", True),
        ("cᵢ·u(xᵢ) (dB)", True),
        ("Share of u_c² (%)", True),
    ]
    rows: list[list[Any]] = [
        [
            str(c.get("name", "?")),
            _distribution(c.get("distribution", "-")),
            _sig(c.get("u")),
            str(c.get("unit", "")),
            _sig(c.get("sensitivity")),
            f"{c['contribution_db']:+.4f}",
            _share(c["contribution_db"], u_c),
        ]
        for c in lines
    ]
    rows.append(
        [
            Strong("combined standard uncertainty u_c"),
            "",
            "",
            "",
            "",
            Strong(_num(u_c, 4)),
            "100.0" if _is_number(u_c) else "-",
        ]
    )
    rows.append(
        [
            Strong(f"expanded uncertainty U (k = {_sig(budget.get('k'))})"),
            "",
            "",
            "",
            "",
            Strong(_num(budget.get("U_expanded_db"), 4)),
            "",
        ]
    )
    return _table(headers, rows)


def _monte_carlo_facts(budget: Mapping[str, Any]) -> list[tuple[str, Any]]:
    mc = budget.get("monte_carlo")
    if not isinstance(mc, Mapping):
        return []
    return [(label(str(k)), value_node(v, 3, str(k))) for k, v in mc.items() if v is not None]


def _omitted(budgets: Sequence[Mapping[str, Any]]) -> list[str]:
    omitted: list[str] = []
    for budget in budgets:
        omitted += [str(o) for o in budget.get("omitted") or [] if str(o) not in omitted]
    return omitted


def _budget_matrix(budgets: Sequence[Mapping[str, Any]]) -> Table | None:
    """Per frequency: u_c, k, U and every signed contribution (dB); None above the limit."""
    if len(budgets) > DETAIL_ROWS_MAX:
        return None
    freq = FrequencyColumn.of([b["freq_hz"] for b in budgets])
    names: list[str] = []
    for budget in budgets:
        names += [
            str(c.get("name", "?"))
            for c in _contributions(budget)
            if str(c.get("name", "?")) not in names
        ]
    mc = any(isinstance(b.get("monte_carlo"), Mapping) for b in budgets)

    def contribution(name: str) -> Callable[[Mapping[str, Any]], str]:
        def cell(budget: Mapping[str, Any]) -> str:
            value = next(
                (
                    c["contribution_db"]
                    for c in _contributions(budget)
                    if str(c.get("name", "?")) == name
                ),
                None,
            )
            return "-" if value is None else f"{value:+.4f}"

        return cell

    columns = [
        Column(freq.header, lambda b: freq.cell(b["freq_hz"])),
        Column("Method", lambda b: str(b.get("method", "-")), text=True),
        Column("u_c (dB)", lambda b: _num(b.get("u_combined_db"), 4)),
        Column("k", lambda b: _sig(b.get("k"))),
        Column("U (dB)", lambda b: _num(b.get("U_expanded_db"), 4)),
    ]
    if mc:
        columns.append(Column("MC interval (dB)", _mc_interval, text=True))
    columns += [Column(f"{name} (dB)", contribution(name)) for name in names]
    columns.append(Column("Largest contribution", _largest, text=True))
    return _grid(columns, [(b,) for b in budgets])


def _mc_interval(budget: Mapping[str, Any]) -> str:
    interval = (budget.get("monte_carlo") or {}).get("interval_db")
    if (
        isinstance(interval, (list, tuple))
        and len(interval) == 2
        and all(_is_number(v) for v in interval)
    ):
        return f"{interval[0]:.3f} to {interval[1]:.3f}"
    return "-"


def _budgets(record: RunRecord) -> dict[str, Any] | None:
    budgets = _budget_list(record)
    if not budgets:
        return None
    worst = max(
        budgets,
        key=lambda b: _number_or(b.get("U_expanded_db"), -math.inf),
    )
    return {
        "methods": _method_text(budgets),
        "coverage": coverage_text(budgets),
        "u_range": _range([b.get("U_expanded_db") for b in budgets], 3, "dB"),
        "count": len(budgets),
        "sweep": _sweep_contributions(budgets),
        "worst_freq": _freq(worst["freq_hz"]),
        "worst": _budget_at(worst),
        "monte_carlo": _monte_carlo_facts(worst),
        "omitted": _omitted(budgets),
        "matrix": _budget_matrix(budgets),
    }
