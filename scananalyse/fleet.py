"""Fleet runs: every tank of a terminal on a Dask cluster, ranked by urgency.

Each tank's :func:`scananalyse.runner.compare` (or, with one inspection,
:func:`~scananalyse.runner.assess_single`) is one Dask task.  With no
scheduler address a :class:`dask.distributed.LocalCluster` of ``workers``
processes on loopback is started; with an address, an existing cluster is used
(every worker must see the manifest's files at the same paths, see
``docs/fleet.md``).  A tank that fails is one row with its error; the other tanks
run, every output is written, and the run then fails (:class:`FleetFailed`, exit 2).  A rerun skips tanks whose complete results already exist unless
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
units); optional column ``job`` (a TOML job file); any other column (``service``,
``cp``, ``coating``, ``foundation``, ``heated``, ...) is a group label of the
population (:mod:`scananalyse.population`).  An empty ``old`` is one inspection
(:func:`scananalyse.runner.assess_single`).  Paths are absolute or relative to the
manifest (``../scans/a.h5`` allowed); a path that is a FIFO, device or socket is refused
naming the row, since opening it could block the run.
"""

from __future__ import annotations

import csv
import datetime as _dt
import errno
import math
import os
import re
import sys
import time
from pathlib import Path

import pandas as pd

from . import CAUTION
from .errors import InputError
from .job import resolve_path
from .population import MIN_TANKS_FIT

__all__ = ["read_manifest", "run_tank", "run_fleet", "rank_fleet", "FLEET_COLUMNS", "FLEET_MARKER",
           "claim_fleet_folder", "tank_folders", "similar_service", "FleetFailed", "ORDER_RULE",
           "fleet_page_data"]

#: Marker file of a fleet output folder (hidden), written when the run creates the folder;
#: its first line is :data:`FLEET_SIGNATURE`.
FLEET_MARKER = ".scananalyse-fleet"
FLEET_SIGNATURE = "scananalyse fleet output folder"
#: Files the fleet writes at the top of its folder: no tank folder takes these names.
_FLEET_FILES = ("fleet.csv", "fleet.html", "population.csv", FLEET_MARKER)

FLEET_COLUMNS = [
    "rank", "tank", "status", "inspections", "interval_recommended_y", "interval_repaired_y", "worst_zone",
    "next_due", "limiting", "p_leak_at_due", "rate_top_max_mm_y", "rate_under_max_mm_y",
    "similar_service_top_mm_y", "similar_service_under_mm_y", "similar_service", "flags",
    "below_mrt", "code_exceeds_local", "report", "error", "seconds",
]
#: Manifest columns that are not group labels.
_MANIFEST_FIELDS = ("tank", "old", "new", "diameter", "job")
#: Words accepted in the ``cp`` column (case ignored) and their label.
_YES_NO = {"yes": "yes", "y": "yes", "true": "yes", "1": "yes", "no": "no", "n": "no", "false": "no", "0": "no"}
#: The order rule of ``fleet.csv``, as the page states it.
ORDER_RULE = ("Failed tanks first (they need attention before anything can be said); then the earliest next due "
              "date; then the greater probability of a leak at that date (where computed); then "
              "the shorter recommended interval, below-MRT and code-exceeds-local flags, and the tank name.")
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


def _refuse_special(path: str, what: str) -> None:
    """Refuse a path that exists and is a FIFO, device or socket (opening it could block the
    run); a missing file or a folder is left to the tank's own run, which names it."""
    import stat

    try:
        st = os.stat(path)
    except OSError:
        return
    if not (stat.S_ISREG(st.st_mode) or stat.S_ISDIR(st.st_mode)):
        raise InputError(f"{what}: {path!r} is not a regular file (a FIFO, device or socket); refused")


def read_manifest(path) -> list[dict]:
    """Read and check a fleet manifest.

    Returns one dict per tank: ``tank``, ``diameter``, ``line`` (manifest line), ``old``
    (absolute path, or None for one inspection), ``new``, ``job`` (or None) and ``groups``
    (group column -> label).  Raises :class:`InputError` naming the manifest and the
    line for a malformed row or a path that is a FIFO, device or socket.
    """
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
    dup = sorted({h for h in header if header.count(h) > 1})
    if dup:
        raise InputError(f"{name}:1: field '{dup[0]}': repeated column")
    idx = {h: i for i, h in enumerate(header)}
    group_cols = [h for h in header if h and h not in _MANIFEST_FIELDS]
    for h in group_cols:
        if h in FLEET_COLUMNS or h in ("scan_tank", "inspections") or h.startswith("_"):
            raise InputError(f"{name}:1: field '{h}': a fleet.csv column; rename this group column")
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
        for col in ("old", "new", "job"):
            value = row[idx[col]].strip() if col in idx else ""
            if not value:
                if col == "new":
                    raise InputError(f"{name}:{n}: field 'new': empty; the newer scan is required")
                entry[col] = None
                continue
            what = f"{name}:{n}: field '{col}'"
            entry[col] = resolve_path(value, base, allow_absolute=True, what=what)
            _refuse_special(entry[col], what)
        groups = {}
        for col in group_cols:
            v = row[idx[col]].strip()
            if col == "cp" and v:
                if v.lower() not in _YES_NO:
                    raise InputError(f"{name}:{n}: field 'cp': expected yes or no, got {v!r}")
                v = _YES_NO[v.lower()]
            groups[col] = v
        entry["groups"] = groups
        out.append(entry)
    if not out:
        raise InputError(f"{name}:2: manifest lists no tanks")
    return out


def _zone_max(z: pd.DataFrame, col: str) -> float:
    v = pd.to_numeric(z[col], errors="coerce") if col in z else pd.Series(dtype=float)
    return float(v.max()) if v.notna().any() else float("nan")


def _row_from_zones(tank: str, zones: pd.DataFrame, report: str, repaired: pd.DataFrame | None = None) -> dict:
    z = zones.copy()
    rec = pd.to_numeric(z["interval_recommended_y"], errors="coerce")
    flags = ";".join(sorted({f for s in z["flags"].fillna("") for f in str(s).split(";") if f}))
    if rec.notna().any():
        i = rec.idxmin()
        worst = z.loc[i]
        interval, zone, due, lim = float(rec[i]), str(worst["zone"]), str(worst["next_due"]), str(worst["limiting"])
        pleak = float(pd.to_numeric(pd.Series([worst.get("p_leak_at_due")]), errors="coerce")[0])
    else:
        interval, zone, due, lim, pleak = float("nan"), "", "", "", float("nan")
    rep = float("nan")
    if repaired is not None and "interval_recommended_y" in repaired:
        r = pd.to_numeric(repaired["interval_recommended_y"], errors="coerce")
        rep = float(r.min()) if r.notna().any() else float("nan")
    return {
        "tank": tank, "status": "ok", "interval_recommended_y": interval, "interval_repaired_y": rep,
        "worst_zone": zone, "next_due": "" if due == "nan" else due, "limiting": "" if lim == "nan" else lim,
        "p_leak_at_due": pleak, "rate_top_max_mm_y": _zone_max(z, "rate_top_max_mm_y"),
        "rate_under_max_mm_y": _zone_max(z, "rate_under_max_mm_y"), "flags": flags,
        "below_mrt": "below-mrt" in flags, "code_exceeds_local": "code-exceeds-local" in flags,
        "report": report, "error": "",
    }


def _scan_tank_name(path) -> str:
    """The tank name a scan file states, from its header alone (HDF5 root attribute
    ``tank``, or the CSV ``# tank:`` line), or '' when it states none or cannot be read."""
    try:
        with open(path, "rb") as fh:
            head = fh.read(65536)
        if head.startswith(b"\x89HDF"):
            import h5py

            with h5py.File(path, "r") as f:
                v = f.attrs.get("tank", "")
            return (v.decode("utf-8", "replace") if isinstance(v, bytes) else str(v)).strip()
        for line in head.decode("utf-8", "replace").splitlines():
            if not line.startswith("#"):
                break
            key, _, value = line[1:].partition(":")
            if key.strip().lower() == "tank":
                return value.strip()
    except Exception:
        pass
    return ""


def run_tank(entry: dict, out_root: str, force: bool = False) -> dict:
    """Run one tank's compare (or, with no ``old``, its one-inspection assessment) into
    ``out_root/<folder>``; never raises for bad input.

    ``entry["folder"]`` names the tank's folder (:func:`tank_folders`; default the safe
    tank name).  Returns a fleet row (dict) carrying the tank's zones table (key
    ``_zones``) for the similar-service step.  Bad input gives a row with status ``error``
    and the one-line message; an internal fault gives status ``fault``.
    """
    from .io.validate import check_regular_file
    from .job import SCAN_UNITS, Job, read_job
    from .outputs import is_complete_output
    from .runner import assess_single, compare

    t0 = time.perf_counter()
    tank = entry["tank"]
    folder = Path(out_root) / (entry.get("folder") or _safe_name(tank))
    report = os.path.join(folder.name, "report.html")
    single = not entry.get("old")
    try:
        job = None
        if is_complete_output(folder) and not force:
            zones = pd.read_csv(folder / "zones.csv")
            rep = pd.read_csv(folder / "zones_repaired.csv") if (folder / "zones_repaired.csv").is_file() else None
            row = _row_from_zones(tank, zones, report, rep)
            row["status"] = "ok (kept)"
        else:
            for key in ("old", "new"):
                if entry.get(key):
                    check_regular_file(entry[key], "scan file")  # 'is a folder', 'no such file', FIFO
            job = read_job(entry["job"]) if entry.get("job") else Job()
            # the manifest's diameter is in the scans' units, whatever units the job file states
            job = job.with_lengths(units=SCAN_UNITS, diameter=entry["diameter"],
                                   where={"diameter": f"{entry.get('tank')}: field 'diameter'"})
            if single:
                res = assess_single(entry["new"], job=job, out_dir=str(folder), force=force, quiet=True)
            else:
                res = compare(entry["old"], entry["new"], job=job, out_dir=str(folder), force=force, quiet=True)
            zones, rep = res.zones, res.zones_repaired
            row = _row_from_zones(tank, zones, report, rep)
        others = sorted({n for n in (_scan_tank_name(entry[k]) for k in ("old", "new") if entry.get(k))
                         if n and n.lower() != tank.strip().lower()})
        if others:  # the scans state another tank's name: the manifest row may point at the wrong files
            row["flags"] = ";".join(f for f in (row["flags"], "scan-names-other-tank") if f)
            row["scan_tank"] = ";".join(others)
        row["_zones"] = zones.to_dict("list")
        row["_inspected"] = _inspected(folder)
        # for the page: the zones after the proposed repairs, the patch plates, the job's rule changes
        row["_zones_repaired"] = None if rep is None else rep.to_dict("list")
        row["_patches"] = _patch_summary(folder / "patches.csv")
        row["_rule_changes"] = _rule_changes(job, entry)
    except InputError as exc:
        row = {"tank": tank, "status": "error", "error": str(exc), "report": ""}
    except Exception as exc:  # one tank's fault must not fail the fleet
        row = {"tank": tank, "status": "fault", "error": f"{type(exc).__name__}: {exc}", "report": ""}
    row["inspections"] = 1 if single else 2
    row.update(entry.get("groups") or {})
    row["seconds"] = round(time.perf_counter() - t0, 2)
    return row


def _patch_summary(path: Path) -> tuple | None:
    """(number of patch plates, their total area [m²]) from a tank's patches.csv, or None."""
    try:
        p = pd.read_csv(path)
    except (OSError, ValueError):
        return None
    area = pd.to_numeric(p["area_m2"], errors="coerce").sum() if "area_m2" in p else float("nan")
    return len(p), float(area)


def _rule_changes(job, entry: dict) -> tuple:
    """Names of the rule values a tank's job file changes (its rule overrides), sorted; a kept
    tank's job file is read again for this, and an unreadable one gives ()."""
    if job is None and entry.get("job"):
        from .job import read_job

        try:
            job = read_job(entry["job"])
        except InputError:
            return ()
    return tuple(sorted(getattr(job, "rule_overrides", None) or ()))


def _inspected(folder: Path) -> str:
    """The newer inspection's date (ISO) from the tank's results.h5, or ''."""
    try:
        import h5py

        with h5py.File(folder / "results.h5", "r") as f:
            v = f.attrs.get("inspected_new", "")
        return v.decode() if isinstance(v, bytes) else str(v)
    except Exception:
        return ""


def rank_fleet(rows: list[dict]) -> pd.DataFrame:
    """Order the fleet, most urgent first (:data:`ORDER_RULE`).

    Failed tanks first; then the earliest ``next_due``; then the greater ``p_leak_at_due``
    where that column exists; then the shorter recommended interval, below-MRT and
    code-exceeds-local flags, and the tank name.  Group columns and any other keys are
    kept after :data:`FLEET_COLUMNS`; keys starting with ``_`` are dropped.
    """
    df = pd.DataFrame([{k: v for k, v in r.items() if not str(k).startswith("_")} for r in rows])
    for c in FLEET_COLUMNS:
        if c not in df:
            df[c] = pd.NA
    failed = ~df["status"].astype(str).str.startswith("ok")
    due = pd.to_datetime(df["next_due"].astype(str), format="%Y-%m-%d", errors="coerce")
    pleak = pd.to_numeric(df["p_leak_at_due"], errors="coerce").fillna(-1.0)
    interval = pd.to_numeric(df["interval_recommended_y"], errors="coerce").fillna(float("inf"))
    df = df.assign(_f=~failed, _d=due, _p=-pleak, _i=interval, _b=~df["below_mrt"].fillna(False).astype(bool),
                   _c=~df["code_exceeds_local"].fillna(False).astype(bool))
    df = df.sort_values(["_f", "_d", "_p", "_i", "_b", "_c", "tank"], kind="stable", na_position="last")
    df = df.drop(columns=["_f", "_d", "_p", "_i", "_b", "_c"])
    df["rank"] = range(1, len(df) + 1)
    extra = [c for c in df.columns if c not in FLEET_COLUMNS]
    return df[FLEET_COLUMNS + extra].reset_index(drop=True)


def similar_service(rows: list[dict], group_cols, *, quantile: float | None = None) -> None:
    """Give each one-inspection tank the similar-service rate of its group (in place).

    The group is the tank's labels in every group column (the whole fleet when the
    manifest has none).  Per side, the rate is the ``quantile`` (default the rule value
    ``similar_service_quantile``, p90) of the zone-maximum rates of the group's assessed
    two-inspection tanks, needing :data:`~scananalyse.population.MIN_TANKS_SIMILAR`.
    Where it exists, each zone's interval becomes
    min(recommended, (t_min − MRT) / (top rate + under rate)), the sides' similar-service
    rates summed (a side without one keeps its own measured rate), rounded down to the
    rule set's step and never below 0; the tank's row takes the least zone and says so.
    """
    from .assess import add_years
    from .population import MIN_TANKS_SIMILAR, similar_service_rate
    from .rules import RULESETS

    rules = RULESETS["api653"]
    q = quantile if quantile is not None else rules.v("similar_service_quantile")
    key = lambda r: tuple(str(r.get(c, "") or "") for c in group_cols)  # noqa: E731
    donors = {}
    for r in rows:
        if r.get("inspections") == 2 and str(r.get("status", "")).startswith("ok"):
            donors.setdefault(key(r), []).append(r)
    for r in rows:
        if r.get("inspections") != 1 or not str(r.get("status", "")).startswith("ok"):
            continue
        group = donors.get(key(r), [])
        label = ", ".join(f"{c}={v}" for c, v in zip(group_cols, key(r))) or "whole fleet"
        ss = {side: similar_service_rate([d.get(f"rate_{side}_max_mm_y") for d in group], quantile=q,
                                         min_tanks=MIN_TANKS_SIMILAR) for side in ("top", "under")}
        r["similar_service_top_mm_y"], r["similar_service_under_mm_y"] = ss["top"], ss["under"]
        if all(math.isnan(v) for v in ss.values()):
            r["similar_service"] = (f"none: {len(group)} two-inspection tank(s) in group {label}, "
                                    f"fewer than {MIN_TANKS_SIMILAR}")
            continue
        z = pd.DataFrame(r.get("_zones") or {})
        if z.empty:
            continue
        own = {s: pd.to_numeric(z.get(f"rate_{s}_max_mm_y"), errors="coerce") for s in ("top", "under")}
        rate = sum((own[s].fillna(0.0) if math.isnan(ss[s]) else pd.Series(ss[s], index=z.index))
                   for s in ("top", "under"))
        margin = pd.to_numeric(z["t_min_mm"], errors="coerce") - pd.to_numeric(z["mrt_mm"], errors="coerce")
        life = (margin / rate).where(rate > 0, float("inf")).clip(lower=0)
        rec = pd.to_numeric(z["interval_recommended_y"], errors="coerce")
        new = pd.concat([rec, life.apply(rules.round_interval)], axis=1).min(axis=1, skipna=False)
        if not new.notna().any():
            continue
        i = new.idxmin()
        r["similar_service"] = (f"p{q * 100:g} of {len(group)} two-inspection tanks in group {label}: "
                                f"top {ss['top']:.3f}, under {ss['under']:.3f} mm/y")
        if new[i] < r["interval_recommended_y"] - 1e-9:
            r["interval_recommended_y"] = float(new[i])
            r["worst_zone"] = str(z.loc[i, "zone"])
            r["limiting"] = "similar-service"
            r["p_leak_at_due"] = float("nan")  # computed for the longer interval; not valid here
            if r.get("_inspected"):
                r["next_due"] = add_years(_dt.date.fromisoformat(r["_inspected"]), float(new[i])).isoformat()
            r["flags"] = ";".join(f for f in (r.get("flags", ""), "similar-service") if f)
            r["similar_service"] += f"; interval shortened to {new[i]:.1f} y (zone {z.loc[i, 'zone']})"


class FleetFailed(InputError):
    """Some tanks of a fleet failed; the outputs were written.  ``result`` holds what
    :func:`run_fleet` would return; the message is one line naming the manifest and the
    first failed row (the command exits 2)."""

    def __init__(self, message: str, result: dict):
        super().__init__(message)
        self.result = result


def run_fleet(manifest, *, out_dir, workers: int | None = None, scheduler: str | None = None,
              force: bool = False, quiet: bool = False, timeout_s: float | None = None,
              raise_on_failure: bool = True, units: str = "mm") -> dict:
    """Run every tank of a manifest on Dask; write ``fleet.csv``, ``fleet.html`` and
    ``population.csv``.  ``units`` are the display units of ``fleet.html`` and its figures
    (``"mm"`` or ``"in"``); the CSV files keep SI.

    Returns a dict with ``table`` (the ranked DataFrame), ``population``, ``summary``
    (text) and ``seconds``.  When a tank failed (bad input, fault or timeout) and
    ``raise_on_failure``, raises :class:`FleetFailed` after writing every output, so the
    command's exit status is 2.
    """
    from .io.tables import write_csv
    from .io.validate import atomic_output

    if workers is not None and workers < 1:
        raise InputError(f"--workers: must be at least 1, got {workers}")
    if timeout_s is not None and not (timeout_s > 0):
        raise InputError(f"--timeout: must be a positive number of seconds, got {timeout_s}")
    if units not in ("mm", "in"):
        raise InputError(f"--units: must be mm or in, got {units!r}")
    entries = read_manifest(manifest)
    for e, folder in zip(entries, tank_folders(entries)):
        e["folder"] = folder
    out, lock = claim_fleet_folder(out_dir, force=force)
    try:
        res = _run_fleet(entries, out, workers=workers, scheduler=scheduler, force=force, quiet=quiet,
                         timeout_s=timeout_s, write_csv=write_csv, atomic_output=atomic_output, units=units)
    finally:
        lock.close()
    df = res["table"]
    bad = df[~df["status"].astype(str).str.startswith("ok")]
    if raise_on_failure and len(bad):
        lines = {e["tank"]: e["line"] for e in entries}
        first = min((r for _, r in bad.iterrows()), key=lambda r: lines.get(r["tank"], 0))  # manifest order
        line = lines.get(first["tank"], "?")
        if not quiet:
            print(res["summary"])
        raise FleetFailed(f"{os.fspath(manifest)}:{line}: {len(bad)} of {len(df)} tanks failed (first: tank "
                          f"{first['tank']!r}: {first['error']}); see {out / 'fleet.csv'}", res)
    return res


def _run_fleet(entries, out: Path, *, workers, scheduler, force, quiet, timeout_s, write_csv, atomic_output,
               units):
    from dask.distributed import Client, LocalCluster, as_completed

    from .report.fleet_page import render_fleet_page

    t0 = time.perf_counter()
    cluster = None
    if scheduler:
        client = Client(scheduler, timeout="30s")
    else:
        n = workers or os.cpu_count() or 1
        # ":0": any free port for the status page (None still tries 8787 first and warns
        # when another cluster holds it)
        cluster = LocalCluster(n_workers=n, threads_per_worker=1, processes=True, host="127.0.0.1",
                               dashboard_address=":0")
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
                                 "inspections": 2 if e.get("old") else 1, **(e.get("groups") or {}),
                                 "error": f"no result within {timeout_s:g} s"})
    finally:
        client.close()
        if cluster is not None:
            cluster.close()
    group_cols = list(entries[0].get("groups") or {}) if entries else []
    similar_service(rows, group_cols)
    df = rank_fleet(rows)
    pop, figures = _population(df, group_cols, units)
    page = fleet_page_data(df, rows, pop, figures, units=units)
    try:
        write_csv(df, out / "fleet.csv")  # text cells neutralised against spreadsheet formulas
        write_csv(pop, out / "population.csv")
        with atomic_output(out / "fleet.html") as tmp:
            Path(tmp).write_text(render_fleet_page(page), encoding="utf-8")
    except OSError as exc:
        raise InputError(f"{exc.filename or out}: cannot write ({exc.strerror or exc})") from None
    secs = time.perf_counter() - t0
    ok = int(df["status"].astype(str).str.startswith("ok").sum())
    summary = (f"fleet: {len(df)} tanks, {ok} assessed, {len(df) - ok} failed, in {secs:.1f} s; "
               f"most urgent: {df.iloc[0]['tank']}; wrote {out / 'fleet.csv'}, {out / 'population.csv'} and "
               f"{out / 'fleet.html'}\n" + CAUTION)
    return {"table": df, "population": pop, "summary": summary, "seconds": secs}


#: What the fleet page says of its units.
UNITS_NOTE = ("This page shows the display units of the fleet command's --units (default mm); fleet.csv and "
              "population.csv keep SI (mm/y). Each tank's own report uses the display units of its job file.")


def _frame(d) -> pd.DataFrame | None:
    return None if d is None else pd.DataFrame(d)


def fleet_page_data(df: pd.DataFrame, rows: list[dict], pop: pd.DataFrame | None = None,
                    figures: list | None = None, *, units: str = "mm"):
    """What ``fleet.html`` shows (:class:`scananalyse.report.fleet_page.FleetPageData`),
    from the ranked table and the tanks' rows as :func:`run_tank` returns them (their
    ``_zones``, ``_zones_repaired``, ``_patches`` and ``_rule_changes`` keys), in the
    display ``units``."""
    from .report.fleet_page import FleetPageData, TankZones
    from .rules import RULESETS

    tanks = {}
    for r in rows:
        n, area = r.get("_patches") or (None, None)
        tanks[str(r["tank"])] = TankZones(
            zones=_frame(r.get("_zones")), zones_repaired=_frame(r.get("_zones_repaired")), n_patches=n,
            patch_area_m2=area, rule_changes=tuple(r.get("_rule_changes") or ()))
    return FleetPageData(table=df, tanks=tanks, population=pop, figures=list(figures or []),
                         rules_table=RULESETS["api653"].table(), ruleset="api653", order_rule=ORDER_RULE,
                         units=units, units_note=UNITS_NOTE, min_tanks_fit=MIN_TANKS_FIT)


def _population(df: pd.DataFrame, group_cols, units: str = "mm") -> tuple:
    """population.csv's table and the figures (caption, PNG bytes) of groups with 2+ tanks,
    the rates drawn in the display ``units``."""
    from .population import plot_population, population_table
    from .report.figures import png_bytes

    okdf = df[df["status"].astype(str).str.startswith("ok")]
    pop, details = population_table(okdf, group_cols)
    figures = []
    for col, val, side, summ, rates, names in details:
        if len(rates) < 2:
            continue
        title = f"{'all tanks' if col == 'all' else f'{col} = {val}'}, {side} side: {len(rates)} tanks"
        fig = plot_population(summ, rates, names, title=title, units=units)
        figures.append((title + f" ({summ['model']})", png_bytes(fig, 100)))
    return pop, figures
