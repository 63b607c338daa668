"""Cost of the probability stage on a synthetic floor, and a hash of its draws.

    PYTHONPATH=. python bench/bench_probability_cost.py ratio --method MFL
    PYTHONPATH=. python bench/bench_probability_cost.py capture --method UT --out inputs.pkl
    PYTHONPATH=. python bench/bench_probability_cost.py hash inputs.pkl [--profile]

``ratio``: one analysis with a timer around both ``life_distributions`` calls (as found,
as repaired); prints the time in them ÷ the rest of the analysis.  ``capture``: saves the
two calls' arguments.  ``hash``: reruns the saved calls and prints a hash of every zone's
draws (and, with ``--profile``, a cProfile of them).
"""

from __future__ import annotations

import argparse
import hashlib
import pickle
import time
import warnings

import numpy as np

from scananalyse import pipeline
from scananalyse.job import Job
from scananalyse.synth import make_pair


def _analyse(method, diameter, seed, record):
    pair = make_pair(diameter_mm=diameter, pitch_new=20.0, pitch_old=25.0, seed=seed, max_pit_rate=0.15,
                     method=method, threshold=1.0 if method == "MFL" else None)
    inner = pipeline.life_distributions

    def timed(*a, **kw):
        t0, c0 = time.perf_counter(), time.process_time()
        out = inner(*a, **kw)
        record.append((time.perf_counter() - t0, a, kw, time.process_time() - c0))
        return out

    pipeline.life_distributions = timed
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            t0, c0 = time.perf_counter(), time.process_time()
            pipeline.analyse(pair.new, pair.old, job=Job(diameter=diameter))
            return time.perf_counter() - t0, time.process_time() - c0
    finally:
        pipeline.life_distributions = inner


def draws_hash(dists) -> str:
    h = hashlib.sha256()
    for name in sorted(dists):
        d = dists[name]
        h.update(name.encode())
        h.update(np.ascontiguousarray(d.life_mrt).tobytes())
        h.update(np.ascontiguousarray(d.life_leak).tobytes())
    return h.hexdigest()[:16]


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("mode", choices=["ratio", "capture", "hash"])
    ap.add_argument("path", nargs="?")
    ap.add_argument("--method", default="MFL")
    ap.add_argument("--diameter", type=float, default=30000.0)
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--out")
    ap.add_argument("--profile", action="store_true")
    a = ap.parse_args()
    if a.mode == "hash":
        with open(a.path, "rb") as f:
            calls = pickle.load(f)
        if a.profile:
            import cProfile
            import pstats
            pr = cProfile.Profile()
            pr.enable()
        t0 = time.perf_counter()
        hashes = [draws_hash(pipeline.life_distributions(*args, **kw)) for args, kw in calls]
        dt = time.perf_counter() - t0
        if a.profile:
            pr.disable()
            pstats.Stats(pr).sort_stats("tottime").print_stats(30)
        print("hashes", *hashes, f"seconds {dt:.2f}")
        return
    record = []
    total, cpu = _analyse(a.method, a.diameter, a.seed, record)
    t_prob = sum(r[0] for r in record)
    c_prob = sum(r[3] for r in record)
    # CPU seconds too: on a shared machine the wall clock also counts the other processes' turns
    print(f"method {a.method} total {total:.2f} s probability {t_prob:.2f} s ratio {t_prob / (total - t_prob):.3f}"
          f" cpu: total {cpu:.2f} s probability {c_prob:.2f} s ratio {c_prob / (cpu - c_prob):.3f}")
    if a.mode == "capture":
        with open(a.out, "wb") as f:
            pickle.dump([(r[1], r[2]) for r in record], f)


if __name__ == "__main__":
    main()
