"""Inline SVG charts for the report: small, sharp, no dependency beyond markupsafe.

Colours come from the Okabe-Ito palette (safe for the common forms of colour blindness);
every colour in a chart is also named by a text label (legend, bar labels, tooltips), so
nothing depends on telling colours apart. Every text that goes into an SVG is escaped.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import TYPE_CHECKING, Any

from markupsafe import Markup, escape

if TYPE_CHECKING:
    from triage.run.summary import Bucket

# Okabe & Ito (2008), "Color Universal Design" palette; hex values from memory (common practice).
COLOURS = {
    "search": "#0072B2",   # blue
    "model": "#D55E00",    # vermillion
    "tie": "#CC79A7",      # reddish purple
    "blocked": "#E69F00",  # orange
    "skipped": "#000000",  # black
    "correct": "#009E73",  # bluish green
}
# text drawn on top of a fill: white on the dark fills, black on the light ones
INK = {"search": "#fff", "model": "#fff", "tie": "#000", "blocked": "#000", "skipped": "#fff", "correct": "#fff"}
LABELS = {
    "search": "search-side",
    "model": "model-side",
    "tie": "tie",
    "blocked": "blocked by a rule",
    "skipped": "not scored",
    "correct": "correct",
}
# left to right in the stacked bars: the search share reads straight off the axis
BAR_ORDER = ("search", "tie", "model", "blocked", "skipped", "correct")
# bottom to top in each bar of the score-gap histogram (the compared verdicts)
GAP_ORDER = ("model", "tie", "search")


def _f(x: float) -> str:
    """Compact coordinate."""
    return f"{x:.1f}".rstrip("0").rstrip(".")


def _pct(x: float) -> str:
    return f"{x * 100:.0f}%"


def length_bars(buckets: Sequence[Bucket], order: Sequence[str] = BAR_ORDER) -> Markup:
    """100%-stacked horizontal bars, one per length bucket, with a legend and the row count."""
    if not buckets:
        return Markup("")
    present = [v for v in order if any(int(b.counts.get(v, 0) or 0) for b in buckets)]
    left, right, bar_w, row_h, bar_h, top = 64, 64, 640, 30, 20, 40
    width = left + bar_w + right
    height = top + row_h * len(buckets) + 30
    out = [f'<svg class="chart" viewBox="0 0 {width} {height}" width="{width}" height="{height}" role="img" '
           f'aria-labelledby="bars-title"><title id="bars-title">Verdicts by length, as shares of each '
           f'bucket&#39;s rows</title>']
    # legend
    x = left
    for v in present:
        label = LABELS[v]
        out.append(f'<rect x="{x}" y="6" width="12" height="12" fill="{COLOURS[v]}"/>'
                   f'<text x="{x + 16}" y="16" class="lg">{escape(label)}</text>')
        x += 16 + 7 * len(label) + 18
    # grid and axis
    for t in (0, 0.25, 0.5, 0.75, 1.0):
        gx = left + bar_w * t
        out.append(f'<line x1="{_f(gx)}" y1="{top - 6}" x2="{_f(gx)}" y2="{top + row_h * len(buckets)}" class="grid"/>'
                   f'<text x="{_f(gx)}" y="{top + row_h * len(buckets) + 16}" class="tick" '
                   f'text-anchor="middle">{_pct(t)}</text>')
    for i, b in enumerate(buckets):
        y = top + i * row_h
        rows = int(b.rows or 0)
        out.append(f'<text x="{left - 8}" y="{y + bar_h - 5}" class="ax" text-anchor="end">{escape(b.range)}</text>')
        out.append(f'<text x="{left + bar_w + 8}" y="{y + bar_h - 5}" class="ax">n={rows}</text>')
        x0 = float(left)
        for v in present:
            c = int(b.counts.get(v, 0) or 0)
            if not c or not rows:
                continue
            w = bar_w * c / rows
            tip = f"{b.range}: {LABELS[v]} {c} of {rows} ({_pct(c / rows)})"
            out.append(f'<rect x="{_f(x0)}" y="{y}" width="{_f(w)}" height="{bar_h}" fill="{COLOURS[v]}">'
                       f'<title>{escape(tip)}</title></rect>')
            if w >= 8 * len(str(c)) + 6:
                out.append(f'<text x="{_f(x0 + w / 2)}" y="{y + bar_h - 6}" fill="{INK[v]}" class="in" '
                           f'text-anchor="middle">{c}</text>')
            x0 += w
    out.append("</svg>")
    return Markup("".join(out))


def nice_step(span: float, target: int = 16) -> float:
    """A round bin width (1, 2 or 5 times a power of ten) giving about `target` bins."""
    if not span > 0:
        return 1.0
    raw = span / target
    mag = 10 ** math.floor(math.log10(raw))
    for m in (1, 2, 5, 10):
        if raw <= m * mag:
            return m * mag
    return 10 * mag


def _bin_layout(vals: Sequence[float], target: int = 16) -> tuple[float, float, int]:
    """(first lower edge, bin width, number of bins) for finite values: widths are round, 0 is an edge."""
    lo, hi = min(vals), max(vals)
    step = nice_step(hi - lo, target) if hi > lo else max(abs(lo) / 10, 0.1)
    start = math.floor(lo / step) * step
    return start, step, max(1, math.floor((hi - start) / step) + 1)


def _bin_of(v: float, start: float, step: float, n: int) -> int:
    return min(int((v - start) // step), n - 1)


def gap_bins(values: Sequence[float], target: int = 16) -> list[tuple[float, float, int]]:
    """Histogram bins [lo, hi) aligned to multiples of a round width, so that 0 is a bin edge.

    The last bin includes its upper edge. Non-finite values are left out (the caller counts them).
    """
    vals = [float(v) for v in values if v is not None and math.isfinite(float(v))]
    if not vals:
        return []
    start, step, n = _bin_layout(vals, target)
    counts = [0] * n
    for v in vals:
        counts[_bin_of(v, start, step, n)] += 1
    return [(start + k * step, start + (k + 1) * step, counts[k]) for k in range(n)]


def split_outliers(values: Sequence[float], k: float = 3.0) -> tuple[list[float], list[float], list[float]]:
    """(below, inside, above) Tukey's far-out fences, Q1 - k*IQR and Q3 + k*IQR (k = 3; Tukey 1977, from memory).

    A few huge score gaps (a token the model all but forbids) would squeeze every other bar into one;
    the chart draws the inside values and names the others in words.
    """
    vals = sorted(float(v) for v in values if v is not None and math.isfinite(float(v)))
    if len(vals) < 8:
        return [], vals, []

    def q(p: float) -> float:  # linear interpolation between order statistics (numpy's default)
        x = p * (len(vals) - 1)
        i = int(math.floor(x))
        return vals[i] + (vals[min(i + 1, len(vals) - 1)] - vals[i]) * (x - i)

    q1, q3 = q(0.25), q(0.75)
    iqr = q3 - q1
    if iqr <= 0:
        return [], vals, []
    lo, hi = q1 - k * iqr, q3 + k * iqr
    return [v for v in vals if v < lo], [v for v in vals if lo <= v <= hi], [v for v in vals if v > hi]


def gap_histogram(values: Sequence[float], verdicts: Sequence[str], margin: float | None = None) -> Markup:
    """Histogram of score_gap = ref_score - out_score, each bar split by the rows' own verdicts.

    Left of 0 the model prefers its output, right of 0 the reference; a gap within the tie margin
    either side of 0 is a tie, so the bars next to 0 can hold ties on both sides. The colours are
    the verdicts the rows were given, never re-derived from the gap.
    """
    pairs = [(float(g), str(v)) for g, v in zip(values, verdicts, strict=True)
             if g is not None and math.isfinite(float(g))]
    below, inside, above = split_outliers([g for g, _ in pairs])
    bins = gap_bins(inside)
    if not bins:
        return Markup("")
    start, step, n = _bin_layout(inside)
    lo_in, hi_in = inside[0], inside[-1]
    stacks = [dict.fromkeys(GAP_ORDER, 0) for _ in bins]
    for g, v in pairs:
        if lo_in <= g <= hi_in and v in GAP_ORDER:
            stacks[_bin_of(g, start, step, n)][v] += 1  # the bin gap_bins counts it in
    left, right, plot_w, plot_h, top = 48, 16, 700, 180, 48
    width, height = left + plot_w + right, top + plot_h + 44
    lo, hi = bins[0][0], bins[-1][1]
    if lo > 0:
        lo = 0.0
    if hi < 0:
        hi = 0.0
    span = hi - lo or 1.0
    top_count = max(c for _, _, c in bins) or 1
    peak = top_count * 1.12  # headroom for the count labels

    def sx(v: float) -> float:
        return left + plot_w * (v - lo) / span

    def sy(c: float) -> float:
        return top + plot_h - plot_h * c / peak

    out = [f'<svg class="chart" viewBox="0 0 {width} {height}" width="{width}" height="{height}" role="img" '
           f'aria-labelledby="gap-title"><title id="gap-title">Histogram of the score gap, reference score minus '
           f'output score, by verdict</title>']
    # the legend names each colour's verdict and where on the axis it lies
    tie = "within the tie margin" + (f" ({margin:g})" if margin is not None else "") + " of 0"
    legend = (("model", "model-side: below 0, beyond the tie margin"), ("tie", f"tie: {tie}"),
              ("search", "search-side: above 0, beyond the tie margin"))
    for k, (v, text) in enumerate(legend):
        y = 6 + 14 * k
        out.append(f'<rect x="{left}" y="{y - 2}" width="12" height="11" fill="{COLOURS[v]}"/>'
                   f'<text x="{left + 16}" y="{y + 8}" class="lg">{escape(text)}</text>')
    for t in sorted({0, top_count // 2, top_count}):
        ty = sy(t)
        out.append(f'<line x1="{left}" y1="{_f(ty)}" x2="{left + plot_w}" y2="{_f(ty)}" class="grid"/>'
                   f'<text x="{left - 6}" y="{_f(ty + 4)}" class="tick" text-anchor="end">{t:g}</text>')
    for (a, b, c), stack in zip(bins, stacks, strict=True):
        if not c:
            continue
        x, w = sx(a), max(sx(b) - sx(a) - 1, 1)
        base = 0
        for v in GAP_ORDER:
            k = stack[v]
            if not k:
                continue
            tip = f"score gap {a:.3g} to {b:.3g}: {k} {LABELS[v]} row{'s' if k != 1 else ''} (of {c} in the bar)"
            out.append(f'<rect x="{_f(x)}" y="{_f(sy(base + k))}" width="{_f(w)}" '
                       f'height="{_f(sy(base) - sy(base + k))}" fill="{COLOURS[v]}"><title>{escape(tip)}</title></rect>')
            base += k
        if w >= 7 * len(str(c)):
            out.append(f'<text x="{_f(x + w / 2)}" y="{_f(sy(c) - 3)}" class="tick" text-anchor="middle">{c}</text>')
    # x axis: a few round ticks, 0 always drawn and marked
    step = nice_step(span, 6)
    k = math.ceil(lo / step)
    while k * step <= hi + step * 1e-9:
        t = round(k * step, 12) + 0.0  # integer multiples: no drift, no "-5.55e-17" label
        tx = sx(t)
        out.append(f'<line x1="{_f(tx)}" y1="{top + plot_h}" x2="{_f(tx)}" y2="{top + plot_h + 4}" class="axl"/>'
                   f'<text x="{_f(tx)}" y="{top + plot_h + 16}" class="tick" text-anchor="middle">{t:.3g}</text>')
        k += 1
    zx = sx(0.0)
    out.append(f'<line x1="{left}" y1="{top + plot_h}" x2="{left + plot_w}" y2="{top + plot_h}" class="axl"/>'
               f'<line x1="{_f(zx)}" y1="{top - 4}" x2="{_f(zx)}" y2="{top + plot_h}" class="zero"/>')
    out.append(f'<text x="{left + plot_w / 2}" y="{height - 6}" class="ax" text-anchor="middle">score gap = '
               f'reference score minus output score (rows per bin)</text>')
    if below:
        out.append(f'<text x="{left + 4}" y="{top + 12}" class="tick">◀ {len(below)} more below {min(below):.4g} '
                   f'(not drawn)</text>')
    if above:
        out.append(f'<text x="{left + plot_w - 4}" y="{top + 12}" class="tick" text-anchor="end">{len(above)} more '
                   f'above, up to {max(above):.4g} (not drawn) ▶</text>')
    out.append("</svg>")
    return Markup("".join(out))


def curve(points: Sequence[tuple[Any, Any]], y_label: str, mark: Any = None) -> Markup:
    """A line over beam widths (x) of one number (y), the current width marked in words."""
    pts = sorted((float(x), float(y)) for x, y in points
                 if x is not None and y is not None and math.isfinite(float(x)) and math.isfinite(float(y)))
    if len(pts) < 2:
        return Markup("")
    left, right, plot_w, plot_h, top = 56, 24, 560, 150, 16
    width, height = left + plot_w + right, top + plot_h + 40
    xs, ys = [p[0] for p in pts], [p[1] for p in pts]
    x0, x1 = min(xs), max(xs)
    y0, y1 = min(ys), max(ys)
    if y1 == y0:
        y0, y1 = y0 - 1, y1 + 1
    pad = (y1 - y0) * 0.1
    y0, y1 = y0 - pad, y1 + pad

    def sx(x: float) -> float:
        return left + plot_w * (x - x0) / ((x1 - x0) or 1)

    def sy(y: float) -> float:
        return top + plot_h - plot_h * (y - y0) / (y1 - y0)

    out = [f'<svg class="chart" viewBox="0 0 {width} {height}" width="{width}" height="{height}" role="img" '
           f'aria-label="{escape(y_label)} by beam width">']
    for t in (y0 + pad, (y0 + y1) / 2, y1 - pad):
        out.append(f'<line x1="{left}" y1="{_f(sy(t))}" x2="{left + plot_w}" y2="{_f(sy(t))}" class="grid"/>'
                   f'<text x="{left - 6}" y="{_f(sy(t) + 4)}" class="tick" text-anchor="end">{t:.1f}</text>')
    out.append(f'<polyline fill="none" stroke="{COLOURS["search"]}" stroke-width="2" points="'
               + " ".join(f"{_f(sx(x))},{_f(sy(y))}" for x, y in pts) + '"/>')
    for x, y in pts:
        cur = mark is not None and float(mark) == x
        out.append(f'<circle cx="{_f(sx(x))}" cy="{_f(sy(y))}" r="{5 if cur else 3}" fill="{COLOURS["search"]}">'
                   f'<title>beam {x:g}: {escape(y_label)} {y:.2f}{" (current)" if cur else ""}</title></circle>'
                   f'<text x="{_f(sx(x))}" y="{top + plot_h + 16}" class="tick" text-anchor="middle">'
                   f'{x:g}{" (current)" if cur else ""}</text>')
    out.append(f'<text x="{left + plot_w / 2}" y="{height - 4}" class="ax" text-anchor="middle">beam width; '
               f'line: {escape(y_label)}</text></svg>')
    return Markup("".join(out))


def loss_steps(by_bucket: Sequence[dict[str, Any]]) -> Markup:
    """Strip plot: one row per length bucket, one mark per search-side row at the decoding step
    where its reference left the beam (count labels where several rows share a step)."""
    rows = [b for b in by_bucket if b.get("steps")]
    if not rows:
        return Markup("")
    top_step = max(max(b["steps"]) for b in rows)
    left, right, plot_w, row_h, top = 64, 24, 600, 28, 28
    width, height = left + plot_w + right, top + row_h * len(rows) + 34
    def sx(step: float) -> float:
        return left + plot_w * (step - 1) / max(top_step - 1, 1)
    out = [f'<svg class="chart" viewBox="0 0 {width} {height}" width="{width}" height="{height}" role="img" '
           f'aria-labelledby="lost-title"><title id="lost-title">Decoding step where the reference left the beam, '
           f'by length bucket (search-side rows)</title>',
           f'<text x="{left}" y="16" font-size="12">each mark: one search-side row ({LABELS["search"]}); '
           f'number: rows at that step</text>']
    for k, b in enumerate(rows):
        y = top + row_h * k + row_h / 2
        out.append(f'<text x="{left - 8}" y="{_f(y + 4)}" font-size="12" text-anchor="end">{escape(b["range"])}</text>')
        out.append(f'<line x1="{left}" x2="{left + plot_w}" y1="{_f(y)}" y2="{_f(y)}" stroke="#ddd"/>')
        counts: dict[int, int] = {}
        for s in b["steps"]:
            counts[int(s)] = counts.get(int(s), 0) + 1
        for s, n in sorted(counts.items()):
            out.append(f'<circle cx="{_f(sx(s))}" cy="{_f(y)}" r="{_f(4 + min(n, 6))}" fill="{COLOURS["search"]}" '
                       f'fill-opacity="0.8"><title>step {s}: {n} row(s)</title></circle>')
            if n > 1:
                out.append(f'<text x="{_f(sx(s))}" y="{_f(y - 10 - min(n, 6))}" font-size="10" '
                           f'text-anchor="middle">{n}</text>')
    axis_y = top + row_h * len(rows) + 4
    out.append(f'<line x1="{left}" x2="{left + plot_w}" y1="{axis_y}" y2="{axis_y}" stroke="#444"/>')
    step = max(1, int(nice_step(max(top_step - 1, 1), 8)))
    for s in range(1, top_step + 1, step):
        out.append(f'<text x="{_f(sx(s))}" y="{axis_y + 14}" font-size="11" text-anchor="middle">{s}</text>')
    out.append(f'<text x="{left + plot_w / 2}" y="{axis_y + 28}" font-size="11" text-anchor="middle">'
               f'decoding step (target position)</text></svg>')
    return Markup("".join(out))
