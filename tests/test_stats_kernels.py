"""The compiled and blocked statistics code against plain numpy versions of the same sums.

The reference functions below are the straightforward vectorised forms (they build the full
(n_pairs, n_sites) and (n_pairs, n_sites, 6) arrays that the library avoids); on numpy's own
summation order the library reproduces them bit for bit, the tests allow 1e-12 relative.
"""

from types import SimpleNamespace

import numpy as np
import pytest

from probeseq.exceptions import InputError
from probeseq.simulation.simulate import markov_sequences
from probeseq.statistics import agreement as agreement_mod
from probeseq.statistics import runs as runs_mod
from probeseq.statistics import shiftnull
from probeseq.statistics import summary as summary_mod
from probeseq.statistics.agreement import rod_agreement
from probeseq.statistics.markov import transition_counts_from_paths, transition_matrix
from probeseq.statistics.runs import decoded_runs, run_length_distribution, runs_expectation
from probeseq.statistics.summary import compute_statistics, statistics_from_arrays

RTOL = 1e-12


# ---------------------------------------------------------------------- plain numpy references
def ref_masked_paths(paths, mask=None):
    p = np.asarray(paths).astype(np.int64)
    return p if mask is None else np.where(mask, p, -1)


def ref_transition_counts(paths, k, mask=None):
    p = ref_masked_paths(paths, mask)
    n_rods = p.shape[0]
    rod = np.broadcast_to(np.arange(n_rods)[:, None], p.shape)
    v = p >= 0
    occ = np.bincount(rod[v] * k + p[v], minlength=n_rods * k).reshape(n_rods, k).astype(float)
    both = v[:, :-1] & v[:, 1:]
    a, b, rr = p[:, :-1][both], p[:, 1:][both], rod[:, :-1][both]
    tr = np.bincount((rr * k + a) * k + b, minlength=n_rods * k * k).reshape(n_rods, k, k).astype(float)
    return tr, occ


def ref_decoded_runs(paths, mask=None):
    p = ref_masked_paths(paths, mask)
    n_rods, n_sites = p.shape
    w = n_sites + 2
    pad = np.full((n_rods, w), -1, dtype=np.int64)
    pad[:, 1:-1] = p
    flat = pad.ravel()
    change = np.flatnonzero(flat[1:] != flat[:-1]) + 1
    starts = np.concatenate([[0], change])
    ends = np.concatenate([change, [flat.size]])
    keep = flat[starts] >= 0
    s, e = starts[keep], ends[keep]
    return dict(rod=s // w, start=s % w - 1, length=e - s, state=flat[s],
                left_truncated=flat[s - 1] < 0, right_truncated=flat[e] < 0)


def ref_runs_per_rod(paths, k, mask=None):
    p = ref_masked_paths(paths, mask)
    n_rods = p.shape[0]
    v = p >= 0
    seg_start = v.copy()
    seg_start[:, 1:] &= ~v[:, :-1]
    seg_id = np.cumsum(seg_start.ravel()).reshape(p.shape) - 1
    n_seg = int(seg_start.sum())
    out = [np.zeros((n_rods, k)) for _ in range(3)]
    if n_seg == 0:
        return out
    seg_rod = np.broadcast_to(np.arange(n_rods)[:, None], p.shape)[seg_start]
    sid = seg_id[v]
    n_tot = np.bincount(sid, minlength=n_seg).astype(float)
    both = v[:, :-1] & v[:, 1:]
    pair_seg = seg_id[:, :-1][both]
    for s in range(k):
        b = p == s
        n1 = np.bincount(sid, weights=b[v].astype(float), minlength=n_seg)
        ch = (b[:, :-1] != b[:, 1:])[both]
        r = 1.0 + np.bincount(pair_seg, weights=ch.astype(float), minlength=n_seg)
        mean, var = runs_expectation(n1, n_tot - n1)
        for o, val in zip(out, (r, mean, var)):
            o[:, s] = np.bincount(seg_rod, weights=val, minlength=n_rods)
    return out


def ref_lag_sums(x, m, i, j, lags, probabilities=False):
    x = np.where(m, np.asarray(x, float), 0.0)
    n_sites = x.shape[1]
    out = np.zeros((len(i), len(lags), 5))
    cnt = np.zeros((len(i), len(lags)))
    for li, d in enumerate(lags):
        if abs(d) >= n_sites:
            continue
        if d >= 0:
            sl_a, sl_b = slice(0, n_sites - d), slice(d, n_sites)
        else:
            sl_a, sl_b = slice(-d, n_sites), slice(0, n_sites + d)
        mm = m[i, sl_a] & m[j, sl_b]
        xa = np.where(mm, x[i, sl_a], 0.0)
        xb = np.where(mm, x[j, sl_b], 0.0)
        n = mm.sum(axis=1).astype(float)
        sx, sy = xa.sum(1), xb.sum(1)
        nn = np.maximum(n, 1.0)
        out[:, li, 0] = (xa * xb).sum(1) - sx * sy / nn
        out[:, li, 1] = (xa * xa).sum(1) - sx * sx / nn
        out[:, li, 2] = (xb * xb).sum(1) - sy * sy / nn
        if probabilities:
            out[:, li, 3] = (xa * (1.0 - xa)).sum(1)
            out[:, li, 4] = (xb * (1.0 - xb)).sum(1)
        cnt[:, li] = n
    return np.maximum(out, [-np.inf, 0.0, 0.0, 0.0, 0.0]), cnt


def ref_shift_null(x, m, i, j, lags, n_null, tmin, rng):
    """All pairs' centred circular sums for every shift at once, then gathered per replicate."""
    cen = agreement_mod._centred(agreement_mod._circular_raw(np.where(m, np.asarray(x, float), 0.0), m, i, j))
    p, n, _ = cen.shape
    flat = cen.reshape(p * n, 3)
    base = (np.arange(p) * n)[None, :, None]
    null = np.empty(n_null)
    chunk = max(1, int(4e6 // max(1, p * len(lags) * 3)))
    for c0 in range(0, n_null, chunk):
        c1 = min(n_null, c0 + chunk)
        shift = rng.integers(tmin, n - tmin + 1, size=(c1 - c0, p, 1))
        cs = flat[base + (shift + lags[None, None, :]) % n].sum(axis=1)
        with np.errstate(all="ignore"):
            null[c0:c1] = np.nanmax(agreement_mod._corr_from_sums(cs), axis=1)
    return null


# ---------------------------------------------------------------------- inputs
def grid_pairs(n):
    idx = np.arange(n * n).reshape(n, n)
    return np.concatenate([np.stack([idx[:, :-1].ravel(), idx[:, 1:].ravel()], axis=1),
                           np.stack([idx[:-1, :].ravel(), idx[1:, :].ravel()], axis=1)])


def decoded(rng, n_rods, n_sites, k=2, noise=0.2, dtype=np.float32, holes=True):
    """Paths with masked rod ends (and a few holes), near one-hot noisy posteriors, counts."""
    f = np.array([0.7, 0.3]) if k == 2 else np.full(k, 1.0 / k)
    path = markov_sequences(rng, n_rods, n_sites, f, 0.7)
    s = np.arange(n_sites)
    lo = rng.integers(0, n_sites // 8 + 1, n_rods)
    hi = n_sites - rng.integers(0, n_sites // 8 + 1, n_rods)
    mask = (s >= lo[:, None]) & (s < hi[:, None])
    if holes:
        mask &= rng.random(mask.shape) > 0.02
    e = rng.random((n_rods, n_sites, k)) ** 4 * noise
    onehot = np.eye(k)[path]
    post = (onehot + e) / (1.0 + e.sum(-1, keepdims=True))
    post = post.astype(dtype)
    vit = np.where(mask, path, -1).astype(np.int8)
    occ = (post.astype(float) * mask[..., None]).sum(1)
    tr, _ = transition_counts_from_paths(vit, k)
    return dict(per_rod_transitions=tr, per_rod_occupancy=occ, viterbi=vit, posteriors=post, mask=mask)


def assert_same_statistics(a, b, rtol=RTOL):
    assert a.estimates.keys() == b.estimates.keys()
    for key in a.estimates:
        np.testing.assert_allclose(a.estimates[key], b.estimates[key], rtol=rtol, atol=0, err_msg=key)
    assert a.replicates.keys() == b.replicates.keys()
    for key in a.replicates:
        np.testing.assert_allclose(a.replicates[key], b.replicates[key], rtol=rtol, atol=0, err_msg=key)
    assert a.n_sites_used == b.n_sites_used
    if a.rod_to_rod is not None:
        np.testing.assert_allclose(a.rod_to_rod.null, b.rod_to_rod.null, rtol=rtol, atol=0)
        np.testing.assert_allclose(a.rod_to_rod.pair_sums, b.rod_to_rod.pair_sums, rtol=rtol, atol=1e-12)
        np.testing.assert_array_equal(a.rod_to_rod.pair_confusion, b.rod_to_rod.pair_confusion)


# ---------------------------------------------------------------------- paths
@pytest.mark.parametrize("dtype", [np.int8, np.int16, np.int64, np.uint8])
def test_path_kernels_match_numpy_for_any_integer_dtype(rng, dtype):
    path = markov_sequences(rng, 30, 50, np.array([0.5, 0.3, 0.2]), 0.5).astype(dtype)
    mask = rng.random(path.shape) > 0.15
    mask[3] = False
    tr, occ = transition_counts_from_paths(path, 3, mask)
    ref_tr, ref_occ = ref_transition_counts(path, 3, mask)
    np.testing.assert_array_equal(tr, ref_tr)
    np.testing.assert_array_equal(occ, ref_occ)
    runs = decoded_runs(path, mask)
    for name, want in ref_decoded_runs(path, mask).items():
        got = getattr(runs, name)
        assert got.dtype == want.dtype, name
        np.testing.assert_array_equal(got, want, err_msg=name)
    for got, want in zip(runs_mod._runs_per_rod(path, 3, mask), ref_runs_per_rod(path, 3, mask)):
        np.testing.assert_allclose(got, want, rtol=RTOL, atol=0)


def test_run_length_tables_from_paths_equal_tables_from_listed_runs(rng):
    path = markov_sequences(rng, 40, 90, np.array([0.6, 0.4]), 0.8)
    vit = np.where(rng.random(path.shape) > 0.05, path, -1).astype(np.int8)
    tm, comp = np.array([[0.9, 0.1], [0.2, 0.8]]), np.array([0.6, 0.4])
    via_runs = run_length_distribution(decoded_runs(vit), 2, transmat=tm, composition=comp)
    direct = runs_mod._run_length_tables(*runs_mod._run_histograms(vit, 2), 2, tm, comp, None)
    for k in (0, 1):
        for key, want in via_runs[k].items():
            np.testing.assert_array_equal(direct[k][key], want, err_msg=key)


def test_used_states_and_argmax_do_not_depend_on_the_block_size(rng, monkeypatch):
    post = rng.random((23, 17, 3)).astype(np.float32)
    mask = rng.random((23, 17)) > 0.2
    vit = rng.integers(-1, 3, size=(23, 17)).astype(np.int16)
    full_arg = summary_mod._argmax_states(post)
    full_used = summary_mod._used_states(vit, mask, 3)
    monkeypatch.setattr(agreement_mod, "_BLOCK_BYTES", 8 * 17 * 2)  # two rods per block
    np.testing.assert_array_equal(summary_mod._argmax_states(post), full_arg)
    np.testing.assert_array_equal(full_arg, np.argmax(post, axis=2))
    used, top = summary_mod._used_states(vit, mask, 3)
    assert used.dtype == np.int8 and top == full_used[1]
    np.testing.assert_array_equal(used, full_used[0])
    np.testing.assert_array_equal(used, np.where(mask & (vit >= 0), vit, -1))


# ---------------------------------------------------------------------- rod-to-rod sums
@pytest.mark.parametrize("n_sites", [5, 40, 129, 301])
def test_lag_sums_match_numpy(rng, n_sites):
    x = rng.random((12, n_sites)).astype(np.float32)
    m = rng.random(x.shape) > 0.1
    i, j = np.array([0, 1, 2, 5, 7, 3]), np.array([1, 4, 3, 6, 11, 3])
    lags = np.arange(-6, 7)
    for probs in (True, False):
        got, cnt = agreement_mod._lag_sums(x, m, i, j, lags, probabilities=probs)
        want, want_cnt = ref_lag_sums(x, m, i, j, lags, probabilities=probs)
        np.testing.assert_array_equal(cnt, want_cnt)
        np.testing.assert_allclose(got, want, rtol=RTOL, atol=1e-13)


def test_pairwise_plan_covers_every_value_once():
    for n in (1, 7, 8, 128, 129, 1000, 2497):
        plan = agreement_mod._pairwise_plan(n)
        pieces = plan[plan[:, 0] >= 0]
        assert pieces[0, 0] == 0 and np.all(pieces[1:, 0] == np.cumsum(pieces[:-1, 1]))
        assert pieces[:, 1].sum() == n and pieces[:, 1].max() <= 128
        assert (plan[:, 0] < 0).sum() == len(pieces) - 1


def null_inputs(rng, n_sites, masks, n_side=32):
    """Values, masks and the pairs of a square grid: ``masks`` 'sites' (each site used with
    probability 0.9: many short runs) or 'runs' (rod ends cut, a few gaps, two rods unused)."""
    x = rng.random((n_side * n_side, n_sites))
    if masks == "sites":
        m = rng.random(x.shape) > 0.1
    else:
        s = np.arange(n_sites)
        lo = rng.integers(0, n_sites // 6 + 1, len(x))
        hi = n_sites - rng.integers(0, n_sites // 6 + 1, len(x))
        m = (s >= lo[:, None]) & (s < hi[:, None]) & (rng.random(x.shape) > 0.03)
        m[[5, 40]] = False
    nb = grid_pairs(n_side)[:-1]
    return x, m, nb[:, 0].copy(), nb[:, 1].copy()


def ref_null_sums(x, m, i, j, lags, shifts):
    """Direct centred sums of every pair at every drawn shift + lag, summed over pairs in long
    double: (n_null, n_lags, 3)."""
    xa = np.where(m, x, 0.0).astype(np.longdouble)
    mm = m.astype(np.longdouble)
    p, n = len(i), x.shape[1]
    raw = np.empty((p, n, 6), dtype=np.longdouble)
    for t in range(n):  # site s of rod i against site (s + t) mod n of rod j
        mj, aj = np.roll(mm[j], -t, axis=1), np.roll(xa[j], -t, axis=1)
        for c, (u, v) in enumerate(((mm[i], mj), (xa[i], mj), (mm[i], aj), (xa[i] ** 2, mj), (mm[i], aj ** 2),
                                    (xa[i], aj))):
            raw[:, t, c] = (u * v).sum(axis=1)
    nn = np.maximum(raw[..., 0], 1)
    sx, sy = raw[..., 1], raw[..., 2]
    cen = np.stack([raw[..., 5] - sx * sy / nn, np.maximum(raw[..., 3] - sx * sx / nn, 0),
                    np.maximum(raw[..., 4] - sy * sy / nn, 0)], axis=-1)
    t = (shifts.T[:, :, None] + np.asarray(lags)[None, None, :]) % n  # (n_null, p, n_lags)
    return cen[np.arange(p)[None, :, None], t].sum(axis=1)


@pytest.mark.parametrize("n_sites,masks", [(60, "sites"), (59, "sites"), (74, "runs"), (59, "runs"), (60, "runs"),
                                           (3, "sites")])
@pytest.mark.parametrize("method", ["runs", "transforms"])
def test_shift_null_sums_match_direct_sums(rng, n_sites, masks, method):
    # both ways to the mask sums, on many-run and few-run masks (unused rods included), fast (60)
    # and slow (59 prime, 74 = 2 x 37: linear sums folded back) transform lengths, and shifts
    # that wrap (lags past the rod's end) and do not
    x, m, i, j = null_inputs(rng, n_sites, masks, n_side=12)
    n_null = 23
    for lags, lo, hi in ((np.arange(-3, 4), n_sites // 10 + 3, n_sites - n_sites // 10 - 3),
                         (np.array([-2, 0, 5]), 0, n_sites)):
        shifts = rng.integers(lo, max(lo, hi - 1) + 1, size=(len(i), n_null)).astype(np.int32)
        want = ref_null_sums(x, m, i, j, lags, shifts).astype(float)
        got = shiftnull.shift_null_sums(x, m, i, j, lags, shifts, method=method)
        assert got.shape == (n_null, len(lags), 3)
        # the sums straddle 0 (cross sums) or are large (squares): compared at the scale of the
        # sums of squares; rounding is about 1e-15 of it, a wrong shift or run 1e-2 or more
        scale = want[..., 1:].max()
        np.testing.assert_allclose(got, want, rtol=0, atol=1e-12 * scale)
        # threads and block sizes change no bit
        again = shiftnull.shift_null_sums(x, m, i, j, lags, shifts, threads=2, block_bytes=1, method=method)
        np.testing.assert_array_equal(again, got)


@pytest.mark.parametrize("n_sites,masks", [(60, "sites"), (59, "sites"), (74, "runs")])
def test_blocked_shift_null_matches_all_pairs_at_once(rng, monkeypatch, n_sites, masks):
    # ~2000 pairs: the offsets are drawn in several replicate chunks, as in the unblocked form;
    # 60 sites is a fast FFT length, 59 (prime) and 74 (2 x 37) take the padded linear sums folded
    # back to circular ones
    x, m, i, j = null_inputs(rng, n_sites, masks)
    lags = np.arange(-3, 4)
    want = ref_shift_null(x, m, i, j, lags, 199, 7, np.random.default_rng(5))
    assert int(4e6 // (len(i) * 21)) < 199
    import scipy.fft

    assert (scipy.fft.next_fast_len(n_sites, real=True) == n_sites) == (n_sites == 60)
    # the null correlations straddle 0: their rounding (the reference's FFTs included, about
    # 1e-14 of the largest |value| from exact sums) is compared with the largest value
    atol = 1e-12 * np.abs(want).max()
    got = agreement_mod._shift_null(x, m, i, j, lags, 199, 7, np.random.default_rng(5))
    np.testing.assert_allclose(got, want, rtol=RTOL, atol=atol)
    # the smallest blocks, one thread or two, and a cache of one rod (most rods transformed again
    # for each block) give the same answer, bit for bit; either way to the mask sums, up to rounding
    monkeypatch.setattr(agreement_mod, "_BLOCK_BYTES", 1)
    for threads in (1, 2):
        monkeypatch.setattr(agreement_mod, "_stat_threads", lambda t=threads: t)
        np.testing.assert_array_equal(agreement_mod._shift_null(x, m, i, j, lags, 199, 7, np.random.default_rng(5)),
                                      got)
    monkeypatch.setattr(shiftnull, "_CACHE_BYTES", 1)
    np.testing.assert_array_equal(agreement_mod._shift_null(x, m, i, j, lags, 199, 7, np.random.default_rng(5)), got)
    forced = shiftnull.shift_null_sums
    for method in ("runs", "transforms"):
        monkeypatch.setattr(agreement_mod, "shift_null_sums", lambda *a, _m=method, **k: forced(*a, **k, method=_m))
        np.testing.assert_allclose(agreement_mod._shift_null(x, m, i, j, lags, 199, 7, np.random.default_rng(5)), got,
                                   rtol=RTOL, atol=atol)


def test_mask_runs_match_numpy(rng):
    m = rng.random((40, 37)) > 0.4
    m[3] = False
    m[4] = True
    m[5, ::2] = True
    ptr, lo, hi = shiftnull.mask_runs(m)
    for r in range(len(m)):
        pad = np.concatenate([[False], m[r], [False]]).astype(np.int8)
        want_lo = np.flatnonzero(np.diff(pad) == 1)
        want_hi = np.flatnonzero(np.diff(pad) == -1)
        np.testing.assert_array_equal(lo[ptr[r]:ptr[r + 1]], want_lo)
        np.testing.assert_array_equal(hi[ptr[r]:ptr[r + 1]], want_hi)


@pytest.mark.parametrize("t0,w", [(0, 31), (4, 20), (30, 1)])
def test_sums_from_runs_match_numpy(rng, t0, w):
    # one pair's N, Sx, Sy, Sxx, Syy at shifts t0 .. t0 + w - 1 from the rods' runs and prefix sums
    n = 31
    x = rng.random((2, n)).astype(np.float32)
    m = rng.random((2, n)) > 0.3
    m[0, :3] = True
    m[1, -2:] = True  # runs touching the rods' ends
    ptr, lo, hi = shiftnull.mask_runs(m)
    pre, cen = np.empty((2, 5, n + 1)), np.empty((2, 2))
    shiftnull._rod_inputs(x, m, np.arange(2), np.empty((2, 1, n)), pre, cen, np.arange(2))
    out = np.full((6, w), np.nan)
    shiftnull._sums_from_runs(n, t0, lo, hi, ptr[0], ptr[1], ptr[1], ptr[2], pre[0], pre[1], cen[0], cen[1], out)
    a = np.where(m, x.astype(float), 0.0)
    for u in range(w):
        mj, aj = np.roll(m[1], -(t0 + u)), np.roll(a[1], -(t0 + u))
        want = [np.sum(m[0] * mj), np.sum(a[0] * mj), np.sum(m[0] * aj), np.sum(a[0] ** 2 * mj), np.sum(m[0] * aj ** 2)]
        np.testing.assert_allclose(out[:5, u], want, rtol=1e-13, atol=1e-13)
    assert np.isnan(out[5]).all()


def test_pair_schedule_gives_every_pair_its_rods_and_transforms_lattice_rods_once(rng):
    n_side = 20
    nb = grid_pairs(n_side)
    perm = rng.permutation(n_side * n_side)  # rods numbered without regard to the lattice
    i, j = perm[nb[:, 0]], perm[nb[:, 1]]
    order = shiftnull._pair_order(i, j, n_side * n_side)
    np.testing.assert_array_equal(np.sort(order), np.arange(len(i)))
    for max_slots, once in ((10**6, True), (5, False)):
        capacity, blocks = shiftnull._schedule(i, j, order, n_side * n_side, 16, max_slots)
        assert capacity <= max_slots
        held = {}
        done = []
        for sel, new, new_slots, si, sj in blocks:
            held.update(zip(new_slots.tolist(), new.tolist()))
            assert [held[s] for s in si.tolist()] == i[sel].tolist()
            assert [held[s] for s in sj.tolist()] == j[sel].tolist()
            done.append(sel)
        np.testing.assert_array_equal(np.concatenate(done), order)
        n_new = sum(len(b[1]) for b in blocks)
        assert (n_new == n_side * n_side) == once
        if once:
            assert capacity < 4 * n_side  # a band of the lattice, not every rod


def test_mask_sums_from_runs_are_chosen_for_few_runs_only(rng):
    n = 2000
    s = np.arange(n)
    few = (s >= 100) & (s < 1900) & ((s < 700) | (s >= 760))
    many = rng.random(n) > 0.1
    i, j = np.arange(0, 99), np.arange(1, 100)
    for m, want in ((np.tile(few, (100, 1)), True), (np.tile(many, (100, 1)), False)):
        ptr = shiftnull.mask_runs(m)[0]
        assert shiftnull._use_runs(ptr, i, j, n, shiftnull.transform_length(n)) == want


def test_agreement_on_strided_float32_values_equals_float64_copy(rng):
    post = rng.random((16, 80, 2)).astype(np.float32)
    mask = rng.random((16, 80)) > 0.1
    states = np.where(mask, np.argmax(post, axis=2), -1).astype(np.int8)
    nb = grid_pairs(4)
    a = rod_agreement(post[:, :, 1], mask, nb, states=states, n_states=2, n_null=19, rng=3)
    b = rod_agreement(post[:, :, 1].astype(np.float64), mask, nb, states=states.astype(np.int64), n_states=2,
                        n_null=19, rng=3)
    for name in ("corr_lags", "null", "pair_sums", "pair_confusion", "corr_corrected_lags"):
        np.testing.assert_array_equal(getattr(a, name), getattr(b, name), err_msg=name)
    assert (a.p_value, a.kappa, a.p_nonneighbour) == (b.p_value, b.kappa, b.p_nonneighbour)


def test_agreement_bad_input_raises_input_error(rng):
    x = rng.random((4, 30))
    m = np.ones(x.shape, bool)
    with pytest.raises(InputError, match="values must be"):
        rod_agreement(x[0], m[0], [[0, 1]])
    with pytest.raises(InputError, match="mask shape"):
        rod_agreement(x, m[:, :20], [[0, 1]])
    with pytest.raises(InputError, match="states hold state 2"):
        rod_agreement(x, m, [[0, 1]], states=np.full((4, 30), 2), n_states=2, n_null=0)


# ---------------------------------------------------------------------- the whole statistics
def test_float32_posteriors_and_small_int_paths_give_the_float64_int64_answer(rng):
    d = decoded(rng, 36, 120, dtype=np.float64)
    nb = grid_pairs(6)
    kw = dict(metals=("Co", "Zn"), pitch_nm=0.2, neighbours=nb, n_boot=30, n_null=39, random_state=9)
    d32 = dict(d, posteriors=d["posteriors"].astype(np.float32))
    st32 = statistics_from_arrays(**kw, **d32)
    # float32 posteriors and int8 paths are read as they are, summed in float64: exactly the
    # answer for their float64 / int64 copies
    wide = dict(d32, posteriors=d32["posteriors"].astype(np.float64), viterbi=d["viterbi"].astype(np.int64))
    assert_same_statistics(st32, statistics_from_arrays(**kw, **wide), rtol=0)
    # against the posteriors before rounding to float32: equal within the rounding (~6e-8)
    st64 = statistics_from_arrays(**kw, **d)
    for key, v in st64.estimates.items():
        assert st32.estimates[key] == pytest.approx(v, rel=1e-5, abs=1e-7, nan_ok=True), key


def test_statistics_without_viterbi_or_posteriors_match_explicit_inputs(rng):
    d = decoded(rng, 25, 90, k=3, holes=False)
    kw = dict(metals=("Co", "Zn", "Ni"), pitch_nm=0.2, neighbours=grid_pairs(5), n_boot=20, n_null=9,
              random_state=2)
    vit_from_post = np.where(d["mask"], np.argmax(d["posteriors"], axis=2), -1)
    a = statistics_from_arrays(**kw, **dict(d, viterbi=None))
    b = statistics_from_arrays(**kw, **dict(d, viterbi=vit_from_post))
    assert_same_statistics(a, b, rtol=0)
    # without posteriors the agreement uses the decoded indicator of the least abundant metal
    c = statistics_from_arrays(**kw, **dict(d, posteriors=None))
    least = c.least_abundant
    rr = rod_agreement((d["viterbi"] == least).astype(float), d["viterbi"] >= 0, grid_pairs(5), metal=least,
                         states=d["viterbi"], n_states=3, n_null=9, rng=np.random.default_rng(2))
    assert c.rod_to_rod.corr_lags.tolist() == rr.corr_lags.tolist()


def test_compute_statistics_counts_int8_paths_from_float32_posteriors(rng):
    d = decoded(rng, 20, 60)
    res = SimpleNamespace(metals=("Co", "Zn"), pitch_nm=0.2, posteriors=d["posteriors"], mask=d["mask"])
    with pytest.warns(Warning, match="expected transition counts"):
        st = compute_statistics(res, n_boot=10, random_state=0)
    tr, _ = ref_transition_counts(np.argmax(d["posteriors"], axis=2), 2, d["mask"])
    np.testing.assert_allclose(st.transmat, transition_matrix(tr.sum(0)))


def test_viterbi_state_out_of_range_at_a_used_site_is_an_input_error(rng):
    d = decoded(rng, 6, 30)
    vit = d["viterbi"].copy()
    masked = np.argwhere(~d["mask"])
    vit[tuple(masked[0])] = 7  # ignored: the site is masked
    kw = dict(metals=("Co", "Zn"), pitch_nm=0.2, n_boot=10, n_null=0, mask=d["mask"],
              per_rod_transitions=d["per_rod_transitions"], per_rod_occupancy=d["per_rod_occupancy"])
    statistics_from_arrays(viterbi=vit, **kw)
    used = np.argwhere(d["mask"])
    vit[tuple(used[0])] = 5
    with pytest.raises(InputError, match="viterbi holds state 5"):
        statistics_from_arrays(viterbi=vit, **kw)


def test_agreement_skips_non_finite_values_as_masked_sites(rng):
    x = rng.random((9, 70))
    mask = rng.random(x.shape) > 0.1
    bad = rng.random(x.shape) < 0.05
    nb = grid_pairs(3)
    with_nan = rod_agreement(np.where(bad, np.nan, x), mask, nb, n_null=19, rng=1)
    masked = rod_agreement(x, mask & ~bad, nb, n_null=19, rng=1)
    for name in ("corr_lags", "corr_corrected_lags", "null", "pair_sums"):
        np.testing.assert_array_equal(getattr(with_nan, name), getattr(masked, name), err_msg=name)
    assert with_nan.n_sites_compared == masked.n_sites_compared
