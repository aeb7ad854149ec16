"""Tables and arrays written while the statistics run (probeseq.pipeline.analysis.TablesAhead):
the same files as written afterwards, a failed child made good, leftovers cleaned, the hook's order."""

import os

import h5py
import numpy as np
import pytest

import probeseq.pipeline.analysis as an
from probeseq.io.readers import write_ions
from probeseq.outputs.folder import recover_outdir
from probeseq.simulation.simulate import simulate_run
from probeseq.study.batch import analyze_run


@pytest.fixture(scope="module")
def source(tmp_path_factory):
    run = simulate_run(pattern="long-block", top_radius_nm=5, depth_nm=18, seed=21)
    src = tmp_path_factory.mktemp("ahead") / "run.h5"
    write_ions(run.ions, src)
    return src, run.lattice


def _datasets(path):
    out = {}
    with h5py.File(path, "r") as f:
        f.visititems(lambda name, obj: out.__setitem__(name, obj[()]) if isinstance(obj, h5py.Dataset) else None)
    return out


def _spy(monkeypatch, record):
    real = an.tables_ahead

    def spy(*args, **kwargs):
        a = real(*args, **kwargs)
        record.append(a)
        return a

    monkeypatch.setattr(an, "tables_ahead", spy)
    monkeypatch.setattr(an, "TABLES_AHEAD_MIN_SITES", 0)  # a small run: written ahead all the same here


def test_tables_written_ahead_are_those_written_after(tmp_path, monkeypatch, source):
    src, lattice = source
    plain = analyze_run(src, tmp_path / "plain", metals=("Co", "Zn"), lattice=lattice).outdir
    made = []
    _spy(monkeypatch, made)
    ahead = analyze_run(src, tmp_path / "ahead", metals=("Co", "Zn"), lattice=lattice).outdir
    assert len(made) == 1 and made[0] is not None and made[0].started
    assert not made[0].folder.exists()  # the hidden folder is gone, its files moved in
    for name in ("runs.csv", "tracks.csv"):
        assert (ahead / name).read_bytes() == (plain / name).read_bytes()
    for name in ("columns.h5", "decoded.h5"):
        a, b = _datasets(ahead / name), _datasets(plain / name)
        assert a.keys() == b.keys() and len(a) > 3
        for k in a:
            np.testing.assert_array_equal(a[k], b[k])
    assert not [p for p in tmp_path.iterdir() if ".probeseq-" in p.name]


def _fails(columns, decoded, folder, files):
    (folder / "runs.csv").write_text("half\n")
    raise RuntimeError("the disk is full")


def test_a_failed_child_is_made_good_by_the_output_stage(tmp_path, monkeypatch, source):
    src, lattice = source
    made = []
    _spy(monkeypatch, made)
    monkeypatch.setattr(an, "_write_ahead", _fails)
    out = analyze_run(src, tmp_path / "out", metals=("Co", "Zn"), lattice=lattice).outdir
    assert made[0].started and not made[0].folder.exists()
    assert (out / "runs.csv").read_text().splitlines()[0].startswith("rod,")  # written again, whole
    assert {"columns.h5", "decoded.h5", "tracks.csv"} <= {p.name for p in out.iterdir()}


def test_leftover_folders_of_ended_processes_are_removed(tmp_path):
    target = tmp_path / "out"
    dead = tmp_path / ".out.probeseq-ahead-999999999-0badf00d"  # no such process
    live = tmp_path / f".out.probeseq-ahead-{os.getpid()}-0badf00d"
    for d in (dead, live):
        d.mkdir()
        (d / "runs.csv").write_text("x\n")
    recover_outdir(target)
    assert not dead.exists() and live.exists()


def test_the_final_decoding_is_handed_over_before_the_statistics(source):
    from probeseq.io.readers import read_ions
    from probeseq.pipeline import analyze

    src, lattice = source
    events = []

    class Progress:
        def __call__(self, stage, message):
            events.append(stage)

        def decoded(self, columns, decoded):
            events.append(("decoded", columns, decoded))

    res = analyze(read_ions(src), ("Co", "Zn"), lattice, progress=Progress())
    at = [i for i, e in enumerate(events) if isinstance(e, tuple)]
    assert len(at) == 1
    _, cols, dec = events[at[0]]
    assert cols is res.columns and dec is res.decoded  # the final decoding, as the result holds it
    assert events.index("decoding") < at[0] < events.index("statistics")


def test_no_hidden_folder_means_no_child(tmp_path, monkeypatch, source):
    """Where the hidden folder cannot be made, nothing is started and the output stage writes
    everything as usual."""
    import probeseq.outputs.folder as folder

    def refuse(outdir):
        raise PermissionError(13, "Permission denied")

    src, lattice = source
    made = []
    _spy(monkeypatch, made)
    monkeypatch.setattr(folder, "ahead_folder", refuse)
    out = analyze_run(src, tmp_path / "out", metals=("Co", "Zn"), lattice=lattice).outdir
    assert made == [None]
    assert {"columns.h5", "decoded.h5", "tracks.csv", "runs.csv"} <= {p.name for p in out.iterdir()}


def test_input_beside_the_output_folder_is_left_byte_identical(tmp_path, monkeypatch, source):
    """The hidden folder is made beside the output folder, here the input's own folder: the input
    file is byte-identical afterwards, also after a second run with --force, and nothing hidden is
    left there."""
    import shutil

    src0, lattice = source
    src = tmp_path / "run.h5"
    shutil.copyfile(src0, src)
    before = src.read_bytes()
    made = []
    _spy(monkeypatch, made)
    for force in (False, True):
        analyze_run(src, tmp_path / "out", metals=("Co", "Zn"), lattice=lattice, force=force)
    assert made and all(m is not None and m.started for m in made)
    assert src.read_bytes() == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out", "run.h5"]
