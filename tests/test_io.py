import hashlib

import h5py
import numpy as np
import pytest

from probeseq import InputError
from probeseq.exceptions import DataQualityWarning
from probeseq.io.readers import iter_ion_chunks, read_ions, write_ions


def write_text(path, text):
    path.write_text(text)
    return path


def test_round_trip_csv_tsv_hdf5(tmp_path, small_run):
    ions = small_run.ions
    for name in ("a.csv", "a.tsv", "a.h5"):
        p = write_ions(ions, tmp_path / name, float_format="%.8g")
        back = read_ions(p)
        assert back.n_ions == ions.n_ions
        for c in ("x", "y", "z", "mass_to_charge", "pulse_number", "dc_voltage_v"):
            np.testing.assert_allclose(getattr(back, c), getattr(ions, c), rtol=1e-7, atol=1e-6)
        assert back.meta.sha256 == hashlib.sha256(p.read_bytes()).hexdigest()


def test_files_with_the_older_optional_column_names_still_read(tmp_path):
    # before the optional columns said what they hold they were named pulse and voltage
    p = write_text(tmp_path / "old.csv", "x,y,z,mass_to_charge,Pulse,voltage\n1,2,3,5.5,17,4000\n1,2,4,7,18,4001\n")
    ions = read_ions(p)
    np.testing.assert_array_equal(ions.pulse_number, [17, 18])
    np.testing.assert_array_equal(ions.dc_voltage_v, [4000, 4001])
    import h5py

    h = tmp_path / "old.h5"
    with h5py.File(h, "w") as f:
        g = f.create_group("ions")
        for c, v in (("x", [1.0, 1]), ("y", [2.0, 2]), ("z", [3.0, 4]), ("mass_to_charge", [5.5, 7]),
                     ("pulse", [17.0, 18]), ("voltage", [4000.0, 4001])):
            g.create_dataset(c, data=np.array(v))
    back = read_ions(h)
    np.testing.assert_array_equal(back.pulse_number, [17, 18])
    np.testing.assert_array_equal(back.dc_voltage_v, [4000, 4001])


def test_comments_header_case_and_angstrom(tmp_path):
    p = write_text(tmp_path / "r.csv", "# a comment\n#another\n X ,y,Z,Mass_To_Charge,extra\n10,20,30,5.5,1\n1,2,3,7,0\n")
    ions = read_ions(p, length_unit="angstrom")
    np.testing.assert_allclose(ions.x, [1.0, 0.1])
    np.testing.assert_allclose(ions.z, [3.0, 0.3])
    assert ions.meta.length_unit == "angstrom"


def test_missing_file(tmp_path):
    with pytest.raises(InputError, match="not found"):
        read_ions(tmp_path / "nope.csv")


def test_unknown_extension(tmp_path):
    p = write_text(tmp_path / "r.dat", "x,y,z,mass_to_charge\n1,2,3,4\n")
    with pytest.raises(InputError, match="unknown ion file extension '.dat'"):
        read_ions(p)


def test_misspelt_column_named_with_found_and_hint(tmp_path):
    p = write_text(tmp_path / "r.csv", "x,y,z,mass_to_chrge\n1,2,3,4\n")
    with pytest.raises(InputError) as e:
        read_ions(p)
    msg = str(e.value)
    assert "mass_to_charge" in msg and "found: x, y, z, mass_to_chrge" in msg and "did you mean" in msg
    assert "\n" not in msg


def test_non_numeric_value_gives_line_number(tmp_path):
    p = write_text(tmp_path / "r.csv", "# c\nx,y,z,mass_to_charge\n1,2,3,4\n1,2,abc,4\n")
    with pytest.raises(InputError, match=r"line 4: column 'z' holds 'abc'"):
        read_ions(p)


def test_nan_inf_nonpositive_dropped_with_warning_or_strict(tmp_path):
    p = write_text(tmp_path / "r.csv", "x,y,z,mass_to_charge\n1,2,3,4\nnan,2,3,4\n1,2,3,-1\n1,inf,3,2\n5,5,5,5\n")
    with pytest.warns(DataQualityWarning, match="dropped 3 rows"):
        ions = read_ions(p)
    assert ions.n_ions == 2 and ions.meta.dropped == {"non-finite": 2, "non-positive mass_to_charge": 1}
    with pytest.raises(InputError, match="strict"):
        read_ions(p, strict=True)


def test_empty_file_and_header_only(tmp_path):
    p = write_text(tmp_path / "e.csv", "")
    with pytest.raises(InputError, match="empty"):
        read_ions(p)
    p = write_text(tmp_path / "h.csv", "x,y,z,mass_to_charge\n")
    with pytest.raises(InputError, match="no data rows"):
        read_ions(p)


def test_truncated_and_non_hdf5(tmp_path, small_run):
    good = write_ions(small_run.ions, tmp_path / "g.h5")
    data = good.read_bytes()
    bad = tmp_path / "t.h5"
    bad.write_bytes(data[: len(data) // 3])
    with pytest.raises(InputError, match="truncated|not a readable HDF5"):
        read_ions(bad)
    txt = write_text(tmp_path / "n.h5", "x,y,z\n")
    with pytest.raises(InputError, match="not a readable HDF5"):
        read_ions(txt)


def test_hdf5_unequal_lengths_and_unknown_unit(tmp_path):
    p = tmp_path / "u.h5"
    with h5py.File(p, "w") as f:
        g = f.create_group("ions")
        for c, n in (("x", 5), ("y", 5), ("z", 4), ("mass_to_charge", 5)):
            g.create_dataset(c, data=np.ones(n))
    with pytest.raises(InputError, match="unequal length"):
        read_ions(p)
    q = tmp_path / "v.h5"
    with h5py.File(q, "w") as f:
        g = f.create_group("ions")
        g.attrs["length_unit"] = "furlong"
        for c in ("x", "y", "z", "mass_to_charge"):
            g.create_dataset(c, data=np.ones(3))
    with pytest.raises(InputError, match="unknown length unit 'furlong'"):
        read_ions(q)
    with pytest.raises(InputError, match="unknown length unit 'parsec'"):
        read_ions(tmp_path / "v.h5", length_unit="parsec")


def test_hdf5_other_layout_with_dataset_options(tmp_path, rng):
    p = tmp_path / "o.h5"
    pos = rng.normal(size=(50, 3)) * 10
    mz = rng.uniform(1, 100, 50)
    with h5py.File(p, "w") as f:
        f.create_dataset("data/pos", data=pos)
        f.create_dataset("data/mz", data=mz)
    with pytest.raises(InputError, match="no group '/ions'"):
        read_ions(p)
    ions = read_ions(p, position_dataset="data/pos", mass_dataset="data/mz", length_unit="angstrom")
    np.testing.assert_allclose(ions.xyz, pos * 0.1)
    np.testing.assert_allclose(ions.mass_to_charge, mz)


def test_streaming_chunks_equal_whole(tmp_path, small_run):
    p = write_ions(small_run.ions, tmp_path / "s.h5", chunk_rows=1000)
    whole = read_ions(p)
    parts = list(iter_ion_chunks(p, chunk_size=7000))
    assert len(parts) == -(-whole.n_ions // 7000)
    np.testing.assert_array_equal(np.concatenate([c.z for c in parts]), whole.z)


def test_input_file_never_changed(tmp_path, small_run):
    p = write_ions(small_run.ions, tmp_path / "s.h5")
    before = p.read_bytes()
    read_ions(p)
    list(iter_ion_chunks(p, chunk_size=10000))
    assert p.read_bytes() == before


def test_writer_is_atomic_on_failure(tmp_path, small_run, monkeypatch):
    import pandas as pd

    target = tmp_path / "w.csv"
    target.write_text("previous results\n")

    def boom(*a, **k):
        raise KeyboardInterrupt

    monkeypatch.setattr(pd.DataFrame, "to_csv", boom)
    with pytest.raises(KeyboardInterrupt):
        write_ions(small_run.ions, target)
    assert target.read_text() == "previous results\n"
    assert not list(tmp_path.glob(".w.csv.part*"))
