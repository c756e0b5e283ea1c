"""The report pages' chart writer: ticks, coordinates, escaping, label placement.

The SVG it writes is parsed with the standard library's XML parser (a chart that is not
well-formed XML fails there), and positions are read back from the drawn tick labels, so
the checks do not lean on the writer's own coordinate code.
"""

from __future__ import annotations

import math
import xml.etree.ElementTree as ET

import numpy as np
import pytest
from hypothesis import assume, given, settings
from hypothesis import strategies as st

from adaptive_engine.simulation import svg_chart
from adaptive_engine.simulation.svg_chart import Chart, nice_ticks, place_labels, tick_label


def _parse(svg: str) -> ET.Element:
    return ET.fromstring(svg)


def _number(label: str) -> float:
    return float(label.replace(svg_chart.MINUS, "-"))


def _x_scale(root):
    """Pixel -> data along x, from the first and last x tick label of the chart."""
    ticks = [(float(t.get("x")), _number(t.text)) for t in root.iterfind(".//text[@class='xtick']")]
    (p0, v0), (p1, v1) = ticks[0], ticks[-1]
    return lambda p: v0 + (p - p0) * (v1 - v0) / (p1 - p0)


def _y_scale(root):
    """Pixel -> data along y, from the y tick labels (their baseline sits 0.35 font sizes below the tick)."""
    ticks = [(float(t.get("y")) - 0.35 * svg_chart.TICK_SIZE, _number(t.text))
             for t in root.iterfind(".//text[@class='ytick']")]
    (p0, v0), (p1, v1) = ticks[0], ticks[-1]
    return lambda p: v0 + (p - p0) * (v1 - v0) / (p1 - p0)


# ----------------------------------------------------------------------------------------
# ticks


@settings(max_examples=200, deadline=None)
@given(st.floats(-1e6, 1e6), st.floats(1e-6, 1e6))
def test_ticks_are_evenly_spaced_nice_numbers_inside_the_range(lo, span):
    assume(span > 1e-6 * abs(lo))  # a range a chart could show (not below float resolution)
    hi = lo + span
    ticks = nice_ticks(lo, hi)
    # a step of 1, 2 or 5 times a power of ten, the ticks its multiples (common practice
    # for axis labels; Heckbert, "Nice numbers for graph labels", Graphics Gems 1990)
    assert 3 <= len(ticks) <= 8
    step = ticks[1] - ticks[0]
    mantissa = step / 10 ** math.floor(math.log10(step))
    assert min(abs(mantissa - m) for m in (1, 2, 5, 10)) < 1e-6
    assert np.allclose(np.diff(ticks), step, rtol=1e-9, atol=1e-12 * max(abs(lo), abs(hi)))
    assert all(abs(t / step - round(t / step)) < 1e-6 * max(1.0, abs(t / step)) for t in ticks)
    tol = 1e-9 * max(abs(lo), abs(hi), span)
    assert lo - tol <= ticks[0] and ticks[-1] <= hi + tol
    # no room left for another tick at either end
    assert ticks[0] - step < lo + tol and ticks[-1] + step > hi - tol


def test_integer_ticks_step_by_whole_numbers():
    assert nice_ticks(29.0, 31.0, integer=True) == [29.0, 30.0, 31.0]
    assert nice_ticks(-0.5, 0.5) == pytest.approx([-0.4, -0.2, 0.0, 0.2, 0.4])


def test_tick_labels_show_the_decimals_of_the_step_and_a_minus_sign():
    assert tick_label(0.25, 0.25) == "0.25"
    assert tick_label(0.1 * 3, 0.1) == "0.3"  # 0.30000000000000004 on screen would be noise
    assert tick_label(-0.5, 0.5) == svg_chart.MINUS + "0.5"
    assert tick_label(-1e-17, 0.2) == "0.0"  # never "-0.0"
    assert tick_label(1500.0, 500.0) == "1500"


# ----------------------------------------------------------------------------------------
# what is drawn, where


def test_points_land_where_the_axes_say():
    x = np.array([-2.0, -0.5, 1.0, 2.5])
    y = np.array([0.1, 0.7, 0.4, 0.9])
    chart = Chart("theta")
    chart.panel(200, "share").line(x, y, colour="#000", marker="o")
    root = _parse(chart.svg("a line"))
    to_x, to_y = _x_scale(root), _y_scale(root)
    circles = root.findall(".//circle")
    assert len(circles) == 4
    for c, xi, yi in zip(circles, x, y):
        assert to_x(float(c.get("cx"))) == pytest.approx(xi, abs=0.02)
        assert to_y(float(c.get("cy"))) == pytest.approx(yi, abs=0.01)
    # larger values are drawn higher up (SVG's y runs downwards)
    assert float(circles[3].get("cy")) < float(circles[0].get("cy"))


def test_bars_rise_from_zero_in_proportion_to_their_value():
    chart = Chart("length", integer_x=True)
    chart.panel(150, "examinees", integer_y=True).bars([10, 11, 12], [5, 20, 10], width=1.0, colours="#369")
    root = _parse(chart.svg("bars"))
    to_y = _y_scale(root)
    rects = [r for r in root.iterfind(".//rect") if r.get("fill") == "#369"]
    assert len(rects) == 3
    tops = [to_y(float(r.get("y"))) for r in rects]
    bottoms = [to_y(float(r.get("y")) + float(r.get("height"))) for r in rects]
    assert tops == pytest.approx([5, 20, 10], abs=0.1)
    assert bottoms == pytest.approx([0, 0, 0], abs=0.1)


def test_a_line_breaks_at_missing_values():
    chart = Chart("x")
    chart.panel(100, "y").line([0, 1, 2, 3, 4, 5], [1, 2, np.nan, 3, 4, 5], colour="#000")
    lines = _parse(chart.svg("gap")).findall(".//polyline")
    assert [len(p.get("points").split()) for p in lines] == [2, 3]


def test_text_is_escaped_and_the_chart_is_well_formed_xml():
    nasty = "<script>alert('x')</script> & \"quotes\""
    chart = Chart(nasty, title=nasty)
    panel = chart.panel(120, nasty)
    panel.line([0, 1], [0, 1], colour="#000", label=nasty)
    panel.point_labels([0.5], [0.5], [nasty])
    svg = chart.svg(nasty)
    assert "<script>" not in svg
    root = _parse(svg)  # raises on unescaped markup
    texts = ["".join(t.itertext()) for t in root.iter("text")]
    assert texts.count(nasty) >= 4  # x label, y label, legend, point label (the title may wrap)
    assert root.get("aria-label") == nasty and root.find("title").text == nasty


def test_long_titles_wrap_within_the_chart():
    title = "Length against precision (stopping.se, stopping.sprt.indifference, stopping.max_items, more words)"
    chart = Chart("x", title=title, width=400)
    chart.panel(100, "y").line([0, 1], [0, 1], colour="#000")
    root = _parse(chart.svg("t"))
    lines = [t.text for t in root.iterfind(".//text[@class='title']")]
    assert len(lines) > 1 and " ".join(lines) == title
    assert all(svg_chart.text_width(line, svg_chart.TITLE_SIZE) <= 400 for line in lines)


def test_a_step_outline_of_many_items_keeps_every_high_step():
    rng = np.random.default_rng(4)
    rates = np.sort(rng.beta(0.5, 8, 100_000))[::-1]
    edges = np.arange(rates.size + 1) + 0.5
    e, v = svg_chart._step_outline(edges, rates)
    assert v.size <= 1500 and e.size == v.size + 1
    assert e[0] == edges[0] and e[-1] == edges[-1] and np.all(np.diff(e) > 0)
    # the outline is never below an item's rate at the item's position
    step_of_item = np.searchsorted(e, np.arange(1, rates.size + 1), side="right") - 1
    assert np.all(v[step_of_item] >= rates)
    # equal neighbours merge: a bank mostly never given draws few steps
    e, v = svg_chart._step_outline(np.arange(1001) + 0.5, np.r_[np.linspace(0.5, 0.1, 10), np.zeros(990)])
    assert v.size == 11


def test_ticks_of_the_chart_do_not_overlap():
    chart = Chart("operational items", xlim=(0, 5001))
    chart.panel(200, "rate").line(np.arange(5000), np.linspace(0.8, 0, 5000), colour="#000")
    root = _parse(chart.svg("many"))
    xs = [(float(t.get("x")), svg_chart.text_width(t.text, svg_chart.TICK_SIZE))
          for t in root.iterfind(".//text[@class='xtick']")]
    for (a, wa), (b, wb) in zip(xs, xs[1:]):
        assert a + wa / 2 < b - wb / 2


# ----------------------------------------------------------------------------------------
# point labels


def test_point_labels_do_not_overlap_each_other_or_a_point():
    rng = np.random.default_rng(0)
    # a dense but placeable cloud: 14 points within a few label heights of each other
    points = list(zip(200 + rng.uniform(0, 60, 14), 150 + rng.uniform(0, 40, 14)))
    texts = [str(j) for j in range(1, 15)]
    boxes = place_labels(points, texts, frame=(0, 0, 500, 300))
    for i, a in enumerate(boxes):
        for b in boxes[i + 1:]:
            assert svg_chart._overlap(a, b) == 0
        for px, py in points:  # no label covers a point's centre
            assert not (a[0] < px < a[2] and a[1] < py < a[3])
        assert 0 <= a[0] and a[2] <= 500 and 0 <= a[1] and a[3] <= 300


def test_a_label_box_fits_its_text():
    box = svg_chart.label_box(100, 100, 6, -5, "12, 15", 11)
    assert box[0] == 106 and box[3] == 95  # right of and above the point
    assert box[2] - box[0] == pytest.approx(svg_chart.text_width("12, 15", 11))


def test_a_line_note_at_an_edge_stays_inside_the_chart():
    # a note centred on a line one unit from the right edge would run past the chart
    # (the length histogram's "maximum (60)"): it ends at the line instead; the others
    # stay centred where they fit (the left margin holds the y labels)
    chart = Chart("scored items", integer_x=True, xlim=(9, 61))
    panel = chart.panel(200, "examinees", integer_y=True)
    panel.bars([40], [3], width=1.0, colours="#999999")
    for x, note in ((60, "maximum (60)"), (9.2, "minimum (9)"), (35, "middle")):
        panel.vline(x, note=note)
    root = _parse(chart.svg("t"))
    width = float(root.get("viewBox").split()[2])
    notes = {t.text: t for t in root.iter("text") if t.text in ("maximum (60)", "minimum (9)", "middle")}
    assert notes["maximum (60)"].get("text-anchor") == "end" and notes["middle"].get("text-anchor") == "middle"
    for text, t in notes.items():
        x, w = float(t.get("x")), svg_chart.text_width(text, svg_chart.TICK_SIZE)
        left = {"end": x - w, "start": x, "middle": x - w / 2}[t.get("text-anchor")]
        assert 0 <= left and left + w <= width, text
