"""`probeseq prepare` and the kernels' compile cost (issue 22).

* the command's help says what it does, its parts cover 2, 3 and 4 metals, bad values are one-line
  errors, and the parts run in worker processes with each one reported;
* one part really compiles: in a fresh process it compiles (or finds compiled) the decoding
  kernels, and a second fresh process finds every one in the cache (the fast path);
* the kernels take their arguments in one form whatever the caller holds (one compiled kernel,
  not two), and the hand-written selection gives numpy's quantiles.

The whole prepare step (about half a minute) is measured by tests/benchmarks/bench_firstrun.py.
"""

import json
import multiprocessing
import os
import subprocess
import sys
from pathlib import Path

import numba
import numpy as np
import pytest

from probeseq.cli.main import main
from probeseq.exceptions import InputError
from probeseq.pipeline import prepare as prep
from probeseq.pipeline.prepare import KernelPart, compile_kernels, drawn_columns, kernel_parts

ROOT = Path(__file__).resolve().parents[1]


# ---------------------------------------------------------------------- the command and its parts
def test_prepare_help_says_what_it_does(capsys):
    assert main(["prepare", "--help"]) == 0
    text = " ".join(capsys.readouterr().out.split())
    assert text.startswith("Usage: probeseq prepare [OPTIONS]")
    for words in ("Compile the analysis's kernels once", "2, 3 and 4 metals", "temporary folder",
                  "--metal-counts", "--jobs N", "a second run takes a few seconds"):
        assert words in text, words
    assert main(["--help"]) == 0
    assert "prepare" in capsys.readouterr().out


def test_parts_cover_two_three_and_four_metals():
    parts = kernel_parts()
    assert parts[0] == KernelPart("analysis", 2)  # every stage, the longest part, first
    assert {p.n_metals for p in parts if p.kind in ("analysis", "decoding")} == {2, 3, 4}
    assert [p.kind for p in parts].count("text") == 1
    assert [p.statistics for p in parts] == [False, True, False, False]  # the statistics once, not in the analysis
    assert kernel_parts((4, 3, 4)) == (KernelPart("analysis", 4), KernelPart("decoding", 3, statistics=True),
                                       KernelPart("text", 4))
    assert all(p.name for p in parts)


@pytest.mark.parametrize("bad", [1, 7, (2, 0), (), "3", (2, 2.5), True])
def test_bad_numbers_of_metals_are_one_line_errors(bad):
    with pytest.raises(InputError, match="--metal-counts"):
        kernel_parts(bad)


@pytest.mark.parametrize("argv", [["prepare", "--metal-counts", "2,x"], ["prepare", "--metal-counts", "1,2"],
                                  ["prepare", "--metal-counts", "2,,3"], ["--jobs", "0", "prepare"]])
def test_prepare_command_errors_are_one_line(argv, capsys):
    assert main(argv) == 1
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("error: "), err


@pytest.mark.parametrize("jobs", [1, 2])
def test_every_part_runs_once_and_is_reported(jobs, monkeypatch):
    if jobs > 1 and multiprocessing.get_start_method() != "fork":
        pytest.skip("the stand-in parts reach worker processes only when they are forked")
    # the parts themselves replaced by a quick stand-in that records where it ran (forked workers see it too)
    monkeypatch.setattr(prep, "_PARTS", {k: (lambda part, tmp: (tmp / "ran").write_text(str(os.getpid())))
                                         for k in ("analysis", "decoding", "text")})
    seen, began = [], []
    res = compile_kernels((2, 3, 4), jobs=jobs, progress=seen.append, started=lambda p, n: began.append(n))
    assert [r.part for r in res] == list(kernel_parts((2, 3, 4)))
    assert sorted(r.part.n_metals for r in seen) == [2, 2, 3, 4] and began == [jobs]
    assert all(r.compiled == 0 and r.seconds >= 0 for r in res)
    with pytest.raises(InputError, match="--jobs"):
        compile_kernels(jobs=0)


def test_prepare_command_prints_one_line_per_part(monkeypatch, capsys):
    monkeypatch.setattr(prep, "_PARTS", {k: (lambda part, tmp: None) for k in ("analysis", "decoding", "text")})
    assert main(["--jobs", "1", "prepare", "--metal-counts", "2,3"]) == 0
    out = capsys.readouterr().out.splitlines()
    assert out[0].startswith("compiling the kernels of the analysis for 2 and 3 metals: 3 parts in 1 process")
    assert len(out) == 5 and all(" s (" in line for line in out[1:4]) and out[-1].startswith("kernels ready in")


# ---------------------------------------------------------------------- one part really compiles
_PART = """
import json, time
from probeseq.decoding import rodchain
from probeseq.pipeline.prepare import KernelPart, run_part
r = run_part(KernelPart("decoding", 2))
sigs = list(rodchain._fit_kernel.signatures) + list(rodchain._decode_kernel.signatures)
print(json.dumps({"compiled": r.compiled, "seconds": r.seconds, "kernels": len(sigs),
                  "mask_read_only": all(not s[1].mutable for s in sigs)}))
"""


def _part_in_a_fresh_process() -> dict:
    env = {**os.environ, "PYTHONPATH": str(ROOT), "PYTHONWARNINGS": "ignore"}
    proc = subprocess.run([sys.executable, "-c", _PART], cwd=ROOT, env=env, capture_output=True, text=True,
                          timeout=300)
    assert proc.returncode == 0, proc.stderr[-2000:]
    return json.loads(proc.stdout.strip().splitlines()[-1])


def test_a_part_compiles_and_a_second_process_finds_it_compiled():
    first = _part_in_a_fresh_process()  # compiles the 2-metal decoding, or finds it compiled
    assert first["kernels"] >= 2 and first["mask_read_only"]
    second = _part_in_a_fresh_process()
    assert second["compiled"] == 0, "a fresh process compiled again: the kernels were not cached"
    assert second["seconds"] < 15.0  # loading, not compiling (compiling the two kernels takes 10 s or more)


def test_drawn_columns_are_as_the_count_stage_makes_them():
    from probeseq.lattice.columns import compact_counts

    cols = drawn_columns(3)
    whole = compact_counts(np.ones((2, 3, 3)))  # whole counts from the count stage: compacted
    assert cols.counts.dtype == whole.dtype and cols.evidence.dtype == np.float32
    assert cols.counts.flags.c_contiguous and not cols.mask.flags.writeable and cols.n_metals == 3
    assert cols.metals == ("Co", "Zn", "Ni") and len(cols.neighbours) > 0


# ---------------------------------------------------------------------- one compiled form per kernel
def test_the_decoding_kernels_take_one_mask_type():
    from probeseq.decoding.rodchain import _kernel_arrays

    m = np.ones((3, 4), bool)
    frozen = m.copy()
    frozen.flags.writeable = False
    a = _kernel_arrays(np.zeros((3, 4, 2), np.float32), m, [0, 1], np.zeros(2, np.int32), np.arange(4)[::2])
    b = _kernel_arrays(np.zeros((3, 4, 2), np.float32), frozen, np.arange(2), np.zeros(2, np.int64), [1, 1])
    assert [numba.typeof(x) for x in a] == [numba.typeof(x) for x in b]
    assert m.flags.writeable  # the caller's array is left as it was


def test_lag_sums_build_one_kernel_for_strided_pairs():
    from probeseq.statistics import agreement

    rng = np.random.default_rng(1)
    x = rng.random((6, 40)).astype(np.float32)
    m = rng.random((6, 40)) < 0.9
    pairs = np.array([[0, 1], [2, 3], [4, 5], [1, 2]])
    got = agreement._lag_sums(x, m, pairs[:, 0], pairs[:, 1], np.arange(-2, 3))
    want = agreement._lag_sums(x, m, pairs[:, 0].copy(), pairs[:, 1].copy(), np.arange(-2, 3))
    assert all(np.array_equal(g, w) for g, w in zip(got, want))
    assert all(s[2].layout == "C" and s[3].layout == "C" for s in agreement._lag_sums_kernel.signatures)


def test_correction_map_takes_read_only_positions():
    from probeseq.lattice import correction

    c = correction.ReconstructionCorrection.identity()
    z = np.linspace(0.0, 5.0, 7).astype(np.float32)
    frozen = z.copy()
    frozen.flags.writeable = False
    out = [np.empty(7, np.float32) for _ in range(3)]
    c.apply(z, z, z, out=out)
    c.apply(frozen, frozen, frozen, out=out)
    assert all(not s[0].mutable for s in correction._apply_kernel.signatures)


@pytest.mark.parametrize("n", [1, 2, 3, 17, 100, 1001])
def test_linear_quantile_is_numpys(n):
    from probeseq.lattice.quantiles import linear_quantile, select_kth

    rng = np.random.default_rng(n)
    for a in (rng.normal(size=n), rng.integers(0, 3, n).astype(float), np.sort(rng.normal(size=n)),
              np.sort(rng.normal(size=n))[::-1].copy()):
        for q in (0.0, 0.01, 0.5, 0.98, 0.99, 1.0, float(rng.random())):
            assert linear_quantile(a.copy(), q) == np.quantile(a, q)
        k = int(rng.integers(0, n))
        b = a.copy()
        select_kth(b, k)
        assert b[k] == np.sort(a)[k] and (b[:k] <= b[k]).all() and (b[k + 1:] >= b[k]).all()


def test_compact_rows_moves_kept_rows_to_the_front():
    from probeseq.lattice.geometry import _compact_rows

    rng = np.random.default_rng(0)
    a = rng.random((9, 5)) < 0.5
    keep = rng.random(9) < 0.5
    want = a[keep].copy()
    n = _compact_rows(a, keep)
    assert n == keep.sum() and np.array_equal(a[:n], want)
