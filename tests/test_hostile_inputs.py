"""Hostile inputs: every bad file ends in one InputError line naming the file and the field, never an
internal error, a hang or a memory blow-up, and the input file is left byte-identical."""

import hashlib
import json
import math
import shutil
import time
import warnings
from pathlib import Path

import h5py
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from probeseq.cli.main import main
from probeseq.exceptions import DataQualityWarning, InputError
from probeseq.io.ions import MAX_ABS_POSITION_NM
from probeseq.io.readers import IonSource, read_ions
from probeseq.lattice.model import Lattice
from probeseq.ranging.isotopes import MAX_FORMULA_ATOMS, isotope_pattern, parse_formula
from probeseq.ranging.ranges import RangeSet
from probeseq.study.runinfo import read_run_folder, safe_file_name
from probeseq.utils.tomlfile import MAX_TOML_BYTES

ROOT = Path(__file__).resolve().parents[1]
SAMPLE = ROOT / "sample_data" / "rodnet7-batch-150C"
FEW = settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
N = 200
COLS = ("x", "y", "z", "mass_to_charge")


def sha(path) -> str:
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def one_line(e) -> str:
    msg = str(e.value if hasattr(e, "value") else e)
    assert msg and len(msg.splitlines()) == 1 and "\n" not in msg and "\r" not in msg, msg
    return msg


def cli_error(capsys, argv) -> str:
    """Run the CLI in-process; it must fail with exactly one 'error:' line and no internal error."""
    code = main(argv)
    err = capsys.readouterr().err
    lines = [ln for ln in err.splitlines() if ln.strip() and not ln.startswith("warning:")]
    assert code == 1, (code, err)
    assert len(lines) == 1 and lines[0].startswith("error:"), err
    assert "internal error" not in err
    return lines[0]


def columns(rng, dtype=np.float64):
    return {"x": rng.uniform(-5, 5, N).astype(dtype), "y": rng.uniform(-5, 5, N).astype(dtype),
            "z": rng.uniform(0, 20, N).astype(dtype), "mass_to_charge": rng.uniform(1, 100, N).astype(dtype)}


def h5_ions(path, skip=(), dtype=np.float64, seed=0):
    """A valid /ions file without the columns in ``skip``; returns the open file for further edits."""
    f = h5py.File(path, "w")
    g = f.create_group("ions")
    for c, a in columns(np.random.default_rng(seed), dtype).items():
        if c not in skip:
            g.create_dataset(c, data=a)
    return f


# ---------------------------------------------------------------------- HDF5 structure
def _dangling(p, tmp):
    with h5_ions(p, skip=("x",)) as f:
        f["ions"]["x"] = h5py.SoftLink("/nowhere/x")


def _loop(p, tmp):
    with h5_ions(p, skip=("x",)) as f:
        f["ions"]["x"] = h5py.SoftLink("/ions/x")


def _loop_pair(p, tmp):
    with h5_ions(p, skip=("x",)) as f:
        f["ions"]["x"] = h5py.SoftLink("/a")
        f["a"] = h5py.SoftLink("/ions/x")


def _external_missing(p, tmp):
    with h5_ions(p, skip=("x",)) as f:
        f["ions"]["x"] = h5py.ExternalLink("missing.h5", "/x")


def _external_existing(p, tmp):
    with h5py.File(tmp / "other.h5", "w") as o:
        o["x"] = np.ones(N)
    with h5_ions(p, skip=("x",)) as f:
        f["ions"]["x"] = h5py.ExternalLink(str(tmp / "other.h5"), "/x")


def _external_group(p, tmp):
    h5_ions(tmp / "other.h5").close()
    with h5py.File(p, "w") as f:
        f["ions"] = h5py.ExternalLink(str(tmp / "other.h5"), "/ions")


def _external_storage(p, tmp):
    (tmp / "raw.bin").write_bytes(np.ones(N).tobytes())
    with h5_ions(p, skip=("x",)) as f:
        f["ions"].create_dataset("x", shape=(N,), dtype="f8", external=[(str(tmp / "raw.bin"), 0, N * 8)])


def _virtual_other_file(p, tmp):
    with h5py.File(tmp / "other.h5", "w") as o:
        o["x"] = np.ones(N)
    layout = h5py.VirtualLayout(shape=(N,), dtype="f8")
    layout[:] = h5py.VirtualSource(str(tmp / "other.h5"), "x", shape=(N,))
    with h5_ions(p, skip=("x",)) as f:
        f["ions"].create_virtual_dataset("x", layout)


def _no_storage(p, tmp):
    with h5_ions(p, skip=("x",)) as f:
        f["ions"].create_dataset("x", shape=(N,), dtype="f8")


def _dtype(kind):
    def build(p, tmp):
        data = {"bool": np.ones(N, bool), "text": np.array(["1.0"] * N, dtype=h5py.string_dtype()),
                "compound": np.zeros(N, dtype=[("a", "f8"), ("b", "f8")]), "2-D": np.zeros((N, 2)),
                "scalar": np.float64(1.0), "complex": np.ones(N, np.complex128)}[kind]
        with h5_ions(p, skip=("x",)) as f:
            f["ions"]["x"] = data
    return build


def _unequal(p, tmp):
    with h5_ions(p, skip=("x",)) as f:
        f["ions"]["x"] = np.ones(N + 1)


def _empty(p, tmp):
    with h5py.File(p, "w") as f:
        g = f.create_group("ions")
        for c in COLS:
            g[c] = np.zeros(0)


def _no_group(p, tmp):
    with h5py.File(p, "w") as f:
        f["data"] = np.zeros(3)


def _ions_is_dataset(p, tmp):
    with h5py.File(p, "w") as f:
        f["ions"] = np.zeros(3)


def _unit_not_utf8(p, tmp):
    with h5_ions(p) as f:
        f["ions"].attrs.create("length_unit", data=b"\xff\xfe", dtype=h5py.string_dtype("ascii", 2))


def _unit_array(p, tmp):
    with h5_ions(p) as f:
        f["ions"].attrs["length_unit"] = np.array(["nm", "angstrom"], dtype=h5py.string_dtype())


def _unit_opaque(p, tmp):
    with h5_ions(p) as f:
        f["ions"].attrs["length_unit"] = np.void(b"\xff\xfe\x00")


def _unit_unknown(p, tmp):
    with h5_ions(p) as f:
        f["ions"].attrs["length_unit"] = "furlong\u2028\x1b[2J"


HDF5_CASES = {
    "dangling soft link": (_dangling, "dangling"),
    "soft link loop": (_loop, "soft links"),
    "soft link loop of two": (_loop_pair, "soft links"),
    "external link, missing file": (_external_missing, "external link"),
    "external link, existing file": (_external_existing, "external link"),
    "external link to the group": (_external_group, "external link"),
    "external raw storage": (_external_storage, "external storage"),
    "virtual dataset from another file": (_virtual_other_file, "another file"),
    "declared but never stored": (_no_storage, "stores no values"),
    "bool dataset": (_dtype("bool"), "booleans"),
    "text dataset": (_dtype("text"), "text"),
    "compound dataset": (_dtype("compound"), "compound"),
    "complex dataset": (_dtype("complex"), "not real numbers"),
    "2-D dataset": (_dtype("2-D"), "1-D"),
    "scalar dataset": (_dtype("scalar"), "1-D"),
    "unequal lengths": (_unequal, "unequal length"),
    "empty datasets": (_empty, "empty"),
    "no /ions group": (_no_group, "no group '/ions'"),
    "/ions is a dataset": (_ions_is_dataset, "is a dataset, not a group"),
    "length_unit not UTF-8": (_unit_not_utf8, "not UTF-8"),
    "length_unit array": (_unit_array, "one text value"),
    "length_unit opaque bytes": (_unit_opaque, "length_unit"),
    "length_unit unknown": (_unit_unknown, "unknown length unit"),
}


@pytest.mark.parametrize("case", list(HDF5_CASES))
def test_hdf5_structure_gives_one_line(tmp_path, case):
    build, words = HDF5_CASES[case]
    p = tmp_path / "ions.h5"
    build(p, tmp_path)
    others = {q: sha(q) for q in tmp_path.iterdir() if q != p}
    before = sha(p)
    with pytest.raises(InputError) as e:
        read_ions(p)
    msg = one_line(e)
    assert str(p) in msg and words in msg, msg
    with pytest.raises(InputError) as e:
        IonSource(p).close()
    assert words in one_line(e)
    assert sha(p) == before
    assert {q: sha(q) for q in tmp_path.iterdir() if q != p} == others


@pytest.mark.parametrize("case", ["soft link loop", "external link, existing file", "external raw storage",
                                  "length_unit not UTF-8", "2-D dataset"])
def test_hdf5_structure_through_the_cli(tmp_path, capsys, case):
    p = tmp_path / "ions.h5"
    HDF5_CASES[case][0](p, tmp_path)
    before = sha(p)
    line = cli_error(capsys, ["inspect", str(p)])
    assert HDF5_CASES[case][1] in line
    assert sha(p) == before


def test_soft_links_inside_the_file_are_followed(tmp_path):
    p = tmp_path / "ions.h5"
    with h5_ions(p, skip=("x",)) as f:
        f["store/x"] = np.linspace(-1, 1, N)
        f["ions"]["x"] = h5py.SoftLink("/store/x")
    ions = read_ions(p)
    np.testing.assert_array_equal(ions.x, np.linspace(-1, 1, N))


def test_position_dataset_through_external_link_is_refused(tmp_path):
    with h5py.File(tmp_path / "other.h5", "w") as o:
        o["pos"] = np.ones((N, 3))
    p = tmp_path / "ions.h5"
    with h5py.File(p, "w") as f:
        f["pos"] = h5py.ExternalLink(str(tmp_path / "other.h5"), "/pos")
        f["m"] = np.full(N, 10.0)
    with pytest.raises(InputError) as e:
        read_ions(p, position_dataset="/pos", mass_dataset="/m")
    assert "external link" in one_line(e)


def test_float16_is_widened_exactly(tmp_path, capsys):
    p = tmp_path / "ions.h5"
    h5_ions(p, dtype=np.float16).close()
    with h5py.File(p, "r") as f:
        want = {c: f["ions"][c][...].astype(np.float32) for c in COLS}
    ions = read_ions(p)
    for c in COLS:
        assert getattr(ions, c).dtype == np.float32
        np.testing.assert_array_equal(getattr(ions, c), want[c])
    with IonSource(p) as src:
        assert src.xyz_dtype == np.float32 and src.m_dtype == np.float32
        views = src.read(0, src.n, src.buffers(src.n))
        np.testing.assert_array_equal(views["mass_to_charge"], want["mass_to_charge"])
    assert main(["inspect", str(p)]) == 0
    assert "error" not in capsys.readouterr().err


def test_float16_sample_ranges_without_internal_error(tmp_path, capsys):
    src = read_ions(SAMPLE / "ions.h5")
    p = tmp_path / "ions.h5"
    with h5py.File(p, "w") as f:
        g = f.create_group("ions")
        for c in COLS:
            g[c] = getattr(src, c).astype(np.float16)
    code = main(["range", str(p), "--metals", "Co,Zn", "--out", str(tmp_path / "r.toml"), "-q"])
    err = capsys.readouterr().err
    assert "internal error" not in err and "out of bounds" not in err
    assert code == 0 or (code == 1 and err.startswith("error:"))


def test_integer_datasets_are_read_as_float64(tmp_path):
    p = tmp_path / "ions.h5"
    with h5py.File(p, "w") as f:
        g = f.create_group("ions")
        for c in COLS:
            g[c] = np.arange(1, N + 1, dtype=np.int32)
    ions = read_ions(p)
    assert ions.x.dtype == np.float64 and ions.x[-1] == N


@FEW
@given(st.one_of(st.text(max_size=12), st.binary(max_size=12), st.integers(-10, 10), st.floats(),
                 st.lists(st.sampled_from(["nm", "angstrom"]), min_size=1, max_size=3)))
def test_random_length_unit_attributes(tmp_path, value):
    p = tmp_path / "u.h5"
    with h5_ions(p) as f:
        if isinstance(value, list):
            value = np.array(value, dtype=h5py.string_dtype())
        try:
            f["ions"].attrs["length_unit"] = value
        except (TypeError, ValueError):  # h5py cannot store it (e.g. NUL in text): nothing to read
            f["ions"].attrs["length_unit"] = "nm"
    try:
        ions = read_ions(p)
    except InputError as e:
        one_line(e)
    else:
        assert ions.meta.length_unit in ("nm", "angstrom")


# ---------------------------------------------------------------------- absurd coordinates
@pytest.mark.parametrize("value", [1e30, -3e5, 1e6])
def test_absurd_coordinates_are_refused_by_the_readers(tmp_path, capsys, value):
    p = tmp_path / "ions.h5"
    with h5_ions(p, skip=("y",)) as f:
        y = np.zeros(N)
        y[7] = value
        f["ions"]["y"] = y
    before = sha(p)
    with pytest.raises(InputError) as e:
        read_ions(p)
    msg = one_line(e)
    assert "y = " in msg and "data row 8" in msg and "length unit" in msg
    line = cli_error(capsys, ["inspect", str(p)])
    assert "length unit" in line
    c = tmp_path / "ions.csv"
    c.write_text(f"x,y,z,mass_to_charge\n1,2,3,50\n{value},2,3,50\n")
    with pytest.raises(InputError) as e:
        read_ions(c)
    assert "x = " in one_line(e) and "data row 2" in str(e.value)
    assert sha(p) == before


def test_coordinates_at_the_bound_and_in_angstrom(tmp_path):
    c = tmp_path / "ions.csv"
    c.write_text(f"x,y,z,mass_to_charge\n{MAX_ABS_POSITION_NM},2,3,50\n1,2,3,50\n")
    assert read_ions(c).x[0] == MAX_ABS_POSITION_NM
    c.write_text(f"x,y,z,mass_to_charge\n{MAX_ABS_POSITION_NM * 10},2,3,50\n1,2,3,50\n")
    assert read_ions(c, length_unit="angstrom").x[0] == pytest.approx(MAX_ABS_POSITION_NM)
    with pytest.raises(InputError):
        read_ions(c)


def test_non_finite_rows_still_dropped_next_to_large_ones(tmp_path):
    c = tmp_path / "ions.csv"
    c.write_text("x,y,z,mass_to_charge\ninf,2,3,50\nnan,2,3,50\n5e4,2,3,50\n")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DataQualityWarning)
        ions = read_ions(c)
    assert ions.n_ions == 1 and ions.x[0] == 5e4


# ---------------------------------------------------------------------- text files
def test_ten_megabyte_header_is_refused_quickly(tmp_path, capsys):
    p = tmp_path / "wide.csv"
    p.write_text("a," * 5_000_000 + "x,y,z,mass_to_charge\n1,2,3,50\n")
    t0 = time.perf_counter()
    line = cli_error(capsys, ["inspect", str(p)])
    assert time.perf_counter() - t0 < 10
    assert "header line is longer" in line and len(line) < 400


def test_many_columns_are_refused_and_matching_is_linear(tmp_path):
    p = tmp_path / "cols.csv"
    p.write_text(",".join(f"c{i}" for i in range(5000)) + "\n" + ",".join("1" * 5000) + "\n")
    with pytest.raises(InputError) as e:
        read_ions(p)
    assert "5000 columns" in one_line(e)
    names = [f"col{i}" for i in range(1000)] + ["x", "y", "z", "mass_to_charge"]
    p.write_text(",".join(names[:1020]) + "\n" + ",".join(["1"] * 1020) + "\n")
    t0 = time.perf_counter()
    assert read_ions(p).n_ions == 1
    names = [f"massto_charge{i % 3}" for i in range(1020)]
    p.write_text(",".join(names) + "\n")
    with pytest.raises(InputError) as e:
        read_ions(p)
    assert "missing required column" in one_line(e) and len(str(e.value)) < 1000
    assert time.perf_counter() - t0 < 5


@pytest.mark.parametrize("data, words", [
    (b"\xff\xfe\x00\x01binary", "line 1"),
    (b"x,y,z,mass_to_charge\n1,2,3,50\n1,\xff\xfe,3,50\n", "line 3: not UTF-8"),
    (b"x,y,z,mass_to_charge\n1,2,3,50\n1,2,\x00,50\n", "line 3: holds binary data"),
    (b"\x89HDF\r\n\x1a\n" + bytes(range(256)) * 4, "line"),
])
def test_binary_bytes_in_text_files(tmp_path, capsys, data, words):
    p = tmp_path / "ions.csv"
    p.write_bytes(data)
    with pytest.raises(InputError) as e:
        read_ions(p)
    assert words in one_line(e)
    cli_error(capsys, ["inspect", str(p)])
    assert p.read_bytes() == data


def test_long_comments_and_old_line_endings_are_fine(tmp_path):
    p = tmp_path / "ions.csv"
    p.write_bytes(b"#" + b"c" * 3_000_000 + b"\n\xef\xbb\xbf".replace(b"\xef\xbb\xbf", b"") +
                  b"x,y,z,mass_to_charge\n1,2,3,50\n")
    assert read_ions(p).n_ions == 1
    p.write_bytes(b"x,y,z,mass_to_charge\r1,2,3,50\r4,5,6,60\r")
    np.testing.assert_array_equal(read_ions(p).x, [1, 4])


@FEW
@given(st.binary(min_size=1, max_size=300))
def test_random_bytes_after_a_valid_header(tmp_path, data):
    p = tmp_path / "r.csv"
    p.write_bytes(b"x,y,z,mass_to_charge\n" + data)
    before = sha(p)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", DataQualityWarning)
            ions = read_ions(p)
    except InputError as e:
        one_line(e)
    else:
        assert np.isfinite(ions.x).all() and (np.abs(ions.x) <= MAX_ABS_POSITION_NM).all()
    assert sha(p) == before


# ---------------------------------------------------------------------- TOML description files
def _range_reader(p):
    return RangeSet.from_toml(p)


def _lattice_reader(p):
    return Lattice.from_toml(p)


def _run_reader(p):
    return read_run_folder(p.parent)


READERS = {"range file": ("ranges.toml", _range_reader), "lattice file": ("lattice.toml", _lattice_reader),
           "run description": ("run.toml", _run_reader)}

HOSTILE_TOML = {
    "binary": (b"\x00\x01\x02\xff" * 64, "binary data"),
    "not UTF-8": (b"a = \"\xff\xfe\"\n", "not UTF-8"),
    "deep arrays": (b"a = " + b"[" * 10_000 + b"]" * 10_000 + b"\n", "nested too deeply"),
    "deep tables": (b"a" + b".a" * 200 + b" = 1\n", "nested too deeply"),
    "5000 digits": (b"a = " + b"7" * 5000 + b"\n", "integer"),
    "20 digits": (b"[run]\na = 12345678901234567890\n", "out of range"),
    "too large": (b"# padding\n" * (MAX_TOML_BYTES // 10 + 10), "bytes"),
}


@pytest.mark.parametrize("reader", list(READERS))
@pytest.mark.parametrize("case", list(HOSTILE_TOML))
def test_hostile_toml_gives_one_line(tmp_path, reader, case):
    name, read = READERS[reader]
    data, words = HOSTILE_TOML[case]
    p = tmp_path / name
    p.write_bytes(data)
    t0 = time.perf_counter()
    with pytest.raises(InputError) as e:
        read(p)
    msg = one_line(e)
    assert str(p) in msg and words in msg, msg
    assert time.perf_counter() - t0 < 5
    assert p.read_bytes() == data


@FEW
@given(st.binary(max_size=200))
def test_random_bytes_as_toml(tmp_path, data):
    for name, read in READERS.values():
        p = tmp_path / name
        p.write_bytes(data)
        try:
            read(p)
        except InputError as e:
            one_line(e)
        assert p.read_bytes() == data


def test_hostile_toml_through_the_cli(tmp_path, capsys):
    lat = tmp_path / "lat.toml"
    lat.write_bytes(b"a = " + b"[" * 10_000 + b"]" * 10_000 + b"\n")
    line = cli_error(capsys, ["analyze", str(SAMPLE / "ions.h5"), "--metals", "Co,Zn", "--lattice", str(lat),
                              "--out", str(tmp_path / "o"), "-q"])
    assert "nested too deeply" in line and not (tmp_path / "o").exists()


# ---------------------------------------------------------------------- formulas and ranges
def _range_text(formula='"Co"', charge="1", low="58.8", high="59.2", shares=""):
    return (f'format = 1\n\n[[range]]\nformula = "Zn"\ncharge = 1\nlow = 63.8\nhigh = 64.2\n\n'
            f"[[range]]\nformula = {formula}\ncharge = {charge}\nlow = {low}\nhigh = {high}\n{shares}")


@pytest.mark.parametrize("kw, words", [
    ({"formula": '"C999999999999"'}, "C999999999999"),
    ({"formula": '"(C30)30"'}, "atoms"),
    ({"formula": '"C60H5"'}, "atoms"),
    ({"formula": '"' + "(" * 3000 + "C" + ")" * 3000 + '"'}, "characters"),
    ({"charge": "1000000000000000"}, "'charge'"),
    ({"charge": "9"}, "'charge'"),
    ({"high": "1e300"}, "'high'"),
    ({"high": "inf"}, "'high'"),
    ({"low": "nan"}, "'low'"),
    ({"shares": 'shares = { "Co' + "+" * 100 + '" = 0.5, "Co+" = 0.5 }\n'}, "shares"),
])
def test_hostile_ranges_name_the_range(tmp_path, kw, words):
    p = tmp_path / "ranges.toml"
    p.write_text(_range_text(**kw))
    t0 = time.perf_counter()
    with pytest.raises(InputError) as e:
        RangeSet.from_toml(p)
    msg = one_line(e)
    assert str(p) in msg and "line 9 (range 2)" in msg and words in msg, msg
    assert time.perf_counter() - t0 < 5


def test_huge_formula_in_range_file_through_the_cli(tmp_path, capsys):
    p = tmp_path / "ranges.toml"
    p.write_text(_range_text(formula='"C999999999999"'))
    before = sha(p)
    t0 = time.perf_counter()
    line = cli_error(capsys, ["range", str(SAMPLE / "ions.h5"), "--metals", "Co,Zn", "--ranges", str(p),
                              "--out", str(tmp_path / "out.toml"), "-q"])
    assert "C999999999999" in line and "atoms" in line
    assert time.perf_counter() - t0 < 60
    assert sha(p) == before and not (tmp_path / "out.toml").exists()


def test_formula_bounds():
    assert sum(parse_formula(f"C{MAX_FORMULA_ATOMS}").values()) == MAX_FORMULA_ATOMS
    assert isotope_pattern("C20H20").n_lines > 1
    for bad in (f"C{MAX_FORMULA_ATOMS + 1}", "C" + "9" * 5000, "(CH)40", "H" * 100):
        with pytest.raises(InputError) as e:
            parse_formula(bad)
        one_line(e)


def test_bad_metals_entry_names_the_file(tmp_path):
    p = tmp_path / "ranges.toml"
    p.write_text('metals = ["1x", "Co"]\n' + _range_text()[len("format = 1\n"):])
    with pytest.raises(InputError) as e:
        RangeSet.from_toml(p)
    assert str(p) in one_line(e) and "'metals'" in str(e.value)


# ---------------------------------------------------------------------- lattices
def _lattice_text(a="2.6", b="2.6", gamma="120.0", rods="[[0.0, 0.0]]", repeat="0.68", spr="3"):
    return (f"[cell]\na = {a}\nb = {b}\ngamma = {gamma}\nrods = {rods}\n\n"
            f"[rod]\nrepeat = {repeat}\nsites_per_repeat = {spr}\n")


@pytest.mark.parametrize("kw, field", [
    ({"a": "0.01"}, "a"), ({"a": "1e300"}, "a"), ({"a": "nan"}, "a"), ({"b": "inf"}, "b"), ({"b": "-2.6"}, "b"),
    ({"a": "1000"}, "a"), ({"repeat": "1e-9"}, "repeat"), ({"repeat": "100"}, "repeat"),
    ({"gamma": "0"}, "gamma"), ({"gamma": "180"}, "gamma"), ({"gamma": "nan"}, "gamma"),
    ({"gamma": "1e-6"}, "gamma"), ({"spr": "1000"}, "sites_per_repeat"), ({"spr": "0"}, "sites_per_repeat"),
    ({"spr": "3.5"}, "sites_per_repeat"), ({"rods": "[" + ", ".join(["[0.1, 0.1]"] * 1000) + "]"}, "rods"),
    ({"rods": "[[nan, 0.0]]"}, "rods"), ({"a": '"2.6"'}, "a"),
])
def test_absurd_lattices_are_refused_before_any_geometry(tmp_path, kw, field):
    p = tmp_path / "lattice.toml"
    p.write_text(_lattice_text(**kw))
    t0 = time.perf_counter()
    with pytest.raises(InputError) as e:
        Lattice.from_toml(p)
    msg = one_line(e)
    assert str(p) in msg and field in msg, msg
    assert time.perf_counter() - t0 < 2


@pytest.mark.parametrize("a, repeat", [(0.01, 0.68), (1e300, 0.68), (math.nan, 0.68), (2.6, math.inf),
                                       (10 ** 400, 0.68), ("x", 0.68)])
def test_absurd_presets_are_refused(a, repeat):
    with pytest.raises(InputError) as e:
        Lattice.from_spec("honeycomb", a=a, repeat=repeat)
    one_line(e)


def test_tiny_lattice_through_the_cli(tmp_path, capsys):
    p = tmp_path / "lattice.toml"
    p.write_text(_lattice_text(a="0.01", b="0.01"))
    line = cli_error(capsys, ["analyze", str(SAMPLE / "ions.h5"), "--metals", "Co,Zn", "--lattice", str(p),
                              "--out", str(tmp_path / "o"), "-q"])
    assert "a = 0.01 nm" in line and not (tmp_path / "o").exists()


# ---------------------------------------------------------------------- run folders
def run_folder(tmp_path, run_lines, sample='name = "r1"'):
    d = tmp_path / "run"
    d.mkdir(parents=True, exist_ok=True)
    for name in ("ions.h5", "lattice.toml"):
        if not (d / name).exists():
            shutil.copy(SAMPLE / name, d / name)
    (d / "run.toml").write_text(f"[sample]\n{sample}\n\n[run]\n" + "\n".join(run_lines) + "\n")
    return d


GOOD_RUN = ['ions = "ions.h5"', 'metals = ["Co", "Zn"]', 'lattice = "lattice.toml"']


@pytest.mark.parametrize("line, field", [
    ('ions = "../../outside.h5"', "ions"),
    ('ions = "/etc/passwd"', "ions"),
    ('ions = "sub/../../outside.h5"', "ions"),
    ('lattice = "../outside.toml"', "lattice"),
    ('lattice = "/etc/hostname"', "lattice"),
    ('ranges = "../outside.toml"', "ranges"),
    ("ions = 5", "ions"),
    ('ions = ""', "ions"),
    ('ions = "a\\u0000b"', "ions"),
    ("lattice = [1]", "lattice"),
    ("metals = [1, 2]", "metals"),
    ('metals = ["Cobalt-and-zinc"]', "metals"),
    ("metals = []", "metals"),
    ('a = "big"', "a"),
    ("repeat = -1.0", "repeat"),
    ("sites_per_repeat = 2.5", "sites_per_repeat"),
    ("detection_efficiency = nan", "detection_efficiency"),
])
def test_run_description_fields_are_checked(tmp_path, line, field):
    (tmp_path / "outside.h5").write_bytes(b"x")
    (tmp_path / "outside.toml").write_text("x = 1\n")
    key = line.split("=")[0].strip()
    lines = [ln for ln in GOOD_RUN if not ln.startswith(key + " ")] + [line]
    d = run_folder(tmp_path, lines)
    before = sha(d / "run.toml")
    with pytest.raises(InputError) as e:
        read_run_folder(d)
    msg = one_line(e)
    assert "run.toml" in msg and field in msg, msg
    assert sha(d / "run.toml") == before


def test_symlink_out_of_the_folder_is_refused_unless_allowed(tmp_path):
    outside = tmp_path / "elsewhere.h5"
    shutil.copy(SAMPLE / "ions.h5", outside)
    d = run_folder(tmp_path, ['ions = "link.h5"', 'metals = ["Co", "Zn"]', 'lattice = "lattice.toml"'])
    (d / "link.h5").symlink_to(outside)
    with pytest.raises(InputError) as e:
        read_run_folder(d)
    assert "outside the run folder" in one_line(e)
    desc = read_run_folder(d, allow_outside=True)
    assert desc.ions.resolve() == outside.resolve()
    d2 = run_folder(tmp_path / "b", [f'ions = "{outside}"', 'metals = ["Co", "Zn"]', 'lattice = "honeycomb"',
                                     "a = 2.6", "repeat = 0.68"])
    with pytest.raises(InputError) as e:
        read_run_folder(d2)
    assert "absolute path" in one_line(e)
    assert read_run_folder(d2, allow_outside=True).ions == outside


def test_run_folder_escape_through_the_cli(tmp_path, capsys):
    (tmp_path / "outside.h5").write_bytes(b"x")
    d = run_folder(tmp_path, ['ions = "../outside.h5"', 'metals = ["Co", "Zn"]', 'lattice = "lattice.toml"'])
    line = cli_error(capsys, ["analyze", str(d), "--out", str(tmp_path / "o"), "-q"])
    assert "[run] ions" in line and "outside the run folder" in line


@pytest.mark.parametrize("raw, want", [
    ("/../../../victim", "victim"), ("..", None), ("", None), ("  . ", None), (".hidden", "hidden"),
    ("a/b\\c", "a_b_c"), ("batch 150C", "batch 150C"), ("x\x00y\x1b[2J", "xy[2J"), ("CON", "CON_"),
    ("a:b*c?", "a_b_c_"),
])
def test_safe_name(tmp_path, raw, want):
    d = run_folder(tmp_path, GOOD_RUN, sample=f"name = {json.dumps(raw)}")
    desc = read_run_folder(d)
    assert desc.name == raw
    assert desc.safe_name == (want if want is not None else "run")
    assert safe_file_name(raw, fallback="folder") == (want if want is not None else "folder")


@FEW
@given(st.text(max_size=300))
def test_safe_file_name_properties(text):
    name = safe_file_name(text)
    assert name and name not in (".", "..") and not name.startswith(".")
    assert "/" not in name and "\\" not in name and len(name) <= 80
    assert all(c.isprintable() for c in name)
    assert safe_file_name(name) == name


def test_hdf5_dataset_options_on_a_text_file_are_refused(tmp_path, capsys):
    p = tmp_path / "ions.csv"
    p.write_text("x,y,z,mass_to_charge\n1,2,3,50\n")
    with pytest.raises(InputError) as e:
        read_ions(p, position_dataset="/x", mass_dataset="/m")
    assert "--position-dataset" in one_line(e)
    assert "--position-dataset" in cli_error(capsys, ["inspect", str(p), "--position-dataset", "/x"])
