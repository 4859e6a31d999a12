"""HTML and PNG output: the fidelity report's heat maps and the grid study's error curves, and
the writing of each with its JSON document.

The HTML is one self-contained file: PNGs are embedded as base64 and the summary table sorts
with a few lines of inline JavaScript, so the report can be mailed or archived as it is.
Values are shown in the library's units.
"""

from __future__ import annotations

import base64
import html
import io
import math
from collections.abc import Sequence
from pathlib import Path

import numpy as np
from matplotlib.axes import Axes
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.colors import Normalize
from matplotlib.figure import Figure
from matplotlib.ticker import FixedLocator, FormatStrFormatter, NullLocator

from charflow import __version__
from charflow.analysis import fidelity, gridstudy, paths
from charflow.analysis.fidelity import CENTRE, FidelityReport, TableCheck, severity
from charflow.analysis.gridstudy import PLACEMENTS, Study
from charflow.analysis.reporting import axis_unit, pct, where, write_pair
from charflow.config.library import LibraryConfig
from charflow.execution.workers import default_jobs
from charflow.records.units import show_time

CMAP = "YlOrRd"
LOG_RATIO = 20.0  # an axis spanning more than this ratio is drawn on a log scale
ANNOTATE_CELLS = 10  # per axis; beyond it the numbers would crowd the map
DPI = 100
PARALLEL_MAPS = 16  # fewer maps are drawn faster than workers can import matplotlib
TICK_GAP = 0.13  # decades of table points between labelled sizes
PERCENT_TICKS = (0.01, 0.02, 0.05, 0.1, 0.2, 0.5, 1, 2, 5, 10, 20, 50, 100)


def _figure(width: float, height: float) -> Figure:
    """A figure on the Agg canvas, without pyplot: no display, no global figure registry."""
    fig = Figure(figsize=(width, height))
    FigureCanvasAgg(fig)
    return fig


def _png(fig: Figure) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=DPI)
    return buf.getvalue()


def _img(png: bytes, alt: str) -> str:
    data = base64.b64encode(png).decode("ascii")
    return f'<img alt="{html.escape(alt)}" src="data:image/png;base64,{data}">'


def _log_scale(values: np.ndarray) -> bool:
    return values[0] > 0 and values[-1] / values[0] > LOG_RATIO


def _between(grid: np.ndarray, i: int, fraction: float) -> float:
    """A point ``fraction`` of the way across cell ``i`` as drawn (log or linear)."""
    lo, hi = grid[i], grid[i + 1]
    if _log_scale(grid):
        return float(lo * (hi / lo) ** fraction)
    return float(lo + (hi - lo) * fraction)


def cell_maxima(check: TableCheck) -> np.ndarray:
    """Per grid cell of a table's slew × load plane, the largest relative error of the probes
    inside it (NaN where none simulated); a 3D table's probes at every other load count."""
    x, y = (np.asarray(a.values) for a in check.table.axes[:2])
    out = np.full((max(x.size - 1, 1), max(y.size - 1, 1)), np.nan)
    for p in check.points:
        i = min(max(int(np.searchsorted(x, p.coords[0], side="right")) - 1, 0), out.shape[0] - 1)
        j = min(max(int(np.searchsorted(y, p.coords[1], side="right")) - 1, 0), out.shape[1] - 1)
        out[i, j] = p.rel_error if math.isnan(out[i, j]) else max(out[i, j], p.rel_error)
    return out


def heat_map_png(config: LibraryConfig, check: TableCheck, vmax: float) -> bytes:
    """The error of a 2D table over its slew × load plane: each grid cell coloured by the worst
    probe inside it, the probes and the grid points marked. ``vmax`` (a fraction) is shared by
    every map of a report so that colours compare across tables. A 3D table is drawn over its
    first two axes, each cell coloured by its worst probe at any load of the other output."""
    xa, ya = check.table.axes[:2]
    (xl, xs, xu), (yl, ys, yu) = axis_unit(config, xa.name), axis_unit(config, ya.name)
    x, y = np.asarray(xa.values) / xs, np.asarray(ya.values) / ys
    cells = cell_maxima(check) * 100
    norm = Normalize(0.0, max(vmax * 100, 1e-9))
    # Fixed margins: a layout engine would draw every figure twice.
    fig = _figure(4.8, 3.7)
    ax = fig.add_axes((0.14, 0.12, 0.62, 0.74))
    cax = fig.add_axes((0.79, 0.12, 0.03, 0.74))
    mesh = ax.pcolormesh(x, y, cells.T, cmap=CMAP, norm=norm, shading="flat")
    if len(x) - 1 <= ANNOTATE_CELLS and len(y) - 1 <= ANNOTATE_CELLS:
        _annotate_cells(ax, x, y, cells, norm)
    _mark_points(ax, check, (x, xs), (y, ys), norm)
    if _log_scale(x):
        ax.set_xscale("log")
    if _log_scale(y):
        ax.set_yscale("log")
    ax.set_xlabel(f"{xl} ({xu})")
    ax.set_ylabel(f"{yl} ({yu})")
    st = check.stats
    stats = "no probe simulated" if st is None else f"max {pct(st.max_rel)}"
    if check.table.ndim == 3:
        stats += ", worst over the other output's load"
    ax.set_title(f"{check.label}\n{stats}", fontsize=8.5)
    ax.tick_params(labelsize=7)
    bar = fig.colorbar(mesh, cax=cax)
    bar.set_label("relative error, % (cell: its worst probe)", fontsize=7)
    bar.ax.tick_params(labelsize=7)
    return _png(fig)


def _annotate_cells(
    ax: Axes, x: np.ndarray, y: np.ndarray, cells: np.ndarray, norm: Normalize
) -> None:
    """Write each grid cell's worst error (percent) in it, white on the dark colours."""
    for i in range(len(x) - 1):
        for j in range(len(y) - 1):
            if not math.isnan(cells[i, j]):
                cx = _between(x, i, 0.5)
                cy = _between(y, j, 0.25)  # below the centre probe's marker
                dark = norm(cells[i, j]) > 0.6
                ax.text(
                    cx,
                    cy,
                    f"{cells[i, j]:.2g}",
                    ha="center",
                    va="center",
                    fontsize=6.5,
                    color="white" if dark else "black",
                )


def _mark_points(
    ax: Axes,
    check: TableCheck,
    xaxis: tuple[np.ndarray, float],
    yaxis: tuple[np.ndarray, float],
    norm: Normalize,
) -> None:
    """The probes (coloured by their error), the grid points and the failed probes; each axis
    comes as its values in library units and the scale of those units."""
    (x, xs), (y, ys) = xaxis, yaxis
    for kind, marker in ((CENTRE, "o"), ("random", "^")):
        pts = [p for p in check.points if p.kind == kind]
        if pts:
            ax.scatter(
                [p.coords[0] / xs for p in pts],
                [p.coords[1] / ys for p in pts],
                c=[p.rel_error * 100 for p in pts],
                cmap=CMAP,
                norm=norm,
                marker=marker,
                s=9,
                linewidths=0.4,
                edgecolors="0.25",
                zorder=3,
            )
    gx, gy = np.meshgrid(x, y, indexing="ij")
    ax.plot(gx.ravel(), gy.ravel(), "k+", markersize=6, markeredgewidth=1.1, zorder=4)
    for fails in check.failures:
        ax.plot(fails[0][0] / xs, fails[0][1] / ys, "bx", markersize=6, zorder=5)


_STYLE = """
body { font-family: system-ui, sans-serif; margin: 1.5em; color: #222; }
h1 { font-size: 1.4em; } h2 { font-size: 1.15em; margin-top: 1.6em; }
table.summary { border-collapse: collapse; font-size: 0.85em; }
table.summary th, table.summary td { border: 1px solid #ccc; padding: 0.2em 0.5em; }
table.summary th { background: #eee; cursor: pointer; user-select: none; }
table.summary td.n { text-align: right; font-variant-numeric: tabular-nums; }
.maps { display: flex; flex-wrap: wrap; gap: 0.6em; }
.maps figure { margin: 0; } .maps figcaption { font-size: 0.75em; color: #555; }
.note { color: #555; font-size: 0.9em; max-width: 60em; }
"""

# Click a header to sort by it; a second click reverses. Numbers sort by the data-v attribute.
_SORT = """
document.querySelectorAll("table.summary th").forEach((th, col) => {
  th.addEventListener("click", () => {
    const body = th.closest("table").tBodies[0];
    const up = th.dataset.dir !== "up";
    th.dataset.dir = up ? "up" : "down";
    const key = (row) => {
      const cell = row.cells[col];
      return cell.dataset.v !== undefined ? parseFloat(cell.dataset.v) : cell.textContent;
    };
    const rows = Array.from(body.rows).sort((a, b) => {
      const x = key(a), y = key(b);
      const order = typeof x === "number" ? x - y : String(x).localeCompare(String(y));
      return up ? order : -order;
    });
    rows.forEach((row) => body.appendChild(row));
  });
});
"""


def _num(value: float | None, text: str) -> str:
    """A number cell; an error that could not be measured sorts with the worst."""
    if value is None:
        return '<td class="n" data-v="Infinity">-</td>'
    return f'<td class="n" data-v="{value:.6g}">{text}</td>'


def _summary_row(config: LibraryConfig, n: int, c: TableCheck) -> str:
    st = c.stats
    cells = [
        f'<td><a href="#t{n}">{html.escape(c.cell)}</a></td>',
        f"<td>{html.escape(c.arc)}</td>",
        f"<td>{html.escape(c.state)}</td>",
        f"<td>{html.escape(c.table.quantity)}</td>",
        _num(len(c.points), str(len(c.points))),
        _num(len(c.failures), str(len(c.failures))),
    ]
    if st is None:
        cells += [_num(None, "")] * 4 + ["<td>-</td>"]
    else:
        cells += [
            _num(st.max_rel, pct(st.max_rel)),
            _num(st.rms_rel, pct(st.rms_rel)),
            _num(st.p95_rel, pct(st.p95_rel)),
            _num(st.max_abs, show_time(st.max_abs, config.time_unit)),
            f"<td>{html.escape(where(config, c.table.axes, c.points[st.worst].coords))}</td>",
        ]
    bars = c.error_bars
    if bars is None:
        cells += ["<td>-</td>"] * 2
    else:
        cells += [
            _num(bars.max_rel, pct(bars.max_rel)),
            _num(bars.median_rel, pct(bars.median_rel)),
        ]
    return "<tr>" + "".join(cells) + "</tr>"


def heat_maps(
    config: LibraryConfig, checks: Sequence[TableCheck], vmax: float, jobs: int | None = None
) -> list[bytes]:
    """One map per table; each takes ~0.1 s, so a report of dozens is drawn in parallel."""
    from joblib import Parallel, delayed

    jobs = jobs or default_jobs()
    if jobs == 1 or len(checks) < PARALLEL_MAPS:
        return [heat_map_png(config, c, vmax) for c in checks]
    return Parallel(n_jobs=min(jobs, len(checks)))(
        delayed(heat_map_png)(config, c, vmax) for c in checks
    )


def _fidelity_figures(
    config: LibraryConfig, checks: Sequence[TableCheck], vmax: float, jobs: int | None
) -> list[str]:
    """One figure per checked table: its heat map (2D and 3D tables), its probes' count."""
    planar = [n for n, c in enumerate(checks) if c.table.ndim in (2, 3)]
    drawn = heat_maps(config, [checks[n] for n in planar], vmax, jobs)
    maps = dict(zip(planar, drawn, strict=True))
    figures = []
    for n, c in enumerate(checks):
        if n in maps:
            body = _img(maps[n], c.label)
        else:
            body = f"<p>no map: the table has {c.table.ndim} axes</p>"
        caption = f"{len(c.points)} probes, {len(c.failures)} failed"
        figures.append(
            f'<figure id="t{n}">{body}<figcaption>{html.escape(caption)}</figcaption></figure>'
        )
    return figures


def _fidelity_spread(config: LibraryConfig, report: FidelityReport) -> str:
    """The report's one-paragraph spread: tables' errors and, if measured, their error bars."""
    spread = report.spread()
    text = (
        "No probe simulated."
        if spread is None
        else f"Largest relative error per table: worst {pct(spread[0])}, median {pct(spread[1])}."
    )
    bar_spread = report.bar_spread()
    if bar_spread is not None:
        text += (
            " Error bars (the simulator's numerical error of each grid value, re-measured at "
            f"tightened settings): largest {pct(bar_spread[0])}, median of the tables' medians "
            f"{pct(bar_spread[1])}; {bar_spread[2]} value(s) over "
            f"{pct(config.error_bars.warn_above)}."
        )
    return text


def fidelity_html(config: LibraryConfig, report: FidelityReport, jobs: int | None = None) -> str:
    """The fidelity report: settings, a sortable summary of every table, one heat map each."""
    s = report.settings
    spread = report.spread()
    vmax = 0.0 if spread is None else spread[0]
    head = (
        "<tr><th>cell</th><th>arc</th><th>state</th><th>table</th><th>points</th>"
        "<th>failed</th><th>max rel</th><th>rms rel</th><th>p95 rel</th><th>max abs</th>"
        "<th>worst at</th><th>max error bar</th><th>median error bar</th></tr>"
    )
    checks = report.checks
    ranked = sorted(range(len(checks)), key=lambda n: severity(checks[n]), reverse=True)
    rows = "\n".join(_summary_row(config, n, checks[n]) for n in ranked)
    figures = _fidelity_figures(config, checks, vmax, jobs)
    spread_text = _fidelity_spread(config, report)
    name = html.escape(config.name)
    floor = html.escape(show_time(s.rel_floor, config.time_unit))
    return f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8">
<title>{name}: table fidelity</title>
<style>{_STYLE}</style></head>
<body>
<h1>{name}: how closely the tables follow the simulator off their grid</h1>
<p class="note">{len(report.checks)} tables; {report.points} points simulated
({report.simulations} simulator runs, {report.failures} failed) in {report.wall_seconds:.1f} s.
Each table is checked at every cell centre of its grid and at {s.random_points} Latin-hypercube
points (seed {s.seed}) spread evenly over its cells. Relative error =
|interpolated &minus; simulated| / max(|simulated|, {floor}). {spread_text}</p>
<h2>Summary (click a column to sort)</h2>
<table class="summary"><thead>{head}</thead><tbody>
{rows}
</tbody></table>
<h2>Error maps</h2>
<p class="note">+ grid point; &#9679; cell centre; &#9650; random point; &times; failed probe.
Colour: relative error in %, one scale for every map (0 to {pct(vmax)}).</p>
<div class="maps">
{chr(10).join(figures)}
</div>
<p class="note">charflow {__version__}</p>
<script>{_SORT}</script>
</body></html>
"""


def _spread_ticks(sizes: Sequence[int]) -> list[int]:
    """Sizes far enough apart on the log axis of table points for their labels not to touch."""
    ticks: list[int] = []
    for n in sorted(sizes):
        if not ticks or math.log10(n * n) - math.log10(ticks[-1] ** 2) >= TICK_GAP:
            ticks.append(n)
    return ticks


def study_png(
    title: str,
    curves: Sequence[tuple[str, Sequence[int], Sequence[float], Sequence[float]]],
    targets: Sequence[float],
    chosen: Sequence[tuple[int, float]] = (),
) -> bytes:
    """Max (solid) and RMS (dashed) relative error against table points, one colour per
    placement; ``curves`` holds (placement, points per axis, max errors, rms errors) and
    ``chosen`` the (points per axis, max error) of each target's recommended grid."""
    fig = _figure(6.4, 4.2)
    ax = fig.subplots()
    sizes: set[int] = set()
    for k, (placement, n, max_err, rms_err) in enumerate(curves):
        points = [m**2 for m in n]
        sizes.update(n)
        ax.plot(points, np.asarray(max_err) * 100, "o-", color=f"C{k}", label=f"{placement}, max")
        ax.plot(
            points,
            np.asarray(rms_err) * 100,
            "s--",
            color=f"C{k}",
            ms=3.5,
            alpha=0.8,
            label=f"{placement}, rms",
        )
    for m, err in chosen:
        ax.plot(m * m, err * 100, "*", color="black", ms=13, mfc="none", zorder=5)
    for target in targets:
        ax.axhline(target * 100, color="0.4", linewidth=0.8, linestyle=":")
        ax.annotate(
            f"target {target * 100:g} %",
            (1.0, target * 100),
            xycoords=("axes fraction", "data"),
            ha="right",
            va="bottom",
            fontsize=7,
            color="0.3",
        )
    ax.set_yscale("log")
    ax.set_xscale("log")
    ticks = _spread_ticks(sorted(sizes))
    ax.set_xticks([m**2 for m in ticks], [f"{m}×{m}" for m in ticks], fontsize=7)
    ax.xaxis.set_minor_locator(NullLocator())
    ax.yaxis.set_major_locator(FixedLocator(PERCENT_TICKS))
    ax.yaxis.set_major_formatter(FormatStrFormatter("%g"))
    ax.yaxis.set_minor_locator(NullLocator())
    ax.tick_params(axis="y", labelsize=7)
    ax.set_xlabel("table points (points per axis squared)")
    ax.set_ylabel("relative error against the reference, %")
    ax.set_title(title + ("\n☆ recommended grid" if chosen else ""), fontsize=9)
    ax.grid(True, which="major", alpha=0.3)
    ax.legend(fontsize=7, ncol=3, loc="lower left")
    return _png(fig)


def write_fidelity(
    config: LibraryConfig, report: FidelityReport, out_dir: Path, jobs: int | None = None
) -> list[Path]:
    """``<library>.fidelity.json`` and the self-contained ``<library>.fidelity.html``."""
    page = fidelity_html(config, report, jobs)
    return write_pair(
        out_dir, f"{config.name}.fidelity", fidelity.to_json(config, report), ".html", page
    )


def study_figure(config: LibraryConfig, s: Study) -> bytes:
    """The grid study's error curves, each placement's grids that simulated, as PNG."""
    curves = []
    for p in PLACEMENTS:
        ok = [
            (c.size, c.max_rel, c.rms_rel)
            for c in s.curve(p)
            if c.max_rel is not None and c.rms_rel is not None
        ]
        if ok:
            curves.append((p, [n for n, _, _ in ok], [m for _, m, _ in ok], [r for _, _, r in ok]))
    chosen = [
        (r.best.size, r.best.max_rel)
        for r in s.recommendations
        if r.best is not None and r.best.max_rel is not None
    ]
    return study_png(
        f"{config.name} {s.cell} {s.arc}: interpolation error "
        f"(reference grid {'x'.join(str(len(a)) for a in s.reference)})",
        curves,
        [r.target for r in s.recommendations],
        chosen,
    )


def write_study(config: LibraryConfig, s: Study, out_dir: Path) -> list[Path]:
    """``<library>.<cell>.<from>-<to>.gridstudy.json`` and ``.png`` (error against points)."""
    stem = f"{config.name}.{s.cell}.{s.related}-{s.output}.gridstudy"
    return write_pair(out_dir, stem, gridstudy.to_json(config, s), ".png", study_figure(config, s))


def paths_png(config: LibraryConfig, corr: paths.Correlation) -> bytes:
    """Each measured path's predicted (and OpenSTA's) arrival against the simulated one."""
    t = config.time_scale
    done = [r for r in corr.results if r.failure is None]
    sim = np.array([r.simulated or 0.0 for r in done]) / t
    fig = _figure(5.5, 5.0)
    ax = fig.add_subplot()
    ax.scatter(sim, [r.predicted / t for r in done], s=18, label="tables (charflow)")
    sta = [
        (s, r.stages[-1].sta_arrival / t)
        for s, r in zip(sim, done, strict=True)
        if r.stages[-1].sta_arrival is not None
    ]
    if sta:
        xs, ys = zip(*sta, strict=True)
        ax.scatter(xs, ys, s=40, marker="x", label="OpenSTA")
    if sim.size:
        span = np.array([sim.min(), sim.max()])
        ax.plot(span, span, "k-", lw=0.8, label="equal")
        for frac in (-0.02, -0.01, 0.01, 0.02):
            ax.plot(span, span * (1 + frac), ":", lw=0.7, color="grey")
    ax.set_xlabel(f"simulated path delay ({config.time_unit})")
    ax.set_ylabel(f"predicted path delay ({config.time_unit})")
    ax.set_title(
        f"{config.name}: paths, predicted against simulated (dotted: ±1 %, ±2 %)", fontsize=9
    )
    ax.grid(True, alpha=0.3)
    ax.legend(fontsize=8)
    return _png(fig)


def _path_rows(config: LibraryConfig, corr: paths.Correlation) -> list[str]:
    t = config.time_scale
    rows = []
    for n, r in enumerate(corr.results, 1):
        if r.failure is not None:
            rows.append(
                f"<tr><td>{n}</td><td>{html.escape(r.path.name)}</td>"
                f"<td colspan=8>failed: {html.escape(r.failure)}</td></tr>"
            )
            continue
        sta = r.stages[-1].sta_arrival
        e, es = r.error(r.predicted), r.error(sta)
        cells = "/".join(s.stage.cell for s in r.stages)
        rows.append(
            f"<tr><td>{n}</td><td>{html.escape(r.path.name)}</td><td class=n>{len(r.stages)}"
            f"</td><td class=n>{r.slew / t:.4g}</td><td>{r.edge}</td>"
            f"{_num(r.simulated, f'{(r.simulated or 0) / t:.5g}')}"
            f"{_num(r.predicted, f'{r.predicted / t:.5g}')}"
            f"{_num(sta, '-' if sta is None else f'{sta / t:.5g}')}"
            f"{_num(e, '-' if e is None else f'{e * 100:+.2f} %')}"
            f"{_num(es, '-' if es is None else f'{es * 100:+.2f} %')}"
            f"<td>{html.escape(cells)}</td></tr>"
        )
    return rows


def _stage_rows(config: LibraryConfig, r: paths.PathResult) -> str:
    t = config.time_scale
    out = []
    for s in r.stages:
        p = s.predicted
        sta = "-" if s.sta_delay is None else f"{s.sta_delay / t:.5g}"
        out.append(
            f"<tr><td>{s.stage.gate} {s.stage.cell} {s.stage.pin}->{s.stage.output}</td>"
            f"<td>{p.input_edge}/{p.output_edge}</td>"
            f"<td class=n>{p.load / config.cap_scale:.4g}</td>"
            f"<td class=n>{s.sim_delay / t:.5g}</td><td class=n>{p.delay / t:.5g}</td>"
            f"<td class=n>{sta}</td>"
            f"<td class=n>{(p.delay / s.sim_delay - 1) * 100:+.2f} %</td>"
            f"<td class=n>{s.sim_slew_out / t:.4g}</td><td class=n>{p.slew_out / t:.4g}</td>"
            f"<td class=n>{(p.slew_out / s.sim_slew_out - 1) * 100:+.2f} %</td></tr>"
        )
    return "".join(out)


def paths_html(config: LibraryConfig, corr: paths.Correlation) -> str:
    """The path check as one self-contained page: the plot, the paths, every stage."""
    tu, cu = config.time_unit, config.cap_unit
    shape = config.input_shape.describe(cu, config.cap_scale)
    spread = "".join(
        f"<li>{name}: median |error| {s['median_abs_error'] * 100:.2f} %, worst "
        f"{s['worst_abs_error'] * 100:.2f} %, mean {s['mean_error'] * 100:+.2f} %</li>"
        for name, s in paths.summary(corr).items()
        if s is not None
    ) + "".join(
        f"<li>predicted at input slew {row['input_slew_s'] / config.time_scale:.4g} {tu}: "
        f"median |error| {s['median_abs_error'] * 100:.2f} %, worst "
        f"{s['worst_abs_error'] * 100:.2f} %</li>"
        for row in paths.by_slew(corr)
        if (s := row["predicted"]) is not None and len(corr.setup.slews) > 1
    )
    ranges = paths.effect_spread(corr)
    effects = "".join(
        f"<li>{k}: {'-' if v is None else f'{v * 100:+.2f} %'}"
        f"{'' if (r := ranges[k]) is None else '; per stage, median ' + paths.spread_text(r)}</li>"
        for k, v in paths.decomposition(corr).items()
    )
    stages = "".join(
        f"<h3>{html.escape(r.path.name)}, {r.edge}, slew {r.slew / config.time_scale:.4g} {tu}"
        f"</h3><table class=summary><thead><tr><th>stage</th><th>edges</th><th>load {cu}</th>"
        f"<th>sim delay</th><th>predicted</th><th>OpenSTA</th><th>error</th><th>sim slew</th>"
        f"<th>predicted slew</th><th>slew error</th></tr></thead><tbody>"
        f"{_stage_rows(config, r)}</tbody></table>"
        for r in corr.results
        if r.failure is None
    )
    head = (
        "<tr><th>#</th><th>path</th><th>stages</th><th>slew</th><th>edge</th><th>simulated</th>"
        "<th>predicted</th><th>OpenSTA</th><th>error</th><th>OpenSTA error</th><th>cells</th></tr>"
    )
    return (
        f"<!doctype html><html><head><meta charset=utf-8><title>{html.escape(config.name)} "
        f"paths</title><style>{_STYLE}</style></head><body><h1>{html.escape(config.name)}: "
        f"paths simulated against the tables</h1><p class=note>charflow {__version__}; times in "
        f"{tu}. Tables' and paths' input waveform: {html.escape(shape)}. "
        f"{html.escape(paths.pin_load_note(corr.setup.pin_load))}. "
        "Error = (value - simulated) / simulated: negative where the value is too fast. "
        "Stage effects: mean per-stage delay difference, as a fraction of the simulated "
        "delay, then per stage its median (lowest to highest; how many stages it moves by "
        f"more than {paths.EFFECT_FLAG * 100:g} %): load = lumped pin capacitance against the "
        "real gates, shape = the tables' input edge against the real waveform, interpolation "
        "= tables against the ramp point.</p>"
        f"<ul>{spread}</ul><ul>{effects}</ul>{_img(paths_png(config, corr), 'paths')}"
        f"<h2>Paths</h2><table class=summary><thead>{head}</thead><tbody>"
        f"{''.join(_path_rows(config, corr))}</tbody></table><h2>Stages</h2>{stages}"
        f"<script>{_SORT}</script></body></html>"
    )


def write_paths(config: LibraryConfig, corr: paths.Correlation, out_dir: Path) -> list[Path]:
    """``<library>.paths.json`` and the self-contained ``<library>.paths.html``."""
    return write_pair(
        out_dir,
        f"{config.name}.paths",
        paths.to_json(config, corr),
        ".html",
        paths_html(config, corr),
    )
