"""Charts as inline SVG, drawn on the server: no JavaScript, no files to fetch, work offline.

Drawings, each a function returning :class:`markupsafe.Markup`:

* :func:`histogram_overlay`: two score distributions on common bins, as shares of rows
  (so samples of different sizes compare), with each side's mean marked;
* :func:`trend_chart`: one statistic over a model's timeline with its limit drawn as a
  (possibly moving) dashed line, and fixed bands such as a floor;
* :func:`decision_strip`: one square per verdict, coloured by the decision in force, ringed when
  overridden, each a link;
* :func:`limit_gauge`: a small bar of a finding's value against its limit;
* :func:`interval_bar`: a confidence interval as a bar, with the estimate and the limit;
* :func:`lorenz_chart`: Lorenz curves of list exposure (before and after).

Colours come from CSS classes (``tg-cand``, ``tg-base``, ``tg-hold``, ...) set in the page's
style sheet; every text is escaped. Coordinates are rounded to 0.1 px.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

from markupsafe import Markup, escape

from service.web.format import num, pct


@dataclass(frozen=True)
class Scale:
    """Linear map from the domain [d0, d1] to the range [r0, r1]."""

    d0: float
    d1: float
    r0: float
    r1: float

    def __call__(self, value: float) -> float:
        if self.d1 == self.d0:
            return (self.r0 + self.r1) / 2
        return self.r0 + (value - self.d0) / (self.d1 - self.d0) * (self.r1 - self.r0)


@dataclass(frozen=True)
class Box:
    """The plot area inside a drawing of *width* x *height* with the given margins."""

    width: float
    height: float
    left: float = 48
    right: float = 14
    top: float = 14
    bottom: float = 30

    @property
    def x0(self) -> float:
        return self.left

    @property
    def x1(self) -> float:
        return self.width - self.right

    @property
    def y0(self) -> float:  # bottom of the plot area (SVG y grows downwards)
        return self.height - self.bottom

    @property
    def y1(self) -> float:
        return self.top


#: Estimated width of one legend character in px (12 px bold sans), to lay legends out.
LEGEND_CHAR = 7.4


def r(value: float) -> str:
    """A coordinate, rounded to 0.1 px."""
    text = f"{value:.1f}"
    return text[:-2] if text.endswith(".0") else text


def nice_ticks(lo: float, hi: float, count: int = 5) -> list[float]:
    """Round tick values (1, 2 or 5 times a power of ten apart) covering [lo, hi]."""
    if not (math.isfinite(lo) and math.isfinite(hi)):
        return []
    if hi < lo:
        lo, hi = hi, lo
    if hi == lo:
        return [lo]
    raw = (hi - lo) / max(count, 1)
    power = 10 ** math.floor(math.log10(raw))
    step = next(m * power for m in (1, 2, 5, 10) if m * power >= raw)
    first = math.ceil(lo / step - 1e-9) * step
    ticks = []
    value = first
    while value <= hi + step * 1e-9:
        ticks.append(round(value, 12) + 0.0)
        value += step
    return ticks


def _svg(width: float, height: float, title: str, body: list[str], css: str = "") -> Markup:
    cls = f"tg-chart {css}".strip()
    return Markup(
        f'<svg xmlns="http://www.w3.org/2000/svg" class="{cls}" viewBox="0 0 {r(width)} '
        f'{r(height)}" width="{r(width)}" height="{r(height)}" role="img">'
        f"<title>{escape(title)}</title>" + "".join(body) + "</svg>"
    )


def _text(x: float, y: float, text: str, cls: str = "tg-label", anchor: str = "middle") -> str:
    return f'<text x="{r(x)}" y="{r(y)}" class="{cls}" text-anchor="{anchor}">{escape(text)}</text>'


# --- distributions --------------------------------------------------------------------------


@dataclass(frozen=True)
class Series:
    """One side of an overlay: a label, shares per bin (summing to 1), its mean and CSS class."""

    label: str
    shares: Sequence[float]
    css: str
    mean: float | None = None


def histogram_overlay(
    edges: Sequence[float],
    series: Sequence[Series],
    *,
    width: float = 1080,
    height: float = 300,
    x_label: str = "score",
) -> Markup:
    """Bars of each series' share per bin, later series drawn over earlier ones, on one y
    scale (the largest share of any series). Bar heights are proportional to shares."""
    # the legend: one entry per series, wrapped onto a second row when it does not fit
    entries = [s.label + (f" (mean {num(s.mean)})" if s.mean is not None else "") for s in series]
    rows: list[list[int]] = [[]]
    used = 0.0
    for i, text in enumerate(entries):
        need = 34 + LEGEND_CHAR * len(text)
        if rows[-1] and used + need > width:
            rows.append([])
            used = 0.0
        rows[-1].append(i)
        used += need
    box = Box(width, height, top=14 + 20 * len(rows))
    if len(edges) < 2 or not series:
        return _svg(
            width,
            height,
            "no distribution to draw",
            [_text(width / 2, height / 2, "no finite scores to draw")],
        )
    top_share = max((max(s.shares, default=0.0) for s in series), default=0.0) or 1.0
    ticks_y = nice_ticks(0.0, top_share, 4)
    if len(ticks_y) >= 2 and ticks_y[-1] < top_share:  # end the axis on a round tick
        ticks_y.append(ticks_y[-1] + (ticks_y[1] - ticks_y[0]))
    y_max = max(top_share, ticks_y[-1] if ticks_y else top_share)
    xs = Scale(edges[0], edges[-1], box.x0, box.x1)
    ys = Scale(0.0, y_max, box.y0, box.y1)
    body: list[str] = []
    for t in ticks_y:
        body.append(
            f'<line class="tg-grid" x1="{r(box.x0)}" x2="{r(box.x1)}" y1="{r(ys(t))}" '
            f'y2="{r(ys(t))}"/>'
        )
        body.append(_text(box.x0 - 6, ys(t) + 4, pct(t, 0), anchor="end"))
    for t in nice_ticks(edges[0], edges[-1], 6):
        body.append(
            f'<line class="tg-axis" x1="{r(xs(t))}" x2="{r(xs(t))}" y1="{r(box.y0)}" '
            f'y2="{r(box.y0 + 4)}"/>'
        )
        body.append(_text(xs(t), box.y0 + 16, num(t, 3)))
    body.append(_text((box.x0 + box.x1) / 2, height - 2, x_label, "tg-label tg-muted"))
    for s in series:
        body.append(f'<g class="tg-bars {s.css}">')
        for i, share in enumerate(s.shares):
            x, x_next = xs(edges[i]), xs(edges[i + 1])
            h = box.y0 - ys(share)
            body.append(
                f'<rect x="{r(x)}" y="{r(box.y0 - h)}" width="{r(max(x_next - x - 0.5, 0.5))}" '
                f'height="{r(h)}" data-share="{share:.6g}"><title>{escape(s.label)}: '
                f"{escape(pct(share))} of rows in {escape(num(edges[i]))} to "
                f"{escape(num(edges[i + 1]))}</title></rect>"
            )
        body.append("</g>")
    for s in series:
        if s.mean is not None and edges[0] <= s.mean <= edges[-1]:
            x = xs(s.mean)
            body.append(
                f'<line class="tg-mean {s.css}" x1="{r(x)}" x2="{r(x)}" '
                f'y1="{r(box.y0)}" y2="{r(box.y1)}"/>'
            )
    body.append(
        f'<line class="tg-axis" x1="{r(box.x0)}" x2="{r(box.x1)}" y1="{r(box.y0)}" '
        f'y2="{r(box.y0)}"/>'
    )
    for row, members in enumerate(rows):  # legend, top left
        x, y = 8.0, 8 + 20 * row
        for i in members:
            css, text = series[i].css, entries[i]
            body.append(
                f'<rect class="tg-swatch {css}" x="{r(x)}" y="{r(y)}" width="12" height="12"/>'
            )
            body.append(_text(x + 17, y + 10, text, "tg-legend", "start"))
            x += 34 + LEGEND_CHAR * len(text)
    return _svg(
        width, height, "Score distributions: " + ", ".join(s.label for s in series), body, "tg-hist"
    )


# --- trends ---------------------------------------------------------------------------------


@dataclass(frozen=True)
class TrendPoint:
    """One verdict on a trend: its value, the limit it was held to, and how it ended."""

    label: str
    value: float | None
    limit: float | None = None
    breach: bool = False
    held: bool = False
    href: str | None = None
    note: str = ""


def core_range(values: Sequence[float], fixed: Sequence[float]) -> tuple[float, float, bool]:
    """The y range of a trend: every value and fixed line (limits, bands), unless a few values
    lie far outside the bulk; then the range covers the fixed lines and the middle 80 % of the
    values widened by 1.5 times their spread, and those values are drawn off the scale.
    Returns (low, high, clipped)."""
    everything = list(values) + list(fixed)
    lo, hi = min(everything), max(everything)
    ordered = sorted(values)
    k = len(ordered) // 10
    middle = ordered[k : len(ordered) - k] if len(ordered) >= 10 else ordered
    core_lo, core_hi = min(list(middle) + list(fixed)), max(list(middle) + list(fixed))
    spread = core_hi - core_lo
    if spread <= 0:
        spread = max(abs(core_hi) * 0.05, 1e-6)
    # clip only when an outlier sits more than 4 spreads outside the core (common practice,
    # no source: keeps a single blow-up from flattening every other verdict)
    if hi - core_hi > 4 * spread or core_lo - lo > 4 * spread:
        return (max(lo, core_lo - 1.5 * spread), min(hi, core_hi + 1.5 * spread), True)
    return lo, hi, False


def log_scale_fits(values: Sequence[float], fixed: Sequence[float]) -> bool:
    """Whether a trend reads better on a log scale: every value and line non-negative, some
    positive, and the largest at least 20 times the median of the positive ones (a statistic
    such as PSI, whose spikes are orders of magnitude above its normal level; common practice,
    no source)."""
    everything = list(values) + list(fixed)
    positive = sorted(v for v in everything if v > 0)
    if not positive or any(v < 0 for v in everything) or len(positive) < len(everything) / 2:
        return False
    return positive[-1] >= 20 * positive[len(positive) // 2]


def time_labels(count: int, wanted: int = 5) -> list[int]:
    """Indexes of up to *wanted* evenly spread points to label on a time axis (first and
    last included)."""
    if count <= 0:
        return []
    if count <= wanted:
        return list(range(count))
    return sorted({round(i * (count - 1) / (wanted - 1)) for i in range(wanted)})


def trend_chart(
    points: Sequence[TrendPoint],
    *,
    title: str,
    width: float = 540,
    height: float = 210,
    bands: Sequence[tuple[str, float]] = (),
    limit_label: str = "limit",
    scale: str = "auto",
    labels: int = 5,
    value_label: str = "value",
) -> Markup:
    """The values as a line with a dot per verdict (filled brick when the check breached,
    ringed when the verdict was held for any reason), the per-verdict limit as one dashed step
    line, and each band (label, value) as a dotted horizontal line. Gaps where a value is
    missing break the line. Points are evenly spaced in time order, *labels* of them named on
    the time axis.

    Spikes never flatten the rest: with ``scale="auto"`` a statistic whose spikes are orders
    of magnitude above its usual level (:func:`log_scale_fits`) is drawn on a log scale, and
    otherwise a value far outside the rest is drawn as a triangle on the edge with its value in
    its tooltip (:func:`core_range`); either is stated on the chart.
    """
    box = Box(width, height, left=52, top=40, bottom=24)
    values = [p.value for p in points if p.value is not None]
    limits = [p.limit for p in points if p.limit is not None]
    if not values:
        return _svg(
            width,
            height,
            title,
            [
                _text(box.x0, 16, title, "tg-legend", "start"),
                _text(width / 2, height / 2, "no values yet", "tg-label tg-muted"),
            ],
            "tg-trend",
        )
    fixed = limits + [b[1] for b in bands]
    use_log = scale == "log" or (scale == "auto" and log_scale_fits(values, fixed))
    if use_log:
        positive = [v for v in values + fixed if v > 0]
        floor = min(positive) / 2
        lo, hi = math.log10(floor), math.log10(max(positive))
        pad = (hi - lo) * 0.06 or 0.1
        lo, hi = lo - pad, hi + pad
        clipped = False

        def tr(value: float) -> float:
            return math.log10(max(value, floor))

    else:
        lo, hi, clipped = core_range(values, fixed)
        pad = (hi - lo) * 0.08 or max(abs(hi) * 0.05, 1e-6)
        lo, hi = lo - pad, hi + pad

        def tr(value: float) -> float:
            return value

    n = len(points)
    xs = Scale(0, max(n - 1, 1), box.x0 + 4, box.x1 - 4)
    ys = Scale(lo, hi, box.y0, box.y1)

    def y_of(value: float) -> float:
        return ys(min(max(tr(value), lo), hi))

    body = [_text(box.x0 - 44, 16, title, "tg-legend", "start")]
    keys: list[tuple[str, str]] = [("tg-line", value_label)]
    if limits:
        last = next(p.limit for p in reversed(points) if p.limit is not None)
        keys.append(("tg-limit", f"{limit_label} (latest {num(last)})"))
    keys.extend(("tg-band", f"{name} {num(value)}") for name, value in bands)
    off = [p for p in points if p.value is not None and not use_log and not lo <= p.value <= hi]
    if use_log:
        keys.append(("", "log scale"))
    elif clipped and off:
        top = max(p.value for p in off if p.value is not None)
        keys.append(("", f"▲ {len(off)} off scale (up to {num(top)})"))
    key_x = box.x0 - 44
    for css, text in keys:  # the key, one row under the title: a line sample, then its text
        if css:
            body.append(
                f'<line class="{css}" x1="{r(key_x)}" x2="{r(key_x + 18)}" y1="29" y2="29"/>'
            )
            key_x += 22
        body.append(_text(key_x, 33, text, "tg-label", "start"))
        key_x += 6.2 * len(text) + 14
    if use_log:
        decades = range(math.floor(lo), math.ceil(hi) + 1)
        ticks = [float(d) for d in decades if lo <= d <= hi]
        if len(ticks) < 2:
            ticks = [lo + (hi - lo) * i / 3 for i in range(4)]
        tick_labels = [num(10**t, 2) for t in ticks]
    else:
        ticks = nice_ticks(lo, hi, 4)
        tick_labels = [num(t, 3) for t in ticks]
    for t, label in zip(ticks, tick_labels, strict=True):
        body.append(
            f'<line class="tg-grid" x1="{r(box.x0)}" x2="{r(box.x1)}" y1="{r(ys(t))}" '
            f'y2="{r(ys(t))}"/>'
        )
        body.append(_text(box.x0 - 6, ys(t) + 4, label, anchor="end"))
    for _name, value in bands:
        if lo <= tr(value) <= hi:
            body.append(
                f'<line class="tg-band" x1="{r(box.x0)}" x2="{r(box.x1)}" '
                f'y1="{r(y_of(value))}" y2="{r(y_of(value))}"/>'
            )
    # the limit as one step line (one path, so its dashes run on): each verdict's limit holds
    # until the next one's; a verdict without a limit lifts the pen
    steps: list[str] = []
    pen = False
    for i, p in enumerate(points):
        if p.limit is None:
            pen = False
            continue
        x_from = xs(i - 0.5) if i > 0 else xs(0)
        x_to = xs(i + 0.5) if i < n - 1 else xs(n - 1)
        y = y_of(p.limit)
        steps.append(f"{'V' if pen else 'M' + r(x_from) + ' '}{r(y)}H{r(x_to)}")
        pen = True
    if steps:
        body.append(f'<path class="tg-limit" d="{"".join(steps)}"/>')
    path: list[str] = []
    pen_down = False
    for i, p in enumerate(points):
        if p.value is None:
            pen_down = False
            continue
        path.append(f"{'L' if pen_down else 'M'}{r(xs(i))} {r(y_of(p.value))}")
        pen_down = True
    body.append(f'<path class="tg-line" d="{"".join(path)}"/>')
    for i, p in enumerate(points):
        if p.value is None:
            continue
        cls = "tg-dot" + (" tg-breach" if p.breach else "") + (" tg-held" if p.held else "")
        tip = (
            f"{p.label}: {num(p.value)}"
            + (f" (limit {num(p.limit)})" if p.limit is not None else "")
            + (f"; {p.note}" if p.note else "")
        )
        x, y = xs(i), y_of(p.value)
        if not use_log and (p.value > hi or p.value < lo):  # off the scale: a triangle
            tip += " (off the scale)"
            tip_y = 6.0 if p.value > hi else -6.0
            dot = (
                f'<path class="{cls} tg-off" d="M{r(x)} {r(y - tip_y)}L{r(x - 5)} {r(y)}'
                f'L{r(x + 5)} {r(y)}Z"><title>{escape(tip)}</title></path>'
            )
        else:
            dot = (
                f'<circle class="{cls}" cx="{r(x)}" cy="{r(y)}" '
                f'r="{3.6 if p.breach or p.held else 2.4}"><title>{escape(tip)}</title>'
                "</circle>"
            )
        if p.href:
            dot = f'<a href="{escape(p.href)}">{dot}</a>'
        body.append(dot)
    shown = time_labels(n, labels)
    for i in shown:
        anchor = "start" if i == 0 and n > 1 else ("end" if i == n - 1 and n > 1 else "middle")
        body.append(
            f'<line class="tg-axis" x1="{r(xs(i))}" x2="{r(xs(i))}" y1="{r(box.y0)}" '
            f'y2="{r(box.y0 + 3)}"/>'
        )
        body.append(_text(xs(i), height - 6, points[i].label, "tg-label tg-muted", anchor))
    return _svg(width, height, title, body, "tg-trend")


# --- intervals and list exposure ------------------------------------------------------------


def interval_bar(
    low: float,
    high: float,
    estimate: float | None,
    limit: float | None,
    *,
    width: float = 150,
    height: float = 20,
) -> Markup:
    """A confidence interval as a bar on a line through zero, the estimate as a dot and the
    limit as a brick tick; the scale spans the interval, zero and the limit."""
    ends = [low, high, 0.0] + ([limit] if limit is not None else [])
    lo, hi = min(ends), max(ends)
    pad = (hi - lo) * 0.08 or 1e-3
    xs = Scale(lo - pad, hi + pad, 2, width - 2)
    mid = height / 2
    body = [
        f'<line class="tg-axis" x1="2" x2="{r(width - 2)}" y1="{r(mid)}" y2="{r(mid)}"/>',
        f'<line class="tg-zero" x1="{r(xs(0))}" x2="{r(xs(0))}" y1="3" y2="{r(height - 3)}"/>',
        f'<rect class="tg-int" x="{r(xs(low))}" y="{r(mid - 4)}" '
        f'width="{r(max(xs(high) - xs(low), 1.5))}" height="8" rx="2"/>',
    ]
    if limit is not None:
        body.append(
            f'<line class="tg-limit-tick" x1="{r(xs(limit))}" x2="{r(xs(limit))}" y1="0" '
            f'y2="{r(height)}"/>'
        )
    if estimate is not None:
        body.append(f'<circle class="tg-est" cx="{r(xs(estimate))}" cy="{r(mid)}" r="3"/>')
    title = f"interval {num(low)} to {num(high)}" + (
        f", limit {num(limit)}" if limit is not None else ""
    )
    return _svg(width, height, title, body, "tg-interval")


@dataclass(frozen=True)
class Curve:
    """One Lorenz curve: ``[x, y]`` points from (0, 0) to (1, 1), its label and CSS class."""

    label: str
    points: Sequence[Sequence[float]]
    css: str


def lorenz_chart(curves: Sequence[Curve], *, width: float = 360, height: float = 380) -> Markup:
    """Lorenz curves of exposure: x the share of catalog items (least shown first), y the
    share of list slots they hold; the diagonal is equal exposure, and the further a curve sags
    below it the more the slots go to a few items."""
    box = Box(width, height, left=46, right=14, top=14, bottom=86)
    side = min(box.x1 - box.x0, box.y0 - box.y1)
    xs = Scale(0.0, 1.0, box.x0, box.x0 + side)
    ys = Scale(0.0, 1.0, box.y1 + side, box.y1)
    body: list[str] = []
    for t in (0.0, 0.25, 0.5, 0.75, 1.0):
        body.append(
            f'<line class="tg-grid" x1="{r(xs(0))}" x2="{r(xs(1))}" y1="{r(ys(t))}" '
            f'y2="{r(ys(t))}"/>'
        )
        body.append(_text(xs(0) - 5, ys(t) + 4, pct(t, 0), anchor="end"))
        body.append(_text(xs(t), ys(0) + 15, pct(t, 0)))
    body.append(
        f'<line class="tg-band" x1="{r(xs(0))}" y1="{r(ys(0))}" x2="{r(xs(1))}" y2="{r(ys(1))}"/>'
    )
    body.append(_text(xs(0.5), ys(0) + 30, "share of catalog items, least shown first"))
    for curve in curves:
        if not curve.points:
            continue
        d = "".join(
            f"{'L' if i else 'M'}{r(xs(x))} {r(ys(y))}" for i, (x, y) in enumerate(curve.points)
        )
        body.append(
            f'<path class="tg-curve {curve.css}" d="{d}"><title>{escape(curve.label)}'
            "</title></path>"
        )
    y = ys(0) + 50
    for curve in curves:
        body.append(
            f'<line class="tg-curve {curve.css}" x1="{r(xs(0))}" x2="{r(xs(0) + 20)}" '
            f'y1="{r(y - 4)}" y2="{r(y - 4)}"/>'
        )
        body.append(_text(xs(0) + 26, y, curve.label, "tg-label", "start"))
        y += 16
    body.append(
        f'<line class="tg-band" x1="{r(xs(0))}" x2="{r(xs(0) + 20)}" y1="{r(y - 4)}" '
        f'y2="{r(y - 4)}"/>'
    )
    body.append(_text(xs(0) + 26, y, "equal exposure", "tg-label", "start"))
    return _svg(
        width,
        height,
        "Lorenz curves of exposure: " + ", ".join(c.label for c in curves),
        body,
        "tg-lorenz",
    )


# --- decisions ------------------------------------------------------------------------------


@dataclass(frozen=True)
class StripItem:
    decision: str  # the decision in force
    overridden: bool = False
    href: str | None = None
    title: str = ""


def decision_strip(
    items: Sequence[StripItem], *, cell: float = 11, gap: float = 2, height: float | None = None
) -> Markup:
    """One square per verdict, oldest left: brick for hold, green for promote, an amber ring
    when an operator overrode the gate."""
    size = height or cell
    width = max(len(items) * (cell + gap) - gap, cell)
    body = []
    for i, item in enumerate(items):
        cls = "tg-cell " + ("tg-hold" if item.decision == "hold" else "tg-promote")
        if item.overridden:
            cls += " tg-overridden"
        rect = (
            f'<rect class="{cls}" x="{r(i * (cell + gap))}" y="1" width="{r(cell)}" '
            f'height="{r(size - 2)}" rx="2"><title>{escape(item.title)}</title></rect>'
        )
        if item.href:
            rect = f'<a href="{escape(item.href)}">{rect}</a>'
        body.append(rect)
    return _svg(width, size, f"{len(items)} verdicts, oldest first", body, "tg-strip")


def limit_gauge(
    value: float | None,
    limit: float | None,
    outcome: str,
    *,
    width: float = 110,
    height: float = 14,
) -> Markup:
    """A bar of |value| against a tick at |limit| on a scale to 1.25 times the larger.
    Empty when either is missing."""
    if value is None or limit is None or (value == 0 and limit == 0):
        return Markup("")
    top = max(abs(value), abs(limit)) * 1.25
    xs = Scale(0.0, top, 1, width - 1)
    fill = xs(abs(value)) - 1
    cls = {
        "breach": "tg-hold",
        "advisory": "tg-warn",
        "inconclusive": "tg-warn",
        "underpowered": "tg-warn",
    }.get(outcome, "tg-okfill")
    body = [
        f'<rect class="tg-track" x="1" y="3" width="{r(width - 2)}" height="{r(height - 6)}" '
        'rx="2"/>',
        f'<rect class="{cls}" x="1" y="3" width="{r(fill)}" height="{r(height - 6)}" rx="2" '
        f'data-value="{abs(value):.6g}"/>',
        f'<line class="tg-tick" x1="{r(xs(abs(limit)))}" x2="{r(xs(abs(limit)))}" y1="0" '
        f'y2="{r(height)}"/>',
    ]
    return _svg(width, height, f"value {num(value)} against limit {num(limit)}", body, "tg-gauge")
