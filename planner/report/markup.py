"""HTML pieces for the report: escaping, number formats, tables and the page style.

Tables are built from :class:`Table` objects that also feed the CSV output, so a number shown in
the HTML comes from the same row as the number written to CSV.
"""
from __future__ import annotations

import csv
import io
import math
from dataclasses import dataclass, field
from html import escape
from typing import Any, Sequence

__all__ = ["esc", "fmt", "Table", "html_table", "csv_text", "clean_number", "money_round", "CSS"]


def esc(value: Any) -> str:
    """Escape any value for HTML text or an attribute value.

    >>> esc('<b>R&D</b> "x"')
    '&lt;b&gt;R&amp;D&lt;/b&gt; &quot;x&quot;'
    """
    return escape("" if value is None else str(value), quote=True)


def _is_num(v) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool)


# kind -> (format spec, unit suffix) for the kinds that need nothing more
_FORMATS = {"pu": (".4f", ""), "mwh": (",.0f", ""), "pct": (".1f", " %"), "pct1": (".1f", ""),
            "years": (".1f", ""), "ratio": (".2f", ""), "hours": (",.0f", ""), "scale": (".3f", ""),
            "kv": ("g", ""), "pf": (".3f", ""), "num": (".4g", "")}


def money_round(v: float) -> float:
    """Money to three significant figures (a planning estimate is not good to the unit).

    >>> money_round(3_848_546.2), money_round(96_000), money_round(4_483.0), money_round(-1234.5)
    (3850000.0, 96000.0, 4480.0, -1230.0)
    """
    if v == 0 or not math.isfinite(v):
        return v
    digits = 3 - int(math.floor(math.log10(abs(v)))) - 1
    return float(round(v, digits))


def clean_number(v: float) -> float:
    """A float without binary noise: 12 significant digits, far finer than any input.

    >>> clean_number(3.5999999999999996), clean_number(0.9624999999999999), clean_number(1e-20)
    (3.6, 0.9625, 1e-20)
    """
    return float(f"{v:.12g}")


def fmt(value: Any, kind: str, *, mw_decimals: int = 3, mvar_decimals: int = 3, currency: str = "") -> str:
    """Format one value for display (plain text, not yet escaped).

    kinds: text, int, pu, mw, mvar, mwh, money, money_axis, pct, pct1, years, ratio, rate, hours,
    scale, kv, pf, num, bool.

    >>> fmt(0.91312, "pu"), fmt(1234567.4, "money", currency="EUR"), fmt(float("inf"), "years")
    ('0.9131', 'EUR 1,230,000', 'never')
    >>> fmt(3.5999999999999996, "mvar", mvar_decimals=1), fmt(1234.56, "mwh")
    ('3.6', '1,235')
    >>> fmt(None, "mw"), fmt(0.05, "rate"), fmt(True, "bool")
    ('', '5.0 %', 'yes')
    """
    if value is None:
        return ""
    if kind == "bool":
        return "yes" if value else "no"
    if kind == "text" or not _is_num(value):
        return str(value)
    v = float(value)
    if math.isnan(v):
        return "n/a"
    if math.isinf(v):
        if kind == "years":
            return "never" if v > 0 else "n/a"
        return "unbounded" if v > 0 else "-unbounded"
    if kind == "int":
        return f"{int(round(v)):,}"
    if kind == "mw":
        return f"{v:.{mw_decimals}f}"
    if kind == "mvar":
        return f"{v:.{mvar_decimals}f}"
    if kind == "money":
        return f"{currency} {money_round(v):,.0f}".strip()
    if kind == "money_axis":
        return f"{v / 1e6:,.1f} M" if abs(v) >= 1e6 else f"{v / 1e3:,.0f} k" if abs(v) >= 1e3 else f"{v:,.0f}"
    if kind == "rate":
        return f"{v * 100:.1f} %"
    if kind in _FORMATS:
        return format(v, _FORMATS[kind][0]) + _FORMATS[kind][1]
    return f"{v:g}"


@dataclass
class Table:
    """A table as columns (key, header, kind) and rows (dicts keyed by column key)."""

    name: str
    columns: list[tuple[str, str, str]]
    rows: list[dict] = field(default_factory=list)

    def keys(self) -> list[str]:
        return [c[0] for c in self.columns]


def html_table(table: Table, *, show: Sequence[str] | None = None, rows: Sequence[dict] | None = None,
               caption: str = "", mw_decimals: int = 3, mvar_decimals: int = 3, currency: str = "",
               row_class=None, css_class: str = "data") -> str:
    """Render (some columns / rows of) a :class:`Table` as an HTML table; all text escaped.

    Column kind ``pre`` holds text already formatted, aligned right like numbers.
    """
    cols = [c for c in table.columns if show is None or c[0] in show]
    if show is not None:
        order = {k: i for i, k in enumerate(show)}
        cols.sort(key=lambda c: order[c[0]])
    body_rows = table.rows if rows is None else rows
    out = [f'<div class="tablewrap"><table class="{esc(css_class)}" data-table="{esc(table.name)}">']
    if caption:
        out.append(f"<caption>{esc(caption)}</caption>")
    out.append("<thead><tr>" + "".join(
        f'<th class="{"num" if c[2] not in ("text", "bool") else "txt"}">{esc(c[1])}</th>'
        for c in cols) + "</tr></thead><tbody>")
    for r in body_rows:
        cls = row_class(r) if row_class else ""
        tr = f'<tr class="{esc(cls)}">' if cls else "<tr>"
        cells = []
        for key, _, kind in cols:
            v = r.get(key)
            text = v if isinstance(v, str) and kind != "text" else fmt(
                v, kind, mw_decimals=mw_decimals, mvar_decimals=mvar_decimals, currency=currency)
            align = "num" if kind not in ("text", "bool") else "txt"
            cells.append(f'<td class="{align}">{esc(text)}</td>')
        out.append(tr + "".join(cells) + "</tr>")
    out.append("</tbody></table></div>")
    return "".join(out)


_CSV_RISKY = ("=", "+", "@", "\t", "\r")


def _csv_cell(v: Any) -> str:
    if v is None:
        return ""
    if isinstance(v, bool):
        return "true" if v else "false"
    if _is_num(v):
        if isinstance(v, float) or hasattr(v, "dtype"):
            v = float(v)
            # never inf / nan in a CSV: the cell stays empty and a note column says why
            return repr(clean_number(v)) if math.isfinite(v) else ""
        return str(v)
    s = str(v)
    # A spreadsheet would run a cell starting with these as a formula; a leading quote keeps it
    # text (common practice against formula injection).
    if s.startswith(_CSV_RISKY) or (s.startswith("-") and not _looks_numeric(s)):
        s = "'" + s
    return s


def _looks_numeric(s: str) -> bool:
    try:
        float(s)
        return True
    except ValueError:
        return False


def csv_text(table: Table) -> str:
    """CSV of a table, header = column keys, floats to 12 significant digits (no binary noise).

    >>> print(csv_text(Table("t", [("bus", "Bus", "int"), ("v_pu", "V", "pu")],
    ...                          [{"bus": 18, "v_pu": 0.91312}])), end="")
    bus,v_pu
    18,0.91312
    """
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(table.keys())
    for r in table.rows:
        w.writerow([_csv_cell(r.get(k)) for k in table.keys()])
    return buf.getvalue()


CSS = """
:root { color-scheme: light; }
* { box-sizing: border-box; }
body { font-family: system-ui, -apple-system, 'Segoe UI', Roboto, 'DejaVu Sans', Arial, sans-serif;
  color: #1a1a1a; background: #ffffff; margin: 0; line-height: 1.45; font-size: 15px; }
main { max-width: 1040px; margin: 0 auto; padding: 24px 28px 48px; }
header.report { border-bottom: 3px solid #0072B2; margin-bottom: 18px; padding-bottom: 10px; }
h1 { font-size: 26px; margin: 0 0 6px; }
h2 { font-size: 21px; margin: 34px 0 10px; padding-bottom: 4px; border-bottom: 1px solid #c8c8c8; }
h3 { font-size: 17px; margin: 26px 0 8px; }
h3.alt { border-top: 2px solid #9cc3e0; padding-top: 10px; margin-top: 30px; }
h2 + .althead h3.alt { border-top: none; padding-top: 0; margin-top: 14px; }
p.meta { color: #444; margin: 2px 0; font-size: 14px; }
.summary { border: 1px solid #9cc3e0; background: #f3f8fc; padding: 10px 16px; margin: 14px 0; }
.summary ul { margin: 6px 0; padding-left: 20px; }
.warn { border-left: 5px solid #D55E00; background: #fdf1ea; padding: 8px 12px; margin: 10px 0; }
.good { border-left: 5px solid #009E73; background: #eef7f2; padding: 8px 12px; margin: 10px 0; }
.warn ul { margin: 4px 0 2px; padding-left: 20px; }
.ok { color: #1b6e3a; font-weight: 600; }
.bad { color: #b2182b; font-weight: 600; }
/* Tables are laid out to fit the content width (no horizontal scrolling): text cells wrap,
   numbers do not; the wrapper only scrolls if a table is still too wide on a narrow screen. */
.tablewrap { max-width: 100%; overflow-x: auto; }
table.data { border-collapse: collapse; margin: 8px 0 16px; font-size: 14px;
  font-variant-numeric: tabular-nums; max-width: 100%; }
table.data.compact { font-size: 13px; }
table.data caption { text-align: left; font-weight: 600; padding: 4px 0; }
table.data th, table.data td { border: 1px solid #c8c8c8; padding: 4px 8px; vertical-align: top; }
table.data.compact th, table.data.compact td { padding: 3px 6px; }
table.data th { background: #eef1f4; font-weight: 600; }
table.data td.num, table.data th.num { text-align: right; }
table.data td.num { white-space: nowrap; }
table.data.compact td.txt:first-child { white-space: nowrap; }
table.data.wrapnum td.num { white-space: normal; }
table.data td.txt, table.data th.txt { text-align: left; }
table.data.wide td:first-child { white-space: normal; min-width: 12em; }
table.data tr.unverified td { color: #666; font-style: italic; }
table.data tr.best td { background: #eef7ee; }
dl.criteria { display: grid; grid-template-columns: max-content auto; gap: 2px 16px; }
dl.criteria dt { font-weight: 600; }
dl.criteria dd { margin: 0; }
figure { margin: 10px 0 20px; }
figure svg { display: block; }
figcaption { font-size: 13px; color: #444; margin-top: 4px; }
.note { font-size: 13px; color: #444; }
p.lead { font-size: 17px; margin: 6px 0 10px; }
nav.toc { font-size: 13px; margin-top: 8px; color: #444; }
nav.toc a { color: #0a4f80; text-decoration: none; }
table.data.hash td { font-family: ui-monospace, 'DejaVu Sans Mono', monospace; font-size: 11px;
  word-break: break-all; }
p.how { font-size: 13px; color: #444; margin: 4px 0 10px; }
footer { margin-top: 40px; font-size: 12px; color: #555; border-top: 1px solid #c8c8c8;
  padding-top: 8px; }
@page { size: A4; margin: 14mm 12mm; }
@media print {
  body { font-size: 10pt; }
  main { max-width: none; padding: 0; }
  h2.newpage { break-before: page; page-break-before: always; }
  table.data { font-size: 8.5pt; }
  table.data.compact { font-size: 8pt; }
  table.data th, table.data td, table.data.compact th, table.data.compact td { padding: 2px 5px; }
  .tablewrap { overflow: visible; }
  figure, table.data tr, .summary, .warn, .good, dl.criteria, .althead { break-inside: avoid;
    page-break-inside: avoid; }
  /* short tables move whole to the next page (no orphan rows); long ones repeat their header */
  table.data thead { display: table-header-group; }
  .tablewrap { break-inside: avoid; page-break-inside: avoid; }
  p { orphans: 3; widows: 3; }
  nav.toc { display: none; }
  h2, h3, table.data caption { break-after: avoid; page-break-after: avoid; }
  .summary, .warn, .good, table.data th, table.data tr.best td { -webkit-print-color-adjust: exact;
    print-color-adjust: exact; }
  a { color: inherit; text-decoration: none; }
}
"""
