"""The progress bar's arithmetic (fake clock) and the stages every verb reports.

The rate and ETA are checked against values derived by hand in the comments
(items done / seconds since the stage's first report; ETA = items left / rate). The
verbs run under ``SCHEDULE_PROGRESS=1`` (forced drawing without a terminal) on a
three-point mass-spring family; their stderr is parsed into stage labels.
"""

from __future__ import annotations

import io
import json
import re
import sys

import pytest
from _helpers import spring_design
from click.testing import CliRunner

from schedule.progress import (
    ProgressBar,
    format_rate,
    format_seconds,
    prefixed,
    stage_line,
    timed_slices,
)


class FakeClock:
    """A clock the test moves by hand."""

    def __init__(self, t: float = 100.0) -> None:
        self.t = t

    def __call__(self) -> float:
        return self.t


def _bar(clock, **kw):
    stream = io.StringIO()
    return ProgressBar(enabled=True, stream=stream, clock=clock, tick=None, **kw), stream


def _frames(text: str) -> list[str]:
    """Every drawn frame of a stream (carriage returns and newlines split frames)."""
    return [f.replace("\x1b[K", "").rstrip() for f in re.split(r"[\r\n]+", text) if f.strip()]


# ----------------------------------------------------------------------------- arithmetic
def test_rate_and_eta_from_the_first_report_of_the_stage():
    clock = FakeClock()
    bar, stream = _bar(clock)
    bar("gamma", 0, 100)
    clock.t += 5.0
    bar("gamma", 25, 100)
    # by hand: 25 items in 5 s -> 5 items/s; 75 left / 5 per s -> 15 s
    assert bar.rate(25, clock.t) == pytest.approx(5.0)
    assert bar.eta(25, 100, clock.t) == pytest.approx(15.0)
    last = _frames(stream.getvalue())[-1]
    assert "25/100" in last and "5.00/s" in last and "ETA 15 s" in last
    clock.t += 15.0
    bar("gamma", 100, 100)
    # by hand: 100 items in 20 s -> 5 items/s; done, so the elapsed 20 s instead of an ETA
    last = _frames(stream.getvalue())[-1]
    assert "100/100" in last and "5.00/s" in last and "in 20 s" in last and "ETA" not in last


def test_a_stage_that_jumps_to_done_shows_no_absurd_rate():
    # the first report already says all 216 done (the caller did not announce the stage):
    # nothing was seen progressing, so there is no rate, only the (zero) elapsed time
    clock = FakeClock()
    bar, stream = _bar(clock)
    bar("check", 216, 216)
    assert bar.rate(216, clock.t) is None
    last = _frames(stream.getvalue())[-1]
    assert "216/216" in last and "--" in last
    assert not re.search(r"\d{4,}(\.\d+)?/s", last)  # no 216000000000.0/s


def test_rate_counts_only_progress_seen_since_the_first_report():
    # first report at 16 of 216 (time 0), next at 48 (0.5 s later): 32 items in 0.5 s
    clock = FakeClock()
    bar, _ = _bar(clock)
    bar("check", 16, 216)
    clock.t += 0.5
    bar("check", 48, 216)
    assert bar.rate(48, clock.t) == pytest.approx(64.0)
    assert bar.eta(48, 216, clock.t) == pytest.approx((216 - 48) / 64.0)


def test_slow_stages_read_seconds_each_and_durations_read_minutes():
    # one item per 4 s: 0.25/s reads "4.0 s each"; 65 s reads 1:05 (m:ss), 3725 s 1:02:05
    assert format_rate(0.25) == "4.0 s each"
    assert format_rate(87.8) == "87.8/s" and format_rate(1234.4) == "1234/s"
    assert format_rate(None) == "--"
    assert format_seconds(4.24) == "4.2 s" and format_seconds(65) == "1:05"
    assert format_seconds(3725) == "1:02:05"


def test_stage_line_ends_with_its_elapsed_time():
    clock = FakeClock()
    bar, stream = _bar(clock)
    stage_line(bar, "report")
    clock.t += 2.5
    bar.close()
    frames = _frames(stream.getvalue())
    assert frames[0].startswith("report") and "..." in frames[0]
    assert frames[-1] == "report       done in 2.5 s"
    assert stream.getvalue().endswith("\n")


def test_redraws_are_throttled_but_the_last_step_is_drawn():
    clock = FakeClock()
    bar, stream = _bar(clock, min_interval=0.1)
    bar("plants", 0, 1000)
    for i in range(1, 1001):
        clock.t += 0.001  # 1000 reports over 1 s: at most ~10 redraws besides first/last
        bar("plants", i, 1000)
    frames = _frames(stream.getvalue())
    assert len(frames) <= 13
    assert "1000/1000" in frames[-1]


def test_a_new_stage_with_the_same_label_starts_a_new_line():
    clock = FakeClock()
    bar, stream = _bar(clock)
    bar("check", 0, 10)
    bar("check", 10, 10)
    bar("check", 0, 5)  # another batch (another total): a new stage, a new line
    assert stream.getvalue().count("\n") == 1
    assert _frames(stream.getvalue())[-1].startswith("check") and "0/5" in \
        _frames(stream.getvalue())[-1]


def test_enabled_follows_terminal_environment_and_quiet(monkeypatch):
    class Tty(io.StringIO):
        def isatty(self):
            return True

    monkeypatch.delenv("SCHEDULE_PROGRESS", raising=False)
    assert ProgressBar(stream=Tty()).enabled and not ProgressBar(stream=io.StringIO()).enabled
    monkeypatch.setenv("SCHEDULE_PROGRESS", "1")
    assert ProgressBar(stream=io.StringIO()).enabled
    assert not ProgressBar(enabled=False, stream=Tty()).enabled  # --quiet wins
    monkeypatch.setenv("SCHEDULE_PROGRESS", "0")
    assert not ProgressBar(stream=Tty()).enabled
    bar = ProgressBar(enabled=False, stream=io.StringIO())
    bar("x", 1, 2)
    bar.close()
    assert bar.stream.getvalue() == ""


def test_prefixed_labels():
    seen = []
    prefixed(lambda *a: seen.append(a), "round 1:")("check", 3, 9)
    assert seen == [("round 1: check", 3, 9)] and prefixed(None, "x") is None


def test_timed_slices_cover_the_range_and_size_from_the_measured_time():
    # 0.01 s per item (the fake clock moves while the caller works): the first slice is
    # 32 items; after it, 0.75 s / 0.01 s = 75 items per slice, capped by `largest`
    clock = FakeClock()
    sizes = []
    for sl in timed_slices(400, first=32, seconds=0.75, clock=clock):
        sizes.append(sl.stop - sl.start)
        clock.t += 0.01 * (sl.stop - sl.start)
    assert sum(sizes) == 400 and sizes[:3] == [32, 75, 75]
    capped = [s.stop - s.start for s in timed_slices(100, first=10, largest=20,
                                                     clock=FakeClock())]
    assert sum(capped) == 100 and max(capped) <= 20


def test_the_redraw_thread_redraws_only_an_unfinished_stage():
    class Ticks:
        """The thread's stop event: ``n`` ticks, then stop (no real waiting)."""

        def __init__(self, n: int) -> None:
            self.n = n

        def wait(self, _seconds) -> bool:
            self.n -= 1
            return self.n < 0

    clock = FakeClock()
    bar, stream = _bar(clock)
    bar.tick = 1.0
    stage_line(bar, "witness")
    clock.t += 3.0
    bar._stop = Ticks(1)
    bar._tick_loop()  # one tick: the stage line shows its 3 s
    assert _frames(stream.getvalue())[-1] == "witness      ... 3.0 s"
    bar("check", 5, 5)  # a finished bar is left as it is
    drawn = stream.getvalue()
    clock.t += 1.0
    bar._stop = Ticks(2)
    bar._tick_loop()
    assert stream.getvalue() == drawn


def test_close_stops_the_redraw_thread():
    bar = ProgressBar(enabled=True, stream=io.StringIO(), tick=0.01)
    stage_line(bar, "witness")
    thread = bar._ticker
    assert thread is not None and thread.daemon
    bar.close()
    assert bar._ticker is None and not thread.is_alive()


# ----------------------------------------------------------------------------- the verbs
MODEL = '''
import numpy as np
from schedule.types import LinearPlant

def plant_at(point):
    k = 1.0 + 9.0 * point["stiffness"]
    A = np.array([[0.0, 1.0], [-k, -0.2]])
    B = np.array([[0.0, 0.0], [1.0, 1.0]])
    return LinearPlant(A, B, np.array([[1.0, 0.0]]), np.zeros((1, 2)), ("x", "v"),
                       ("force", "push"), ("pos",))
'''

NONLINEAR = '''
import numpy as np
from schedule.linearize import NonlinearModel

def make():
    def f(x, u, p):
        k = 1.0 + 9.0 * p["stiffness"]
        return np.array([x[1], -k * x[0] - 0.2 * x[1] + u[0] + u[1]])
    return NonlinearModel(state_names=("x", "v"), input_names=("force", "push"),
                          output_names=("pos",), dynamics=f,
                          outputs=lambda x, u, p: np.array([x[0]]),
                          variable_names=("stiffness",))
'''

DESIGN = spring_design("spring")


def _runner():
    try:
        return CliRunner(mix_stderr=False)  # click 8.1
    except TypeError:
        return CliRunner()  # click >= 8.2 keeps stderr apart


def _stages(stderr: str) -> dict[str, str]:
    """Stage label -> its last frame, from the forced progress output."""
    out = {}
    for frame in _frames(stderr):
        m = re.match(r"^(.+?)\s+(\[|\.\.\.|done in)", frame)
        if m:
            out[m.group(1).strip()] = frame
    return out


def _full(frame: str) -> bool:
    """A bar drawn full (done == total) or a stage line finished."""
    m = re.search(r"\] (\d+)/(\d+)", frame)
    return bool(m and m.group(1) == m.group(2)) or "done in" in frame


@pytest.fixture(scope="module")
def spring(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("progress")
    (tmp / "model.py").write_text(MODEL)
    (tmp / "spring_nl.py").write_text(NONLINEAR)
    (tmp / "design.toml").write_text(DESIGN)
    (tmp / "traj.csv").write_text("time,stiffness,ref:pos\n0,0,0\n0.5,0.5,1\n1,1,1\n")
    return tmp


def _run(args, monkeypatch, tmp):
    from schedule.cli.main import main

    monkeypatch.setenv("SCHEDULE_PROGRESS", "1")
    monkeypatch.chdir(tmp)
    res = _runner().invoke(main, args)
    assert res.exit_code in (0, 1), (res.output, res.stderr)
    return res


def test_every_verb_reports_every_stage(spring, monkeypatch):
    monkeypatch.syspath_prepend(str(spring))
    monkeypatch.delitem(sys.modules, "spring_nl", raising=False)
    expected = {
        ("design", "design.toml", "--out", "fam.h5"):
            {"read design", "plants", "gamma", "controllers", "interpolant", "write"},
        ("design", "design.toml", "--out", "bare.h5", "--no-fit"):
            {"read design", "plants", "gamma", "controllers", "write"},
        ("check", "fam.h5", "--design", "design.toml", "--report", "rep"):
            {"read inputs", "check points", "plants", "controllers", "leave-one-out", "check",
             "gamma_opt", "rate bound", "report"},
        ("export", "fam.h5", "--design", "design.toml", "-f", "json", "--sample-time",
         "0.05", "--out", "t.json"):
            {"read inputs", "build table", "table points", "plants", "table lookup",
             "table check", "write json"},
        ("check", "fam.h5", "--design", "design.toml", "--table", "t.json", "-q"): set(),
        ("check", "fam.h5", "--design", "design.toml", "--table", "t.json"):
            {"check", "table points", "table lookup", "table check", "compare",
             "vs interpolant", "vs interpolant discrete"},
        ("refine", "fam.h5", "--design", "design.toml", "--out", "ref.h5", "--budget", "2"):
            {"read inputs", "round 0: check points", "round 0: plants", "round 0: check",
             "write"},
        ("simulate", "fam.h5", "--model", "spring_nl:make", "--trajectory", "traj.csv",
         "--sample-time", "0.05", "--out", "sim"):
            {"read inputs", "simulate", "plots", "write"},
        ("inspect", "bare.h5", "--evidence"): {"read family", "interpolant", "loo norms"},
    }
    for args, stages in expected.items():
        res = _run(list(args), monkeypatch, spring)
        seen = _stages(res.stderr)
        assert stages <= set(seen), (args, sorted(seen))
        if not stages:  # --quiet draws nothing
            assert seen == {}, args
        for label, frame in seen.items():
            assert _full(frame), (args, label, frame)  # every stage ends drawn complete
        assert "\r" not in res.stdout and "ETA" not in res.stdout, args


def test_json_stdout_stays_pure_json_with_progress_forced(spring, monkeypatch):
    for args in (["design", "design.toml", "--out", "fam2.h5", "--json"],
                 ["check", "fam2.h5", "--design", "design.toml", "--json"],
                 ["export", "fam2.h5", "--design", "design.toml", "-f", "json",
                  "--sample-time", "0.05", "--out", "t2.json", "--json"]):
        res = _run(args, monkeypatch, spring)
        json.loads(res.stdout)  # nothing but the JSON document
        assert _stages(res.stderr), args  # the progress went to stderr


def _recorder():
    calls = []

    def progress(stage, done, total):
        calls.append((stage, int(done), int(total)))

    return calls, progress


def _counted_stages_complete(calls):
    """Every counted stage (a run of one label and total) starts at 0 or more, never goes
    back, and ends at its total; returns the labels seen."""
    runs, last = [], None
    for stage, done, total in calls:
        if last is None or (stage, total) != last[:2] or done < last[2]:
            runs.append([])
        runs[-1].append((stage, done, total))
        last = (stage, total, done)
    for run in runs:
        stage, _, total = run[0]
        if total > 0:
            dones = [d for _, d, _ in run]
            assert dones == sorted(dones), (stage, dones)
            assert dones[-1] == total, (stage, dones)
    return {s for s, _, _ in calls}


def test_refine_rounds_report_synthesis_refit_and_the_comparison(tmp_path):
    # the oscillator of tests/test_check.py on a 2 x 2 corner grid fails between its
    # points, so refinement adds points: round 1 synthesizes them and refits
    from test_check import _design

    from schedule.check import CheckSettings
    from schedule.refine import refine_family

    spec, fam = _design(tmp_path, [0.0, 1.0])
    settings = CheckSettings.from_spec(spec, samples=8, gamma_opt=False, rate=False,
                                       classical=False)
    calls, progress = _recorder()
    out = refine_family(fam, spec, budget=4, settings=settings, progress=progress)
    assert len(out.added) > 0
    seen = _counted_stages_complete(calls)
    assert {"round 0: check", "round 0: plants", "round 0: new plants", "round 0: new gamma",
            "round 0: new controllers", "round 0: refit interpolant", "round 1: check",
            "input: check"} <= seen, seen


def test_check_family_stages_are_complete_and_in_order(tmp_path):
    from test_check import _design

    from schedule.check import CheckSettings, check_family

    spec, fam = _design(tmp_path, [0.0, 0.5, 1.0])
    calls, progress = _recorder()
    check_family(fam, CheckSettings.from_spec(spec, samples=8), spec=spec, progress=progress)
    seen = _counted_stages_complete(calls)
    order = [s for s in ("check points", "plants", "controllers", "check", "gamma_opt",
                         "rate bound") if s in seen]
    assert len(order) == 6, seen
    first = {s: next(i for i, c in enumerate(calls) if c[0] == s) for s in order}
    assert sorted(order, key=first.get) == order
