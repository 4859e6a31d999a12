"""The picture of a failed point's waveform (``faults``): its voltages over time with the
library's delay and slew thresholds drawn across."""

from __future__ import annotations

import io

from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

from charflow.config.library import LibraryConfig
from charflow.records.outcomes import Failure, Waveform

DPI = 110


def _levels(config: LibraryConfig) -> dict[float, list[str]]:
    """Threshold (V) → what the library uses it for."""
    thr, vdd = config.thresholds, config.process.vdd
    uses: dict[float, list[str]] = {}
    for edge in ("rise", "fall"):
        named = [
            (thr.delay_input(edge), f"input delay {edge}"),
            (thr.delay_output(edge), f"output delay {edge}"),
            *((x, f"slew {edge}") for x in thr.slew_band(edge)),
        ]
        for fraction, use in named:
            entry = uses.setdefault(round(fraction * vdd, 12), [])
            if use not in entry:
                entry.append(use)
    return uses


def png_bytes(config: LibraryConfig, failure: Failure, w: Waveform) -> bytes:
    fig = Figure(figsize=(8.0, 4.8))
    FigureCanvasAgg(fig)
    ax = fig.add_subplot()
    scale = config.time_scale
    for name, v in w.nodes:
        ax.plot(w.time / scale, v, label=f"{name}", linewidth=1.2)
    for level, uses in sorted(_levels(config).items()):
        ax.axhline(level, color="0.6", linewidth=0.7, linestyle="--")
        ax.annotate(
            f"{level:.3g} V: {', '.join(uses)}",
            (0.0, level),
            xycoords=("axes fraction", "data"),
            xytext=(3, 2),
            textcoords="offset points",
            fontsize=6,
            color="0.4",
        )
    ax.set_xlabel(f"time ({config.time_unit})")
    ax.set_ylabel("V")
    ax.legend(loc="center right", fontsize=8)
    reason = failure.reason if len(failure.reason) <= 110 else failure.reason[:107] + "..."
    ax.set_title(f"{failure.point.cell} {failure.point.label}\n{reason}", fontsize=8)
    # Fixed margins: tight_layout would cost more than the drawing (many failed points).
    fig.subplots_adjust(left=0.08, right=0.98, top=0.9, bottom=0.1)
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=DPI)
    return buf.getvalue()
