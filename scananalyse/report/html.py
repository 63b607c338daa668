"""The report: one self-contained HTML page built from plain data.

:class:`ReportData` holds everything the page shows (tables as DataFrames, figures
as PNG bytes, numbers in internal units); :func:`render_report` turns it into a
single string of HTML with inline CSS, figures embedded as ``data:`` URIs, no
scripts and no reference to anything outside the page, so the file can be
attached to an inspection record, mailed and printed as it is.
:func:`write_report` writes it atomically.

The page structure lives in the Jinja2 template ``templates/report.html.j2`` (with
its style sheet ``templates/report.css`` and the macros of ``templates/macros.html.j2``,
both shared with the fleet overview, :mod:`.fleet_page`); this module only shapes the data: it
picks the columns, gives them plain labels (:mod:`.labels`), formats numbers with
their display units and words the verdict per zone (:func:`zone_verdicts`).

Every value the template prints is HTML-escaped (``autoescape=True``; quotes too),
and the letters ``http`` are written with a character reference, so the page never
carries anything a browser or mail filter could take for a web address.

Sections, in order, with these ids: ``verdict``, ``summary``, ``registration``,
``maps``, ``zones``, ``extremes``, ``methods``, ``indications``, ``assumptions``.
The caution (:data:`scananalyse.CAUTION`) follows the verdicts and is repeated in a
footer on every printed page.
"""

from __future__ import annotations

import base64
import datetime as _dt
import html as _html
import math
import os
import re
import tempfile
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from jinja2 import Environment, PackageLoader, StrictUndefined
from markupsafe import Markup

from .. import CAUTION, __version__
from ..outputs import publish_file
from . import units as U
from ..checks import no_patches_text
from .labels import FLAGS_EXPLAINED, LIMITING_SHORT, LIMITING_WORDS, label, label_with_unit

__all__ = ["ReportData", "SECTIONS", "esc", "render_report", "write_report", "zone_verdicts",
           "VERDICTS"]

#: Section ids and headings, in page order.
SECTIONS = (
    ("verdict", "Verdict per zone"),
    ("summary", "Summary"),
    ("registration", "Registration of the two inspections"),
    ("maps", "Floor maps"),
    ("zones", "Zone tables"),
    ("extremes", "Extreme values per zone"),
    ("methods", "Interval by method"),
    ("indications", "Indications"),
    ("assumptions", "Rules and assumptions"),
)

#: The section of spot readings, after the indications, on pages whose job had readings only.
READINGS_SECTION = ("readings", "Field readings")

#: The three verdicts, in order of urgency (last most urgent for the work order).
VERDICTS = ("return to service as is", "repair first", "prove up first (hand UT)")

#: Columns of the short per-zone table in the zones section.
ZONE_SHORT_COLUMNS = ("zone", "area_m2", "coverage_pct", "t_min_mm", "depth_max_mm", "mrt_mm",
                      "interval_recommended_y", "next_due", "limiting", "flags")

#: Columns of the method comparison table.
METHOD_COLUMNS = ("zone", "interval_code_y", "life_local_y", "life_eva_y", "interval_cap_y",
                  "interval_recommended_y", "limiting", "life_p05_y", "life_p50_y", "life_p95_y",
                  "p_mrt_at_due", "p_leak_at_due", "flags")

#: Columns of the indication list (the full list is indications.csv).
INDICATION_COLUMNS = ("id", "zone", "plate", "side", "x_mm", "y_mm", "depth_max_mm", "t_min_mm",
                      "area_m2", "rate_max_mm_y", "status", "growth_mm")

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
    flags_explained : flag → one sentence in words (added to, and taking precedence
        over, :data:`scananalyse.report.labels.FLAGS_EXPLAINED`).
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
    #: spot readings (section "Field readings", shown only when given): ``sizing``
    #: (the sizing check as a mapping), ``sizing_text`` (what was done with it),
    #: ``zones`` (readings_zones.csv table), ``prove_up`` (prove_up.csv table).
    readings: dict | None = None


# ---------------------------------------------------------------------------
# escaping
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


def _finalize(value):
    """Every ``{{ … }}`` of the template: None prints nothing, Markup (data URIs) as is,
    anything else through :func:`esc` (escaped, ``http`` defused)."""
    if value is None:
        return ""
    if isinstance(value, Markup):
        return value
    return Markup(esc(value))


def _make_env() -> Environment:
    return Environment(loader=PackageLoader("scananalyse.report", "templates"),
                       autoescape=True, finalize=_finalize, undefined=StrictUndefined,
                       trim_blocks=True, lstrip_blocks=True, keep_trailing_newline=True)


# The environment and the compiled page template are made once, when this module is
# imported (before a run allocates its grids), not at the first report: objects that
# live for the whole process, made late in a run, would sit at the top of a grown heap
# and keep glibc from returning the freed grids (pipeline._reuse_freed_memory).
_ENV = _make_env()
_TEMPLATE = _ENV.get_template("report.html.j2")


def _env() -> Environment:
    """The page's Jinja2 environment (autoescape on; see :func:`_finalize`)."""
    return _ENV


# ---------------------------------------------------------------------------
# formatting (plain text; the template escapes)
# ---------------------------------------------------------------------------
def _is_num(v) -> bool:
    if isinstance(v, np.generic):
        v = v.item()
    return isinstance(v, (int, float)) and not isinstance(v, bool)


def _fmt(value, name: str, units: str) -> tuple[str, bool]:
    """(text, numeric?) of one value of SI column ``name`` in display units."""
    if isinstance(value, (list, tuple)) and not isinstance(value, str):
        return ", ".join(U.fmt_number(v) for v in value), False
    if isinstance(value, (_dt.date, _dt.datetime, pd.Timestamp)):
        if isinstance(value, _dt.datetime):
            return value.isoformat(sep=" ", timespec="minutes"), False
        return value.isoformat()[:10], False
    if isinstance(value, np.generic):
        value = value.item()
    if _is_num(value):
        base, unit, q, nd = U.display_column(name, units)
        if isinstance(value, int) and q in ("plain", "pct"):
            return U.fmt_number(value), True
        return U.fmt_number(U.convert(float(value), q, units), nd), True
    if isinstance(value, str) and name == "flags":
        return value.replace(";", "; "), False
    if isinstance(value, str) and name == "limiting":
        return LIMITING_SHORT.get(value, value), False
    return U.fmt_number(value), False


def _qty(value_si: float, quantity: str, units: str) -> str:
    """A number in display units with its unit, for sentences ("2.54 mm", "0.100 in")."""
    v = U.convert(float(value_si), quantity, units)
    unit = U.unit_label(quantity, units)
    return f"{U.fmt_number(v, U.decimals(quantity, units))} {unit}".strip()


_CLS_DATE = ("next_due", "date", "inspected", "installed")


def _cell(value, name: str, units: str) -> dict:
    text, num = _fmt(value, name, units)
    if num:
        cls = "num"
    elif name == "flags" and text not in ("", "–"):
        cls = "flags"
    elif name in _CLS_DATE:
        cls = "date"
    else:
        cls = ""
    return {"text": text, "cls": cls}


def _head(name: str, units: str) -> dict:
    lab, unit = label_with_unit(name, units)
    return {"label": lab, "unit": unit, "name": str(name), "cls": ""}


def _table(df: pd.DataFrame | None, units: str, *, columns=None, cls="data",
           empty="none") -> dict:
    """A table model for the template: heads (label, unit) and rows of cells."""
    if df is None or len(df) == 0:
        return {"empty": empty}
    cols = [c for c in (columns or df.columns) if c in df.columns]
    rows = [[_cell(v, str(c), units) for c, v in zip(cols, row)]
            for row in df[cols].itertuples(index=False, name=None)]
    heads = [_head(str(c), units) for c in cols]
    for j, h in enumerate(heads):  # a column of numbers is right-aligned, its head too
        h["cls"] = "num" if any(r[j]["cls"] == "num" for r in rows) else ""
    return {"cls": cls, "heads": heads, "rows": rows}


def _kv(d: dict, units: str) -> dict:
    """A two-column (label, value) table model."""
    rows = []
    for k, v in (d or {}).items():
        lab, unit = label_with_unit(str(k), units)
        if isinstance(v, dict):
            text, num = "; ".join(f"{a}: {U.fmt_number(b)}" for a, b in v.items()), False
        else:
            text, num = _fmt(v, str(k), units)
        rows.append({"label": lab, "unit": unit if num else "", "text": text,
                     "cls": "num" if num else ""})
    return {"rows": rows}


def _png_uri(png: bytes) -> Markup:
    if not isinstance(png, (bytes, bytearray)) or not bytes(png[:8]) == b"\x89PNG\r\n\x1a\n":
        raise ValueError("report figures must be PNG bytes")
    # base64 text only: safe in an attribute as it is
    return Markup("data:image/png;base64," + base64.b64encode(bytes(png)).decode("ascii"))


def _figures(items) -> list:
    return [{"caption": item[0], "src": _png_uri(item[1])} for item in (items or ())]


def _tank_name(tank) -> str:
    if isinstance(tank, dict):
        return str(tank.get("name") or tank.get("tank") or "")
    return str(tank or "")


def _flag_set(v) -> list:
    if not isinstance(v, str):
        return []
    return [f.strip() for f in v.split(";") if f.strip()]


def _f(row, name) -> float:
    """A float from a table row (NaN when missing or not a number)."""
    try:
        v = row.get(name) if hasattr(row, "get") else None
        return float(v) if v is not None and v != "" else math.nan
    except (TypeError, ValueError):
        return math.nan


def _years(v: float) -> str:
    return f"{U.fmt_number(v, 1)} y"


# ---------------------------------------------------------------------------
# verdicts
# ---------------------------------------------------------------------------
def zone_verdicts(zones: pd.DataFrame | None, zones_repaired: pd.DataFrame | None = None,
                  patches: pd.DataFrame | None = None, units: str = "mm") -> list[dict]:
    """One verdict per zone, in plain words, from the zone tables and the patch list.

    Parameters
    ----------
    zones : the zones.csv table as found (``zone``, ``interval_recommended_y``,
        ``next_due``, ``limiting``, ``flags``, ``t_min_mm``, ``mrt_mm``, ``area_m2``,
        ``coverage_pct``).
    zones_repaired : the same after the proposed repairs, or None.
    patches : patches.csv (``zone``, ``area_m2``), or None.
    units : display units of the numbers in the sentences.

    Returns
    -------
    list of dict : per zone ``zone``, ``verdict`` (one of :data:`VERDICTS`), ``kind``
        (``"ok"``, ``"repair"``, ``"proveup"``) and the sentences ``interval``,
        ``limit``, ``hand_ut``, ``patches``.

    Notes
    -----
    - ``no-data`` (or no interval at all) → prove up first (hand UT).
    - ``below-mrt``, or a recommended interval of 0 y → repair first; the interval
      given is the one after the proposed repairs.
    - ``eva-below-mrt`` (no measured metal below MRT) → prove up first, also when that
      makes the interval 0: the extreme-value estimate says metal nobody measured may
      already be below MRT, and no repair of measured metal changes that.
    - otherwise → return to service as is, with the as-found interval.
    """
    if zones is None or len(zones) == 0:
        return []
    rep = None
    if zones_repaired is not None and len(zones_repaired) and "zone" in zones_repaired:
        rep = {str(r["zone"]): r for r in zones_repaired.to_dict("records")}
    out = []
    for z in zones.to_dict("records"):
        name = str(z.get("zone", ""))
        flags = set(_flag_set(z.get("flags")))
        rec = _f(z, "interval_recommended_y")
        area = _f(z, "area_m2")
        cov = _f(z, "coverage_pct")
        unscanned = area * (1 - cov / 100) if not (math.isnan(area) or math.isnan(cov)) else math.nan
        r = rep.get(name) if rep else None
        # patches in the zone
        n_p, a_p = 0, 0.0
        if patches is not None and len(patches) and "zone" in patches:
            mine = patches[patches["zone"].astype(str) == name]
            n_p = len(mine)
            a_p = float(mine["area_m2"].sum()) if "area_m2" in mine and n_p else 0.0
        if n_p:
            p_text = (f"{n_p} patch plate{'s' if n_p != 1 else ''} proposed here, "
                      f"{_qty(a_p, 'area', units)} in all.")
        elif patches is None:
            p_text = "No repair plan was made in this assessment."
        else:
            p_text = "No patch plate proposed here."

        below = "below-mrt" in flags
        if "no-data" in flags or math.isnan(rec):
            kind, verdict = "proveup", VERDICTS[2]
            interval = "No interval can be set: " + (
                "the zone was not scanned." if "no-data" in flags else
                "the scan does not support one.")
            limit = "Nothing is known of the metal here from the scan."
            a = _qty(area, "area", units) if not math.isnan(area) else "all of it"
            hand = (f"Scan the whole zone ({a}), by hand or with an edge scanner, and re-run the assessment; "
                    "spot readings alone leave the floor between them to the whole floor's pit statistics.")
        elif below or (rec <= 0 and "eva-below-mrt" not in flags):
            kind, verdict = "repair", VERDICTS[1]
            rr = _f(r, "interval_recommended_y") if r is not None else math.nan
            still = r is not None and "below-mrt" in _flag_set(r.get("flags"))
            if r is not None and not math.isnan(rr) and rr > 0 and not still:
                interval = (f"After the proposed repairs: inspect again within {_years(rr)}"
                            f"{_due(r)}.")
                after = f" After repair the interval is limited by {_limit_words(r)}."
            else:
                interval = ("Do not return to service before repair; no interval can be "
                            "given until the zone is repaired and re-assessed.")
                after = ""
            tmin, mrt = _f(z, "t_min_mm"), _f(z, "mrt_mm")
            if below and not (math.isnan(tmin) or math.isnan(mrt)):
                limit = (f"The thinnest reading, {_qty(tmin, 'thickness', units)}, is below the "
                         f"MRT of {_qty(mrt, 'thickness', units)}.{after}")
            else:
                limit = f"As found, the interval is 0 y, set by {_limit_words(z)}.{after}"
            hand = _hand_ut_sentence(flags, r, unscanned, units)
        elif "eva-below-mrt" in flags:
            kind, verdict = "proveup", VERDICTS[2]
            interval = (f"If the hand UT finds nothing thinner: inspect again within "
                        f"{_years(rec)}{_due(z)}." if rec > 0 else
                        "Do not return to service before the area nobody scanned is proved up: "
                        "no interval can be given until then.")
            limit = (f"Every scanned reading is above MRT, but the extreme-value estimate says "
                     f"metal nobody measured may already be below it; the interval is limited by "
                     f"{_limit_words(z)}.")
            hand = _hand_ut_sentence(flags, z, unscanned, units, force=True)
        else:
            kind, verdict = "ok", VERDICTS[0]
            interval = f"Inspect again within {_years(rec)}{_due(z)}."
            limit = f"The interval is limited by {_limit_words(z)}."
            rr = _f(r, "interval_recommended_y") if r is not None else math.nan
            if n_p and not math.isnan(rr) and rr > rec:
                p_text = p_text[:-1] + f"; they would lengthen the interval to {_years(rr)}."
            hand = _hand_ut_sentence(flags, z, unscanned, units)
        out.append({"zone": name, "verdict": verdict, "kind": kind, "interval": interval,
                    "limit": limit, "hand_ut": hand, "patches": p_text})
    return out


def _due(row) -> str:
    d = row.get("next_due") if row is not None else None
    return f", next inspection by {d}" if isinstance(d, str) and d else ""


def _limit_words(row) -> str:
    w = row.get("limiting") if row is not None else ""
    w = w if isinstance(w, str) else ""
    return LIMITING_WORDS.get(w, w)


def _hand_ut_sentence(flags, row, unscanned, units, *, force=False) -> str:
    a = _qty(unscanned, "area", units) if not math.isnan(unscanned) else "the area"
    lim = row.get("limiting") if row is not None else ""
    hidden = float(pd.to_numeric(pd.Series([row.get("hidden_area_m2")]), errors="coerce")[0]) \
        if row is not None else math.nan
    if "eva-below-mrt" in flags and math.isfinite(hidden) and not math.isnan(unscanned) and hidden < unscanned - 1e-9:
        # the older scan saw part of what the newer one missed: name both areas, as the notes do
        return (f"Hand UT the {_qty(hidden, 'area', units)} neither scan saw (of the {a} the newer scan "
                "missed): the extreme-value estimate says metal there may already be below MRT.")
    if force or "eva-below-mrt" in flags:
        return (f"Hand UT the {a} not scanned: the extreme-value estimate says metal there may "
                "already be below MRT.")
    if "low-coverage" in flags:
        return (f"Less was scanned than the rules ask: hand UT the {a} not scanned.")
    if lim == "eva":
        return (f"Optional: scanning the {a} not scanned can lengthen the interval, "
                "which the extreme-value estimate of that area limits (spot readings assess their spots only).")
    return "None beyond the usual prove-up of the indications listed."


# ---------------------------------------------------------------------------
# sections (data shaping only)
# ---------------------------------------------------------------------------
def _interval_table(d: ReportData) -> dict:
    """Zone | as found (interval, due, limited by) | after repair (…): one table."""
    z = d.zones
    if z is None or len(z) == 0:
        return {"empty": "no zones assessed"}
    cols = ("interval_recommended_y", "next_due", "limiting")
    rep = None if d.zones_repaired is None else d.zones_repaired.set_index("zone")
    heads = [_head(c, d.units) for c in cols]
    groups = [{"label": "As found", "span": len(cols)}]
    if rep is not None:
        groups.append({"label": "After the proposed repairs", "span": len(cols)})
        heads = heads + [_head(c, d.units) for c in cols]
    rows = []
    for r in z.to_dict("records"):
        row = [{"text": str(r.get("zone", "")), "cls": "", "th": True}]
        row += [_cell(r.get(c), c, d.units) for c in cols]
        if rep is not None:
            zr = rep.loc[r["zone"]] if r["zone"] in rep.index else {}
            row += [_cell(zr.get(c) if len(zr) else None, c, d.units) for c in cols]
        rows.append(row)
    return {"cls": "data intervals", "groups": groups, "heads": heads, "rows": rows,
            "first": _head("zone", d.units)}


def _summary(d: ReportData) -> dict:
    tank = d.tank if isinstance(d.tank, dict) else {"tank": d.tank}
    n_p = 0 if d.patches is None else len(d.patches)
    patches = None
    if d.zones_repaired is not None and d.patches is not None:
        area = float(d.patches["area_m2"].sum()) if "area_m2" in d.patches and n_p else 0.0
        patches = f"{n_p} patch plate(s) proposed, {_qty(area, 'area', d.units)} in all."
    return {
        "tank": _kv(tank, d.units),
        "inspections": _table(pd.DataFrame(d.inspections), d.units, cls="data inspections")
        if d.inspections else {"empty": "no inspection details given"},
        "single": d.single_inspection,
        "intervals": _interval_table(d),
        "repaired": d.zones_repaired is not None,
        "patches": patches,
        "notes": list(d.notes),
        "figures": _figures(d.figures.get("summary")),
    }


def _verdict(d: ReportData) -> dict:
    v = zone_verdicts(d.zones, d.zones_repaired, d.patches, d.units)
    total = None
    if d.patches is not None:
        n = len(d.patches)
        a = float(d.patches["area_m2"].sum()) if n and "area_m2" in d.patches else 0.0
        total = (f"Patch plates proposed for the whole floor: {n}, {_qty(a, 'area', d.units)} "
                 "in all." if n else "No patch plate proposed.")
    return {"zones": v, "patch_total": total}


_REG_ORDER = ("method", "dx_mm", "dy_mm", "rotation_deg", "score", "overlap_pct",
              "residual_rms_mm", "reliable", "n_control_points", "warnings")


def _registration(d: ReportData) -> dict:
    figs = _figures(d.figures.get("registration"))
    if d.registration is None:
        return {"applicable": False, "figures": figs}
    reg = dict(d.registration)
    ordered = {k: reg[k] for k in _REG_ORDER if k in reg}
    for k, v in reg.items():
        if k not in ordered and k != "control_residuals_mm":
            ordered[k] = v
    if isinstance(ordered.get("warnings"), (list, tuple)):
        ordered["warnings"] = "; ".join(str(w) for w in ordered["warnings"]) or "none"
    cr = reg.get("control_residuals_mm")
    res = None
    if cr is not None and len(cr):
        res = _table(pd.DataFrame({"point": np.arange(1, len(cr) + 1),
                                   "residual_mm": np.asarray(cr, dtype=float)}), d.units)
    return {"applicable": True, "kv": _kv(ordered, d.units), "residuals": res, "figures": figs}


def _table_by_zone(found: pd.DataFrame | None, repaired: pd.DataFrame | None, units: str) -> dict:
    """Every zones.csv column as a row, one column per zone (as found, and after repair)."""
    if found is None or len(found) == 0:
        return {"empty": "no zones assessed"}
    zones = [str(z) for z in found["zone"]]
    heads = []
    for z in zones:
        heads.append({"label": z, "unit": "as found"})
        if repaired is not None:
            heads.append({"label": z, "unit": "after repair"})
    rep = None if repaired is None else repaired.set_index(repaired["zone"].astype(str))
    fnd = found.set_index(found["zone"].astype(str))
    rows = []
    for c in [c for c in found.columns if c != "zone"]:
        lab, unit = label_with_unit(str(c), units)
        cells = []
        for z in zones:
            for frame in ([fnd] if rep is None else [fnd, rep]):
                v = frame.loc[z, c] if (z in frame.index and c in frame.columns) else None
                cells.append(_cell(v, str(c), units))
        rows.append({"label": lab, "unit": unit, "name": str(c), "cells": cells})
    return {"heads": heads, "rows": rows}


def _zones(d: ReportData) -> dict:
    short = None
    if d.zones is not None and len(d.zones):
        df = d.zones
        if d.zones_repaired is not None and "interval_recommended_y" in d.zones_repaired:
            rep = d.zones_repaired.set_index(d.zones_repaired["zone"].astype(str))
            df = df.copy()
            df["interval_after_repair_y"] = [
                rep.loc[str(z), "interval_recommended_y"] if str(z) in rep.index else np.nan
                for z in df["zone"]]
        cols = list(ZONE_SHORT_COLUMNS)
        if "interval_after_repair_y" in df:
            cols.insert(cols.index("flags"), "interval_after_repair_y")
        short = _table(df, d.units, columns=cols, cls="data zonesum")
    return {
        "units_text": "mm and mm/y" if d.units == "mm" else "in, mils and mpy",
        "short": short or {"empty": "no zones assessed"},
        "detail": _table_by_zone(d.zones, d.zones_repaired, d.units),
        "n_quantities": 0 if d.zones is None else max(len(d.zones.columns) - 1, 0),
        "repaired": d.zones_repaired is not None,
        "patches": None if d.patches is None else _table(
            d.patches, d.units, cls="data patches", empty=no_patches_text(d.zones, d.zones_repaired)),
        "figures": _figures(d.figures.get("zones")),
    }


def _extremes(d: ReportData) -> dict:
    zones = list(d.extremes)
    for key in d.figures:
        if key.startswith("extremes:") and key[9:] not in zones:
            zones.append(key[9:])
    blocks = [{"zone": z, "kv": _kv(dict(d.extremes[z]), d.units) if z in d.extremes else None,
               "figures": _figures(d.figures.get(f"extremes:{z}"))} for z in zones]
    return {"blocks": blocks, "figures": _figures(d.figures.get("extremes")),
            "any": bool(zones or d.figures.get("extremes"))}


def _explained(d: ReportData) -> dict:
    return {**FLAGS_EXPLAINED, **(d.flags_explained or {})}


def _methods(d: ReportData) -> dict:
    table = None
    if d.zones is not None and len(d.zones):
        cols = list(METHOD_COLUMNS)
        if "life_eva_y" not in d.zones.columns:
            cols = [c if c != "life_eva_y" else next(
                (k for k in d.zones.columns if "eva" in k and k.endswith("_y")), c) for c in cols]
        if "interval_cap_y" not in d.zones.columns and "cap_y" in d.zones.columns:
            cols = [("cap_y" if c == "interval_cap_y" else c) for c in cols]
        table = _table(d.zones, d.units, columns=cols)
    flags = []
    for df in (d.zones, d.zones_repaired, d.patches):
        if df is not None and "flags" in df.columns:
            for v in df["flags"]:
                for f in _flag_set(v):
                    if f not in flags:
                        flags.append(f)
    words = _explained(d)
    items = [{"flag": f, "text": words.get(f, "no explanation recorded for this flag")}
             for f in flags]
    limits = [{"word": LIMITING_SHORT.get(w, w), "text": t}
              for w, t in LIMITING_WORDS.items() if w not in ("", "none")]
    return {"figures": _figures(d.figures.get("methods")), "table": table, "flags": items,
            "limits": limits}


def _depth_column(df: pd.DataFrame):
    for c in ("depth_max_mm", "depth_mm", "loss_max_mm", "depth"):
        if c in df.columns:
            return c
    return None


def _indications(d: ReportData) -> dict:
    df = d.indications
    figs = _figures(d.figures.get("indications"))
    if df is None or len(df) == 0:
        return {"note": None, "table": None, "figures": figs}
    dc = _depth_column(df)
    top = df.sort_values(dc, ascending=False, kind="mergesort").head(N_INDICATIONS) \
        if dc else df.head(N_INDICATIONS)
    note = (f"The {min(N_INDICATIONS, len(df))} deepest of {len(df)} indications"
            + (f", by {label(dc).lower()}" if dc else "") + "; the full list is in indications.csv.")
    cols = [c for c in INDICATION_COLUMNS if c in df.columns] or list(df.columns)
    return {"note": note, "table": _table(top, d.units, columns=cols, cls="data indications"),
            "figures": figs}


def rule_rows(rules_table) -> list[dict]:
    """Rows of the rule-value table (macro ``rules`` of ``macros.html.j2``) from
    ``RuleSet.table()`` rows: the value printed, its tag, whether it is from memory."""
    rules = []
    for row in rules_table or ():
        val = row.get("value")
        nd = 3 if isinstance(val, float) and not float(val).is_integer() else 0
        rules.append({"name": row.get("name", ""), "value": U.fmt_number(val, nd),
                      "unit": row.get("unit", ""), "tag": str(row.get("tag", "")),
                      "memory": str(row.get("tag", "")) == "memory",
                      "source": row.get("source", ""), "note": row.get("note") or None})
    return rules


def _assumptions(d: ReportData) -> dict:
    rules = rule_rows(d.rules_table)
    timings = _kv({f"{k}_s": v for k, v in d.timings.items()}, d.units) if d.timings else None
    return {"rules": rules, "assumptions": list(d.assumptions), "timings": timings}


def _readings(d: ReportData) -> dict:
    """The "Field readings" section: sizing check, zones read by hand, the prove-up list."""
    r = d.readings or {}
    return {"sizing": _kv(r.get("sizing") or {}, d.units), "sizing_text": r.get("sizing_text", ""),
            "zones": _table(r.get("zones"), d.units, columns=READING_ZONE_COLUMNS, cls="data",
                            empty="no reading lies on the floor"),
            "prove_up": _table(r.get("prove_up"), d.units, columns=PROVE_UP_COLUMNS, cls="data",
                               empty="every indication listed is proved up"),
            "figures": _figures(d.figures.get("readings"))}


#: Columns of the readings' zone table and of the prove-up list in the report.
READING_ZONE_COLUMNS = ("zone", "n_readings", "n_ut", "n_prove_up", "n_pit_gauge", "t_min_mm", "rate_max_mm_y",
                        "mrt_mm", "interval_code_y", "life_local_y", "covered_length_mm", "flags")
PROVE_UP_COLUMNS = ("rank", "id", "x_mm", "y_mm", "depth_max_mm", "t_min_mm", "zone", "status", "reason")


_BUILDERS = {"verdict": _verdict, "summary": _summary, "registration": _registration,
             "maps": lambda d: {"figures": _figures(d.figures.get("maps"))}, "zones": _zones,
             "extremes": _extremes, "methods": _methods, "indications": _indications,
             "assumptions": _assumptions, "readings": _readings}


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
    secs = list(SECTIONS)
    if data.readings:
        secs.insert(secs.index(("indications", "Indications")) + 1, READINGS_SECTION)
    ctx = {sid: _BUILDERS[sid](data) for sid, _ in secs}
    return _TEMPLATE.render(
        title=title, sub=sub, tank=tank or "tank", caution=data.caution, version=data.version,
        sections=[{"id": sid, "heading": head} for sid, head in secs],
        memory_mark=MEMORY_MARK, **ctx)


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
