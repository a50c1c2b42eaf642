"""The HTML report of a policy preview: one self-contained file (inline CSS, inline SVG drawn
here, no script, no external URL) with the statistics table and the plots.

Every plot is a ``<figure class="plot" id="plot-...">`` holding an SVG with a title and axis
labels, and beside it a table of the plotted numbers, so the report reads without the pictures
and a test can find each plot by its id.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from html import escape

from service.preview.replay import PreviewReport
from service.preview.table import cell, number

PALETTE = ("#1f6fb2", "#d9622b", "#2a9d5c", "#8e44ad", "#b8860b", "#c0392b", "#17808a")
MODEL_COLOUR = "#e0559a"
WIDTH, HEIGHT = 560, 300
LEFT, RIGHT, TOP, BOTTOM = 64, 16, 36, 52

CSS = """
body { font-family: system-ui, sans-serif; margin: 2rem; color: #1b1b1b; background: #fff; }
h1 { font-size: 1.4rem; } h2 { font-size: 1.15rem; margin-top: 2rem; }
table { border-collapse: collapse; font-size: 0.85rem; }
th, td { border: 1px solid #ccc; padding: 0.2rem 0.5rem; text-align: right; }
th:first-child, td:first-child { text-align: left; }
figure.plot { display: flex; flex-wrap: wrap; gap: 1.5rem; align-items: flex-start;
  margin: 1rem 0; }
figure.plot figcaption { flex-basis: 100%; font-weight: 600; }
svg { background: #fff; }
.note { color: #444; font-size: 0.85rem; max-width: 60rem; }
"""


def colour(i: int) -> str:
    return PALETTE[i % len(PALETTE)]


def render(report: PreviewReport) -> str:
    """The whole report as one HTML document."""
    title = f"Policy preview: {', '.join(report.versions)}"
    parts = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>{escape(title)}</title><style>{CSS}</style></head><body>",
        f"<h1>{escape(title)}</h1>",
        _summary(report),
        "<h2>Statistics</h2>",
        _statistics_table(report),
        "<h2>Plots</h2>",
        _kept_plot(report),
        _entropy_plot(report),
    ]
    if report.sweep is not None:
        parts.append(_sweep_plot(report))
    parts.append("</body></html>")
    return "\n".join(parts) + "\n"


def _summary(report: PreviewReport) -> str:
    unit = "rows" if report.mode == "capture" else "continuations"
    sources = ", ".join(escape(s) for s in report.sources) or "-"
    text = (
        f"{escape(report.mode)} mode: {report.rows} rows; intervals are "
        f"{report.confidence:.0%} percentile bootstrap intervals over {report.units} {unit}, "
        f"{report.resamples} resamples, seed {report.seed}. Differences are each version minus "
        f"the baseline {escape(report.versions[0])}, resampled in pairs. Sources: {sources}."
    )
    extra = ""
    if report.skipped:
        extra = f" Skipped unreadable files: {', '.join(escape(s) for s in report.skipped)}."
    return f'<p class="note">{text}{extra}</p>'


def _table(head: Sequence[str], rows: Sequence[Sequence[str]], caption: str = "") -> str:
    cap = f"<caption>{escape(caption)}</caption>" if caption else ""
    th = "".join(f'<th scope="col">{escape(h)}</th>' for h in head)
    body = "".join("<tr>" + "".join(f"<td>{escape(c)}</td>" for c in row) + "</tr>" for row in rows)
    return f"<table>{cap}<thead><tr>{th}</tr></thead><tbody>{body}</tbody></table>"


def _statistics_table(report: PreviewReport) -> str:
    head = ["statistic", *report.versions]
    head += [f"{v} - {report.versions[0]}" for v in report.versions[1:]]
    rows = []
    for name in report.statistics[0]:
        row = [name] + [cell(s[name]) for s in report.statistics]
        row += [cell(d[name], signed=True) for d in report.differences]
        rows.append(row)
    return _table(head, rows, "value [low, high] per statistic")


# --- SVG --------------------------------------------------------------------------------------


class _Axes:
    """Maps data to pixels inside the plot area."""

    def __init__(self, x0: float, x1: float, y0: float, y1: float) -> None:
        self.x0, self.x1 = x0, x1 if x1 > x0 else x0 + 1.0
        self.y0, self.y1 = y0, y1 if y1 > y0 else y0 + 1.0

    def x(self, v: float) -> float:
        return LEFT + (v - self.x0) / (self.x1 - self.x0) * (WIDTH - LEFT - RIGHT)

    def y(self, v: float) -> float:
        return HEIGHT - BOTTOM - (v - self.y0) / (self.y1 - self.y0) * (HEIGHT - TOP - BOTTOM)


def _svg(plot_id: str, title: str, x_label: str, y_label: str, body: list[str]) -> str:
    return (
        f'<svg width="{WIDTH}" height="{HEIGHT}" '
        f'viewBox="0 0 {WIDTH} {HEIGHT}" role="img" aria-labelledby="{plot_id}-title">'
        f'<title id="{plot_id}-title">{escape(title)}</title>'
        f'<text x="{WIDTH / 2}" y="20" text-anchor="middle" font-size="14">{escape(title)}</text>'
        f'<text x="{(LEFT + WIDTH - RIGHT) / 2}" y="{HEIGHT - 10}" text-anchor="middle" '
        f'font-size="12">{escape(x_label)}</text>'
        f'<text x="16" y="{(TOP + HEIGHT - BOTTOM) / 2}" text-anchor="middle" font-size="12" '
        f'transform="rotate(-90 16 {(TOP + HEIGHT - BOTTOM) / 2})">{escape(y_label)}</text>'
        + "".join(body)
        + "</svg>"
    )


def _frame(axes: _Axes, y_ticks: Sequence[float]) -> list[str]:
    out = [
        f'<line x1="{LEFT}" y1="{HEIGHT - BOTTOM}" x2="{WIDTH - RIGHT}" y2="{HEIGHT - BOTTOM}" '
        'stroke="#333"/>',
        f'<line x1="{LEFT}" y1="{TOP}" x2="{LEFT}" y2="{HEIGHT - BOTTOM}" stroke="#333"/>',
    ]
    for t in y_ticks:
        y = axes.y(t)
        out.append(
            f'<line x1="{LEFT - 4}" y1="{y:.1f}" x2="{WIDTH - RIGHT}" y2="{y:.1f}" '
            'stroke="#e3e3e3"/>'
            f'<text x="{LEFT - 6}" y="{y + 4:.1f}" text-anchor="end" font-size="10">'
            f"{escape(number(t))}</text>"
        )
    return out


def _ticks(lo: float, hi: float, count: int = 5) -> list[float]:
    """Round tick values (1, 2 or 5 times a power of ten apart) covering [lo, hi]."""
    if not hi > lo:
        return [lo]
    raw = (hi - lo) / (count - 1)
    power = 10.0 ** math.floor(math.log10(raw))
    step = next(m * power for m in (1, 2, 5, 10) if m * power >= raw)
    first = math.ceil(lo / step - 1e-9)
    ticks = [k * step for k in range(first, math.floor(hi / step + 1e-9) + 1)]
    return [float(f"{t:.10g}") for t in ticks]


def _legend(names: Sequence[str], colours: Sequence[str]) -> list[str]:
    out = []
    for i, (name, c) in enumerate(zip(names, colours, strict=True)):
        y = TOP + 4 + i * 14
        out.append(
            f'<rect x="{WIDTH - RIGHT - 194}" y="{y - 2}" width="194" height="14" '
            'fill="#ffffff" fill-opacity="0.8"/>'
            f'<rect x="{WIDTH - RIGHT - 190}" y="{y}" width="10" height="10" fill="{c}"/>'
            f'<text x="{WIDTH - RIGHT - 176}" y="{y + 9}" font-size="10">{escape(name)}</text>'
        )
    return out


def _polyline(
    axes: _Axes, xs: Sequence[float], ys: Sequence[float | None], c: str, dash: bool
) -> str:
    points = [
        f"{axes.x(x):.1f},{axes.y(y):.1f}"
        for x, y in zip(xs, ys, strict=True)
        if y is not None and math.isfinite(y)
    ]
    style = ' stroke-dasharray="6 4"' if dash else ""
    dots = "".join(
        f'<circle cx="{p.split(",")[0]}" cy="{p.split(",")[1]}" r="2.5" fill="{c}"/>'
        for p in points
    )
    line = " ".join(points)
    return f'<polyline fill="none" stroke="{c}" stroke-width="2.5"{style} points="{line}"/>{dots}'


def _figure(plot_id: str, caption: str, svgs: Sequence[str], table: str) -> str:
    return (
        f'<figure class="plot" id="{plot_id}"><figcaption>{escape(caption)}</figcaption>'
        + "".join(svgs)
        + table
        + "</figure>"
    )


def _kept_plot(report: PreviewReport) -> str:
    edges = report.kept_edges
    shares = [[c / max(sum(h), 1) for c in h] for h in report.kept_histograms]
    top = max([max(s) for s in shares] + [0.01])
    axes = _Axes(0, len(edges), 0, top * 1.15)  # headroom for the legend
    body = _frame(axes, _ticks(0, top))
    n = len(report.versions)
    slot = (axes.x(1) - axes.x(0)) * 0.8 / n
    for v, share in enumerate(shares):
        for i, s in enumerate(share):
            if s <= 0:
                continue
            x = axes.x(i) + (axes.x(1) - axes.x(0)) * 0.1 + v * slot
            y = axes.y(s)
            body.append(
                f'<rect x="{x:.1f}" y="{y:.1f}" width="{max(slot - 0.5, 0.5):.1f}" '
                f'height="{HEIGHT - BOTTOM - y:.1f}" fill="{colour(v)}"/>'
            )
    labels = _bucket_labels(edges)
    every = 1 if len(labels) <= 10 else 2
    for i, label in enumerate(labels):
        if i % every == 0:
            body.append(
                f'<text x="{axes.x(i + 0.5):.1f}" y="{HEIGHT - BOTTOM + 14}" text-anchor="middle" '
                f'font-size="9">{escape(label)}</text>'
            )
    body += _legend(report.versions, [colour(i) for i in range(n)])
    svg = _svg(
        "plot-kept",
        "Kept-set size per row",
        "kept-set size (Fibonacci buckets)",
        "share of rows",
        body,
    )
    rows = [
        [label, *(number(s[i]) for s in shares)]
        for i, label in enumerate(labels)
        if any(s[i] for s in shares)
    ]
    table = _table(["kept size", *report.versions], rows, "share of rows per kept-size bucket")
    return _figure("plot-kept", "Kept-set size histogram per version", [svg], table)


def _bucket_labels(edges: Sequence[int]) -> list[str]:
    out = []
    for i, e in enumerate(edges):
        lo = 1 if i == 0 else edges[i - 1] + 1
        out.append(str(e) if lo >= e else f"{lo}-{e}")
    return out


def _entropy_plot(report: PreviewReport) -> str:
    grid = report.entropy_grid
    axes = _Axes(grid[0], grid[-1], 0, 1)
    body = _frame(axes, _ticks(0, 1))
    for t in _ticks(grid[0], grid[-1]):
        body.append(
            f'<text x="{axes.x(t):.1f}" y="{HEIGHT - BOTTOM + 14}" text-anchor="middle" '
            f'font-size="10">{escape(number(t))}</text>'
        )
    names = ["model", *report.versions]
    colours = [MODEL_COLOUR] + [colour(i) for i in range(len(report.versions))]
    for i, (name, c) in enumerate(zip(names, colours, strict=True)):
        body.append(_polyline(axes, grid, report.entropy_cdf[name], c, dash=i == 0))
    raw = "model (raw logits)"
    if report.mode == "prompts":  # each version continues differently: the baseline's steps
        raw = f"model (raw, {report.versions[0]} steps)"
    legend = [raw, *(f"{v} (after policy)" for v in report.versions)]
    body += _legend(legend, colours)
    svg = _svg(
        "plot-entropy",
        "Entropy per row, cumulative",
        "entropy (nats)",
        "share of rows with entropy <= x",
        body,
    )
    step = max(1, len(grid) // 10)
    rows = [
        [number(grid[i]), *(number(report.entropy_cdf[n][i]) for n in names)]
        for i in range(0, len(grid), step)
    ]
    table = _table(["entropy", *names], rows, "share of rows with entropy at most x")
    return _figure(
        "plot-entropy", "Entropy distribution: raw model and after each policy", [svg], table
    )


def _sweep_plot(report: PreviewReport) -> str:
    s = report.sweep
    assert s is not None
    xs = s.values
    panels = []
    kept_series: list[tuple[str, list[float]]] = [
        ("kept median", s.kept_median),
        ("kept mean", s.kept_mean),
    ]
    diversity: list[tuple[str, list[float]]] = [("entropy after policy (nats)", s.entropy_policy)]
    diversity += [(k, v) for k, v in s.distinct.items()]
    for panel_id, title, y_label, series in (
        ("plot-sweep-kept", f"Kept-set size vs {s.field}", "kept-set size", kept_series),
        ("plot-sweep-diversity", f"Diversity vs {s.field}", "value", diversity),
    ):
        finite = [y for _, ys in series for y in ys if math.isfinite(y)] or [0.0, 1.0]
        axes = _Axes(xs[0], xs[-1], min(0.0, min(finite)), max(finite) * 1.05 or 1.0)
        body = _frame(axes, _ticks(axes.y0, axes.y1))
        for t in _ticks(xs[0], xs[-1]):
            body.append(
                f'<text x="{axes.x(t):.1f}" y="{HEIGHT - BOTTOM + 14}" text-anchor="middle" '
                f'font-size="10">{escape(number(t))}</text>'
            )
        for i, (_, ys) in enumerate(series):
            body.append(
                _polyline(
                    axes, xs, [y if math.isfinite(y) else None for y in ys], colour(i), dash=False
                )
            )
        body += _legend([n for n, _ in series], [colour(i) for i in range(len(series))])
        panels.append(_svg(panel_id, title, s.field, y_label, body))
    names = [n for n, _ in kept_series + diversity]
    values: list[list[float]] = [ys for _, ys in kept_series + diversity]
    rows = [[number(x), *(number(v[i]) for v in values)] for i, x in enumerate(xs)]
    table = _table([s.field, *names], rows, f"sweep of {s.field} on {report.versions[0]}")
    return _figure(
        "plot-sweep",
        f"Sweep of {s.field} on {report.versions[0]}: kept size and diversity",
        panels,
        table,
    )
