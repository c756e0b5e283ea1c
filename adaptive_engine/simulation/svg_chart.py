"""A small chart writer: the report pages' figures as inline SVG text.

The report pages draw a handful of plain charts (lines with markers, bars, filled steps,
reference lines, a scatter of numbered points) and must stay self-contained.  Writing them
as SVG takes a few milliseconds and no plotting library; the browser draws the text and
lines sharply at any zoom.

A :class:`Chart` holds one or more :class:`Panel` objects stacked on a shared x axis (a
main plot and, for instance, a strip of counts beneath it).  Panels collect what they show
in data coordinates; :meth:`Chart.svg` lays everything out (tick labels, axis labels, a
legend above the plot, wrapped into rows) and returns one ``<svg>`` element.

Text widths are estimated from the number of characters (:func:`text_width`), generously,
so that labels placed apart from each other stay apart in any sans-serif font.
"""

from __future__ import annotations

import hashlib
import html
import math

import numpy as np

#: Font of every text in a chart.
FONT = "system-ui,-apple-system,'Segoe UI',Helvetica,Arial,sans-serif"

#: Average advance of a character in font sizes; common sans-serif fonts average about
#: 0.5-0.55 for digits and lower-case letters (rule of thumb), so 0.6 errs on the wide side.
CHAR_WIDTH = 0.6

#: Height of a line of text in font sizes (ascent plus descent, generously).
LINE_HEIGHT = 1.2

TICK_SIZE = 11
LABEL_SIZE = 12
TITLE_SIZE = 13
LEGEND_SIZE = 11

_MARKERS = ("o", "s", "^")

#: The minus sign of negative tick labels (typeset numbers use it rather than a hyphen).
MINUS = "\u2212"


def esc(text) -> str:
    """Text for SVG content or an attribute value (``& < > " '`` escaped)."""
    return html.escape(str(text), quote=True)


def text_width(text: str, size: float) -> float:
    """Estimated width of ``text`` in pixels at font size ``size`` (errs on the wide side)."""
    return len(str(text)) * CHAR_WIDTH * size


def wrap(text: str, width: float, size: float) -> list[str]:
    """``text`` in lines of at most ``width`` pixels (estimated), broken at spaces; a word
    longer than a line gets a line of its own."""
    lines: list[str] = []
    for word in str(text).split():
        if lines and text_width(f"{lines[-1]} {word}", size) <= width:
            lines[-1] = f"{lines[-1]} {word}"
        else:
            lines.append(word)
    return lines


def _num(v: float) -> str:
    """A coordinate: one decimal, no trailing zeros, no ``-0``."""
    s = f"{v:.1f}".rstrip("0").rstrip(".")
    return "0" if s in ("-0", "") else s


# ----------------------------------------------------------------------------------------
# ticks


def _nice(x: float) -> float:
    """The "nice" number nearest ``x``: 1, 2, 5 or 10 times a power of ten (Heckbert 1990)."""
    exp = math.floor(math.log10(x))
    f = x / 10**exp
    return (1 if f < 1.5 else 2 if f < 3 else 5 if f < 7 else 10) * 10.0**exp


def nice_ticks(lo: float, hi: float, *, target: int = 6, integer: bool = False) -> list[float]:
    """Tick values inside ``[lo, hi]`` at a nice step (1, 2 or 5 times a power of ten).

    The step is the nice number nearest the range over ``target - 1`` (the rounding of
    Heckbert's "Nice numbers for graph labels", Graphics Gems, 1990); the ticks are its
    multiples within the range.  ``integer`` keeps the step at 1 or more (counts, test
    lengths).
    """
    if not (math.isfinite(lo) and math.isfinite(hi)):
        return []
    if hi < lo:
        lo, hi = hi, lo
    if hi == lo:
        return [lo]
    step = _nice((hi - lo) / max(target - 1, 1))
    if integer:
        step = max(step, 1.0)
    first = math.ceil(lo / step - 1e-9)
    last = math.floor(hi / step + 1e-9)
    return [k * step for k in range(first, last + 1)]


def tick_label(value: float, step: float) -> str:
    """``value`` with as many decimals as the tick step needs (``0.25`` -> 2); negative
    numbers with the minus sign (U+2212), never ``-0``."""
    decimals = 0
    if step > 0 and step < 1:
        decimals = max(0, -math.floor(math.log10(step) + 1e-9))
        if abs(round(step, decimals) - step) > 1e-9 * step:
            decimals += 1
    text = f"{value:.{decimals}f}"
    if text.startswith("-"):
        text = text[1:] if float(text) == 0 else MINUS + text[1:]
    return text


def _range(values, *, margin: float = 0.05, include=()) -> tuple[float, float]:
    """The range of the finite ``values`` (and ``include``) widened by ``margin`` each side."""
    v = np.asarray([*np.ravel(np.asarray(values, dtype=float)), *include], dtype=float)
    v = v[np.isfinite(v)]
    if not v.size:
        return 0.0, 1.0
    lo, hi = float(v.min()), float(v.max())
    if hi == lo:
        pad = abs(lo) * 0.1 or 0.5
        return lo - pad, hi + pad
    pad = (hi - lo) * margin
    return lo - pad, hi + pad


# ----------------------------------------------------------------------------------------
# label placement

#: Offsets (pixels, y down) tried for a point label, nearest first: right-up, right-down,
#: left-up, left-down, above, below, right, left; then the same twice and three times as far.
LABEL_OFFSETS = tuple((dx * s, dy * s) for s in (1, 2, 3)
                      for dx, dy in ((6, -5), (6, 5), (-6, -5), (-6, 5), (0, -8), (0, 8), (8, 0), (-8, 0)))


def _overlap(a, b) -> float:
    """Area shared by two boxes (x0, y0, x1, y1)."""
    w = min(a[2], b[2]) - max(a[0], b[0])
    h = min(a[3], b[3]) - max(a[1], b[1])
    return w * h if w > 0 and h > 0 else 0.0


def label_box(x: float, y: float, dx: float, dy: float, text: str, size: float):
    """The box (x0, y0, x1, y1) of a label set off from the point (x, y) by (dx, dy).

    The label sits to the right of the offset point when ``dx > 0``, to its left when
    ``dx < 0`` and centred otherwise; above it when ``dy < 0``, below when ``dy > 0`` and
    centred otherwise (pixels, y down).
    """
    w, h = text_width(text, size), LINE_HEIGHT * size
    ax, ay = x + dx, y + dy
    x0 = ax if dx > 0 else ax - w if dx < 0 else ax - w / 2
    y0 = ay - h if dy < 0 else ay if dy > 0 else ay - h / 2
    return (x0, y0, x0 + w, y0 + h)


def place_labels(points, texts, *, frame, size: float = 11, marker_radius: float = 5.0) -> list[tuple]:
    """Boxes for point labels such that no label covers another label or a point.

    Each label tries the offsets of :data:`LABEL_OFFSETS` in turn and takes the first whose
    box overlaps no label placed before and no point's marker and stays inside ``frame``;
    when none is free it takes the offset with the least overlap.

    Parameters
    ----------
    points : sequence of (x, y)
        The points in pixels (y down).
    texts : sequence of str
    frame : (x0, y0, x1, y1)
        The plot area the labels must stay in.
    marker_radius : float
        Radius of a point's marker in pixels (kept free of labels).

    Returns
    -------
    list of (x0, y0, x1, y1)
        Each label's box, in the order of ``texts``.
    """
    r = marker_radius
    taken = [(px - r, py - r, px + r, py + r) for px, py in points]
    boxes = []
    for (px, py), text in zip(points, texts):
        best = None
        for dx, dy in LABEL_OFFSETS:
            box = label_box(px, py, dx, dy, text, size)
            cost = sum(_overlap(box, t) for t in taken)
            if box[0] < frame[0] or box[2] > frame[2] or box[1] < frame[1] or box[3] > frame[3]:
                cost += 1e6
            if best is None or cost < best[0]:
                best = (cost, box)
            if cost == 0:
                break
        taken.append(best[1])
        boxes.append(best[1])
    return boxes


# ----------------------------------------------------------------------------------------
# panels and charts


class Panel:
    """One plot area of a chart; everything in data coordinates.

    Parameters
    ----------
    height : float
        Height of the plot area in pixels.
    ylabel : str
    ylim : (lo, hi), optional
        The y range (default: the data's, widened by 5% each side; bars start at 0).
    integer_y : bool
        Ticks at whole numbers only (counts).
    """

    def __init__(self, height: float, ylabel: str, *, ylim=None, integer_y: bool = False, grid: bool = True):
        self.height = float(height)
        self.ylabel = ylabel
        self.ylim = ylim
        self.integer_y = integer_y
        self.grid = grid
        self.items: list[tuple] = []
        self._x: list = []
        self._y: list = []
        self._y_include: list[float] = []

    def _extent(self, x, y=()):
        self._x.append(np.ravel(np.asarray(x, dtype=float)))
        self._y.append(np.ravel(np.asarray(y, dtype=float)))

    def line(self, x, y, *, colour: str, width: float = 1.4, dash: str | None = None, label: str | None = None,
             marker: str | None = None, hollow=None):
        """A line through the points (broken at missing values), with markers when ``marker``
        is one of ``o`` (circle), ``s`` (square), ``^`` (triangle); ``hollow`` (bool per
        point) draws those markers white inside."""
        x, y = np.asarray(x, dtype=float), np.asarray(y, dtype=float)
        if marker is not None and marker not in _MARKERS:
            raise ValueError(f"marker must be one of {_MARKERS}, not {marker!r}")
        hollow = np.zeros(x.size, dtype=bool) if hollow is None else np.asarray(hollow, dtype=bool)
        self._extent(x, y)
        self.items.append(("line", x, y, colour, width, dash, marker, hollow))
        if label:
            self.items.append(("legend", label, "line", colour, dash, marker, False))

    def scatter(self, x, y, *, colour: str, hollow: bool = False, label: str | None = None, radius: float = 5.0):
        """Markers without a line: filled circles, or white circles edged in ``colour``."""
        x, y = np.asarray(x, dtype=float), np.asarray(y, dtype=float)
        self._extent(x, y)
        self.items.append(("scatter", x, y, colour, hollow, radius))
        if label:
            self.items.append(("legend", label, "point", colour, None, "o", hollow))

    def bars(self, x, heights, *, width: float, colours, label: str | None = None):
        """Vertical bars from 0, centred on ``x``; ``colours``: one colour or one per bar."""
        x, h = np.asarray(x, dtype=float), np.asarray(heights, dtype=float)
        colours = [colours] * x.size if isinstance(colours, str) else list(colours)
        self._extent(np.concatenate([x - width / 2, x + width / 2]), h)
        self._y_include.append(0.0)
        self.items.append(("bars", x, h, float(width), colours))
        if label:
            self.items.append(("legend", label, "box", colours[0] if colours else "#999", None, None, False))

    def filled_steps(self, edges, values, *, colour: str, label: str | None = None):
        """A filled step outline from 0: value ``values[k]`` between ``edges[k]`` and
        ``edges[k + 1]`` (one shape however many steps; equal neighbours merge)."""
        edges, values = np.asarray(edges, dtype=float), np.asarray(values, dtype=float)
        if values.size:
            self._extent(edges, values)
            self._y_include.append(0.0)
            self.items.append(("steps", edges, values, colour))
        if label:
            self.items.append(("legend", label, "box", colour, None, None, False))

    def hline(self, y: float, *, colour: str = "#888888", width: float = 1.0, dash: str | None = None,
              label: str | None = None):
        self._y_include.append(float(y))
        self.items.append(("hline", float(y), colour, width, dash))
        if label:
            self.items.append(("legend", label, "line", colour, dash, None, False))

    def vline(self, x: float, *, colour: str = "#888888", width: float = 1.0, dash: str | None = None,
              label: str | None = None, note: str | None = None):
        """A vertical line across the panel; ``note``: a text at its top, above the panel."""
        self._extent([x])
        self.items.append(("vline", float(x), colour, width, dash, note))
        if label:
            self.items.append(("legend", label, "line", colour, dash, None, False))

    def vspan(self, x0: float, x1: float, *, colour: str, label: str | None = None):
        """A shaded band across the panel between ``x0`` and ``x1`` (drawn beneath the rest)."""
        self._extent([x0, x1])
        self.items.insert(0, ("vspan", float(x0), float(x1), colour))
        if label:
            self.items.append(("legend", label, "box", colour, None, None, False))

    def point_labels(self, x, y, texts, *, size: float = 11):
        """Labels beside points, placed so that none covers another or a point (:func:`place_labels`)."""
        self.items.append(("point_labels", np.asarray(x, dtype=float), np.asarray(y, dtype=float), list(texts),
                           float(size)))

    def legend_entry(self, label: str, *, colour: str, marker: str | None = "o", hollow: bool = False,
                     line: bool = False, dash: str | None = None):
        """A legend entry of its own (for instance what hollow markers mean)."""
        self.items.append(("legend", label, "line" if line else "point", colour, dash, marker, hollow))

    def y_range(self) -> tuple[float, float]:
        if self.ylim is not None:
            return float(self.ylim[0]), float(self.ylim[1])
        ys = [v for v in self._y if v.size]
        return _range(np.concatenate(ys) if ys else [], include=self._y_include)

    def x_extent(self) -> np.ndarray:
        xs = [v for v in self._x if v.size]
        return np.concatenate(xs) if xs else np.empty(0)


class Chart:
    """Panels stacked on a shared x axis, a title and a legend above them.

    Parameters
    ----------
    xlabel : str
    title : str, optional
    width : float
        Width in pixels (the page scales it down in narrow windows).
    xlim : (lo, hi), optional
        The x range (default: every panel's data, widened by 5% each side).
    integer_x : bool
        Ticks at whole numbers only.
    """

    def __init__(self, xlabel: str, *, title: str | None = None, width: float = 680, xlim=None,
                 integer_x: bool = False):
        self.xlabel = xlabel
        self.title = title
        self.width = float(width)
        self.xlim = xlim
        self.integer_x = integer_x
        self.panels: list[Panel] = []

    def panel(self, height: float, ylabel: str, **kw) -> Panel:
        p = Panel(height, ylabel, **kw)
        self.panels.append(p)
        return p

    def x_range(self) -> tuple[float, float]:
        if self.xlim is not None:
            return float(self.xlim[0]), float(self.xlim[1])
        xs = [p.x_extent() for p in self.panels]
        return _range(np.concatenate(xs) if xs else [])

    # -- layout --------------------------------------------------------------------------

    def _legend_rows(self, avail: float) -> list[list[tuple]]:
        entries = list(dict.fromkeys(item[1:] for p in self.panels for item in p.items if item[0] == "legend"))
        rows, row, used = [], [], 0.0
        for e in entries:
            w = 30 + text_width(e[0], LEGEND_SIZE) + 16
            if row and used + w > avail:
                rows.append(row)
                row, used = [], 0.0
            row.append((e, used))
            used += w
        if row:
            rows.append(row)
        return rows

    def svg(self, description: str) -> str:
        """The chart as one ``<svg>`` element; ``description`` is its accessible name."""
        # ids (of the panels' clip paths) unique on a page of many charts, and the same on every run
        ident = "c" + hashlib.sha1(f"{description}|{self.title}|{len(self.panels)}".encode()).hexdigest()[:10]
        x_lo, x_hi = self.x_range()
        xticks = nice_ticks(x_lo, x_hi, integer=self.integer_x)
        y_ranges = [p.y_range() for p in self.panels]
        y_ticks = [nice_ticks(lo, hi, target=max(3, min(6, int(p.height // 40) + 1)), integer=p.integer_y)
                   for p, (lo, hi) in zip(self.panels, y_ranges)]
        y_labels = [[tick_label(v, _step(t)) for v in t] for t in y_ticks]
        widest = max((text_width(s, TICK_SIZE) for labels in y_labels for s in labels), default=0.0)
        left = 8 + LINE_HEIGHT * LABEL_SIZE + 6 + widest + 6
        right = 18.0
        plot_w = self.width - left - right
        out: list[str] = []
        y = 8.0
        if self.title:
            for line in wrap(self.title, self.width - left - right, TITLE_SIZE):
                y += LINE_HEIGHT * TITLE_SIZE
                out.append(f"<text class='title' x='{_num(left)}' y='{_num(y)}' font-size='{TITLE_SIZE}' "
                           f"font-weight='600'>{esc(line)}</text>")
            y += 4
        for row in self._legend_rows(self.width - left - right):
            y += LINE_HEIGHT * LEGEND_SIZE
            for entry, offset in row:
                out.append(_legend_entry(left + offset, y - 0.35 * LEGEND_SIZE, entry, y))
            y += 2
        notes = any(item[0] == "vline" and item[5] for item in self.panels[0].items) if self.panels else False
        y += 8 + (LINE_HEIGHT * TICK_SIZE if notes else 0)
        gap = 8.0
        for k, (panel, (lo, hi), ticks, labels) in enumerate(zip(self.panels, y_ranges, y_ticks, y_labels)):
            box = (left, y, left + plot_w, y + panel.height)
            out.append(_panel_svg(panel, box, (x_lo, x_hi), (lo, hi), xticks, ticks, labels,
                                  last=k == len(self.panels) - 1, clip=f"{ident}-{k}"))
            y += panel.height + gap
        y += TICK_SIZE + 4 - gap
        y += LINE_HEIGHT * LABEL_SIZE + 2
        out.append(f"<text x='{_num(left + plot_w / 2)}' y='{_num(y)}' font-size='{LABEL_SIZE}' "
                   f"text-anchor='middle'>{esc(self.xlabel)}</text>")
        height = y + 8
        # no xmlns: inside an HTML page the parser gives <svg> its namespace (and the page names no URL)
        return (f"<svg viewBox='0 0 {_num(self.width)} {_num(height)}' "
                f"width='{_num(self.width)}' height='{_num(height)}' role='img' aria-label='{esc(description)}' "
                f"font-family=\"{FONT}\" font-size='{TICK_SIZE}' fill='#222'>"
                f"<title>{esc(description)}</title>{''.join(out)}</svg>")


def _step(ticks) -> float:
    return ticks[1] - ticks[0] if len(ticks) > 1 else 1.0


def _dash_attr(dash: str | None) -> str:
    return f" stroke-dasharray='{dash}'" if dash else ""


def _marker(shape: str, x: float, y: float, colour: str, hollow: bool, r: float = 3.5) -> str:
    fill = "#fff" if hollow else colour
    style = f"fill='{fill}' stroke='{colour}' stroke-width='1.3'"
    if shape == "s":
        return f"<rect x='{_num(x - r)}' y='{_num(y - r)}' width='{_num(2 * r)}' height='{_num(2 * r)}' {style}/>"
    if shape == "^":
        pts = " ".join(f"{_num(x + dx * r)},{_num(y + dy * r)}" for dx, dy in ((0, -1.2), (-1.1, 0.8), (1.1, 0.8)))
        return f"<polygon points='{pts}' {style}/>"
    return f"<circle cx='{_num(x)}' cy='{_num(y)}' r='{_num(r)}' {style}/>"


def _legend_entry(x: float, mid: float, entry: tuple, baseline: float) -> str:
    label, kind, colour, dash, marker, hollow = entry
    parts = []
    if kind == "box":
        parts.append(f"<rect x='{_num(x)}' y='{_num(mid - 5)}' width='22' height='10' fill='{colour}' "
                     "stroke='#999' stroke-width='0.5'/>")
    else:
        if kind == "line":
            parts.append(f"<line x1='{_num(x)}' y1='{_num(mid)}' x2='{_num(x + 22)}' y2='{_num(mid)}' "
                         f"stroke='{colour}' stroke-width='1.6'{_dash_attr(dash)}/>")
        if marker:
            parts.append(_marker(marker, x + 11, mid, colour, hollow))
    parts.append(f"<text x='{_num(x + 28)}' y='{_num(baseline)}' font-size='{LEGEND_SIZE}'>{esc(label)}</text>")
    return "".join(parts)


def _polyline(px, py, colour: str, width: float, dash: str | None) -> list[str]:
    """One polyline per run of finite points."""
    ok = np.isfinite(px) & np.isfinite(py)
    out, run = [], []
    for a, b, good in zip(px, py, ok):
        if good:
            run.append(f"{_num(a)},{_num(b)}")
        elif run:
            out.append(run)
            run = []
    if run:
        out.append(run)
    return [f"<polyline points='{' '.join(r)}' fill='none' stroke='{colour}' stroke-width='{width:g}' "
            f"stroke-linejoin='round'{_dash_attr(dash)}/>" for r in out if len(r) > 1]


def _step_outline(edges, values, max_steps: int = 1500):
    """Edges and values of a step function with equal neighbours merged; beyond ``max_steps``
    steps, the largest value per bin of steps (the outline never hides a high step)."""
    keep = np.ones(values.size, dtype=bool)
    keep[1:] = values[1:] != values[:-1]
    starts = np.flatnonzero(keep)
    e = np.append(edges[starts], edges[-1])
    v = values[starts]
    if v.size > max_steps:
        bins = np.linspace(0, v.size, max_steps + 1).astype(int)
        v = np.maximum.reduceat(v, bins[:-1])
        e = np.append(e[bins[:-1]], e[-1])
    return e, v


def _panel_svg(panel: Panel, box, xr, yr, xticks, yticks, ylabels, *, last: bool, clip: str) -> str:
    x0, y0, x1, y1 = box
    (xa, xb), (ya, yb) = xr, yr

    def px(v):
        return x0 + (np.asarray(v, dtype=float) - xa) / (xb - xa) * (x1 - x0)

    def py(v):
        return y1 - (np.asarray(v, dtype=float) - ya) / (yb - ya) * (y1 - y0)

    out = [f"<g class='panel'><rect x='{_num(x0)}' y='{_num(y0)}' width='{_num(x1 - x0)}' "
           f"height='{_num(y1 - y0)}' fill='#fff' stroke='none'/>"]
    out.append(f"<clipPath id='{clip}'><rect x='{_num(x0)}' y='{_num(y0)}' width='{_num(x1 - x0)}' "
               f"height='{_num(y1 - y0)}'/></clipPath>")
    # grid and ticks
    xstep = _step(xticks)
    for v in xticks:
        x = float(px(v))
        if panel.grid:
            out.append(f"<line x1='{_num(x)}' y1='{_num(y0)}' x2='{_num(x)}' y2='{_num(y1)}' stroke='#e4e4e4'/>")
        out.append(f"<line x1='{_num(x)}' y1='{_num(y1)}' x2='{_num(x)}' y2='{_num(y1 + 4)}' stroke='#444'/>")
        if last:
            out.append(f"<text class='xtick' x='{_num(x)}' y='{_num(y1 + 6 + TICK_SIZE)}' "
                       f"text-anchor='middle'>{esc(tick_label(v, xstep))}</text>")
    for v, label in zip(yticks, ylabels):
        y = float(py(v))
        if panel.grid:
            out.append(f"<line x1='{_num(x0)}' y1='{_num(y)}' x2='{_num(x1)}' y2='{_num(y)}' stroke='#e4e4e4'/>")
        out.append(f"<line x1='{_num(x0 - 4)}' y1='{_num(y)}' x2='{_num(x0)}' y2='{_num(y)}' stroke='#444'/>")
        out.append(f"<text class='ytick' x='{_num(x0 - 6)}' y='{_num(y + 0.35 * TICK_SIZE)}' "
                   f"text-anchor='end'>{esc(label)}</text>")
    label_x = 8 + LABEL_SIZE
    mid = (y0 + y1) / 2
    out.append(f"<text class='ylabel' x='{_num(label_x)}' y='{_num(mid)}' font-size='{LABEL_SIZE}' "
               f"text-anchor='middle' transform='rotate(-90 {_num(label_x)} {_num(mid)})'>{esc(panel.ylabel)}</text>")
    body = []
    for item in panel.items:
        kind = item[0]
        if kind == "vspan":
            a, b = sorted((float(px(item[1])), float(px(item[2]))))
            body.append(f"<rect x='{_num(a)}' y='{_num(y0)}' width='{_num(b - a)}' height='{_num(y1 - y0)}' "
                        f"fill='{item[3]}'/>")
        elif kind == "bars":
            _, x, h, width, colours = item
            base = float(py(max(ya, 0.0)))
            for xi, hi, c in zip(x, h, colours):
                if not np.isfinite(hi):
                    continue
                a, b = float(px(xi - width / 2)), float(px(xi + width / 2))
                top = float(py(hi))
                body.append(f"<rect x='{_num(a)}' y='{_num(min(top, base))}' width='{_num(b - a)}' "
                            f"height='{_num(abs(base - top))}' fill='{c}' stroke='#fff' stroke-width='0.5'/>")
        elif kind == "steps":
            _, edges, values, colour = item
            e, v = _step_outline(edges, values)
            ex, vy = px(e), py(v)
            base = float(py(max(ya, 0.0)))
            pts = [f"{_num(ex[0])},{_num(base)}"]
            for k in range(v.size):
                pts.append(f"{_num(ex[k])},{_num(vy[k])} {_num(ex[k + 1])},{_num(vy[k])}")
            pts.append(f"{_num(ex[-1])},{_num(base)}")
            body.append(f"<polygon points='{' '.join(pts)}' fill='{colour}'/>")
        elif kind == "hline":
            _, yv, colour, width, dash = item
            y = float(py(yv))
            body.append(f"<line x1='{_num(x0)}' y1='{_num(y)}' x2='{_num(x1)}' y2='{_num(y)}' stroke='{colour}' "
                        f"stroke-width='{width:g}'{_dash_attr(dash)}/>")
        elif kind == "vline":
            _, xv, colour, width, dash, note = item
            x = float(px(xv))
            body.append(f"<line class='vline' x1='{_num(x)}' y1='{_num(y0)}' x2='{_num(x)}' y2='{_num(y1)}' "
                        f"stroke='{colour}' stroke-width='{width:g}'{_dash_attr(dash)}/>")
            if note:
                # centred on the line, or ending at it (starting at it) when a centred note would run
                # past the chart's right (left) edge: the right margin is narrower than most notes
                half = text_width(note, TICK_SIZE) / 2
                anchor = "end" if x + half > x1 + 16 else "start" if x - half < 2 else "middle"
                out.append(f"<text x='{_num(x)}' y='{_num(y0 - 4)}' text-anchor='{anchor}'>{esc(note)}</text>")
        elif kind == "line":
            _, x, y, colour, width, dash, marker, hollow = item
            ppx, ppy = px(x), py(y)
            body += _polyline(ppx, ppy, colour, width, dash)
            if marker:
                for a, b, hol in zip(ppx, ppy, hollow):
                    if np.isfinite(a) and np.isfinite(b):
                        body.append(_marker(marker, float(a), float(b), colour, bool(hol)))
        elif kind == "scatter":
            _, x, y, colour, hollow, radius = item
            for a, b in zip(px(x), py(y)):
                if np.isfinite(a) and np.isfinite(b):
                    body.append(_marker("o", float(a), float(b), colour, hollow, radius))
        elif kind == "point_labels":
            _, x, y, texts, size = item
            pts = [(float(a), float(b)) for a, b in zip(px(x), py(y))]
            for label_box_, text in zip(place_labels(pts, texts, frame=box, size=size), texts):
                # the box's left edge, and a baseline a little above its bottom (room for descenders)
                body.append(f"<text class='point-label' x='{_num(label_box_[0])}' "
                            f"y='{_num(label_box_[3] - 0.3 * size)}' "
                            f"font-size='{size:g}'>{esc(text)}</text>")
    out.append(f"<g clip-path='url(#{clip})'>{''.join(body)}</g>")
    out.append(f"<rect x='{_num(x0)}' y='{_num(y0)}' width='{_num(x1 - x0)}' height='{_num(y1 - y0)}' "
               "fill='none' stroke='#444'/></g>")
    return "".join(out)
