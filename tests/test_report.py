"""Tests of the self-contained HTML report (scananalyse.report.html).

The page is built from an invented synthetic floor (scananalyse.synth) with figures
drawn by scananalyse.report.figures, then checked for: no external references,
every section present in order, figures that decode, escaping of every string
from an input, NaN/inf display, unit conversion, the single-inspection variant,
print CSS, and a headless Chromium render that is not blank.
"""

from __future__ import annotations

import base64
import datetime as dt
import io
import os
import re
import shutil
import subprocess
from html.parser import HTMLParser

import numpy as np
import pandas as pd
import pytest
from PIL import Image
from scipy import stats

from scananalyse import CAUTION
from scananalyse.report import ReportData, figures as F, render_report, write_report
from scananalyse.report.html import (MEMORY_MARK, N_INDICATIONS, SECTIONS, _env, esc,
                                     zone_verdicts)
from scananalyse.report.labels import FLAGS_EXPLAINED, LABELS, label, label_with_unit
from scananalyse.rules import get_ruleset
from scananalyse.synth import make_pair

HOSTILE = '<script>alert(1)</script> & "x"'
HOSTILE_ESCAPED = "&lt;script&gt;alert(1)&lt;/script&gt; &amp; &quot;x&quot;"


# ---------------------------------------------------------------------------
# building a realistic page from an invented floor
# ---------------------------------------------------------------------------
def _nn_mask(mask_src, src_x0, src_y0, src_pitch, X, Y):
    """Nearest-neighbour sample of a boolean mask at floor points (outside → False)."""
    j = np.rint((X - src_x0) / src_pitch).astype(int)
    i = np.rint((Y - src_y0) / src_pitch).astype(int)
    ok = (i >= 0) & (i < mask_src.shape[0]) & (j >= 0) & (j < mask_src.shape[1])
    out = np.zeros(X.shape, dtype=bool)
    out[ok] = mask_src[i[ok], j[ok]]
    return out


def _gumbel_figures(loss, zone, units, *, threshold, block=10):
    """Block maxima of a loss map, Gumbel fit by scipy, probability and return-level plots."""
    r, c = (s // block * block for s in loss.shape)
    b = loss[:r, :c].reshape(r // block, block, c // block, block)
    fin = np.isfinite(b).reshape(r // block, block, c // block, block).sum(axis=(1, 3))
    bm = np.fmax.reduce(np.fmax.reduce(b, axis=3), axis=1)[fin > block * block // 2]
    bm = bm[np.isfinite(bm)]
    # MFL reports loss shallower than the threshold as nominal: such blocks are
    # left-censored (domain.md §7); reference estimator: scipy's censored Gumbel MLE
    cens = bm < threshold
    loc, scale = stats.gumbel_r.fit(stats.CensoredData(uncensored=bm[~cens],
                                                       left=np.full(cens.sum(), threshold)))
    T = np.logspace(0.05, 3, 40)
    level = stats.gumbel_r.ppf(1 - 1 / T, loc, scale)
    # rough 90 % band from a seeded parametric bootstrap with the moments estimator
    rng = np.random.default_rng(1)
    sim = stats.gumbel_r.rvs(loc, scale, size=(200, bm.size), random_state=rng)
    s_b = np.sqrt(6) * sim.std(axis=1, ddof=1) / np.pi
    m_b = sim.mean(axis=1) - 0.5772 * s_b
    lev_b = m_b[:, None] - s_b[:, None] * np.log(-np.log(1 - 1 / T[None, :]))
    lo, hi = np.percentile(lev_b, [5, 95], axis=0)
    pd_ = {"maxima": bm, "censored": cens, "threshold": threshold, "loc": loc, "scale": scale,
           "method": "censored MLE (scipy)"}
    f1 = F.probability_plot(pd_, title=f"{zone}: Gumbel probability plot", units=units)
    f2 = F.return_level_plot(T, level, lo, hi, zone_T=250.0, units=units,
                             title=f"{zone}: return level")
    summary = {"eva_n_blocks": int(bm.size), "eva_n_censored": int(cens.sum()), "gumbel_loc_mm": loc, "gumbel_scale_mm": scale,
               "eva_T": 250.0, "depth_eva_mm": float(stats.gumbel_r.ppf(1 - 1 / 250, loc, scale)),
               "depth_eva_upper_mm": float(np.interp(250.0, T, hi)), "eva_method": "gumbel-mle"}
    return summary, [(f"{zone}: probability plot", F.png_bytes(f1, dpi=80)),
                     (f"{zone}: return level", F.png_bytes(f2, dpi=80))]


def build_data(*, units="mm", tank="TK-Test 1", single=False, dpi=80, seed=5):
    """A complete ReportData from a small synthetic pair (figures at low dpi, fast)."""
    pair = make_pair(diameter_mm=4000.0, pitch_new=20.0, pitch_old=25.0, seed=seed,
                     n_top_pits=12, n_under_pits=20)
    new, old, tr = pair.new, pair.old, pair.truth
    ext = new.extent
    D = tr.diameter_mm
    loss = (new.meta.nominal - new.thickness).astype(np.float32)
    loss_top = np.where(new.side == 1, loss, 0).astype(np.float32)
    loss_top[~new.scanned] = np.nan
    loss_under = np.where(new.side != 1, loss, 0).astype(np.float32)
    loss_under[~new.scanned] = np.nan
    rate = np.where(new.scanned, tr.rate_top_true + tr.rate_under_true, np.nan)
    life = np.where(new.scanned, (new.thickness - 2.54) / np.maximum(rate, 1e-9), np.nan)
    patches = pd.DataFrame({
        "patch": ["P1", "P2"], "zone": ["interior", "interior"],
        "x_min_mm": [-900.0, 300.0], "y_min_mm": [-400.0, 500.0],
        "x_max_mm": [-500.0, 700.0], "y_max_mm": [-100.0, 800.0],
        "corner_radius_mm": [50.0, 75.0], "thickness_mm": [6.35, 6.35],
        "area_m2": [0.12, 0.12], "mass_kg": [5.9, 5.9], "flags": ["", "near seam"]})
    mrt = [(2.54, "MRT", "-"), (4.0, "repair-to", "--")]
    maps = []
    for vals, kind, title, cbar_label, extra in (
            (new.thickness, "thickness", "Remaining thickness now", "thickness",
             dict(contours=mrt, plate=new.plate)),
            (loss_top, "loss", "Loss, top side", "loss depth", {}),
            (loss_under, "loss", "Loss, underside", "loss depth", {}),
            (rate, "rate", "Short-term rate, both sides", "rate", {}),
            (life, "life", "Remaining life", "remaining life", {}),
            (new.thickness, "thickness", "Repairs", "thickness", dict(patches=patches))):
        fig = F.floor_map(vals, extent=ext, title=title, label=cbar_label, units=units, kind=kind,
                          diameter_mm=D, **extra)
        maps.append((f"{title}. {fig.scananalyse_caption}", F.png_bytes(fig, dpi=dpi)))
    X, Y = new.grid_xy()
    inside = np.hypot(X, Y) < D / 2 - 150
    feat_new = ~new.scanned & inside
    old_unscanned = ~old.scanned
    th = np.deg2rad(tr.rotation_deg)
    # new point -> old point: inverse of [x'] = R[x] + d
    xs, ys = X - tr.dx_mm, Y - tr.dy_mm
    xo = np.cos(th) * xs + np.sin(th) * ys
    yo = -np.sin(th) * xs + np.cos(th) * ys
    feat_before = _nn_mask(old_unscanned, old.x0, old.y0, old.pitch, X, Y) & inside
    feat_after = _nn_mask(old_unscanned, old.x0, old.y0, old.pitch, xo, yo) & inside
    reg_fig = F.registration_overlay(feat_new, feat_before, feat_after, extent=ext)
    zones = pd.DataFrame({
        "zone": ["critical", "interior", HOSTILE],
        "area_m2": [0.93, 11.6, 0.0], "coverage_pct": [41.0, 94.2, 0.0],
        "t_min_mm": [5.1, 3.3, np.nan], "depth_max_mm": [1.25, 3.05, np.nan],
        "depth_eva_mm": [1.6, 3.6, np.nan], "depth_eva_upper_mm": [1.9, 4.1, np.nan],
        "rate_top_max_mm_y": [0.01, 0.254, np.nan], "rate_under_max_mm_y": [0.03, 0.12, np.nan],
        "mrt_mm": [2.54, 2.54, 2.54], "interval_code_y": [31.2, -0.4, np.nan],
        "life_local_y": [np.inf, 4.1, np.nan], "life_eva_y": [22.0, 3.2, np.nan],
        "interval_cap_y": [20.0, 20.0, 20.0], "interval_recommended_y": [20.0, 0.0, np.nan],
        "next_due": ["2046-05-01", "2026-05-01", ""],
        "limiting": ["cap", "code", "none"],
        "flags": ["", "below-mrt;code-exceeds-local", f"no-data;{HOSTILE}"]})
    zr = zones.copy()
    zr.loc[1, ["t_min_mm", "interval_code_y", "life_local_y", "interval_recommended_y",
               "next_due", "limiting", "flags"]] = [4.2, 12.0, 11.0, 11.0, "2037-05-01", "local", ""]
    ind = pd.DataFrame({"id": np.arange(1, 41), "x_mm": np.linspace(-1500, 1500, 40),
                        "y_mm": np.linspace(1200, -1200, 40),
                        "depth_max_mm": np.round(np.linspace(0.5, 4.4, 40)[::-1][
                            np.random.default_rng(2).permutation(40)], 3),
                        "t_min_mm": 6.35 - np.linspace(0.5, 4.4, 40), "area_m2": 0.01,
                        "side": ["under"] * 39 + [HOSTILE], "zone": "interior",
                        "status": "new"})
    ind.loc[39, "depth_max_mm"] = 9.0  # the hostile row is the deepest, so it is listed
    ex_sum, ex_figs = _gumbel_figures(loss_under, "interior", units,
                                      threshold=new.meta.threshold)
    figs = {"maps": maps,
            "methods": [("Interval by method", F.png_bytes(F.method_comparison(zones), dpi=dpi))],
            "extremes:interior": ex_figs}
    reg = None
    if not single:
        figs["registration"] = [("Features before and after alignment. "
                                 + reg_fig.scananalyse_caption, F.png_bytes(reg_fig, dpi=dpi))]
        reg = {"method": "phase correlation", "dx_mm": tr.dx_mm, "dy_mm": tr.dy_mm,
               "rotation_deg": tr.rotation_deg, "score": 0.83, "overlap_pct": 96.5,
               "residual_rms_mm": 3.2, "reliable": True, "warnings": [],
               "control_residuals_mm": [2.0, 4.5, 1.1]}
    insp = [{"label": "older", "date": old.meta.inspected.isoformat(), "method": "MFL",
             "file": f"old_{HOSTILE}.csv", "pitch_mm": old.pitch, "coverage_pct": 91.0},
            {"label": "newer", "date": new.meta.inspected.isoformat(), "method": "MFL",
             "file": "new.csv", "pitch_mm": new.pitch, "coverage_pct": 93.5}]
    if single:
        insp = insp[1:]
    rules = get_ruleset().table()
    rules.append({"name": "demo_memory_value_mm", "value": 1.5, "unit": "mm", "tag": "memory",
                  "source": HOSTILE, "note": ""})
    return ReportData(
        tank={"name": tank, "diameter_mm": D, "nominal_mm": new.meta.nominal,
              "installed": "2001-05-01"},
        inspections=insp, zones=zones, zones_repaired=None if single else zr,
        patches=None if single else patches, indications=ind, registration=reg,
        rules_table=rules,
        assumptions=["Loss not attributed by the operator counts as underside.",
                     "A change smaller than 2 σ of the two readings is not growth.",
                     "Blocks whose deepest loss is below the threshold are left-censored."],
        figures=figs, extremes={"interior": ex_sum},
        flags_explained={"below-mrt": "The thinnest cell is already below the minimum "
                                      "remaining thickness.",
                         "code-exceeds-local": "The code formula allows longer "
                         "than the metal at some spot supports."},
        units=units, timings={"load": 0.21, "register": 1.4, "report": 2.0},
        generated=dt.datetime(2026, 5, 2, 9, 30), single_inspection=single,
        notes=[f"Note from the job file: {HOSTILE}"])


@pytest.fixture(scope="module")
def page():
    data = build_data()
    return data, render_report(data)


# ---------------------------------------------------------------------------
# a tiny HTML parser for checks
# ---------------------------------------------------------------------------
class _Collect(HTMLParser):
    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.ids, self.srcs, self.tags, self.tables = [], [], [], []
        self._row = self._cell = None
        self.text = []

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        self.tags.append(tag)
        if "id" in a:
            self.ids.append(a["id"])
        if "src" in a:
            self.srcs.append(a["src"])
        if tag == "table":
            self.tables.append([])
        elif tag == "tr":
            self._row = []
        elif tag in ("td", "th"):
            self._cell = []

    def handle_endtag(self, tag):
        if tag in ("td", "th") and self._cell is not None:
            self._row.append("".join(self._cell).strip())
            self._cell = None
        elif tag == "tr" and self._row is not None:
            self.tables[-1].append(self._row)
            self._row = None

    def handle_data(self, data):
        self.text.append(data)
        if self._cell is not None:
            self._cell.append(data)


def _parse(text):
    p = _Collect()
    p.feed(text)
    return p


def _strip_data_uris(text):
    return re.sub(r"data:image/png;base64,[A-Za-z0-9+/=]+", "DATA", text)


# ---------------------------------------------------------------------------
# tests
# ---------------------------------------------------------------------------
def test_no_external_references(page):
    _, text = page
    # design §3.5: nothing loaded from the network; base64 cannot contain ':' so a web
    # address could only appear outside the data URIs
    assert "http://" not in text and "https://" not in text
    rest = _strip_data_uris(text)
    assert "http" not in rest.lower()
    assert "<link" not in rest.lower()
    assert "<script" not in rest.lower()
    assert "@import" not in rest and "url(" not in rest
    p = _parse(text)
    assert p.srcs, "figures expected"
    assert all(s.startswith("data:image/png;base64,") for s in p.srcs)
    assert rest.count('src="') == len(p.srcs)


def test_sections_present_in_order(page):
    _, text = page
    ids = _parse(text).ids
    want = [sid for sid, _ in SECTIONS]
    assert want == ["verdict", "summary", "registration", "maps", "zones", "extremes", "methods",
                    "indications", "assumptions"]
    pos = [ids.index(s) for s in want]
    assert pos == sorted(pos)


def test_every_png_decodes(page):
    data, text = page
    srcs = _parse(text).srcs
    n_expected = sum(len(v) for v in data.figures.values())
    assert len(srcs) == n_expected
    for s in srcs:
        raw = base64.b64decode(s.split(",", 1)[1], validate=True)
        assert raw[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG spec, ISO/IEC 15948)
        with Image.open(io.BytesIO(raw)) as im:
            im.load()
            assert im.size[0] > 100 and im.size[1] > 100
            arr = np.asarray(im.convert("L"), dtype=float)
            assert arr.std() > 5  # a drawing, not a blank canvas


def test_input_strings_escaped(page):
    _, text = page
    # the hostile string went into the tank name, a file name, a zone name, flags, an
    # indication cell, a rule source and a note: it may appear only escaped
    assert HOSTILE not in text
    assert "<script" not in text
    assert "alert(1)</script>" not in text
    assert text.count(HOSTILE_ESCAPED) >= 7
    data = build_data(tank=HOSTILE)
    t2 = render_report(data)
    assert HOSTILE not in t2 and "<script" not in t2
    title = re.search(r"<title>(.*?)</title>", t2, re.S).group(1)
    assert HOSTILE_ESCAPED in title
    # what the browser shows is the original text
    assert HOSTILE in "".join(_parse(t2).text)


def test_http_in_input_is_defused():
    data = ReportData(tank="see https://example.invalid/x", zones=None)
    text = render_report(data)
    assert "https://" not in text and "http" not in text.lower()
    assert "see https://example.invalid/x" in "".join(_parse(text).text)


def _table_with_header(p, first):
    for t in p.tables:
        if t and t[0] and t[0][0].startswith(first) and len(t[0]) > 10:
            return t
    raise AssertionError(f"no table starting with {first!r}")


def _by_zone(p):
    """The zone table, laid out one row per quantity and one column per zone (and state)."""
    for t in p.tables:
        if t and t[0] and t[0][0].startswith("quantity"):
            return t
    raise AssertionError("no zone table (first header 'quantity')")


def _zv(t, zone, qty):
    """(cell text, row header text) of quantity ``qty`` for ``zone`` as found."""
    j = next(k for k, h in enumerate(t[0]) if h.startswith(zone))
    row = next(r for r in t[1:] if r[0].startswith(qty))
    return row[j], row[0]


def test_nan_inf_and_units_mm(page):
    _, text = page
    t = _by_zone(_parse(text))
    assert _zv(t, "critical", "Life from each spot")[0] == "∞"  # no corrosion: infinite life
    assert _zv(t, HOSTILE, "Thinnest reading")[0] == "–"          # all-unscanned zone: NaN
    assert _zv(t, "interior", "Interval by the code formula")[0] == "−0.4"  # below MRT
    assert _zv(t, "interior", "Thinnest reading")[0] == "3.30"
    assert "mm/y" in _zv(t, "interior", "Fastest top-side rate")[1]


def test_units_in():
    data = build_data(units="in")
    text = render_report(data)
    t = _by_zone(_parse(text))
    # 1 mpy = 0.0254 mm/y; 1 in = 25.4 mm; 1 mil = 0.0254 mm (domain.md §3, seen)
    v, h = _zv(t, "interior", "Fastest top-side rate")
    assert h.endswith("mpy") and v == "10.0"
    v, h = _zv(t, "interior", "Minimum remaining thickness")
    assert h.endswith("in") and v == "0.100"
    v, h = _zv(t, "interior", "Deepest loss measured")
    assert h.endswith("mils") and v == "120"
    assert "in, mils, mpy" in text


def test_memory_rules_marked(page):
    data, text = page
    n_mem = sum(1 for r in data.rules_table if r["tag"] == "memory")
    assert n_mem >= 1
    assert text.count(MEMORY_MARK) == n_mem


def test_caution_summary_footer_and_print_css(page):
    _, text = page
    esc_caution = CAUTION.replace("'", "&#x27;")
    verdict = text[text.index('id="verdict"'):text.index('id="summary"')]
    assert esc_caution in verdict  # the caution follows the verdicts on the first page
    footer = re.search(r'<footer class="caution-footer">(.*?)</footer>', text, re.S).group(1)
    assert esc_caution in footer
    css = re.search(r"<style>(.*?)</style>", text, re.S).group(1)
    assert "@page" in css and "@media print" in css
    pr = css[css.index("@media print"):]
    assert "position: fixed" in pr and "page-break-before" in pr and "page-break-inside" in pr


def test_flags_explained_and_indications(page):
    data, text = page
    meth = text[text.index('id="methods"'):text.index('id="indications"')]
    for flag, sentence in data.flags_explained.items():
        assert f"<dt>{flag}</dt>" in meth and sentence in meth
    assert "no explanation recorded" in meth  # 'low coverage' has none in this data
    ind = text[text.index('id="indications"'):text.index('id="assumptions"')]
    t = [tb for tb in _parse(ind).tables][0]
    head = t[0]
    k = next(i for i, h in enumerate(head) if h.startswith("Deepest loss measured"))
    depths = [float(r[k].replace("−", "-")) for r in t[1:]]
    assert len(depths) == N_INDICATIONS == 25
    assert depths == sorted(depths, reverse=True)
    want = np.sort(data.indications["depth_max_mm"].to_numpy())[::-1][:25]
    np.testing.assert_allclose(depths, want, atol=0.005)


def test_single_inspection_variant():
    data = build_data(single=True)
    text = render_report(data)
    p = _parse(text)
    assert all(sid in p.ids for sid, _ in SECTIONS)
    reg = text[text.index('id="registration"'):text.index('id="maps"')]
    assert "Not applicable" in reg and "<img" not in reg
    assert "Single inspection" in text
    assert "After the proposed repairs" not in text


def test_write_report_atomic(tmp_path, page):
    data, text = page
    out = tmp_path / "report.html"
    assert write_report(data, out) == str(out)
    got = out.read_text(encoding="utf-8")
    # identical apart from nothing: generated time is fixed in the data
    assert got == text
    assert [f.name for f in tmp_path.iterdir()] == ["report.html"]


def test_bad_figure_bytes_refused():
    data = ReportData(figures={"maps": [("not a png", b"GIF89a....")]})
    with pytest.raises(ValueError, match="PNG"):
        render_report(data)


def _browser_or_skip():
    """Path of a headless Chromium; skip when there is none, fail instead when
    SCANANALYSE_REQUIRE_BROWSER=1 (set by .ci/run after installing Chromium)."""
    exe = shutil.which("chromium") or shutil.which("chromium-browser")
    if exe is None:
        why = "no headless browser: chromium (or chromium-browser) not found on PATH"
        if os.environ.get("SCANANALYSE_REQUIRE_BROWSER") == "1":
            # CI installs Chromium and sets the variable, so the check cannot vanish there
            pytest.fail(f"{why}, and SCANANALYSE_REQUIRE_BROWSER=1 requires it "
                        "(apt-get install chromium)")
        pytest.skip(f"{why} (set SCANANALYSE_REQUIRE_BROWSER=1 to make this a failure)")
    return exe


def test_browser_missing_skips_or_fails(monkeypatch):
    monkeypatch.setattr(shutil, "which", lambda name: None)
    monkeypatch.delenv("SCANANALYSE_REQUIRE_BROWSER", raising=False)
    with pytest.raises(pytest.skip.Exception, match="chromium"):
        _browser_or_skip()
    monkeypatch.setenv("SCANANALYSE_REQUIRE_BROWSER", "1")
    with pytest.raises(pytest.fail.Exception, match="SCANANALYSE_REQUIRE_BROWSER=1"):
        _browser_or_skip()


def test_headless_browser_render(tmp_path, page):
    _, text = page
    exe = _browser_or_skip()
    html_path = tmp_path / "report.html"
    html_path.write_text(text, encoding="utf-8")
    shot = tmp_path / "shot.png"
    cmd = [exe, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
           "--no-first-run", "--disable-background-networking", "--disable-component-update",
           "--disable-sync", f"--user-data-dir={tmp_path / 'profile'}",
           f"--screenshot={shot}", "--window-size=1200,2000", html_path.as_uri()]
    res = subprocess.run(cmd, capture_output=True, timeout=120, check=False)
    assert shot.exists(), f"chromium wrote no screenshot (rc {res.returncode}): " \
                          f"{res.stderr.decode(errors='replace')[-500:]}"
    with Image.open(shot) as im:
        arr = np.asarray(im.convert("RGB"), dtype=float)
    assert arr.shape[0] >= 1000 and arr.shape[1] >= 1000
    # not blank: many distinct grey levels and real variance (text, tables, figures)
    assert arr.std() > 20
    assert len(np.unique(arr.reshape(-1, 3), axis=0)) > 200


# ---------------------------------------------------------------------------
# verdict first, plain labels, flag words
# ---------------------------------------------------------------------------
def _one_zone(**kw):
    row = {"zone": "Z", "area_m2": 10.0, "coverage_pct": 80.0, "t_min_mm": 4.0,
           "depth_max_mm": 2.35, "mrt_mm": 2.54, "interval_recommended_y": 8.0,
           "next_due": "2034-05-01", "limiting": "local", "flags": ""}
    row.update(kw)
    return pd.DataFrame([row])


def test_verdict_fine_zone():
    (v,) = zone_verdicts(_one_zone())
    assert v["verdict"] == "return to service as is" and v["kind"] == "ok"
    assert v["interval"] == "Inspect again within 8.0 y, next inspection by 2034-05-01."
    assert v["limit"] == ("The interval is limited by the projection from each spot's own "
                          "measured rates.")
    assert v["hand_ut"] == "None beyond the usual prove-up of the indications listed."
    assert v["patches"] == "No repair plan was made in this assessment."
    (v,) = zone_verdicts(_one_zone(), patches=pd.DataFrame({"zone": ["other"], "area_m2": [1.0]}))
    assert v["patches"] == "No patch plate proposed here."


def test_verdict_zone_below_mrt_with_repairs():
    found = _one_zone(t_min_mm=1.4, interval_recommended_y=0.0, next_due="2024-05-01",
                      limiting="code", flags="below-mrt;target-not-reached")
    rep = _one_zone(t_min_mm=6.35, interval_recommended_y=3.5, next_due="2027-11-01",
                    limiting="eva", flags="target-not-reached")
    patches = pd.DataFrame({"patch": ["P1", "P2", "P3"], "zone": ["Z", "Z", "other"],
                            "area_m2": [0.5, 0.25, 9.0]})
    (v,) = zone_verdicts(found, rep, patches)
    assert v["verdict"] == "repair first" and v["kind"] == "repair"
    assert v["interval"] == ("After the proposed repairs: inspect again within 3.5 y, "
                             "next inspection by 2027-11-01.")
    assert v["limit"].startswith("The thinnest reading, 1.40 mm, is below the MRT of 2.54 mm.")
    assert "After repair the interval is limited by the extreme-value life" in v["limit"]
    # after repair the extreme-value estimate of the unscanned 20 % limits: scanning it helps
    assert v["hand_ut"].startswith("Optional: scanning the 2.00 m² not scanned")
    assert v["patches"] == "2 patch plates proposed here, 0.75 m² in all."
    # in inches: the thickness in in, the area in ft²
    (vi,) = zone_verdicts(found, rep, patches, units="in")
    assert "1.40 mm" not in vi["limit"] and "0.055 in" in vi["limit"] and "0.100 in" in vi["limit"]
    assert "8.1 ft²" in vi["patches"]  # 0.75 m² = 8.07 ft²
    # no repaired table: no interval until repaired
    (v2,) = zone_verdicts(found)
    assert v2["verdict"] == "repair first"
    assert v2["interval"].startswith("Do not return to service before repair")


def test_verdict_zone_without_data():
    z = _one_zone(coverage_pct=0.0, t_min_mm=np.nan, interval_recommended_y=np.nan,
                  next_due="", limiting="", flags="no-data")
    (v,) = zone_verdicts(z)
    assert v["verdict"] == "prove up first (hand UT)" and v["kind"] == "proveup"
    assert v["interval"] == "No interval can be set: the zone was not scanned."
    assert v["hand_ut"].startswith("Scan the whole zone (10.00 m²), by hand or with an edge scanner")
    assert "spot readings alone" in v["hand_ut"]


def test_verdict_extreme_value_below_mrt():
    z = _one_zone(interval_recommended_y=1.0, next_due="2027-05-01", limiting="eva",
                  flags="eva-below-mrt")
    (v,) = zone_verdicts(z)
    assert v["verdict"] == "prove up first (hand UT)"
    assert "may already be below" in v["limit"]
    assert v["hand_ut"].startswith("Hand UT the 2.00 m² not scanned")
    # the unseen metal alone makes the interval 0 (no scanned cell below MRT): still a
    # prove-up, not a repair; no repair of measured metal would change it
    z0 = _one_zone(interval_recommended_y=0.0, next_due="2026-05-01", limiting="eva",
                   flags="readings-only;points-only;eva-borrowed;eva-below-mrt")
    (v0,) = zone_verdicts(z0)
    assert v0["verdict"] == "prove up first (hand UT)" and v0["kind"] == "proveup"
    assert v0["interval"].startswith("Do not return to service before the area nobody scanned is proved up")


def test_verdict_block_first_on_page(page):
    data, text = page
    ids = _parse(text).ids
    assert ids.index("verdict") < ids.index("summary")
    verdict = text[text.index('id="verdict"'):text.index('id="summary"')]
    # one block per zone, with its verdict word, then the caution
    assert verdict.count('class="verdictzone') == len(data.zones)
    words = re.findall(r'<span class="verdictword">(.*?)</span>', verdict)
    assert words == ["return to service as is", "repair first", "prove up first (hand UT)"]
    assert "inspect again within 11.0 y, next inspection by 2037-05-01" in verdict
    assert "Patch plates proposed for the whole floor: 2, 0.24 m² in all." in verdict
    assert verdict.index("verdictzone") < verdict.index('class="caution"')
    # the hostile zone name is shown escaped in the verdict heading
    assert f"Zone {HOSTILE_ESCAPED}" in verdict


def test_labels_mapping():
    from scananalyse.assess import ZONE_COLUMNS

    # the names the issue names, each with a plain label and its unit
    want = {"interval_recommended_y": ("Recommended interval", "y"),
            "rtbc_mm": ("Thinnest underside reading (RTbc)", "mm"),
            "eva_T": ("Return period T (zone area ÷ block area)", ""),
            "life_eva_depth_rate_y": ("Extreme-value life from deepest pit and fastest rate", "y"),
            "std_shift_mm": ("Uncertainty of the shift (1 σ)", "mm"),
            "rate_top_max_mm_y": ("Fastest top-side rate", "mm/y"),
            "depth_max_mm": ("Deepest loss measured", "mm"),
            "area_m2": ("Area", "m²")}
    for name, (lab, unit) in want.items():
        assert label_with_unit(name, "mm") == (lab, unit)
    assert label_with_unit("rate_top_max_mm_y", "in") == ("Fastest top-side rate", "mpy")
    assert label_with_unit("depth_max_mm", "in") == ("Deepest loss measured", "mils")
    assert label_with_unit("t_min_mm", "in") == ("Thinnest reading", "in")
    # every mapping is what label() returns, plain words (no underscore shown to people)
    for name, lab in LABELS.items():
        assert label(name) == lab and "_" not in lab and lab
    # every zones.csv column the assessment writes has a label
    extra = ["kind", "n_scanned", "cap_y", "initial_interval_y", "rtbc_mm", "rtip_mm",
             "t_used_upr_mm", "stpr_mm_y", "upr_mm_y", "rate_eva_mm_y", "life_eva_y",
             "rate_eva_source", "notes", "life_eva_depth_rate_y", "depth_eva_life_mm",
             "depth_pred_upper_mm", "eva_method", "eva_T", "eva_block_mm", "eva_n_blocks",
             "eva_n_censored", "eva_gev_p", "eva_reason", "life_eva_method", "life_eva_reason"]
    missing = [c for c in ZONE_COLUMNS + extra if c not in LABELS]
    assert missing == []
    # unknown names lose their unit suffix and underscores
    assert label("some_new_quantity_mm") == "some new quantity"
    assert label("register_s") == "register"


def test_page_shows_labels_not_internal_names(page):
    _, text = page
    rest = _strip_data_uris(text)
    p = _parse(rest)
    # column heads, and row heads (the zone detail table and the key-value tables)
    heads = [c for t in p.tables if t for c in t[0]] + [r[0] for t in p.tables for r in t if r]
    for internal in ("interval_recommended", "t_min", "rtbc", "eva_T", "depth_max",
                     "life_eva_depth_rate", "std_shift"):
        assert not any(internal in h for h in heads), internal
    assert any(h.startswith("Recommended interval") for h in heads)
    # the long zone table sits behind a <details>, after a short table
    zones = rest[rest.index('id="zones"'):rest.index('id="extremes"')]
    assert zones.index('class="data zonesum"') < zones.index("<details")
    short = _parse(zones).tables[0]
    assert len(short[0]) <= 12 and len(short) == 4


def test_interval_table_groups_as_found_and_after_repair(page):
    _, text = page
    summary = text[text.index('id="summary"'):text.index('id="registration"')]
    # one table, both states under their own group heading (no caption mix-up)
    assert summary.count("<table class=\"data intervals\"") == 1
    g = re.findall(r'<th scope="colgroup" colspan="3" class="group">(.*?)</th>', summary)
    assert g == ["As found", "After the proposed repairs"]
    t = _parse(summary).tables[-1]
    interior = next(r for r in t if r[0] == "interior")
    assert interior[1:] == ["0.0", "2026-05-01", "code formula", "11.0", "2037-05-01",
                            "local rates"]


def test_every_flag_the_tool_writes_is_explained():
    import inspect

    from scananalyse import assess, repair

    src = inspect.getsource(assess)
    written = set(re.findall(r'flags\.append\("([a-z-]+)"\)', src)) | {"no-data"}
    written |= {v for k, v in vars(repair).items() if k.startswith("FLAG_")}
    assert "eva-below-mrt" in written and "too-small" in written
    assert sorted(written - set(FLAGS_EXPLAINED)) == []
    assert "below MRT" in FLAGS_EXPLAINED["eva-below-mrt"]
    assert "unscanned" in FLAGS_EXPLAINED["eva-below-mrt"]


def test_flag_explanations_on_page_complete():
    data = build_data()
    data.flags_explained = {}
    data.zones.loc[0, "flags"] = "eva-below-mrt"
    text = render_report(data)
    meth = text[text.index('id="methods"'):text.index('id="indications"')]
    for flag in ("eva-below-mrt", "below-mrt", "code-exceeds-local", "no-data"):
        assert f"<dt>{flag}</dt>" in meth
        assert esc(FLAGS_EXPLAINED[flag]) in meth


def test_template_escapes_by_default():
    env = _env()
    assert env.autoescape is True
    assert env.loader is not None and "report.html.j2" in env.list_templates()
    # hostile text in places only the template puts on the page: column names, a kv key,
    # an extremes zone, a figure caption, a patch flag, the caution
    png = F.png_bytes(F.method_comparison(build_data().zones), dpi=40)
    data = ReportData(
        tank={"name": HOSTILE, HOSTILE: HOSTILE}, caution=HOSTILE,
        zones=pd.DataFrame({"zone": [HOSTILE], HOSTILE: [1.0], "flags": [HOSTILE]}),
        patches=pd.DataFrame({"patch": ["P1"], "zone": [HOSTILE], "area_m2": [0.1],
                              "flags": [HOSTILE]}),
        extremes={HOSTILE: {"eva_reason": HOSTILE}},
        figures={"maps": [(HOSTILE, png)]}, assumptions=[HOSTILE], notes=[HOSTILE],
        rules_table=[{"name": HOSTILE, "value": 1.0, "unit": HOSTILE, "tag": HOSTILE,
                      "source": HOSTILE, "note": HOSTILE}])
    text = render_report(data)
    assert "<script" not in text and HOSTILE not in text
    assert text.count(HOSTILE_ESCAPED) >= 15
    assert f'alt="{HOSTILE_ESCAPED}"' in text


def test_page_is_self_contained(page):
    _, text = page
    rest = _strip_data_uris(text)
    srcs = re.findall(r'\bsrc\s*=\s*"([^"]*)"', rest)
    hrefs = re.findall(r'\bhref\s*=\s*"([^"]*)"', rest)
    assert srcs and all(s == "DATA" for s in srcs)
    assert hrefs and all(h.startswith("#") for h in hrefs)
    ids = set(_parse(text).ids)
    assert all(h[1:] in ids for h in hrefs)  # every link is to the page itself
    assert not re.search(r"\b(src|href|action|poster|data)\s*=\s*['\"]?\s*(h|/)", rest, re.I)


def test_print_css_rules(page):
    _, text = page
    css = re.search(r"<style>(.*?)</style>", text, re.S).group(1)
    pr = css[css.index("@media print"):]
    assert re.search(r"table\.data tr, table\.kv tr \{ break-inside: avoid", pr)
    assert "thead { display: table-header-group; }" in pr
    assert re.search(r"figure\.map img \{ width: 100%", pr)
    # sections run on: a forced page break per section left pages a fifth full
    # (tests/test_report_pdf.py measures the printed pages); headings stay with what follows
    assert "break-before: page" not in pr and "page-break-before: always" not in pr
    assert re.search(r"h2 \{[^}]*break-after: avoid", pr)
    # the verdict is the first section, so it fills the first printed page
    assert SECTIONS[0][0] == "verdict"


def test_glossary_lists_every_page_label():
    """docs/glossary.md maps every column name to the label the page shows, and every
    flag to its explanation."""
    path = os.path.join(os.path.dirname(__file__), os.pardir, "docs", "glossary.md")
    with open(path, encoding="utf-8") as fh:
        text = fh.read()
    missing = [k for k, v in LABELS.items() if f"| `{k}` | {v} |" not in text]
    assert missing == []
    missing = [k for k, v in FLAGS_EXPLAINED.items() if f"| `{k}` | {v} |" not in text]
    assert missing == []


def test_hand_ut_sentence_names_the_area_neither_scan_saw():
    # The verdict's hand-UT area agrees with the note's: where the older scan saw part of what
    # the newer one missed, the area to prove up is the part neither saw, and both are named.
    from scananalyse.report.html import _hand_ut_sentence

    row = {"hidden_area_m2": 3.13, "limiting": "eva"}
    s = _hand_ut_sentence(["eva-below-mrt"], row, 3.53, "mm")
    assert "3.13 m² neither scan saw" in s and "3.53 m²" in s
    # no older coverage: the two areas are one, said once
    s2 = _hand_ut_sentence(["eva-below-mrt"], {"hidden_area_m2": 3.53}, 3.53, "mm")
    assert s2.startswith("Hand UT the 3.53 m² not scanned")
