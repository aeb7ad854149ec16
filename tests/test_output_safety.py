"""Outputs never cost the user data: inputs are never outputs, --force replaces only probeseq's own
files, replacement is atomic, one writer at a time, and interrupts leave complete results.

Every test that runs a command checks that every input file is byte-identical afterwards.
"""

import hashlib
import json
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from probeseq import InputError
from probeseq.cli.main import main
from probeseq.outputs.folder import (
    MANIFEST_NAME,
    _Lock,
    _side,
    check_outdir,
    check_outfile,
    is_probeseq_file,
    is_staging_name,
    read_manifest,
    staged_outdir,
)

ROOT = Path(__file__).resolve().parents[1]
SAMPLE = ROOT / "sample_data" / "rodnet7-batch-150C"
FAST = ["-q", "--n-boot", "20", "--n-starts", "1"]


def tree_hashes(*roots) -> dict:
    """sha256 of every file under the given folders (or of the given files)."""
    out = {}
    for r in map(Path, roots):
        files = [r] if r.is_file() else sorted(p for p in r.rglob("*") if p.is_file())
        for p in files:
            out[str(p)] = hashlib.sha256(p.read_bytes()).hexdigest()
    return out


@pytest.fixture(scope="module")
def analysed(tmp_path_factory):
    """A copy of the sample run folder and one complete analysis of it (module scope: made once)."""
    base = tmp_path_factory.mktemp("safety")
    run = base / "run"
    shutil.copytree(SAMPLE, run)
    out = base / "analysis"
    assert main(["analyze", str(run), "--out", str(out), *FAST]) == 0
    return base, run, out


@pytest.fixture
def work(analysed, tmp_path):
    """A private copy of the run folder and of its analysis for one test."""
    _, run0, out0 = analysed
    run, out = tmp_path / "run", tmp_path / "analysis"
    shutil.copytree(run0, run)
    shutil.copytree(out0, out)
    return tmp_path, run, out


def one_error_line(capsys, *fragments):
    err = capsys.readouterr().err.strip().splitlines()
    lines = [ln for ln in err if ln.strip()]
    assert len(lines) == 1 and lines[0].startswith("error:"), err
    assert "internal error" not in lines[0] and "Traceback" not in lines[0]
    for f in fragments:
        assert f in lines[0], (f, lines[0])
    return lines[0]


# ---------------------------------------------------------------------- inputs are never outputs
@pytest.mark.parametrize("target", ["run", "parent"])
def test_analyze_never_writes_over_its_run_folder(work, capsys, target):
    base, run, _ = work
    (base / "notes.txt").write_text("my notes")
    before = tree_hashes(base)
    out = run if target == "run" else base
    assert main(["analyze", str(run), "--out", str(out), "--force", *FAST]) == 1
    one_error_line(capsys, str(out))
    assert tree_hashes(base) == before


def test_output_inside_the_run_folder_is_allowed(work):
    base, run, _ = work
    before = tree_hashes(run)
    assert main(["analyze", str(run), "--out", str(run / "analysis"), *FAST]) == 0
    after = tree_hashes(run)
    assert {k: v for k, v in after.items() if "/analysis/" not in k} == before
    assert (run / "analysis" / "results.json").is_file()


def test_compare_refuses_the_parent_of_its_inputs(work, capsys):
    base, _, out = work
    second = base / "analysis2"
    shutil.copytree(out, second)
    (base / "notes.txt").write_text("unrelated")
    before = tree_hashes(base)
    assert main(["compare", str(out), str(second), "--out", str(base), "--force", "-q"]) == 1
    one_error_line(capsys, "contains the input")
    assert tree_hashes(base) == before


def test_decode_refuses_its_own_input_folder(work, capsys):
    base, run, _ = work
    cols = base / "cols"
    assert main(["columns", str(run / "ions.h5"), "--metals", "Co,Zn", "--lattice", str(run / "lattice.toml"),
                 "--out", str(cols), "-q"]) == 0
    before = tree_hashes(base)
    assert main(["decode", str(cols), "--out", str(cols), "--force", "-q"]) == 1
    one_error_line(capsys, "input")
    assert tree_hashes(base) == before


@pytest.mark.parametrize("force", [False, True])
def test_single_file_outputs_never_replace_inputs(work, capsys, force):
    base, run, out = work
    ions_csv = base / "ions.csv"
    assert main(["simulate", str(ions_csv), "--top-radius", "4", "--depth", "6", "-q"]) == 0
    ions_csv.write_text(ions_csv.read_text().split("\n", 1)[1])  # now a user's file: no probeseq mark
    before = tree_hashes(base)
    f = ["--force"] if force else []
    cases = [
        ["range", str(ions_csv), "--metals", "Co,Zn", "--out", str(ions_csv), *f],
        ["export", str(out), "--format", "json", "--out", str(out / "results.json"), *f],
        ["export", str(out), "--format", "hdf5", "--out", str(out / "columns.h5"), *f],
        ["export", str(out), "--format", "csv", "--out", str(ions_csv), *f],
        ["plan", "--metals", "Co,Zn", "--lattice", str(run / "lattice.toml"), "--out", str(run / "lattice.toml"), *f],
        ["range", str(run / "ions.h5"), "--metals", "Co,Zn", "--out", str(base / "r.toml"),
         "--figure", str(out / "figures" / "spectrum.png"), *f],
    ]
    for argv in cases:
        code = main(argv)
        msg = capsys.readouterr().err
        if force and argv[0] == "range" and "--figure" in argv:
            # a probeseq figure outside the command's inputs may be replaced with --force
            assert code == 0, msg
            continue
        assert code == 1, (argv, msg)
        assert msg.count("error:") == 1 and "internal error" not in msg, msg
        if not force and argv[0] != "plan":
            assert "exists" in msg or "input" in msg, msg
    after = tree_hashes(base)
    changed = {k for k in before if before[k] != after.get(k)}
    if force:  # only the figure pair of the one accepted case changed
        assert changed <= {str(out / "figures" / "spectrum.png"), str(out / "figures" / "spectrum.svg")}
    else:
        assert not changed


def test_force_keeps_a_folder_with_foreign_files(work, capsys):
    base, run, out = work
    (out / "figures" / "my_plot.png").write_bytes(b"\x89PNG not probeseq's")
    before = tree_hashes(base)
    assert main(["analyze", str(run), "--out", str(out), "--force", *FAST]) == 1
    one_error_line(capsys, "figures/my_plot.png", "did not write")
    assert tree_hashes(base) == before


def test_force_replaces_a_previous_output_and_its_exports(work):
    base, run, out = work
    assert main(["export", str(out), "--format", "csv", "-q"]) == 0
    assert is_probeseq_file(out / "exports" / "tracks.csv")
    before_run = tree_hashes(run)
    assert main(["analyze", str(run), "--out", str(out), "--force", *FAST]) == 0
    assert not (out / "exports").exists()
    assert read_manifest(out) >= {"results.json", "tracks.csv", "figures/tracks.svg"}
    assert tree_hashes(run) == before_run
    assert sorted(p.name for p in base.iterdir()) == ["analysis", "run"]  # no staging, lock or swap left


def test_existing_file_needs_force_and_must_be_probeseq_s(tmp_path):
    mine = tmp_path / "plan.json"
    mine.write_text('{"written_by": "written by probeseq 0.1.0"}')
    theirs = tmp_path / "theirs.json"
    theirs.write_text('{"a": 1}')
    with pytest.raises(InputError, match="--force"):
        check_outfile(mine)
    assert check_outfile(mine, force=True) == mine
    with pytest.raises(InputError, match="not written by probeseq"):
        check_outfile(theirs, force=True)
    with pytest.raises(InputError, match="is a folder"):
        check_outfile(tmp_path, force=True)


def test_empty_folder_and_missing_parents_are_fine(tmp_path):
    (tmp_path / "empty").mkdir()
    with staged_outdir(tmp_path / "empty") as st:
        (st / "a.txt").write_text("a")
    with staged_outdir(tmp_path / "x" / "y" / "z") as st:
        (st / "b.txt").write_text("b")
    assert (tmp_path / "empty" / "a.txt").is_file() and (tmp_path / "x" / "y" / "z" / "b.txt").is_file()


# ---------------------------------------------------------------------- run descriptions
def test_run_name_cannot_send_outputs_elsewhere(work, monkeypatch):
    base, run, _ = work
    text = (run / "run.toml").read_text()
    (run / "run.toml").write_text(text.replace('name = "', 'name = "/../../../victim', 1))
    before = tree_hashes(base)
    cwd = base / "cwd"
    cwd.mkdir()
    monkeypatch.chdir(cwd)
    assert main(["analyze", str(run), *FAST]) == 0
    made = [p for p in cwd.iterdir()]
    assert len(made) == 1 and made[0].name.startswith("analysis_") and "/" not in made[0].name
    assert ".." not in made[0].name and (made[0] / "results.json").is_file()
    assert {k: v for k, v in tree_hashes(base).items() if "/cwd/" not in k} == before


# ---------------------------------------------------------------------- one writer, atomic swap
def test_a_second_writer_of_the_same_folder_is_refused(work, capsys):
    base, run, _ = work
    target = base / "new"
    lock = _Lock(target).acquire("test")
    try:
        assert main(["analyze", str(run), "--out", str(target), *FAST]) == 1
        one_error_line(capsys, "another probeseq command is writing")
    finally:
        lock.release()
    assert not target.exists() and not _side(target, "lock").exists()


def test_two_processes_racing_for_one_new_folder(work):
    """Started together into one new --out without --force: exactly one writes it, whole."""
    base, run, _ = work
    target = base / "raced"
    cmd = [sys.executable, "-m", "probeseq", "analyze", str(run), "--out", str(target), *FAST]
    env = {**os.environ, "MPLBACKEND": "Agg"}
    procs = [subprocess.Popen(cmd, stderr=subprocess.PIPE, text=True, env=env) for _ in range(2)]
    results = [(p.wait(timeout=300), p.stderr.read()) for p in procs]
    codes = sorted(c for c, _ in results)
    assert codes == [0, 1], results
    loser = [e for c, e in results if c == 1][0]
    assert "another probeseq command is writing" in loser or "not empty" in loser, loser
    assert read_manifest(target) is not None and (target / "results.json").is_file()
    assert sorted(p.name for p in base.iterdir()) == ["analysis", "raced", "run"]


def _staging(target: Path):
    return [p for p in target.parent.iterdir() if p.name.startswith(f".{target.name}.probeseq-staging")]


def _run_and_signal(run, target, sig, delay_after_staging=0.0):
    """Start analyze --force into ``target``; send ``sig`` once its staging folder exists."""
    cmd = [sys.executable, "-m", "probeseq", "analyze", str(run), "--out", str(target), "--force", *FAST]
    env = {**os.environ, "MPLBACKEND": "Agg"}
    p = subprocess.Popen(cmd, stderr=subprocess.PIPE, text=True, env=env)
    t0 = time.monotonic()
    while not _staging(target) and p.poll() is None and time.monotonic() - t0 < 240:
        time.sleep(0.01)
    assert p.poll() is None, "the command ended before its outputs were staged"
    time.sleep(delay_after_staging)
    p.send_signal(sig)
    code = p.wait(timeout=120)
    return code, p.stderr.read()


@pytest.mark.parametrize("sig", [signal.SIGTERM, signal.SIGHUP, signal.SIGINT])
def test_interrupt_while_writing_keeps_the_old_results(work, sig):
    base, run, out = work
    before = tree_hashes(base)
    code, err = _run_and_signal(run, out, sig)
    assert code == (130 if sig == signal.SIGINT else 128 + int(sig)), err
    assert "earlier results were left untouched" in err and "Traceback" not in err
    assert tree_hashes(base) == before  # old results whole, inputs untouched
    assert sorted(p.name for p in base.iterdir()) == ["analysis", "run"]  # staging and lock removed


@pytest.mark.parametrize("delay", [0.0, 1.5])
def test_kill_leaves_complete_results_and_the_next_run_cleans_up(work, delay):
    base, run, out = work
    before_run = tree_hashes(run)
    old = tree_hashes(out)
    code, _ = _run_and_signal(run, out, signal.SIGKILL, delay)
    assert code == -signal.SIGKILL
    # whatever the moment of the kill, --out holds complete results: the old ones or the new ones
    assert read_manifest(out) is not None and (out / "results.json").is_file()
    assert tree_hashes(run) == before_run
    # a staging folder may be left: compare never takes it for a run
    assert main(["compare", str(base), "--out", str(base / "cmp"), "-q"]) == 0
    table = (base / "cmp" / "comparison.csv").read_text()
    assert ".probeseq-staging" not in table
    # the next writer removes what the killed one left
    assert main(["analyze", str(run), "--out", str(out), "--force", *FAST]) == 0
    assert not _staging(out) and not any(is_staging_name(p.name) for p in base.iterdir())
    assert tree_hashes(run) == before_run
    assert set(tree_hashes(out)) - {str(out / MANIFEST_NAME)} == set(old) - {str(out / MANIFEST_NAME)}


@pytest.mark.parametrize("staging_complete", [True, False])
def test_a_swap_cut_between_its_two_renames_is_completed_or_undone(tmp_path, staging_complete):
    """The two-rename swap (where no atomic exchange exists), killed between the renames."""
    target = tmp_path / "out"
    with staged_outdir(target) as st:
        (st / "results.json").write_text("old")
    # the state a kill leaves: target moved aside, the new results (complete or not) in staging
    os.replace(target, _side(target, "previous", "1-aa"))
    stage = _side(target, "staging", "1-aa")
    stage.mkdir()
    (stage / "results.json").write_text("new")
    if staging_complete:
        (stage / MANIFEST_NAME).write_text(json.dumps({"written_by": "written by probeseq 0", "files":
                                                       ["results.json"]}))
    assert check_outdir(tmp_path / "elsewhere") is not None  # unrelated folders are not affected
    with staged_outdir(tmp_path / "other") as st:
        (st / "a").write_text("a")
    # the next writer of the same folder completes (new results) or undoes (old results) the swap
    with pytest.raises(InputError, match="--force"):
        with staged_outdir(target):
            pass
    assert (target / "results.json").read_text() == ("new" if staging_complete else "old")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["other", "out"]


@pytest.mark.parametrize("suffix", [".csv", ".h5"])
def test_only_simulated_ion_files_carry_the_mark(tmp_path, small_run, suffix):
    """A converted measurement must never become replaceable by --force; simulated data may."""
    from probeseq.io.readers import write_ions

    converted = write_ions(small_run.ions, tmp_path / f"converted{suffix}")
    simulated = Path(small_run.write(tmp_path / f"simulated{suffix}")["ions"])
    assert not is_probeseq_file(converted)
    assert is_probeseq_file(simulated)
    with pytest.raises(InputError, match="not written by probeseq"):
        check_outfile(converted, force=True)


def test_a_lock_that_cannot_be_made_is_one_line_error(tmp_path):
    """Where no lock file can be made beside --out (here its parent is a file), the user gets one line."""
    blocker = tmp_path / "a_file"
    blocker.write_text("x")
    with pytest.raises(InputError, match="cannot write in"):
        _Lock(blocker / "out").acquire("--out")
    assert blocker.read_text() == "x"
