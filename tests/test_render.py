"""The report's figure renderer: the same PNG files with or without the helper process,
and no figure lost when the helper fails."""

import os

import numpy as np
import pytest
from matplotlib.figure import Figure

from scananalyse.report.render import FigureRenderer, parallel_possible

pytestmark = pytest.mark.skipif(not hasattr(os, "fork"), reason="the helper process needs fork()")


def _spec(k):
    def build():
        fig = Figure(figsize=(3, 2))
        ax = fig.add_subplot()
        x = np.linspace(0, 1, 50)
        ax.plot(x, x ** (k + 1))
        ax.set_title(f"figure {k}")
        fig.scananalyse_caption = f"caption {k}"
        return fig
    return ("maps", f"fig {k}", f"Figure {k}.", build)


def test_parallel_and_serial_give_the_same_files(tmp_path):
    # matplotlib's Agg output is deterministic: the helper's files must be byte-identical
    # to the ones drawn in this process, in the specs' order, with the builders' captions
    specs = [_spec(k) for k in range(5)]
    out = {}
    for mode in (False, True):
        d = tmp_path / str(mode)
        d.mkdir()
        with FigureRenderer(specs, d, parallel=mode) as r:
            assert r.parallel is mode
            out[mode] = r.finish()
        assert sorted(p.name for p in d.iterdir()) == [f"0{k + 1}_fig_{k}.png" for k in range(5)]
    assert [o[:2] for o in out[True]] == [("maps", f"Figure {k}. caption {k}") for k in range(5)]
    assert [o[1:] for o in out[True]] == [o[1:] for o in out[False]]
    assert all(png.startswith(b"\x89PNG") for _, _, png, _ in out[True])


def test_queue_order_changes_who_draws_what_not_the_files(tmp_path):
    specs = [_spec(k) for k in range(4)]
    with FigureRenderer(specs, tmp_path, parallel=True, order=[3, 1, 0, 2]) as r:
        got = r.finish()
    assert [g[3] for g in got] == [f"figures/0{k + 1}_fig_{k}.png" for k in range(4)]  # specs' order
    assert [g[1] for g in got] == [f"Figure {k}. caption {k}" for k in range(4)]
    with pytest.raises(ValueError, match="permutation"):
        FigureRenderer(specs, tmp_path, parallel=False, order=[0, 0, 1, 2])


def test_figures_the_helper_does_not_deliver_are_drawn_here(tmp_path):
    parent = os.getpid()

    def dies_in_helper():
        if os.getpid() != parent:
            os._exit(3)  # the helper is killed half-way
        return _spec(9)[3]()

    specs = [_spec(0), ("maps", "fragile", "Fragile.", dies_in_helper), _spec(2), _spec(3)]
    with FigureRenderer(specs, tmp_path, parallel=True) as r:
        got = r.finish()
    assert [g[1] for g in got] == ["Figure 0. caption 0", "Fragile. caption 9", "Figure 2. caption 2",
                                   "Figure 3. caption 3"]
    assert len(list(tmp_path.glob("*.png"))) == 4


def test_an_error_in_a_figure_reaches_the_caller(tmp_path):
    def broken():
        raise ValueError("cannot draw this")

    specs = [_spec(0), ("maps", "broken", "Broken.", broken)]
    with pytest.raises(ValueError, match="cannot draw this"):
        with FigureRenderer(specs, tmp_path, parallel=True) as r:
            r.finish()


def test_close_stops_a_running_helper(tmp_path):
    import time

    def slow():
        time.sleep(30)
        return _spec(1)[3]()

    specs = [("maps", "slow", "Slow.", slow)] * 2
    r = FigureRenderer(specs, tmp_path, parallel=True)
    pid = r._pid
    t0 = time.perf_counter()
    r.close()
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
        with FigureRenderer([_spec(0), _spec(1)], tmp_path) as r:
            assert not r.parallel
            assert len(r.finish()) == 2
    finally:
        ev.set()
        t.join()


def test_helper_runs_below_the_main_process_and_stems_name_the_files(tmp_path):
    # The helper lowers its own priority (niceness +10, capped at 19 by the kernel); the
    # main process keeps its own.  Explicit stems name the files.
    import time

    base = os.nice(0)

    def spec(k):
        def build():
            time.sleep(0.05)  # long enough for the helper to take some of the queue
            fig = Figure(figsize=(2, 2))
            fig.scananalyse_caption = f"{os.getpid()}:{os.nice(0)}"
            return fig
        return ("maps", f"s{k}", "", build)

    specs = [spec(k) for k in range(6)]
    with FigureRenderer(specs, tmp_path, parallel=True, stems=[f"name_{k}" for k in range(6)]) as r:
        got = r.finish()
    assert sorted(p.name for p in tmp_path.iterdir()) == sorted(f"name_{k}.png" for k in range(6))
    who = [tuple(int(v) for v in g[1].split(":")) for g in got]
    helper = [n for pid, n in who if pid != os.getpid()]
    main = [n for pid, n in who if pid == os.getpid()]
    assert helper, "the helper drew nothing"
    assert all(n == min(19, base + 10) for n in helper)
    assert all(n == base for n in main) and os.nice(0) == base
    with pytest.raises(ValueError, match="stems"):
        FigureRenderer(specs, tmp_path, parallel=False, stems=["a"] * 6)


def test_tasks_run_once_in_either_process_and_a_failure_surfaces_in_the_caller(tmp_path):
    # A task (an output file written like a figure) runs exactly once: in the helper when
    # it takes it, else here.  One that fails in the helper is run again here, where its
    # error reaches the caller.
    def task(name):
        def run():
            with open(tmp_path / name, "a") as fh:
                fh.write(f"{os.getpid()}\n")
        return run

    specs = [_spec(k) for k in range(3)]
    for mode in (False, True):
        d = tmp_path / f"figs_{mode}"
        d.mkdir()
        with FigureRenderer(specs, d, parallel=mode, tasks=[task(f"t_{mode}.txt")]) as r:
            assert r.parallel is mode
            got = r.finish()
        assert len(got) == 3
        lines = (tmp_path / f"t_{mode}.txt").read_text().split()
        assert len(lines) == 1                      # once, whoever ran it
    parent = os.getpid()

    def fails_in_helper():
        if os.getpid() != parent:
            raise RuntimeError("helper side")
        raise ValueError("main side")

    with FigureRenderer(specs, tmp_path / "figs_True", parallel=True, tasks=[fails_in_helper]) as r:
        with pytest.raises(ValueError, match="main side"):
            r.finish()


def test_helper_running_reaps_a_finished_helper_and_finish_still_collects(tmp_path):
    import time

    specs = [_spec(k) for k in range(3)]
    with FigureRenderer(specs, tmp_path, parallel=True) as r:
        deadline = time.monotonic() + 30
        while r.helper_running() and time.monotonic() < deadline:
            time.sleep(0.05)
        assert not r.helper_running()               # reaped, and stays so
        got = r.finish()
    assert [g[3] for g in got] == [f"figures/0{k + 1}_fig_{k}.png" for k in range(3)]
    assert all(png.startswith(b"\x89PNG") for _, _, png, _ in got)


def test_compare_gives_the_same_report_figures_whatever_the_helper_cap(small_pair_files, tmp_path, monkeypatch):
    # With no helper allowed (every group drawn here, the last one after the data files),
    # one, or two at a time, the run gives the same numbered figures, byte for byte
    # (matplotlib's Agg output is deterministic), and no draft file is left.
    from scananalyse import pipeline as P
    from scananalyse.job import Job

    from scananalyse import repair

    # patches.dxf is written once whoever writes it (with the patch-plate map's figures
    # while the analysis goes on, or with the outputs): each call leaves a line in a log,
    # from whichever process makes it
    log = tmp_path / "dxf_calls.log"
    real_dxf = repair.write_patches_dxf

    def logged_dxf(patches, path):
        with open(log, "a") as fh:
            fh.write(f"{path}\n")
        real_dxf(patches, path)

    monkeypatch.setattr(repair, "write_patches_dxf", logged_dxf)
    got, dxf = {}, {}
    for cap in (0, 1, 2):
        monkeypatch.setattr(P, "_MAX_HELPERS", cap)
        out = tmp_path / f"out{cap}"
        res = P.compare(small_pair_files["old_h5"], small_pair_files["new_h5"], job=Job(diameter=4000.0),
                        out_dir=out, quiet=True)
        names = sorted(p.name for p in (out / "figures").iterdir())
        assert names == sorted(f[len("figures/"):] for f in res.files if f.startswith("figures/"))
        assert [n[:3] for n in names] == [f"{k:02d}_" for k in range(1, len(names) + 1)] and len(names) >= 10
        got[cap] = {n: (out / "figures" / n).read_bytes() for n in names}
        back = repair.read_patches(out / "patches.dxf")
        assert len(back) == len(res.patches) > 0
        dxf[cap] = back[["x_min_mm", "y_min_mm", "x_max_mm", "y_max_mm"]].round(6).values.tolist()
    assert got[0] == got[1] == got[2]
    assert dxf[0] == dxf[1] == dxf[2]
    assert len(log.read_text().splitlines()) == 3  # once per run
