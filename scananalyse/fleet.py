"""Fleet runs: every tank of a terminal on a Dask cluster, ranked by urgency.

Each tank's :func:`scananalyse.runner.compare` is one Dask task.  With no
scheduler address a :class:`dask.distributed.LocalCluster` of ``workers``
processes on loopback is started; with an address, an existing cluster is used
(every worker must see the manifest's files at the same paths, see
``docs/fleet.md``).  A tank that fails is one row with its error, never a failed
fleet.  A rerun skips tanks whose complete results already exist unless
``force``.

The output folder is the fleet's own: it is created by the run (and marked with
:data:`FLEET_MARKER`), or it is an earlier fleet output folder carrying that marker.
Any other existing folder (for example the folder holding the scans) is refused,
with or without ``force``, so nothing the fleet did not write is ever replaced or
removed.  Two fleet runs never write into one folder at the same time (a lock on
the marker).  Each tank's folder is published like any output folder
(:func:`scananalyse.outputs.output_folder`): ``force`` replaces only a complete
earlier output of the tool.

Manifest: CSV with columns ``tank,old,new,diameter`` (diameter in the scans'
units); optional column ``job`` (a TOML job file).  Paths are relative to the
manifest and may not escape its folder.
"""

from __future__ import annotations

import csv
import datetime as _dt
import errno
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

__all__ = ["read_manifest", "run_tank", "run_fleet", "rank_fleet", "FLEET_COLUMNS", "FLEET_MARKER",
           "claim_fleet_folder", "tank_folders"]

#: Marker file of a fleet output folder (hidden), written when the run creates the folder;
#: its first line is :data:`FLEET_SIGNATURE`.
FLEET_MARKER = ".scananalyse-fleet"
FLEET_SIGNATURE = "scananalyse fleet output folder"
#: Files the fleet writes at the top of its folder: no tank folder takes these names.
_FLEET_FILES = ("fleet.csv", "fleet.html", "population.csv", FLEET_MARKER)

FLEET_COLUMNS = [
    "rank", "tank", "status", "interval_recommended_y", "worst_zone", "next_due", "limiting", "flags",
    "below_mrt", "code_exceeds_local", "report", "error", "seconds",
]
_SAFE = re.compile(r"[^A-Za-z0-9._-]+")
#: Largest manifest read. [bytes]
_MAX_MANIFEST_BYTES = 16 << 20


def _safe_name(tank: str) -> str:
    s = _SAFE.sub("_", tank).strip("._")
    return s or "tank"


def tank_folders(entries: list[dict]) -> list[str]:
    """One folder name per tank: the tank name made safe (:func:`_safe_name`), made unique
    (``-2``, ``-3``, ... compared ignoring case) and never one of the fleet's own files."""
    used = {n.lower() for n in _FLEET_FILES}
    out = []
    for e in entries:
        base = _safe_name(e["tank"])
        name, k = base, 1
        while name.lower() in used:
            k += 1
            name = f"{base}-{k}"
        used.add(name.lower())
        out.append(name)
    return out


def claim_fleet_folder(out_dir, *, force: bool = False):
    """Create the fleet's output folder, or accept an earlier fleet output folder; lock it.

    Returns ``(folder, lock)``: the absolute folder and an open file holding an exclusive
    lock on its marker (close it to release).  Raises :class:`InputError` for a path that
    is a file or a link, an existing folder without :data:`FLEET_MARKER` (never written by
    a fleet run: it is refused even with ``force``, so a folder of scans is never written
    into), a folder another fleet run is writing, or a location that cannot be written.
    """
    import fcntl

    shown = os.fspath(out_dir)
    out = Path(os.path.abspath(shown))
    if os.path.islink(out):
        raise InputError(f"{shown}: is a symbolic link; give the output folder itself")
    created = False
    try:
        out.parent.mkdir(parents=True, exist_ok=True)
        os.mkdir(out)  # the claim: fails if anything is there
        created = True
    except FileExistsError:
        pass
    except OSError as exc:
        raise InputError(f"{shown}: cannot create the output folder ({exc.strerror or exc})") from None
    marker = out / FLEET_MARKER
    if created:
        try:
            marker.write_text(f"{FLEET_SIGNATURE}\n", encoding="utf-8")
        except OSError as exc:
            raise InputError(f"{marker}: cannot write ({exc.strerror or exc})") from None
    elif not out.is_dir():
        raise InputError(f"{shown}: exists and is not a folder")
    try:
        ok = (marker.is_file() and not marker.is_symlink()
              and marker.read_text(encoding="utf-8").splitlines()[:1] == [FLEET_SIGNATURE])
    except (OSError, UnicodeDecodeError):
        ok = False
    if not ok:
        raise InputError(f"{shown}: exists and is not a fleet output folder of scananalyse (no {FLEET_MARKER} "
                         "marker); fleet writes only into a new folder or its own earlier output, "
                         "even with --force; choose a new folder")
    lock = open(marker, "rb")
    try:
        fcntl.flock(lock.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)
    except OSError as exc:
        lock.close()
        if exc.errno in (errno.EWOULDBLOCK, errno.EAGAIN, errno.EACCES):
            raise InputError(f"{shown}: another fleet run is writing this folder") from None
        raise
    return out, lock


def read_manifest(path) -> list[dict]:
    """Read and check a fleet manifest; returns one dict per tank with absolute paths."""
    from .io.validate import check_regular_file

    path = Path(path)
    name = os.fspath(path)
    check_regular_file(name, "fleet manifest (CSV)")
    if path.stat().st_size > _MAX_MANIFEST_BYTES:
        raise InputError(f"{name}: manifest larger than {_MAX_MANIFEST_BYTES // (1 << 20)} MiB; not a fleet manifest")
    try:
        text = path.read_bytes().decode("utf-8-sig")
    except OSError as exc:
        raise InputError(f"{name}: cannot read manifest ({exc.strerror or exc})") from None
    except UnicodeDecodeError as exc:
        raise InputError(f"{name}: not UTF-8 text (byte {exc.start})") from None
    try:
        rows = list(csv.reader(text.splitlines()))
    except csv.Error as exc:
        raise InputError(f"{name}: cannot read as CSV ({exc})") from None
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
    """Run one tank's compare into ``out_root/<folder>``; never raises for bad input.

    ``entry["folder"]`` names the tank's folder (:func:`tank_folders`; default the safe
    tank name).  Returns a fleet row (dict).  Bad input gives a row with status ``error``
    and the one-line message; an internal fault gives status ``fault``.
    """
    from .job import SCAN_UNITS, Job, read_job
    from .outputs import is_complete_output
    from .runner import compare

    t0 = time.perf_counter()
    tank = entry["tank"]
    folder = Path(out_root) / (entry.get("folder") or _safe_name(tank))
    report = os.path.join(folder.name, "report.html")
    try:
        if is_complete_output(folder) and not force:
            zones = pd.read_csv(folder / "zones.csv")
            row = _row_from_zones(tank, zones, report)
            row["status"] = "ok (kept)"
        else:
            job = read_job(entry["job"]) if entry.get("job") else Job()
            # the manifest's diameter is in the scans' units, whatever units the job file states
            job = job.with_lengths(units=SCAN_UNITS, diameter=entry["diameter"],
                                   where={"diameter": f"{entry.get('tank')}: field 'diameter'"})
            res = compare(entry["old"], entry["new"], job=job, out_dir=str(folder), force=force, quiet=True)
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
    from .io.tables import write_csv
    from .io.validate import atomic_output

    entries = read_manifest(manifest)
    for e, folder in zip(entries, tank_folders(entries)):
        e["folder"] = folder
    out, lock = claim_fleet_folder(out_dir, force=force)
    try:
        return _run_fleet(entries, out, workers=workers, scheduler=scheduler, force=force, quiet=quiet,
                          timeout_s=timeout_s, write_csv=write_csv, atomic_output=atomic_output)
    finally:
        lock.close()


def _run_fleet(entries, out: Path, *, workers, scheduler, force, quiet, timeout_s, write_csv, atomic_output):
    from dask.distributed import Client, LocalCluster, as_completed

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
    try:
        write_csv(df, out / "fleet.csv")  # text cells neutralised against spreadsheet formulas
        with atomic_output(out / "fleet.html") as tmp:
            Path(tmp).write_text(_fleet_html(df), encoding="utf-8")
    except OSError as exc:
        raise InputError(f"{exc.filename or out}: cannot write ({exc.strerror or exc})") from None
    secs = time.perf_counter() - t0
    ok = int(df["status"].astype(str).str.startswith("ok").sum())
    summary = (f"fleet: {len(df)} tanks, {ok} assessed, {len(df) - ok} failed, in {secs:.1f} s; "
               f"most urgent: {df.iloc[0]['tank']}; wrote {out / 'fleet.csv'} and {out / 'fleet.html'}\n"
               + CAUTION)
    return {"table": df, "summary": summary, "seconds": secs}
