"""The report's figure queue: the same PNG files whoever draws them (the helper process
from a figure's small form, or this process from the full one), and no figure lost when
the helper fails."""

import os
import time
from functools import partial

import numpy as np
import pytest
from matplotlib.figure import Figure

from scananalyse.report import render
from scananalyse.report.render import FigureQueue, parallel_possible

pytestmark = pytest.mark.skipif(not hasattr(os, "fork"), reason="the helper process needs fork()")


# figures built by module-level functions: they pickle, so the helper can draw them
def _curve(k, sleep=0.0):
    if sleep:
        time.sleep(sleep)
    fig = Figure(figsize=(3, 2))
    ax = fig.add_subplot()
    x = np.linspace(0, 1, 50)
    ax.plot(x, x ** (k + 1))
    ax.set_title(f"figure {k}")
    fig.scananalyse_caption = f"caption {k}"
    return fig


def _who(sleep=0.05):
    time.sleep(sleep)  # long enough for the helper to take some of the queue
    fig = Figure(figsize=(2, 2))
    fig.scananalyse_caption = f"{os.getpid()}:{os.nice(0)}"
    return fig


def _dies_in_helper(parent):
    if os.getpid() != parent:
        os._exit(3)  # the helper is killed half-way
    return _curve(9)


def _broken():
    raise ValueError("cannot draw this")


def _slow():
    time.sleep(30)
    return _curve(1)


def _append_pid(path):
    with open(path, "a") as fh:
        fh.write(f"{os.getpid()}\n")


def _fails_by_process(parent):
    if os.getpid() != parent:
        raise RuntimeError("helper side")
    raise ValueError("main side")


def _run(queue, tmp_path, builds):
    jobs = [queue.add(tmp_path / f"f{k}.png", b) for k, b in enumerate(builds)]
    done = queue.finish()
    return [done[n] for n in jobs], [(tmp_path / f"f{k}.png").read_bytes() for k in range(len(builds))]


def test_helper_and_this_process_give_the_same_files(tmp_path):
    # matplotlib's Agg output is deterministic: the helper's files must be byte-identical
    # to the ones drawn here, with the builders' captions
    out = {}
    for mode in (False, True):
        d = tmp_path / str(mode)
        d.mkdir()
        with FigureQueue(parallel=mode) as q:
            assert q.parallel is mode
            out[mode] = _run(q, d, [partial(_curve, k) for k in range(5)])
    assert out[True][0] == [f"caption {k}" for k in range(5)]
    assert out[True] == out[False]
    assert all(png.startswith(b"\x89PNG") for png in out[True][1])


def test_a_floor_map_drawn_from_its_small_form_is_the_full_drawing(tmp_path):
    # The helper is sent FloorMapJob.for_helper(): the grid block-reduced here (a few
    # megabytes), the plate layer sub-sampled.  Its PNG must be the full drawing's, byte for
    # byte, and the packed form must be far smaller than the grid.
    from scananalyse.forked import pack
    from scananalyse.report import figures as F

    rng = np.random.default_rng(4)
    t = (6.0 - rng.gamma(2.0, 0.3, size=(900, 1100))).astype(np.float32)
    t[rng.random(t.shape) < 0.05] = np.nan
    plate = (np.arange(1100)[None, :] // 400 + 3 * (np.arange(900)[:, None] // 500)).astype(np.int32)
    job = F.FloorMapJob(t, extent=(0.0, 11000.0, 0.0, 9000.0), title="t", label="remaining thickness",
                        kind="thickness", diameter_mm=9000.0, centre=(5500.0, 4500.0), plate=plate,
                        contours=[(5.0, "MRT", "--")], max_pixels=40_000)
    small = job.for_helper()
    assert len(pack(small)) < t.nbytes / 10
    full_png, small_png = tmp_path / "full.png", tmp_path / "small.png"
    F.save_png(job(), full_png)
    F.save_png(small(), small_png)
    assert full_png.read_bytes() == small_png.read_bytes()
    with pytest.raises(ValueError, match="plate=None"):
        F.floor_map(F.prepare_map(t, plate=plate), extent=(0, 1, 0, 1), title="t", label="t", plate=plate)


def test_jobs_without_a_small_form_are_drawn_here(tmp_path, monkeypatch):
    # A closure does not pickle, and a packed form over MAX_PACKED is not sent: both are
    # drawn by this process, the rest by either.
    def closure():
        return _who(0.0)

    monkeypatch.setattr(render, "MAX_PACKED", 10_000)
    big = partial(_who, 0.0)
    big.ballast = b"x" * 20_000  # partial's attributes are pickled with it
    with FigureQueue(parallel=True) as q:
        caps, _ = _run(q, tmp_path, [closure, big, partial(_who, 0.0)])
    pids = [int(c.split(":")[0]) for c in caps]
    assert pids[0] == pids[1] == os.getpid()


def test_a_job_the_helper_does_not_finish_is_done_here(tmp_path):
    builds = [partial(_curve, 0), partial(_dies_in_helper, os.getpid()), partial(_curve, 2), partial(_curve, 3)]
    with FigureQueue(parallel=True) as q:
        caps, pngs = _run(q, tmp_path, builds)
    assert caps == ["caption 0", "caption 9", "caption 2", "caption 3"]
    assert all(p.startswith(b"\x89PNG") for p in pngs)


def test_an_error_in_a_figure_reaches_the_caller(tmp_path):
    with pytest.raises(ValueError, match="cannot draw this"):
        with FigureQueue(parallel=True) as q:
            _run(q, tmp_path, [partial(_curve, 0), _broken])


def test_close_stops_a_running_helper(tmp_path):
    q = FigureQueue(parallel=True)
    q.add(tmp_path / "a.png", _slow)
    q.add(tmp_path / "b.png", _slow)
    pid = q._pid
    time.sleep(0.2)
    t0 = time.perf_counter()
    q.close()
    assert time.perf_counter() - t0 < 5
    with pytest.raises(ChildProcessError):
        os.waitpid(pid, os.WNOHANG)  # reaped: no zombie left


def test_no_helper_when_another_thread_runs(tmp_path):
    import threading

    ev = threading.Event()
    t = threading.Thread(target=ev.wait)
    t.start()
    try:
        assert not parallel_possible()
        with FigureQueue() as q:
            assert not q.parallel
            caps, _ = _run(q, tmp_path, [partial(_curve, 0), partial(_curve, 1)])
        assert caps == ["caption 0", "caption 1"]
    finally:
        ev.set()
        t.join()


def test_helper_runs_below_the_main_process(tmp_path):
    # The helper lowers its own priority (niceness +10, capped at 19 by the kernel); the
    # main process keeps its own.  Both draw.
    base = os.nice(0)
    with FigureQueue(parallel=True) as q:
        caps, _ = _run(q, tmp_path, [partial(_who) for _ in range(8)])
    who = [tuple(int(v) for v in c.split(":")) for c in caps]
    helper = [n for pid, n in who if pid != os.getpid()]
    main = [n for pid, n in who if pid == os.getpid()]
    assert helper, "the helper drew nothing"
    assert all(n == min(19, base + 10) for n in helper)
    assert all(n == base for n in main) and os.nice(0) == base


def test_tasks_run_once_in_either_process_and_a_failure_surfaces_in_the_caller(tmp_path):
    # A task (an output file written like a figure) runs exactly once: in the helper when
    # it takes it, else here.  One that fails in the helper is run again here, where its
    # error reaches the caller.
    for mode in (False, True):
        log = tmp_path / f"t_{mode}.txt"
        with FigureQueue(parallel=mode) as q:
            assert q.parallel is mode
            n = q.add_task(partial(_append_pid, log))
            caps, _ = _run(q, tmp_path, [partial(_curve, k) for k in range(3)])
        assert n == 0 and len(caps) == 3
        assert len(log.read_text().split()) == 1  # once, whoever ran it
    with FigureQueue(parallel=True) as q:
        q.add_task(partial(_fails_by_process, os.getpid()))
        with pytest.raises(ValueError, match="main side"):
            q.finish()


def test_a_finished_queue_takes_no_more_and_finish_collects_after_the_helper_exits(tmp_path):
    with FigureQueue(parallel=True) as q:
        jobs = [q.add(tmp_path / f"f{k}.png", partial(_curve, k)) for k in range(3)]
        assert [j[0] for j in q.jobs] == ["figure"] * 3
        assert q.helper_running()  # it waits for more work until finish()
        done = q.finish()
        assert not q.helper_running()  # reaped, and stays so
        with pytest.raises(RuntimeError, match="finished"):
            q.add(tmp_path / "late.png", partial(_curve, 5))
        with pytest.raises(RuntimeError, match="already"):
            q.finish()
    assert [done[n] for n in jobs] == [f"caption {k}" for k in range(3)]


def test_compare_gives_the_same_report_whether_or_not_the_helper_draws(small_pair_files, tmp_path, monkeypatch):
    # With the helper (forced on: in the test session an idle Dask thread may make
    # parallel_possible() say no) or without it, the run gives the same numbered figures,
    # byte for byte, and no draft file is left; patches.dxf is written once either way.
    from scananalyse import pipeline as P
    from scananalyse import repair
    from scananalyse.job import Job

    log = tmp_path / "dxf_calls.log"
    real_dxf = repair.write_patches_dxf

    def logged_dxf(patches, path):
        with open(log, "a") as fh:
            fh.write(f"{os.getpid()} {path}\n")
        real_dxf(patches, path)

    monkeypatch.setattr(repair, "write_patches_dxf", logged_dxf)
    got, dxf = {}, {}
    for mode in (False, True):
        monkeypatch.setattr(render, "parallel_possible", lambda mode=mode: mode)
        out = tmp_path / f"out{mode}"
        res = P.compare(small_pair_files["old_h5"], small_pair_files["new_h5"], job=Job(diameter=4000.0),
                        out_dir=out, quiet=True)
        names = sorted(p.name for p in (out / "figures").iterdir())
        assert names == sorted(f[len("figures/"):] for f in res.files if f.startswith("figures/"))
        assert [n[:3] for n in names] == [f"{k:02d}_" for k in range(1, len(names) + 1)] and len(names) >= 10
        got[mode] = {n: (out / "figures" / n).read_bytes() for n in names}
        back = repair.read_patches(out / "patches.dxf")
        assert len(back) == len(res.patches) > 0
        dxf[mode] = back[["x_min_mm", "y_min_mm", "x_max_mm", "y_max_mm"]].round(6).values.tolist()
    assert got[False] == got[True]
    assert dxf[False] == dxf[True]
    calls = log.read_text().splitlines()
    assert len(calls) == 2  # once per run (in the second, by whichever process took it)
    assert int(calls[0].split()[0]) == os.getpid()
