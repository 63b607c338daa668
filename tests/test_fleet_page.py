"""The fleet overview page (scananalyse.report.fleet_page), rendered from rows built in
memory (no Dask): ranking order, as-found and after-repair figures, plain limits,
flags in words, escaping, the caution and the rule values, the units."""

from __future__ import annotations

import io
import re
from html.parser import HTMLParser
from pathlib import Path

import pandas as pd
import pytest

from scananalyse import CAUTION
from scananalyse.fleet import ORDER_RULE, UNITS_NOTE, fleet_page_data, rank_fleet, run_tank
from scananalyse.report.fleet_page import FLEET_SECTIONS, FleetPageData, render_fleet_page
from scananalyse.report.html import MEMORY_MARK, esc
from scananalyse.report.labels import FLAGS_EXPLAINED, FLEET_FLAGS_EXPLAINED
from scananalyse.rules import RULESETS

HOSTILE = '<script>alert(1)</script> & "x"'


def _zones(rows):
    cols = ("zone", "interval_recommended_y", "next_due", "limiting", "p_leak_at_due", "flags",
            "rate_top_max_mm_y", "rate_under_max_mm_y", "t_min_mm", "mrt_mm")
    return {c: [r[i] if i < len(r) else None for r in rows] for i, c in enumerate(cols)}


def _tank(name, found, repaired, *, patches=(2, 0.5), inspections=2, **extra):
    """A fleet row as run_tank returns it, from per-zone tuples
    (zone, interval, next_due, limiting, p_leak, flags)."""
    z = pd.DataFrame(_zones(found))
    rec = pd.to_numeric(z["interval_recommended_y"])
    w = z.loc[rec.idxmin()]
    rep = pd.DataFrame(_zones(repaired)) if repaired is not None else None
    flags = ";".join(sorted({f for s in z["flags"] for f in str(s or "").split(";") if f}))
    row = {"tank": name, "status": "ok", "inspections": inspections,
           "interval_recommended_y": float(w["interval_recommended_y"]),
           "interval_repaired_y": float(rep["interval_recommended_y"].min()) if rep is not None else float("nan"),
           "worst_zone": w["zone"], "next_due": w["next_due"], "limiting": w["limiting"],
           "p_leak_at_due": w["p_leak_at_due"], "flags": flags, "below_mrt": "below-mrt" in flags,
           "code_exceeds_local": "code-exceeds-local" in flags, "report": f"{name}/report.html", "error": "",
           "_zones": z.to_dict("list"), "_zones_repaired": None if rep is None else rep.to_dict("list"),
           "_patches": patches, "_rule_changes": ()}
    row.update(extra)
    return row


def _fleet():
    rows = [
        _tank("TK-LATE", [("critical", 15.0, "2039-05-01", "cap", 0.001, ""),
                          ("interior", 12.0, "2036-05-01", "local", 0.002, "code-exceeds-local")],
              [("critical", 15.0, "2039-05-01", "cap", 0.001, ""), ("interior", 14.0, "2038-05-01", "cap", 0.001, "")],
              patches=(0, 0.0)),
        _tank("TK-SOON", [("critical", 4.5, "2029-11-01", "code", 0.04, "below-mrt;low-coverage"),
                          ("interior", 6.0, "2031-05-01", "eva", 0.02, "eva-below-mrt")],
              [("critical", 11.5, "2036-11-01", "local", 0.004, "low-coverage"),
               ("interior", 9.5, "2034-11-01", "eva", 0.003, "")],
              patches=(3, 1.25)),
        _tank("TK-SOON-LESS", [("interior", 4.5, "2029-11-01", "eva", 0.01, "")],
              [("interior", 8.0, "2033-05-01", "eva", 0.001, "")]),
        {"tank": "TK-BROKEN", "status": "error", "inspections": 2, "report": "",
         "error": "/data/TK-BROKEN/new.csv:2: field 'inspected': '2024-13-45' is not a valid calendar date"},
    ]
    return rows


def _page(rows=None, **kw):
    rows = rows if rows is not None else _fleet()
    df = rank_fleet(rows)
    data = fleet_page_data(df, rows, kw.pop("pop", None), kw.pop("figures", None))
    for k, v in kw.items():
        setattr(data, k, v)
    return df, render_fleet_page(data)


class _Tables(HTMLParser):
    """Rows of cell texts of every table of a page section, keyed by the table's class."""

    def __init__(self):
        super().__init__()
        self.tables, self._cls, self._row, self._cell = [], None, None, None

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag == "table":
            self.tables.append((a.get("class", ""), []))
        elif tag == "tr" and self.tables:
            self._row = []
            self.tables[-1][1].append(self._row)
        elif tag in ("td", "th") and self._row is not None:
            self._cell = []
            self._row.append(self._cell)

    def handle_endtag(self, tag):
        if tag in ("td", "th"):
            self._cell = None

    def handle_data(self, data):
        if self._cell is not None:
            self._cell.append(data)


def _rows(page: str, cls: str) -> list:
    p = _Tables()
    p.feed(page)
    out = []
    for c, rows in p.tables:
        if cls in c.split():
            out += [["".join(cell).strip() for cell in r] for r in rows]
    return out


def _section(page: str, sid: str) -> str:
    start = page.index(f'<section id="{sid}"')
    return page[start:page.index("</section>", start)]


def _visible(html_text: str) -> str:
    return re.sub(r"<[^>]+>", " ", html_text)


def test_ranking_order_and_as_found_vs_after_repair_in_the_page():
    df, page = _page()
    # rank_fleet: failed first, then earliest next due, then the greater p_leak_at_due
    assert list(df["tank"]) == ["TK-BROKEN", "TK-SOON", "TK-SOON-LESS", "TK-LATE"]
    rows = [r for r in _rows(page, "fleet") if r and r[0].isdigit()]
    assert [r[1] for r in rows] == list(df["tank"]) and [r[0] for r in rows] == ["1", "2", "3", "4"]
    broken, soon = rows[0], rows[1]
    assert broken[2] == "failed: bad input" and "'2024-13-45' is not a valid calendar date" in broken[-1]
    # No., tank, status, inspections | as found: interval, due, limit, p leak | after repair:
    # interval, due, limit | patch plates: number, area
    assert soon[4:] == ["4.5", "2029-11-01", "code formula, zone critical", "0.040",
                        "9.5", "2034-11-01", "extreme values, zone interior", "3", "1.25"]
    assert rows[3][4] == "12.0" and rows[3][8] == "14.0" and rows[3][11] == "0"
    # headings: the two groups and the units
    head = _section(page, "ranking")
    assert "As found" in head and "After the proposed repairs" in head and ">y<" in head and "m²" in head
    assert f"Order: {esc(ORDER_RULE)}" in page


def test_each_tank_has_its_zones_as_found_and_after_repair():
    _, page = _page()
    sec = _section(page, "tanks")
    # blocks in rank order, each linking its report
    assert sec.index("TK-BROKEN") < sec.index("TK-SOON/report.html") < sec.index("TK-LATE/report.html")
    assert '<a href="TK-SOON/report.html">TK-SOON</a>' in sec
    zone_rows = [r for r in _rows(sec, "zonedetail") if r and r[0] in ("critical", "interior")]
    # TK-SOON's critical zone: as found (interval, due, limit, p leak, flags) | after repair (…)
    assert ["critical", "4.5", "2029-11-01", "code formula", "0.040", "below-mrt; low-coverage",
            "11.5", "2036-11-01", "local rates", "0.004", "low-coverage"] in zone_rows
    assert "3 patch plate(s) proposed, 1.25 m² in all." in sec and "No patch plate proposed." in sec
    # a failed tank: its error, no zone table
    assert "is not a valid calendar date" in sec


def test_limits_in_plain_words_and_no_internal_names():
    _, page = _page()
    shown = _visible(_section(page, "ranking") + _section(page, "tanks"))
    for internal in ("interval_recommended_y", "interval_repaired_y", "worst_zone", "p_leak_at_due",
                     "limiting", "rtbc", "next_due", "_mm_y"):
        assert internal not in shown
    for word in ("code formula", "local rates", "extreme values", "cap"):
        assert word in shown
    words = _section(page, "words")
    assert esc("the projection from each spot's own measured rates") in words


def test_flags_explained_once_each_and_only_those_shown():
    _, page = _page()
    words = _section(page, "words")
    for flag in ("below-mrt", "low-coverage", "eva-below-mrt", "code-exceeds-local"):
        assert f"<dt>{flag}</dt><dd>{esc(FLAGS_EXPLAINED[flag])}</dd>" in words
    assert esc(FLAGS_EXPLAINED["too-small"]) not in page  # no patch carries it


def test_caution_rules_and_units_note():
    _, page = _page()
    assert page.count(esc(CAUTION)) == 2  # after the ranking and in the footer
    ranking = _section(page, "ranking")
    assert "class=\"caution\"" in ranking and esc(CAUTION) in ranking
    rules = _section(page, "assumptions")
    rs = RULESETS["api653"]
    mem = next(n for n in rs.value_names() if getattr(rs, n).tag == "memory")
    assert f"<code>{mem}</code>" in rules and esc(getattr(rs, mem).source) in rules and MEMORY_MARK in rules
    assert esc(UNITS_NOTE) in rules
    # the tank report's style sheet, not a copy: the page carries report.css whole
    css = (Path(__file__).parents[1] / "scananalyse" / "report" / "templates" / "report.css").read_text()
    assert css.strip() in page
    assert [s for s, _ in FLEET_SECTIONS] == re.findall(r'<section id="(\w+)"', page)


def test_hostile_text_is_escaped_and_links_stay_relative():
    rows = _fleet()
    rows.append(_tank(HOSTILE, [(HOSTILE, 2.0, "2027-05-01", "code", 0.1, "<b>odd</b>;below-mrt")],
                      [(HOSTILE, 3.0, "2028-05-01", HOSTILE, 0.05, "")], report="javascript:alert(1)",
                      similar_service=HOSTILE, _rule_changes=(HOSTILE,)))
    rows.append({"tank": "E" + HOSTILE, "status": "fault", "error": HOSTILE + " see http://example.invalid",
                 "report": ""})
    _, page = _page(rows)
    assert "<script" not in page and "<b>odd" not in page and "javascript:" not in page
    assert esc(HOSTILE) in page and "&lt;b&gt;odd&lt;/b&gt;" in page
    assert "no explanation recorded for this flag" in _section(page, "words")
    # the letters of a web address are defused, as on the tank report
    assert "http" not in page.lower() and "h&#116;tp://example.invalid" in page
    hrefs = re.findall(r'href="([^"]*)"', page)
    assert all(h.startswith("#") or h.endswith("/report.html") and ":" not in h for h in hrefs)


def test_similar_service_limit_and_fleet_flags():
    one = _tank("ONE", [("interior", 20.0, "2045-05-01", "cap", 0.0, "no-short-term-rates")],
                [("interior", 20.0, "2045-05-01", "cap", 0.0, "no-short-term-rates")], inspections=1)
    one.update(interval_recommended_y=7.0, next_due="2032-05-01", limiting="similar-service",
               flags="no-short-term-rates;similar-service;scan-names-other-tank",
               similar_service="p90 of 3 two-inspection tanks in group whole fleet: top 0.1, under 0.2 mm/y")
    _, page = _page(_fleet() + [one])
    row = next(r for r in _rows(page, "fleet") if len(r) > 1 and r[1] == "ONE")
    assert row[4] == "7.0" and row[6] == "similar service, zone interior"
    assert "was shortened by the similar-service rate" in _section(page, "tanks")
    words = _section(page, "words")
    for flag in ("similar-service", "scan-names-other-tank"):
        assert esc(FLEET_FLAGS_EXPLAINED[flag]) in words


def test_inch_display_units_and_population_with_figure():
    from PIL import Image

    buf = io.BytesIO()
    Image.new("RGB", (4, 3), "white").save(buf, format="PNG")
    pop = pd.DataFrame([{"group": "all", "value": "all", "side": "under", "n_tanks": 3, "model": "empirical",
                         "aic": float("nan"), "p50_mm_y": 0.254, "p90_mm_y": 0.508, "outliers": "", "note": "few"}])
    _, page = _page(pop=pop, figures=[("all tanks, under side: 3 tanks", buf.getvalue())], units="in")
    soon = next(r for r in _rows(page, "fleet") if len(r) > 1 and r[1] == "TK-SOON")
    assert soon[-1] == f"{1.25 / 0.3048 ** 2:.1f}" and "ft²" in _section(page, "ranking")
    prow = next(r for r in _rows(page, "population") if r and r[0] == "all")
    assert "10.0" in prow and "20.0" in prow  # 0.254 mm/y = 10 mpy
    assert "mpy" in _section(page, "population") and "data:image/png;base64," in page
    assert "display units in, mils, mpy, ft²" in page


def test_tank_without_repaired_table_or_patch_list():
    rows = [_tank("SOLO", [("interior", 8.0, "2033-05-01", "code", 0.01, "")], None, patches=None)]
    _, page = _page(rows)
    row = next(r for r in _rows(page, "fleet") if len(r) > 1 and r[1] == "SOLO")
    assert row[4] == "8.0" and row[8:] == ["–", "–", "–", "–", "–"]
    sec = _section(page, "tanks")
    assert "After the proposed repairs" not in sec and "patch plate" not in sec


def test_an_empty_fleet_page_still_renders():
    page = render_fleet_page(FleetPageData(table=rank_fleet([{"tank": "X", "status": "timeout", "report": "",
                                                              "error": "no result within 5 s"}])))
    assert "failed: no result in time" in page and "no result within 5 s" in page
    assert "no assessed tank: no population" in page and "No tank or zone carries a flag." in page


def test_run_tank_carries_the_zone_tables_patches_and_rule_changes_of_a_kept_tank(tmp_path):
    from scananalyse.outputs import COMPLETE_MARKER, _marker_text

    folder = tmp_path / "TK-K"
    folder.mkdir()
    found = pd.DataFrame(_zones([("interior", 6.0, "2031-05-01", "code", 0.02, "below-mrt")]))
    found.to_csv(folder / "zones.csv", index=False)
    found.assign(interval_recommended_y=10.0, next_due="2035-05-01").to_csv(folder / "zones_repaired.csv", index=False)
    pd.DataFrame({"patch": [1, 2], "zone": ["interior"] * 2, "area_m2": [0.25, 0.5]}).to_csv(
        folder / "patches.csv", index=False)
    (folder / COMPLETE_MARKER).write_text(_marker_text(folder), encoding="utf-8")
    job = tmp_path / "job.toml"
    job.write_text("[rules.overrides]\ninterval_cap_y = 15\n")
    new = tmp_path / "new.csv"
    new.write_text("# format: scananalyse-scan 1\n")
    row = run_tank({"tank": "TK-K", "new": str(new), "old": None, "job": str(job), "diameter": 4000.0,
                    "folder": "TK-K"}, str(tmp_path))
    assert row["status"] == "ok (kept)", row.get("error")
    assert row["_patches"] == (2, pytest.approx(0.75)) and row["_rule_changes"] == ("interval_cap_y",)
    assert row["_zones_repaired"]["interval_recommended_y"] == [10.0]
    _, page = _page([row])
    fl = next(r for r in _rows(page, "fleet") if len(r) > 1 and r[1] == "TK-K")
    assert fl[4] == "6.0" and fl[8:10] == ["10.0", "2035-05-01"] and fl[-2:] == ["2", "0.75"]
    assert "Tank TK-K: its job file changes interval_cap_y." in _section(page, "assumptions")


def test_every_flag_a_tank_writes_is_explained_on_the_fleet_page_too():
    """The fleet page takes its words from the same place as the tank report (labels.py):
    the spot readings' flags are explained there as well."""
    found = [("critical", 0.0, "2025-10-06", "eva", 0.3, "readings-only;points-only;eva-below-mrt")]
    _, page = _page(_fleet() + [_tank("RDG", found, found)])
    words = _section(page, "words")
    for flag in ("readings-only", "points-only", "eva-below-mrt"):
        assert f"<dt>{flag}</dt><dd>{esc(FLAGS_EXPLAINED[flag])}</dd>" in words
    assert "no explanation recorded" not in words


def test_glossary_lists_the_fleet_words():
    """docs/glossary.md explains the fleet's own limit word and flags as the page does."""
    from scananalyse.report.labels import FLEET_LIMITING_SHORT, FLEET_LIMITING_WORDS

    text = (Path(__file__).parents[1] / "docs" / "glossary.md").read_text(encoding="utf-8")
    for k, v in FLEET_LIMITING_WORDS.items():
        assert f"| `{k}` (limit) | {FLEET_LIMITING_SHORT[k]} | {v} |" in text
    for k, v in FLEET_FLAGS_EXPLAINED.items():
        assert f"| `{k}` (flag) | {k} | {v} |" in text
