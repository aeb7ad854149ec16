import json

import numpy as np
import pytest

from probeseq import InputError
from probeseq.outputs.folder import staged_outdir, write_json
from probeseq.study.runinfo import read_run_folder
from probeseq.utils.marks import to_jsonable


def test_staged_outdir_replaces_only_on_success(tmp_path):
    out = tmp_path / "out"
    with staged_outdir(out) as st:
        (st / "results.json").write_text("first")
    assert (out / "results.json").read_text() == "first"
    with pytest.raises(InputError, match="--force"):
        with staged_outdir(out):
            pass
    with pytest.raises(KeyboardInterrupt):
        with staged_outdir(out, force=True) as st:
            (st / "results.json").write_text("half")
            raise KeyboardInterrupt
    assert (out / "results.json").read_text() == "first"
    assert [p.name for p in tmp_path.iterdir()] == ["out"]
    with staged_outdir(out, force=True) as st:
        (st / "results.json").write_text("second")
    assert (out / "results.json").read_text() == "second"
    assert [p.name for p in tmp_path.iterdir()] == ["out"]


def test_outdir_that_is_a_file(tmp_path):
    f = tmp_path / "x"
    f.write_text("")
    with pytest.raises(InputError, match="not a folder"):
        with staged_outdir(f):
            pass


def test_to_jsonable_handles_numpy_and_nan(tmp_path):
    d = {"a": np.float32(1.5), "b": np.arange(3), "c": (np.int64(2), float("nan")), "d": np.bool_(True)}
    write_json(tmp_path / "r.json", d)
    back = json.loads((tmp_path / "r.json").read_text())
    assert back == {"a": 1.5, "b": [0, 1, 2], "c": [2, None], "d": True}
    assert to_jsonable({1: np.float64("inf")}) == {"1": None}


def test_run_folder_sample_data_reads():
    from pathlib import Path

    d = Path(__file__).resolve().parents[1] / "sample_data" / "rodnet7-batch-150C"
    r = read_run_folder(d)
    assert r.metals == ("Co", "Zn") and r.ions.name == "ions.h5"
    assert r.sample["synthesis_temperature_c"] == 150 and r.detection_efficiency == 0.5


@pytest.mark.parametrize("text,fragment", [
    (None, "no run description"),
    ("[run]\nions = 'ions.h5'\n", "missing field 'metals'"),
    ("[run]\nions = 'nope.h5'\nmetals=['Co','Zn']\nlattice='honeycomb'\n", "ion file 'nope.h5'"),
    ("[run\n", "malformed TOML"),
    ("[run]\nions = 'ions.h5'\nmetals=['Co','Zn']\nlattice='l.toml'\n", "lattice file 'l.toml'"),
    ("[run]\nions = 'ions.h5'\nmetals=['Co','Zn']\nlattice='honeycomb'\ndetection_efficiency=2\n",
     "detection_efficiency"),
])
def test_run_folder_errors(tmp_path, text, fragment):
    (tmp_path / "ions.h5").write_bytes(b"x")
    if text is not None:
        (tmp_path / "run.toml").write_text(text)
    with pytest.raises(InputError, match=fragment):
        read_run_folder(tmp_path)
