"""A function computed in a forked child: the same value as computed here, warnings passed on,
errors seen exactly as without the child, and nothing left running."""

import os
import time
import warnings

import numpy as np
import pandas as pd
import pytest

from scananalyse.errors import InputError, RegistrationWarning
from scananalyse.forked import ForkedCall, parallel_possible

pytestmark = pytest.mark.skipif(not hasattr(os, "fork"), reason="the child process needs fork()")


def _stats(a, *, k):
    # a small result from a big input, with the kinds of values the pipeline sends back
    return {"pid": os.getpid(), "sum": float(a.sum()), "top": np.sort(a.ravel())[-k:],
            "table": pd.DataFrame({"x": a[0, :k]})}


def test_child_gives_the_value_computed_here():
    a = np.random.default_rng(1).random((300, 200), dtype=np.float32)
    with ForkedCall(_stats, a, k=5, parallel=True) as call:
        assert call.forked
        got = call.result()
    want = _stats(a, k=5)
    assert got["pid"] != os.getpid()  # it really ran elsewhere
    assert got["sum"] == want["sum"]
    np.testing.assert_array_equal(got["top"], want["top"])
    pd.testing.assert_frame_equal(got["table"], want["table"])
    assert call.result() is got  # taken once


def test_without_a_child_the_value_is_computed_at_once():
    calls = []

    def f(x):
        calls.append(x)
        return x * 2

    call = ForkedCall(f, 21, parallel=False)
    assert not call.forked and calls == [21]  # computed when the call is made
    assert call.result() == 42 and calls == [21]


def _warns(x):
    warnings.warn("registration: the rotation sweep is flat", RegistrationWarning)
    return x + 1


def test_warnings_of_the_child_are_raised_here_with_their_category():
    with ForkedCall(_warns, 1, parallel=True) as call:
        with pytest.warns(RegistrationWarning, match="sweep is flat"):
            assert call.result() == 2


def _fails_in_child(parent, path):
    if os.getpid() != parent:
        raise InputError(f"{path}: line 3: bad value")
    return "computed by the parent"


def test_an_error_in_the_child_is_seen_as_without_it():
    # the child's exception is not sent: the function runs again here, so the caller gets the
    # very error (type, message, traceback) a serial run gives
    def bad(path):
        raise InputError(f"{path}: line 3: bad value")

    with ForkedCall(bad, "cp.csv", parallel=True) as call:
        with pytest.raises(InputError, match=r"cp\.csv: line 3: bad value"):
            call.result()
    # and a value the parent can compute is computed there
    with ForkedCall(_fails_in_child, os.getpid(), "x", parallel=True) as call:
        assert call.result() == "computed by the parent"


def test_a_killed_child_costs_time_not_the_value():
    parent = os.getpid()

    def dies(x):
        if os.getpid() != parent:
            os._exit(9)
        return x

    with ForkedCall(dies, 7, parallel=True) as call:
        assert call.result() == 7


def test_a_result_that_does_not_pickle_is_computed_here():
    parent = os.getpid()

    def unpicklable():
        return (lambda: 5) if os.getpid() != parent else 5

    with ForkedCall(unpicklable, parallel=True) as call:
        assert call.result() == 5


def test_close_stops_a_child_still_running():
    def sleeps():
        time.sleep(30)
        return 1

    call = ForkedCall(sleeps, parallel=True)
    pid = call._pid
    t = time.perf_counter()
    call.close()
    assert time.perf_counter() - t < 5
    with pytest.raises(ChildProcessError):
        os.waitpid(pid, os.WNOHANG)  # reaped: no zombie left


def test_no_child_while_another_thread_runs():
    import threading

    stop = threading.Event()
    th = threading.Thread(target=stop.wait)
    th.start()
    try:
        assert not parallel_possible()
        assert not ForkedCall(lambda: 1).forked
    finally:
        stop.set()
        th.join()


def test_serial_switch(monkeypatch):
    monkeypatch.setenv("SCANANALYSE_SERIAL", "1")
    assert not parallel_possible()
