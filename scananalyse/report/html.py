"""The report: one self-contained HTML page built from plain data.

:class:`ReportData` holds everything the page shows (tables as DataFrames, figures
as PNG bytes, numbers in internal units); :func:`render_report` turns it into a
single string of HTML with inline CSS, figures embedded as ``data:`` URIs, no
scripts and no reference to anything outside the page, so the file can be
attached to an inspection record, mailed and printed as it is.
:func:`write_report` writes it atomically.

Every string that came from an input (tank names, file names, flags, table
cells, rule sources) is HTML-escaped, and the letters ``http`` are written with
a character reference so the page never carries anything a browser or mail
filter could take for a web address.

Sections, in order, with these ids: ``summary``, ``registration``, ``maps``,
``zones``, ``extremes``, ``methods``, ``indications``, ``assumptions``.  The
caution (:data:`scananalyse.CAUTION`) is shown in the summary and in a footer
repeated on every printed page.
"""

from __future__ import annotations

import base64
import datetime as _dt
import html as _html
import os
import re
import tempfile
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from .. import CAUTION, __version__
from ..outputs import publish_file
from . import units as U

__all__ = ["ReportData", "SECTIONS", "esc", "render_report", "write_report"]

#: Section ids and headings, in page order.
SECTIONS = (
    ("summary", "Summary"),
    ("registration", "Registration of the two inspections"),
    ("maps", "Floor maps"),
    ("zones", "Zone tables"),
    ("extremes", "Extreme values per zone"),
    ("methods", "Interval by method"),
    ("indications", "Indications"),
    ("assumptions", "Rules and assumptions"),
)

#: Columns of the per-zone recommendation in the summary.
SUMMARY_COLUMNS = ("zone", "interval_recommended_y", "next_due", "limiting", "t_min_mm",
                   "mrt_mm", "coverage_pct", "flags")

#: Columns of the method comparison table.
METHOD_COLUMNS = ("zone", "interval_code_y", "life_local_y", "life_eva_y", "interval_cap_y",
                  "interval_recommended_y", "limiting", "flags")

#: Number of indications listed.
N_INDICATIONS = 25

#: Text marking a rule value tagged 'memory'.
MEMORY_MARK = "from memory — check against the edition in force"


@dataclass
class ReportData:
    """Everything the report shows, in internal units (mm, mm/y, y, m²).

    Parameters
    ----------
    tank : tank identifier (str) or a mapping of tank facts (name, diameter_mm, …).
    inspections : one dict per inspection, oldest first, with ``label``, ``date``,
        ``method``, ``file``, ``pitch_mm`` [mm] and ``coverage_pct`` [%] (other keys
        are shown too).
    caution : the caution text (default :data:`scananalyse.CAUTION`).
    zones : the zones.csv table as found (no repairs).
    zones_repaired : the same after the proposed repairs, or None.
    patches : patches.csv table, or None.
    indications : indications.csv table, or None.
    registration : registration.json content (dx_mm, dy_mm, rotation_deg, score,
        overlap_pct, residual_rms_mm, …), or None for a single inspection.
    rules_table : rows ``{name, value, unit, tag, source[, note]}`` (``RuleSet.table()``).
    assumptions : sentences: attribution default, noise rule, censoring, decimation, …
    figures : section id → list of ``(caption, png_bytes)``; the key
        ``"extremes:<zone>"`` places figures under that zone of the extremes section.
    extremes : zone → mapping of summary numbers (keys with SI suffixes are
        converted for display, e.g. ``depth_eva_mm``).
    flags_explained : flag → one sentence in words.
    units : display units, ``"mm"`` or ``"in"``.
    timings : stage → seconds.
    version : scananalyse version.
    generated : when the report was made.
    single_inspection : True for ``assess`` (one scan: long-term rates only).
    notes : further sentences shown in the summary.
    title : page title (default "Tank floor assessment").
    """

    tank: str | dict = ""
    inspections: list = field(default_factory=list)
    caution: str = CAUTION
    zones: pd.DataFrame | None = None
    zones_repaired: pd.DataFrame | None = None
    patches: pd.DataFrame | None = None
    indications: pd.DataFrame | None = None
    registration: dict | None = None
    rules_table: list = field(default_factory=list)
    assumptions: list = field(default_factory=list)
    figures: dict = field(default_factory=dict)
    extremes: dict = field(default_factory=dict)
    flags_explained: dict = field(default_factory=dict)
    units: str = "mm"
    timings: dict = field(default_factory=dict)
    version: str = __version__
    generated: _dt.datetime | None = None
    single_inspection: bool = False
    notes: list = field(default_factory=list)
    title: str = "Tank floor assessment"


# ---------------------------------------------------------------------------
# escaping and formatting
# ---------------------------------------------------------------------------
_HTTP = re.compile(r"(h)(ttp)", re.IGNORECASE)


def esc(value) -> str:
    """HTML-escape any value as text (quotes too) and defuse ``http``.

    The ``t`` after an ``h`` of "http" is written as ``&#116;``: a browser shows
    the same letters, but the page source carries no web address.
    """
    s = _html.escape(str(value), quote=True)
    return _HTTP.sub(lambda m: m.group(1) + "&#" + str(ord(m.group(2)[0])) + ";" +
                     m.group(2)[1:], s)


def _cell(value, name: str, units: str) -> tuple[str, bool]:
    """(escaped text, numeric?) of one table cell of SI column ``name``."""
    if isinstance(value, (list, tuple)) and not isinstance(value, str):
        return esc(", ".join(U.fmt_number(v) for v in value)), False
    if isinstance(value, (_dt.date, _dt.datetime, pd.Timestamp)):
        return esc(value.isoformat()[:10] if not isinstance(value, _dt.datetime)
                   else value.isoformat(sep=" ", timespec="minutes")), False
    if isinstance(value, (np.generic,)):
        value = value.item()
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        base, unit, q, nd = U.display_column(name, units)
        if isinstance(value, int) and q in ("plain", "pct"):
            return esc(U.fmt_number(value)), True
        return esc(U.fmt_number(U.convert(float(value), q, units), nd)), True
    if isinstance(value, str) and name == "flags":
        return esc(value.replace(";", "; ")), False
    return esc(U.fmt_number(value)), False


def _header(name: str, units: str) -> str:
    base, unit, q, nd = U.display_column(name, units)
    u = f'<span class="unit">{esc(unit)}</span>' if unit else ""
    # allow long SI column names to wrap after their underscores
    name = esc(base).replace("_", "_<wbr>")
    return f'<th scope="col"><span class="col">{name}</span>{u}</th>'


def _table(df: pd.DataFrame | None, units: str, *, columns=None, cls="data",
           empty="none") -> str:
    if df is None or len(df) == 0:
        return f'<p class="empty">{esc(empty)}</p>'
    cols = [c for c in (columns or df.columns) if c in df.columns]
    out = [f'<div class="tablewrap"><table class="{cls}"><thead><tr>']
    out += [_header(c, units) for c in cols]
    out.append("</tr></thead><tbody>")
    for row in df[cols].itertuples(index=False, name=None):
        out.append("<tr>")
        for c, value in zip(cols, row):
            text, num = _cell(value, str(c), units)
            klass = ' class="num"' if num else ""
            if c == "flags" and text not in ("", "–"):
                klass = ' class="flags"'
            elif str(c) in ("next_due", "date", "inspected", "installed"):
                klass = ' class="date"'
            out.append(f"<td{klass}>{text}</td>")
        out.append("</tr>")
    out.append("</tbody></table></div>")
    return "".join(out)


def _kv_table(d: dict, units: str, *, cls="kv") -> str:
    if not d:
        return '<p class="empty">none</p>'
    out = [f'<table class="{cls}"><tbody>']
    for k, v in d.items():
        base, unit, q, nd = U.display_column(str(k), units)
        if isinstance(v, dict):
            text = esc("; ".join(f"{a}: {U.fmt_number(b)}" for a, b in v.items()))
            num = False
        else:
            text, num = _cell(v, str(k), units)
        u = f' <span class="unit">{esc(unit)}</span>' if unit and num else ""
        out.append(f'<tr><th scope="row">{esc(base)}{u}</th>'
                   f'<td{" class=num" if num else ""}>{text}</td></tr>')
    out.append("</tbody></table>")
    return "".join(out)


def _png_uri(png: bytes) -> str:
    if not isinstance(png, (bytes, bytearray)) or not bytes(png[:8]) == b"\x89PNG\r\n\x1a\n":
        raise ValueError("report figures must be PNG bytes")
    return "data:image/png;base64," + base64.b64encode(bytes(png)).decode("ascii")


def _figures(items) -> str:
    out = []
    for item in items or ():
        caption, png = item[0], item[1]
        out.append(f'<figure><img alt="{esc(caption)}" src="{_png_uri(png)}">'
                   f"<figcaption>{esc(caption)}</figcaption></figure>")
    return "".join(out)


def _tank_name(tank) -> str:
    if isinstance(tank, dict):
        return str(tank.get("name") or tank.get("tank") or "")
    return str(tank or "")


# ---------------------------------------------------------------------------
# sections
# ---------------------------------------------------------------------------
def _section(sid: str, heading: str, body: str) -> str:
    return (f'<section id="{sid}" class="major"><h2>{esc(heading)}</h2>\n{body}\n</section>\n')


def _summary(d: ReportData) -> str:
    u = d.units
    parts = [f'<p class="caution" role="note"><strong>Caution.</strong> {esc(d.caution)}</p>']
    tank = d.tank if isinstance(d.tank, dict) else {"tank": d.tank}
    parts.append('<div class="facts">')
    parts.append("<h3>Tank</h3>" + _kv_table(tank, u))
    parts.append("</div>")
    parts.append("<h3>Inspections</h3>")
    if d.inspections:
        parts.append(_table(pd.DataFrame(d.inspections), u, cls="data inspections"))
    else:
        parts.append('<p class="empty">no inspection details given</p>')
    if d.single_inspection:
        parts.append('<p class="note">Single inspection: rates are long-term (loss over the '
                     "years since the plates went into service); there is no registration and "
                     "no short-term rate.</p>")
    parts.append("<h3>Recommended interval per zone, as found</h3>")
    parts.append(_table(d.zones, u, columns=SUMMARY_COLUMNS, empty="no zones assessed"))
    if d.zones_repaired is not None:
        parts.append("<h3>After the proposed repairs</h3>")
        parts.append(_table(d.zones_repaired, u, columns=SUMMARY_COLUMNS, empty="no zones"))
        n_p = 0 if d.patches is None else len(d.patches)
        if d.patches is not None:
            area = float(d.patches["area_m2"].sum()) if "area_m2" in d.patches and n_p else 0.0
            a = U.convert(area, "area", u)
            parts.append(f'<p>{n_p} patch plate(s) proposed, total '
                         f'{esc(U.fmt_number(a, U.decimals("area", u)))} '
                         f'{esc(U.unit_label("area", u))}.</p>')
    if d.notes:
        parts.append("<h3>Notes</h3><ul>" + "".join(f"<li>{esc(n)}</li>" for n in d.notes)
                     + "</ul>")
    parts.append(_figures(d.figures.get("summary")))
    return "\n".join(parts)


_REG_ORDER = ("method", "dx_mm", "dy_mm", "rotation_deg", "score", "overlap_pct",
              "residual_rms_mm", "reliable", "n_control_points", "warnings")


def _registration(d: ReportData) -> str:
    if d.registration is None:
        return ('<p class="note">Not applicable: this assessment uses a single inspection, '
                "so there is nothing to register.</p>" + _figures(d.figures.get("registration")))
    reg = dict(d.registration)
    ordered = {k: reg[k] for k in _REG_ORDER if k in reg}
    for k, v in reg.items():
        if k not in ordered and k != "control_residuals_mm":
            ordered[k] = v
    if isinstance(ordered.get("warnings"), (list, tuple)):
        ordered["warnings"] = "; ".join(str(w) for w in ordered["warnings"]) or "none"
    parts = ['<p>The older scan is mapped onto the newer one by '
             "[x′, y′] = R(θ)·[x, y] + [dx, dy], θ counter-clockwise, about the origin.</p>",
             _kv_table(ordered, d.units)]
    cr = reg.get("control_residuals_mm")
    if cr is not None and len(cr):
        res = pd.DataFrame({"point": np.arange(1, len(cr) + 1),
                            "residual_mm": np.asarray(cr, dtype=float)})
        parts.append("<h3>Control-point residuals</h3>" + _table(res, d.units))
    parts.append(_figures(d.figures.get("registration")))
    return "\n".join(parts)


def _maps(d: ReportData) -> str:
    figs = d.figures.get("maps")
    if not figs:
        return '<p class="empty">no maps</p>'
    return '<div class="maps">' + _figures(figs) + "</div>"


def _table_by_zone(found: pd.DataFrame | None, repaired: pd.DataFrame | None, units: str) -> str:
    """Every zones.csv column as a row, one column per zone (as found, and after repair)."""
    if found is None or len(found) == 0:
        return '<p class="empty">no zones assessed</p>'
    zones = [str(z) for z in found["zone"]]
    heads = []
    for z in zones:
        heads.append(f'<th scope="col">{esc(z)}<span class="unit">as found</span></th>')
        if repaired is not None:
            heads.append(f'<th scope="col">{esc(z)}<span class="unit">after repair</span></th>')
    rep = None if repaired is None else repaired.set_index("zone")
    fnd = found.set_index("zone")
    out = ['<div class="tablewrap"><table class="data byzone"><thead><tr><th scope="col">quantity</th>']
    out += heads
    out.append("</tr></thead><tbody>")
    for c in [c for c in found.columns if c != "zone"]:
        base, unit, q, nd = U.display_column(str(c), units)
        u = f' <span class="unit">{esc(unit)}</span>' if unit else ""
        out.append(f'<tr><th scope="row">{esc(base)}{u}</th>')
        for z in zones:
            for frame in ([fnd] if rep is None else [fnd, rep]):
                v = frame.loc[z, c] if (z in frame.index and c in frame.columns) else None
                text, num = _cell(v, str(c), units)
                klass = ' class="num"' if num else (' class="flags"' if c == "flags" and text not in ("", "–") else "")
                out.append(f"<td{klass}>{text}</td>")
        out.append("</tr>")
    out.append("</tbody></table></div>")
    return "".join(out)


def _zones(d: ReportData) -> str:
    parts = ["<p>Every column of <code>zones.csv</code> (and <code>zones_repaired.csv</code>), one row "
             "per quantity; the files keep SI units, the page "
             f"shows {esc('mm and mm/y' if d.units == 'mm' else 'in, mils and mpy')}.</p>",
             _table_by_zone(d.zones, d.zones_repaired, d.units)]
    if d.patches is not None:
        parts += ["<h3>Proposed patch plates</h3>",
                  _table(d.patches, d.units, cls="data wide", empty="no patch plates needed")]
    parts.append(_figures(d.figures.get("zones")))
    return "\n".join(parts)


def _extremes(d: ReportData) -> str:
    parts = ["<p>Deepest loss per block, fitted with a Gumbel (or GEV) distribution; the "
             "return level for T = zone area ÷ block area is the deepest loss to expect over "
             "the whole zone, unscanned and below-threshold parts included.</p>"]
    zones = list(d.extremes)
    for key in d.figures:
        if key.startswith("extremes:") and key[9:] not in zones:
            zones.append(key[9:])
    if not zones and not d.figures.get("extremes"):
        return parts[0] + '<p class="empty">no extreme-value results</p>'
    for z in zones:
        parts.append(f'<div class="zoneblock"><h3>Zone {esc(z)}</h3>')
        if z in d.extremes:
            parts.append(_kv_table(dict(d.extremes[z]), d.units))
        parts.append('<div class="pair">' + _figures(d.figures.get(f"extremes:{z}")) + "</div>")
        parts.append("</div>")
    parts.append(_figures(d.figures.get("extremes")))
    return "\n".join(parts)


def _methods(d: ReportData) -> str:
    parts = ["<p>The code-formula interval is computed exactly as the standard reads (on "
             "the worst top-side and worst underside rate anywhere in the zone, age-based); "
             "the co-located projection uses each cell's own measured rates; the "
             "extreme-value life uses the deepest loss expected over the whole zone. The "
             "recommendation is the least of these and the cap.</p>"]
    parts.append(_figures(d.figures.get("methods")))
    if d.zones is not None and len(d.zones):
        cols = list(METHOD_COLUMNS)
        if "life_eva_y" not in d.zones.columns:
            cols = [c if c != "life_eva_y" else next(
                (k for k in d.zones.columns if "eva" in k and k.endswith("_y")), c) for c in cols]
        if "interval_cap_y" not in d.zones.columns and "cap_y" in d.zones.columns:
            cols = [("cap_y" if c == "interval_cap_y" else c) for c in cols]
        parts.append(_table(d.zones, d.units, columns=cols))
    flags = []
    for df in (d.zones, d.zones_repaired, d.patches):
        if df is not None and "flags" in df.columns:
            for v in df["flags"]:
                if isinstance(v, str):
                    for f in v.split(";"):
                        f = f.strip()
                        if f and f not in flags:
                            flags.append(f)
    parts.append("<h3>Flags in words</h3>")
    if flags:
        items = []
        for f in flags:
            text = d.flags_explained.get(f, "no explanation recorded for this flag")
            items.append(f"<dt>{esc(f)}</dt><dd>{esc(text)}</dd>")
        parts.append('<dl class="flags">' + "".join(items) + "</dl>")
    else:
        parts.append("<p>No zone carries a flag.</p>")
    return "\n".join(parts)


def _depth_column(df: pd.DataFrame):
    for c in ("depth_max_mm", "depth_mm", "loss_max_mm", "depth"):
        if c in df.columns:
            return c
    return None


def _indications(d: ReportData) -> str:
    df = d.indications
    if df is None or len(df) == 0:
        return '<p class="empty">No indications above the reporting depth.</p>' + \
            _figures(d.figures.get("indications"))
    dc = _depth_column(df)
    top = df.sort_values(dc, ascending=False, kind="mergesort").head(N_INDICATIONS) \
        if dc else df.head(N_INDICATIONS)
    note = (f"The {min(N_INDICATIONS, len(df))} deepest of {len(df)} indications"
            + (f", by {dc}" if dc else "") + "; the full list is in indications.csv.")
    return (f"<p>{esc(note)}</p>" + _table(top, d.units, cls="data wide")
            + _figures(d.figures.get("indications")))


def _assumptions(d: ReportData) -> str:
    parts = []
    if d.rules_table:
        out = ['<div class="tablewrap"><table class="data rules"><thead><tr>'
               '<th scope="col">rule value</th><th scope="col">value</th>'
               '<th scope="col">unit</th><th scope="col">tag</th>'
               '<th scope="col">source</th></tr></thead><tbody>']
        for row in d.rules_table:
            tag = str(row.get("tag", ""))
            mem = tag == "memory"
            tag_html = esc(tag) + (f'<br><span class="memory">{esc(MEMORY_MARK)}</span>'
                                   if mem else "")
            src = esc(row.get("source", ""))
            if row.get("note"):
                src += f'<br><span class="muted">{esc(row["note"])}</span>'
            val = row.get("value")
            nd = 3 if isinstance(val, float) and not float(val).is_integer() else 0
            out.append(f'<tr{" class=mem" if mem else ""}><td><code>{esc(row.get("name", ""))}'
                       f'</code></td><td class="num">{esc(U.fmt_number(val, nd))}</td>'
                       f'<td>{esc(row.get("unit", ""))}</td><td>{tag_html}</td>'
                       f"<td>{src}</td></tr>")
        out.append("</tbody></table></div>")
        parts.append("<p>Rule values used, with how sure we are of each (tag) and where it "
                     "comes from. Rule values are in SI whatever the display units.</p>")
        parts.append("".join(out))
    else:
        parts.append('<p class="empty">no rule table given</p>')
    parts.append("<h3>Assumptions</h3>")
    if d.assumptions:
        parts.append("<ul>" + "".join(f"<li>{esc(a)}</li>" for a in d.assumptions) + "</ul>")
    else:
        parts.append('<p class="empty">none recorded</p>')
    if d.timings:
        parts.append("<h3>Run</h3>")
        t = {f"{k}_s": v for k, v in d.timings.items()}
        parts.append(_kv_table(t, d.units))
    return "\n".join(parts)


# ---------------------------------------------------------------------------
# page
# ---------------------------------------------------------------------------
_CSS = """
:root { --ink:#1d232a; --muted:#5d6670; --rule:#c9ced4; --band:#f3f5f7; --warn:#8a1c1c;
        --accent:#2b5d7d; }
* { box-sizing: border-box; }
html { font-size: 15px; }
body { margin: 0; color: var(--ink); background: #fff;
       font-family: "DejaVu Sans", "Liberation Sans", Arial, sans-serif; line-height: 1.45; }
header.top { padding: 1.2rem 2rem 0.8rem; border-bottom: 3px solid var(--accent); }
header.top h1 { margin: 0 0 0.2rem; font-size: 1.55rem; font-weight: 600; }
header.top .sub { color: var(--muted); font-size: 0.9rem; }
nav.toc { padding: 0.5rem 2rem; font-size: 0.85rem; background: var(--band);
          border-bottom: 1px solid var(--rule); }
nav.toc a { color: var(--accent); text-decoration: none; margin-right: 1.1rem; }
main { padding: 0 2rem 1rem; max-width: 1180px; }
h2 { font-size: 1.25rem; margin: 1.6rem 0 0.6rem; padding-bottom: 0.2rem;
     border-bottom: 1px solid var(--rule); color: var(--accent); }
h3 { font-size: 1.02rem; margin: 1.1rem 0 0.4rem; }
p { margin: 0.4rem 0 0.6rem; }
code { font-family: "DejaVu Sans Mono", monospace; font-size: 0.86em; }
.caution { border-left: 5px solid var(--warn); background: #fbf1f1; padding: 0.6rem 0.9rem;
           margin: 0.9rem 0; }
.note { border-left: 4px solid var(--accent); background: var(--band); padding: 0.45rem 0.8rem; }
.empty, .muted { color: var(--muted); }
.tablewrap { overflow-x: auto; margin: 0.3rem 0 0.8rem; }
table { border-collapse: collapse; font-size: 0.84rem; }
table.data th, table.data td { border-bottom: 1px solid var(--rule); padding: 0.25rem 0.55rem;
                               text-align: left; vertical-align: top; }
table.data thead th { background: var(--band); border-bottom: 2px solid #9aa3ad;
                      font-weight: 600; vertical-align: bottom; }
table.data tbody tr:nth-child(even) td { background: #fafbfc; }
table.wide { font-size: 0.76rem; }
table.byzone th[scope="row"] { text-align: left; font-weight: 500; white-space: nowrap; }
table.byzone td { max-width: 22rem; overflow-wrap: anywhere; }
table.wide td { overflow-wrap: anywhere; }
table.wide td.num { overflow-wrap: normal; }
table.data th, table.data td { padding: 0.25rem 0.45rem; }
th .col { display: block; }
th .unit, .kv .unit { display: block; font-weight: 400; color: var(--muted); font-size: 0.9em; }
.kv .unit { display: inline; }
td.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
td.flags { color: var(--warn); }
td.date { white-space: nowrap; overflow-wrap: normal !important; }
table.kv th { text-align: left; font-weight: 500; padding: 0.15rem 1.2rem 0.15rem 0;
              color: var(--muted); }
table.kv td { padding: 0.15rem 0; }
table.kv td.num { text-align: left; }
.memory { display: inline-block; margin-top: 0.15rem; padding: 0 0.35rem; font-size: 0.78rem;
          background: #fff3cd; border: 1px solid #d9a400; color: #5c4400; border-radius: 3px; }
tr.mem td { background: #fffbea !important; }
figure { margin: 0.6rem 0 1rem; break-inside: avoid; page-break-inside: avoid; }
figure img { max-width: 100%; height: auto; border: 1px solid var(--rule); display: block; }
figcaption { font-size: 0.82rem; color: var(--muted); margin-top: 0.25rem; max-width: 60rem; }
.maps { display: grid; grid-template-columns: repeat(auto-fill, minmax(520px, 1fr));
        gap: 0 1.2rem; }
.pair { display: grid; grid-template-columns: repeat(auto-fill, minmax(420px, 1fr));
        gap: 0 1rem; }
.zoneblock { break-inside: avoid; }
dl.flags dt { font-weight: 600; color: var(--warn); margin-top: 0.4rem; }
dl.flags dd { margin: 0.1rem 0 0.3rem 1.2rem; }
footer.caution-footer { margin: 1.5rem 0 0; padding: 0.6rem 2rem; font-size: 0.78rem;
                        color: var(--muted); border-top: 1px solid var(--rule); }
footer.caution-footer strong { color: var(--warn); }
table.pagewrap { border-collapse: collapse; width: 100%; font-size: inherit; }
table.pagewrap > tbody > tr > td, table.pagewrap > tfoot > tr > td { padding: 0; }
.footer-space { height: 0; }
@page { size: A4; margin: 14mm 12mm 10mm 12mm; }
@media print {
  html { font-size: 10.5pt; }
  nav.toc { display: none; }
  main { padding: 0; max-width: none; }
  header.top { padding: 0 0 0.4rem; }
  section.major + section.major { break-before: page; page-break-before: always; }
  table.data tr, table.kv tr { break-inside: avoid; page-break-inside: avoid; }
  table.data thead { display: table-header-group; }
  .tablewrap { overflow: visible; }
  table.wide { font-size: 6.8pt; }
  table.data th, table.data td { padding: 0.15rem 0.3rem; }
  figure img { max-height: 118mm; width: auto; max-width: 100%; border: none; }
  .maps, .pair { display: block; }
  /* the footer repeats on every printed page; the empty table footer of the page
     wrapper repeats too and keeps the same height free, so no text runs under it */
  footer.caution-footer { position: fixed; bottom: 0; left: 0; right: 0; height: 13mm;
                          margin: 0; padding: 1.5mm 0 0; background: #fff; font-size: 7.5pt;
                          line-height: 1.3; overflow: hidden; }
  .footer-space { height: 16mm; }
  a { color: inherit; text-decoration: none; }
}
"""


def render_report(data: ReportData) -> str:
    """The whole report as one self-contained HTML string.

    Parameters
    ----------
    data : :class:`ReportData`.

    Returns
    -------
    str : HTML5 with inline CSS, figures as ``data:image/png;base64`` URIs, no
        scripts, no external references.
    """
    U._check(data.units)
    generated = data.generated or _dt.datetime.now().replace(microsecond=0)
    tank = _tank_name(data.tank)
    title = f"{data.title} — {tank}" if tank else data.title
    dates = ", ".join(str(i.get("date", "")) for i in data.inspections if i.get("date"))
    sub = " · ".join(s for s in (
        f"inspections {dates}" if dates else "",
        f"display units {'mm, mm/y' if data.units == 'mm' else 'in, mils, mpy'}",
        f"scananalyse {data.version}",
        f"generated {generated.isoformat(sep=' ', timespec='minutes')}",
    ) if s)
    builders = {"summary": _summary, "registration": _registration, "maps": _maps,
                "zones": _zones, "extremes": _extremes, "methods": _methods,
                "indications": _indications, "assumptions": _assumptions}
    body = [_section(sid, head, builders[sid](data)) for sid, head in SECTIONS]
    toc = "".join(f'<a href="#{sid}">{esc(head)}</a>' for sid, head in SECTIONS)
    footer = (f'<footer class="caution-footer"><strong>Caution:</strong> {esc(data.caution)} '
              f"<span class=\"muted\">— {esc(tank or 'tank')}, scananalyse "
              f"{esc(data.version)}</span></footer>")
    return ("<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n"
            "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\n"
            f"<title>{esc(title)}</title>\n<style>{_CSS}</style>\n</head>\n<body>\n"
            '<table class="pagewrap" role="presentation"><tbody><tr><td>\n'
            f'<header class="top"><h1>{esc(title)}</h1><div class="sub">{esc(sub)}</div>'
            f"</header>\n<nav class=\"toc\">{toc}</nav>\n<main>\n{''.join(body)}</main>\n"
            '</td></tr></tbody><tfoot><tr><td><div class="footer-space"></div></td></tr>'
            f"</tfoot></table>\n{footer}\n</body>\n</html>\n")


def write_report(data: ReportData, path) -> str:
    """Render and write the report to ``path`` atomically (temporary file, rename).

    Returns
    -------
    str : the path written.
    """
    text = render_report(data)
    path = os.fspath(path)
    d = os.path.dirname(os.path.abspath(path))
    fd, tmp = tempfile.mkstemp(prefix=".report-", suffix=".html", dir=d)
    try:
        with os.fdopen(fd, "w", encoding="utf-8", newline="\n") as fh:
            fh.write(text)
        publish_file(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise
    return path
