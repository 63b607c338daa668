"""Longer fuzzing of the scan readers (see docs/reliability.md, "Fuzzing").

Three targets, each checking the same contract: a reader either returns a valid
FloorScan or raises ``InputError`` with one line naming the file.  Any other
exception, or any warning other than ``ScanWarning``, is a failure; the input is
saved under ``--crashes`` with a ``.txt`` note of the error.

* ``csv-mutate``: mutation fuzzing of floor-scan CSV files (seeded
  ``numpy.random.default_rng``): byte flips, inserted awkward tokens, deleted,
  duplicated and swapped lines, truncation, line-ending changes, re-encoding.
  The seed files are valid scans made by ``scananalyse.synth`` and by hand.
* ``h5-mutate``: the same for floor-scan HDF5 files (byte flips and block
  overwrites in a valid file, truncation).  The input being read is always in
  ``CRASHES/current.h5``, so a hard crash of the HDF5 library leaves its reproducer.
* ``csv-grammar``: hypothesis, with the grammar of ``tests/test_fuzz.py`` and
  as many examples as asked.

Usage (from the repository root, venv active)::

    python fuzz/fuzz_readers.py csv-mutate --seconds 300 --seed 1
    python fuzz/fuzz_readers.py h5-mutate --iterations 20000
    python fuzz/fuzz_readers.py csv-grammar --iterations 20000
    python fuzz/fuzz_readers.py all --seconds 120

Exit status 0 when no failure was found, 1 otherwise.
"""

from __future__ import annotations

import argparse
import datetime as dt
import hashlib
import multiprocessing as mp
import sys
import tempfile
import time
import traceback
import warnings
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))

from scananalyse.errors import InputError, ScanWarning  # noqa: E402
from scananalyse.io import read_csv_scan, read_h5_scan, write_csv_scan, write_h5_scan  # noqa: E402
from scananalyse.scan import FloorScan, ScanMeta  # noqa: E402

TOKENS = [b",", b"\n", b"\r\n", b"\r", b"#", b":", b"# format: scananalyse-scan 1\n", b"nan", b"-inf", b"1e309",
          b"-0", b"0", b"\"", b"\"\"", b"\xef\xbb\xbf", b"\x00", b"\xff\xfe", b"\xc3", b" ", b"\t", b"1_0", b"0x1F",
          b"\xd9\xa1", b"9" * 40, b",,,,", b"top", b"under", b"# x0: 1e300\n", b"# rows: 99999999\n",
          b"# units: in\n", b"# pitch: 1e-300\n", b"\xe2\x80\xa8"]


def seed_files_csv(tmp: Path) -> list[bytes]:
    """Valid CSV scans to mutate: two synthetic floors and a hand-made one."""
    from scananalyse.synth import make_scan

    out = []
    for k, (d, p) in enumerate([(1500.0, 50.0), (1200.0, 40.0)]):
        scan, _ = make_scan(diameter_mm=d, pitch=p, seed=k, shell_margin_mm=50.0)
        path = tmp / f"seed{k}.csv"
        write_csv_scan(scan, path)
        out.append(path.read_bytes())
    meta = ScanMeta(inspected=dt.date(2027, 5, 14), nominal=0.25 * 25.4, units="in", tank="TK-FZ", method="UT",
                    threshold=None, sigma=0.1, installed=dt.date(1999, 1, 1), extra={"crew": "invented"})
    rng = np.random.default_rng(0)
    t = rng.uniform(2, 6, (4, 5)).astype(np.float32)
    t[1, 2] = np.nan
    path = tmp / "seed_in.csv"
    write_csv_scan(FloorScan(t, x0=-12.7, y0=25.4, pitch=12.7, meta=meta, side=rng.integers(0, 3, (4, 5))), path)
    out.append(path.read_bytes())
    return out


def seed_file_h5(tmp: Path) -> bytes:
    from scananalyse.synth import make_scan

    scan, _ = make_scan(diameter_mm=1500.0, pitch=50.0, seed=3, shell_margin_mm=50.0)
    path = tmp / "seed.h5"
    write_h5_scan(scan, path)
    return path.read_bytes()


def mutate(data: bytes, rng: np.random.Generator, *, text: bool) -> bytes:
    b = bytearray(data)
    for _ in range(int(rng.integers(1, 5))):
        if not b:
            b = bytearray(TOKENS[int(rng.integers(0, len(TOKENS)))] or b"#")
        op = int(rng.integers(0, 8 if text else 4))
        if op == 0:  # flip bytes
            for _ in range(int(rng.integers(1, 4))):
                b[int(rng.integers(0, len(b)))] = int(rng.integers(0, 256))
        elif op == 1:  # truncate
            del b[int(rng.integers(0, len(b))):]
        elif op == 2:  # overwrite a block with random bytes
            i = int(rng.integers(0, len(b)))
            n = int(rng.integers(1, 64))
            b[i:i + n] = rng.integers(0, 256, n, dtype=np.uint8).tobytes()
        elif op == 3:  # insert a token
            i = int(rng.integers(0, len(b) + 1))
            b[i:i] = TOKENS[int(rng.integers(0, len(TOKENS)))]
        else:
            lines = bytes(b).split(b"\n")
            k = int(rng.integers(0, len(lines)))
            m = int(rng.integers(0, len(lines)))
            if op == 4:
                del lines[k]
            elif op == 5:
                lines.insert(k, lines[m])
            elif op == 6:
                lines[k], lines[m] = lines[m], lines[k]
            else:  # change line endings or the encoding of the whole file
                choice = int(rng.integers(0, 3))
                if choice == 0:
                    return b"\r\n".join(lines)
                if choice == 1:
                    return b"\r".join(lines)
                try:
                    return bytes(b).decode("utf-8").encode("utf-16")
                except UnicodeDecodeError:
                    return bytes(b)
            b = bytearray(b"\n".join(lines))
    return bytes(b)


def check_scan(scan: FloorScan) -> None:
    t = scan.thickness
    fin = np.isfinite(t)
    assert fin.any(), "no scanned cell"
    assert np.all(t[fin] > 0), "non-positive thickness accepted"
    assert np.all(t[fin] <= 3 * scan.meta.nominal * (1 + 1e-6)), "absurd thickness accepted"
    assert np.isfinite(scan.pitch) and scan.pitch > 0, "bad pitch accepted"
    assert np.isfinite(scan.x0) and np.isfinite(scan.y0), "bad anchor accepted"
    if scan.side is not None:
        assert scan.side.min() >= 0 and scan.side.max() <= 2, "bad side code accepted"


def run_one(reader, path: Path) -> str:
    """'ok', 'refused', or raises the failure."""
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        warnings.simplefilter("ignore", ScanWarning)
        try:
            scan = reader(path)
        except InputError as exc:
            msg = str(exc)
            assert "\n" not in msg and "\r" not in msg, f"multi-line message: {msg!r}"
            assert msg.startswith(str(path)), f"message does not start with the file: {msg!r}"
            return "refused"
    check_scan(scan)
    return "ok"


def signature(exc: BaseException) -> str:
    tb = traceback.extract_tb(exc.__traceback__)
    frame = next((f for f in reversed(tb) if "scananalyse" in f.filename), tb[-1] if tb else None)
    where = f"{Path(frame.filename).name}:{frame.lineno}" if frame else "?"
    return f"{type(exc).__name__} at {where}"


def _worker(conn, kind: str) -> None:
    """Child process: read each path sent, answer (outcome, signature, text)."""
    reader = read_csv_scan if kind == "csv" else read_h5_scan
    while True:
        path = conn.recv()
        if path is None:
            return
        try:
            conn.send((run_one(reader, Path(path)), "", ""))
        except Exception as exc:  # noqa: BLE001 - every other outcome is the finding
            conn.send(("failed", signature(exc), "".join(traceback.format_exception(exc))))


class _Reader:
    """The reader in a child process, so that an input on which the reader never returns
    (a loop inside the HDF5 C library holds the interpreter lock) is detected and skipped."""

    def __init__(self, kind: str):
        self.kind = kind
        self._start()

    def _start(self):
        ctx = mp.get_context("spawn")
        self.conn, child = ctx.Pipe()
        self.proc = ctx.Process(target=_worker, args=(child, self.kind), daemon=True)
        self.proc.start()

    def read(self, path: Path, timeout: float):
        self.conn.send(str(path))
        if self.conn.poll(timeout):
            try:
                return self.conn.recv()
            except EOFError:
                pass
            outcome = ("failed", "process died (hard crash of a C library)", "")
        else:
            outcome = ("failed", f"hang: no answer within {timeout:g} s", "")
        self.proc.kill()
        self.proc.join()
        self._start()
        return outcome

    def close(self):
        self.conn.send(None)
        self.proc.join(5)


def fuzz_mutate(kind: str, *, seconds: float, iterations: int, seed: int, crashes: Path,
                hang_s: float = 30.0) -> dict:
    rng = np.random.default_rng(seed)
    crashes.mkdir(parents=True, exist_ok=True)
    with tempfile.TemporaryDirectory() as d:
        tmp = Path(d)
        seeds = seed_files_csv(tmp) if kind == "csv" else [seed_file_h5(tmp)]
    work = crashes / ("current.csv" if kind == "csv" else "current.h5")
    counts = {"ok": 0, "refused": 0, "failed": 0}
    failures: dict[str, str] = {}
    reader = _Reader(kind)
    t0 = time.monotonic()
    n = 0
    try:
        while n < iterations and time.monotonic() - t0 < seconds:
            data = mutate(seeds[int(rng.integers(0, len(seeds)))], rng, text=(kind == "csv"))
            work.write_bytes(data)
            n += 1
            outcome, sig, text = reader.read(work, hang_s)
            counts[outcome] += 1
            if outcome == "failed" and sig not in failures:
                keep = crashes / f"{kind}-{hashlib.sha256(data).hexdigest()[:12]}{work.suffix}"
                keep.write_bytes(data)
                keep.with_suffix(".txt").write_text(f"{sig}\n\n{text}")
                failures[sig] = str(keep)
    finally:
        reader.close()
    work.unlink(missing_ok=True)
    return {"target": f"{kind}-mutate", "iterations": n, "seconds": round(time.monotonic() - t0, 1), **counts,
            "unique_failures": failures}


class _TimeUp(BaseException):
    """Ends a hypothesis run when the time budget is spent (BaseException: not a finding)."""


def fuzz_grammar(*, seconds: float, iterations: int, seed: int, crashes: Path) -> dict:
    from hypothesis import HealthCheck, Phase, given, settings
    from hypothesis.errors import Unsatisfiable

    sys.path.insert(0, str(HERE.parent / "tests"))
    from test_fuzz import csv_files  # the in-suite grammar

    crashes.mkdir(parents=True, exist_ok=True)
    work = crashes / "current-grammar.csv"
    counts = {"ok": 0, "refused": 0, "failed": 0}
    failures: dict[str, str] = {}
    t0 = time.monotonic()

    @settings(max_examples=iterations, deadline=None, database=None, derandomize=False,
              suppress_health_check=list(HealthCheck), phases=[Phase.generate])
    @given(data=csv_files())
    def one(data):
        if time.monotonic() - t0 > seconds:
            raise _TimeUp
        work.write_bytes(data)
        try:
            counts[run_one(read_csv_scan, work)] += 1
        except Exception as exc:  # noqa: BLE001
            counts["failed"] += 1
            sig = signature(exc)
            if sig not in failures:
                keep = crashes / f"grammar-{hashlib.sha256(data).hexdigest()[:12]}.csv"
                keep.write_bytes(data)
                keep.with_suffix(".txt").write_text(f"{sig}\n{type(exc).__name__}: {exc}\n")
                failures[sig] = str(keep)

    np.random.seed(seed)  # hypothesis draws its own randomness; this only fixes numpy's global state
    try:
        one()
    except (Unsatisfiable, _TimeUp):
        pass
    work.unlink(missing_ok=True)
    return {"target": "csv-grammar", "iterations": sum(counts.values()), "seconds": round(time.monotonic() - t0, 1),
            **counts, "unique_failures": failures}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("target", choices=["csv-mutate", "h5-mutate", "csv-grammar", "all"])
    ap.add_argument("--seconds", type=float, default=60.0, help="time budget per target [s]")
    ap.add_argument("--iterations", type=int, default=10 ** 9, help="most inputs per target")
    ap.add_argument("--seed", type=int, default=1, help="seed of the mutation RNG")
    ap.add_argument("--crashes", default="fuzz_crashes", help="folder for failing inputs (created)")
    ap.add_argument("--hang-seconds", type=float, default=30.0, help="an input read longer than this is a hang [s]")
    args = ap.parse_args(argv)
    crashes = Path(args.crashes)
    targets = ["csv-mutate", "h5-mutate", "csv-grammar"] if args.target == "all" else [args.target]
    bad = False
    for t in targets:
        if t == "csv-grammar":
            res = fuzz_grammar(seconds=args.seconds, iterations=min(args.iterations, 10 ** 6), seed=args.seed,
                               crashes=crashes)
        else:
            res = fuzz_mutate(t.split("-")[0], seconds=args.seconds, iterations=args.iterations, seed=args.seed,
                              crashes=crashes, hang_s=args.hang_seconds)
        print(f"{res['target']}: {res['iterations']} inputs in {res['seconds']} s: {res['ok']} read, "
              f"{res['refused']} refused cleanly, {res['failed']} failures")
        for sig, path in res["unique_failures"].items():
            print(f"  FAILURE {sig}: {path}")
        bad |= bool(res["failed"])
    return 1 if bad else 0


if __name__ == "__main__":
    sys.exit(main())
