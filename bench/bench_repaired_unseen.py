"""The repaired floor's life distribution with the unscanned part kept as found, against
the same part redrawn on the repaired floor (its rates from the repaired cells).

    PYTHONPATH=. python bench/bench_repaired_unseen.py [first] [last]   (default seeds 30..37)

5 m synthetic floors with 4 pits planted in unscanned ground, MFL on odd seeds, UT on even;
prints each zone's p05 and p50 of the time to MRT in zones_repaired.csv (kept as found) and
redrawn.
"""

from __future__ import annotations

import sys
import warnings

from scananalyse import pipeline
from scananalyse.job import Job
from scananalyse.synth import make_pair


def main(first=30, last=38):
    calls = []
    inner = pipeline.life_distributions

    def spy(*a, **kw):
        calls.append((a, kw))
        return inner(*a, **kw)

    pipeline.life_distributions = spy
    try:
        for seed in range(first, last):
            method = "MFL" if seed % 2 else "UT"
            pair = make_pair(diameter_mm=5000.0, pitch_new=20.0, pitch_old=25.0, seed=seed, method=method,
                             threshold=1.0 if method == "MFL" else None, n_hidden_pits=4, max_pit_rate=0.15)
            calls.clear()
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                an = pipeline.analyse(pair.new, pair.old, job=Job(diameter=5000.0))
            args, kw = calls[1]  # the repaired floor's call
            fresh = inner(*args, **{k: v for k, v in kw.items() if k != "as_found"})
            kept = an.zones_repaired.set_index("zone")
            for name, d in fresh.items():
                if d.ok:
                    q = d.quantiles()
                    print(f"{seed} {method} {name}: kept as found p05 {kept.loc[name, 'life_p05_y']:.2f} "
                          f"p50 {kept.loc[name, 'life_p50_y']:.2f} | redrawn p05 {q[0]:.2f} p50 {q[1]:.2f}")
    finally:
        pipeline.life_distributions = inner


if __name__ == "__main__":
    a = [int(x) for x in sys.argv[1:3]]
    main(*a)
