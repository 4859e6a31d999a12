"""The spread under mismatch held against Monte Carlo: each sampled check point's sigma beside
the sigma the library's tables give there, and the page and JSON that show them.

The tables' sigma at a check point is the mean of their early and late sigma there
(interpolated when the point is off the sensitivity sub-grid): what a timing tool reads.
"""

from __future__ import annotations

import html
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

from charflow.analysis.reporting import head, library_units, write_pair
from charflow.config.library import LibraryConfig
from charflow.flow.characterize import RunResult
from charflow.records.errors import place
from charflow.records.outcomes import SpreadMeasurement
from charflow.records.units import show_time
from charflow.tables import spread as st

GOAL = 0.10  # the linear sigma within 10 % of Monte Carlo's (the goal)
QUANTITIES = ("delay", "transition")


@dataclass(frozen=True, slots=True)
class Check:
    """One Monte Carlo check of one quantity at one point."""

    label: str  # cell, arc, edges, state and point, in the library's units
    quantity: str  # delay | transition
    nominal: float  # s
    sampled: st.Sigmas  # s, from the samples
    interval: tuple[float, float]  # s, the 95 % interval of the sampled sigma
    samples: int
    table: st.Sigmas | None  # s, what the sigma tables say there (sigma: early/late mean)
    dominant: str  # the transistor with the largest share of σ² (linear method), or ""

    @property
    def error(self) -> float | None:
        """(table − Monte Carlo) / Monte Carlo sigma."""
        if self.table is None or self.sampled.sigma == 0:
            return None
        return (self.table.sigma - self.sampled.sigma) / self.sampled.sigma


def checks(config: LibraryConfig, result: RunResult) -> tuple[Check, ...]:
    """Every sampled point of a linear-method run against the tables at that point."""
    linear = {m.point.timing: m for m in result.spreads if not m.point.samples}
    out = []
    for m in (m for m in result.spreads if m.point.samples):
        near = linear.get(m.point.timing)
        for quantity in QUANTITIES:
            values = m.sampled_delays if quantity == "delay" else m.sampled_transitions
            mc = st.sampled(values)
            share = st.contributions(near.shifts, quantity) if near is not None else {}
            out.append(
                Check(
                    place(m.point.timing.where(config)),
                    quantity,
                    m.delay if quantity == "delay" else m.transition,
                    mc,
                    st.interval(mc.sigma, len(values)),
                    len(values),
                    _tabled(result, m, quantity),
                    max(share, key=lambda k: share[k]) if share else "",
                )
            )
    return tuple(out)


def _tabled(result: RunResult, m: SpreadMeasurement, quantity: str) -> st.Sigmas | None:
    p = m.point.timing
    arc = next(
        (
            a
            for a in result.plan.arcs
            if (a.cell, a.related, a.output) == (p.cell, p.related, p.output)
        ),
        None,
    )
    if arc is None:
        return None
    when = next((s.when for s in arc.states if s.side == p.state_side), None)
    key = (p.cell, p.related, p.output, when if len(arc.states) > 1 else None)
    spread = next((a for a in result.spread if (a.cell, a.related, a.output, a.when) == key), None)
    if spread is None:
        return None
    name = st.group(quantity, p.output_edge)
    found = {}
    for t in (t for t in spread.tables if t.table.quantity == name):
        index = tuple(a.values.index(c) for a, c in zip(t.table.axes, p.coordinates, strict=True))
        found[t.sigma_type] = float(t.table.values[index])
    if len(found) < 2:
        return None
    return st.Sigmas((found["early"] + found["late"]) / 2, found["early"], found["late"])


def to_json(config: LibraryConfig, result: RunResult) -> dict:
    rows = []
    for c in checks(config, result):
        rows.append(
            {
                "point": c.label,
                "quantity": c.quantity,
                "nominal_s": c.nominal,
                "samples": c.samples,
                "sampled_sigma_s": c.sampled.sigma,
                "sampled_sigma_interval_s": list(c.interval),
                "sampled_early_s": c.sampled.early,
                "sampled_late_s": c.sampled.late,
                "table_sigma_s": c.table.sigma if c.table else None,
                "table_early_s": c.table.early if c.table else None,
                "table_late_s": c.table.late if c.table else None,
                "relative_error": c.error,
                "dominant_transistor": c.dominant,
            }
        )
    tables, sampled, nominal = result.spread_cost()
    return {
        **head(config),
        "units": library_units(config),
        "method": config.mismatch.method,
        "simulations": {"sigma_tables": tables, "checks": sampled, "nominal": nominal},
        "checks": rows,
    }


def to_html(config: LibraryConfig, found: Sequence[Check]) -> str:
    unit = config.time_unit
    rows = []
    for c in found:
        err = c.error
        flag = "" if err is None or abs(err) <= GOAL else ' class="off"'
        table = show_time(c.table.sigma, unit) if c.table else "-"
        rows.append(
            f"<tr{flag}><td>{html.escape(c.label)}</td><td>{c.quantity}</td>"
            f"<td>{show_time(c.nominal, unit)}</td><td>{table}</td>"
            f"<td>{show_time(c.sampled.sigma, unit)}</td>"
            f"<td>{show_time(c.interval[0], unit)} – {show_time(c.interval[1], unit)}</td>"
            f"<td>{'-' if err is None else f'{100 * err:+.1f} %'}</td>"
            f"<td>{html.escape(c.dominant)}</td></tr>"
        )
    return (
        "<!doctype html><html><head><meta charset='utf-8'>"
        f"<title>{html.escape(config.name)}: spread against Monte Carlo</title>"
        "<style>td,th{padding:2px 8px} tr.off{background:#fdd}</style></head><body>"
        f"<h1>{html.escape(config.name)}: sigma of the tables against Monte Carlo</h1>"
        f"<p>Rows in red are more than {100 * GOAL:.0f} % off; there the linear method "
        'departs and [mismatch] method = "sampled" gives Monte Carlo tables. Interval: 95 % '
        "of the sampled sigma (normal approximation).</p><table><tr><th>point</th>"
        "<th>quantity</th><th>nominal</th><th>tables' sigma</th><th>Monte Carlo sigma</th>"
        "<th>its interval</th><th>tables vs MC</th><th>dominant transistor</th></tr>"
        + "\n".join(rows)
        + "</table></body></html>\n"
    )


def write(config: LibraryConfig, result: RunResult, out_dir: Path) -> list[Path]:
    """``<library>.spread.json`` and ``.html`` beside the library."""
    doc = to_json(config, result)
    return write_pair(
        out_dir, f"{config.name}.spread", doc, ".html", to_html(config, checks(config, result))
    )
