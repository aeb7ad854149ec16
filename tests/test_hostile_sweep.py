"""Hostile-input sweep, pytest subset: every command and every kind of malformed input.

Each parametrised test builds one case's input tree in a temporary folder, runs the command in a
worker process with a wall-time limit, and asserts what a user must be able to rely on: a clean
one-line error (or a result, only for valid input or with a warning), never a traceback or an
internal error, inputs unchanged, outputs complete or absent, no staging folders left behind.
The full sweep (all cases) is ``tests/benchmarks/sweep_hostile.py``.
"""

import pytest
from hostile_cases import Runner, pytest_subset, run_case
from hostile_cases.base import make_base

SUBSET = pytest_subset()
TIMEOUT_S = 60.0


@pytest.fixture(scope="module")
def runner():
    """One worker process for the whole module (probeseq imported once)."""
    r = Runner(isolation="worker", timeout=TIMEOUT_S)
    yield r
    r.close()


@pytest.fixture(scope="module")
def base(tmp_path_factory, runner):
    """The small valid data every case is built from, made once."""
    return make_base(tmp_path_factory.mktemp("hostile_base"), runner)


def test_subset_covers_every_command_and_kind():
    from hostile_cases.cases import COMMANDS, KINDS, all_cases

    assert len(all_cases()) >= 800
    assert {c.command for c in SUBSET} == set(COMMANDS)
    assert {c.kind for c in SUBSET} == set(KINDS)
    assert len({c.id for c in SUBSET}) == len(SUBSET)


@pytest.mark.parametrize("case", SUBSET, ids=[c.id for c in SUBSET])
def test_hostile_case(case, base, runner, tmp_path):
    outcome = run_case(case, base, tmp_path, runner)
    assert not outcome.problems, (
        f"{case.command_line()}\nstatus {outcome.status}, exit {outcome.exit_code}: {outcome.message}\n"
        + "\n".join(outcome.problems) + "\n--- stderr (tail) ---\n" + outcome.stderr[-1500:])


# ---------------------------------------------------------------------- the harness itself
class _FakeRunner:
    """Stands in for a worker: writes the given stderr and applies ``effect`` to the case folders."""

    timeout = 1.0

    def __init__(self, stderr: str, code: int = 1, effect=None, how: str = "ok"):
        self.stderr, self.code, self.effect, self.how = stderr, code, effect, how

    def run(self, argv, cwd, out_path, err_path):
        from pathlib import Path

        Path(err_path).write_text(self.stderr)
        if self.effect is not None:
            self.effect(Path(cwd).parent / "in", Path(cwd))
        return self.code, self.how, 0.0


def _fake_case():
    from hostile_cases.cases import Case, _step

    return Case("selftest/fake", "inspect", "option", ("inspect", "{in}/notes.txt"),
                (_step("write_file", name="notes.txt", text="keep me\n"),), "error")


@pytest.mark.parametrize("effect, stderr, code, expected", [
    (lambda i, w: (i / "notes.txt").write_text("changed"), "error: x\n", 1, "input changed: notes.txt"),
    (lambda i, w: (i / "notes.txt").unlink(), "error: x\n", 1, "input removed: notes.txt"),
    (lambda i, w: (w / ".out.staging-0badcafe").mkdir(), "error: x\n", 1, "leftover staging folder"),
    (lambda i, w: ((w / "an").mkdir(), (w / "an" / "results.json").write_text("{}")), "", 0, "incomplete output"),
    (lambda i, w: (w / "empty").mkdir(), "error: x\n", 1, "empty folder left behind"),
    (lambda i, w: (w.parent / "escaped").mkdir(), "error: x\n", 1, "wrote outside"),
    (None, "Traceback (most recent call last):\nValueError: x\n", 1, "traceback on stderr"),
    (None, "error: internal error (KeyError: 'a'); set PROBESEQ_DEBUG=1 for details\n", 3, "internal error"),
    (None, "error: first line\nsecond line\n", 1, "error spans several lines"),
    (None, "", 1, "non-zero exit without an 'error:' line"),
    (None, "", 0, "invalid input accepted without a warning"),
])
def test_harness_detects_each_broken_property(tmp_path, effect, stderr, code, expected):
    outcome = run_case(_fake_case(), tmp_path / "no_base", tmp_path, _FakeRunner(stderr, code, effect))
    assert any(p.startswith(expected) or expected in p for p in outcome.problems), outcome.problems


def test_harness_accepts_a_clean_error_and_a_warned_result(tmp_path):
    ok = run_case(_fake_case(), tmp_path, tmp_path, _FakeRunner("[    0.1 s] ranging: x\nerror: bad file\n", 1))
    assert ok.status == "clean-error" and not ok.problems
    warned = run_case(_fake_case(), tmp_path, tmp_path, _FakeRunner("warning: dropped 3 rows\n", 0))
    assert warned.status == "accepted-warning" and not warned.problems


def test_harness_reports_a_hang(tmp_path):
    outcome = run_case(_fake_case(), tmp_path, tmp_path, _FakeRunner("", None, how="hang"))
    assert outcome.status == "hang" and outcome.problems
