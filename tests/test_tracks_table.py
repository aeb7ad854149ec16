"""The tracks table of an analysis: CSV for small runs, HDF5 above a size, the same rows either way."""

import csv
import json

import h5py
import numpy as np
import pytest

from probeseq.cli.main import main
from probeseq.exceptions import InputError
from probeseq.outputs.results import TRACKS_COLUMNS, TRACKS_CSV_MAX_ROWS, tracks_table_files
from probeseq.simulation.simulate import simulate_run


def test_auto_choice_switches_to_hdf5_above_the_size():
    assert tracks_table_files("auto", TRACKS_CSV_MAX_ROWS) == ("tracks.csv",)
    assert tracks_table_files("auto", TRACKS_CSV_MAX_ROWS + 1) == ("tracks.h5",)
    assert tracks_table_files("csv", 10 ** 9) == ("tracks.csv",)
    assert tracks_table_files("hdf5", 10) == ("tracks.h5",)
    assert tracks_table_files("both", 10) == ("tracks.csv", "tracks.h5")
    with pytest.raises(InputError, match="--tracks-table 'parquet'"):
        tracks_table_files("parquet", 10)


@pytest.fixture(scope="module")
def analysed(tmp_path_factory):
    d = tmp_path_factory.mktemp("tracks_table")
    run = simulate_run(pattern="long-block", metals=("Co", "Zn"), top_radius_nm=5, depth_nm=12, seed=77)
    paths = run.write(d / "run.h5")
    out = d / "out"
    code = main(["analyze", paths["ions"], "--metals", "Co,Zn", "--lattice", paths["lattice"], "--out", str(out),
                 "--n-boot", "20", "--tracks-table", "both", "-q"])
    assert code == 0
    return d, paths, out


def test_hdf5_table_holds_the_csv_rows(analysed):
    d, paths, out = analysed
    with open(out / "tracks.csv", newline="") as fh:
        rows = [r for r in csv.DictReader(line for line in fh if not line.startswith("#"))]
    with h5py.File(out / "tracks.h5", "r") as f:
        g = f["tracks"]
        metals = json.loads(g.attrs["metals"])
        assert set(g) == set(TRACKS_COLUMNS)
        assert g["z_nm"].attrs["unit"] == "nm" and g["posterior"].attrs["unit"] == "probability"
        # the state enumeration names the metals by their codes
        assert h5py.check_enum_dtype(g["state"].dtype) == {m: i for i, m in enumerate(metals)}
        cols = {k: g[k][:] for k in g}
    assert len(rows) == cols["rod"].size > 100
    assert [int(r["rod"]) for r in rows] == cols["rod"].tolist()
    assert [int(r["site"]) for r in rows] == cols["site"].tolist()
    assert [r["state"] for r in rows] == [metals[c] for c in cols["state"]]
    for k in ("rod_x_nm", "rod_y_nm", "z_nm", "posterior"):  # CSV at 4 decimals, HDF5 float32
        np.testing.assert_allclose([float(r[k]) for r in rows], cols[k], atol=6e-5, rtol=1e-6)
    res = json.loads((out / "results.json").read_text())
    assert res["outputs"]["tracks_table"] == ["tracks.csv", "tracks.h5"]
    from probeseq.outputs.folder import is_probeseq_file

    assert is_probeseq_file(out / "tracks.h5")  # --force may replace it


def test_hdf5_only_and_the_terminal_says_where(analysed, capsys):
    d, paths, _ = analysed
    out = d / "only_h5"
    code = main(["analyze", paths["ions"], "--metals", "Co,Zn", "--lattice", paths["lattice"], "--out", str(out),
                 "--n-boot", "20", "--tracks-table", "hdf5"])
    text = capsys.readouterr().out
    assert code == 0
    assert (out / "tracks.h5").exists() and not (out / "tracks.csv").exists()
    assert "tracks.h5" in text and "--format csv" in text
    assert json.loads((out / "results.json").read_text())["outputs"]["tracks_table"] == ["tracks.h5"]
    # the CSV is one export away, and holds the same sites
    assert main(["export", str(out), "--format", "csv"]) == 0
    with h5py.File(out / "tracks.h5", "r") as f:
        n = f["tracks"]["rod"].shape[0]
    lines = [ln for ln in (out / "exports" / "tracks.csv").read_text().splitlines() if not ln.startswith("#")]
    assert len(lines) - 1 == n


def test_bad_choice_is_one_line_before_any_work(analysed, capsys):
    d, paths, _ = analysed
    out = d / "bad"
    code = main(["analyze", paths["ions"], "--metals", "Co,Zn", "--lattice", paths["lattice"], "--out", str(out),
                 "--tracks-table", "parquet"])
    err = capsys.readouterr().err
    assert code != 0 and "--tracks-table 'parquet'" in err and len(err.strip().splitlines()) == 1
    assert not out.exists()


def test_state_is_the_site_call_not_the_path():
    # tracks.csv's state is each site's metal of largest posterior, with that posterior; the
    # Viterbi path (here replaced by a path of the first metal everywhere) does not enter it
    from dataclasses import replace

    from probeseq.outputs.results import tracks_table
    from probeseq.pipeline import AnalysisOptions, analyze

    run = simulate_run(pattern="short-repeat", metals=("Co", "Zn"), top_radius_nm=6, depth_nm=12, eta=0.4, seed=78)
    res = analyze(run.ions, run.config.metals, run.lattice, options=AnalysisOptions(seed=1, n_boot=20))
    dec = replace(res.decoded, viterbi=np.where(res.decoded.mask, 0, -1).astype(res.decoded.viterbi.dtype))
    t = tracks_table(res.columns, dec, state_codes=True)
    post = res.decoded.posteriors[t["rod"], t["site"]]
    assert (t["state"] == post.argmax(axis=1)).all()
    assert (t["state"] == 1).mean() > 0.2  # the all-Co path was not used
    np.testing.assert_array_equal(t["posterior"], post.max(axis=1))
