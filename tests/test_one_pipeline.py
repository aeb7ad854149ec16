"""One pipeline: the stage commands (range -> columns -> decode) give what 'analyze' gives.

Both run the same library stages (:func:`probeseq.pipeline.stages.range_file`,
:func:`~probeseq.pipeline.stages.count_file`, :func:`~probeseq.pipeline.stages.decode_stage`), so with the same
seed and options the range file, the count array, the decoded paths and posteriors and the fitted
parameters are equal, not merely close.
"""

import json
import math

import numpy as np
import pytest

from probeseq.cli.main import main
from probeseq.lattice.rodcolumns import load_columns
from probeseq.outputs.results import load_decoded
from probeseq.ranging.ranges import RangeSet
from probeseq.simulation.simulate import simulate_run

SEED = "3"
N_STARTS = "2"
CASES = {
    # resolvable rods, registration fitted
    "resolvable": (dict(sigma_xy_nm=0.1, seed=41), []),
    # rods not resolvable (wide lateral spread): the groups-of-rods analysis runs in both; the
    # registration overrides are passed to both as well
    "groups": (dict(sigma_xy_nm=0.45, seed=5, rotation_deg=0.0, scale=1.0, tilt_deg=0.0),
               ["--rotation-deg", "0", "--scale", "1"]),
}


def assert_same(a, b, where="", tol=1e-12):
    """JSON values equal: text, integers and flags exactly, numbers to ``tol`` (NaN equals NaN)."""
    if isinstance(a, dict):
        assert isinstance(b, dict) and sorted(a) == sorted(b), f"{where}: keys {sorted(a)} != {sorted(b)}"
        for k in a:
            assert_same(a[k], b[k], f"{where}.{k}", tol)
    elif isinstance(a, list):
        assert isinstance(b, list) and len(a) == len(b), f"{where}: lengths differ"
        for i, (u, v) in enumerate(zip(a, b)):
            assert_same(u, v, f"{where}[{i}]", tol)
    elif isinstance(a, float) and isinstance(b, (int, float)) and not isinstance(b, bool):
        assert (math.isnan(a) and math.isnan(b)) or math.isclose(a, b, rel_tol=tol, abs_tol=tol), \
            f"{where}: {a!r} != {b!r}"
    else:
        assert a == b and type(a) is type(b), f"{where}: {a!r} != {b!r}"


@pytest.fixture(scope="module", params=sorted(CASES))
def stages_and_analyze(request, tmp_path_factory):
    """The stage commands and 'analyze' on one simulated run, with the same seed and options."""
    sim, extra = CASES[request.param]
    d = tmp_path_factory.mktemp(f"one_{request.param}")
    run = simulate_run(pattern="long-block", metals=("Ni", "Zn"), top_radius_nm=5, depth_nm=15, **sim)
    paths = run.write(d / "run.h5")
    ions, lat = paths["ions"], paths["lattice"]
    common = ["--metals", "Ni,Zn", "--lattice", lat, "--seed", SEED, *extra]
    assert main(["range", ions, "--metals", "Ni,Zn", "--out", str(d / "ranges.toml"), "-q"]) == 0
    assert main(["columns", ions, *common, "--out", str(d / "cols"), "-q"]) == 0
    assert main(["decode", str(d / "cols"), "--seed", SEED, "--n-starts", N_STARTS, "--out", str(d / "dec"),
                 "-q"]) == 0
    assert main(["analyze", ions, *common, "--n-starts", N_STARTS, "--n-boot", "20", "--out", str(d / "an"),
                 "-q"]) == 0
    return request.param, d


def test_ranges_equal(stages_and_analyze):
    _, d = stages_and_analyze
    want = RangeSet.from_toml(d / "an" / "ranges.toml").to_toml()
    # the count stage refits overlapped ranges with the ions' distance to the rod axes, as analyze does
    assert RangeSet.from_toml(d / "cols" / "ranges.toml").to_toml() == want
    # the range stage alone has no lattice: the same windows, with the spectrum's own shares
    alone = RangeSet.from_toml(d / "ranges.toml")
    assert [(r.low_da, r.high_da) for r in alone] == [(r.low_da, r.high_da) for r in RangeSet.from_toml(d / "an" / "ranges.toml")]
    res = json.loads((d / "an" / "results.json").read_text())
    if res["ranging"]["composition_spectrum_only"] is None:  # nothing was refitted
        assert alone.to_toml() == want


def test_count_array_equal(stages_and_analyze):
    _, d = stages_and_analyze
    a, b = load_columns(d / "cols" / "columns.h5"), load_columns(d / "an" / "columns.h5")
    assert a.counts.dtype == b.counts.dtype
    assert np.array_equal(a.counts, b.counts)
    for name in ("mask", "rod_xy_nm", "tilt", "site_z_nm", "site_z_offset_nm", "neighbours"):
        assert np.array_equal(getattr(a, name), getattr(b, name)), name
    assert (a.resolvable, a.misassigned_fraction, a.pitch_nm, a.z_ref_nm) == (b.resolvable, b.misassigned_fraction, b.pitch_nm, b.z_ref_nm)
    # registration, column plan, ion tallies and the detection balance of the pass
    assert_same(a.params, b.params, "params")
    reg = json.loads((d / "cols" / "registration.json").read_text())
    res = json.loads((d / "an" / "results.json").read_text())
    assert_same(reg["registration"], res["columns"]["registration"]["registration"], "registration")


def test_decoding_equal(stages_and_analyze):
    case, d = stages_and_analyze
    a, b = load_decoded(d / "dec" / "decoded.h5"), load_decoded(d / "an" / "decoded.h5")
    for name in ("viterbi", "posteriors", "mask", "uncertain", "stationary", "transmat"):
        assert np.array_equal(getattr(a, name), getattr(b, name)), name
    dec = json.loads((d / "dec" / "decoding.json").read_text())
    res = json.loads((d / "an" / "results.json").read_text())
    assert_same(dec["decoding"], res["decoding"], "decoding")
    assert_same(dec["groups"], res["groups"], "groups")
    assert (dec["groups"] is not None) == (case == "groups")
    assert res["columns"]["resolvable"] == (case != "groups")
    for table in ("tracks.csv", "runs.csv"):
        assert (d / "dec" / table).read_bytes() == (d / "an" / table).read_bytes(), table
