"""Builders of hostile input trees.

A case's recipe is a tuple of steps ``(builder name, parameters)``; :func:`build` runs them in
order, each writing into the case's input folder (``in``) or work folder (``work``). Builders are
deterministic: random content is drawn from ``random.Random(seed)`` / ``numpy`` generators seeded by
the case, so every case can be rebuilt exactly.
"""

from __future__ import annotations

import json
import os
import random
import shutil
from pathlib import Path

import numpy as np

COLS = ("x", "y", "z", "mass_to_charge")
MB = 1 << 20

# A minimal valid range file: one window for each metal's main isotope line.
RANGE_OK = """format = 1
metals = ["Co", "Zn"]

[[range]]
formula = "Co"
charge = 1
low = 58.80
high = 59.30

[[range]]
formula = "Zn"
charge = 1
low = 63.80
high = 64.30
"""


def expand(argv, in_dir: Path, work_dir: Path) -> list:
    """Replace ``{in}`` and ``{work}`` in every argument by the case's folders."""
    return [a.replace("{in}", str(in_dir)).replace("{work}", str(work_dir)) for a in argv]


def _small(base: Path) -> dict:
    with np.load(base / "small.npz") as z:
        return {k: z[k].astype(np.float64) for k in COLS}


def _table_text(cols: dict, sep: str = ",", header=COLS, fmt: str = "{:.6f}") -> str:
    rows = [sep.join(header)]
    n = len(cols["x"])
    for i in range(n):
        rows.append(sep.join(fmt.format(cols[k][i]) if isinstance(cols[k][i], (float, np.floating))
                             else str(cols[k][i]) for k in COLS))
    return "\n".join(rows) + "\n"


def _write_h5(path: Path, cols: dict, attrs=None, group="ions", dtype=None):
    import h5py

    with h5py.File(path, "w") as f:
        g = f.create_group(group)
        for k, v in cols.items():
            g.create_dataset(k, data=np.asarray(v) if dtype is None else np.asarray(v).astype(dtype))
        for k, v in (attrs if attrs is not None else {"length_unit": "nm"}).items():
            g.attrs[k] = v


# ---------------------------------------------------------------------- ion files
def _ion_text_variant(variant: str, cols: dict, seed: int):
    """Bytes of a malformed text ion file."""
    rng = np.random.default_rng(seed)
    n = len(cols["x"])
    text = _table_text(cols)
    if variant == "valid":
        return text.encode()
    if variant == "valid_tsv":
        return _table_text(cols, sep="\t").encode()
    if variant == "crlf":
        return text.replace("\n", "\r\n").encode()
    if variant == "utf8_bom":
        return b"\xef\xbb\xbf" + text.encode()
    if variant == "utf16":
        return text.encode("utf-16")
    if variant == "random_bytes":
        return rng.integers(0, 256, 4096, dtype=np.uint8).tobytes()
    if variant == "empty":
        return b""
    if variant == "header_only":
        return b"x,y,z,mass_to_charge\n"
    if variant == "comments_only":
        return b"# nothing here\n# at all\n"
    if variant == "blank_lines":
        return b"\n\n\n\n"
    if variant == "truncated":
        b = text.encode()
        return b[: int(len(b) * 0.6) + 3]
    if variant == "wrong_headers":
        return text.replace("x,y,z,mass_to_charge", "a,b,c,d", 1).encode()
    if variant == "missing_mass_column":
        lines = text.splitlines()
        return ("\n".join(",".join(ln.split(",")[:3]) for ln in lines) + "\n").encode()
    if variant == "duplicate_columns":
        lines = text.splitlines()
        return ("\n".join(ln.split(",")[0] + "," + ln for ln in lines) + "\n").encode()
    if variant == "header_10mb":
        extra = ",".join(f"c{i}" for i in range(1_300_000))[: 10 * MB]
        head = "x,y,z,mass_to_charge," + extra
        return (head + "\n" + "\n".join(ln + ",0" for ln in text.splitlines()[1:]) + "\n").encode()
    if variant == "huge_field":
        lines = text.splitlines()
        parts = lines[5].split(",")
        parts[0] = "1" * (10 * MB)
        lines[5] = ",".join(parts)
        return ("\n".join(lines) + "\n").encode()
    if variant == "huge_line_count_header_only":
        return b"x,y,z,mass_to_charge\n" + b"\n" * (2 * MB)
    if variant in ("nan_coords", "inf_coords", "huge_coords", "neg_huge_coords"):
        token = {"nan_coords": "nan", "inf_coords": "inf", "huge_coords": "1e30", "neg_huge_coords": "-1e308"}[variant]
        lines = text.splitlines()
        for i in rng.choice(np.arange(1, n + 1), size=max(1, n // 10), replace=False):
            parts = lines[i].split(",")
            parts[int(rng.integers(0, 3))] = token
            lines[i] = ",".join(parts)
        return ("\n".join(lines) + "\n").encode()
    if variant == "overflow_coords":
        lines = text.splitlines()
        parts = lines[3].split(",")
        parts[0] = "1e999"
        lines[3] = ",".join(parts)
        return ("\n".join(lines) + "\n").encode()
    if variant == "all_nan":
        return ("x,y,z,mass_to_charge\n" + "nan,nan,nan,nan\n" * n).encode()
    if variant == "nonpositive_mass":
        c = dict(cols)
        m = c["mass_to_charge"].copy()
        m[::7] = 0.0
        m[3::7] = -m[3::7]
        c["mass_to_charge"] = m
        return _table_text(c).encode()
    if variant == "all_nonpositive_mass":
        c = dict(cols)
        c["mass_to_charge"] = -np.abs(c["mass_to_charge"])
        return _table_text(c).encode()
    if variant == "text_in_numbers":
        lines = text.splitlines()
        lines[17] = lines[17].replace(",", ",abc", 1)
        return ("\n".join(lines) + "\n").encode()
    if variant == "nul_bytes":
        b = bytearray(text.encode())
        for i in rng.integers(30, len(b), 20):
            b[int(i)] = 0
        return bytes(b)
    if variant == "latin1_header":
        return text.replace("mass_to_charge", "mass_to_charge", 1).replace("x,", "\xe9x,", 1).encode("latin-1")
    if variant == "non_utf8_body":
        lines = text.encode().split(b"\n")
        lines[9] = lines[9] + b",\xff\xfe\xfd"
        return b"\n".join(lines)
    if variant == "ragged_rows":
        lines = text.splitlines()
        for i in range(2, n, 9):
            lines[i] = ",".join(lines[i].split(",")[:2])
        for i in range(5, n, 11):
            lines[i] = lines[i] + ",1,2,3"
        return ("\n".join(lines) + "\n").encode()
    if variant == "single_row":
        return "\n".join(text.splitlines()[:2]).encode() + b"\n"
    if variant == "semicolons":
        return text.replace(",", ";").encode()
    if variant == "quoted_fields":
        lines = text.splitlines()
        return ("\n".join([lines[0]] + ['"' + ln.replace(",", '","') + '"' for ln in lines[1:]]) + "\n").encode()
    if variant == "unterminated_quote":
        lines = text.splitlines()
        lines[4] = '"' + lines[4]
        return ("\n".join(lines) + "\n").encode()
    if variant == "gzip_named_csv":
        import gzip

        return gzip.compress(text.encode(), mtime=0)
    if variant == "hex_and_underscores":
        lines = text.splitlines()
        lines[6] = "0x1F,1_000,2e,--3"
        return ("\n".join(lines) + "\n").encode()
    raise KeyError(f"unknown text ion variant {variant!r}")


def _ion_h5_variant(path: Path, variant: str, cols: dict, seed: int, in_dir: Path):
    """Write a malformed HDF5 ion file at ``path``."""
    import h5py

    n = len(cols["x"])
    rng = np.random.default_rng(seed)
    if variant == "valid":
        _write_h5(path, cols)
        return
    if variant == "truncated":
        _write_h5(path, cols)
        data = path.read_bytes()
        path.write_bytes(data[: len(data) // 2])
        return
    if variant == "truncated_tail":
        _write_h5(path, cols)
        data = path.read_bytes()
        path.write_bytes(data[: len(data) - 64])
        return
    if variant == "random_bytes":
        path.write_bytes(rng.integers(0, 256, 8192, dtype=np.uint8).tobytes())
        return
    if variant == "hdf5_signature_then_garbage":
        path.write_bytes(b"\x89HDF\r\n\x1a\n" + rng.integers(0, 256, 4096, dtype=np.uint8).tobytes())
        return
    if variant == "empty":
        path.write_bytes(b"")
        return
    if variant == "no_ions_group":
        _write_h5(path, cols, group="data")
        return
    if variant == "ions_is_dataset":
        with h5py.File(path, "w") as f:
            f["ions"] = np.stack([cols[k] for k in COLS], axis=1)
        return
    if variant == "float16":
        _write_h5(path, cols, dtype=np.float16)
        return
    if variant == "int":
        _write_h5(path, cols, dtype=np.int64)
        return
    if variant == "uint8":
        _write_h5(path, cols, dtype=np.uint8)
        return
    if variant == "bool":
        _write_h5(path, cols, dtype=bool)
        return
    if variant == "complex":
        _write_h5(path, cols, dtype=np.complex128)
        return
    if variant == "string":
        _write_h5(path, {k: np.array([f"{v:.4f}".encode() for v in cols[k]]) for k in COLS})
        return
    if variant == "vlen_string":
        with h5py.File(path, "w") as f:
            g = f.create_group("ions")
            for k in COLS:
                g.create_dataset(k, data=[f"{v:.4f}" for v in cols[k]], dtype=h5py.string_dtype())
        return
    if variant == "compound":
        rec = np.zeros(n, dtype=[("v", "f8"), ("w", "i4")])
        rec["v"] = cols["x"]
        c = dict(cols)
        c["x"] = rec
        _write_h5(path, c)
        return
    if variant == "two_d":
        _write_h5(path, {k: np.stack([cols[k], cols[k]], axis=1) for k in COLS})
        return
    if variant == "scalar":
        _write_h5(path, {k: np.float64(cols[k][0]) for k in COLS})
        return
    if variant == "unequal_lengths":
        c = dict(cols)
        c["y"] = c["y"][: n // 2]
        _write_h5(path, c)
        return
    if variant == "zero_length":
        _write_h5(path, {k: np.zeros(0) for k in COLS})
        return
    if variant == "missing_mass":
        _write_h5(path, {k: cols[k] for k in ("x", "y", "z")})
        return
    if variant in ("nan_coords", "inf_coords", "huge_coords", "nonpositive_mass", "all_nan", "all_nonpositive_mass"):
        c = {k: v.copy() for k, v in cols.items()}
        pick = rng.choice(n, size=max(1, n // 10), replace=False)
        if variant == "nan_coords":
            c["x"][pick] = np.nan
        elif variant == "inf_coords":
            c["z"][pick] = np.inf
        elif variant == "huge_coords":
            c["y"][pick] = 1e30
        elif variant == "nonpositive_mass":
            c["mass_to_charge"][pick] = -c["mass_to_charge"][pick]
            c["mass_to_charge"][pick[:3]] = 0.0
        elif variant == "all_nan":
            for k in COLS:
                c[k][:] = np.nan
        else:
            c["mass_to_charge"][:] = -1.0
        _write_h5(path, c)
        return
    if variant == "dangling_soft_link":
        _write_h5(path, {k: cols[k] for k in ("y", "z", "mass_to_charge")})
        with h5py.File(path, "a") as f:
            f["ions/x"] = h5py.SoftLink("/nowhere/x")
        return
    if variant == "looping_soft_link":
        _write_h5(path, {k: cols[k] for k in ("y", "z", "mass_to_charge")})
        with h5py.File(path, "a") as f:
            f["ions/x"] = h5py.SoftLink("/ions/loop")
            f["ions/loop"] = h5py.SoftLink("/ions/x")
        return
    if variant == "group_soft_link_loop":
        with h5py.File(path, "w") as f:
            f["ions"] = h5py.SoftLink("/ions")
        return
    if variant == "external_link_missing":
        _write_h5(path, {k: cols[k] for k in ("y", "z", "mass_to_charge")})
        with h5py.File(path, "a") as f:
            f["ions/x"] = h5py.ExternalLink("no_such_file.h5", "/x")
        return
    if variant == "external_link_self":
        _write_h5(path, {k: cols[k] for k in ("y", "z", "mass_to_charge")})
        with h5py.File(path, "a") as f:
            f["ions/x"] = h5py.ExternalLink(path.name, "/ions/x")
        return
    if variant == "external_link_sibling":
        with h5py.File(in_dir / "linked_x.h5", "w") as f:
            f["x"] = cols["x"]
        _write_h5(path, {k: cols[k] for k in ("y", "z", "mass_to_charge")})
        with h5py.File(path, "a") as f:
            f["ions/x"] = h5py.ExternalLink(str(in_dir / "linked_x.h5"), "/x")
        return
    if variant in ("external_raw_missing", "external_raw_present", "external_raw_short"):
        raw = in_dir / "raw_x.bin"
        if variant != "external_raw_missing":
            data = cols["x"].astype("<f8").tobytes()
            raw.write_bytes(data if variant == "external_raw_present" else data[: len(data) // 3])
        target = str(raw) if variant != "external_raw_missing" else str(in_dir / "missing_raw.bin")
        with h5py.File(path, "w") as f:
            g = f.create_group("ions")
            g.create_dataset("x", shape=(n,), dtype="<f8", external=[(target, 0, n * 8)])
            for k in ("y", "z", "mass_to_charge"):
                g.create_dataset(k, data=cols[k])
            g.attrs["length_unit"] = "nm"
        return
    if variant == "unit_nonutf8_fixed":
        _write_h5(path, cols, attrs={"length_unit": np.bytes_(b"\xff\xfenm")})
        return
    if variant == "unit_nonutf8_vlen":
        _write_h5(path, cols, attrs={})
        with h5py.File(path, "a") as f:
            f["ions"].attrs.create("length_unit", np.array(b"\xff\xfe\xfd", dtype=object),
                                   dtype=h5py.string_dtype("utf-8"))
        return
    if variant == "unit_unknown":
        _write_h5(path, cols, attrs={"length_unit": "furlong"})
        return
    if variant == "unit_array":
        _write_h5(path, cols, attrs={"length_unit": np.array([1, 2, 3])})
        return
    if variant == "unit_empty":
        _write_h5(path, cols, attrs={"length_unit": ""})
        return
    if variant == "gzip_chunked":
        import h5py as _h

        with _h.File(path, "w") as f:
            g = f.create_group("ions")
            for k in COLS:
                g.create_dataset(k, data=cols[k], chunks=(64,), compression="gzip", shuffle=True)
            g.attrs["length_unit"] = "nm"
        return
    if variant == "unallocated_fill":
        with h5py.File(path, "w") as f:
            g = f.create_group("ions")
            for k in COLS:
                g.create_dataset(k, shape=(n,), dtype="f8", fillvalue=0.0)
        return
    if variant == "huge_sparse":
        with h5py.File(path, "w") as f:
            g = f.create_group("ions")
            for k in COLS:
                g.create_dataset(k, shape=(1 << 34,), dtype="f4", chunks=(1 << 16,), fillvalue=1.0)
            g.attrs["length_unit"] = "nm"
        return
    raise KeyError(f"unknown HDF5 ion variant {variant!r}")


TEXT_ION_VARIANTS = {
    # variant: expectation when read (valid data, invalid data, or either)
    "valid": "valid", "valid_tsv": "valid", "crlf": "valid", "utf8_bom": "either", "utf16": "either",
    "random_bytes": "error", "empty": "error", "header_only": "error", "comments_only": "error",
    "blank_lines": "error", "truncated": "either", "wrong_headers": "error", "missing_mass_column": "error",
    "duplicate_columns": "either", "header_10mb": "either", "huge_field": "error",
    "huge_line_count_header_only": "error", "nan_coords": "error", "inf_coords": "error",
    "huge_coords": "either", "neg_huge_coords": "either", "overflow_coords": "error", "all_nan": "error",
    "nonpositive_mass": "error", "all_nonpositive_mass": "error", "text_in_numbers": "error",
    "nul_bytes": "error", "latin1_header": "error", "non_utf8_body": "either", "ragged_rows": "error",
    "single_row": "either", "semicolons": "error", "quoted_fields": "either", "unterminated_quote": "error",
    "gzip_named_csv": "error", "hex_and_underscores": "error",
}

H5_ION_VARIANTS = {
    "valid": "valid", "truncated": "error", "truncated_tail": "error", "random_bytes": "error",
    "hdf5_signature_then_garbage": "error", "empty": "error", "no_ions_group": "error",
    "ions_is_dataset": "error", "float16": "either", "int": "either", "uint8": "either", "bool": "error",
    "complex": "error", "string": "error", "vlen_string": "error", "compound": "error", "two_d": "error",
    "scalar": "error", "unequal_lengths": "error", "zero_length": "error", "missing_mass": "error",
    "nan_coords": "error", "inf_coords": "error", "huge_coords": "either", "nonpositive_mass": "error",
    "all_nan": "error", "all_nonpositive_mass": "error", "dangling_soft_link": "error",
    "looping_soft_link": "error", "group_soft_link_loop": "error", "external_link_missing": "error",
    "external_link_self": "error", "external_link_sibling": "either", "external_raw_missing": "error",
    "external_raw_present": "either", "external_raw_short": "error", "unit_nonutf8_fixed": "error",
    "unit_nonutf8_vlen": "error", "unit_unknown": "error", "unit_array": "error", "unit_empty": "error",
    "gzip_chunked": "valid", "unallocated_fill": "error", "huge_sparse": "error",
}

# Files in places of an ion file that are not ion files at all.
PATH_ION_VARIANTS = {
    "csv_named_h5": "error", "h5_named_csv": "error", "unknown_extension": "error", "no_extension": "error",
    "directory": "error", "missing": "error", "fifo": "error", "symlink_loop": "error",
    "dangling_symlink": "error", "symlink_to_valid": "either", "uppercase_extension": "either",
    "dotfile_csv": "either",
}


def ion_file(in_dir: Path, work_dir: Path, base: Path, variant: str, fmt: str, name: str, seed: int = 0):
    """Write a (malformed) ion file ``in/<name>`` of ``fmt`` text, hdf5 or path."""
    cols = _small(base)
    path = in_dir / name
    path.parent.mkdir(parents=True, exist_ok=True)
    if fmt == "text":
        path.write_bytes(_ion_text_variant(variant, cols, seed))
        return
    if fmt == "hdf5":
        _ion_h5_variant(path, variant, cols, seed, in_dir)
        return
    if variant == "csv_named_h5" or variant == "unknown_extension" or variant == "no_extension":
        path.write_bytes(_ion_text_variant("valid", cols, seed))
    elif variant == "h5_named_csv":
        _write_h5(path, cols)
    elif variant == "directory":
        path.mkdir()
        (path / "x.csv").write_bytes(_ion_text_variant("valid", cols, seed))
    elif variant == "missing":
        pass
    elif variant == "fifo":
        os.mkfifo(path)
    elif variant == "symlink_loop":
        os.symlink(path.name, path)
    elif variant == "dangling_symlink":
        os.symlink("nothing_here.csv", path)
    elif variant == "symlink_to_valid":
        (in_dir / "real_ions.csv").write_bytes(_ion_text_variant("valid", cols, seed))
        os.symlink("real_ions.csv", path)
    elif variant in ("uppercase_extension", "dotfile_csv"):
        path.write_bytes(_ion_text_variant("valid", cols, seed))
    else:
        raise KeyError(f"unknown path ion variant {variant!r}")


def mutate_ions(in_dir: Path, work_dir: Path, base: Path, fmt: str, name: str, seed: int):
    """A valid ion file hit by a few random byte-level mutations drawn from ``seed``."""
    cols = _small(base)
    r = random.Random(seed)
    path = in_dir / name
    if fmt == "text":
        data = bytearray(_ion_text_variant("valid", cols, seed))
        tokens = [b"nan", b"inf", b"-inf", b"1e400", b"-1e308", b"", b"\x00", b'"', b",,,,", b"\n\n", b"\r",
                  b"abc", b"0", b"-0", b"1e-320", b"\xff\xfe", b"#", b"x,y,z,mass_to_charge\n", b"\t", b" "]
    else:
        _write_h5(path, cols)
        data = bytearray(path.read_bytes())
        tokens = [b"\x00" * 8, b"\xff" * 8, b"\x7f\xf8\x00\x00\x00\x00\x00\x00", b"HEAP", b"TREE", b"SNOD"]
    for _ in range(r.randint(1, 6)):
        op = r.choice(("flip", "delete", "duplicate", "insert", "truncate", "overwrite"))
        if not data:
            break
        i = r.randrange(len(data))
        if op == "flip":
            data[i] ^= 1 << r.randrange(8)
        elif op == "delete":
            del data[i:i + r.randint(1, 64)]
        elif op == "duplicate":
            j = min(len(data), i + r.randint(1, 256))
            data[i:i] = data[i:j]
        elif op == "insert":
            data[i:i] = r.choice(tokens)
        elif op == "truncate" and r.random() < 0.3:
            del data[r.randrange(max(1, len(data) // 4), len(data)):]
        elif op == "overwrite":
            t = r.choice(tokens)
            data[i:i + len(t)] = t
    path.write_bytes(bytes(data))


# ---------------------------------------------------------------------- range files
def _range_entry(formula, charge, low, high, shares=None):
    s = f'\n[[range]]\nformula = {formula}\ncharge = {charge}\nlow = {low}\nhigh = {high}\n'
    if shares is not None:
        s += f"shares = {shares}\n"
    return s


RANGE_VARIANTS = {
    "valid": "valid", "binary": "error", "empty": "error", "deep_nesting_arrays": "error",
    "deep_nesting_tables": "error", "deep_inline_tables": "error", "int_5000_digits_charge": "error",
    "int_5000_digits_low": "error", "formula_C999999999999": "error", "formula_Co999999999999": "error",
    "overlapping": "error", "duplicate_window": "error", "negative_bounds": "error", "nan_bounds": "error",
    "inf_bounds": "error", "low_above_high": "error", "zero_width": "error", "unknown_element": "error",
    "lowercase_formula": "error", "empty_formula": "error", "formula_with_charge_signs": "either",
    "charge_zero": "error", "charge_negative": "error", "charge_float": "error", "charge_string": "error",
    "charge_bool": "error", "charge_huge": "error", "low_string": "error", "shares_not_table": "error",
    "shares_unknown_species": "error", "shares_negative": "error", "shares_sum_above_one": "error",
    "shares_nan": "error", "format_2": "error", "metals_string": "error", "metals_unknown": "error",
    "range_is_table": "error", "unknown_top_level": "error", "no_ranges": "error", "many_ranges": "either",
    "non_utf8_comment": "error", "utf16": "error", "directory": "error", "missing": "error",
    "no_metal_windows": "either", "bounds_above_10000": "either", "formula_parentheses": "either",
}


def _range_text(variant: str, seed: int):
    """Bytes of a (malformed) range file."""
    ok = RANGE_OK
    if variant == "valid":
        return ok.encode()
    if variant == "binary":
        return np.random.default_rng(seed).integers(0, 256, 2048, dtype=np.uint8).tobytes()
    if variant == "empty":
        return b""
    if variant == "deep_nesting_arrays":
        return (ok + "\ndeep = " + "[" * 10000 + "]" * 10000 + "\n").encode()
    if variant == "deep_nesting_tables":
        return (ok + "\n[" + ".".join(["t"] * 10000) + "]\nv = 1\n").encode()
    if variant == "deep_inline_tables":
        return (ok + "\ndeep = " + "{a = " * 10000 + "1" + "}" * 10000 + "\n").encode()
    if variant == "int_5000_digits_charge":
        return ok.replace("charge = 1", "charge = " + "9" * 5000, 1).encode()
    if variant == "int_5000_digits_low":
        return ok.replace("low = 58.80", "low = " + "5" * 5000, 1).encode()
    if variant == "formula_C999999999999":
        return (ok + _range_entry('"C999999999999"', 1, 12.0, 12.1)).encode()
    if variant == "formula_Co999999999999":
        return ok.replace('formula = "Co"', 'formula = "Co999999999999"', 1).encode()
    if variant == "overlapping":
        return (ok + _range_entry('"Co"', 1, 59.0, 60.0)).encode()
    if variant == "duplicate_window":
        return (ok + _range_entry('"Zn"', 1, 63.80, 64.30)).encode()
    if variant == "negative_bounds":
        return (ok + _range_entry('"H"', 1, -5.0, -1.0)).encode()
    if variant == "nan_bounds":
        return (ok + _range_entry('"H"', 1, "nan", "nan")).encode()
    if variant == "inf_bounds":
        return (ok + _range_entry('"H"', 1, "-inf", "inf")).encode()
    if variant == "low_above_high":
        return (ok + _range_entry('"H"', 1, 2.0, 1.0)).encode()
    if variant == "zero_width":
        return (ok + _range_entry('"H"', 1, 1.0, 1.0)).encode()
    if variant == "unknown_element":
        return (ok + _range_entry('"Xx"', 1, 30.0, 31.0)).encode()
    if variant == "lowercase_formula":
        return ok.replace('formula = "Co"', 'formula = "co"', 1).encode()
    if variant == "empty_formula":
        return (ok + _range_entry('""', 1, 30.0, 31.0)).encode()
    if variant == "formula_with_charge_signs":
        return (ok + _range_entry('"Zn++"', 2, 31.9, 32.2)).encode()
    if variant in ("charge_zero", "charge_negative", "charge_float", "charge_string", "charge_bool", "charge_huge"):
        val = {"charge_zero": "0", "charge_negative": "-1", "charge_float": "1.5", "charge_string": '"1"',
               "charge_bool": "true", "charge_huge": "1000000000000"}[variant]
        return ok.replace("charge = 1", f"charge = {val}", 1).encode()
    if variant == "low_string":
        return ok.replace("low = 58.80", 'low = "58.80"', 1).encode()
    if variant == "shares_not_table":
        return ok.replace("high = 59.30", 'high = 59.30\nshares = [1, 2]', 1).encode()
    if variant == "shares_unknown_species":
        return ok.replace("high = 59.30", 'high = 59.30\nshares = { "Qq+" = 0.5 }', 1).encode()
    if variant == "shares_negative":
        return ok.replace("high = 59.30", 'high = 59.30\nshares = { "Co+" = -0.5 }', 1).encode()
    if variant == "shares_sum_above_one":
        return ok.replace("high = 59.30", 'high = 59.30\nshares = { "Co+" = 0.9, "Ni+" = 0.9 }', 1).encode()
    if variant == "shares_nan":
        return ok.replace("high = 59.30", 'high = 59.30\nshares = { "Co+" = nan }', 1).encode()
    if variant == "format_2":
        return ok.replace("format = 1", "format = 2", 1).encode()
    if variant == "metals_string":
        return ok.replace('metals = ["Co", "Zn"]', 'metals = "Co"', 1).encode()
    if variant == "metals_unknown":
        return ok.replace('metals = ["Co", "Zn"]', 'metals = ["Xx", "Zn"]', 1).encode()
    if variant == "range_is_table":
        return b'format = 1\n[range]\nformula = "Co"\ncharge = 1\nlow = 58.8\nhigh = 59.3\n'
    if variant == "unknown_top_level":
        return ("colour = 'red'\n" + ok).encode()
    if variant == "no_ranges":
        return b'format = 1\nmetals = ["Co", "Zn"]\n'
    if variant == "many_ranges":
        parts = ['format = 1\nmetals = ["Co", "Zn"]\n']
        for i in range(20000):
            lo = 100.0 + i * 0.01
            parts.append(_range_entry('"C"', 1, f"{lo:.2f}", f"{lo + 0.005:.3f}"))
        return "".join(parts).encode()
    if variant == "non_utf8_comment":
        return b"# r\xe9glages \xff\xfe\n" + ok.encode()
    if variant == "utf16":
        return ok.encode("utf-16")
    if variant == "no_metal_windows":
        return b'format = 1\nmetals = ["Co", "Zn"]\n' + _range_entry('"H"', 1, 1.0, 1.02).encode()
    if variant == "bounds_above_10000":
        return (ok + _range_entry('"C"', 1, 20000.0, 20001.0)).encode()
    if variant == "formula_parentheses":
        return (ok + _range_entry('"Co(OH)2"', 1, 92.9, 93.1)).encode()
    raise KeyError(f"unknown range variant {variant!r}")


def range_file(in_dir: Path, work_dir: Path, base: Path, variant: str, name: str = "ranges.toml", seed: int = 0):
    """Write a (malformed) range file ``in/<name>``."""
    path = in_dir / name
    if variant == "directory":
        path.mkdir(parents=True)
        return
    if variant == "missing":
        return
    path.write_bytes(_range_text(variant, seed))


def mutate_range(in_dir: Path, work_dir: Path, base: Path, seed: int, name: str = "ranges.toml"):
    """The range file ``probeseq range`` wrote, with a few random line- and value-level changes."""
    r = random.Random(seed)
    lines = (base / "ranges.toml").read_text(encoding="utf-8").splitlines()
    values = ["nan", "inf", "-inf", "-1", "0", "1e308", "-0.0", '"x"', "[]", "{}", "true", "1.5", "99999999999",
              '"Co"', '"Xx"', '"C999999999999"', '""', '"co"', "2", "59.0"]
    for _ in range(r.randint(1, 4)):
        op = r.choice(("value", "value", "drop", "dup", "swap_bounds"))
        i = r.randrange(len(lines))
        if op == "value" and "=" in lines[i] and not lines[i].lstrip().startswith("#"):
            key = lines[i].split("=", 1)[0]
            lines[i] = f"{key}= {r.choice(values)}"
        elif op == "drop":
            del lines[i]
        elif op == "dup":
            lines.insert(i, lines[i])
        elif op == "swap_bounds":
            lows = [k for k, ln in enumerate(lines) if ln.startswith("low =")]
            if lows:
                k = r.choice(lows)
                if k + 1 < len(lines) and lines[k + 1].startswith("high ="):
                    lo, hi = lines[k].split("=")[1], lines[k + 1].split("=")[1]
                    lines[k], lines[k + 1] = f"low ={hi}", f"high ={lo}"
    (in_dir / name).write_text("\n".join(lines) + "\n", encoding="utf-8")


# ---------------------------------------------------------------------- lattice files
LATTICE_OK = {"cell": {"a": 2.6, "b": 2.6, "gamma": 120.0,
                       "rods": [[0.333333, 0.0], [0.0, 0.333333], [0.333333, 0.333333], [0.666667, 0.0],
                                [0.0, 0.666667], [0.666667, 0.666667]]},
              "rod": {"repeat": 0.68, "sites_per_repeat": 3}}

BIG_INT = "7" * 5000


def _toml_value(v) -> str:
    if isinstance(v, _Raw):
        return v.text
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, float):
        if v != v:
            return "nan"
        if v in (float("inf"), float("-inf")):
            return "inf" if v > 0 else "-inf"
        return repr(v)
    if isinstance(v, int):
        return str(v)
    if isinstance(v, str):
        return json.dumps(v)
    if isinstance(v, list):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{" + ", ".join(f"{k} = {_toml_value(x)}" for k, x in v.items()) + "}"
    raise TypeError(type(v))


class _Raw:
    """A TOML value written as given (for values Python cannot hold, e.g. 5000-digit integers)."""

    def __init__(self, text):
        self.text = text


def lattice_text(d: dict) -> str:
    """TOML text of a lattice mapping (tables [cell] and [rod], values as given)."""
    out = []
    for table, items in d.items():
        if not isinstance(items, dict):
            out.insert(0, f"{table} = {_toml_value(items)}")
            continue
        out.append(f"[{table}]")
        out += [f"{k} = {_toml_value(v)}" for k, v in items.items()]
        out.append("")
    return "\n".join(out) + "\n"


LATTICE_VARIANTS = {
    # name: (table, key, value) override; None value deletes the key; expectation
    "valid": (None, None, None, "valid"),
    "a_0.01": ("cell", "a", 0.01, "error"), "a_1e300": ("cell", "a", 1e300, "error"),
    "a_nan": ("cell", "a", float("nan"), "error"), "a_inf": ("cell", "a", float("inf"), "error"),
    "a_negative": ("cell", "a", -2.6, "error"), "a_zero": ("cell", "a", 0.0, "error"),
    "a_string": ("cell", "a", "2.6", "error"), "a_bool": ("cell", "a", True, "error"),
    "a_5000_digits": ("cell", "a", _Raw(BIG_INT), "error"), "b_missing": ("cell", "b", None, "error"),
    "b_nan": ("cell", "b", float("nan"), "error"),
    "gamma_0": ("cell", "gamma", 0.0, "error"), "gamma_180": ("cell", "gamma", 180.0, "error"),
    "gamma_360": ("cell", "gamma", 360.0, "error"), "gamma_nan": ("cell", "gamma", float("nan"), "error"),
    "gamma_negative": ("cell", "gamma", -60.0, "error"), "gamma_1e-9": ("cell", "gamma", 1e-9, "error"),
    "rods_outside": ("cell", "rods", [[1.5, -0.2], [0.0, 0.5]], "error"),
    "rods_nan": ("cell", "rods", [[float("nan"), 0.0]], "error"),
    "rods_empty": ("cell", "rods", [], "error"), "rods_duplicate": ("cell", "rods", [[0.1, 0.1], [0.1, 0.1]], "error"),
    "rods_triples": ("cell", "rods", [[0.1, 0.1, 0.1]], "error"), "rods_flat": ("cell", "rods", [0.1, 0.2], "error"),
    "rods_strings": ("cell", "rods", [["a", "b"]], "error"),
    "rods_10000": ("cell", "rods", [[(i % 100) / 100.0, (i // 100) / 100.0] for i in range(10000)], "either"),
    "rods_missing": ("cell", "rods", None, "error"),
    "repeat_0": ("rod", "repeat", 0.0, "error"), "repeat_negative": ("rod", "repeat", -0.68, "error"),
    "repeat_1e-12": ("rod", "repeat", 1e-12, "error"), "repeat_1e300": ("rod", "repeat", 1e300, "error"),
    "repeat_nan": ("rod", "repeat", float("nan"), "error"),
    "sites_0": ("rod", "sites_per_repeat", 0, "error"), "sites_negative": ("rod", "sites_per_repeat", -3, "error"),
    "sites_1e9": ("rod", "sites_per_repeat", 1000000000, "error"),
    "sites_float": ("rod", "sites_per_repeat", 2.5, "error"), "sites_string": ("rod", "sites_per_repeat", "3", "error"),
    "sites_missing": ("rod", "sites_per_repeat", None, "error"),
    "no_rod_table": ("rod", None, None, "error"), "no_cell_table": ("cell", None, None, "error"),
}

LATTICE_FILE_VARIANTS = {"binary": "error", "empty": "error", "deep_nesting": "error", "non_utf8": "error",
                         "directory": "error", "missing": "error", "cell_is_array": "error",
                         "txt_extension": "either"}


def lattice_file(in_dir: Path, work_dir: Path, base: Path, variant: str, name: str = "lattice.toml", seed: int = 0):
    """Write a (malformed) lattice file ``in/<name>``."""
    path = in_dir / name
    path.parent.mkdir(parents=True, exist_ok=True)
    if variant in LATTICE_VARIANTS:
        table, key, value, _ = LATTICE_VARIANTS[variant]
        d = json.loads(json.dumps(LATTICE_OK))
        if table is not None:
            if key is None:
                del d[table]
            elif value is None:
                del d[table][key]
            else:
                d[table][key] = value
        path.write_text(lattice_text(d), encoding="utf-8")
        return
    if variant == "binary":
        path.write_bytes(np.random.default_rng(seed).integers(0, 256, 1024, dtype=np.uint8).tobytes())
    elif variant == "empty":
        path.write_bytes(b"")
    elif variant == "deep_nesting":
        path.write_text(lattice_text(LATTICE_OK) + "x = " + "[" * 10000 + "]" * 10000 + "\n")
    elif variant == "non_utf8":
        path.write_bytes(b"# \xff\xfe\n" + lattice_text(LATTICE_OK).encode())
    elif variant == "directory":
        path.mkdir()
    elif variant == "missing":
        pass
    elif variant == "cell_is_array":
        path.write_text('cell = [1, 2, 3]\n[rod]\nrepeat = 0.68\nsites_per_repeat = 3\n')
    elif variant == "txt_extension":
        path.write_text(lattice_text(LATTICE_OK), encoding="utf-8")
    else:
        raise KeyError(f"unknown lattice variant {variant!r}")


_HOSTILE_NUMBERS = [0.0, -1.0, 1e-300, float("nan"), float("inf"), -float("inf"), 1e300, _Raw(BIG_INT), "2.6",
                    True, [], {}]
_ODD_NUMBERS = [1e-3, 0.05, 1e4, 1e6, 179.999, 0.001]


def random_lattice_spec(seed: int):
    """(lattice mapping, expectation) with a few fields replaced by hostile or odd values from ``seed``."""
    r = random.Random(seed)
    d = json.loads(json.dumps(LATTICE_OK))
    fields = [("cell", "a"), ("cell", "b"), ("cell", "gamma"), ("rod", "repeat"), ("rod", "sites_per_repeat"),
              ("cell", "rods")]
    expect = "either"
    for table, key in r.sample(fields, r.randint(1, 3)):
        if key == "rods":
            u, v = r.choice([(-0.5, 0.2), (1.0, 1.0), (2.0, 0.0), (0.5, float("nan")), (0.25, 0.75)])
            d[table][key] = [[u, v]]
            if not (0 <= u <= 1 and 0 <= v <= 1):
                expect = "error"
            continue
        if r.random() < 0.6:
            d[table][key] = r.choice(_HOSTILE_NUMBERS)
            expect = "error"
        else:
            val = r.choice(_ODD_NUMBERS)
            d[table][key] = int(val) if key == "sites_per_repeat" and val >= 1 else val
            if key == "sites_per_repeat" and isinstance(d[table][key], float):
                expect = "error"
    return d, expect


def random_lattice(in_dir: Path, work_dir: Path, base: Path, seed: int, name: str = "lattice.toml"):
    """Write the lattice of :func:`random_lattice_spec` for ``seed``."""
    d, _ = random_lattice_spec(seed)
    (in_dir / name).write_text(lattice_text(d), encoding="utf-8")


# ---------------------------------------------------------------------- run folders
RUN_VARIANTS = {
    # name: (changes to [sample], changes to [run], expectation); None deletes a key
    "valid": ({}, {}, "valid"),
    "name_traversal": ({"name": "/../../../victim"}, {}, "either"),
    "name_dotdot": ({"name": "../../victim"}, {}, "either"),
    "name_nul": ({"name": _Raw('"a\\u0000b"')}, {}, "either"),
    "name_5000_chars": ({"name": "n" * 5000}, {}, "either"),
    "name_empty": ({"name": ""}, {}, "either"),
    "name_slashes": ({"name": "a/b/c"}, {}, "either"),
    "ions_dotdot": ({}, {"ions": "../outside/ions.h5"}, "error"),
    "ions_absolute": ({}, {"ions": "{in}/outside/ions.h5"}, "error"),
    "lattice_dotdot": ({}, {"lattice": "../outside/lattice.toml"}, "error"),
    "lattice_absolute": ({}, {"lattice": "{in}/outside/lattice.toml"}, "error"),
    "ranges_dotdot": ({}, {"ranges": "../outside/ranges.toml"}, "error"),
    "ranges_absolute": ({}, {"ranges": "{in}/outside/ranges.toml"}, "error"),
    "ions_int": ({}, {"ions": 5}, "error"), "ions_list": ({}, {"ions": ["ions.h5"]}, "error"),
    "ions_empty": ({}, {"ions": ""}, "error"), "ions_dot": ({}, {"ions": "."}, "error"),
    "ions_is_run_toml": ({}, {"ions": "run.toml"}, "error"),
    "ions_missing_file": ({}, {"ions": "nope.h5"}, "error"),
    "metals_int": ({}, {"metals": 5}, "error"), "metals_empty": ({}, {"metals": []}, "error"),
    "metals_one": ({}, {"metals": ["Co"]}, "error"), "metals_lowercase": ({}, {"metals": ["co", "zn"]}, "error"),
    "metals_unknown": ({}, {"metals": ["Xx", "Yy"]}, "error"), "metals_duplicate": ({}, {"metals": ["Co", "Co"]}, "error"),
    "metals_missing": ({}, {"metals": None}, "error"),
    "lattice_float": ({}, {"lattice": 3.0}, "error"), "lattice_list": ({}, {"lattice": ["a"]}, "error"),
    "lattice_missing_file": ({}, {"lattice": "nope.toml"}, "error"),
    "lattice_preset_no_a": ({}, {"lattice": "honeycomb"}, "error"),
    "lattice_preset_a_string": ({}, {"lattice": "honeycomb", "a": "2.6", "repeat": 0.68}, "error"),
    "lattice_preset_a_negative": ({}, {"lattice": "honeycomb", "a": -2.6, "repeat": 0.68}, "error"),
    "lattice_preset_sites_string": ({}, {"lattice": "honeycomb", "a": 2.6, "repeat": 0.68,
                                         "sites_per_repeat": "3"}, "error"),
    "ranges_bool": ({}, {"ranges": True}, "error"), "ranges_missing_file": ({}, {"ranges": "nope.toml"}, "error"),
    "eta_string": ({}, {"detection_efficiency": "0.5"}, "error"), "eta_2": ({}, {"detection_efficiency": 2}, "error"),
    "eta_nan": ({}, {"detection_efficiency": float("nan")}, "error"),
    "temperature_text": ({"synthesis_temperature_c": "hot"}, {}, "either"),
    "sample_huge_int": ({"synthesis_temperature_c": _Raw(BIG_INT)}, {}, "error"),
}
RUN_FILE_VARIANTS = {"no_run_toml": "error", "run_toml_binary": "error", "run_toml_non_utf8": "error",
                     "run_toml_deep": "error", "run_toml_empty": "error", "no_run_table": "error",
                     "sample_is_string": "error", "run_is_array": "error", "run_toml_directory": "error"}


def run_folder(in_dir: Path, work_dir: Path, base: Path, variant: str, name: str = "run", outside: bool = False):
    """Copy the base run folder to ``in/<name>`` and break its ``run.toml`` as ``variant`` says."""
    import tomllib

    dest = in_dir / name
    shutil.copytree(base / "run", dest)
    if outside:
        out = in_dir / "outside"
        out.mkdir(exist_ok=True)
        shutil.copy2(base / "run" / "ions.h5", out / "ions.h5")
        shutil.copy2(base / "run" / "lattice.toml", out / "lattice.toml")
        shutil.copy2(base / "ranges.toml", out / "ranges.toml")
    toml = dest / "run.toml"
    if variant in RUN_VARIANTS:
        s_changes, r_changes, _ = RUN_VARIANTS[variant]
        d = tomllib.loads(toml.read_text(encoding="utf-8"))
        for table, changes in (("sample", s_changes), ("run", r_changes)):
            for k, v in changes.items():
                if v is None:
                    d[table].pop(k, None)
                elif isinstance(v, str):
                    d[table][k] = v.replace("{in}", str(in_dir))
                else:
                    d[table][k] = v
        toml.write_text(lattice_text(d), encoding="utf-8")
        return
    if variant == "no_run_toml":
        toml.unlink()
    elif variant == "run_toml_binary":
        toml.write_bytes(np.random.default_rng(3).integers(0, 256, 512, dtype=np.uint8).tobytes())
    elif variant == "run_toml_non_utf8":
        toml.write_bytes(b"# \xff\xfe\n" + toml.read_bytes())
    elif variant == "run_toml_deep":
        toml.write_text(toml.read_text() + "\ndeep = " + "[" * 10000 + "]" * 10000 + "\n")
    elif variant == "run_toml_empty":
        toml.write_bytes(b"")
    elif variant == "no_run_table":
        toml.write_text('[sample]\nname = "x"\n')
    elif variant == "sample_is_string":
        toml.write_text('sample = "x"\n' + toml.read_text().replace("[sample]", "[other]"))
    elif variant == "run_is_array":
        toml.write_text('run = [1, 2]\n[sample]\nname = "x"\n')
    elif variant == "run_toml_directory":
        toml.unlink()
        toml.mkdir()
    else:
        raise KeyError(f"unknown run-folder variant {variant!r}")


# ---------------------------------------------------------------------- output folders
def copy_base(in_dir: Path, work_dir: Path, base: Path, what: str, dest: str, where: str = "in"):
    """Copy a base item (``run``, ``columns``, ``analysis``, ``ranges.toml``, ``lattice``) into the case."""
    root = in_dir if where == "in" else work_dir
    target = root / dest
    target.parent.mkdir(parents=True, exist_ok=True)
    src = {"run": base / "run", "columns": base / "columns", "analysis": base / "analysis",
           "ranges.toml": base / "ranges.toml", "lattice": base / "run" / "lattice.toml",
           "ions": base / "run" / "ions.h5"}[what]
    if src.is_dir():
        shutil.copytree(src, target)
    else:
        shutil.copy2(src, target)


def small_ions(in_dir: Path, work_dir: Path, base: Path, name: str):
    """A valid 400-ion file (CSV or HDF5 by extension) in the input folder."""
    ion_file(in_dir, work_dir, base, "valid", "hdf5" if name.endswith((".h5", ".hdf5")) else "text", name)


def write_file(in_dir: Path, work_dir: Path, base: Path, name: str, text: str = "", where: str = "in",
               png: bool = False):
    """A plain file (or a tiny valid PNG with ``png=True``) standing for a user's existing file."""
    root = in_dir if where == "in" else work_dir
    p = root / name
    p.parent.mkdir(parents=True, exist_ok=True)
    if png:
        import zlib

        def chunk(kind, data):
            c = kind + data
            return len(data).to_bytes(4, "big") + c + zlib.crc32(c).to_bytes(4, "big")

        raw = b"\x00\x00\x00\x00"
        p.write_bytes(b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", (1).to_bytes(4, "big") * 2 + b"\x08\x02\x00\x00\x00")
                      + chunk(b"IDAT", zlib.compress(raw)) + chunk(b"IEND", b""))
    else:
        p.write_text(text, encoding="utf-8")


def make_dir(in_dir: Path, work_dir: Path, base: Path, name: str, where: str = "in"):
    """An empty folder."""
    ((in_dir if where == "in" else work_dir) / name).mkdir(parents=True, exist_ok=True)


ANALYSIS_DAMAGE = {
    "results_truncated": "error", "results_list": "error", "results_null": "error", "results_empty": "error",
    "results_binary": "error", "results_missing": "error", "results_directory": "error",
    "results_non_utf8": "error", "results_deep_json": "error", "results_nan_literal": "either",
    "results_huge_number": "either", "no_classification": "error", "no_statistics": "error",
    "no_provenance": "either", "no_schema_version": "error", "schema_version_string": "error",
    "confidence_text": "error", "label_number": "error", "intervals_list": "error", "statistics_null": "error",
    "temperature_text": "either", "temperature_list": "either", "sample_is_list": "error",
    "metals_not_list": "error", "columns_truncated": "error", "columns_missing": "error",
    "columns_random": "error", "decoded_truncated": "error", "decoded_missing": "error",
    "decoded_nan_posteriors": "either", "decoded_wrong_shape": "error", "bootstrap_missing": "either",
    "bootstrap_truncated": "error", "tracks_missing": "either", "results_dangling_symlink": "error",
    "results_int_5000_digits": "error",
}


def _edit_json(path: Path, fn):
    d = json.loads(path.read_text(encoding="utf-8"))
    d = fn(d)
    path.write_text(json.dumps(d), encoding="utf-8")


def damage_analysis(in_dir: Path, work_dir: Path, base: Path, damage: str, name: str = "analysis"):
    """Copy the base analysis folder to ``in/<name>`` and damage it."""
    import h5py

    d = in_dir / name
    shutil.copytree(base / "analysis", d)
    res = d / "results.json"

    def setp(path, value):
        def f(doc):
            cur = doc
            for k in path[:-1]:
                cur = cur[k]
            if value is KeyError:
                cur.pop(path[-1], None)
            else:
                cur[path[-1]] = value
            return doc
        return f

    if damage == "results_truncated":
        res.write_bytes(res.read_bytes()[:200])
    elif damage == "results_list":
        res.write_text("[]")
    elif damage == "results_null":
        res.write_text("null")
    elif damage == "results_empty":
        res.write_bytes(b"")
    elif damage == "results_binary":
        res.write_bytes(np.random.default_rng(5).integers(0, 256, 1024, dtype=np.uint8).tobytes())
    elif damage == "results_missing":
        res.unlink()
    elif damage == "results_directory":
        res.unlink()
        res.mkdir()
    elif damage == "results_non_utf8":
        res.write_bytes(res.read_bytes().replace(b'"label"', b'"lab\xffel"', 1))
    elif damage == "results_deep_json":
        res.write_text("[" * 200000 + "]" * 200000)
    elif damage == "results_nan_literal":
        _edit_json(res, setp(["classification", "confidence"], float("nan")))
    elif damage == "results_huge_number":
        res.write_text(res.read_text().replace('"confidence": ', '"confidence": 1e999, "was": ', 1))
    elif damage == "no_classification":
        _edit_json(res, setp(["classification"], KeyError))
    elif damage == "no_statistics":
        _edit_json(res, setp(["statistics"], KeyError))
    elif damage == "no_provenance":
        _edit_json(res, setp(["provenance"], KeyError))
    elif damage == "no_schema_version":
        _edit_json(res, setp(["schema_version"], KeyError))
    elif damage == "schema_version_string":
        _edit_json(res, lambda doc: {**doc, "schema_version": str(doc["schema_version"])})
    elif damage == "confidence_text":
        _edit_json(res, setp(["classification", "confidence"], "high"))
    elif damage == "label_number":
        _edit_json(res, setp(["classification", "label"], 7))
    elif damage == "intervals_list":
        _edit_json(res, setp(["statistics", "intervals"], [1, 2, 3]))
    elif damage == "statistics_null":
        _edit_json(res, setp(["statistics"], None))
    elif damage == "temperature_text":
        _edit_json(res, setp(["provenance", "sample", "synthesis_temperature_c"], "hot"))
    elif damage == "temperature_list":
        _edit_json(res, setp(["provenance", "sample", "synthesis_temperature_c"], [150, "C"]))
    elif damage == "sample_is_list":
        _edit_json(res, setp(["provenance", "sample"], ["a", "b"]))
    elif damage == "metals_not_list":
        _edit_json(res, setp(["provenance", "metals"], 12))
    elif damage == "columns_truncated":
        p = d / "columns.h5"
        p.write_bytes(p.read_bytes()[:1000])
    elif damage == "columns_missing":
        (d / "columns.h5").unlink()
    elif damage == "columns_random":
        (d / "columns.h5").write_bytes(np.random.default_rng(6).integers(0, 256, 4096, dtype=np.uint8).tobytes())
    elif damage == "decoded_truncated":
        p = d / "decoded.h5"
        p.write_bytes(p.read_bytes()[:1500])
    elif damage == "decoded_missing":
        (d / "decoded.h5").unlink()
    elif damage == "decoded_nan_posteriors":
        with h5py.File(d / "decoded.h5", "a") as f:
            f["decoded/posteriors"][...] = np.nan
    elif damage == "decoded_wrong_shape":
        with h5py.File(d / "decoded.h5", "a") as f:
            del f["decoded/viterbi"]
            f["decoded/viterbi"] = np.zeros((2, 2), dtype=np.int8)
    elif damage == "bootstrap_missing":
        (d / "bootstrap.h5").unlink()
    elif damage == "bootstrap_truncated":
        p = d / "bootstrap.h5"
        p.write_bytes(p.read_bytes()[:800])
    elif damage == "tracks_missing":
        (d / "tracks.csv").unlink()
    elif damage == "results_dangling_symlink":
        res.unlink()
        os.symlink("gone.json", res)
    elif damage == "results_int_5000_digits":
        res.write_text(res.read_text().replace('"schema_version": ', '"big": ' + BIG_INT + ', "schema_version": ', 1))
    else:
        raise KeyError(f"unknown analysis damage {damage!r}")


COLUMNS_DAMAGE = {
    "columns_h5_missing": "error", "columns_h5_truncated": "error", "columns_h5_random": "error",
    "columns_h5_empty": "error", "columns_h5_directory": "error", "format_version_wrong": "error",
    "no_columns_group": "error", "counts_missing": "error", "counts_negative": "error", "counts_nan": "error",
    "counts_string": "error", "counts_wrong_ndim": "error", "mask_wrong_shape": "error",
    "metals_attr_not_json": "error", "metals_attr_one": "error", "params_json_invalid": "error",
    "params_json_deep": "error", "zero_rods": "error", "pitch_nan": "error", "neighbours_out_of_range": "error",
    "counts_huge": "error", "rod_xy_nan": "error",
}


def damage_columns(in_dir: Path, work_dir: Path, base: Path, damage: str, name: str = "columns"):
    """Copy the base columns folder to ``in/<name>`` and damage its ``columns.h5``."""
    import h5py

    d = in_dir / name
    shutil.copytree(base / "columns", d)
    p = d / "columns.h5"
    if damage == "columns_h5_missing":
        p.unlink()
        return
    if damage == "columns_h5_truncated":
        p.write_bytes(p.read_bytes()[: p.stat().st_size // 2])
        return
    if damage == "columns_h5_random":
        p.write_bytes(np.random.default_rng(8).integers(0, 256, 4096, dtype=np.uint8).tobytes())
        return
    if damage == "columns_h5_empty":
        p.write_bytes(b"")
        return
    if damage == "columns_h5_directory":
        p.unlink()
        p.mkdir()
        return
    with h5py.File(p, "a") as f:
        g = f["columns"]

        def replace(key, value):
            del g[key]
            g[key] = value

        if damage == "format_version_wrong":
            g.attrs["format_version"] = 999
        elif damage == "no_columns_group":
            f.move("columns", "other")
        elif damage == "counts_missing":
            del g["counts"]
        elif damage == "counts_negative":
            c = g["counts"][...]
            replace("counts", -np.abs(c).astype(np.int64) - 1)
        elif damage == "counts_nan":
            c = g["counts"][...].astype(float)
            c[..., 0] = np.nan
            replace("counts", c)
        elif damage == "counts_string":
            replace("counts", np.array([b"a", b"b"]))
        elif damage == "counts_wrong_ndim":
            replace("counts", g["counts"][...].reshape(-1))
        elif damage == "mask_wrong_shape":
            replace("mask", np.ones((3, 3), dtype=bool))
        elif damage == "metals_attr_not_json":
            g.attrs["metals"] = "Co,Zn["
        elif damage == "metals_attr_one":
            g.attrs["metals"] = json.dumps(["Co"])
        elif damage == "params_json_invalid":
            g.attrs["params_json"] = "{not json"
        elif damage == "params_json_deep":
            g.attrs["params_json"] = "[" * 100000 + "]" * 100000
        elif damage == "zero_rods":
            for k in list(g.keys()):
                arr = g[k][...]
                replace(k, arr[:0])
        elif damage == "pitch_nan":
            g.attrs["pitch_nm"] = float("nan")
        elif damage == "neighbours_out_of_range":
            nb = g["neighbours"][...]
            replace("neighbours", np.full_like(nb, 10 ** 6))
        elif damage == "counts_huge":
            c = g["counts"][...].astype(np.int64)
            c[...] = 10 ** 15
            replace("counts", c)
        elif damage == "rod_xy_nan":
            xy = g["rod_xy_nm"][...]
            xy[...] = np.nan
            replace("rod_xy_nm", xy)
        else:
            raise KeyError(f"unknown columns damage {damage!r}")


def batch_folder(in_dir: Path, work_dir: Path, base: Path, variants: tuple, name: str = "batch"):
    """A folder of run folders, one per variant of :data:`RUN_VARIANTS` / :data:`RUN_FILE_VARIANTS`."""
    root = in_dir / name
    root.mkdir()
    for i, v in enumerate(variants):
        run_folder(root, work_dir, base, v, name=f"run{i}_{v}")


BUILDERS = {f.__name__: f for f in (ion_file, mutate_ions, range_file, mutate_range, lattice_file, random_lattice,
                                     run_folder, copy_base, small_ions, write_file, make_dir, damage_analysis,
                                     damage_columns, batch_folder)}


def build(case, in_dir: Path, work_dir: Path, base: Path):
    """Run the recipe of ``case``: every step writes into ``in_dir`` or ``work_dir``."""
    for name, params in case.recipe:
        BUILDERS[name](in_dir, work_dir, base, **dict(params))
