"""The stage commands end to end on a small simulated run: range -> columns -> decode, export, plan."""

import json
from pathlib import Path

import numpy as np
import pytest

from probeseq.cli.main import main
from probeseq.simulation.simulate import simulate_run


@pytest.fixture(scope="module")
def run_files(tmp_path_factory):
    d = tmp_path_factory.mktemp("stages")
    run = simulate_run(pattern="long-block", metals=("Ni", "Zn"), top_radius_nm=5, depth_nm=15, seed=41)
    paths = run.write(d / "run.h5")
    return d, run, paths


def test_range_columns_decode_chain(run_files, capsys):
    d, run, paths = run_files
    rng_file = d / "ranges.toml"
    code = main(["range", paths["ions"], "--metals", "Ni,Zn", "--out", str(rng_file), "--figure", str(d / "spec.png")])
    out = capsys.readouterr()
    assert code == 0, out.err
    assert "ranges" in out.out and rng_file.exists() and (d / "spec.png").exists()
    # composition printed for both metals, near the truth (Ni and Zn share 64 Da: deconvolved)
    for m in ("Ni", "Zn"):
        line = [ln for ln in out.out.splitlines() if ln.strip().startswith(m)][0]
        frac = float(line.split()[1]) / 100
        assert abs(frac - run.truth["composition_sites"][m]) < 0.03
    code = main(["columns", paths["ions"], "--metals", "Ni,Zn", "--lattice", paths["lattice"], "--ranges",
                 str(rng_file), "--out", str(d / "cols")])
    out = capsys.readouterr()
    assert code == 0, out.err
    reg = json.loads((d / "cols" / "registration.json").read_text())
    assert reg["resolvable"] is True and reg["n_rods"] > 50
    assert (d / "cols" / "density.png").exists()
    code = main(["decode", str(d / "cols"), "--out", str(d / "dec")])
    out = capsys.readouterr()
    assert code == 0, out.err
    dec = json.loads((d / "dec" / "decoding.json").read_text())["decoding"]
    assert dec["persistence"] > 0.7  # long blocks: persistence 0.9 simulated
    assert (d / "dec" / "tracks.csv").exists()


def test_range_refuses_to_overwrite_its_input(run_files, capsys):
    d, run, paths = run_files
    f = d / "r2.toml"
    assert main(["range", paths["ions"], "--metals", "Ni,Zn", "--out", str(f)]) == 0
    before = f.read_bytes()
    code = main(["range", paths["ions"], "--metals", "Ni,Zn", "--ranges", str(f), "--out", str(f)])
    err = capsys.readouterr().err
    assert code == 1 and "never changed" in err and f.read_bytes() == before


def test_unknown_metal_and_preset(run_files, capsys):
    d, run, paths = run_files
    code = main(["range", paths["ions"], "--metals", "Ni,Xx", "--out", str(d / "x.toml")])
    err = capsys.readouterr().err
    assert code == 1 and "Xx" in err and len(err.strip().splitlines()) == 1
    code = main(["columns", paths["ions"], "--metals", "Ni,Zn", "--lattice", "kagome", "--out", str(d / "y")])
    err = capsys.readouterr().err
    assert code == 1 and "kagome" in err


@pytest.mark.parametrize("fmt", ["svg", "pdf", "png"])
def test_export_figures(tmp_path_factory, capsys, fmt):
    d = tmp_path_factory.getbasetemp() / "exportfig"
    if not (d / "results.json").exists():
        src = Path(__file__).resolve().parents[1] / "sample_data" / "rodnet7-batch-150C"
        assert main(["analyze", str(src), "--out", str(d), "--n-boot", "30", "-q", "--force"]) == 0
    out = tmp_path_factory.mktemp("f") / f"t.{fmt}"
    tracks = np.genfromtxt(d / "tracks.csv", delimiter=",", names=True, dtype=None, encoding="utf-8")
    inside = (tracks["z_nm"] > 5) & (tracks["z_nm"] < 15)
    rods = np.unique(tracks["rod"][inside])[:3]
    code = main(["export", str(d), "--format", fmt, "--rods", ",".join(map(str, rods)), "--depth", "5:15",
                 "--out", str(out), "--size", "one-column"])
    assert code == 0, capsys.readouterr().err
    data = out.read_bytes()
    assert len(data) > 1000
    magic = {"svg": b"<svg", "pdf": b"%PDF", "png": b"\x89PNG"}[fmt]
    assert magic in data[:400]


def test_plan_small(tmp_path, capsys):
    out = tmp_path / "plan.json"
    code = main(["plan", "--metals", "Co,Zn", "--lattice", "square", "--a", "1.2", "--repeat", "0.7",
                 "--runs-per-pattern", "1", "--runs-per-persistence", "1", "--radius", "4", "--depth", "15",
                 "--out", str(out), "-q"])
    assert code == 0, capsys.readouterr().err
    plan = json.loads(out.read_text())
    conf = np.array(plan["confusion"])
    # one run of each of the five simulated arrangements, six possible labels (undetermined too)
    assert conf.shape == (5, 6) and conf.sum() == 5
    assert "interspersed" in plan["labels"] and "interspersed" in plan["patterns"]
    assert len(plan["persistence_scan"]["persistence"]) == len(plan["persistence_scan"]["share_not_random"])
    code = main(["plan", "--metals", "Co,Zn", "--lattice", "square", "--a", "1.2", "--repeat", "0.7",
                 "--detection-efficiency", "1.5"])
    assert code == 1 and "--detection-efficiency" in capsys.readouterr().err
