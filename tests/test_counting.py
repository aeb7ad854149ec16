"""The fused pass from ions to the count array (probeseq.lattice.counting) and the streamed analysis.

The compiled kernel is checked against the numpy reference (ranging lookup, metal draw with the
same uniform numbers, rod assignment and binning of probeseq.lattice), for float32 and float64
input, several block sizes and thread counts, and with invalid rows.
"""

import json
import math

import h5py
import numpy as np
import pytest

from probeseq import InputError
from probeseq.exceptions import DataQualityWarning
from probeseq.io.readers import IonSource, read_ion_sample, read_ions, sample_blocks, write_ions
from probeseq.lattice.columns import ColumnBinner
from probeseq.lattice.counting import CountPass, make_count_plan, tally_dict, zeroed_array
from probeseq.lattice.geometry import _inside_kernel, _maybe_inside_kernel, plan_columns
from probeseq.lattice.registration import register_lattice
from probeseq.pipeline.analysis import analyze, analyze_file
from probeseq.pipeline.options import AnalysisOptions
from probeseq.ranging.auto import auto_range
from probeseq.ranging.channels import assign_channels, draw_metal_ions, metal_visibility
from probeseq.simulation.simulate import simulate_run
from probeseq.utils.draws import ion_uniforms

METALS = ("Co", "Zn")


@pytest.fixture(scope="module")
def run():
    return simulate_run(pattern="long-block", top_radius_nm=8, depth_nm=30, seed=3)


@pytest.fixture(scope="module")
def fitted(run):
    """Ranges and geometry fitted on the whole (small) run, as the pipeline would, and thinning factors."""
    ions = run.ions
    rr = auto_range(ions.mass_to_charge, METALS)
    ca = assign_channels(ions.mass_to_charge, rr.ranges, METALS)
    thin = np.array([1.0, 0.7])  # thinning factors below 1 exercise the draw's cumulative weights
    sel = ca.weights().sum(1) > 0
    x, y, z = ions.x[sel], ions.y[sel], ions.z[sel]
    reg = register_lattice(x, y, z, run.lattice, random_state=0)
    geom = plan_columns(x, y, z, reg, random_state=0)
    return rr, thin, geom


def reference_counts(ions, rr, thin, geom, seed, dtype, factor=1.0):
    """The numpy path: range lookup, draws from ion_uniforms, ColumnBinner (positions in dtype)."""
    ca = assign_channels(ions["m"], rr.ranges, METALS)
    ch = draw_metal_ions(ca, thin, seed=seed)
    xyz = [np.asarray(ions[c], dtype) for c in "xyz"]
    if factor != 1.0:
        xyz = [a * a.dtype.type(factor) for a in xyz]
    ok = np.isfinite(xyz[0]) & np.isfinite(xyz[1]) & np.isfinite(xyz[2]) & np.isfinite(ions["m"]) & (ions["m"] > 0)
    sel = (ch >= 0) & ok
    b = ColumnBinner(geom, len(METALS)).add(xyz[0][sel], xyz[1][sel], xyz[2][sel], ch[sel])
    return b.counts, b.stats(), int(sel.sum())


def fused_counts(ions, rr, thin, geom, seed, dtype, block, threads, factor=1.0, strict=False, given=True):
    plan = make_count_plan(rr.ranges, METALS, thin, geom, seed)
    x, y, z = (np.asarray(ions[c], dtype) for c in "xyz")
    m = np.asarray(ions["m"], dtype)
    with CountPass(plan, plan.new_counts() if given else None, threads=threads, factor=factor, strict=strict) as cp:
        for s in range(0, x.size, block):
            cp.add(s, x[s:s + block], y[s:s + block], z[s:s + block], m[s:s + block])
        tally, ext = cp.result()
        counts = cp.counts
    return counts, tally_dict(tally), ext


def as_dict(ions):
    return {"x": ions.x, "y": ions.y, "z": ions.z, "m": ions.mass_to_charge}


# ---------------------------------------------------------------------- uniform numbers
def test_uniforms_are_counter_based():
    u = ion_uniforms(7, 0, 100_000)
    assert u.min() >= 0 and u.max() < 1
    assert abs(u.mean() - 0.5) < 0.005 and abs(u.var() - 1 / 12) < 0.002
    np.testing.assert_array_equal(ion_uniforms(7, 1234, 500), u[1234:1734])
    assert not np.array_equal(ion_uniforms(8, 0, 1000), u[:1000])
    assert ion_uniforms(-3, 0, 5).shape == (5,) and ion_uniforms(2 ** 70, 10, 5).shape == (5,)
    # neighbouring indices and seeds are uncorrelated
    assert abs(np.corrcoef(u[:-1], u[1:])[0, 1]) < 0.01
    assert abs(np.corrcoef(u, ion_uniforms(8, 0, u.size))[0, 1]) < 0.01
    with pytest.raises(InputError):
        ion_uniforms(1.5, 0, 3)


# ---------------------------------------------------------------------- kernel vs numpy
@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_fused_pass_equals_numpy_reference(run, fitted, dtype):
    rr, thin, geom = fitted
    ions = as_dict(run.ions)
    ref, stats, n_metal = reference_counts(ions, rr, thin, geom, 11, dtype)
    got, tally, ext = fused_counts(ions, rr, thin, geom, 11, dtype, block=40_000, threads=1)
    assert ref.sum() > 1000
    np.testing.assert_array_equal(got, ref)
    assert tally["n_metal"] == n_metal == stats["n_ions"]
    for k in ("n_binned", "n_beyond_cutoff", "n_unused_rod", "n_outside_depth"):
        assert tally[k] == stats[k], k
    assert tally["n_valid"] == tally["n_rows"] == run.ions.n_ions
    for k, c in enumerate("xyz"):
        a = np.asarray(ions[c], dtype)
        assert ext[2 * k] == a.min() and ext[2 * k + 1] == a.max()


def test_fused_pass_independent_of_blocks_and_threads(run, fitted):
    rr, thin, geom = fitted
    ions = as_dict(run.ions)
    base, tally0, ext0 = fused_counts(ions, rr, thin, geom, 5, np.float32, block=run.ions.n_ions, threads=1)
    for block, threads, given in ((997, 1, True), (65_536 * 2 + 17, 2, False), (200_000, 2, True), (33_333, 2, False),
                                  (5000, 1, False)):
        got, tally, ext = fused_counts(ions, rr, thin, geom, 5, np.float32, block=block, threads=threads,
                                       given=given)
        np.testing.assert_array_equal(got, base)
        assert tally == tally0
        np.testing.assert_array_equal(ext, ext0)
    other, _, _ = fused_counts(ions, rr, thin, geom, 6, np.float32, block=50_000, threads=2)
    assert not np.array_equal(other, base)  # the seed matters
    assert abs(other.sum() - base.sum()) < 0.02 * base.sum()


def test_fused_pass_length_unit_factor(run, fitted):
    rr, thin, geom = fitted
    ions = as_dict(run.ions)
    in_angstrom = {c: (ions[c] * 10.0 if c != "m" else ions[c]) for c in ions}
    ref, _, _ = reference_counts(in_angstrom, rr, thin, geom, 2, np.float64, factor=0.1)
    got, _, ext = fused_counts(in_angstrom, rr, thin, geom, 2, np.float64, block=30_000, threads=2, factor=0.1)
    np.testing.assert_array_equal(got, ref)
    assert ext[0] == pytest.approx(ions["x"].min(), abs=1e-9)


def test_invalid_rows_are_skipped_and_counted(run, fitted):
    rr, thin, geom = fitted
    ions = {c: a.copy() for c, a in as_dict(run.ions).items()}
    rng = np.random.default_rng(0)
    bad = rng.choice(run.ions.n_ions, 60, replace=False)
    ions["x"][bad[:20]] = np.nan
    ions["z"][bad[20:30]] = np.inf
    ions["m"][bad[30:45]] = -1.0
    ions["m"][bad[45:]] = 0.0
    ref, stats, _ = reference_counts(ions, rr, thin, geom, 4, np.float32)
    got, tally, ext = fused_counts(ions, rr, thin, geom, 4, np.float32, block=25_000, threads=2)
    np.testing.assert_array_equal(got, ref)
    assert tally["n_nonfinite"] == 30 and tally["n_nonpositive"] == 30
    assert tally["n_valid"] == run.ions.n_ions - 60
    assert tally["first_bad_row"] == int(bad.min())
    assert np.isfinite(ext).all()
    with pytest.raises(InputError, match="counts must be"):
        CountPass(make_count_plan(rr.ranges, METALS, thin, geom, 0), np.zeros((2, 2, 2)))


def test_zeroed_array():
    a = zeroed_array((300, 200, 2))
    b = zeroed_array((3000, 2000, 2))
    assert a.shape == (300, 200, 2) and b.shape == (3000, 2000, 2)
    assert a.dtype == b.dtype == np.float64 and b.flags.c_contiguous and b.flags.writeable
    assert not a.any() and not b[::97].any()
    c = zeroed_array((3000, 2000, 2), np.float32)
    assert c.dtype == np.float32 and c.shape == (3000, 2000, 2) and not c.any()


def test_float32_counts_are_whole_and_a_saturated_bin_counts_again_in_float64(run, fitted, monkeypatch):
    """The default count array is float32; should a bin reach FLOAT32_LIMIT (2**24 in use, where
    float32 stops counting exactly), the pass flags it and the pipeline counts again in float64
    with the same result (the limit is lowered here so a small run reaches it)."""
    from probeseq.exceptions import DataQualityWarning
    from probeseq.lattice import counting
    from probeseq.pipeline.stages import _run_pass

    rr, thin, geom = fitted
    ions = as_dict(run.ions)
    plan = make_count_plan(rr.ranges, METALS, thin, geom, 3)
    x, y, z, m = (np.asarray(ions[c], np.float32) for c in "xyzm")

    def blocks():
        return ((s, x[s:s + 50_000], y[s:s + 50_000], z[s:s + 50_000], m[s:s + 50_000])
                for s in range(0, x.size, 50_000))

    c32, t32, _, _ = _run_pass(plan, None, 1.0, False, blocks)
    assert c32.dtype == np.float32
    top = float(c32.max())
    assert top >= 2
    monkeypatch.setattr(counting, "FLOAT32_LIMIT", top)
    with pytest.warns(DataQualityWarning, match="counting again in float64"):
        c64, t64, _, _ = _run_pass(plan, None, 1.0, False, blocks)
    assert c64.dtype == np.float64
    np.testing.assert_array_equal(c64, c32)
    np.testing.assert_array_equal(t64, t32)
    # a float32 array handed in cannot be swapped: a clear error instead
    with pytest.raises(InputError, match="float64 count array"):
        _run_pass(plan, plan.new_counts(np.float32), 1.0, False, blocks)
    monkeypatch.setattr(counting, "FLOAT32_LIMIT", top + 1)
    c, _, _, _ = _run_pass(plan, plan.new_counts(np.float32), 1.0, False, blocks)
    np.testing.assert_array_equal(c, c32)


# ---------------------------------------------------------------------- column mask kernel
def test_mask_kernel_equals_site_by_site_interp():
    rng = np.random.default_rng(1)
    site_z = np.sort(rng.uniform(-5, 105, 700))
    oz = np.sort(rng.uniform(0, 100, 40))
    ocx, ocy = rng.normal(0, 0.5, 40), rng.normal(0, 0.5, 40)
    orad = 10 + 0.1 * oz + rng.normal(0, 0.3, 40)
    n_rods = 400
    xy = rng.uniform(-25, 25, (n_rods, 2))
    dz = rng.normal(0, 0.3, n_rods)
    t0, t1, z_ref, margin, zlo, zhi = 0.01, -0.02, 3.0, 0.4, 0.0, 100.0
    args = (site_z, dz, xy, t0, t1, z_ref, oz, ocx, ocy, orad, margin, zlo, zhi)
    got = np.empty((n_rods, site_z.size), bool)
    keep = np.zeros(n_rods, bool)
    _inside_kernel(*args, got, keep)
    zz = site_z[None, :] + dz[:, None]
    cx, cy, rz = (np.interp(zz, oz, v) for v in (ocx, ocy, orad))
    ax = xy[:, None, 0] + t0 * (zz - z_ref)
    ay = xy[:, None, 1] + t1 * (zz - z_ref)
    lim = rz - margin
    d2 = (ax - cx) ** 2 + (ay - cy) ** 2
    want = (lim >= 0) & (d2 <= lim * lim) & (zz >= zlo) & (zz <= zhi)
    assert 0.1 < want.mean() < 0.9
    np.testing.assert_array_equal(got, want)
    np.testing.assert_array_equal(keep, want.any(1))
    maybe = np.zeros(n_rods, bool)
    _maybe_inside_kernel(*args, maybe)
    assert (maybe >= want.any(1)).all()  # a safe bound: never drops a rod with a used site
    assert maybe.sum() < n_rods


# ---------------------------------------------------------------------- reading
def test_ion_source_direct_and_fallback_agree(tmp_path, run):
    plain = write_ions(run.ions, tmp_path / "plain.h5", chunk_rows=7000, dtype=np.float32)
    packed = write_ions(run.ions, tmp_path / "packed.h5", compression="gzip", dtype=np.float32)
    with IonSource(plain) as a, IonSource(packed) as b:
        assert a.raw and not b.raw and a.n == b.n == run.ions.n_ions
        bounds = a.block_bounds(5000)
        assert bounds[0][0] == 0 and bounds[-1][1] == a.n and all(e - s <= 5000 for s, e in bounds)
        assert all(s // 7000 == (e - 1) // 7000 for s, e in bounds)  # inside one stored chunk
        ba, bb = a.buffers(9000), b.buffers(9000)
        for s, e in [(0, 10), (6990, 7010), (a.n - 9000, a.n)]:
            va, vb = a.read(s, e, ba), b.read(s, e, bb)
            for c in va:
                np.testing.assert_array_equal(va[c], vb[c])
                np.testing.assert_array_equal(va[c], getattr(run.ions, c if c != "m" else "mass_to_charge")[s:e]
                                              .astype(np.float32))
        for s, e in bounds[:3]:
            with a.mapped(s, e) as v:
                np.testing.assert_array_equal(v["y"], run.ions.y[s:e].astype(np.float32))
        with b.mapped(0, 10) as v:
            assert v is None
        with pytest.raises(InputError, match="outside"):
            a.read(0, a.n + 1, ba)


def test_sample_blocks_and_sample_read(tmp_path, run):
    starts = sample_blocks(1_000_000, 256, 1000)
    assert starts.size == 256 and starts[0] == 0 and starts[-1] == 999_000
    assert (np.diff(starts) >= 1000).all()
    np.testing.assert_array_equal(sample_blocks(5000, 256, 1000), [0])
    p = write_ions(run.ions, tmp_path / "r.h5")
    with IonSource(p) as src:
        sample, st = read_ion_sample(src, 16, 500)
    assert len(sample) == 16 * 500
    np.testing.assert_array_equal(sample.z[500:1000], run.ions.z[st[1]:st[1] + 500])


def test_truncated_file_gives_input_error(tmp_path, run):
    p = write_ions(run.ions, tmp_path / "r.h5", dtype=np.float32)
    data = p.read_bytes()
    q = tmp_path / "cut.h5"
    q.write_bytes(data[: len(data) * 2 // 3])
    with pytest.raises(InputError):
        with IonSource(q) as src:
            src.read(0, src.n, src.buffers(src.n))


# ---------------------------------------------------------------------- the streamed analysis
class _Stop(Exception):
    pass


@pytest.fixture
def counts_only(monkeypatch):
    """Run analyze / analyze_file only up to the count array: returns (timings, ranging, columns)."""
    from probeseq.pipeline import analysis
    from probeseq.pipeline.options import _Clock

    def fake_run(counts_stage, *args):
        clock = _Clock(None)
        rr, cols, n_metal = counts_stage(clock)
        raise _Stop(clock.timings, rr, cols, n_metal)

    monkeypatch.setattr(analysis, "_run", fake_run)

    def call(fn, *a, **kw):
        with pytest.raises(_Stop) as e:
            fn(*a, **kw)
        return e.value.args

    return call


def test_file_and_memory_paths_agree_and_chunks_do_not_matter(tmp_path, run, counts_only):
    p = write_ions(run.ions, tmp_path / "r.h5", chunk_rows=10_000)
    opts = AnalysisOptions(seed=9)
    t1, rr1, c1, n1 = counts_only(analyze_file, p, METALS, run.lattice, options=opts)
    t2, rr2, c2, n2 = counts_only(analyze_file, p, METALS, run.lattice, options=opts, chunk_size=3001)
    t3, rr3, c3, n3 = counts_only(analyze, read_ions(p), METALS, run.lattice, options=opts)
    assert "read_to_counts" in t1
    for c, n in ((c2, n2), (c3, n3)):
        np.testing.assert_array_equal(c.counts, c1.counts)
        assert n == n1
        assert json.dumps(c.params, sort_keys=True, default=str) == json.dumps(c1.params, sort_keys=True, default=str)
    assert rr2.ranges == rr1.ranges == rr3.ranges
    assert c1.counts.sum() > 0.9 * n1


def test_ranging_on_a_stride_of_the_sample_balances_on_the_same_ions(run, counts_only, monkeypatch):
    # with fewer ranging ions than sampled ions, the spectrum is ranged on every k-th sampled ion
    # and the metals' visibility must come from the channels of exactly those ions
    from probeseq.pipeline import stages

    ions = run.ions
    monkeypatch.setattr(stages, "RANGING_IONS", len(ions) // 3)
    _, rr, cols, _ = counts_only(analyze, ions, METALS, run.lattice, options=AnalysisOptions(seed=2))
    m = ions.mass_to_charge
    m_fit = m[::-(-m.size // (len(ions) // 3))]
    assert rr.spectrum.counts.sum() <= m_fit.size < m.size
    want = metal_visibility(rr, assign_channels(m_fit, rr.ranges, METALS))
    # times the share of the own ions landing nearest their rod (the same for every metal)
    lateral = cols.params["evidence"]["lateral_capture"]
    assert 0.9 < lateral <= 1.0
    got = [cols.params["visibility"][k] for k in METALS]
    np.testing.assert_allclose(got, want * lateral, rtol=1e-15, atol=0)


def test_block_sample_registers_a_deep_run(tmp_path, run, counts_only):
    """A sample of a few thousand ions per block still finds the lattice and the tilt."""
    p = write_ions(run.ions, tmp_path / "r.h5", dtype=np.float32)
    _, _, cols, _ = counts_only(analyze_file, p, METALS, run.lattice, sample_ions=60_000)
    reg = cols.params["registration"]
    d = run.truth["distortion"]
    period = reg["rotation_period_deg"]
    assert abs((reg["rotation_deg"] - d["rotation_deg"] + period / 2) % period - period / 2) < 0.5
    assert abs(reg["scale"] / d["scale"] - 1) < 0.01
    assert math.degrees(math.atan(float(np.hypot(*(np.array(reg["tilt"]) - run.rod_tilt))))) < 0.3


def test_streamed_invalid_rows_strict_and_dropped(tmp_path, run, counts_only):
    p = write_ions(run.ions, tmp_path / "r.h5", dtype=np.float32)
    n = run.ions.n_ions
    block = -(-60_000 // 256)  # the blocks of sample_ions=60000
    covered = np.zeros(n, bool)
    for s0 in sample_blocks(n, 256, block):
        covered[s0:s0 + block] = True
    bad = np.flatnonzero(~covered)[[100, 2000]]  # two rows outside the sample
    with h5py.File(p, "r+") as f:
        f["ions/x"][bad[0]] = np.nan
        f["ions/mass_to_charge"][bad[1]] = -2.0
    # the whole file is the sample by default: the sample check finds the first bad row
    with pytest.raises(InputError, match=f"row {bad[0] + 1} "):
        counts_only(analyze_file, p, METALS, run.lattice, strict=True)
    # with a smaller sample the pass finds it
    with pytest.raises(InputError, match=f"row {bad[0] + 1} "):
        counts_only(analyze_file, p, METALS, run.lattice, strict=True, sample_ions=60_000)
    with pytest.warns(DataQualityWarning, match="dropped 2 rows"):
        _, _, cols, _ = counts_only(analyze_file, p, METALS, run.lattice, sample_ions=60_000)
    assert cols.counts.sum() > 0


def test_same_seed_same_results_file(tmp_path, run):
    p = write_ions(run.ions, tmp_path / "r.h5", dtype=np.float32)
    opts = AnalysisOptions(n_boot=20, seed=4)
    a = analyze_file(p, METALS, run.lattice, options=opts).to_dict()
    b = analyze_file(p, METALS, run.lattice, options=opts, chunk_size=7777).to_dict()
    for d in (a, b):
        d.pop("timings_s")
    assert json.dumps(a, sort_keys=True, default=str) == json.dumps(b, sort_keys=True, default=str)
    assert a["ions"]["streamed"] and a["ions"]["n_ions"] == run.ions.n_ions
    assert a["ions"]["sha256"] and a["provenance"]["input"]["sha256"] == a["ions"]["sha256"]


def test_kernel_geometry_is_the_geometry_arrays(fitted):
    """The compiled pass reads the geometry by name, from the geometry's own tables (no copies)."""
    from probeseq.lattice.geometry import KernelGeometry

    _rr, _thin, geom = fitted
    kg = geom.kernel_geometry()
    assert isinstance(kg, KernelGeometry)
    for name in ("lut_offset", "code_offset", "rod_key"):
        assert np.shares_memory(getattr(kg, name), getattr(geom, name)), name
    assert kg.n_sites == geom.n_sites and kg.rods_per_cell == geom.lattice.rods_per_cell
    assert kg.n_grid == 1 << kg.grid_bits == geom.locator.n_grid


def test_candidate_table_codes(fitted):
    """The packed range table holds the codes of probeseq.ranging.channels.LookupTable, defined there once."""
    from probeseq.ranging.channels import LookupTable

    rr, _thin, _geom = fitted
    lk = LookupTable.build(rr.ranges)
    cand = np.arange(len(rr.ranges)) % 2 == 0
    packed = lk.candidate_table(cand).astype(np.int64)
    code = (packed >> 1) - LookupTable.CODE_BASE
    flag = packed & 1
    assert np.array_equal(code, lk.lut)
    assert (flag[code == LookupTable.EDGE] == 1).all() and (flag[code == LookupTable.UNRANGED] == 0).all()
    ranged = code >= 0
    assert np.array_equal(flag[ranged], cand[code[ranged]])
    with pytest.raises(InputError):
        lk.candidate_table(cand[:-1])
