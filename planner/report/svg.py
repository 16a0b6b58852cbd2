"""Small inline-SVG charts for the study report: line, grouped bar and convergence charts.

Output is a plain ``<svg>`` string with a white background, sized in CSS pixels (readable on a
laptop at 100 % and scaled down to the page width when printed). Every piece of text that could come
from a user (titles, series names, category labels) is passed through :func:`html.escape`.

Colours are the Okabe-Ito set, which stays distinguishable for colour-blind readers; series also
differ by dash pattern so a grey-scale print still separates them.
"""
from __future__ import annotations

import math
from html import escape
from typing import Callable, Iterable, Sequence

__all__ = ["nice_ticks", "line_chart", "bar_chart", "convergence_chart", "profile_chart", "tornado_chart",
           "network_chart", "PALETTE", "BASE_COLOR"]

PALETTE = ["#0072B2", "#D55E00", "#009E73", "#CC79A7", "#E69F00", "#56B4E9", "#000000"]
BASE_COLOR = "#6b6b6b"
DASHES = ["", "7 4", "2 3", "10 3 2 3", "4 4", "1 2"]
FONT = "system-ui, -apple-system, 'Segoe UI', Roboto, 'DejaVu Sans', Arial, sans-serif"

_TITLE_PX, _LABEL_PX, _TICK_PX, _LEGEND_PX = 16, 13, 12, 12


def _e(text) -> str:
    return escape(str(text), quote=True)


def _num(v: float) -> str:
    """Compact coordinate text."""
    return f"{v:.2f}".rstrip("0").rstrip(".")


def _text_width(text: str, px: float) -> float:
    # Average glyph width of a sans-serif face is close to 0.58 em; good enough for layout.
    return 0.58 * px * len(str(text))


def _decimals(step: float) -> int:
    for d in range(0, 8):
        if abs(round(step, d) - step) <= 1e-9 * max(1.0, abs(step)):
            return d
    return 8


def nice_ticks(lo: float, hi: float, count: int = 6,
               min_step: float = 0.0) -> tuple[float, float, list[float]]:
    """Axis limits and tick values on a 1-2-2.5-5 x 10^k grid covering ``[lo, hi]``.

    ``min_step`` keeps the spacing at or above a floor (1 for an iteration axis).

    >>> nice_ticks(0.912, 1.043)
    (0.9, 1.05, [0.9, 0.925, 0.95, 0.975, 1.0, 1.025, 1.05])
    >>> nice_ticks(0, 203)
    (0.0, 250.0, [0.0, 50.0, 100.0, 150.0, 200.0, 250.0])
    >>> nice_ticks(0, 2, min_step=1)[2]
    [0.0, 1.0, 2.0]
    """
    lo, hi = float(lo), float(hi)
    if not (math.isfinite(lo) and math.isfinite(hi)):
        raise ValueError("chart: axis limits must be finite")
    if hi < lo:
        lo, hi = hi, lo
    if hi - lo < 1e-12:
        pad = abs(lo) * 0.05 or 1.0
        lo, hi = lo - pad, hi + pad
    raw = (hi - lo) / max(count, 1)
    mag = 10.0 ** math.floor(math.log10(raw))
    step = next(m * mag for m in (1.0, 2.0, 2.5, 5.0, 10.0) if m * mag >= raw * (1 - 1e-9))
    step = max(step, float(min_step))
    a = math.floor(lo / step + 1e-9) * step
    b = math.ceil(hi / step - 1e-9) * step
    d = _decimals(step) + 1
    n = int(round((b - a) / step))
    ticks = [round(a + i * step, d) for i in range(n + 1)]
    return round(a, d), round(b, d), ticks


def _fmt_tick(v: float, ticks: Sequence[float]) -> str:
    step = abs(ticks[1] - ticks[0]) if len(ticks) > 1 else 1.0
    return f"{v:.{_decimals(step)}f}"


class _Frame:
    """Plot area geometry and the value -> pixel maps."""

    def __init__(self, width, height, top, left=72, right=24, bottom=58):
        if right < 24:
            right = 24
        self.w, self.h = width, height
        self.x0, self.x1 = left, width - right
        self.y0, self.y1 = top, height - bottom   # y0 top edge, y1 bottom edge of plot area

    def set_x(self, lo, hi):
        self.xlo, self.xhi = lo, hi

    def set_y(self, lo, hi):
        self.ylo, self.yhi = lo, hi

    def px(self, x):
        span = (self.xhi - self.xlo) or 1.0
        return self.x0 + (x - self.xlo) / span * (self.x1 - self.x0)

    def py(self, y):
        span = (self.yhi - self.ylo) or 1.0
        return self.y1 - (y - self.ylo) / span * (self.y1 - self.y0)


def _legend_layout(entries, width, top, left=72, right=24):
    """Place legend entries in rows; returns (list of (x, y, entry), bottom y)."""
    placed, x, y = [], left, top
    row_h = _LEGEND_PX + 10
    for entry in entries:
        w = 34 + _text_width(entry["name"], _LEGEND_PX) + 18
        if x + w > width - right and x > left:
            x, y = left, y + row_h
        placed.append((x, y, entry))
        x += w
    return placed, (y + row_h if entries else top)


def _legend_svg(placed, kind) -> list[str]:
    out = ['<g class="legend">']
    for x, y, e in placed:
        cy = y + _LEGEND_PX / 2
        if kind == "bar":
            out.append(f'<rect x="{_num(x)}" y="{_num(cy - 6)}" width="24" height="12" '
                       f'fill="{e["color"]}" stroke="#333" stroke-width="0.5"/>')
        else:
            dash = f' stroke-dasharray="{e["dash"]}"' if e.get("dash") else ""
            if e.get("line", True):
                out.append(f'<line x1="{_num(x)}" y1="{_num(cy)}" x2="{_num(x + 26)}" '
                           f'y2="{_num(cy)}" stroke="{e["color"]}" '
                           f'stroke-width="{e.get("width", 2.2)}"{dash}/>')
            if e.get("marker"):
                out.append(_marker(x + 13, cy, e["color"], e["marker"]))
        out.append(f'<text x="{_num(x + 32)}" y="{_num(cy + 4)}" font-size="{_LEGEND_PX}">'
                   f'{_e(e["name"])}</text>')
    out.append("</g>")
    return out


def _marker(x, y, color, style) -> str:
    """A point marker: filled dot, or ``"hollow"`` ring (e.g. a rejected optimiser step)."""
    if style == "hollow":
        return (f'<circle cx="{_num(x)}" cy="{_num(y)}" r="4.5" fill="#ffffff" stroke="{color}" '
                f'stroke-width="1.8"/>')
    return f'<circle cx="{_num(x)}" cy="{_num(y)}" r="3.5" fill="{color}"/>'


def _open_svg(width, height, title) -> list[str]:
    return [
        f'<svg xmlns="http://www.w3.org/2000/svg" class="chart" role="img" '
        f'viewBox="0 0 {width} {height}" width="{width}" height="{height}" '
        f'font-family="{FONT}" style="max-width:100%;height:auto">',
        f"<title>{_e(title)}</title>",
        f'<rect x="0" y="0" width="{width}" height="{height}" fill="#ffffff"/>',
        f'<text x="{width / 2:.1f}" y="22" font-size="{_TITLE_PX}" font-weight="600" '
        f'text-anchor="middle">{_e(title)}</text>',
    ]


def _y_axis(f: _Frame, ticks, label) -> list[str]:
    out = ['<g class="y-axis">']
    for t in ticks:
        y = f.py(t)
        out.append(f'<line x1="{_num(f.x0)}" y1="{_num(y)}" x2="{_num(f.x1)}" y2="{_num(y)}" '
                   f'stroke="#e2e2e2" stroke-width="1"/>')
        out.append(f'<text x="{_num(f.x0 - 6)}" y="{_num(y + 4)}" font-size="{_TICK_PX}" '
                   f'text-anchor="end">{_fmt_tick(t, ticks)}</text>')
    out.append(f'<line x1="{_num(f.x0)}" y1="{_num(f.y0)}" x2="{_num(f.x0)}" y2="{_num(f.y1)}" '
               f'stroke="#222" stroke-width="1"/>')
    if label:
        cy = (f.y0 + f.y1) / 2
        out.append(f'<text x="16" y="{_num(cy)}" font-size="{_LABEL_PX}" text-anchor="middle" '
                   f'transform="rotate(-90 16 {_num(cy)})">{_e(label)}</text>')
    out.append("</g>")
    return out


def _x_axis(f: _Frame, ticks: Iterable[tuple[float, str]], label) -> list[str]:
    out = ['<g class="x-axis">',
           f'<line x1="{_num(f.x0)}" y1="{_num(f.y1)}" x2="{_num(f.x1)}" y2="{_num(f.y1)}" '
           f'stroke="#222" stroke-width="1"/>']
    for x, text in ticks:
        px = f.px(x)
        out.append(f'<line x1="{_num(px)}" y1="{_num(f.y1)}" x2="{_num(px)}" y2="{_num(f.y1 + 5)}" '
                   f'stroke="#222" stroke-width="1"/>')
        out.append(f'<text x="{_num(px)}" y="{_num(f.y1 + 19)}" font-size="{_TICK_PX}" '
                   f'text-anchor="middle">{_e(text)}</text>')
    if label:
        out.append(f'<text x="{_num((f.x0 + f.x1) / 2)}" y="{_num(f.h - 12)}" '
                   f'font-size="{_LABEL_PX}" text-anchor="middle">{_e(label)}</text>')
    out.append("</g>")
    return out


def _thin_labels(labels: Sequence[str], plot_width: float) -> list[tuple[int, str]]:
    """Every k-th category label so labels do not overlap."""
    if not labels:
        return []
    widest = max(_text_width(s, _TICK_PX) for s in labels) + 8
    per = plot_width / len(labels)
    k = max(1, math.ceil(widest / per))
    return [(i, str(s)) for i, s in enumerate(labels) if i % k == 0]


def line_chart(series: Sequence[dict], *, title: str, x_label: str = "", y_label: str = "",
               x_categories: Sequence[str] | None = None, band: tuple | None = None,
               hlines: Sequence[tuple] = (), width: int = 960, height: int = 380,
               y_include: Sequence[float] = (), x_integer: bool = False) -> str:
    """Line chart of several series.

    series: dicts with ``name``, ``y`` (list; ``None`` leaves a gap), optional ``x`` (defaults to
    0, 1, ...), ``color``, ``dash``, ``marker`` (true for dots, ``"hollow"`` for rings),
    ``line`` (false: markers only), ``width``.
    x_categories: tick labels for x = 0, 1, ... (e.g. bus names); thinned so they do not overlap.
    band: ``(low, high, label)`` shaded (e.g. the planning voltage band).
    hlines: ``(y, label)`` dashed limit lines, labelled in the right margin.
    x_integer: numeric x ticks at whole numbers only (iterations).

    >>> s = line_chart([{"name": "base", "y": [1.0, 0.97, 0.95]}], title="V <profile>",
    ...                x_categories=["1", "2", "3"], band=(0.95, 1.05, "band"))
    >>> s.startswith("<svg") and "V &lt;profile&gt;" in s and s.count("<path") == 1
    True
    """
    series = [dict(s) for s in series]
    for i, s in enumerate(series):
        s.setdefault("color", PALETTE[i % len(PALETTE)])
        s.setdefault("dash", DASHES[i % len(DASHES)])
        s.setdefault("x", list(range(len(s["y"]))))
        if len(s["x"]) != len(s["y"]):
            raise ValueError(f"chart {title!r}: series {s['name']!r} has {len(s['x'])} x values "
                             f"and {len(s['y'])} y values")
    xs = [x for s in series for x, y in zip(s["x"], s["y"]) if y is not None]
    ys = [y for s in series for y in s["y"] if y is not None]
    ys += list(y_include) + [h[0] for h in hlines]
    if band:
        ys += [band[0], band[1]]
    if x_categories is not None:
        xs += [0, max(len(x_categories) - 1, 1)]
    if not ys or not xs:
        ys, xs = ys or [0.0, 1.0], xs or [0.0, 1.0]

    legend = [{"name": s["name"], "color": s["color"], "dash": s["dash"],
               "marker": s.get("marker"), "line": s.get("line", True),
               "width": s.get("width", 2.2)} for s in series]
    if band:
        legend.append({"name": band[2], "color": "#cfe8cf", "dash": "", "width": 9})
    placed, legend_bottom = _legend_layout(legend, width, top=34)
    right = 24
    if hlines:   # limit labels sit in the right margin, clear of the data
        right = 14 + max(_text_width(h[1], _TICK_PX) for h in hlines)
    f = _Frame(width, height, top=legend_bottom + 8, right=right)

    ylo, yhi = min(ys), max(ys)
    pad = (yhi - ylo) * 0.04
    ylo_a, yhi_a, yt = nice_ticks(ylo - pad, yhi + pad)
    f.set_y(ylo_a, yhi_a)
    if x_categories is not None:
        f.set_x(-0.5, len(x_categories) - 0.5)
        xticks = _thin_labels(list(x_categories), f.x1 - f.x0)
    else:
        span = max(xs) - min(xs)
        if x_integer and 0 < span <= 20 and float(min(xs)).is_integer():
            # one tick per iteration, axis ending at the last one (no empty tail)
            xlo_a, xhi_a = float(min(xs)), float(math.ceil(max(xs)))
            xt = [xlo_a + i for i in range(int(xhi_a - xlo_a) + 1)]
        else:
            xlo_a, xhi_a, xt = nice_ticks(min(xs), max(xs),
                                          min_step=1.0 if x_integer else 0.0)
        f.set_x(xlo_a, xhi_a)
        xticks = [(t, _fmt_tick(t, xt)) for t in xt]

    out = _open_svg(width, height, title)
    if band:
        y_top, y_bot = f.py(max(band[0], band[1])), f.py(min(band[0], band[1]))
        out.append(f'<rect class="band" x="{_num(f.x0)}" y="{_num(y_top)}" '
                   f'width="{_num(f.x1 - f.x0)}" height="{_num(y_bot - y_top)}" '
                   f'fill="#cfe8cf" fill-opacity="0.55"/>')
    out += _y_axis(f, yt, y_label)
    out += _x_axis(f, xticks, x_label)
    for y, label in hlines:
        py = f.py(y)
        out.append(f'<line class="limit" x1="{_num(f.x0)}" y1="{_num(py)}" x2="{_num(f.x1)}" '
                   f'y2="{_num(py)}" stroke="#b2182b" stroke-width="1.4" stroke-dasharray="6 4"/>')
        out.append(f'<text x="{_num(f.x1 + 6)}" y="{_num(py + 4)}" font-size="{_TICK_PX}" '
                   f'fill="#b2182b" text-anchor="start">{_e(label)}</text>')
    for s in series:
        d, pen = [], False
        for x, y in zip(s["x"], s["y"]):
            if y is None:
                pen = False
                continue
            d.append(f'{"L" if pen else "M"}{_num(f.px(x))} {_num(f.py(y))}')
            pen = True
        dash = f' stroke-dasharray="{s["dash"]}"' if s["dash"] else ""
        if s.get("line", True):
            out.append(f'<path class="series" data-name="{_e(s["name"])}" d="{" ".join(d)}" '
                       f'fill="none" stroke="{s["color"]}" stroke-width="{s.get("width", 2.2)}" '
                       f'stroke-linejoin="round"{dash}/>')
        if s.get("marker"):
            for x, y in zip(s["x"], s["y"]):
                if y is not None:
                    out.append(_marker(f.px(x), f.py(y), s["color"], s["marker"]))
    out += _legend_svg(placed, "line")
    out.append("</svg>")
    return "\n".join(out)


def bar_chart(categories: Sequence[str], series: Sequence[dict], *, title: str,
              y_label: str = "", x_label: str = "", width: int = 960, height: int = 380,
              value_format: Callable[[float], str] | None = None) -> str:
    """Grouped bar chart: one group per category, one bar per series.

    series: dicts with ``name``, ``values`` (one per category; ``None`` draws no bar and writes
    "n/a"), optional ``color``. Bars start at zero. Values are written above the bars when there
    are few enough bars to fit the text.

    >>> s = bar_chart(["peak", "light"], [{"name": "base", "values": [0.2, 0.05]},
    ...               {"name": "A & B", "values": [0.14, None]}], title="Losses")
    >>> s.count('class="bar"'), "A &amp; B" in s, "n/a" in s
    (3, True, True)
    """
    series = [dict(s) for s in series]
    for i, s in enumerate(series):
        s.setdefault("color", PALETTE[i % len(PALETTE)])
        if len(s["values"]) != len(categories):
            raise ValueError(f"chart {title!r}: series {s['name']!r} has {len(s['values'])} values "
                             f"for {len(categories)} categories")
    vals = [v for s in series for v in s["values"] if v is not None]
    lo, hi = min(vals + [0.0]), max(vals + [0.0])
    if hi == lo:
        hi = lo + 1.0
    fmt = value_format or (lambda v: f"{v:.3g}")
    legend = [{"name": s["name"], "color": s["color"]} for s in series]
    placed, legend_bottom = _legend_layout(legend, width, top=34)
    f = _Frame(width, height, top=legend_bottom + 14)
    ylo_a, yhi_a, yt = nice_ticks(lo, hi + (hi - lo) * 0.06)
    f.set_y(ylo_a, yhi_a)
    ncat, nser = max(len(categories), 1), max(len(series), 1)
    f.set_x(0, ncat)
    group_w = (f.x1 - f.x0) / ncat
    bar_w = group_w * 0.8 / nser
    show_values = bar_w >= _text_width("0.0000", 11) * 0.9

    out = _open_svg(width, height, title)
    out += _y_axis(f, yt, y_label)
    out += _x_axis(f, [(i + 0.5, c) for i, c in enumerate(categories)], x_label)
    zero = f.py(max(ylo_a, 0.0))
    for j, s in enumerate(series):
        for i, v in enumerate(s["values"]):
            x = f.x0 + i * group_w + group_w * 0.1 + j * bar_w
            if v is None:
                out.append(f'<text x="{_num(x + bar_w / 2)}" y="{_num(zero - 5)}" font-size="11" '
                           f'text-anchor="middle" fill="#555">n/a</text>')
                continue
            top, bot = sorted((f.py(v), zero))
            out.append(f'<rect class="bar" data-series="{_e(s["name"])}" '
                       f'data-category="{_e(categories[i])}" x="{_num(x + 1)}" y="{_num(top)}" '
                       f'width="{_num(max(bar_w - 2, 1))}" height="{_num(max(bot - top, 0.5))}" '
                       f'fill="{s["color"]}" stroke="#333" stroke-width="0.5"/>')
            if show_values:
                out.append(f'<text x="{_num(x + bar_w / 2)}" y="{_num(top - 4)}" font-size="11" '
                           f'text-anchor="middle">{_e(fmt(v))}</text>')
    out += _legend_svg(placed, "bar")
    out.append("</svg>")
    return "\n".join(out)


def convergence_chart(iterations: Sequence[int], predicted: Sequence[float | None],
                      ac: Sequence[float | None], *, title: str, y_label: str = "losses (MW)",
                      accepted: Sequence[bool | None] | None = None,
                      width: int = 960, height: int = 340) -> str:
    """Losses per optimiser iteration: linear-model prediction (dashed) against AC load flow.

    With ``accepted`` (one flag per iteration), the AC line joins the accepted steps only and a
    rejected proposal's AC figure is a hollow ring off the line, so a rejected trial does not read
    as the plan getting worse.

    >>> s = convergence_chart([0, 1, 2], [None, 0.15, 0.142], [0.2, 0.151, 0.143], title="c")
    >>> s.count('class="series"'), s.count("<circle")    # 5 points and 2 legend markers
    (2, 7)
    >>> s = convergence_chart([0, 1, 2], [None, 0.15, 0.142], [0.2, 0.16, 0.143], title="c",
    ...                       accepted=[True, False, True])
    >>> s.count('class="series"'), s.count('fill="#ffffff" stroke=')   # ring + legend ring
    (2, 2)
    """
    its, pred, acv = list(iterations), list(predicted), list(ac)
    if accepted is None or all(a is None or a for a in accepted):
        series = [{"name": "AC load flow", "x": its, "y": acv, "color": PALETTE[0], "dash": "",
                   "marker": True}]
    else:
        ok = [a is None or bool(a) for a in accepted]
        series = [
            {"name": "AC load flow, accepted step", "x": [i for i, k in zip(its, ok) if k],
             "y": [v for v, k in zip(acv, ok) if k], "color": PALETTE[0], "dash": "",
             "marker": True},
            {"name": "AC load flow, rejected proposal", "x": [i for i, k in zip(its, ok) if not k],
             "y": [v for v, k in zip(acv, ok) if not k], "color": PALETTE[0], "dash": "",
             "marker": "hollow", "line": False},
        ]
    series.append({"name": "linear prediction", "x": its, "y": pred, "color": PALETTE[1],
                   "dash": "6 4", "marker": True})
    return line_chart(series, title=title, x_label="optimiser iteration", y_label=y_label,
                      width=width, height=height, x_integer=True)


_SHAPES = ["circle", "square", "triangle", "diamond", "cross"]


def _shape(x, y, color, shape, r=3.6) -> str:
    """A point marker by shape (series differ by shape as well as colour, for grey-scale prints)."""
    if shape == "square":
        return (f'<rect x="{_num(x - r)}" y="{_num(y - r)}" width="{_num(2 * r)}" height="{_num(2 * r)}" '
                f'fill="{color}"/>')
    if shape == "triangle":
        return (f'<polygon points="{_num(x)},{_num(y - r - 0.8)} {_num(x - r - 0.4)},{_num(y + r - 0.6)} '
                f'{_num(x + r + 0.4)},{_num(y + r - 0.6)}" fill="{color}"/>')
    if shape == "diamond":
        return (f'<polygon points="{_num(x)},{_num(y - r - 0.6)} {_num(x + r + 0.6)},{_num(y)} '
                f'{_num(x)},{_num(y + r + 0.6)} {_num(x - r - 0.6)},{_num(y)}" fill="{color}"/>')
    if shape == "cross":
        return (f'<path d="M{_num(x - r)} {_num(y - r)}L{_num(x + r)} {_num(y + r)}M{_num(x - r)} {_num(y + r)}'
                f'L{_num(x + r)} {_num(y - r)}" stroke="{color}" stroke-width="2"/>')
    return f'<circle cx="{_num(x)}" cy="{_num(y)}" r="{_num(r)}" fill="{color}"/>'


def profile_chart(groups: Sequence[tuple[str, Sequence[str]]], series: Sequence[dict],
                  band_lo: Sequence[float], band_hi: Sequence[float], *, title: str,
                  y_label: str = "voltage (pu)", width: int = 980, height: int = 380) -> str:
    """Bus voltages as point markers, buses grouped by voltage level (no line joins unrelated
    buses), each bus's own band shaded behind it and every point outside its band ringed in red.

    ``groups``: ``[(label, [bus label, ...]), ...]`` in drawing order; ``series``:
    ``[{"name", "y": [value or None per bus, in group order], "color"?}]``; ``band_lo`` /
    ``band_hi`` per bus in the same order.

    >>> s = profile_chart([("11 kV", ["1", "2"])], [{"name": "base", "y": [0.94, 1.0]}],
    ...                   [0.95, 0.95], [1.05, 1.05], title="t")
    >>> s.count('class="breach"')      # bus 1 is below its band
    1
    """
    labels = [b for _, buses in groups for b in buses]
    n = len(labels)
    if n == 0:
        raise ValueError("chart: profile needs at least one bus")
    gap = 1.2                                      # slots between voltage-level groups
    pos, x = [], 0.0
    spans = []
    for _, buses in groups:
        start = x
        for _ in buses:
            pos.append(x)
            x += 1.0
        spans.append((start, x - 1.0))
        x += gap
    entries = [{"name": s["name"], "color": s.get("color") or PALETTE[k % len(PALETTE)],
                "marker": s.get("shape") or _SHAPES[k % len(_SHAPES)], "line": False}
               for k, s in enumerate(series)]
    entries.append({"name": "outside its own band", "color": "#b2182b", "marker": "hollow", "line": False})
    placed, legend_bottom = _legend_layout(entries, width, 34)
    f = _Frame(width, height + legend_bottom - 34, top=legend_bottom + 6, bottom=64)
    vals = [v for s in series for v in s["y"] if v is not None] + list(band_lo) + list(band_hi)
    ylo, yhi, yt = nice_ticks(min(vals), max(vals))
    f.set_x(-0.8, x - gap - 0.2)
    f.set_y(ylo, yhi)
    out = _open_svg(width, f.h, title)
    out += _y_axis(f, yt, y_label)
    half = 0.5 * (f.px(1.0) - f.px(0.0))
    out.append('<g class="band">')
    for i in range(n):
        xa, xb = f.px(pos[i]) - half, f.px(pos[i]) + half
        ya, yb = f.py(band_hi[i]), f.py(band_lo[i])
        out.append(f'<rect x="{_num(xa)}" y="{_num(ya)}" width="{_num(xb - xa)}" height="{_num(yb - ya)}" '
                   f'fill="#d9ead3" stroke="none"/>')
    out.append("</g>")
    out.append(f'<line x1="{_num(f.x0)}" y1="{_num(f.y1)}" x2="{_num(f.x1)}" y2="{_num(f.y1)}" '
               f'stroke="#222" stroke-width="1"/>')
    for (label, buses), (a, b) in zip(groups, spans):
        xa, xb = f.px(a) - half, f.px(b) + half
        out.append(f'<line x1="{_num(xa)}" y1="{_num(f.y1 + 30)}" x2="{_num(xb)}" y2="{_num(f.y1 + 30)}" '
                   f'stroke="#555" stroke-width="1"/>')
        out.append(f'<text x="{_num((xa + xb) / 2)}" y="{_num(f.y1 + 46)}" font-size="{_LABEL_PX}" '
                   f'text-anchor="middle">{_e(label)}</text>')
    shown = dict(_thin_labels(labels, (f.x1 - f.x0) * n / max(x - gap, 1)))
    for i, lab in shown.items():
        out.append(f'<text x="{_num(f.px(pos[i]))}" y="{_num(f.y1 + 16)}" font-size="10" '
                   f'text-anchor="middle">{_e(lab)}</text>')
    for k, s in enumerate(series):
        color, shape = entries[k]["color"], entries[k]["marker"]
        out.append(f'<g class="series" data-name="{_e(s["name"])}">')
        for i, v in enumerate(s["y"]):
            if v is None:
                continue
            out.append(_shape(f.px(pos[i]), f.py(v), color, shape))
        out.append("</g>")
    for s in series:
        for i, v in enumerate(s["y"]):
            if v is not None and (v < band_lo[i] - 1e-6 or v > band_hi[i] + 1e-6):
                out.append(f'<circle class="breach" cx="{_num(f.px(pos[i]))}" cy="{_num(f.py(v))}" r="7" '
                           f'fill="none" stroke="#b2182b" stroke-width="1.8"/>')
    out += _legend_svg(placed, "line")
    out.append("</svg>")
    return "".join(out)


def tornado_chart(rows: Sequence[dict], base: float, *, title: str, value_format=None,
                  width: int = 900) -> str:
    """Horizontal bars from ``base`` to each input's low and high result.

    ``rows``: ``[{"label", "low", "high", "low_text", "high_text"}]``.

    >>> s = tornado_chart([{"label": "rate", "low": 5, "high": -2, "low_text": "3 %",
    ...                     "high_text": "7 %"}], 1.0, title="NPV")
    >>> s.count("<rect") - 1           # two bars (plus the background)
    2
    """
    fmtv = value_format or (lambda v: f"{v:,.0f}")
    row_h = 40
    height = 70 + row_h * len(rows) + 40
    left = 190
    f = _Frame(width, height, top=44, left=left, right=40, bottom=40)
    vals = [base] + [r[k] for r in rows for k in ("low", "high") if r.get(k) is not None]
    lo, hi, ticks = nice_ticks(min(vals), max(vals), count=5)
    # room beside the bars for their value labels
    text_px = max([_text_width(r.get(k + "_text", ""), 11) for r in rows for k in ("low", "high")] + [0]) + 8
    plot_px = width - left - 40
    pad = (hi - lo) * text_px / max(plot_px - 2 * text_px, 1.0)
    f.set_x(lo - pad, hi + pad)
    out = _open_svg(width, height, title)
    for t in ticks:
        out.append(f'<line class="tick" x1="{_num(f.px(t))}" y1="{_num(f.y0)}" x2="{_num(f.px(t))}" '
                   f'y2="{_num(f.y1)}" stroke="#e2e2e2"/>')
        out.append(f'<text x="{_num(f.px(t))}" y="{_num(f.y1 + 16)}" font-size="{_TICK_PX}" '
                   f'text-anchor="middle">{_e(fmtv(t))}</text>')
    for i, r in enumerate(rows):
        yc = f.y0 + 14 + i * row_h
        out.append(f'<text x="{left - 8}" y="{_num(yc + 5)}" font-size="{_LABEL_PX}" '
                   f'text-anchor="end">{_e(r["label"])}</text>')
        for key, color in (("low", PALETTE[5]), ("high", PALETTE[1])):
            v = r.get(key)
            if v is None:
                continue
            xa, xb = sorted((f.px(base), f.px(v)))
            out.append(f'<rect x="{_num(xa)}" y="{_num(yc - 9)}" width="{_num(max(xb - xa, 1))}" height="18" '
                       f'fill="{color}" opacity="0.85"/>')
            anchor, tx = ("end", xa - 4) if f.px(v) < f.px(base) else ("start", xb + 4)
            out.append(f'<text x="{_num(tx)}" y="{_num(yc + 4)}" font-size="11" text-anchor="{anchor}">'
                       f'{_e(r.get(key + "_text", ""))}</text>')
    out.append(f'<line x1="{_num(f.px(base))}" y1="{_num(f.y0 - 4)}" x2="{_num(f.px(base))}" '
               f'y2="{_num(f.y1)}" stroke="#222" stroke-width="1.5"/>')
    out.append("</svg>")
    return "".join(out)


def network_chart(layers: Sequence[tuple[str, Sequence[int]]], edges: Sequence[dict], *, title: str,
                  names: dict | None = None, marks: dict | None = None, sources: Sequence[int] = (),
                  width: int = 980) -> str:
    """A layered one-line sketch from the topology alone: one row of buses per voltage level
    (highest at the top), lines within a row drawn as arcs, transformers between rows dashed;
    ``marks`` (bus -> short text) flags bank sites; ``sources`` (supply / generator buses) are
    drawn as squares. Positions within a row follow the buses they connect to above (one
    barycentre sweep), which keeps most connections short.

    >>> s = network_chart([("33 kV", [1]), ("11 kV", [2, 3])],
    ...                   [{"from_bus": 1, "to_bus": 2, "element": "transformer"},
    ...                    {"from_bus": 2, "to_bus": 3, "element": "line"}],
    ...                   title="net", marks={3: "bank"})
    >>> s.count('class="bus"'), s.count('class="site"')
    (3, 1)
    """
    names, marks = names or {}, marks or {}
    adj: dict = {}
    for e in edges:
        adj.setdefault(e["from_bus"], []).append(e["to_bus"])
        adj.setdefault(e["to_bus"], []).append(e["from_bus"])
    row_h = 110
    left = 84
    height = 50 + row_h * len(layers) + 22
    xpos: dict = {}
    ordered = []
    for r, (label, buses) in enumerate(layers):
        buses = list(buses)
        if r > 0:
            def bary(b, _buses=buses):
                up = [xpos[o] for o in adj.get(b, []) if o in xpos]
                return (sum(up) / len(up) if up else 1e9, b)
            buses.sort(key=bary)
        span = width - left - 30
        for i, b in enumerate(buses):
            xpos[b] = left + span * (i + 0.5) / len(buses)
        ordered.append((label, buses))
    ypos = {b: 60 + r * row_h for r, (_, buses) in enumerate(ordered) for b in buses}
    out = _open_svg(width, height, title)
    for r, (label, _) in enumerate(ordered):
        y = 60 + r * row_h
        out.append(f'<text x="8" y="{_num(y + 4)}" font-size="{_LABEL_PX}" font-weight="600">{_e(label)}</text>')
    for e in edges:
        a, b = e["from_bus"], e["to_bus"]
        if a not in xpos or b not in xpos:
            continue
        x1, y1, x2, y2 = xpos[a], ypos[a], xpos[b], ypos[b]
        if y1 == y2:
            lift = min(40, 10 + abs(x2 - x1) * 0.15)
            out.append(f'<path d="M{_num(x1)} {_num(y1)}Q{_num((x1 + x2) / 2)} {_num(y1 - lift)} '
                       f'{_num(x2)} {_num(y2)}" fill="none" stroke="#5a5a5a" stroke-width="1.2"/>')
        else:
            dash = ' stroke-dasharray="5 3"' if e.get("element") == "transformer" else ""
            out.append(f'<line x1="{_num(x1)}" y1="{_num(y1)}" x2="{_num(x2)}" y2="{_num(y2)}" '
                       f'stroke="#5a5a5a" stroke-width="1.2"{dash}/>')
    last_label: dict = {}      # row y -> (x, drop) of the last site label, to stagger close ones
    for b, x in sorted(xpos.items(), key=lambda kv: (ypos[kv[0]], kv[1])):
        y = ypos[b]
        tip = f"{b} {names.get(b, '')}".strip()
        if b in sources:
            out.append(f'<rect class="bus" x="{_num(x - 6)}" y="{_num(y - 6)}" width="12" height="12" '
                       f'fill="#222"><title>{_e(tip)}</title></rect>')
        else:
            out.append(f'<circle class="bus" cx="{_num(x)}" cy="{_num(y)}" r="5" fill="#ffffff" '
                       f'stroke="#222" stroke-width="1.4"><title>{_e(tip)}</title></circle>')
        out.append(f'<text x="{_num(x)}" y="{_num(y + 18)}" font-size="10" text-anchor="middle">{_e(b)}</text>')
        if b in marks:
            px, pdrop = last_label.get(y, (-1e9, 0))
            drop = 12 if x - px < _text_width(marks[b], 10) + 6 and pdrop == 0 else 0
            last_label[y] = (x, drop)
            out.append(f'<g class="site"><polygon points="{_num(x - 7)},{_num(y + 24)} {_num(x + 7)},{_num(y + 24)} '
                       f'{_num(x)},{_num(y + 34)}" fill="{PALETTE[1]}"/>'
                       f'<text x="{_num(x)}" y="{_num(y + 46 + drop)}" font-size="10" text-anchor="middle" '
                       f'fill="{PALETTE[1]}" font-weight="600">{_e(marks[b])}</text></g>')
    out.append("</svg>")
    return "".join(out)
