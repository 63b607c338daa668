"""Benchmark: the whole ``compare`` on synthetic floors of growing size, against plain baselines.

For each floor diameter (default 10, 30, 60 and 100 m, all at 10 mm pitch for the
newer scan and 12.5 mm for the older one) the script

1. builds a synthetic pair with :func:`scananalyse.synth.make_pair` and writes both
   scans as HDF5 (and the newer one as CSV for the ``--csv-size`` floor), cached in
   ``--workdir`` so a re-run skips this step;
2. measures in one fresh process the plain baselines: a raw ``h5py`` read of every
   dataset of both scans, one ``numpy.nanmin`` pass over the newer grid, one full-grid
   ``skimage.registration.phase_cross_correlation(upsample_factor=10)`` of the two
   grids (NaN filled with nominal, the older grid placed on an array of the newer
   one's shape), ``pandas.read_csv`` on the CSV; and the public-API stages that have
   a direct baseline: ``read_scan`` of both, ``read_csv_scan``, ``register``;
3. runs the whole ``compare`` (report included) in another fresh process, whose
   ``ru_maxrss`` is the honest peak memory of the job (one process), and reads the per-stage
   timings the pipeline stored in ``results.h5`` (group ``timings``); with ``--job-memory``
   a second run samples the summed PSS of the main process and its helpers (the whole
   job's physical memory).

Every figure is printed as a ratio to a baseline of the same run, so the ratios
travel between machines.  Targets (issue 8): compare on the 30 m pair at most 4x
(raw read of both + one phase correlation); CSV load at most 1.3x pandas.read_csv;
peak memory at most 150 bytes per cell of the newer scan; the 60 m floor at most
4.6x the 30 m one; the 100 m floor completes.

Run::

    python bench/bench_compare.py                  # 10 30 60 100 m
    python bench/bench_compare.py --sizes 10 30    # quick
    python bench/bench_compare.py --sizes 30 --json /tmp/b.json --workdir /tmp/sa_bench
"""

from __future__ import annotations

import argparse
import functools
import importlib
import json
import os
import resource
import subprocess
import sys
import tempfile
import time

#: Targets of issue 8.
TARGET_COMPARE_X = 4.0
TARGET_CSV_X = 1.3
TARGET_BYTES_PER_CELL = 150.0
TARGET_GROWTH_60_30 = 4.6

PITCH_NEW = 10.0
PITCH_OLD = 12.5


def _maxrss_bytes() -> int:
    """Peak resident set size of this process (Linux reports kB). [bytes]"""
    return int(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss) * 1024


def _paths(workdir: str, size: float, seed: int) -> dict:
    stem = os.path.join(workdir, f"floor{size:g}m_s{seed}")
    return {"old": stem + "_old.h5", "new": stem + "_new.h5", "csv": stem + "_new.csv",
            "out": stem + "_out", "meta": stem + "_gen.json"}


def _best(fn, repeat: int) -> float:
    """Shortest wall time of ``repeat`` calls. [s]"""
    best = float("inf")
    for _ in range(max(1, repeat)):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


# --------------------------------------------------------------------------------------
# children (each in a fresh process)
# --------------------------------------------------------------------------------------
def child_gen(size: float, workdir: str, seed: int, csv: bool) -> dict:
    from scananalyse.io import write_csv_scan, write_h5_scan
    from scananalyse.synth import make_pair

    p = _paths(workdir, size, seed)
    t0 = time.perf_counter()
    pair = make_pair(diameter_mm=size * 1000.0, pitch_new=PITCH_NEW, pitch_old=PITCH_OLD, seed=seed)
    t_gen = time.perf_counter() - t0
    t0 = time.perf_counter()
    write_h5_scan(pair.new, p["new"])
    write_h5_scan(pair.old, p["old"])
    t_h5 = time.perf_counter() - t0
    t_csv = None
    if csv:
        t0 = time.perf_counter()
        write_csv_scan(pair.new, p["csv"])
        t_csv = time.perf_counter() - t0
    out = {"size_m": size, "rows": pair.new.shape[0], "cols": pair.new.shape[1],
           "cells_new": int(pair.new.thickness.size), "scanned_new": pair.new.n_scanned,
           "cells_old": int(pair.old.thickness.size), "t_generate_s": t_gen, "t_write_h5_s": t_h5,
           "t_write_csv_s": t_csv, "gen_maxrss_bytes": _maxrss_bytes(),
           "h5_bytes": os.path.getsize(p["new"]) + os.path.getsize(p["old"]),
           "csv_bytes": os.path.getsize(p["csv"]) if csv else None}
    with open(p["meta"], "w") as fh:
        json.dump(out, fh)
    return out


def _header_lines(path: str) -> int:
    k = 0
    with open(path, "rb") as fh:
        for raw in fh:
            if not raw.startswith(b"#"):
                break
            k += 1
    return k


def child_base(size: float, workdir: str, seed: int, repeat: int, csv: bool) -> dict:
    import warnings

    import h5py
    import numpy as np
    from skimage.registration import phase_cross_correlation

    from scananalyse.io import read_csv_scan, read_scan
    from scananalyse.register import register

    p = _paths(workdir, size, seed)

    def raw_read():
        arrays = []
        for path in (p["new"], p["old"]):
            with h5py.File(path, "r") as f:
                for name in f:
                    arrays.append(f[name][()])
        return arrays

    raw_read()  # page cache warm for both contenders
    t_raw = _best(raw_read, repeat)
    t_load = _best(lambda: (read_scan(p["new"]), read_scan(p["old"])), repeat)
    new, old = read_scan(p["new"]), read_scan(p["old"])
    t_pass = _best(lambda: np.nanmin(new.thickness), max(repeat, 5))

    nom = new.meta.nominal
    a = np.nan_to_num(new.thickness, nan=nom)
    b = np.full(new.shape, nom, dtype=np.float32)
    r, c = min(new.shape[0], old.shape[0]), min(new.shape[1], old.shape[1])
    b[:r, :c] = np.nan_to_num(old.thickness[:r, :c], nan=nom)
    # the first call in the process (as `compare` runs once per process), then the best of
    # two more: the first pays the page faults of its ~1.4 GB of fresh FFT buffers, which
    # cost 0.5-1.1 s more or less depending on the machine's memory state (seen: 0.53-1.67 s)
    pcc = functools.partial(phase_cross_correlation, a, b, upsample_factor=10)
    del a, b
    t_pcc = _best(pcc, 1)
    t_pcc_warm = min(t_pcc, _best(pcc, 2))
    del pcc

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        t0 = time.perf_counter()
        reg = register(new, old)
        t_reg = time.perf_counter() - t0
    out = {"t_raw_read_s": t_raw, "t_read_scan_s": t_load, "t_numpy_pass_s": t_pass, "t_pcc_s": t_pcc,
           "t_pcc_warm_s": t_pcc_warm,
           "t_register_s": t_reg, "register_reliable": bool(reg.reliable),
           "register_method": reg.to_dict().get("method")}
    if csv:
        import pandas as pd

        skip = _header_lines(p["csv"])
        pd.read_csv(p["csv"], skiprows=skip)  # page cache
        t_pd, t_ours = float("inf"), float("inf")
        for _ in range(max(1, repeat)):  # interleaved: load from elsewhere hits both alike
            t_pd = min(t_pd, _best(lambda: pd.read_csv(p["csv"], skiprows=skip), 1))
            t_ours = min(t_ours, _best(lambda: read_csv_scan(p["csv"]), 1))
        out.update({"t_pandas_read_csv_s": t_pd, "t_read_csv_scan_s": t_ours})
    out["base_maxrss_bytes"] = _maxrss_bytes()
    return out


def child_run(size: float, workdir: str, seed: int) -> dict:
    import warnings

    import h5py

    from scananalyse.job import Job
    from scananalyse.runner import compare

    for name in ("assess", "extremes", "indications", "rates", "register", "repair", "zones", "report.figures",
                 "report.html"):
        importlib.import_module(f"scananalyse.{name}")  # loaded before the memory is read

    rss_imports = _maxrss_bytes()  # the interpreter and libraries, before any grid exists
    p = _paths(workdir, size, seed)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        t0 = time.perf_counter()
        res = compare(p["old"], p["new"], job=Job(diameter=size * 1000.0), out_dir=p["out"], force=True,
                      quiet=True)
        t_total = time.perf_counter() - t0
    rss = _maxrss_bytes()
    with h5py.File(os.path.join(p["out"], "results.h5"), "r") as f:
        stages = {k: float(v) for k, v in f["timings"].attrs.items()} if "timings" in f else {}
    figs = [n for n in res.files if n.startswith("figures/")]
    # results.h5 is written during "outputs", before that stage and "report" end: the
    # rest of the wall time is theirs.
    stages["outputs+report"] = max(0.0, t_total - sum(stages.values()))
    return {"t_compare_s": t_total, "stages_s": stages, "run_maxrss_bytes": rss,
            "helper_private_bytes": [],
            "import_maxrss_bytes": rss_imports, "n_figures": len(figs),
            "report_bytes": os.path.getsize(res.report_path), "n_patches": int(len(res.patches)),
            "n_indications": int(len(res.indications))}


# --------------------------------------------------------------------------------------
# parent
# --------------------------------------------------------------------------------------
def _spawn(args: list[str]) -> dict:
    cmd = [sys.executable, os.path.abspath(__file__), "--child", *args]
    proc = subprocess.run(cmd, capture_output=True, text=True)
    if proc.returncode != 0:
        sys.stderr.write(proc.stderr[-4000:])
        return {"error": f"child {args[0]} exited with {proc.returncode}"}
    for line in reversed(proc.stdout.splitlines()):
        if line.startswith("RESULT "):
            return json.loads(line[7:])
    return {"error": f"child {args[0]} printed no result"}


def _pss_kb(pid: int) -> int:
    """Proportional set size of one process (its private pages plus its share of the pages
    it shares): summed over processes, the physical memory they use together. [kB]"""
    try:
        with open(f"/proc/{pid}/smaps_rollup") as fh:
            for line in fh:
                if line.startswith("Pss:"):
                    return int(line.split()[1])
    except OSError:
        pass
    return 0


def _descendants(pid: int) -> list[int]:
    out, todo = [], [pid]
    while todo:
        p = todo.pop()
        try:
            with open(f"/proc/{p}/task/{p}/children") as fh:
                kids = [int(c) for c in fh.read().split()]
        except OSError:
            kids = []
        out += kids
        todo += kids
    return out


def _spawn_sampled(args: list[str], interval: float = 0.05) -> dict:
    """Like :func:`_spawn`, while sampling the summed PSS of the child and every process
    it forks (the figure helpers): the whole job's physical memory, its peak returned as
    ``job_pss_peak_bytes``.  Reading /proc costs CPU, so this run's times are not used."""
    cmd = [sys.executable, os.path.abspath(__file__), "--child", *args]
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    peak = 0
    while proc.poll() is None:
        total = _pss_kb(proc.pid) + sum(_pss_kb(c) for c in _descendants(proc.pid))
        peak = max(peak, total)
        time.sleep(interval)
    out, err = proc.communicate()
    if proc.returncode != 0:
        sys.stderr.write(err[-4000:])
        return {"error": f"child {args[0]} exited with {proc.returncode}"}
    return {"job_pss_peak_bytes": peak * 1024}


def _ratio(a, b) -> str:
    if a is None or b is None or not b:
        return "-"
    return f"{a / b:.2f}x"


def _verdict(ok: bool) -> str:
    return "ok" if ok else "MISSED"


def run_all(sizes, workdir, seed, repeat, csv_size, regen, job_memory=False) -> list[dict]:
    rows = []
    for size in sizes:
        p = _paths(workdir, size, seed)
        want_csv = csv_size is not None and abs(size - csv_size) < 1e-9
        row: dict = {"size_m": size}
        have = os.path.exists(p["meta"]) and os.path.exists(p["new"]) and (not want_csv or os.path.exists(p["csv"]))
        if regen or not have:
            print(f"[{size:g} m] generating the synthetic pair ...", flush=True)
            g = _spawn(["gen", f"{size}", workdir, f"{seed}", "1" if want_csv else "0"])
        else:
            with open(p["meta"]) as fh:
                g = json.load(fh)
        row.update(g)
        if "error" in g:
            rows.append(row)
            continue
        print(f"[{size:g} m] grid {g['rows']} x {g['cols']} ({g['cells_new'] / 1e6:.1f} M cells, "
              f"{g['scanned_new'] / 1e6:.1f} M scanned); baselines ...", flush=True)
        row.update(_spawn(["base", f"{size}", workdir, f"{seed}", f"{repeat}", "1" if want_csv else "0"]))
        print(f"[{size:g} m] compare ...", flush=True)
        row.update(_spawn(["run", f"{size}", workdir, f"{seed}"]))
        if job_memory and "t_compare_s" in row:
            print(f"[{size:g} m] compare again, sampling the whole job's memory ...", flush=True)
            row.update(_spawn_sampled(["run", f"{size}", workdir, f"{seed}"]))
        rows.append(row)
        _print_row(row)
    return rows


def _print_row(r: dict) -> None:
    if "t_compare_s" not in r:
        print(f"  {r['size_m']:g} m: FAILED ({r.get('error', '?')})")
        return
    base = r["t_raw_read_s"] + r["t_pcc_s"]
    print(f"  {r['size_m']:g} m: compare {r['t_compare_s']:.2f} s = {_ratio(r['t_compare_s'], base)} "
          f"(raw read {r['t_raw_read_s']:.2f} s + phase correlation {r['t_pcc_s']:.2f} s); "
          f"peak {r['run_maxrss_bytes'] / 2**30:.2f} GiB = {r['run_maxrss_bytes'] / r['cells_new']:.0f} B/cell "
          f"({(r['run_maxrss_bytes'] - r['import_maxrss_bytes']) / r['cells_new']:.0f} B/cell above the "
          f"{r['import_maxrss_bytes'] / 2**20:.0f} MiB of the imported libraries)")
    if r.get("t_pcc_warm_s"):
        warm = r["t_raw_read_s"] + r["t_pcc_warm_s"]
        print(f"    against the phase correlation's best of three ({r['t_pcc_warm_s']:.2f} s): "
              f"{_ratio(r['t_compare_s'], warm)}")
    if r.get("job_pss_peak_bytes"):
        print(f"    whole job (main process and figure helpers, summed PSS sampled every 50 ms): "
              f"peak {r['job_pss_peak_bytes'] / r['cells_new']:.0f} B/cell")
    if r.get("helper_private_bytes"):
        print("    figure helper's private memory (the largest after a job, on top of the main process): "
              + ", ".join(f"{b / r['cells_new']:.0f} B/cell" for b in r["helper_private_bytes"]))
    st = r.get("stages_s", {})
    npass = r["t_numpy_pass_s"]
    print("    stages [s] (and x one numpy pass of " f"{npass * 1e3:.1f} ms): "
          + ", ".join(f"{k} {v:.2f} ({v / npass:.0f}x)" for k, v in st.items()))
    print(f"    read_scan both {r['t_read_scan_s']:.2f} s = {_ratio(r['t_read_scan_s'], r['t_raw_read_s'])} raw h5py; "
          f"register {r['t_register_s']:.2f} s = {_ratio(r['t_register_s'], r['t_pcc_s'])} phase correlation "
          f"({'reliable' if r['register_reliable'] else 'UNRELIABLE'}, {r['register_method']})")
    if r.get("t_pandas_read_csv_s"):
        print(f"    CSV: read_csv_scan {r['t_read_csv_scan_s']:.2f} s = "
              f"{_ratio(r['t_read_csv_scan_s'], r['t_pandas_read_csv_s'])} pandas.read_csv "
              f"({r['t_pandas_read_csv_s']:.2f} s)")


def summary(rows: list[dict]) -> str:
    """Markdown table of the figures and the verdict on each target."""
    lines = ["| floor | grid (M cells) | compare [s] | × (raw read + PCC) | raw read [s] | PCC [s] | "
             "PCC best of 3 [s] | × (raw read + PCC best of 3) | "
             "numpy pass [ms] | load × raw | register × PCC | CSV × pandas | peak [GiB] | B/cell | B/cell net |",
             "|---|---|---|---|---|---|---|---|---|---|---|---|---|---|---|"]
    by = {r["size_m"]: r for r in rows}
    for r in rows:
        if "t_compare_s" not in r:
            lines.append(f"| {r['size_m']:g} m | - | failed: {r.get('error', '?')} |" + " |" * 12)
            continue
        base = r["t_raw_read_s"] + r["t_pcc_s"]
        csvr = _ratio(r.get("t_read_csv_scan_s"), r.get("t_pandas_read_csv_s"))
        lines.append(
            f"| {r['size_m']:g} m | {r['cells_new'] / 1e6:.1f} | {r['t_compare_s']:.2f} | "
            f"{r['t_compare_s'] / base:.2f} | {r['t_raw_read_s']:.2f} | {r['t_pcc_s']:.2f} | "
            f"{r.get('t_pcc_warm_s', float('nan')):.2f} | "
            f"{r['t_compare_s'] / (r['t_raw_read_s'] + r.get('t_pcc_warm_s', float('nan'))):.2f} | "
            f"{r['t_numpy_pass_s'] * 1e3:.1f} | {_ratio(r['t_read_scan_s'], r['t_raw_read_s'])} | "
            f"{_ratio(r['t_register_s'], r['t_pcc_s'])} | {csvr} | {r['run_maxrss_bytes'] / 2**30:.2f} | "
            f"{r['run_maxrss_bytes'] / r['cells_new']:.0f} | "
            f"{(r['run_maxrss_bytes'] - r['import_maxrss_bytes']) / r['cells_new']:.0f} |")
    lines.append("")
    stage_names = []
    for r in rows:
        for k in r.get("stages_s", {}):
            if k not in stage_names:
                stage_names.append(k)
    if stage_names:
        lines.append("| floor | " + " | ".join(stage_names) + " |")
        lines.append("|---|" + "---|" * len(stage_names))
        for r in rows:
            st = r.get("stages_s")
            if st:
                lines.append(f"| {r['size_m']:g} m | " + " | ".join(f"{st.get(k, float('nan')):.2f}" for k in stage_names) + " |")
        lines.append("")
    lines.append("Targets:")
    if 30.0 in by and "t_compare_s" in by[30.0]:
        r = by[30.0]
        x = r["t_compare_s"] / (r["t_raw_read_s"] + r["t_pcc_s"])
        lines.append(f"- compare on 30 m ≤ {TARGET_COMPARE_X:g}× (raw read + PCC): {x:.2f}× {_verdict(x <= TARGET_COMPARE_X)}")
        if r.get("t_pcc_warm_s"):
            xw = r["t_compare_s"] / (r["t_raw_read_s"] + r["t_pcc_warm_s"])
            lines.append(f"- compare on 30 m ≤ {TARGET_COMPARE_X:g}× (raw read + PCC best of three): {xw:.2f}× "
                         f"{_verdict(xw <= TARGET_COMPARE_X)}")
    for r in rows:
        if r.get("t_pandas_read_csv_s"):
            x = r["t_read_csv_scan_s"] / r["t_pandas_read_csv_s"]
            lines.append(f"- CSV load ≤ {TARGET_CSV_X:g}× pandas.read_csv ({r['size_m']:g} m): {x:.2f}× "
                         f"{_verdict(x <= TARGET_CSV_X)}")
    for r in rows:
        if "run_maxrss_bytes" in r and r["cells_new"] >= 5e6:  # below that the libraries dominate
            b = r["run_maxrss_bytes"] / r["cells_new"]
            lines.append(f"- peak memory ≤ {TARGET_BYTES_PER_CELL:g} B/cell ({r['size_m']:g} m): {b:.0f} "
                         f"{_verdict(b <= TARGET_BYTES_PER_CELL)} (main process)")
            if r.get("job_pss_peak_bytes"):
                j = r["job_pss_peak_bytes"] / r["cells_new"]
                lines.append(f"- peak memory ≤ {TARGET_BYTES_PER_CELL:g} B/cell ({r['size_m']:g} m), whole job with "
                             f"the figure helpers: {j:.0f} {_verdict(j <= TARGET_BYTES_PER_CELL)}")
    if all(s in by and "t_compare_s" in by[s] for s in (30.0, 60.0)):
        x = by[60.0]["t_compare_s"] / by[30.0]["t_compare_s"]
        cells = by[60.0]["cells_new"] / by[30.0]["cells_new"]
        lines.append(f"- growth 60 m ÷ 30 m ≤ {TARGET_GROWTH_60_30:g}× (cells ×{cells:.2f}): {x:.2f}× "
                     f"{_verdict(x <= TARGET_GROWTH_60_30)}")
    if 100.0 in by:
        lines.append(f"- 100 m completes: {_verdict('t_compare_s' in by[100.0])}")
    return "\n".join(lines)


def main(argv=None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    if argv and argv[0] == "--child":
        kind, rest = argv[1], argv[2:]
        size, workdir, seed = float(rest[0]), rest[1], int(rest[2])
        if kind == "gen":
            out = child_gen(size, workdir, seed, rest[3] == "1")
        elif kind == "base":
            out = child_base(size, workdir, seed, int(rest[3]), rest[4] == "1")
        else:
            out = child_run(size, workdir, seed)
        print("RESULT " + json.dumps(out))
        return 0
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", type=float, nargs="+", default=[10.0, 30.0, 60.0, 100.0],
                    help="floor diameters [m]")
    ap.add_argument("--csv-size", type=float, default=30.0, help="floor also written and read as CSV [m]")
    ap.add_argument("--workdir", default=os.path.join(tempfile.gettempdir(), "scananalyse_bench"),
                    help="where the synthetic scans and outputs are kept between runs")
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--repeat", type=int, default=3, help="best of N for the read baselines")
    ap.add_argument("--regen", action="store_true", help="rebuild the synthetic scans")
    ap.add_argument("--json", help="also write the raw figures to this file")
    ap.add_argument("--job-memory", action="store_true",
                    help="run each compare a second time, sampling the memory of the main process and "
                         "its figure helpers together (Linux /proc; that run's times are not used)")
    args = ap.parse_args(argv)
    os.makedirs(args.workdir, exist_ok=True)
    rows = run_all(args.sizes, args.workdir, args.seed, args.repeat, args.csv_size, args.regen,
                   job_memory=args.job_memory)
    print()
    print(summary(rows))
    if args.json:
        with open(args.json, "w") as fh:
            json.dump(rows, fh, indent=1)
    return 0


if __name__ == "__main__":
    sys.exit(main())
