"""Hostile input: every case gives a clear one-line error or a correct degenerate answer."""

import json
import shutil
import warnings
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from probeseq import InputError, Lattice
from probeseq.cli.main import main
from probeseq.exceptions import DataQualityWarning
from probeseq.io.ions import IonList
from probeseq.io.readers import read_ions
from probeseq.pipeline.analysis import analyze
from probeseq.pipeline.options import AnalysisOptions
from probeseq.simulation.simulate import simulate_run

ROOT = Path(__file__).resolve().parents[1]
SAMPLE = ROOT / "sample_data" / "rodnet7-batch-150C"
FAST = settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])


@FAST
@given(st.binary(max_size=400))
def test_text_reader_on_random_bytes(tmp_path, data):
    p = tmp_path / "r.csv"
    p.write_bytes(data)
    try:
        ions = read_ions(p)
    except InputError as e:
        assert "\n" not in str(e)
    else:
        assert ions.n_ions > 0


_cell = st.one_of(st.floats(allow_nan=True, allow_infinity=True).map(repr), st.text(max_size=6), st.just(""))


@FAST
@given(st.lists(st.lists(_cell, min_size=0, max_size=6), max_size=8), st.booleans())
def test_text_reader_on_malformed_tables(tmp_path, rows, header):
    lines = (["x,y,z,mass_to_charge"] if header else []) + [",".join(r) for r in rows]
    p = tmp_path / "r.csv"
    p.write_text("\n".join(lines) + "\n")
    try:
        ions = read_ions(p)
    except InputError as e:
        assert "\n" not in str(e)
    else:
        assert np.isfinite(ions.x).all() and (ions.mass_to_charge > 0).all()


@FAST
@given(st.text(max_size=300))
def test_toml_readers_on_random_text(tmp_path, text):
    from probeseq.ranging.ranges import RangeSet
    from probeseq.study.runinfo import read_run_folder

    p = tmp_path / "l.toml"
    p.write_text(text)
    for reader in (Lattice.from_toml, RangeSet.from_toml):
        try:
            reader(p)
        except InputError as e:
            assert "\n" not in str(e)
    (tmp_path / "run.toml").write_text(text)
    try:
        read_run_folder(tmp_path)
    except InputError as e:
        assert "\n" not in str(e)


@FAST
@given(st.dictionaries(st.sampled_from(["a", "b", "gamma", "rods", "repeat", "sites_per_repeat"]),
                       st.one_of(st.floats(allow_nan=True), st.integers(-5, 5), st.text(max_size=3),
                                 st.lists(st.lists(st.floats(-2, 2), max_size=3), max_size=3))))
def test_lattice_schema_on_random_values(fields):
    cell = {k: v for k, v in fields.items() if k in ("a", "b", "gamma", "rods")}
    rod = {k: v for k, v in fields.items() if k in ("repeat", "sites_per_repeat")}
    try:
        lat = Lattice.from_dict({"cell": cell, "rod": rod})
    except InputError as e:
        assert "\n" not in str(e)
    else:
        assert lat.a_nm > 0 and lat.rods_per_cell >= 1


def test_corrupted_hdf5(tmp_path):
    src = SAMPLE / "ions.h5"
    data = bytearray(src.read_bytes())
    rng = np.random.default_rng(0)
    for i in rng.integers(len(data) // 4, len(data), 2000):
        data[i] ^= 0xFF
    p = tmp_path / "c.h5"
    p.write_bytes(bytes(data))
    try:
        with warnings.catch_warnings():  # dropped garbage rows are reported by a warning: allowed here
            warnings.simplefilter("ignore", DataQualityWarning)
            ions = read_ions(p)
    except InputError as e:
        assert "\n" not in str(e)
    else:  # corruption inside the data: values may be garbage, but they are validated
        assert np.isfinite(ions.z).all()


@pytest.mark.parametrize("n", [0, 1, 10])
def test_tiny_files_give_clear_errors(tmp_path, capsys, n):
    p = tmp_path / "t.csv"
    rows = "\n".join(f"{i * 0.1},{i * 0.2},{i * 0.3},{59.0 + i}" for i in range(n))
    p.write_text("x,y,z,mass_to_charge\n" + rows + ("\n" if n else ""))
    code = main(["analyze", str(p), "--metals", "Co,Zn", "--lattice", "honeycomb", "--a", "2.6",
                 "--repeat", "0.68", "--out", str(tmp_path / "o"), "-q"])
    err = capsys.readouterr().err
    assert code == 1 and err.startswith("error: ") and len(err.strip().splitlines()) == 1
    assert not (tmp_path / "o").exists()


def test_one_metal_only(tmp_path):
    run = simulate_run(pattern="random", metals=("Co", "Zn"), composition=(0.999, 0.001), top_radius_nm=4,
                       depth_nm=10, seed=2)
    with pytest.raises(InputError):
        analyze(run.ions, ("Co", "Zn"), run.lattice, options=AnalysisOptions(n_boot=20))


def test_all_ions_in_one_channel():
    run = simulate_run(pattern="random", top_radius_nm=4, depth_nm=10, seed=3)
    m = np.full(len(run.ions), 58.93)
    ions = IonList(x=run.ions.x, y=run.ions.y, z=run.ions.z, mass_to_charge=m)
    with pytest.raises(InputError):
        analyze(ions, ("Co", "Zn"), run.lattice, options=AnalysisOptions(n_boot=20))


def test_lattice_ten_times_off_scale():
    run = simulate_run(pattern="random", top_radius_nm=5, depth_nm=12, seed=4)
    wrong = run.lattice.scaled(10.0)
    with pytest.raises(InputError) as e:
        analyze(run.ions, ("Co", "Zn"), wrong, options=AnalysisOptions(n_boot=20))
    assert "\n" not in str(e.value)


def test_extreme_coordinates():
    run = simulate_run(pattern="random", top_radius_nm=4, depth_nm=10, seed=5)
    x = run.ions.x.copy()
    x[:50] = 1e30
    ions = IonList(x=x, y=run.ions.y, z=run.ions.z, mass_to_charge=run.ions.mass_to_charge)
    try:
        res = analyze(ions, ("Co", "Zn"), run.lattice, options=AnalysisOptions(n_boot=20))
    except InputError as e:
        assert "\n" not in str(e)
    else:
        assert res.columns.n_rods > 0


def test_rods_that_never_get_an_ion():
    # a low detection efficiency leaves some rods (at the needle edge) without ions: a correct answer
    run = simulate_run(pattern="long-block", eta=0.2, top_radius_nm=6, depth_nm=20, seed=6)
    res = analyze(run.ions, ("Co", "Zn"), run.lattice, options=AnalysisOptions(n_boot=20))
    assert res.classification.label in ("long-block", "undetermined", "short-repeat")
    assert np.isfinite(res.decoded.posteriors).all()


def test_deterministic_results_json(tmp_path, capsys):
    out = tmp_path / "o"
    args = ["analyze", str(SAMPLE), "--out", str(out), "--n-boot", "40", "-q", "--seed", "11"]
    texts = []
    for _ in range(2):
        assert main(args + ["--force"]) == 0
        r = json.loads((out / "results.json").read_text())
        r.pop("timings_s")
        texts.append(json.dumps(r, sort_keys=True))
    assert texts[0] == texts[1]


def test_interrupt_keeps_previous_results(tmp_path, capsys, monkeypatch):
    out = tmp_path / "o"
    assert main(["analyze", str(SAMPLE), "--out", str(out), "--n-boot", "30", "-q"]) == 0
    before = (out / "results.json").read_bytes()
    import probeseq.outputs.report as report

    def interrupted(*a, **k):
        raise KeyboardInterrupt

    monkeypatch.setattr(report, "write_report", interrupted)
    code = main(["analyze", str(SAMPLE), "--out", str(out), "--n-boot", "30", "-q", "--force"])
    err = capsys.readouterr().err
    assert code == 130 and "interrupted" in err and "untouched" in err
    assert (out / "results.json").read_bytes() == before
    assert [p.name for p in tmp_path.iterdir()] == ["o"]


def test_input_file_unchanged_by_analyze(tmp_path):
    src = tmp_path / "run"
    shutil.copytree(SAMPLE, src)
    before = {p.name: p.read_bytes() for p in src.iterdir()}
    assert main(["analyze", str(src), "--out", str(tmp_path / "o"), "--n-boot", "30", "-q"]) == 0
    assert {p.name: p.read_bytes() for p in src.iterdir()} == before
