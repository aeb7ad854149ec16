"""The oracle decoder of ``tests/benchmarks/oracle.py`` (used by ``bench_oracle.py``) on tiny cases:
its posteriors against brute-force enumeration of every hidden sequence, its peak model against
the simulator's draws, and its decode of a tiny simulated run.
"""

import importlib.util
import itertools
from pathlib import Path

import numpy as np
import pytest

_PATH = Path(__file__).parent / "benchmarks" / "oracle.py"
_SPEC = importlib.util.spec_from_file_location("probeseq_bench_oracle", _PATH)
oracle = importlib.util.module_from_spec(_SPEC)
_SPEC.loader.exec_module(oracle)


def _brute_force(log_em, transmat, start, copy_error=None, composition=None):
    """Site marginals by summing the joint probability over every hidden configuration.

    Independent rods when ``copy_error`` is None, else rods copying one master chain.
    """
    n_rods, n_sites, k = log_em.shape
    em = np.exp(log_em)
    post = np.zeros_like(em)
    if copy_error is None:
        for r in range(n_rods):
            for path in itertools.product(range(k), repeat=n_sites):
                p = start[path[0]] * np.prod([transmat[a, b] for a, b in zip(path[:-1], path[1:])])
                p *= np.prod([em[r, t, path[t]] for t in range(n_sites)])
                for t in range(n_sites):
                    post[r, t, path[t]] += p
    else:
        c = (1 - copy_error) * np.eye(k) + copy_error * np.tile(composition, (k, 1))
        for master in itertools.product(range(k), repeat=n_sites):
            pm = start[master[0]] * np.prod([transmat[a, b] for a, b in zip(master[:-1], master[1:])])
            for rods in itertools.product(range(k), repeat=n_rods * n_sites):
                s = np.array(rods).reshape(n_rods, n_sites)
                p = pm
                for r in range(n_rods):
                    for t in range(n_sites):
                        p *= c[master[t], s[r, t]] * em[r, t, s[r, t]]
                for r in range(n_rods):
                    for t in range(n_sites):
                        post[r, t, s[r, t]] += p
    return post / post.sum(axis=2, keepdims=True)


def _chain(k, rng):
    p = rng.random((k, k)) + 0.2
    p /= p.sum(axis=1, keepdims=True)
    w, v = np.linalg.eig(p.T)
    f = np.real(v[:, np.argmin(np.abs(w - 1))])
    return p, f / f.sum()


def test_independent_chain_matches_enumeration(rng):
    p, f = _chain(3, rng)
    log_em = rng.normal(0, 2, (2, 4, 3))
    log_em[0, 1] = 0.0  # a site with no observation
    got = oracle.chain_posteriors(log_em, p, f)
    np.testing.assert_allclose(got, _brute_force(log_em, p, f), atol=1e-12)


@pytest.mark.parametrize("k,n_rods,n_sites,copy_error", [(2, 2, 3, 0.2), (3, 2, 2, 0.1), (2, 3, 2, 0.0)])
def test_copied_posterior_matches_enumeration(rng, k, n_rods, n_sites, copy_error):
    p, f = _chain(k, rng)
    comp = rng.random(k) + 0.3
    comp /= comp.sum()
    log_em = rng.normal(0, 1.5, (n_rods, n_sites, k))
    log_em[0, -1] = 0.0  # outside the specimen: no observation
    got = oracle.copied_posteriors(log_em, p, f, copy_error, comp)
    np.testing.assert_allclose(got, _brute_force(log_em, p, f, copy_error, comp), atol=1e-12)


def test_peak_model_matches_simulator_draws():
    from probeseq.simulation.emission import _draw_mass_to_charge
    from probeseq.simulation.simulate import SimConfig

    cfg = SimConfig(metals=("Mg", "Zn"), mrp=300.0, tail_fraction=0.5, tail_scale=2.0)
    pos, wt, owner = oracle.metal_lines(cfg)
    np.testing.assert_allclose(np.bincount(owner, wt), 1.0, atol=1e-12)
    sel = owner == 1
    lines = [(pos[sel], wt[sel] / wt[sel].sum())]
    draws = np.sort(_draw_mass_to_charge(cfg, np.random.default_rng(5), np.zeros(100_000, int), lines))
    grid = np.linspace(draws[0] - 1, draws[-1] + 1, 120_001)
    dens = np.exp(oracle.metal_log_likelihood(cfg, grid)[:, 1])
    cdf = np.concatenate([[0.0], np.cumsum(0.5 * (dens[1:] + dens[:-1]) * np.diff(grid))])
    assert abs(cdf[-1] - 1.0) < 1e-3
    model = np.interp(draws, grid, cdf)
    empirical = np.arange(1, draws.size + 1) / draws.size
    # Kolmogorov-Smirnov distance; 1.63 / sqrt(n) = 0.0052 is its 1 % critical value (recalled from memory)
    assert np.max(np.abs(model - empirical)) < 0.006


def test_oracle_on_a_tiny_copied_run():
    from probeseq.simulation.simulate import simulate_run

    run = simulate_run(pattern="copied", metals=("Co", "Zn"), composition=(0.4, 0.6), copy_error=0.05,
                       top_radius_nm=3.0, depth_nm=6.0, eta=0.5, seed=11)
    post = oracle.oracle_posteriors(run)
    assert post.shape == run.seq.shape + (2,)
    np.testing.assert_allclose(post.sum(axis=2), 1.0, atol=1e-9)
    own = np.zeros(run.seq.shape, bool)
    m = run.ion_rod >= 0
    own[run.ion_rod[m], run.ion_site[m]] = True
    # Co and Zn lines do not overlap: a detected site is decoded right unless the pooled rods
    # outvote its own ion (only where the rod's site is a copy error)
    assert oracle.oracle_accuracy(run, post, own) > 0.97
    # pooling the rods beats decoding each rod alone with the master chain's matrix
    alone = oracle.chain_posteriors(oracle.site_log_emissions(run), run.config.transmat, run.config.composition_array)
    assert oracle.oracle_accuracy(run, post) > oracle.oracle_accuracy(run, alone) + 0.1


def test_data_limit_is_the_oracle_where_no_line_is_shared_and_below_it_where_fragments_hide_a_metal():
    # Co and Zn lines share no range with the default fragments: knowing which ion is a site's own
    # adds almost nothing, so the decode that must tell own ions from the rest by their density
    # reaches the oracle. Mg's lines sit under carbon-rich fragments' lines: there it cannot.
    from probeseq.simulation.simulate import simulate_run

    kw = dict(pattern="short-repeat", top_radius_nm=5.0, depth_nm=12.0, eta=0.6, sigma_xy_nm=0.12)
    run = simulate_run(metals=("Co", "Zn"), composition=(0.45, 0.55), seed=12, **kw)
    inside = run.seq >= 0
    a = oracle.oracle_accuracy(run, oracle.oracle_posteriors(run), inside)
    b = oracle.oracle_accuracy(run, oracle.data_limit_posteriors(run), inside)
    assert abs(a - b) < 0.01, (a, b)
    run = simulate_run(metals=("Mg", "Zn"), composition=(0.45, 0.55), fragments="carbon-rich", seed=12, **kw)
    inside = run.seq >= 0
    a = oracle.oracle_accuracy(run, oracle.oracle_posteriors(run), inside)
    b = oracle.oracle_accuracy(run, oracle.data_limit_posteriors(run), inside)
    c = oracle.oracle_accuracy(run, oracle.data_limit_posteriors(run, lateral=False, axial=False), inside)
    assert b < a - 0.005 and c < b - 0.005, (a, b, c)  # the ions' place near the axis is part of the evidence


def test_sharing_an_ion_between_its_nearest_rods_recovers_crowded_lattices_and_leaves_others():
    # honeycomb d_nn 0.5 nm with 0.2 nm blur: a large share of the own ions land nearer a neighbour;
    # reading every ion as evidence for each nearby site, against the extras and the other sites'
    # own ions, gets many of them back. Where rods are far apart nothing changes.
    from probeseq.simulation.simulate import simulate_run

    kw = dict(pattern="random", metals=("Co", "Ni", "Zn"), top_radius_nm=4.0, depth_nm=8.0, eta=0.6, sigma_xy_nm=0.2)
    run = simulate_run(packing="honeycomb", a_nm=1.5, seed=6, **kw)
    inside = run.seq >= 0
    plain = oracle.oracle_accuracy(run, oracle.data_limit_posteriors(run), inside)
    shared = oracle.oracle_accuracy(run, oracle.data_limit_shared_posteriors(run), inside)
    assert shared > plain + 0.03, (plain, shared)
    run = simulate_run(packing="honeycomb", a_nm=2.6, seed=6, **{**kw, "sigma_xy_nm": 0.1})
    inside = run.seq >= 0
    plain = oracle.oracle_accuracy(run, oracle.data_limit_posteriors(run), inside)
    shared = oracle.oracle_accuracy(run, oracle.data_limit_shared_posteriors(run), inside)
    assert abs(shared - plain) < 0.005, (plain, shared)
