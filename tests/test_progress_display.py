"""Progress of the long stages: the ``advance`` channel of the progress protocol, the stages that
report through it, and the live line of the command line's reporter (terminal only)."""

import io
import time

import numpy as np
import pytest

from probeseq.cli.stages import _about, _Reporter, live_status
from probeseq.decoding.hmm import run_em
from probeseq.pipeline.options import AnalysisOptions, _Clock
from probeseq.study.batch import _RunLog

METALS = ("Co", "Zn")


class FakeStream(io.StringIO):
    """A text stream that says whether it is a terminal."""

    encoding = "utf-8"

    def __init__(self, tty: bool):
        super().__init__()
        self.tty = tty

    def isatty(self):
        return self.tty


class FakeClock:
    """Seconds set by the test."""

    def __init__(self):
        self.now = 100.0

    def __call__(self):
        return self.now


class Recorder:
    """A progress object with the optional ``advance`` method."""

    def __init__(self):
        self.stages, self.advances = [], []

    def __call__(self, stage, message):
        self.stages.append(stage)

    def advance(self, stage, done, total):
        self.advances.append((stage, done, total))


def _reporter(tty: bool, quiet: bool = False):
    stream, clock = FakeStream(tty), FakeClock()
    # a tick of an hour: the ticker never draws, the test calls redraw() itself
    return _Reporter(quiet, False, stream=stream, clock=clock, tick_s=3600), stream, clock


def _last_draw(text: str) -> str:
    """What the terminal shows of the line being redrawn: the text after the last carriage return."""
    return text.rsplit("\r", 1)[-1]


# ---------------------------------------------------------------------- the reporter on a terminal
def test_terminal_line_shows_percentage_and_time_left():
    rep, stream, clock = _reporter(tty=True)
    rep("decoding", "fitting the rod model to 366 rods x 142 sites")
    clock.now += 2.0
    rep.advance("decoding", 1, 4)
    rep.redraw()
    shown = _last_draw(stream.getvalue())
    assert "decoding: fitting the rod model" in shown
    # a quarter done in 2 s: 6 s left
    assert "25 %" in shown and "2 s" in shown and "about 6 s left" in shown
    clock.now += 4.0
    rep.advance("decoding", 3, 4)
    rep.redraw()
    assert "75 %" in _last_draw(stream.getvalue()) and "about 2 s left" in _last_draw(stream.getvalue())
    rep.done()


def test_terminal_stage_line_is_left_with_its_elapsed_time():
    rep, stream, clock = _reporter(tty=True)
    rep("binning", "ranging, drawing and binning all ions")
    clock.now += 3.0
    rep.advance("binning", 2, 5)
    rep.redraw()
    clock.now += 0.5
    rep("decoding", "fitting the rod model")
    finished = stream.getvalue().split("\n")[0]
    final = _last_draw(finished)
    assert final.endswith("(3.5 s)") and "%" not in final and "left" not in final
    rep.done()
    assert stream.getvalue().endswith("\n")


def test_time_left_waits_for_two_percent_and_one_second():
    rep, stream, clock = _reporter(tty=True)
    rep("binning", "ranging, drawing and binning all ions")
    clock.now += 0.5
    rep.advance("binning", 1, 4)
    rep.redraw()
    shown = _last_draw(stream.getvalue())
    assert "25 %" in shown and "left" not in shown  # under a second
    clock.now += 9.5
    rep.advance("binning", 1, 100)
    rep.redraw()
    shown = _last_draw(stream.getvalue())
    assert "1 %" in shown and "left" not in shown  # under 2 %
    rep.advance("binning", 2, 100)
    rep.redraw()
    assert "about 8 min left" in _last_draw(stream.getvalue())  # 10 s * 0.98 / 0.02 = 490 s


def test_fraction_of_another_stage_is_ignored():
    rep, stream, clock = _reporter(tty=True)
    rep("decoding", "fitting the rod model")
    clock.now += 2.0
    rep.advance("binning", 1, 2)
    rep.redraw()
    assert "%" not in stream.getvalue()
    rep.done()


def test_time_left_is_rounded_and_in_minutes_above_90_s():
    assert live_status(2.0, 0.4) == "  40 % \u00b7 2 s, about 3 s left"
    assert live_status(3.0, None) == " (3 s)"
    assert _about(3.4) == "3 s" and _about(47) == "45 s" and _about(88) == "90 s"
    assert _about(91) == "2 min" and _about(600) == "10 min" and _about(3 * 3600) == "3.0 h"
    assert "left" not in live_status(5.0, 1.0)  # finished: nothing left to estimate


def test_ticker_redraws_the_line_by_itself():
    stream = FakeStream(True)
    rep = _Reporter(False, False, stream=stream, tick_s=0.01)
    rep("binning", "ranging, drawing and binning all ions")
    rep.advance("binning", 1, 2)
    deadline = time.perf_counter() + 10
    while "50 %" not in stream.getvalue() and time.perf_counter() < deadline:
        time.sleep(0.02)
    rep.done()
    assert "50 %" in stream.getvalue()


# ---------------------------------------------------------------------- off a terminal, and quiet
def test_off_a_terminal_only_the_stage_lines_are_written():
    rep, stream, clock = _reporter(tty=False)
    rep("binning", "ranging, drawing and binning all ions")
    clock.now += 2.0
    rep.advance("binning", 1, 4)
    rep.redraw()
    clock.now += 1.0
    rep("decoding", "fitting the rod model")
    rep.advance("decoding", 10, 200)
    rep.redraw()
    rep.done()
    text = stream.getvalue()
    assert "\r" not in text and "%" not in text and "left" not in text
    assert text.splitlines() == ["[    0.0 s] binning: ranging, drawing and binning all ions",
                                 "[    3.0 s] decoding: fitting the rod model"]


def test_quiet_writes_nothing_even_on_a_terminal():
    rep, stream, clock = _reporter(tty=True, quiet=True)
    rep("binning", "ranging, drawing and binning all ions")
    clock.now += 2.0
    rep.advance("binning", 1, 4)
    rep.redraw()
    rep.done()
    assert stream.getvalue() == ""


# ---------------------------------------------------------------------- the protocol's plumbing
def test_clock_passes_fractions_only_to_callbacks_that_take_them():
    seen = []
    plain = _Clock(lambda stage, message: seen.append((stage, message)))
    assert not plain.reports_fractions
    plain.advance("binning", 1, 2)  # a plain two-argument callback: nothing to call, no error
    assert seen == []
    rec = Recorder()
    clock = _Clock(rec)
    assert clock.reports_fractions
    clock.advance("binning", 1, 2)
    assert rec.advances == [("binning", 1, 2)]


def test_run_log_forwards_fractions_but_keeps_only_stage_lines():
    rec = Recorder()
    log = _RunLog(rec)
    log("binning", "all ions")
    log.advance("binning", 1, 3)
    assert rec.advances == [("binning", 1, 3)] and len(log.lines) == 1
    plain = _RunLog(lambda stage, message: None)
    plain.advance("binning", 1, 3)  # the analysis's own callback may be a plain function


def test_em_loop_reports_each_update_out_of_the_cap():
    seen = []

    def step(x):  # log-likelihood rising towards 0, halving its gap each update
        return -(0.5 ** x), x + 1

    tr = run_em(step, 0, max_iter=50, tol=1e-3, on_iteration=lambda done, total: seen.append((done, total)))
    assert seen == [(i, 50) for i in range(1, tr.n_iter + 1)]
    assert 5 < tr.n_iter < 50


# ---------------------------------------------------------------------- the stages on a simulated run
@pytest.fixture(scope="module")
def run_file(tmp_path_factory):
    from probeseq.simulation.simulate import simulate_run

    run = simulate_run(pattern="long-block", metals=METALS, top_radius_nm=5.0, depth_nm=15.0, seed=7)
    paths = run.write(tmp_path_factory.mktemp("progress") / "run.h5")
    return paths["ions"], run.lattice, len(run.ions), run.ions


def test_streamed_pass_and_decoder_report_their_fractions(run_file):
    from probeseq.pipeline.analysis import analyze_file

    path, lattice, n_ions, _ = run_file
    chunk = 5000
    rec = Recorder()
    res = analyze_file(path, METALS, lattice, options=AnalysisOptions(n_boot=20, n_starts=1), progress=rec,
                       chunk_size=chunk)
    assert res.ions_summary.get("streamed")
    binning = [(d, t) for s, d, t in rec.advances if s == "binning"]
    n_chunks = -(-n_ions // chunk)
    assert n_chunks >= 3 and len(binning) >= n_chunks
    assert {t for _, t in binning} == {len(binning)}  # one fixed total: the chunks of the file
    assert [d for d, _ in binning] == list(range(1, len(binning) + 1))
    decoding = [(d, t) for s, d, t in rec.advances if s == "decoding"]
    assert decoding == [(i, 200) for i in range(1, res.decoded.n_iter + 1)] and decoding
    # every fraction belongs to a stage that has started
    assert {s for s, _, _ in rec.advances} <= set(rec.stages)


def test_plain_two_argument_callback_still_works(run_file):
    from probeseq.pipeline.stages import count_file

    path, lattice, _, _ = run_file
    plain = []
    counted = count_file(path, METALS, lattice, progress=lambda stage, message: plain.append(stage), chunk_size=5000)
    rec = Recorder()
    again = count_file(path, METALS, lattice, progress=rec, chunk_size=5000)
    # the same stage lines either way; only the object with advance() is told the chunks done
    assert plain == rec.stages and "binning" in plain
    assert [a for a in rec.advances if a[0] == "binning"]
    np.testing.assert_array_equal(counted.columns.counts, again.columns.counts)


def test_pass_over_ions_in_memory_reports_its_blocks(run_file):
    from probeseq.pipeline.stages import count_ions

    _, lattice, _, ions = run_file
    rec = Recorder()
    count_ions(ions, METALS, lattice, progress=rec)
    assert [a for a in rec.advances if a[0] == "binning"] == [("binning", 1, 1)]  # one block of at most 2**20 ions
