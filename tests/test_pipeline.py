import csv
import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from probeseq import InputError
from probeseq.cli.main import main
from probeseq.outputs.results import TRACKS_COLUMNS
from probeseq.pipeline.analysis import analyze, write_analysis
from probeseq.pipeline.options import AnalysisOptions
from probeseq.simulation.simulate import simulate_run

ROOT = Path(__file__).resolve().parents[1]
CHECKER = ROOT.parent / "shared" / "examples" / "check_outputs.py"


@pytest.fixture(scope="module")
def block_run():
    return simulate_run(pattern="long-block", top_radius_nm=5, depth_nm=18, seed=21)


@pytest.fixture(scope="module")
def block_result(block_run):
    return analyze(block_run.ions, ("Co", "Zn"), block_run.lattice, options=AnalysisOptions(n_boot=60, seed=3))


def test_long_block_run_is_labelled_and_close_to_truth(block_run, block_result):
    r = block_result
    assert r.classification.label == "long-block"
    truth = block_run.truth
    for m in ("Co", "Zn"):
        assert abs(r.statistics.estimates[f"composition.{m}"] - truth["composition_sites"][m]) < 0.03
    assert r.columns.resolvable
    assert r.columns.n_rods >= 0.8 * truth["counts"]["rods"]


def test_results_layout_and_tracks(tmp_path, block_result):
    out = write_analysis(block_result, tmp_path / "out")
    res = json.loads((out / "results.json").read_text())
    for key in ("label", "along_rod", "rod_to_rod", "confidence"):
        assert key in res["classification"]
    assert set(res["composition"]) == {"Co", "Zn"}
    assert set(res["statistics"]["mean_run_length_sites"]) == {"Co", "Zn"}
    assert res["columns"]["n_rods"] == block_result.columns.n_rods
    assert res["schema_version"] == 1 and res["provenance"]["seed"] == 3
    with open(out / "tracks.csv") as fh:
        rows = list(csv.DictReader(fh))
    assert tuple(rows[0].keys()) == TRACKS_COLUMNS
    assert len(rows) == int(block_result.columns.mask.sum())
    assert {r["state"] for r in rows} <= {"Co", "Zn"}
    # the rod axis position follows the tilt with depth
    rod0 = [r for r in rows if r["rod"] == rows[0]["rod"]]
    if len(rod0) > 2:
        z = np.array([float(r["z_nm"]) for r in rod0])
        x = np.array([float(r["rod_x_nm"]) for r in rod0])
        slope = np.polyfit(z, x, 1)[0]
        assert abs(slope - block_result.columns.tilt[0]) < 1e-3
    assert (out / "runs.csv").exists() and (out / "bootstrap.h5").exists()


def test_same_seed_same_results(block_run):
    a = analyze(block_run.ions, ("Co", "Zn"), block_run.lattice, options=AnalysisOptions(n_boot=30, seed=5))
    b = analyze(block_run.ions, ("Co", "Zn"), block_run.lattice, options=AnalysisOptions(n_boot=30, seed=5))
    da, db = a.to_dict(), b.to_dict()
    for d in (da, db):
        d.pop("timings_s")
    assert json.dumps(da, sort_keys=True, default=str) == json.dumps(db, sort_keys=True, default=str)


@pytest.mark.parametrize("kw,fragment", [
    ({"alpha": 1.5}, "--alpha"), ({"long_block_sites": 0}, "--long-block-sites"),
    ({"copy_threshold": -0.1}, "--copy-threshold"), ({"n_boot": 3}, "--n-boot"),
])
def test_thresholds_out_of_range(kw, fragment):
    with pytest.raises(InputError, match=fragment):
        AnalysisOptions(**kw)


def test_cli_analyze_run_folder_and_checker(tmp_path, capsys):
    src = ROOT / "sample_data" / "rodnet7-batch-090C"
    out = tmp_path / "a"
    code = main(["analyze", str(src), "--out", str(out), "--n-boot", "40", "-q"])
    err = capsys.readouterr().err
    assert code == 0, err
    res = json.loads((out / "results.json").read_text())
    assert res["provenance"]["sample"]["synthesis_temperature_c"] == 90
    assert (out / "log.txt").read_text().count("verdict:") == 1
    # the agreed-layout checker, when the shared examples are present beside the repository
    if CHECKER.exists():
        r = subprocess.run([sys.executable, str(CHECKER), str(out), "--metals", "Co,Zn"], capture_output=True, text=True)
        assert r.returncode == 0, r.stdout
    # an existing output folder is not overwritten without --force, and stays intact
    before = (out / "results.json").read_text()
    code = main(["analyze", str(src), "--out", str(out), "-q"])
    err = capsys.readouterr().err
    assert code == 1 and "--force" in err and len(err.strip().splitlines()) == 1
    assert (out / "results.json").read_text() == before


def test_cli_run_folder_without_description(tmp_path, capsys):
    (tmp_path / "ions.h5").write_bytes(b"")
    code = main(["analyze", str(tmp_path), "--out", str(tmp_path / "o")])
    err = capsys.readouterr().err
    assert code == 1 and "run.toml" in err


def test_compare_two_runs_and_different_metals(tmp_path, capsys, block_result, block_run):
    # compare reads results.json and the bootstrap replicates: the figures and report are not needed
    write_analysis(block_result, tmp_path / "runs" / "a", report=False)
    rnd = simulate_run(pattern="random", top_radius_nm=5, depth_nm=18, seed=22)
    r2 = analyze(rnd.ions, ("Co", "Zn"), rnd.lattice, options=AnalysisOptions(n_boot=60))
    write_analysis(r2, tmp_path / "runs" / "b", report=False)
    code = main(["compare", str(tmp_path / "runs"), "--out", str(tmp_path / "cmp")])
    out = capsys.readouterr()
    assert code == 0, out.err
    diffs = list(csv.DictReader(open(tmp_path / "cmp" / "differences.csv")))
    d = [x for x in diffs if x["statistic"] == "persistence"][0]
    assert float(d["p_value"]) < 0.05  # blocks vs random differ in persistence
    assert (tmp_path / "cmp" / "comparison.png").stat().st_size > 1000
    from probeseq.exceptions import DataQualityWarning
    from probeseq.study.compare import compare_runs, load_runs

    recs = load_runs([tmp_path / "runs"])
    odd = recs[1].__class__(**{**recs[1].__dict__, "metals": ("Co", "Ni")})
    with pytest.warns(DataQualityWarning, match="different metals"):
        comp = compare_runs([recs[0], odd])
    assert comp.common_metals == ("Co",)
    assert not any(s.endswith(".Zn") or s.endswith(".Ni") for s in comp.statistics)
