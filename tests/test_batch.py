"""Batch analysis (probeseq.study.batch): every option of ``analyze`` reaches every run of a batch.

One batch of two tiny simulated runs (plus one broken run folder) is analysed once with every
option that a batch used to drop; each test checks one option's trace in the results. The run
folders are built so that ignoring an option would change the result or make the run fail:
``run.toml`` names the wrong metals and the wrong lattice, the positions are in angstrom under
non-default HDF5 dataset names, and one run's ion file lies outside its run folder.
"""

import contextlib
import io
import json
from pathlib import Path

import h5py
import numpy as np
import pytest

from probeseq.cli.main import main
from probeseq.exceptions import InputError
from probeseq.pipeline.options import AnalysisOptions
from probeseq.ranging.auto import auto_range
from probeseq.ranging.ranges import Range, RangeSet
from probeseq.simulation.simulate import simulate_run
from probeseq.study.batch import BatchOutcome, analyze_batch, analyze_run, run_folders

ROTATION_DEG, SCALE, OFFSET_NM = 17.0, 1.02, (0.3, -0.2)
FAST = ["--n-boot", "20", "--n-starts", "1", "--seed", "5"]


def _write_run(folder: Path, ions_file: Path, ions_field: str, seed: int):
    """A run folder whose run.toml names the wrong metals and lattice; ions in angstrom, custom datasets."""
    run = simulate_run(pattern="long-block", top_radius_nm=5.0, depth_nm=12.0, rotation_deg=ROTATION_DEG,
                       scale=SCALE, offset_nm=OFFSET_NM, seed=seed)
    folder.mkdir(parents=True)
    ions_file.parent.mkdir(parents=True, exist_ok=True)
    il = run.ions
    with h5py.File(ions_file, "w") as f:
        f["scan/pos"] = np.stack([il.x, il.y, il.z], axis=1).astype(np.float64) * 10.0  # angstrom
        f["scan/mz"] = np.asarray(il.mass_to_charge, np.float64)
    (folder / "run.toml").write_text(
        f'[sample]\nname = "{folder.name}"\nsynthesis_temperature_c = {100 + seed}\n\n'
        f'[run]\nions = "{ions_field}"\nmetals = ["Fe", "Cu"]\nlattice = "square"\na = 1.0\nrepeat = 0.5\n',
        encoding="utf-8")
    return run


@pytest.fixture(scope="module")
def batch(tmp_path_factory):
    """The batch folder, the command's outcome and what the runs should show."""
    root = tmp_path_factory.mktemp("batch")
    src = root / "runs"
    runs = {"r1": _write_run(src / "r1", src / "r1" / "scan.h5", "scan.h5", seed=11),
            "r2": _write_run(src / "r2", root / "elsewhere" / "scan.h5", "../../elsewhere/scan.h5", seed=12)}
    broken = src / "r0-broken"
    broken.mkdir()
    (broken / "run.toml").write_text('[run]\nions = "missing.h5"\nmetals = ["Co", "Zn"]\nlattice = "honeycomb"\n')
    # an edited range file: no hydrogen windows, windows rounded to 0.01 Da (automatic ranging differs)
    auto = auto_range(runs["r1"].ions.mass_to_charge, ("Co", "Zn")).ranges
    given = RangeSet(tuple(Range(round(r.low_da, 2), round(r.high_da, 2), r.formula, r.charge)
                           for r in auto if r.formula not in ("H", "H2")), metals=("Co", "Zn"))
    ranges = root / "edited_ranges.toml"
    given.to_toml(ranges)
    out = root / "out"
    args = ["analyze", str(src), "--out", str(out), "--metals", "Co,Zn", "--lattice", "honeycomb", "--a", "2.6",
            "--repeat", "0.68", "--sites-per-repeat", "3", "--ranges", str(ranges),
            "--rotation-deg", str(ROTATION_DEG), "--scale", str(SCALE), "--offset-nm", "0.3,-0.2",
            "--length-unit", "angstrom", "--position-dataset", "/scan/pos", "--mass-dataset", "/scan/mz",
            "--allow-outside", "--verbose", *FAST]
    return {"root": root, "src": src, "runs": runs, "ranges": ranges, "given": given, "out": out, "args": args}


@pytest.fixture(scope="module")
def ran(batch):
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = main(batch["args"])
    results = {n: json.loads((batch["out"] / n / "results.json").read_text()) for n in batch["runs"]
               if (batch["out"] / n / "results.json").is_file()}
    return {"code": code, "stdout": out.getvalue(), "stderr": err.getvalue(), "results": results}


def test_failed_run_is_reported_in_one_line_and_the_others_are_written(batch, ran):
    assert ran["code"] == 1
    err = ran["stderr"].strip().splitlines()
    assert len(err) == 1 and err[0].startswith("error: 1 of 3 runs failed (r0-broken")
    assert "Traceback" not in ran["stderr"]
    lines = [ln for ln in ran["stdout"].splitlines() if ln.startswith("  r")]
    assert [ln.split()[0] for ln in lines] == ["r0-broken", "r1", "r2"]  # sorted, one line each
    assert "failed:" in lines[0] and "missing.h5" in lines[0]
    assert sorted(ran["results"]) == ["r1", "r2"]
    assert not (batch["out"] / "r0-broken").exists()
    for name in ("r1", "r2"):
        log = (batch["out"] / name / "log.txt").read_text()
        assert "verdict:" in log and "] writing:" in log


def test_metals_and_lattice_on_the_command_line_override_run_toml(ran):
    for res in ran["results"].values():
        prov = res["provenance"]
        assert prov["metals"] == ["Co", "Zn"]  # run.toml says Fe, Cu
        assert prov["lattice"]["cell"]["a"] == pytest.approx(2.6)  # run.toml says square, a = 1.0
        assert prov["lattice"]["cell"]["gamma"] == pytest.approx(120.0)
        assert prov["lattice"]["rod"]["repeat"] == pytest.approx(0.68)
        assert set(res["composition"]) == {"Co", "Zn"}
        assert prov["options"]["n_boot"] == 20 and prov["options"]["n_starts"] == 1 and prov["seed"] == 5


def test_registration_is_fixed_to_the_given_rotation_scale_and_offset(ran):
    for res in ran["results"].values():
        reg = res["columns"]["registration"]["registration"]
        assert set(reg["fixed"]) >= {"rotation_deg", "scale", "offset_nm"}
        assert reg["rotation_deg"] == pytest.approx(ROTATION_DEG)
        assert reg["scale"] == pytest.approx(SCALE)
        opts = res["provenance"]["options"]
        assert opts["rotation_deg"] == ROTATION_DEG and opts["scale"] == SCALE
        assert opts["offset_nm"] == list(OFFSET_NM)


def test_length_unit_and_datasets_reach_the_reader(batch, ran):
    for name, res in ran["results"].items():
        truth = batch["runs"][name].ions
        ions = res["ions"]
        assert ions["n_ions"] == truth.n_ions
        # positions were written in angstrom: read as nm they would be ten times larger
        assert ions["x_range_nm"] == pytest.approx([truth.x.min(), truth.x.max()], rel=1e-5, abs=1e-5)
        assert ions["z_range_nm"] == pytest.approx([truth.z.min(), truth.z.max()], rel=1e-5, abs=1e-5)


def test_range_file_is_used(batch, ran):
    given = batch["given"]
    for name, res in ran["results"].items():
        assert res["provenance"]["ranges_file"] == str(batch["ranges"])
        used = RangeSet.from_toml(batch["out"] / name / "ranges.toml")
        assert len(used) == len(given)
        assert np.allclose(used.lows_da, given.lows_da) and np.allclose(used.highs_da, given.highs_da)
        assert "H" not in {r.formula for r in used}


def test_allow_outside_reaches_each_run(batch, ran, tmp_path):
    assert "r2" in ran["results"]  # its ion file lies outside the run folder
    outcomes = analyze_batch(batch["src"], tmp_path / "o", metals=("Co", "Zn"), lattice="honeycomb", a=2.6,
                             repeat=0.68, workers=1, options=AnalysisOptions(n_boot=20, n_starts=1),
                             position_dataset="/nope", mass_dataset="/nope")
    r2 = {o.run: o for o in outcomes}["r2"]
    assert not r2.ok and "outside the run folder" in r2.error


def test_verbose_prints_each_runs_reasons(ran):
    for res in ran["results"].values():
        first = res["classification"]["reasons"][0]
        assert f"- {first}" in ran["stdout"]


def test_a_batch_run_equals_the_same_run_analysed_alone(batch, ran, tmp_path, capsys):
    args = list(batch["args"])
    args[1] = str(batch["src"] / "r1")
    args[3] = str(tmp_path / "alone")
    assert main(args) == 0, capsys.readouterr().err
    alone = json.loads((tmp_path / "alone" / "results.json").read_text())
    inbatch = ran["results"]["r1"]
    assert alone["classification"] == inbatch["classification"]
    assert alone["statistics"] == inbatch["statistics"] and alone["composition"] == inbatch["composition"]
    assert alone["provenance"]["sample"] == inbatch["provenance"]["sample"]


def test_library_batch_records_failures_without_stopping_and_checks_options_first(tmp_path):
    src = tmp_path / "runs"
    for name, body in (("b", 'ions = "gone.h5"\nmetals = ["Co", "Zn"]\nlattice = "honeycomb"\n'),
                       ("a", 'ions = "x.h5"\nmetals = "Co"\nlattice = "honeycomb"\n')):
        (src / name).mkdir(parents=True)
        (src / name / "run.toml").write_text("[run]\n" + body)
    (src / "not-a-run").mkdir()
    assert [p.name for p in run_folders(src)] == ["a", "b"]
    seen = []
    outcomes = analyze_batch(src, tmp_path / "out", options=AnalysisOptions(n_boot=20), workers=2,
                             progress=seen.append)
    # outcomes in the order of the runs; progress as each run finishes
    assert [o.run for o in outcomes] == ["a", "b"] and sorted(seen, key=lambda o: o.run) == outcomes
    assert all(isinstance(o, BatchOutcome) and not o.ok for o in outcomes)
    assert "x.h5" in outcomes[0].error and "gone.h5" in outcomes[1].error
    assert all("\n" not in o.error for o in outcomes)
    assert not (tmp_path / "out").exists()  # nothing written, no empty folder
    with pytest.raises(InputError, match="neither a TOML file nor a preset"):
        analyze_batch(src, tmp_path / "out", lattice="hexagonal")
    with pytest.raises(InputError, match="--out"):
        analyze_batch(src, src / "a")  # a run folder as the output
    with pytest.raises(InputError, match="no run folder"):
        analyze_batch(src / "not-a-run", tmp_path / "out")


def test_single_run_needs_metals_and_lattice_for_a_bare_ion_file(tmp_path):
    p = tmp_path / "ions.csv"
    p.write_text("x,y,z,mass_to_charge\n0,0,0,1\n")
    with pytest.raises(InputError, match="--metals is required"):
        analyze_run(p, tmp_path / "o")
    with pytest.raises(InputError, match="--lattice is required"):
        analyze_run(p, tmp_path / "o", metals="Co,Zn")
    with pytest.raises(InputError, match="go with a lattice preset"):
        analyze_run(p, tmp_path / "o", metals="Co,Zn", lattice=tmp_path / "l.toml", a=2.0)
    assert not (tmp_path / "o").exists()
