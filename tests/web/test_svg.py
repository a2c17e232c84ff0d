"""The SVG drawing code with known inputs: what is drawn is where and as big as it should be."""

from __future__ import annotations

import xml.etree.ElementTree as ET

import pytest

from service.web import svg

NS = {"s": "http://www.w3.org/2000/svg"}


def parse(markup: str) -> ET.Element:
    return ET.fromstring(str(markup))  # also proves the output is well-formed XML


def bars(root: ET.Element, css: str) -> list[ET.Element]:
    group = next(
        g for g in root.iter("{http://www.w3.org/2000/svg}g") if css in g.get("class", "").split()
    )
    return group.findall("s:rect", NS)


def test_scale_maps_domain_ends_to_range_ends() -> None:
    scale = svg.Scale(0.0, 10.0, 100.0, 300.0)
    assert (scale(0.0), scale(10.0), scale(2.5)) == (100.0, 300.0, 150.0)
    assert svg.Scale(5.0, 5.0, 0.0, 10.0)(5.0) == 5.0  # a zero-width domain maps to the middle


@pytest.mark.parametrize(
    "lo, hi, count, expected",
    [
        # round steps of 1, 2 or 5 times a power of ten (the usual axis rule; common practice)
        (0.0, 1.0, 5, [0.0, 0.2, 0.4, 0.6, 0.8, 1.0]),
        (0.0, 0.08, 4, [0.0, 0.02, 0.04, 0.06, 0.08]),
        (0.13, 0.91, 4, [0.2, 0.4, 0.6, 0.8]),
        (-3.0, 7.0, 5, [-2.0, 0.0, 2.0, 4.0, 6.0]),
        (2.0, 2.0, 5, [2.0]),
    ],
)
def test_nice_ticks(lo: float, hi: float, count: int, expected: list[float]) -> None:
    assert svg.nice_ticks(lo, hi, count) == pytest.approx(expected)


def test_histogram_bar_heights_are_proportional_to_shares() -> None:
    edges = [0.0, 0.25, 0.5, 0.75, 1.0]
    cand = svg.Series("candidate", [0.1, 0.2, 0.4, 0.3], "tg-cand", 0.6)
    base = svg.Series("baseline", [0.4, 0.3, 0.2, 0.1], "tg-base", 0.4)
    root = parse(svg.histogram_overlay(edges, [base, cand], width=500, height=300))
    heights = {
        css: [float(b.get("height")) for b in bars(root, css)] for css in ("tg-cand", "tg-base")
    }
    # the tallest share of either series (0.4) fills the plot; everything else in proportion
    tallest = max(heights["tg-cand"] + heights["tg-base"])
    assert heights["tg-cand"] == pytest.approx([tallest * s / 0.4 for s in cand.shares], abs=0.11)
    assert heights["tg-base"] == pytest.approx([tallest * s / 0.4 for s in base.shares], abs=0.11)
    # bars stand on one baseline and sit left to right in bin order
    for css in ("tg-cand", "tg-base"):
        rects = bars(root, css)
        bottoms = {round(float(b.get("y")) + float(b.get("height")), 1) for b in rects}
        assert len(bottoms) == 1
        xs = [float(b.get("x")) for b in rects]
        assert xs == sorted(xs) and len(set(xs)) == 4


def test_histogram_bins_have_equal_width_and_means_are_marked() -> None:
    edges = [0.0, 0.1, 0.2, 0.3]
    root = parse(
        svg.histogram_overlay(
            edges, [svg.Series("c", [0.2, 0.5, 0.3], "tg-cand", 0.15)], width=400, height=200
        )
    )
    widths = {float(b.get("width")) for b in bars(root, "tg-cand")}
    assert len(widths) == 1
    mean_line = next(
        e for e in root.iter("{http://www.w3.org/2000/svg}line") if "tg-mean" in e.get("class", "")
    )
    rects = bars(root, "tg-cand")
    # the mean 0.15 is half way through the second bin
    second_left = float(rects[1].get("x"))
    third_left = float(rects[2].get("x"))
    assert float(mean_line.get("x1")) == pytest.approx((second_left + third_left) / 2, abs=0.2)


def test_histogram_without_data_says_so() -> None:
    assert "no finite scores" in svg.histogram_overlay([], [])


def test_text_is_escaped() -> None:
    hostile = '<script>alert("x")</script>'
    out = str(svg.histogram_overlay([0.0, 1.0], [svg.Series(hostile, [1.0], "tg-cand")]))
    assert "<script>" not in out and "&lt;script&gt;" in out
    strip = str(svg.decision_strip([svg.StripItem("hold", title=hostile, href='/x?a="b"')]))
    assert "<script>" not in strip and "&#34;b&#34;" in strip
    parse(out)
    parse(strip)


def test_trend_places_values_and_limits_by_value() -> None:
    points = [
        svg.TrendPoint("t1", 0.0, 1.0),
        svg.TrendPoint("t2", 2.0, 1.0, breach=True),
        svg.TrendPoint("t3", 1.0, 1.0),
    ]
    root = parse(svg.trend_chart(points, title="psi", width=400, height=200))
    dots = root.findall(".//s:circle", NS)
    ys = [float(d.get("cy")) for d in dots]
    # equal value steps are equal pixel steps, higher values higher up
    assert ys[0] > ys[2] > ys[1]
    assert ys[0] - ys[2] == pytest.approx(ys[2] - ys[1], abs=0.2)
    assert "tg-breach" in dots[1].get("class")
    limit = next(
        p for p in root.iter("{http://www.w3.org/2000/svg}path") if p.get("class") == "tg-limit"
    )
    # the limit 1.0 is drawn at the same height as the value 1.0
    assert f" {svg.r(ys[2])}H" in limit.get("d")


def test_trend_breaks_line_at_missing_values() -> None:
    points = [
        svg.TrendPoint("a", 1.0),
        svg.TrendPoint("b", None),
        svg.TrendPoint("c", 2.0),
        svg.TrendPoint("d", 3.0),
    ]
    root = parse(svg.trend_chart(points, title="x"))
    line = next(
        p for p in root.iter("{http://www.w3.org/2000/svg}path") if p.get("class") == "tg-line"
    )
    assert line.get("d").count("M") == 2 and line.get("d").count("L") == 1


def test_trend_puts_a_far_outlier_off_the_scale() -> None:
    # a reported AUC near 0.78 and one collapsed push at 0.2 (issue 14: spikes must not hide
    # the limit and slow changes); common practice, no source
    values = [0.78, 0.781, 0.779, 0.78, 0.782, 0.78, 0.779, 0.781, 0.78, 0.78, 0.2]
    points = [svg.TrendPoint(str(i), v, 0.77) for i, v in enumerate(values)]
    drawing = svg.trend_chart(points, title="auc")
    root = parse(drawing)
    off = [
        p for p in root.iter("{http://www.w3.org/2000/svg}path") if "tg-off" in p.get("class", "")
    ]
    assert len(off) == 1
    assert "off the scale" in off[0].find("s:title", NS).text
    assert "1 off scale (up to 0.2)" in str(drawing)  # said on the chart, not only in tooltips
    lo, hi, clipped = svg.core_range(values, [0.77])
    assert clipped and lo > 0.5 and hi >= 0.782


def _ys(root: ET.Element, css: str) -> list[float]:
    """The y coordinates of the dots (circles) of a trend."""
    return [
        float(c.get("cy"))
        for c in root.iter("{http://www.w3.org/2000/svg}circle")
        if css in c.get("class", "")
    ]


def test_trend_of_a_spiky_statistic_is_drawn_on_a_log_scale() -> None:
    # PSI near 0.01 with one blow-up at 7.8 and a limit of 0.1 (the demo's shape): on a log
    # scale the limit sits well clear of the bulk, so both stay readable
    values = [0.01, 0.012, 0.011, 0.009, 0.01, 0.013, 0.012, 0.01, 0.011, 0.01, 7.8]
    points = [svg.TrendPoint(str(i), v, 0.1) for i, v in enumerate(values)]
    drawing = svg.trend_chart(points, title="psi", height=210)
    assert "log scale" in str(drawing)
    root = parse(drawing)
    ys = _ys(root, "tg-dot")
    limit = next(
        p for p in root.iter("{http://www.w3.org/2000/svg}path") if p.get("class") == "tg-limit"
    )
    limit_y = float(limit.get("d").split()[1].split("H")[0])
    bulk = ys[:-1]
    # one decade (0.01 -> 0.1) spans a visible part of the plot: well over 20 px here
    assert min(bulk) - limit_y > 20
    assert ys[-1] < limit_y  # the spike is above the limit, drawn, not clipped
    # the limit is one path: its dashes run on (a dashed legend matches a dashed line)
    assert limit.get("d").count("M") == 1
    assert not svg.log_scale_fits([0.78, 0.2], [0.77])


def test_trend_labels_enough_times() -> None:
    points = [svg.TrendPoint(f"t{i}", float(i)) for i in range(96)]
    root = parse(svg.trend_chart(points, title="x"))
    labels = [
        t.text
        for t in root.iter("{http://www.w3.org/2000/svg}text")
        if t.text and t.text.startswith("t")
    ]
    assert labels == ["t0", "t24", "t48", "t71", "t95"]
    assert svg.time_labels(3) == [0, 1, 2]


def test_lorenz_curve_and_interval_bar() -> None:
    curves = [svg.Curve("before", [[0, 0], [0.5, 0.25], [1, 1]], "tg-base")]
    root = parse(svg.lorenz_chart(curves, width=360, height=380))
    paths = [
        p for p in root.iter("{http://www.w3.org/2000/svg}path") if "tg-curve" in p.get("class", "")
    ]
    assert len(paths) == 1 and paths[0].get("d").count("L") == 2
    bar = parse(svg.interval_bar(-0.02, -0.005, -0.01, -0.01))
    rect = next(
        r for r in bar.iter("{http://www.w3.org/2000/svg}rect") if r.get("class") == "tg-int"
    )
    assert float(rect.get("width")) > 10  # the interval is drawn as a bar
    assert any(e.get("class") == "tg-limit-tick" for e in bar.iter())


def test_core_range_keeps_everything_without_outliers() -> None:
    assert svg.core_range([1.0, 2.0, 3.0], [2.5]) == (1.0, 3.0, False)


def test_decision_strip_one_cell_per_verdict_coloured_by_decision() -> None:
    items = [
        svg.StripItem("promote"),
        svg.StripItem("hold", overridden=True, href="/ui/x"),
        svg.StripItem("hold"),
    ]
    root = parse(svg.decision_strip(items, cell=10, gap=2))
    cells = list(root.iter("{http://www.w3.org/2000/svg}rect"))
    assert [c.get("class") for c in cells] == [
        "tg-cell tg-promote",
        "tg-cell tg-hold tg-overridden",
        "tg-cell tg-hold",
    ]
    assert [float(c.get("x")) for c in cells] == [0.0, 12.0, 24.0]
    assert len(root.findall(".//s:a", NS)) == 1


def test_limit_gauge_fill_and_tick() -> None:
    root = parse(svg.limit_gauge(0.3, 0.1, "breach", width=127))
    fill = root.findall("s:rect", NS)[1]
    tick = root.find("s:line", NS)
    # scale 0 .. 0.375 over 1 .. 126 px: value 0.3 -> 100 px wide, limit 0.1 -> x 34.3
    assert float(fill.get("width")) == pytest.approx(100.0, abs=0.1)
    assert float(tick.get("x1")) == pytest.approx(1 + 125 * 0.1 / 0.375, abs=0.1)
    assert "tg-hold" in fill.get("class")
    assert str(svg.limit_gauge(None, 0.1, "ok")) == ""
