"""Fleet runs: every tank of a terminal on a Dask cluster, ranked by urgency.

Each tank's :func:`scananalyse.runner.compare` is one Dask task.  With no
scheduler address a :class:`dask.distributed.LocalCluster` of ``workers``
processes on loopback is started; with an address, an existing cluster is used
(every worker must see the manifest's files at the same paths, see
``docs/fleet.md``).  A tank that fails is one row with its error, never a failed
fleet.  A rerun skips tanks whose complete results already exist unless
``force``.

Manifest: CSV with columns ``tank,old,new,diameter`` (diameter in the scans'
units); optional column ``job`` (a TOML job file).  Paths are relative to the
manifest and may not escape its folder.
"""

from __future__ import annotations

import csv
import datetime as _dt
import html
import math
import os
import re
import sys
import time
from pathlib import Path

import pandas as pd

from . import CAUTION, __version__
from .errors import InputError
from .job import resolve_path

__all__ = ["read_manifest", "run_tank", "run_fleet", "rank_fleet", "FLEET_COLUMNS"]

FLEET_COLUMNS = [
    "rank", "tank", "status", "interval_recommended_y", "worst_zone", "next_due", "limiting", "flags",
    "below_mrt", "code_exceeds_local", "report", "error", "seconds",
]
_SAFE = re.compile(r"[^A-Za-z0-9._-]+")


def _safe_name(tank: str) -> str:
    s = _SAFE.sub("_", tank).strip("._")
    return s or "tank"


def read_manifest(path) -> list[dict]:
    """Read and check a fleet manifest; returns one dict per tank with absolute paths."""
    path = Path(path)
    name = os.fspath(path)
    try:
        text = path.read_bytes().decode("utf-8-sig")
    except OSError as exc:
        raise InputError(f"{name}: cannot read manifest ({exc.strerror or exc})") from None
    except UnicodeDecodeError as exc:
        raise InputError(f"{name}: not UTF-8 text (byte {exc.start})") from None
    rows = list(csv.reader(text.splitlines()))
    if not rows:
        raise InputError(f"{name}:1: empty manifest; expected columns tank,old,new,diameter")
    header = [h.strip().lower() for h in rows[0]]
    for col in ("tank", "old", "new", "diameter"):
        if col not in header:
            raise InputError(f"{name}:1: field '{col}': missing column")
    idx = {h: i for i, h in enumerate(header)}
    base = path.resolve().parent
    out, seen = [], {}
    for n, row in enumerate(rows[1:], start=2):
        if not row or all(not c.strip() for c in row):
            continue
        if len(row) != len(header):
            raise InputError(f"{name}:{n}: expected {len(header)} fields, got {len(row)}")
        tank = row[idx["tank"]].strip()
        if not tank:
            raise InputError(f"{name}:{n}: field 'tank': empty")
        if tank in seen:
            raise InputError(f"{name}:{n}: field 'tank': {tank!r} repeats line {seen[tank]}")
        seen[tank] = n
        try:
            diameter = float(row[idx["diameter"]])
        except ValueError:
            raise InputError(f"{name}:{n}: field 'diameter': not a number: {row[idx['diameter']]!r}") from None
        if not (math.isfinite(diameter) and diameter > 0):
            raise InputError(f"{name}:{n}: field 'diameter': must be positive, got {diameter}")
        entry = {"tank": tank, "diameter": diameter, "line": n}
        for col in ("old", "new"):
            entry[col] = resolve_path(row[idx[col]].strip(), base, allow_absolute=False,
                                      what=f"{name}:{n}: field '{col}'")
        job = row[idx["job"]].strip() if "job" in idx else ""
        entry["job"] = resolve_path(job, base, allow_absolute=False, what=f"{name}:{n}: field 'job'") if job else None
        out.append(entry)
    if not out:
        raise InputError(f"{name}:2: manifest lists no tanks")
    return out


def _row_from_zones(tank: str, zones: pd.DataFrame, report: str) -> dict:
    z = zones.copy()
    rec = pd.to_numeric(z["interval_recommended_y"], errors="coerce")
    flags = ";".join(sorted({f for s in z["flags"].fillna("") for f in str(s).split(";") if f}))
    if rec.notna().any():
        i = rec.idxmin()
        worst = z.loc[i]
        interval, zone, due, lim = float(rec[i]), str(worst["zone"]), str(worst["next_due"]), str(worst["limiting"])
    else:
        interval, zone, due, lim = float("nan"), "", "", ""
    return {
        "tank": tank, "status": "ok", "interval_recommended_y": interval, "worst_zone": zone, "next_due": due,
        "limiting": lim, "flags": flags, "below_mrt": "below-mrt" in flags,
        "code_exceeds_local": "code-exceeds-local" in flags, "report": report, "error": "",
    }


def run_tank(entry: dict, out_root: str, force: bool = False) -> dict:
    """Run one tank's compare into ``out_root/<tank>``; never raises for bad input.

    Returns a fleet row (dict).  Bad input gives a row with status ``error`` and
    the one-line message; an internal fault gives status ``fault``.
    """
    from .job import Job, read_job
    from .outputs import COMPLETE_MARKER
    from .runner import compare

    t0 = time.perf_counter()
    tank = entry["tank"]
    folder = Path(out_root) / _safe_name(tank)
    report = os.path.join(folder.name, "report.html")
    try:
        if (folder / COMPLETE_MARKER).exists() and not force:
            zones = pd.read_csv(folder / "zones.csv")
            row = _row_from_zones(tank, zones, report)
            row["status"] = "ok (kept)"
        else:
            job = read_job(entry["job"]) if entry.get("job") else Job()
            job = job.replace(diameter=entry["diameter"])
            res = compare(entry["old"], entry["new"], job=job, out_dir=str(folder), force=True, quiet=True)
            row = _row_from_zones(tank, res.zones, report)
    except InputError as exc:
        row = {"tank": tank, "status": "error", "error": str(exc), "report": ""}
    except Exception as exc:  # one tank's fault must not fail the fleet
        row = {"tank": tank, "status": "fault", "error": f"{type(exc).__name__}: {exc}", "report": ""}
    row["seconds"] = round(time.perf_counter() - t0, 2)
    return row


def rank_fleet(rows: list[dict]) -> pd.DataFrame:
    """Most urgent first: shortest recommended interval, then below-MRT and code-exceeds-local
    flags; failed tanks (which need attention before anything can be said) go first."""
    df = pd.DataFrame(rows)
    for c in FLEET_COLUMNS:
        if c not in df:
            df[c] = pd.NA
    failed = ~df["status"].astype(str).str.startswith("ok")
    interval = pd.to_numeric(df["interval_recommended_y"], errors="coerce").fillna(float("inf"))
    df = df.assign(_f=~failed, _i=interval, _b=~df["below_mrt"].fillna(False).astype(bool),
                   _c=~df["code_exceeds_local"].fillna(False).astype(bool))
    df = df.sort_values(["_f", "_i", "_b", "_c", "tank"], kind="stable").drop(columns=["_f", "_i", "_b", "_c"])
    df["rank"] = range(1, len(df) + 1)
    return df[FLEET_COLUMNS].reset_index(drop=True)


def _fleet_html(df: pd.DataFrame) -> str:
    e = html.escape
    rows = []
    for _, r in df.iterrows():
        link = e(str(r["report"])) if isinstance(r["report"], str) and r["report"] else ""
        tank = f'<a href="{link}">{e(str(r["tank"]))}</a>' if link else e(str(r["tank"]))
        iv = r["interval_recommended_y"]
        iv = "–" if iv is None or (isinstance(iv, float) and not math.isfinite(iv)) or pd.isna(iv) else f"{float(iv):.1f}"
        def txt(v):
            return "" if v is None or (not isinstance(v, str) and pd.isna(v)) else e(str(v))

        cells = [str(r["rank"]), tank, txt(r["status"]), iv, txt(r["worst_zone"]), txt(r["next_due"]),
                 txt(r["flags"]), txt(r["error"])]
        cls = ' class="bad"' if not str(r["status"]).startswith("ok") else ""
        rows.append(f"<tr{cls}>" + "".join(f"<td>{c}</td>" for c in cells) + "</tr>")
    head = "".join(f"<th>{h}</th>" for h in ["#", "tank", "status", "recommended interval [y]", "worst zone",
                                               "next due", "flags", "error"])
    return f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><title>scananalyse fleet overview</title>
<style>
body {{ font-family: sans-serif; margin: 2em; color: #222; }}
table {{ border-collapse: collapse; }} td, th {{ border: 1px solid #999; padding: 0.3em 0.6em; text-align: left; }}
tr.bad td {{ background: #fde8e0; }} .caution {{ border-left: 4px solid #b5471b; padding: 0.4em 0.8em; background: #fbf3ee; }}
</style></head><body>
<h1>Fleet overview, most urgent first</h1>
<p class="caution">{e(CAUTION)}</p>
<table><thead><tr>{head}</tr></thead><tbody>
{''.join(rows)}
</tbody></table>
<p>Generated {e(_dt.datetime.now().strftime('%Y-%m-%d %H:%M'))} by scananalyse {e(__version__)}.</p>
</body></html>
"""


def run_fleet(manifest, *, out_dir, workers: int | None = None, scheduler: str | None = None,
              force: bool = False, quiet: bool = False, timeout_s: float | None = None) -> dict:
    """Run every tank of a manifest on Dask; write ``fleet.csv`` and ``fleet.html``.

    Returns a dict with ``table`` (the ranked DataFrame), ``summary`` (text) and ``seconds``.
    """
    from dask.distributed import Client, LocalCluster, as_completed

    entries = read_manifest(manifest)
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    t0 = time.perf_counter()
    cluster = None
    if scheduler:
        client = Client(scheduler, timeout="30s")
    else:
        n = workers or os.cpu_count() or 1
        cluster = LocalCluster(n_workers=n, threads_per_worker=1, processes=True, host="127.0.0.1",
                               dashboard_address=None)
        client = Client(cluster)
    rows = []
    try:
        futures = [client.submit(run_tank, e, str(out), force, key=f"tank-{i}-{_safe_name(e['tank'])}", pure=False)
                   for i, e in enumerate(entries)]
        done = set()
        try:
            for k, fut in enumerate(as_completed(futures, timeout=timeout_s), start=1):
                row = fut.result()
                done.add(fut.key)
                rows.append(row)
                if not quiet:
                    msg = row.get("error") or f"{row.get('interval_recommended_y', float('nan')):.1f} y, {row.get('worst_zone', '')}"
                    sys.stderr.write(f"scananalyse fleet: [{k}/{len(entries)}] {row['tank']}: {row['status']}: {msg}\n")
        except TimeoutError:
            # a tank that never finishes (e.g. a damaged HDF5 file hanging the HDF5 library)
            # becomes one row, like any other failed tank
            for e, fut in zip(entries, futures):
                if fut.key not in done:
                    fut.cancel()
                    rows.append({"tank": e["tank"], "status": "timeout", "report": "",
                                 "error": f"no result within {timeout_s:g} s"})
    finally:
        client.close()
        if cluster is not None:
            cluster.close()
    df = rank_fleet(rows)
    tmp = out / ".fleet.csv.partial"
    df.to_csv(tmp, index=False)
    os.replace(tmp, out / "fleet.csv")
    tmp = out / ".fleet.html.partial"
    tmp.write_text(_fleet_html(df), encoding="utf-8")
    os.replace(tmp, out / "fleet.html")
    secs = time.perf_counter() - t0
    ok = int(df["status"].astype(str).str.startswith("ok").sum())
    summary = (f"fleet: {len(df)} tanks, {ok} assessed, {len(df) - ok} failed, in {secs:.1f} s; "
               f"most urgent: {df.iloc[0]['tank']}; wrote {out / 'fleet.csv'} and {out / 'fleet.html'}\n"
               + CAUTION)
    return {"table": df, "summary": summary, "seconds": secs}
