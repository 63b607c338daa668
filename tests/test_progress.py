"""Progress: a bar on a terminal, plain lines otherwise, nothing with quiet; timings kept."""

import io

from scananalyse.progress import Progress


class _Tty(io.StringIO):
    def isatty(self):
        return True


def test_plain_lines_when_not_a_terminal():
    out = io.StringIO()
    p = Progress(["load", "rates"], stream=out)
    with p.stage("load"):
        pass
    with p.stage("rates"):
        pass
    p.finish("done")
    lines = out.getvalue().splitlines()
    assert lines[0].startswith("scananalyse: load: ") and lines[0].endswith(" s")
    assert lines[1].startswith("scananalyse: rates: ") and lines[-1] == "done"
    assert "\r" not in out.getvalue()
    assert set(p.timings) == {"load", "rates", "total"} and all(v >= 0 for v in p.timings.values())


def test_bar_on_a_terminal():
    out = _Tty()
    p = Progress(["a", "b"], stream=out)
    with p.stage("a"):
        pass
    text = out.getvalue()
    assert "\r[" in text and "50.0%" in text


def test_quiet_prints_nothing_but_keeps_timings():
    out = io.StringIO()
    p = Progress(["a"], quiet=True, stream=out)
    with p.stage("a"):
        pass
    p.finish("x")
    assert out.getvalue() == "" and "a" in p.timings
