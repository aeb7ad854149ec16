import csv
import json

import h5py
import numpy as np
import pytest

from probeseq import InputError
from probeseq.cli.main import main
from probeseq.outputs.export import export_outdir, load_outdir, parse_depth, parse_rods
from probeseq.pipeline.analysis import analyze, write_analysis
from probeseq.pipeline.options import AnalysisOptions
from probeseq.simulation.simulate import simulate_run


@pytest.fixture(scope="module")
def outdir(tmp_path_factory):
    run = simulate_run(pattern="long-block", top_radius_nm=5, depth_nm=15, seed=31)
    res = analyze(run.ions, ("Co", "Zn"), run.lattice, options=AnalysisOptions(n_boot=30))
    return write_analysis(res, tmp_path_factory.mktemp("exp") / "out"), res


def test_hdf5_export_is_self_describing_and_matches(outdir):
    d, res = outdir
    of = load_outdir(d)
    rods = np.flatnonzero(of.columns.mask.any(1))[:4]
    p = export_outdir(d, "hdf5", rods=rods)
    with h5py.File(p, "r") as f:
        for name in ("counts", "posteriors", "viterbi", "rod_xy_nm", "site_z_nm", "transmat"):
            assert "unit" in f[name].attrs and "description" in f[name].attrs
        assert f["posteriors"].shape[0] == len(rods)
        np.testing.assert_array_equal(f["rod_id"][...], rods)
        np.testing.assert_allclose(f["transmat"][...], res.decoded.transmat)
        params = json.loads(f["parameters"].attrs["classification"])
        assert params["label"] == res.classification.label
        post = f["posteriors"][...]
        m = f["mask"][...].astype(bool)
        np.testing.assert_allclose(post[m].sum(-1), 1.0, atol=1e-5)


def test_csv_export_respects_rods_and_depth(outdir):
    d, res = outdir
    of = load_outdir(d)
    rod = int(np.flatnonzero(of.columns.mask.sum(1) > 20)[0])
    z = of.columns.site_depths_nm()[rod][of.columns.mask[rod]]
    lo, hi = float(z[3]), float(z[12])
    p = export_outdir(d, "csv", rods=np.array([rod]), depth_nm=(lo, hi), force=True)
    with open(p) as fh:
        first = fh.readline()
        rows = list(csv.DictReader(fh))
    assert first.startswith("# written by probeseq")  # the mark that lets --force replace it later
    assert {int(r["rod"]) for r in rows} == {rod}
    zs = np.array([float(r["z_nm"]) for r in rows])
    assert zs.min() >= lo - 1e-3 and zs.max() <= hi + 1e-3 and len(rows) == 10


def test_bad_export_requests(outdir, capsys):
    d, res = outdir
    n = res.columns.n_rods
    with pytest.raises(InputError, match=f"rods 0-{n - 1} exist"):
        parse_rods(f"{n + 5}", n)
    with pytest.raises(InputError, match="empty window"):
        parse_depth("5:2")
    with pytest.raises(InputError, match="no decoded site"):
        export_outdir(d, "csv", depth_nm=(1000.0, 2000.0), force=True)
    code = main(["export", str(d), "--format", "docx"])
    err = capsys.readouterr().err
    assert code == 1 and "not supported" in err


def test_older_schema_is_refused(outdir, tmp_path):
    d, _ = outdir
    import shutil

    old = tmp_path / "old"
    shutil.copytree(d, old)
    r = json.loads((old / "results.json").read_text())
    r["schema_version"] = 0
    (old / "results.json").write_text(json.dumps(r))
    with pytest.raises(InputError, match="schema version 0"):
        load_outdir(old)
