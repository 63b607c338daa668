"""The fleet overview page (``fleet.html``), in the tank report's style.

:class:`FleetPageData` holds what the page shows, in internal units: the ranked fleet
table (:func:`scananalyse.fleet.rank_fleet`, the ``fleet.csv`` columns), each tank's zone
tables as found and after the proposed repairs (:class:`TankZones`), the population table
and its figures, and the rule values.  :func:`render_fleet_page` turns it into one
self-contained HTML string with the Jinja2 template ``templates/fleet.html.j2``, which
shares its style sheet (``report.css``) and its table macros (``macros.html.j2``) with
the tank report, and the report's escaping: every value is HTML-escaped and ``http``
defused (:func:`scananalyse.report.html.esc`).

Sections, in order, with these ids: ``ranking`` (the verdict: the tanks, most urgent
first, and the caution), ``tanks`` (per tank, per zone), ``words`` (what limits an
interval and what each flag says, in words), ``population`` and ``assumptions`` (rule
values with their source, the page's units).
"""

from __future__ import annotations

import datetime as _dt
import math
from dataclasses import dataclass, field

import pandas as pd

from .. import CAUTION, __version__
from . import units as U
from .html import MEMORY_MARK, _cell, _env, _figures, _flag_set, rule_rows
from .labels import (FLAGS_EXPLAINED, FLEET_FLAGS_EXPLAINED, FLEET_LIMITING_SHORT, FLEET_LIMITING_WORDS,
                     LIMITING_SHORT, LIMITING_WORDS, label)

__all__ = ["FleetPageData", "TankZones", "FLEET_SECTIONS", "render_fleet_page", "units_words"]

#: Section ids and headings, in page order.
FLEET_SECTIONS = (
    ("ranking", "Tanks, most urgent first"),
    ("tanks", "Per tank and zone"),
    ("words", "Limits and flags in words"),
    ("population", "Population of corrosion rates"),
    ("assumptions", "Rules and assumptions"),
)

#: The ``status`` column's words → plain words.
STATUS_WORDS = {
    "ok": "assessed", "ok (kept)": "kept", "error": "failed: bad input",
    "fault": "failed: internal fault", "timeout": "failed: no result in time",
}

#: Column headings of the fleet page (plain words; the unit follows the name's suffix).
FLEET_LABELS = {
    "interval_recommended_y": "Recommended interval",
    "next_due": "Next inspection due",
    "worst_zone": "Zone",
    "limiting": "Limited by",
    "p_leak_at_due": "Probability of a through-wall pit by then",
    "n_patches": "Number",
    "patch_area_m2": "Area",
    "flags": "Flags",
    # population.csv
    "group": "Group column",
    "value": "Group",
    "side": "Side",
    "n_tanks": "Tanks",
    "model": "Model",
    "aic": "AIC",
    "p50_mm_y": "Median rate (p50)",
    "p50_lo_mm_y": "p50, lower 90 % bound",
    "p50_hi_mm_y": "p50, upper 90 % bound",
    "p90_mm_y": "p90 rate",
    "p90_lo_mm_y": "p90, lower 90 % bound",
    "p90_hi_mm_y": "p90, upper 90 % bound",
    "p99_mm_y": "p99 rate (fitted)",
    "outliers": "Tanks above p99",
    "note": "Note",
}

#: Columns of each group (as found, after the proposed repairs) of the ranking table.
_FOUND = ("interval_recommended_y", "next_due", "limiting", "p_leak_at_due")
_REPAIRED = ("interval_recommended_y", "next_due", "limiting")
#: Columns of each group of a tank's zone table.
_ZONE_COLS = ("interval_recommended_y", "next_due", "limiting", "p_leak_at_due", "flags")


@dataclass
class TankZones:
    """One tank's zone tables, for its block of the page.

    Parameters
    ----------
    zones : the tank's zones.csv table (as found), or None.
    zones_repaired : its zones_repaired.csv table, or None.
    n_patches : number of proposed patch plates, or None when unknown.
    patch_area_m2 : their total area, or None. [m²]
    rule_changes : names of rule values the tank's job file changed.
    """

    zones: pd.DataFrame | None = None
    zones_repaired: pd.DataFrame | None = None
    n_patches: int | None = None
    patch_area_m2: float | None = None
    rule_changes: tuple = ()


@dataclass
class FleetPageData:
    """Everything the fleet page shows, in internal units (mm, mm/y, y, m²).

    Parameters
    ----------
    table : the ranked fleet table (``fleet.csv`` columns, most urgent first).
    tanks : tank name → :class:`TankZones`.
    population : population.csv table, or None.
    figures : ``(caption, png_bytes)`` of the population figures.
    rules_table : ``RuleSet.table()`` rows of the rule set the fleet applies.
    ruleset : the rule set's name.
    order_rule : the ranking rule, in words (:data:`scananalyse.fleet.ORDER_RULE`).
    units : display units, ``"mm"`` or ``"in"``.
    units_note : why the page shows these units.
    min_tanks_fit : fewest tanks for a fitted population model.
    caution, version, generated : as on the tank report.
    """

    table: pd.DataFrame
    tanks: dict = field(default_factory=dict)
    population: pd.DataFrame | None = None
    figures: list = field(default_factory=list)
    rules_table: list = field(default_factory=list)
    ruleset: str = "api653"
    order_rule: str = ""
    units: str = "mm"
    units_note: str = ""
    min_tanks_fit: int = 5
    caution: str = CAUTION
    version: str = __version__
    generated: _dt.datetime | None = None


# ---------------------------------------------------------------------------
# cells and heads
# ---------------------------------------------------------------------------
def _limit_text(value) -> str:
    if not isinstance(value, str) or not value:
        return "–"
    return FLEET_LIMITING_SHORT.get(value, LIMITING_SHORT.get(value, value))


def _limit_in_zone(limiting, zone) -> str:
    """What limits a tank's interval and in which zone ("code formula, zone interior")."""
    text = _limit_text(limiting)
    zone = "" if zone is None or (isinstance(zone, float) and math.isnan(zone)) else str(zone)
    return f"{text}, zone {zone}" if text != "–" and zone else text


def _fleet_cell(value, name: str, units: str) -> dict:
    """A table cell: numbers in display units, limits as plain words, flags spaced."""
    if name == "limiting":
        return {"text": _limit_text(value), "cls": "limit"}
    if name in ("next_due", "worst_zone", "flags") and not isinstance(value, str):
        value = None  # NaN read from a CSV
    cell = _cell(value, name, units)
    if value is None and name == "flags":
        cell["text"] = ""
    return cell


def _fleet_head(name: str, units: str) -> dict:
    return {"label": FLEET_LABELS.get(name, label(name)), "unit": U.display_column(name, units)[1], "cls": ""}


def _align(heads: list, rows: list) -> list:
    """Right-align the head of every column holding a number (as the tank report does)."""
    for j, h in enumerate(heads):
        h["cls"] = "num" if any(len(r) > j and r[j]["cls"] == "num" for r in rows) else ""
    return heads


def _worst(zones: pd.DataFrame | None) -> dict:
    """The zone row with the least recommended interval, as a dict ({} when none)."""
    if zones is None or len(zones) == 0 or "interval_recommended_y" not in zones:
        return {}
    rec = pd.to_numeric(zones["interval_recommended_y"], errors="coerce")
    return zones.loc[rec.idxmin()].to_dict() if rec.notna().any() else {}


def _link(report) -> str | None:
    """The tank's report as a relative link, or None (never a scheme or an absolute path)."""
    if not isinstance(report, str) or not report or ":" in report or report.startswith(("/", "\\")):
        return None
    return report


# ---------------------------------------------------------------------------
# sections (data shaping only)
# ---------------------------------------------------------------------------
def _ranking_row(r: dict, tz: TankZones, units: str) -> dict:
    status = str(r.get("status", ""))
    failed = not status.startswith("ok")
    base = {"rank": r.get("rank"), "tank": str(r.get("tank", "")), "status": STATUS_WORDS.get(status, status),
            "inspections": U.fmt_number(r.get("inspections")), "failed": failed,
            "href": None if failed else _link(r.get("report")), "error": str(r.get("error") or "")}
    if failed:
        return base
    rep = _worst(tz.zones_repaired)
    rep["interval_recommended_y"] = r.get("interval_repaired_y")
    cells = [_fleet_cell(r.get(c), c, units) for c in _FOUND]
    cells[_FOUND.index("limiting")]["text"] = _limit_in_zone(r.get("limiting"), r.get("worst_zone"))
    cells += [_fleet_cell(rep.get(c), c, units) for c in _REPAIRED]
    cells[len(_FOUND) + _REPAIRED.index("limiting")]["text"] = _limit_in_zone(rep.get("limiting"), rep.get("zone"))
    cells.append(_fleet_cell(tz.n_patches, "n_patches", units))
    cells.append(_fleet_cell(tz.patch_area_m2, "patch_area_m2", units))
    return {**base, "cells": cells}


def _ranking(d: FleetPageData) -> dict:
    """The verdict table: per tank, as found | after the proposed repairs | patch plates."""
    rows = [_ranking_row(r, d.tanks.get(str(r.get("tank")), TankZones()), d.units)
            for r in d.table.to_dict("records")]
    heads = _align([_fleet_head(c, d.units) for c in _FOUND + _REPAIRED + ("n_patches", "patch_area_m2")],
                   [r["cells"] for r in rows if not r["failed"]])
    groups = [{"label": "As found", "span": len(_FOUND)},
              {"label": "After the proposed repairs", "span": len(_REPAIRED)},
              {"label": "Patch plates proposed", "span": 2}]
    return {"heads": heads, "groups": groups, "rows": rows, "n_cols": 4 + len(heads),
            "order_rule": d.order_rule, "n_failed": sum(r["failed"] for r in rows)}


def _zone_table(tz: TankZones, units: str) -> dict:
    """Zone | as found (interval, due, limit, p leak, flags) | after the proposed repairs (…)."""
    z = tz.zones
    if z is None or len(z) == 0 or "zone" not in z:
        return {"empty": "no zone table found in the tank's folder"}
    rep = None
    if tz.zones_repaired is not None and "zone" in tz.zones_repaired:
        rep = {str(r["zone"]): r for r in tz.zones_repaired.to_dict("records")}
    heads = [_fleet_head(c, units) for c in _ZONE_COLS]
    groups = [{"label": "As found", "span": len(_ZONE_COLS)}]
    if rep is not None:
        groups.append({"label": "After the proposed repairs", "span": len(_ZONE_COLS)})
        heads = heads + [_fleet_head(c, units) for c in _ZONE_COLS]
    rows = []
    for r in z.to_dict("records"):
        row = [{"text": str(r.get("zone", "")), "cls": "", "th": True}]
        row += [_fleet_cell(r.get(c), c, units) for c in _ZONE_COLS]
        if rep is not None:
            zr = rep.get(str(r.get("zone")), {})
            row += [_fleet_cell(zr.get(c), c, units) for c in _ZONE_COLS]
        rows.append(row)
    _align(heads, [r[1:] for r in rows])
    return {"cls": "data intervals zonedetail", "groups": groups, "heads": heads, "rows": rows,
            "first": {"label": "Zone"}}


def _tank_lines(r: dict, tz: TankZones, units: str) -> list:
    """Sentences under a tank's heading: patch plates, similar service, rule changes."""
    lines = []
    if tz.n_patches is not None:
        area = U.convert(float(tz.patch_area_m2 or 0.0), "area", units)
        lines.append(f"{tz.n_patches} patch plate(s) proposed, "
                     f"{U.fmt_number(area, U.decimals('area', units))} {U.unit_label('area', units)} in all."
                     if tz.n_patches else "No patch plate proposed.")
    ss = r.get("similar_service")
    if isinstance(ss, str) and ss:
        lines.append(f"Similar service: {ss}.")
    if r.get("limiting") == "similar-service":
        lines.append("The zone table is the tank's own one-inspection assessment; the interval above it "
                     "was shortened by the similar-service rate.")
    if tz.rule_changes:
        lines.append("Its job file changes these rule values: " + ", ".join(tz.rule_changes)
                     + " (see its report for the values used).")
    return lines


def _tanks(d: FleetPageData) -> list:
    out = []
    for r in d.table.to_dict("records"):
        tz = d.tanks.get(str(r.get("tank")), TankZones())
        row = _ranking_row(r, tz, d.units)
        block = {**row, "lines": [], "zones": None}
        if not row["failed"]:
            block["lines"] = _tank_lines(r, tz, d.units)
            block["zones"] = _zone_table(tz, d.units)
        out.append(block)
    return out


def _fleet_flags(d: FleetPageData) -> list:
    """Every flag the page shows, in first-seen order."""
    seen = []
    frames = [d.table] + [f for tz in d.tanks.values() for f in (tz.zones, tz.zones_repaired)]
    for df in frames:
        if df is None or "flags" not in df:
            continue
        for v in df["flags"]:
            for f in _flag_set(v):
                if f not in seen:
                    seen.append(f)
    return seen


def _words(d: FleetPageData) -> dict:
    words = {**FLAGS_EXPLAINED, **FLEET_FLAGS_EXPLAINED}
    flags = [{"flag": f, "text": words.get(f, "no explanation recorded for this flag")} for f in _fleet_flags(d)]
    limits = {**LIMITING_WORDS, **FLEET_LIMITING_WORDS}
    short = {**LIMITING_SHORT, **FLEET_LIMITING_SHORT}
    return {"flags": flags,
            "limits": [{"word": short.get(w, w), "text": t} for w, t in limits.items() if w not in ("", "none")]}


def _population(d: FleetPageData) -> dict:
    pop = d.population
    figs = _figures(d.figures)
    if pop is None or len(pop) == 0:
        return {"table": {"empty": "no assessed tank: no population"}, "figures": figs,
                "min_tanks_fit": d.min_tanks_fit}
    cols = list(pop.columns)
    rows = [[_fleet_cell(v, str(c), d.units) for c, v in zip(cols, rec)]
            for rec in pop.itertuples(index=False, name=None)]
    heads = _align([_fleet_head(str(c), d.units) for c in cols], rows)
    return {"table": {"cls": "data population", "heads": heads, "rows": rows}, "figures": figs,
            "min_tanks_fit": d.min_tanks_fit}


def _assumptions(d: FleetPageData) -> dict:
    changed = [(t, tz.rule_changes) for t, tz in d.tanks.items() if tz.rule_changes]
    return {"rules": rule_rows(d.rules_table), "ruleset": d.ruleset,
            "changed": [{"tank": t, "names": ", ".join(n)} for t, n in changed], "units_note": d.units_note}


def units_words(units: str) -> str:
    """The display units in words, as the page's subtitle gives them."""
    return "mm, mm/y, m²" if units == "mm" else "in, mils, mpy, ft²"


def render_fleet_page(data: FleetPageData) -> str:
    """The fleet overview as one self-contained HTML string.

    Parameters
    ----------
    data : :class:`FleetPageData`.

    Returns
    -------
    str : HTML5 with the tank report's inline CSS, figures as ``data:image/png;base64``
        URIs, links only to the tanks' own ``report.html`` (relative), no scripts.
    """
    U._check(data.units)
    generated = data.generated or _dt.datetime.now().replace(microsecond=0)
    status = data.table["status"].astype(str) if len(data.table) else pd.Series(dtype=str)
    n_ok = int(status.str.startswith("ok").sum())
    sub = " · ".join((f"{len(data.table)} tanks: {n_ok} assessed, {len(data.table) - n_ok} failed",
                      f"display units {units_words(data.units)}", f"scananalyse {data.version}",
                      f"generated {generated.isoformat(sep=' ', timespec='minutes')}"))
    return _env().get_template("fleet.html.j2").render(
        title="Fleet overview", sub=sub, caution=data.caution, version=data.version,
        sections=[{"id": s, "heading": h} for s, h in FLEET_SECTIONS], memory_mark=MEMORY_MARK,
        ranking=_ranking(data), tanks=_tanks(data), words=_words(data), population=_population(data),
        assumptions=_assumptions(data))
