import json
import subprocess
import sys
import time

import pytest

from probeseq.cli.main import main
from probeseq.io.readers import read_ions


def run_cli(args, capsys):
    code = main(args)
    out = capsys.readouterr()
    return code, out.out, out.err


def test_help_and_version(capsys):
    code, out, _ = run_cli(["--help"], capsys)
    assert code == 0 and "simulate" in out and "inspect" in out
    code, out, _ = run_cli(["--version"], capsys)
    assert code == 0 and out.startswith("probeseq ")


@pytest.mark.parametrize("ext", ["csv", "h5"])
def test_simulate_then_inspect_matches_what_was_written(tmp_path, capsys, ext):
    out = tmp_path / f"run.{ext}"
    code, text, err = run_cli(["simulate", str(out), "--pattern", "long-block", "--top-radius", "4",
                               "--depth", "8", "--seed", "4"], capsys)
    assert code == 0, err
    truth = json.loads((tmp_path / "run.truth.json").read_text())
    assert (tmp_path / "run.lattice.toml").exists()
    code, text, err = run_cli(["inspect", str(out), "--json"], capsys)
    assert code == 0, err
    s = json.loads(text)
    assert s["n_ions"] == truth["counts"]["ions"]
    ions = read_ions(out)
    assert s["z_range_nm"] == pytest.approx([ions.z.min(), ions.z.max()])
    assert s["rows_dropped"] == 0


@pytest.mark.parametrize("args,fragment", [
    (["inspect", "/nonexistent/file.csv"], "not found"),
    (["inspect", "x.parquet"], "not found"),
    (["simulate", "out.xyz"], "unknown ion file extension"),
    (["simulate", "o.csv", "--pattern", "zigzag"], "--pattern must be one of"),
    (["inspect"], "Missing argument"),
    (["inspect", "a.csv", "--no-such-flag"], "No such option"),
])
def test_bad_input_is_one_line_no_traceback(tmp_path, capsys, monkeypatch, args, fragment):
    monkeypatch.chdir(tmp_path)
    code, out, err = run_cli(args, capsys)
    assert code != 0
    assert fragment in err
    assert len(err.strip().splitlines()) == 1 and "Traceback" not in err


def test_bad_column_via_cli(tmp_path, capsys):
    p = tmp_path / "r.tsv"
    p.write_text("x\ty\tdepth\tmass_to_charge\n1\t2\t3\t4\n")
    code, _, err = run_cli(["inspect", str(p)], capsys)
    assert code == 1 and "missing required column(s) z" in err and "found: x, y, depth, mass_to_charge" in err


def test_installed_entry_point_help_is_fast():
    t = time.perf_counter()
    r = subprocess.run([sys.executable, "-m", "probeseq", "--help"], capture_output=True, text=True)
    assert r.returncode == 0 and "inspect" in r.stdout
    assert time.perf_counter() - t < 10
