"""Fleet benchmark: one synthetic fleet of small tanks run with 1 and with 2 Dask workers.

Usage: python bench/bench_fleet.py [--tanks 40] [--diameter 4000] [--pitch 25] [--single-every 4]

Each tank is ``scananalyse.synth.make_pair(diameter_mm=4000, pitch_new=25, pitch_old=25)``
written with ``scananalyse.io.write_scan``; every ``--single-every``-th tank has one
inspection only (so the similar-service step and the population fits run too).  For each
worker count a LocalCluster (processes, one thread each, no dashboard) is started, the fleet
is run on it through ``--scheduler``-style use of ``run_fleet``, and the peak resident memory
of each worker process (``ru_maxrss``) is read back.  Prints the wall time of each run
(cluster start excluded), the speed-up of 2 workers over 1 (the issue asks >= 1.6x for 200
tanks) and the memory per worker.
"""

import argparse
import os
import shutil
import tempfile
import time
from pathlib import Path

os.environ.setdefault("MPLBACKEND", "Agg")


def _peak_rss_mb():
    import resource

    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # kB on Linux


def main():
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--tanks", type=int, default=40)
    ap.add_argument("--diameter", type=float, default=4000.0)
    ap.add_argument("--pitch", type=float, default=25.0)
    ap.add_argument("--single-every", type=int, default=4)
    ap.add_argument("--workers", default="1,2", help="worker counts to run, comma-separated")
    args = ap.parse_args()

    from dask.distributed import Client, LocalCluster

    from scananalyse.fleet import run_fleet
    from scananalyse.io import write_scan
    from scananalyse.synth import make_pair

    d = Path(tempfile.mkdtemp(prefix="bench_fleet_"))
    try:
        t = time.perf_counter()
        rows = ["tank,old,new,diameter,service"]
        for i in range(args.tanks):
            tank = f"BT-{i + 1:03d}"
            pair = make_pair(diameter_mm=args.diameter, pitch_new=args.pitch, pitch_old=args.pitch,
                             seed=100 + i, tank=tank, general_rate_under=0.004 + 0.002 * (i % 5))
            (d / tank).mkdir()
            write_scan(pair.new, d / tank / "new.h5")
            single = args.single_every > 0 and i % args.single_every == args.single_every - 1
            if not single:
                write_scan(pair.old, d / tank / "old.h5")
            service = ("crude", "product")[i % 2]
            rows.append(f"{tank},{'' if single else tank + '/old.h5'},{tank}/new.h5,{args.diameter},{service}")
        (d / "manifest.csv").write_text("\n".join(rows) + "\n")
        cells = pair.new.shape[0] * pair.new.shape[1]
        print(f"{args.tanks} tanks written in {time.perf_counter() - t:.1f} s; {cells} cells per newer scan; "
              f"os.cpu_count()={os.cpu_count()}")
        times = {}
        for workers in (int(w) for w in args.workers.split(",")):
            cluster = LocalCluster(n_workers=workers, threads_per_worker=1, processes=True, host="127.0.0.1",
                                   dashboard_address=":0")
            client = Client(cluster)
            try:
                t = time.perf_counter()
                res = run_fleet(d / "manifest.csv", out_dir=d / f"out{workers}", scheduler=cluster.scheduler_address,
                                quiet=True, raise_on_failure=False)
                times[workers] = time.perf_counter() - t
                mem = client.run(_peak_rss_mb)
            finally:
                client.close()
                cluster.close()
            st = res["table"]["status"].astype(str)
            print(f"{workers} worker(s): {times[workers]:.1f} s for {args.tanks} tanks "
                  f"({int(st.str.startswith('ok').sum())} ok, {times[workers] / args.tanks:.2f} s/tank); "
                  f"peak RSS per worker: " + ", ".join(f"{v:.0f} MB" for v in mem.values()))
        if 1 in times and 2 in times:
            print(f"speed-up 2 workers vs 1: {times[1] / times[2]:.2f}x (issue target >= 1.6x on 200 tanks)")
    finally:
        shutil.rmtree(d, ignore_errors=True)


if __name__ == "__main__":
    main()
