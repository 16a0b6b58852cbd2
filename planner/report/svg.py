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

__all__ = ["nice_ticks", "line_chart", "bar_chart", "convergence_chart", "PALETTE", "BASE_COLOR"]

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
