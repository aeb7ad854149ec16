"""Oracle decoder of simulated runs: the information limit of the data of a run.

The oracle decodes the same sites the simulator made (``SimRun.seq``), but it is given what no
analysis of the ion file can know: which ion is the own ion of which site (``SimRun.ion_rod`` and
``SimRun.ion_site``) and the true generative model of the run (``SimRun.config``). What it must
still infer is the metal of every site, from the same two sources of evidence a decoder has:

* **the own ion of the site.** A site is detected with probability ``eta`` whatever its metal, so
  an undetected site carries no evidence on its metal, and a detected one carries the likelihood
  of its mass-to-charge ``y`` under each metal. With ``b_j`` the branching into the metal's forms
  (M+, M2+, MO+[, M3+]) and ``w_ji`` the natural abundance of isotope line ``L_ji`` of form j,

  ``P(no ion | k) = 1 - eta``,
  ``P(ion at y | k) = eta * sum_j b_j sum_i w_ji g(y; L_ji)``,

  where ``g`` is the simulator's peak: a Gaussian of FWHM ``L / mrp`` (``sigma = L / (2.3548
  mrp)``), and with probability ``tail_fraction`` the same Gaussian convolved with an exponential
  tail towards high mass of mean ``tau = tail_scale * L / mrp`` (an exponentially modified
  Gaussian). Ions of ambiguous mass-to-charge (lines of two metals that overlap, or a tail
  reaching a neighbouring line) therefore stay ambiguous. Linker and background ions are not
  given to any site (the oracle knows they are not metal).
* **the chain.** Along a rod the metals follow the true transition matrix ``P`` (``cfg.transmat``)
  started from the composition ``f`` at the first site of the simulator's grid (the simulator's
  start; ``f`` is the stationary distribution of ``P``). For ``copied`` runs the sites of all rods
  at the same index t share a master metal ``m_t`` that follows ``P``; each rod's site copies it
  or, with probability ``c = copy_error``, is an independent draw from ``f``:
  ``C[m, k] = P(s_rt = k | m_t = m) = (1 - c) [m = k] + c f_k``.

Posteriors (exact, by forward-backward in log space; ``l_rt(k) = log P(o_rt | k)``, 0 at sites
outside the specimen, where there is no observation):

* independent rods: ``P(s_rt = k | O_r)`` by forward-backward of each rod over all sites of the
  grid with emission ``exp(l_rt(k))``.
* copied rods: the children ``s_rt`` of ``m_t`` are independent given ``m_t``, so summing them
  out gives the master emission ``E_t(m) = prod_r e_rt(m)``, ``e_rt(m) = sum_k C[m, k]
  exp(l_rt(k))``. Forward-backward on the master chain gives the predicted ``a_t(m) = P(m_t |
  O_<t)`` and the backward ``b_t(m) = P(O_>t | m_t)`` (O_<t: the sites of every rod before t).
  Leaving out rod r at t, ``P(m_t = m | O without o_rt) ~ a_t(m) b_t(m) E_t(m) / e_rt(m)``, and

  ``P(s_rt = k | O) ~ exp(l_rt(k)) sum_m C[m, k] P(m_t = m | O without o_rt)``.

The oracle's decode is the argmax of the posterior per site (the decode of least expected site
errors, recalled from memory); its accuracy is the share of inside sites (true state >= 0) it gets right.

The only approximation: the simulator scales the tail of an ion by its Gaussian-blurred
mass-to-charge, the oracle by the line position ``L``; the two scales differ by about
``1 / (2.3548 mrp)`` (relative; 7e-4 at mrp 600).
"""

from __future__ import annotations

import math

import numpy as np
from scipy.special import log_ndtr, logsumexp

from probeseq.simulation.emission import METAL_FORMS, ion_lines

__all__ = ["FWHM_PER_SIGMA", "metal_lines", "peak_log_density", "metal_log_likelihood", "site_log_emissions",
           "chain_posteriors", "copied_posteriors", "oracle_posteriors", "oracle_correct", "oracle_accuracy",
           "data_limit_posteriors", "data_limit_shared_posteriors"]

#: FWHM / sigma of a Gaussian as the simulator writes it: 2 sqrt(2 ln 2) (recalled from memory) rounded to 2.3548
FWHM_PER_SIGMA = 2.3548

_LOG_SQRT_2PI = 0.5 * math.log(2.0 * math.pi)


def metal_lines(cfg):
    """Isotope lines of every metal's species, weighted by the branching into the species.

    Parameters
    ----------
    cfg : SimConfig
        The run's configuration (``metals``, ``branching``).

    Returns
    -------
    position : (n_lines,) ndarray of float, Da
        Mass-to-charge of each line.
    weight : (n_lines,) ndarray of float
        Probability of the line given its metal (branching times isotope abundance); the weights of
        one metal add up to 1.
    metal : (n_lines,) ndarray of int
        Index of the line's metal in ``cfg.metals``.
    """
    branching = np.asarray(cfg.branching, float)
    branching = branching / branching.sum()
    pos, wt, owner = [], [], []
    for k, el in enumerate(cfg.metals):
        for (form, charge), b in zip(METAL_FORMS[:branching.size], branching):
            if b <= 0:
                continue
            mz, p = ion_lines(form(el), charge)
            pos.append(np.asarray(mz, float))
            wt.append(b * np.asarray(p, float))
            owner.append(np.full(len(mz), k))
    return np.concatenate(pos), np.concatenate(wt), np.concatenate(owner)


def peak_log_density(y, line, mrp, tail_fraction, tail_scale):
    """Log density of the simulator's peak shape of one isotope line.

    Parameters
    ----------
    y : ndarray of float, Da
        Mass-to-charge values (broadcast against ``line``).
    line : ndarray of float, Da
        Line positions.
    mrp : float
        Mass resolving power ``m / FWHM`` (dimensionless).
    tail_fraction : float
        Share of ions with a thermal tail.
    tail_scale : float
        Mean tail length in units of ``line / mrp``.

    Returns
    -------
    ndarray of float, log(1/Da)
        ``log[(1 - t) N(y; L, s) + t EMG(y; L, s, tau)]`` with ``s = L / (2.3548 mrp)`` and
        ``tau = tail_scale L / mrp``.
    """
    y = np.asarray(y, float)
    line = np.asarray(line, float)
    s = line / mrp / FWHM_PER_SIGMA
    d = y - line
    log_gauss = -0.5 * (d / s) ** 2 - np.log(s) - _LOG_SQRT_2PI
    if tail_fraction <= 0 or tail_scale <= 0:
        return log_gauss
    tau = tail_scale * line / mrp
    # exponentially modified Gaussian, the density of N(L, s^2) plus an exponential of mean tau
    # (recalled from memory; checked against the simulator's draws in tests/test_oracle.py):
    # (1/tau) exp(s^2/(2 tau^2) - d/tau) Phi(d/s - s/tau)
    log_emg = -np.log(tau) + 0.5 * (s / tau) ** 2 - d / tau + log_ndtr(d / s - s / tau)
    if tail_fraction >= 1:
        return log_emg
    return np.logaddexp(math.log1p(-tail_fraction) + log_gauss, math.log(tail_fraction) + log_emg)


def metal_log_likelihood(cfg, mz, chunk: int = 20000):
    """Log likelihood of each ion's mass-to-charge under each metal, ``log p(y | metal k)``.

    Parameters
    ----------
    cfg : SimConfig
        The run's configuration (metals, branching, mrp, tail).
    mz : (n,) array of float, Da
        Mass-to-charge of the ions.
    chunk : int
        Ions per block (bounds the memory of the ions x lines table).

    Returns
    -------
    (n, K) ndarray of float, log(1/Da)
    """
    pos, wt, owner = metal_lines(cfg)
    k = len(cfg.metals)
    mz = np.asarray(mz, float)
    out = np.empty((mz.size, k))
    log_w = np.log(wt)
    for a in range(0, mz.size, chunk):
        y = mz[a:a + chunk, None]
        lp = peak_log_density(y, pos[None, :], cfg.mrp, cfg.tail_fraction, cfg.tail_scale) + log_w[None, :]
        for m in range(k):
            out[a:a + chunk, m] = logsumexp(lp[:, owner == m], axis=1)
    return out


def site_log_emissions(run):
    """Log probability of each site's observation given its metal, ``l_rt(k) = log P(o_rt | k)``.

    Parameters
    ----------
    run : SimRun

    Returns
    -------
    (n_rods, n_sites, K) ndarray of float
        ``log(1 - eta)`` at inside sites without an own ion, ``log eta + log p(y | k)`` at sites
        with one, 0 outside the specimen (no observation).

    Raises
    ------
    ValueError
        When a site has more than one own ion or an own ion sits at a site outside the specimen
        (the simulator makes neither; the oracle's emission would be wrong).

    Notes
    -----
    ``P(no ion)`` does not depend on the metal, so a detection efficiency that varies with the
    position (``edge_efficiency``) changes the emission of every metal by the same factor and
    leaves the posterior unchanged.
    """
    cfg = run.config
    seq = np.asarray(run.seq)
    n_rods, n_sites = seq.shape
    k = len(cfg.metals)
    inside = seq >= 0
    out = np.zeros((n_rods, n_sites, k))
    out[inside] = math.log1p(-cfg.eta) if cfg.eta < 1 else -np.inf
    own = np.flatnonzero(np.asarray(run.ion_rod) >= 0)
    r = np.asarray(run.ion_rod)[own].astype(np.int64)
    s = np.asarray(run.ion_site)[own].astype(np.int64)
    if np.unique(r * n_sites + s).size != own.size:
        raise ValueError("a site has more than one own ion; the oracle assumes at most one")
    if own.size and not inside[r, s].all():
        raise ValueError("an own ion belongs to a site outside the specimen")
    mz = np.asarray(run.ions.mass_to_charge, float)[own]
    out[r, s] = math.log(cfg.eta) + metal_log_likelihood(cfg, mz)
    return out


def _forward_backward(log_em, log_a, log_start):
    """Forward-backward in log space for a batch of chains of one transition matrix.

    Parameters
    ----------
    log_em : (n, T, K) ndarray of float
        Log emission of each chain, step and state.
    log_a : (K, K) ndarray of float
        Log transition matrix (``-inf`` for impossible transitions).
    log_start : (K,) ndarray of float
        Log distribution of the first state.

    Returns
    -------
    log_post : (n, T, K) ndarray of float
        Log posterior of each state (normalised over K).
    log_pred : (n, T, K) ndarray of float
        Log ``P(x_t | o_<t)`` (normalised).
    log_beta : (n, T, K) ndarray of float
        Log ``P(o_>t | x_t)`` up to a constant per chain and step.
    """
    n, t_len, k = log_em.shape
    log_filt = np.empty_like(log_em)
    log_pred = np.empty_like(log_em)
    log_pred[:, 0] = log_start[None, :]
    for t in range(t_len):
        if t > 0:
            log_pred[:, t] = logsumexp(log_filt[:, t - 1, :, None] + log_a[None], axis=1)
        a = log_pred[:, t] + log_em[:, t]
        log_filt[:, t] = a - logsumexp(a, axis=1, keepdims=True)
    log_beta = np.zeros_like(log_em)
    for t in range(t_len - 2, -1, -1):
        b = logsumexp(log_a[None] + (log_em[:, t + 1] + log_beta[:, t + 1])[:, None, :], axis=2)
        log_beta[:, t] = b - logsumexp(b, axis=1, keepdims=True)
    log_post = log_filt + log_beta
    log_post -= logsumexp(log_post, axis=2, keepdims=True)
    return log_post, log_pred, log_beta


def _log(x):
    """Natural log with log(0) = -inf and no warning."""
    with np.errstate(divide="ignore"):
        return np.log(np.asarray(x, float))


def chain_posteriors(log_em, transmat, start):
    """Site posteriors of rods that are independent chains of one transition matrix.

    Parameters
    ----------
    log_em : (n_rods, n_sites, K) ndarray of float
        ``log P(o_rt | k)`` (0 where there is no observation).
    transmat : (K, K) array of float
        Row-stochastic transition matrix.
    start : (K,) array of float
        Distribution of the first site of the grid.

    Returns
    -------
    (n_rods, n_sites, K) ndarray of float
        ``P(s_rt = k | O_r)``.
    """
    log_post, _, _ = _forward_backward(np.asarray(log_em, float), _log(transmat), _log(start))
    return np.exp(log_post)


def copied_posteriors(log_em, transmat, start, copy_error, composition):
    """Site posteriors of rods that copy one master chain (see the module docstring).

    Parameters
    ----------
    log_em : (n_rods, n_sites, K) ndarray of float
        ``log P(o_rt | k)`` (0 where there is no observation).
    transmat : (K, K) array of float
        Transition matrix of the master chain.
    start : (K,) array of float
        Distribution of the master's first site.
    copy_error : float
        Probability ``c`` that a rod's site is an independent draw from ``composition`` instead of
        the master's metal.
    composition : (K,) array of float
        Distribution of the independent draws.

    Returns
    -------
    (n_rods, n_sites, K) ndarray of float
        ``P(s_rt = k | O)``, O the observations of every rod.
    """
    log_em = np.asarray(log_em, float)
    f = np.asarray(composition, float)
    k = f.size
    log_c = _log((1.0 - copy_error) * np.eye(k) + copy_error * np.tile(f, (k, 1)))  # [m, k]
    # log e_rt(m) = log sum_k C[m, k] exp(l_rt(k))
    log_e = logsumexp(log_c[None, None, :, :] + log_em[:, :, None, :], axis=3)
    log_big_e = log_e.sum(axis=0)  # (T, K): log E_t(m)
    _, log_pred, log_beta = _forward_backward(log_big_e[None], _log(transmat), _log(start))
    log_master = log_pred[0] + log_beta[0] + log_big_e  # log P(m_t, O) up to a constant per t
    log_excl = log_master[None] - log_e  # leave rod r's own site out
    log_excl -= logsumexp(log_excl, axis=2, keepdims=True)
    log_post = log_em + logsumexp(log_excl[:, :, :, None] + log_c[None, None], axis=2)
    log_post -= logsumexp(log_post, axis=2, keepdims=True)
    return np.exp(log_post)


def oracle_posteriors(run):
    """The oracle's site posteriors of a simulated run.

    Parameters
    ----------
    run : SimRun

    Returns
    -------
    (n_rods, n_sites, K) ndarray of float
        ``P(s_rt = k | O)`` under the true model with the true ion-to-site assignment, for every
        site of the simulator's grid (outside sites included; only inside sites are scored).
    """
    cfg = run.config
    log_em = site_log_emissions(run)
    f = cfg.composition_array
    if cfg.pattern == "copied":
        return copied_posteriors(log_em, cfg.transmat, f, cfg.copy_error, f)
    return chain_posteriors(log_em, cfg.transmat, f)


def oracle_correct(run, posteriors=None):
    """Whether the oracle's decode (argmax posterior) is the true metal, per site.

    Parameters
    ----------
    run : SimRun
    posteriors : (n_rods, n_sites, K) ndarray, optional
        From :func:`oracle_posteriors` (computed when not given).

    Returns
    -------
    (n_rods, n_sites) ndarray of bool
        False at sites outside the specimen.
    """
    post = oracle_posteriors(run) if posteriors is None else posteriors
    seq = np.asarray(run.seq)
    return (seq >= 0) & (post.argmax(axis=2) == seq)


def oracle_accuracy(run, posteriors=None, sites=None) -> float:
    """Share of sites whose oracle decode is the true metal.

    Parameters
    ----------
    run : SimRun
    posteriors : (n_rods, n_sites, K) ndarray, optional
        From :func:`oracle_posteriors`.
    sites : (n_rods, n_sites) ndarray of bool, optional
        The sites to score (default: every inside site, true state >= 0).

    Returns
    -------
    float
        Accuracy in [0, 1] (nan with no site).
    """
    ok = oracle_correct(run, posteriors)
    sel = np.asarray(run.seq) >= 0 if sites is None else np.asarray(sites, bool) & (np.asarray(run.seq) >= 0)
    n = int(sel.sum())
    return float(ok[sel].sum() / n) if n else float("nan")


def _candidate_sites(run, n_candidates: int = 4) -> dict:
    """Every ion's ``n_candidates`` nearest true rod axes at its depth (nearest first) and, on each,
    the depth-nearest site: ``x, y, z, mz`` (n,), ``axes`` (x0, y0, dxdz, dydz per rod), ``cand``,
    ``d2`` (nm^2) and ``site``, each (n, n_candidates), and the sites' depths ``sz``."""
    from scipy.spatial import cKDTree

    rods = run.truth["rods"]
    x0, y0, dx, dy = (np.array([r[key] for r in rods], dtype=float) for key in ("x0", "y0", "dxdz", "dydz"))
    x, y, z = (np.asarray(v, float) for v in (run.ions.x, run.ions.y, run.ions.z))
    mz = np.asarray(run.ions.mass_to_charge, float)
    n_c = min(int(n_candidates), len(rods))
    # candidates from the mean tilt, then exact distances, nearest first
    _, cand = cKDTree(np.column_stack([x0, y0])).query(np.column_stack([x - dx.mean() * z, y - dy.mean() * z]), k=n_c)
    cand = cand.reshape(x.size, n_c)
    d2 = (x[:, None] - x0[cand] - dx[cand] * z[:, None]) ** 2 + (y[:, None] - y0[cand] - dy[cand] * z[:, None]) ** 2
    order = np.argsort(d2, axis=1, kind="stable")
    cand = np.take_along_axis(cand, order, axis=1)
    d2 = np.take_along_axis(d2, order, axis=1)
    sz = np.asarray(run.site_z_nm, float)
    n_sites = sz.shape[1]
    site = np.empty(cand.shape, np.int64)
    for c in range(n_c):
        r = cand[:, c]
        j = np.empty(r.size, np.int64)
        for rr in np.unique(r):
            sel = np.flatnonzero(r == rr)
            j[sel] = np.clip(np.searchsorted(sz[rr], z[sel]), 1, n_sites - 1)
        site[:, c] = np.where(np.abs(z - sz[r, j - 1]) <= np.abs(z - sz[r, j]), j - 1, j)
    return {"x": x, "y": y, "z": z, "mz": mz, "axes": (x0, y0, dx, dy), "cand": cand, "d2": d2, "site": site,
            "sz": sz}


def _own_offsets(g: dict, rod, site, idx):
    """Squared lateral distance (nm^2) and depth offset (nm) of the ions ``idx`` from the sites
    ``(rod, site)`` (arrays over ``idx``), on the true axes of :func:`_candidate_sites`' ``g``."""
    x0, y0, dx, dy = g["axes"]
    z = g["z"][idx]
    d2 = (g["x"][idx] - x0[rod] - dx[rod] * z) ** 2 + (g["y"][idx] - y0[rod] - dy[rod] * z) ** 2
    return d2, z - g["sz"][rod, site]


def _extras_density(mz, which, n_sites: int, mass_bin_da: float, smooth_da: float) -> np.ndarray:
    """Density per site and Da of the mass-to-charge of the ions ``which`` (a histogram of
    ``mass_bin_da`` bins smoothed by a Gaussian of ``smooth_da``), at every ion's value."""
    from scipy.ndimage import gaussian_filter1d

    lo, hi = float(mz.min()) - 1.0, float(mz.max()) + 1.0
    nb = int(math.ceil((hi - lo) / mass_bin_da))
    hist = np.bincount(((mz[which] - lo) / mass_bin_da).astype(np.int64), minlength=nb)[:nb].astype(float)
    dens = gaussian_filter1d(hist, smooth_da / mass_bin_da) / (mass_bin_da * n_sites)
    return np.maximum(dens[np.clip(((mz - lo) / mass_bin_da).astype(np.int64), 0, nb - 1)], 1e-12)


def data_limit_posteriors(run, mass_bin_da: float = 0.002, smooth_da: float = 0.003, axial: bool = True,
                          lateral: bool = True, crosstalk_known: bool = False):
    """Site posteriors of the decode that knows the true model of every kind of ion but not which ion
    is which: the limit of what an analysis of the ion file can reach (a diagnostic beside the oracle).

    The oracle is given which ion is a site's own ion, so linker fragments and background never
    count as evidence. An analysis of the ion file sees every ion in a site's cell and slab; this
    decode does too, with the true lattice (each ion goes to the nearest true rod axis at its depth
    and the nearest true site by depth), the true chain or copy model, and the true densities of
    the two kinds of ion it must tell apart:

    * a site's own ion: detected with probability ``eta``, mass-to-charge density ``p_k(y)``
      (:func:`metal_log_likelihood`), lateral offset a 2-D Gaussian and axial offset a Gaussian
      about its site, with widths measured on the run's own ions (truth);
    * every other ion in the cell and slab (fragments, background, neighbours' own ions): a
      Poisson number per site with mass-to-charge density ``lambda(y)`` (a histogram of the run's
      such ions in ``mass_bin_da`` bins smoothed by a Gaussian of ``smooth_da``, per site) spread
      evenly over the cell area ``A`` and the slab of one pitch ``p``.

    Then (the usual mixture of one Bernoulli own ion and Poisson extras, in which the extras'
    product cancels between metals)

    ``P(o_rt | k) ~ 1 - eta c + eta sum_i p_k(y_i) g(d_i) A phi(dz_i) p / lambda(y_i)``,

    with ``c`` the share of own ions that land in their own cell and slab. Posteriors by the same
    forward-backward (or master chain) as the oracle's.

    Parameters
    ----------
    run : SimRun
    mass_bin_da, smooth_da : float, Da
    axial, lateral : bool
        Use the own ion's axial (lateral) offset; False: the decode ignores it (the factor is 1), to
        measure what that part of the evidence is worth.
    crosstalk_known : bool
        Own ions that land nearer another rod or site are given back to their own site (with their
        offsets from it): the bound on what any model of crosstalk between neighbours can gain.

    Returns
    -------
    (n_rods, n_sites, K) ndarray of float
    """
    cfg, inside, g = run.config, np.asarray(run.seq) >= 0, _candidate_sites(run)
    (n_rods, n_sites), k = inside.shape, len(cfg.metals)
    z, mz, sz = g["z"], g["mz"], g["sz"]
    rod, d2, site = g["cand"][:, 0], g["d2"][:, 0], g["site"][:, 0]  # the nearest axis
    dz = z - sz[rod, site]
    own_rod, own_site = np.asarray(run.ion_rod), np.asarray(run.ion_site)
    is_own = own_rod >= 0
    home = is_own & (own_rod == rod) & (own_site == site)  # own ions in their own cell and slab
    c = float(home.sum() / max(is_own.sum(), 1))
    if crosstalk_known:
        away = np.flatnonzero(is_own & ~home)
        rod, site = rod.copy(), site.copy()
        rod[away], site[away] = own_rod[away], own_site[away]
        d2, dz = d2.copy(), dz.copy()
        d2[away], dz[away] = _own_offsets(g, rod[away], site[away], away)
        home = is_own.copy()
        c = 1.0
    # own ions' lateral and axial widths (Rayleigh and normal estimates on the ones at home)
    s2_xy = float(d2[home].mean() / 2.0)
    s_z = float(dz[home].std())
    pitch = float(np.nanmedian(np.diff(sz, axis=1)))
    area = float((run.truth.get("distortion") or {}).get("scale", 1.0)) ** 2 / run.lattice.rod_density_per_nm2
    ratio = np.ones(z.size)
    if lateral:
        ratio *= np.exp(-d2 / (2 * s2_xy)) / (2 * np.pi * s2_xy) * area
    if axial:
        ratio *= np.exp(-dz ** 2 / (2 * s_z ** 2)) / (math.sqrt(2 * math.pi) * s_z) * pitch
    # the extras' mass-to-charge density per site
    lam = _extras_density(mz, ~home & inside[rod, site], int(inside.sum()), mass_bin_da, smooth_da)
    use = inside[rod, site]
    w = np.exp(metal_log_likelihood(cfg, mz[use])) * (ratio[use] / lam[use])[:, None]
    acc = np.zeros((n_rods, n_sites, k))
    np.add.at(acc, (rod[use], site[use]), w)
    log_em = np.zeros((n_rods, n_sites, k))
    log_em[inside] = np.log(1.0 - cfg.eta * c + cfg.eta * acc[inside])
    f = cfg.composition_array
    if cfg.pattern == "copied":
        return copied_posteriors(log_em, cfg.transmat, f, cfg.copy_error, f)
    return chain_posteriors(log_em, cfg.transmat, f)


def data_limit_shared_posteriors(run, n_candidates: int = 4, mass_bin_da: float = 0.002, smooth_da: float = 0.003):
    """As :func:`data_limit_posteriors`, but every ion is evidence for each of the sites of its
    ``n_candidates`` nearest rods (the depth-nearest site of each), read against everything else
    that could have put it there: the extras and the other candidates' own ions.

    For candidate site c of ion x, with ``o_c(x)`` the own ions' lateral and axial density about
    site c relative to an even spread over a cell and slab, the ion adds

    ``eta p_k(y) o_c(x) / (lambda(y) + eta sum_{c' != c} o_c'(x) sum_k' f_k' p_k'(y))``

    to the factor of metal k at c (``f`` the composition: each other candidate's metal taken at
    its prior; iterating with the neighbours' posteriors instead changed the accuracy by under
    1e-4 on the crowded runs). ``lambda`` is the density of the ions that are nobody's own
    (fragments, background), per site. A model of the crowded lattice that shares an ion between
    the rods it could come from, with no knowledge of which ion is which: what the tool could
    reach by sharing evidence between neighbouring rods.

    Parameters
    ----------
    run : SimRun
    n_candidates : int
    mass_bin_da, smooth_da : float, Da

    Returns
    -------
    (n_rods, n_sites, K) ndarray of float
    """
    cfg, inside, g = run.config, np.asarray(run.seq) >= 0, _candidate_sites(run, n_candidates)
    (n_rods, n_sites), k = inside.shape, len(cfg.metals)
    z, mz, sz = g["z"], g["mz"], g["sz"]
    cand, d2, site = g["cand"], g["d2"], g["site"]
    n_c = cand.shape[1]
    dz = z[:, None] - sz[cand, site]
    own_rod, own_site = np.asarray(run.ion_rod), np.asarray(run.ion_site)
    is_own = own_rod >= 0
    oi = np.flatnonzero(is_own)
    od2, odz = _own_offsets(g, own_rod[oi], own_site[oi], oi)
    s2, s_z = float(od2.mean() / 2.0), float(odz.std())
    pitch = float(np.nanmedian(np.diff(sz, axis=1)))
    area = float((run.truth.get("distortion") or {}).get("scale", 1.0)) ** 2 / run.lattice.rod_density_per_nm2
    o = (np.exp(-d2 / (2 * s2)) / (2 * np.pi * s2) * area
         * np.exp(-dz ** 2 / (2 * s_z ** 2)) / (math.sqrt(2 * math.pi) * s_z) * pitch)
    o = np.where(inside[cand, site], o, 0.0)
    lam = _extras_density(mz, ~is_own, int(inside.sum()), mass_bin_da, smooth_da)
    keep = o.sum(axis=1) > 0
    o, lam, cand, site = o[keep], lam[keep], cand[keep], site[keep]
    p = np.exp(metal_log_likelihood(cfg, mz[keep]))
    f = cfg.composition_array
    own_c = cfg.eta * o * (p @ f)[:, None]  # each candidate's expected own-ion density, metal at its prior
    total = lam + own_c.sum(axis=1)
    acc = np.zeros((n_rods, n_sites, k))
    for c in range(n_c):
        np.add.at(acc, (cand[:, c], site[:, c]), cfg.eta * o[:, c, None] * p / (total - own_c[:, c])[:, None])
    log_em = np.zeros((n_rods, n_sites, k))
    log_em[inside] = np.log(1.0 - cfg.eta + acc[inside])
    if cfg.pattern == "copied":
        return copied_posteriors(log_em, cfg.transmat, f, cfg.copy_error, f)
    return chain_posteriors(log_em, cfg.transmat, f)
