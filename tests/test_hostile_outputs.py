"""Damaged output folders and out-of-range parameters end in one clear line, never an internal error.

One good ``analyze`` output folder is made per test session; each test copies it, damages the
copy (JSON edits, truncated or hand-edited HDF5 files) and checks that the library raises
:class:`InputError` naming the file and what is wrong, that the CLI prints exactly one line
``error: ...`` with a non-zero exit code, and that the damaged folder is left byte-identical.
"""

import hashlib
import json
import math
import shutil
import warnings
from pathlib import Path

import h5py
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from probeseq import InputError
from probeseq.cli.main import main
from probeseq.lattice.rodcolumns import load_columns
from probeseq.outputs.export import load_outdir
from probeseq.outputs.results import load_decoded, load_results, read_replicates
from probeseq.pipeline.options import AnalysisOptions
from probeseq.simulation.simulate import SimConfig, simulate_run
from probeseq.study.compare import compare_runs, load_runs, order_value

SAMPLE = Path(__file__).resolve().parent.parent / "sample_data" / "rodnet7-batch-150C"


@pytest.fixture(scope="session")
def good_outdir(tmp_path_factory):
    """One complete analysis output folder for the session (copied before any damage)."""
    out = tmp_path_factory.mktemp("hostile") / "good"
    code = main(["analyze", str(SAMPLE), "--out", str(out), "-q", "--n-boot", "20"])
    assert code == 0 and (out / "results.json").is_file()
    return out


def tree_hashes(folder: Path) -> dict:
    """sha256 of every file under ``folder`` by relative path."""
    return {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file()}


def damaged(good: Path, where: Path, damage) -> Path:
    """A copy of the good folder with ``damage(folder)`` applied."""
    d = where / "run"
    shutil.copytree(good, d)
    damage(d)
    return d


def cli_error(capsys, args) -> str:
    """Run the CLI in-process; it must fail with exactly one 'error:' line and no internal error."""
    capsys.readouterr()
    code = main([str(a) for a in args])
    err = capsys.readouterr().err
    lines = err.strip().splitlines()
    assert code not in (0, 3), (code, err)
    assert len(lines) == 1 and lines[0].startswith("error:"), err
    assert "internal error" not in err
    return lines[0]


# ---------------------------------------------------------------------- results.json
def _edit_results(edit):
    def damage(d):
        p = d / "results.json"
        r = json.loads(p.read_text())
        r = edit(r)
        p.write_text(json.dumps(r))
    return damage


def _without(*path):
    def edit(r):
        o = r
        for k in path[:-1]:
            o = o[k]
        del o[path[-1]]
        return r
    return edit


def _set(value, *path):
    def edit(r):
        o = r
        for k in path[:-1]:
            o = o[k]
        o[path[-1]] = value
        return r
    return edit


RESULTS_DAMAGE = {
    "invalid JSON": (lambda d: (d / "results.json").write_text('{"schema_version": 1, '), "not valid JSON"),
    "a list": (lambda d: (d / "results.json").write_text("[1, 2]"), "got a list"),
    "null": (lambda d: (d / "results.json").write_text("null"), "got null"),
    "not UTF-8": (lambda d: (d / "results.json").write_bytes(b"\xff\xfe{}"), "UTF-8"),
    "deeply nested": (lambda d: (d / "results.json").write_text("[" * 100_000), "JSON"),
    "no classification": (_edit_results(_without("classification")), "'classification' is missing"),
    "no statistics": (_edit_results(_without("statistics")), "'statistics' is missing"),
    "no provenance": (_edit_results(_without("provenance")), "'provenance' is missing"),
    "confidence text": (_edit_results(_set("high", "classification", "confidence")), "'confidence' must be a number"),
    "confidence 7": (_edit_results(_set(7, "classification", "confidence")), "'confidence' must be a number in [0, 1]"),
    "label number": (_edit_results(_set(5, "classification", "label")), "'label' must be text"),
    "intervals list": (_edit_results(_set([1], "statistics", "intervals")), "'intervals' must be an object"),
    "estimate text": (_edit_results(_set({"estimate": "x"}, "statistics", "intervals", "persistence")),
                      "'estimate' must be a number"),
    "sample text": (_edit_results(_set("hot", "provenance", "sample")), "'sample' must be an object"),
    "schema text": (_edit_results(_set("1", "schema_version")), "schema"),
}


@pytest.mark.parametrize("case", sorted(RESULTS_DAMAGE))
def test_damaged_results_json(case, good_outdir, tmp_path, capsys):
    damage, fragment = RESULTS_DAMAGE[case]
    d = damaged(good_outdir, tmp_path, damage)
    before = tree_hashes(d)
    for load in (load_results, load_outdir, lambda x: load_runs([x])):
        with pytest.raises(InputError, match="results.json|schema") as e:
            load(d)
        assert fragment in str(e.value) and "\n" not in str(e.value)
    line = cli_error(capsys, ["export", d, "--out", tmp_path / "x.csv"])
    assert "results.json" in line or "schema" in line
    line = cli_error(capsys, ["compare", d, "--out", tmp_path / "cmp"])
    assert fragment.split("'")[1 if "'" in fragment else 0] in line
    assert not (tmp_path / "x.csv").exists() and not (tmp_path / "cmp").exists()
    assert tree_hashes(d) == before


JSON_VALUES = st.recursive(st.none() | st.booleans() | st.integers() | st.floats() | st.text(max_size=5),
                           lambda c: st.lists(c, max_size=3) | st.dictionaries(st.text(max_size=3), c, max_size=3),
                           max_leaves=6)


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(key=st.sampled_from(["classification", "statistics", "provenance", "composition"]), value=JSON_VALUES)
def test_any_value_in_place_of_a_section_is_refused_cleanly(key, value, good_outdir, tmp_path_factory):
    d = tmp_path_factory.mktemp("prop") / "run"
    d.mkdir()
    r = json.loads((good_outdir / "results.json").read_text())
    r[key] = value
    (d / "results.json").write_text(json.dumps(r))
    try:
        load_results(d)
    except InputError as e:
        assert str(e).startswith(str(d / "results.json")) and "\n" not in str(e)
    else:  # only a well-formed section is accepted
        assert isinstance(value, dict)
        if key == "classification":
            assert isinstance(value.get("label"), str) and 0 <= value["confidence"] <= 1
        if key == "statistics":
            assert isinstance(value.get("intervals"), dict)


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(value=JSON_VALUES)
def test_any_confidence_is_a_number_in_0_1_or_refused(value, good_outdir, tmp_path_factory):
    d = tmp_path_factory.mktemp("conf") / "run"
    d.mkdir()
    r = json.loads((good_outdir / "results.json").read_text())
    r["classification"]["confidence"] = value
    (d / "results.json").write_text(json.dumps(r))
    ok = (isinstance(value, (int, float)) and not isinstance(value, bool) and 0 <= value <= 1)
    if ok:
        assert load_results(d)["classification"]["confidence"] == value
    else:
        with pytest.raises(InputError, match="confidence"):
            load_results(d)


# ---------------------------------------------------------------------- HDF5 files
def _truncate(name):
    def damage(d):
        data = (d / name).read_bytes()
        (d / name).write_bytes(data[: len(data) // 3])
    return damage


def _h5(name, edit):
    def damage(d):
        with h5py.File(d / name, "r+") as f:
            edit(f)
    return damage


def _replace(group, dataset, data):
    def edit(f):
        del f[group][dataset]
        f[group].create_dataset(dataset, data=data)
    return edit


def _attr(group, key, value):
    def edit(f):
        f[group].attrs[key] = value
    return edit


def _nan_at_used_site(f):
    g = f["columns"]
    c = g["counts"][...]
    r, s = np.argwhere(g["mask"][...].astype(bool))[0]
    c[r, s, 0] = np.nan
    del g["counts"]
    g.create_dataset("counts", data=c)


COLUMNS_DAMAGE = {
    "truncated": (_truncate("columns.h5"), "not a readable HDF5 file"),
    "pitch 0": (_h5("columns.h5", _attr("columns", "pitch_nm", 0.0)), "pitch_nm"),
    "pitch NaN": (_h5("columns.h5", _attr("columns", "pitch_nm", np.nan)), "pitch_nm"),
    "pitch text": (_h5("columns.h5", _attr("columns", "pitch_nm", "abc")), "pitch_nm"),
    "metals not JSON": (_h5("columns.h5", _attr("columns", "metals", "{Co")), "'metals' is not valid JSON"),
    "three metals named": (_h5("columns.h5", _attr("columns", "metals", '["Co", "Zn", "Ni"]')), "'counts' has shape"),
    "counts 2-D": (_h5("columns.h5", _replace("columns", "counts", np.zeros((3, 4)))), "'counts' has shape"),
    "counts text": (_h5("columns.h5", _replace("columns", "counts", np.array([b"a", b"b"]))), "'counts' holds"),
    "mask shape": (_h5("columns.h5", _replace("columns", "mask", np.ones((2, 2), np.uint8))), "'mask' has shape"),
    "no counts": (_h5("columns.h5", lambda f: f["columns"].__delitem__("counts")), "'counts' is missing"),
    "no group": (_h5("columns.h5", lambda f: f.__delitem__("columns")), "no group '/columns'"),
    "neighbour out of range": (_h5("columns.h5", _replace("columns", "neighbours", np.array([[0, 10 ** 6]]))),
                               "'neighbours'"),
    "NaN count at a used site": (_h5("columns.h5", _nan_at_used_site), "NaN"),
    "version text": (_h5("columns.h5", _attr("columns", "format_version", "one")), "format version"),
}


@pytest.mark.parametrize("case", sorted(COLUMNS_DAMAGE))
def test_damaged_columns_h5(case, good_outdir, tmp_path, capsys):
    damage, fragment = COLUMNS_DAMAGE[case]
    d = damaged(good_outdir, tmp_path, damage)
    before = tree_hashes(d)
    with pytest.raises(InputError, match="columns.h5") as e:
        load_columns(d / "columns.h5")
    assert fragment in str(e.value)
    with pytest.raises(InputError, match="columns.h5"):
        load_outdir(d)
    line = cli_error(capsys, ["decode", d, "--out", tmp_path / "dec", "-q"])
    assert "columns.h5" in line and fragment in line
    line = cli_error(capsys, ["export", d, "--out", tmp_path / "x.csv"])
    assert "columns.h5" in line
    assert not (tmp_path / "dec").exists() and not (tmp_path / "x.csv").exists()
    assert tree_hashes(d) == before


def _mismatched_metals(f):
    f["decoded"].attrs["metals"] = '["Ni", "Cu"]'


DECODED_DAMAGE = {
    "truncated": (_truncate("decoded.h5"), "decoded.h5", load_decoded),
    "missing": (lambda d: (d / "decoded.h5").unlink(), "decoded.h5", None),
    "no group": (_h5("decoded.h5", lambda f: f.__delitem__("decoded")), "no group '/decoded'", load_decoded),
    "posteriors shape": (_h5("decoded.h5", _replace("decoded", "posteriors", np.zeros((2, 2, 2), np.float32))),
                         "'posteriors' has shape", load_decoded),
    "viterbi shape": (_h5("decoded.h5", _replace("decoded", "viterbi", np.zeros((2, 2), np.int8))),
                      "has shape", load_decoded),
    "viterbi index 9": (_h5("decoded.h5", lambda f: f["decoded"]["viterbi"].__setitem__((0, 0), 9)),
                        "outside -1..1", load_decoded),
    "posterior NaN": (_h5("decoded.h5", lambda f: f["decoded"]["posteriors"].__setitem__((0, 0, 0), np.nan)),
                      "'posteriors' must hold probabilities", load_decoded),
    "one metal": (_h5("decoded.h5", _attr("decoded", "metals", '["Co"]')), "'metals'", load_decoded),
    "other metals": (_h5("decoded.h5", _mismatched_metals), "mixes files", None),
}


@pytest.mark.parametrize("case", sorted(DECODED_DAMAGE))
def test_damaged_decoded_h5(case, good_outdir, tmp_path, capsys):
    damage, fragment, loader = DECODED_DAMAGE[case]
    d = damaged(good_outdir, tmp_path, damage)
    before = tree_hashes(d)
    if loader is not None:
        with pytest.raises(InputError, match="decoded.h5") as e:
            loader(d / "decoded.h5")
        assert fragment in str(e.value)
    with pytest.raises(InputError) as e:
        load_outdir(d)
    assert fragment in str(e.value) and "\n" not in str(e.value)
    line = cli_error(capsys, ["export", d, "--format", "hdf5", "--out", tmp_path / "x.h5"])
    assert fragment in line
    assert not (tmp_path / "x.h5").exists()
    assert tree_hashes(d) == before


def _unequal_replicates(f):
    f["replicates"].create_dataset("zz_extra", data=np.zeros(3))


BOOTSTRAP_DAMAGE = {
    "truncated": (_truncate("bootstrap.h5"), "not a readable HDF5 file"),
    "no group": (_h5("bootstrap.h5", lambda f: f.__delitem__("replicates")), "no group '/replicates'"),
    "2-D replicates": (_h5("bootstrap.h5", _replace("replicates", "persistence", np.zeros((20, 2)))),
                       "'persistence' has shape"),
    "text replicates": (_h5("bootstrap.h5", _replace("replicates", "persistence", np.array([b"x"] * 20))),
                        "'persistence' holds"),
    "unequal lengths": (_h5("bootstrap.h5", _unequal_replicates), "differ in length"),
}


@pytest.mark.parametrize("case", sorted(BOOTSTRAP_DAMAGE))
def test_damaged_bootstrap_h5(case, good_outdir, tmp_path, capsys):
    damage, fragment = BOOTSTRAP_DAMAGE[case]
    d = damaged(good_outdir, tmp_path, damage)
    before = tree_hashes(d)
    with pytest.raises(InputError, match="bootstrap.h5") as e:
        read_replicates(d)
    assert fragment in str(e.value)
    with pytest.raises(InputError, match="bootstrap.h5"):
        load_runs([d])
    line = cli_error(capsys, ["compare", d, "--out", tmp_path / "cmp"])
    assert "bootstrap.h5" in line and fragment in line
    assert not (tmp_path / "cmp").exists()
    assert tree_hashes(d) == before


def test_decode_refuses_pitch_zero_and_nan_in_a_columns_folder(good_outdir, tmp_path, capsys):
    for i, pitch in enumerate((0.0, float("nan"), -0.2, float("inf"))):
        d = tmp_path / f"cols{i}"
        d.mkdir()
        shutil.copy(good_outdir / "columns.h5", d / "columns.h5")
        with h5py.File(d / "columns.h5", "r+") as f:
            f["columns"].attrs["pitch_nm"] = pitch
        before = tree_hashes(d)
        line = cli_error(capsys, ["decode", d, "--out", tmp_path / f"dec{i}", "-q"])
        assert "pitch_nm" in line and "columns.h5" in line
        assert not (tmp_path / f"dec{i}").exists()
        assert tree_hashes(d) == before


# ---------------------------------------------------------------------- compare ordering
def _with_temperature(good, where, value, name):
    d = where / name
    shutil.copytree(good, d)
    p = d / "results.json"
    r = json.loads(p.read_text())
    r["provenance"]["sample"]["synthesis_temperature_c"] = value
    r["provenance"]["sample"]["name"] = name
    p.write_text(json.dumps(r))
    return d


def test_compare_orders_text_temperatures_after_numbers(good_outdir, tmp_path, capsys):
    runs = [_with_temperature(good_outdir, tmp_path, v, n)
            for v, n in (("hot", "a-text"), (150, "b-num"), ("90", "c-text-number"), (None, "d-none"))]
    before = {d.name: tree_hashes(d) for d in runs}
    with pytest.warns(UserWarning, match="not a number"):
        comp = compare_runs(load_runs(runs))
    assert [r.name for r in comp.runs] == ["c-text-number", "b-num", "a-text", "d-none"]
    assert any("a-text" in n for n in comp.notes)
    capsys.readouterr()
    with warnings.catch_warnings():
        warnings.simplefilter("always")  # shown as the CLI shows them, not raised
        code = main(["compare", *map(str, runs), "--out", str(tmp_path / "cmp"), "-q"])
    err = capsys.readouterr().err
    assert code == 0 and "internal error" not in err and (tmp_path / "cmp" / "comparison.csv").is_file()
    assert "warning: 'synthesis_temperature_c' is not a number" in err
    assert {d.name: tree_hashes(d) for d in runs} == before


@given(st.one_of(st.none(), st.booleans(), st.integers(), st.floats(), st.text(max_size=6),
                 st.lists(st.integers(), max_size=2)))
@settings(max_examples=60, deadline=None)
def test_order_value_is_a_finite_number_or_none(value):
    v = order_value(value)
    assert v is None or (isinstance(v, float) and math.isfinite(v))
    if isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value):
        assert v == float(value)


# ---------------------------------------------------------------------- parameter ranges
@pytest.mark.parametrize("kw,fragment", [
    ({"seed": -1}, "--seed"), ({"seed": 2 ** 63}, "--seed"), ({"seed": 1.5}, "--seed"),
    ({"scale": 1e-9}, "--scale"), ({"scale": 50.0}, "--scale"), ({"scale": float("nan")}, "--scale"),
    ({"n_boot": 0}, "--n-boot"), ({"n_boot": 10 ** 9}, "--n-boot"), ({"n_starts": 0}, "--n-starts"),
    ({"n_starts": 10 ** 6}, "--n-starts"), ({"alpha": 0.6}, "--alpha"), ({"alpha": 0.0}, "--alpha"),
    ({"copy_threshold": 0.0}, "--copy-threshold"), ({"copy_threshold": 1.0}, "--copy-threshold"),
    ({"long_block_sites": 1.0}, "--long-block-sites"), ({"long_block_sites": float("inf")}, "--long-block-sites"),
    ({"rotation_deg": float("nan")}, "--rotation-deg"), ({"offset_nm": (float("nan"), 0.0)}, "--offset-nm"),
    ({"uncertain_below": "high"}, "--uncertain-below"),
])
def test_analysis_options_out_of_range(kw, fragment):
    with pytest.raises(InputError, match=fragment) as e:
        AnalysisOptions(**kw)
    assert "\n" not in str(e.value)


@pytest.mark.parametrize("flags,fragment", [
    (["--seed", "-1"], "--seed"), (["--scale", "1e-9"], "--scale"), (["--n-boot", "100000000000"], "--n-boot"),
    (["--alpha", "0.9"], "--alpha"), (["--copy-threshold", "0"], "--copy-threshold"),
    (["--long-block-sites", "1"], "--long-block-sites"), (["--rotation-deg", "nan"], "--rotation-deg"),
])
def test_cli_analyze_refuses_bad_options(flags, fragment, tmp_path, capsys):
    line = cli_error(capsys, ["analyze", SAMPLE, "--out", tmp_path / "a", "-q", *flags])
    assert fragment in line
    assert not (tmp_path / "a").exists()


def test_stage_entry_points_check_seed_and_scale(good_outdir, tmp_path, capsys):
    from probeseq.decoding.decode import fit_decoder
    from probeseq.lattice.columns import build_columns
    from probeseq.lattice.model import Lattice

    cols = load_columns(good_outdir / "columns.h5")
    with pytest.raises(InputError, match="--seed"):
        fit_decoder(cols, random_state=-1)
    lat = Lattice.from_preset("honeycomb", 2.6, 0.68)
    x = np.zeros(10)
    with pytest.raises(InputError, match="--scale"):
        build_columns(x, x, x, np.ones((10, 2)), ("Co", "Zn"), lat, scale=1e-9)
    with pytest.raises(InputError, match="--seed"):
        build_columns(x, x, x, np.ones((10, 2)), ("Co", "Zn"), lat, random_state=-5)
    line = cli_error(capsys, ["decode", good_outdir, "--out", tmp_path / "dec", "--seed", "-1", "-q"])
    assert "--seed" in line and not (tmp_path / "dec").exists()
    line = cli_error(capsys, ["compare", good_outdir, "--out", tmp_path / "cmp", "--seed", "-1", "-q"])
    assert "--seed" in line and not (tmp_path / "cmp").exists()


# ---------------------------------------------------------------------- simulate and plan
@pytest.mark.parametrize("flags,fragment", [
    (["--metals", "Co,Xx"], "'Xx' is not an element"), (["--metals", "Co,CO"], "'CO' is not an element"),
    (["--metals", "co,Zn"], "'co' is not an element"),
    (["--depth", "inf"], "--depth"), (["--depth", "nan"], "--depth"), (["--tip-radius", "inf"], "--tip-radius"),
    (["--a", "nan"], "--a"), (["--a", "1e300"], "1e+300"), (["--composition", "nan,nan"], "--composition"),
    (["--composition", "inf,1"], "--composition"), (["--detection-efficiency", "0"], "--detection-efficiency"),
    (["--detection-efficiency", "nan"], "--detection-efficiency"),
    (["--seed", "-1"], "--seed"), (["--mrp", "inf"], "--mrp"), (["--lateral-blur", "inf"], "--lateral-blur"),
    (["--tip-radius", "5000"], "--tip-radius"), (["--depth", "0.1"], "site pitch"),
])
def test_cli_simulate_refuses_before_any_work(flags, fragment, tmp_path, capsys):
    out = tmp_path / "s.csv"
    line = cli_error(capsys, ["simulate", out, "-q", *flags])
    assert fragment in line
    assert list(tmp_path.iterdir()) == []


def test_simulation_too_large_for_memory_names_the_figure_and_options(monkeypatch):
    import probeseq.utils.validate as v

    cfg = SimConfig(top_radius_nm=40.0)
    need = cfg.expected_size()["bytes"]
    monkeypatch.setattr(v, "available_memory_bytes", lambda: int(need / 2))
    with pytest.raises(InputError, match=r"needs about .*iB of memory.*--tip-radius.*--depth"):
        SimConfig(top_radius_nm=40.0)
    monkeypatch.setattr(v, "available_memory_bytes", lambda: int(need * 4))
    SimConfig(top_radius_nm=40.0)


def test_expected_size_tracks_a_real_run():
    cfg = SimConfig(top_radius_nm=8.0, depth_nm=12.0, seed=4)
    est = cfg.expected_size()
    run = simulate_run(cfg)
    assert 0.7 < est["ions"] / run.ions.n_ions < 1.4
    assert 0.7 < est["metal_sites"] / run.truth["counts"]["metal_sites"] < 1.4


@pytest.mark.parametrize("flags,fragment", [
    (["--metals", "Co,Xx"], "'Xx' is not an element"), (["--depth", "nan"], "--depth"),
    (["--tip-radius", "inf"], "--tip-radius"), (["--seed", "-1"], "--seed"),
    (["--detection-efficiency", "nan"], "--detection-efficiency"), (["--tip-radius", "5000"], "--tip-radius"),
])
def test_cli_plan_refuses_before_any_work(flags, fragment, tmp_path, capsys):
    args = ["plan", "--metals", "Co,Zn", "--lattice", "honeycomb", "--a", "2.6", "--repeat", "0.68", "-q",
            "--out", tmp_path / "plan.json", *flags]
    line = cli_error(capsys, args)
    assert fragment in line
    assert not (tmp_path / "plan.json").exists()
