"""The compiled CSV formatter against Python's printf-style formatting."""

import numpy as np
import pytest

from probeseq.exceptions import InputError
from probeseq.outputs.tables import format_block, write_csv


def _printf(table, columns, fmt):
    row = ",".join(fmt.get(c, "%d" if np.asarray(table[c]).dtype.kind in "iu" else "%s") for c in columns) + "\n"
    return "".join(row % r for r in zip(*[np.asarray(table[c]).tolist() for c in columns]))


def test_format_block_matches_printf():
    rng = np.random.default_rng(0)
    n = 20000
    table = {
        "i": rng.integers(-10**12, 10**12, n),
        "small": rng.integers(0, 5, n).astype(np.int8),
        "x": rng.normal(0, 300, n),
        "p": rng.random(n).astype(np.float32),
        "tiny": rng.normal(0, 1e-3, n),
        "label": np.array(["Co", "Zn", "Ni"], dtype=object)[rng.integers(0, 3, n)],
    }
    table["tiny"][np.abs(table["tiny"]) < 5e-5] = 0.25e-4  # no "-0.0000" (printf keeps the sign of -0)
    cols = list(table)
    fmt = {"x": "%.4f", "p": "%.4f", "tiny": "%.6f"}
    fast = format_block(table, cols, fmt).decode()
    ref = _printf(table, cols, fmt)
    a, b = fast.splitlines(), ref.splitlines()
    assert len(a) == len(b) == n
    # the scaled binary value is rounded, printf rounds the exact decimal expansion: they may
    # differ in the last digit only within rounding error of a half-way point
    diff = [(x, y) for x, y in zip(a, b) if x != y]
    assert len(diff) <= n * 1e-4


def test_non_finite_values_and_empty_table():
    table = {"v": np.array([np.nan, np.inf, -np.inf, 1.5, -2.25]), "k": np.arange(5)}
    out = format_block(table, ["v", "k"], {"v": "%.2f"}).decode()
    assert out.splitlines() == ["nan,0", "inf,1", "-inf,2", "1.50,3", "-2.25,4"]
    assert format_block({"v": np.zeros(0)}, ["v"], {"v": "%.1f"}) == b""


def test_write_csv_joins_blocks(tmp_path):
    blocks = [{"a": np.arange(3), "b": np.array([0.5, 1.5, 2.5])}, {"a": np.arange(3, 5), "b": np.array([3.0, 4.0])}]
    p = tmp_path / "t.csv"
    write_csv(p, blocks, ["a", "b"], {"b": "%.1f"})
    assert p.read_text() == "a,b\n0,0.5\n1,1.5\n2,2.5\n3,3.0\n4,4.0\n"


def test_unsupported_format_is_an_error():
    with pytest.raises(InputError, match="not supported"):
        format_block({"v": np.ones(2)}, ["v"], {"v": "%g"})
