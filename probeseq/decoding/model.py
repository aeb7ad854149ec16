"""Decode each rod's depth profile of metal counts into a sequence of metal sites.

The model (one hidden-Markov chain per rod, all parameters shared by the rods of a run)
--------------------------------------------------------------------------------------
Hidden state of site t of a rod: the metal k in {0..K-1} occupying it.

Transitions: one K x K matrix ``A`` for all rods; the first site of every rod is drawn from
the stationary distribution ``f`` of ``A`` (``f A = f``), which is also the composition.
Masked sites (outside the analysed volume) have emission likelihood 1; leading and trailing
masked sites are dropped, which is exact with a stationary start, and gaps inside a rod are
bridged by the chain.

Emissions: the counts ``x = (x_0..x_{K-1})`` of the K metal channels at a site in state k are

* the site's own ion, detected with probability ``eta`` (at most one own ion per site), in
  channel k, plus
* extra counts in every channel j, Poisson with mean ``mu_j`` (``extra_rate``), the same in
  every state: ions from neighbouring rods (crosstalk), from depth blur and from background.

So, for integer counts, ``P(x | k) = (1 - eta) Pois(x; mu) + eta Pois(x - e_k; mu)`` with
``Pois(x; mu) = prod_j mu_j^x_j exp(-mu_j) / x_j!``, which factorises as::

    P(x | k) = Pois(x; mu) * (1 - eta + eta * x_k / mu_k)

because ``Pois(x - e_k; mu) / Pois(x; mu) = x_k / mu_k`` (0 when ``x_k = 0``). Only the
state factor informs the decoding; an empty site has the factor ``1 - eta`` in every state and
is informative only through the transitions.

Fractional counts (an ion whose channel the ranging could only give as probabilities) are
read as whole ions plus at most one *split ion* per site: ``x = n + phi`` with integer parts
``n`` and fractional parts ``phi``; the split ion is in channel j with probability
``pi_j = phi_j / max(1, sum phi)`` and absent with ``pi_0 = 1 - sum pi``. The likelihood is
the mixture over where the split ion is, ``P(x | k) = pi_0 P(n | k) + sum_j pi_j P(n + e_j | k)``
with the integer model above, which factorises the same way::

    P(x | k) = Pois(n; mu) * B * (1 - eta + eta * xe_k / mu_k),
    c_j = pi_j mu_j / (n_j + 1),  B = pi_0 + sum_j c_j,  xe = n + c / B.

``xe`` (the effective counts) equals ``x`` for integer counts, so integer data are treated
exactly; the split ion's channel is one more latent variable of the EM. (The plain continuation
of the Poisson density to real counts with the Gamma function is not used: its likelihood
grows without bound as ``mu_k -> 0`` when many counts are below 1.) When the fractional parts
of a site sum to more than 1 they are scaled to 1, i.e. two or more split ions at one site
are approximated by one.

Per-rod efficiency (optional, :mod:`probeseq.decoding.efficiency`): rod r has ``eta h_r`` and
``mu h_r``, so its state factor is ``1 - eta h_r + eta xe_k / mu_k`` and ``Pois(n; mu h_r)``, ``B``
use ``mu h_r``; ``eta`` and ``mu`` are those of a rod with ``h = 1``.

Only ``mu`` is identified by the data. It is reported split as ``mu_j = c f_j + b_j`` with the
crosstalk rate ``c`` the largest value for which every background ``b_j >= 0`` (i.e. all
composition-proportional extras are counted as crosstalk); see :class:`DecoderParams`.

Fit
---
EM over all rods at once. Latent variables: the states, per site whether the own ion was
detected, and the channel of a split ion. With state posteriors ``gamma_tk`` and the
detection posterior ``r_tk = eta xe_k / mu_k / (1 - eta + eta xe_k / mu_k)``:
``eta = sum gamma r / N``, ``mu_j = sum_t (E[y_tj] - gamma_tj r_tj) / N`` (N observed sites,
``E[y]`` the expected whole counts, ``x`` for integer counts),
(with a per-rod efficiency: ``mu_j`` divided by ``sum_r N_r h_r`` and ``eta`` the root of the
exact M-step equation, :func:`probeseq.decoding.efficiency.eta_mstep`),
and ``A`` from the expected transitions by a generalised-EM step
(:func:`probeseq.decoding.hmm.update_transmat`), so the likelihood never decreases. Starts:
``n_starts`` (one from moment estimates, the others random) each run ``SCREEN_ITER``
iterations on a subset of at most ``SCREEN_SITES`` observed sites (rods cut into segments of
``SCREEN_SEGMENT`` sites); the best continues on all rods until the log-likelihood changes by
less than ``tol`` per observed site, or ``max_iter``.
The independent-sites model (every row of ``A`` equal to the composition, no memory) is fitted
the same way for the likelihood-ratio test (df ``(K-1)^2``, chi-square) and the BIC.

Decoding
--------
Viterbi path and posterior marginals per site with the fitted (or given) parameters; a site
is *uncertain* when its largest posterior is below ``uncertain_below`` (default 0.8).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.special import gammaln

from ..exceptions import InputError
from ..lattice.rodcolumns import RodColumns
from .chain import persistence, runs_table, stationary_distribution
from .efficiency import RodTerms, distinct_rows_by_group, eta_mstep, with_rod_terms
from .hmm import forward_backward_scaled, update_transmat

__all__ = ['DecoderParams', 'emission_factors', 'emission_baseline', 'split_counts', 'UNCERTAIN_BELOW']

UNCERTAIN_BELOW = 0.8


"""Default level: a site whose largest posterior is below it is flagged uncertain."""


ETA_BOUNDS = (1e-4, 1.0 - 1e-4)


"""Range the detection efficiency is kept in during the fit."""


MIN_RATE = 1e-6


"""Floor of every extra-count rate mu_j, counts per site."""


LOW_COUNT_SHARE = 0.01


"""A metal with a smaller share of all metal counts is reported as poorly supported."""


LOW_COUNT_MIN = 20.0


"""A metal with fewer counts than this is reported as poorly supported."""


SCREEN_ITER = 10


"""EM iterations each start runs before the best start is chosen."""


SCREEN_SITES = 200_000


"""Largest number of observed sites used for screening the starts."""


SCREEN_SEGMENT = 250


"""For screening, rods longer than twice this are cut into segments of this many sites."""


REFINE_FACTOR = 16


"""With more than ``REFINE_FACTOR * SCREEN_SITES`` observed sites, the best start is refined by EM
on a random ``1 / REFINE_FACTOR`` of the rods (whole rods) before the EM on all of them, which
then starts close to its optimum: the log-likelihood it still gains is about ``d / 2 *
REFINE_FACTOR`` for ``d`` free parameters, below the tolerance of a large run, so it converges
in one or two updates instead of four or five (each a pass over every site)."""


@dataclass(frozen=True)
class DecoderParams:
    """Parameters of the rod model (see the module docstring).

    Parameters
    ----------
    transmat : (K, K) ndarray of float
        Transition matrix between metals of consecutive sites; rows sum to 1.
    eta : float
        Probability that a site's own ion is detected (detection efficiency), in (0, 1).
    extra_rate : (K,) ndarray of float, counts per site
        Mean number of extra counts (crosstalk + background) per site in each channel, > 0.
    visibility : (K,) ndarray of float, optional
        Relative visibility ``a_k`` of each metal, in (0, 1]: the share of a metal's ions that the
        ranging counts as that metal (its lines' capture by the ranges and the share of shared
        ranges), known from the mass spectrum. A site of metal k shows its own ion with
        probability ``eta a_k``; ``eta`` is then the instrument's detection efficiency. None: 1
        for every metal.
    """

    transmat: np.ndarray
    eta: float
    extra_rate: np.ndarray
    visibility: np.ndarray | None = None

    def __post_init__(self):
        a = np.asarray(self.transmat, dtype=float)
        if a.ndim != 2 or a.shape[0] != a.shape[1] or a.shape[0] < 2:
            raise InputError(f"params.transmat must be a (K, K) matrix with K >= 2, got shape {a.shape}")
        if not (np.all(np.isfinite(a)) and np.all(a >= 0) and np.allclose(a.sum(1), 1.0, atol=1e-8)):
            raise InputError("params.transmat must be non-negative with rows summing to 1")
        eta = float(self.eta)
        if not 0.0 < eta < 1.0:
            raise InputError(f"params.eta must be in (0, 1), got {self.eta!r}")
        mu = np.asarray(self.extra_rate, dtype=float).reshape(-1)
        if mu.shape != (a.shape[0],) or not np.all(np.isfinite(mu)) or np.any(mu <= 0):
            raise InputError(
                f"params.extra_rate must be {a.shape[0]} positive rates (counts per site), got {self.extra_rate!r}"
            )
        vis = np.ones(a.shape[0]) if self.visibility is None else np.asarray(self.visibility, float).reshape(-1)
        if vis.shape != (a.shape[0],) or not np.all(np.isfinite(vis)) or np.any(vis <= 0) or np.any(vis > 1):
            raise InputError(f"params.visibility must be {a.shape[0]} values in (0, 1], got {self.visibility!r}")
        object.__setattr__(self, "transmat", a / a.sum(1, keepdims=True))
        object.__setattr__(self, "eta", eta)
        object.__setattr__(self, "extra_rate", mu)
        object.__setattr__(self, "visibility", vis)

    @classmethod
    def from_components(cls, transmat, eta, crosstalk_rate, background) -> "DecoderParams":
        """Build from a crosstalk rate and per-channel background: ``mu = c f + b``.

        Parameters
        ----------
        transmat : (K, K) ndarray of float
        eta : float
        crosstalk_rate : float, counts per site
            Extra counts per site whose composition is the stationary composition ``f``.
        background : float or (K,) ndarray of float, counts per site
            Extra counts per site in each channel; values <= 0 are raised to ``MIN_RATE``.
        """
        f = stationary_distribution(np.asarray(transmat, dtype=float))
        b = np.broadcast_to(np.asarray(background, dtype=float), f.shape)
        mu = np.maximum(float(crosstalk_rate) * f + b, MIN_RATE)
        return cls(transmat=transmat, eta=eta, extra_rate=mu)

    @property
    def n_metals(self) -> int:
        return int(self.transmat.shape[0])

    @property
    def state_eta(self) -> np.ndarray:
        """Detection probability of the own ion of a site of each metal, ``eta a_k``, (K,)."""
        return self.eta * self.visibility

    @property
    def uniform_visibility(self) -> bool:
        """True when every metal has visibility 1 (the state's ``eta`` is the scalar ``eta``)."""
        return bool(np.all(self.visibility == 1.0))

    def with_fit(self, transmat, eta, extra_rate) -> "DecoderParams":
        """New parameters with these fitted values and the same visibility."""
        return DecoderParams(transmat=transmat, eta=eta, extra_rate=extra_rate, visibility=self.visibility)

    @property
    def stationary(self) -> np.ndarray:
        """Stationary distribution of ``transmat`` (the composition), (K,)."""
        return stationary_distribution(self.transmat)

    @property
    def persistence(self) -> float:
        """Persistence of ``transmat`` (dimensionless), :func:`probeseq.decoding.chain.persistence`.

        ``lam = sum_k f_k lam_k`` with ``lam_k = (A_kk - f_k) / (1 - f_k)`` and ``f`` the stationary
        composition, the same number the statistics report; for ``A = lam I + (1 - lam) 1 f`` it
        is lam, and for two metals ``1 - (p01 + p10)``, the second eigenvalue of ``A``.
        """
        return persistence(self.transmat)

    @property
    def crosstalk_rate(self) -> float:
        """Largest ``c`` with ``mu - c f >= 0``, counts per site (see module docstring)."""
        f = self.stationary
        ok = f > 1e-12
        return float(np.min(self.extra_rate[ok] / f[ok])) if ok.any() else 0.0

    @property
    def background(self) -> np.ndarray:
        """``mu - crosstalk_rate * f``, counts per site per channel (>= 0, at least one is 0)."""
        return np.clip(self.extra_rate - self.crosstalk_rate * self.stationary, 0.0, None)

    def to_dict(self) -> dict:
        return {
            "transmat": self.transmat.tolist(),
            "eta": self.eta,
            "extra_rate": self.extra_rate.tolist(),
            "stationary": self.stationary.tolist(),
            "persistence": self.persistence,
            "crosstalk_rate": self.crosstalk_rate,
            "background": self.background.tolist(),
            "visibility": self.visibility.tolist(),
            "state_eta": self.state_eta.tolist(),
        }


def split_counts(counts):
    """Integer parts and split-ion probabilities of (possibly fractional) counts.

    Parameters
    ----------
    counts : (..., K) ndarray of float

    Returns
    -------
    n : (..., K) ndarray of float
        Integer parts (whole ions per channel).
    pi : (..., K) ndarray of float
        Probability that the site's split ion is in each channel: the fractional parts,
        divided by their sum when that exceeds 1.
    pi_none : (...,) ndarray of float
        Probability that there is no split ion (``1 - sum(pi)``).
    """
    x = np.asarray(counts, dtype=float)
    n = np.floor(x + 1e-9)
    phi = x - n
    phi[phi < 1e-9] = 0.0
    m = phi.sum(axis=-1)
    pi = phi / np.maximum(m, 1.0)[..., None]
    return n, pi, np.clip(1.0 - pi.sum(axis=-1), 0.0, 1.0)


def _split_terms(n, pi, pi_none, mu):
    """c_j = pi_j mu_j / (n_j + 1), B = pi_none + sum c, effective counts n + c / B."""
    c = pi * (mu / (n + 1.0))
    b = pi_none + c.sum(axis=-1)
    return c, b, n + c / b[..., None]


def emission_factors(counts, params: DecoderParams, efficiency=None, linear: bool = False) -> np.ndarray:
    """State-dependent factor of the emission likelihood of every site.

    ``P(x | k) = Pois(n; mu) B(x; mu) (1 - eta + eta xe_k / mu_k)`` (module docstring); this
    returns ``1 - eta + eta xe_k / mu_k`` with the effective counts ``xe`` (``xe = x`` for
    integer counts).

    Parameters
    ----------
    counts : (..., K) ndarray of float
        Counts per metal channel.
    params : DecoderParams
    efficiency : float or (...) ndarray of float, optional
        Relative efficiency ``h`` of each site's rod (``1 - eta h + eta xe_k / mu_k``, ``xe``
        with ``mu h``); None: 1.
    linear : bool
        The values are soft evidence, read linearly (``xe = x``, no split ion).

    Returns
    -------
    (..., K) ndarray of float
    """
    h = 1.0 if efficiency is None else np.asarray(efficiency, dtype=float)[..., None]
    if linear:  # soft evidence (probeseq.lattice.evidence): the values themselves
        xe = np.asarray(counts, dtype=float)
    else:
        n, pi, pi_none = split_counts(counts)
        _, _, xe = _split_terms(n, pi, pi_none, params.extra_rate * h)
    ev = _eta_of(params)
    return (1.0 - ev * h) + xe * (ev / params.extra_rate)


def _eta_of(params: DecoderParams):
    """The own-ion detection probability as the formulas use it: the scalar ``eta`` when every
    metal has visibility 1 (so results are those of the scalar model to the bit), else ``eta a_k``
    per state, (K,)."""
    return params.eta if params.uniform_visibility else params.state_eta


def eta_update(params: DecoderParams, own, sites, h=None) -> float:
    """M-step of the instrument efficiency ``eta`` from the expected own ions and observed sites
    per state (and per rod with a per-rod efficiency ``h``).

    Parameters
    ----------
    params : DecoderParams
        The current parameters (their visibility ``a``).
    own, sites : (K,) or (R, K) ndarray of float
        Expected detected own ions and expected observed sites in each state (of each rod).
    h : (R,) ndarray of float, optional
        Relative efficiency of each rod (rows of ``own``).

    Returns
    -------
    float
        ``sum(own) / sum(sites)`` with visibility 1 and no ``h``; else the exact M-step
        (:func:`probeseq.decoding.efficiency.eta_mstep`) over the groups (rod, state), ``h_r a_k``.
    """
    own, sites = np.asarray(own, dtype=float), np.asarray(sites, dtype=float)
    if h is None and params.uniform_visibility:
        return float(np.clip(own.sum() / sites.sum(), *ETA_BOUNDS))
    rel = np.broadcast_to(params.visibility if h is None else np.outer(h, params.visibility), own.shape)
    return eta_mstep(rel.reshape(-1), sites.reshape(-1), own.reshape(-1), ETA_BOUNDS)


def emission_baseline(counts, extra_rate, efficiency=None) -> np.ndarray:
    """State-independent factor ``log(Pois(n; mu h) B(x; mu h))`` of every site (natural log).

    Parameters
    ----------
    counts : (..., K) ndarray of float
    extra_rate : (K,) ndarray of float, counts per site
    efficiency : float or (...) ndarray of float, optional
        Relative efficiency ``h`` of each site's rod; None: 1.

    Returns
    -------
    (...,) ndarray of float
    """
    mu = np.asarray(extra_rate, dtype=float)
    if efficiency is not None:
        mu = mu * np.asarray(efficiency, dtype=float)[..., None]
    n, pi, pi_none = split_counts(counts)
    _, b, _ = _split_terms(n, pi, pi_none, mu)
    return (n * np.log(mu) - mu - gammaln(n + 1.0)).sum(axis=-1) + np.log(b)


@dataclass(frozen=True)
class _Prepared:
    """Counts with each rod shifted to start at its first observed site (time-major)."""

    x: np.ndarray  # (L, R', K) zeros at unobserved cells
    obs: np.ndarray  # (L, R') bool
    rods: np.ndarray  # (R',) index into the columns' rods
    first: np.ndarray  # (R',)
    span: np.ndarray  # (R',) last - first + 1
    n_obs: int
    n_hidden_cells: int  # unobserved cells of the (L, R') array
    sum_x: np.ndarray  # (K,)
    log_factorial: float  # sum of gammaln(n + 1) of the integer parts over observed sites
    em_pair_weight: np.ndarray  # (R', L): transition t-1 -> t inside the rod's span
    obs_pair_weight: np.ndarray  # (R', L): both sites observed
    x_obs: np.ndarray  # (N, K) counts of the observed sites
    nz_flat: np.ndarray  # flat indices into x of the nonzero integer parts (whole-count cells)
    nz_k: np.ndarray  # their channel
    nz_x: np.ndarray  # their value
    sum_n: np.ndarray  # (K,) sum of the integer parts over observed sites
    fs_cell: np.ndarray  # flat (t, r) cell index of the sites with a split ion
    fs_n: np.ndarray  # (F, K) their integer parts
    fs_pi: np.ndarray  # (F, K) split-ion channel probabilities
    fs_pi_none: np.ndarray  # (F,)
    totals_mean: float
    totals_var: float
    eff: RodTerms | None = None  # per-rod relative efficiency (None: 1 for every rod)


def _sum_log_factorial(values: np.ndarray) -> float:
    """sum of log Gamma(x + 1) over positive counts (a table lookup when all are integers)."""
    if values.size == 0:
        return 0.0
    as_int = values.astype(np.int64)
    if np.array_equal(as_int, values) and as_int.max() < 100_000:
        hist = np.bincount(as_int)
        return float(hist @ gammaln(np.arange(hist.size) + 1.0))
    return float(gammaln(values + 1.0).sum())


def _prepare(counts: np.ndarray, mask: np.ndarray, rods=None) -> _Prepared:
    n_rods, n_sites, k = counts.shape
    if rods is None:
        rods = np.flatnonzero(mask.any(axis=1))
    rods = np.asarray(rods, dtype=np.int64)
    m = mask[rods]
    first = m.argmax(axis=1)
    last = n_sites - 1 - m[:, ::-1].argmax(axis=1)
    span = last - first + 1
    length = int(span.max())
    t = np.arange(length)
    inside = t[None, :] < span[:, None]
    if len(rods) == n_rods and not first.any():
        # every rod starts at site 0: no shift needed
        obs = m[:, :length]
        x_t = np.ascontiguousarray(counts[:, :length].transpose(1, 0, 2))
    else:
        idx = np.minimum(first[:, None] + t[None, :], n_sites - 1)
        obs = np.take_along_axis(m, idx, axis=1) & inside  # (R', L)
        x_t = counts.transpose(1, 0, 2)[idx.T, rods[None, :]]
    if obs.all():
        x_obs = x_t.reshape(-1, k)
    else:
        x_t *= obs.T[:, :, None]
        x_obs = x_t[obs.T]
    totals = x_obs @ np.ones(k)
    cells = x_t.reshape(-1, k)
    frac = np.flatnonzero(np.any(np.abs(cells - np.round(cells)) > 1e-9, axis=1))
    fs_n, fs_pi, fs_pi_none = split_counts(cells[frac])
    whole = cells.copy()
    whole[frac] = 0.0  # split-ion sites are handled separately
    nz_flat = np.flatnonzero(whole.reshape(-1) > 0)
    nz_x = whole.reshape(-1)[nz_flat]
    n_all = np.floor(x_obs + 1e-9)
    nz = n_all[n_all > 0]
    em_w = np.zeros((len(rods), length))
    em_w[:, 1:] = inside[:, 1:]
    ob_w = np.zeros((len(rods), length))
    ob_w[:, 1:] = obs[:, 1:] & obs[:, :-1]
    n_obs = int(obs.sum())
    return _Prepared(
        x=x_t,
        obs=np.ascontiguousarray(obs.T),
        rods=rods,
        first=first,
        span=span,
        n_obs=n_obs,
        n_hidden_cells=int(obs.size - n_obs),
        sum_x=x_obs.sum(axis=0),
        log_factorial=_sum_log_factorial(nz),
        em_pair_weight=em_w,
        obs_pair_weight=ob_w,
        x_obs=x_obs,
        nz_flat=nz_flat,
        nz_k=(nz_flat % k).astype(np.int64),
        nz_x=nz_x,
        sum_n=n_all.sum(axis=0),
        fs_cell=frac,
        fs_n=fs_n,
        fs_pi=fs_pi,
        fs_pi_none=fs_pi_none,
        totals_mean=float(totals.mean()),
        totals_var=float(totals.var()),
    )


def _screen_arrays(rods, per_rod, n_obs: int, counts, mask, max_sites: int, segment: int, rng):
    """Counts, mask and source rod of every row of rods drawn at random up to ``max_sites``
    observed sites, cut into segments of ``segment`` sites that are treated as separate rods (for
    screening the starts only: the loops over depth get shorter, at the cost of the few
    transitions across the cuts). None when that is all the rods, uncut."""
    if n_obs > max_sites:
        order = rng.permutation(len(rods))
        keep = order[: max(2, int(np.searchsorted(np.cumsum(per_rod[order]), max_sites)))]
        rods = np.sort(rods[keep])
    c, m, src = counts[rods], mask[rods], rods
    n_sites = c.shape[1]
    if n_sites > 2 * segment:
        n_seg = -(-n_sites // segment)
        pad = n_seg * segment - n_sites
        c = np.pad(c, ((0, 0), (0, pad), (0, 0))).reshape(-1, segment, c.shape[2])
        m = np.pad(m, ((0, 0), (0, pad))).reshape(-1, segment)
        src = np.repeat(rods, n_seg)
    elif n_obs <= max_sites:
        return None
    return np.ascontiguousarray(c), m, src


_with_efficiency = with_rod_terms


def _subset(prep: _Prepared, counts, mask, max_sites: int, segment: int, rng) -> _Prepared:
    """The screening subset (:func:`_screen_arrays`) of the numpy engine."""
    cm = _screen_arrays(prep.rods, prep.obs.sum(axis=0), prep.n_obs, counts, mask, max_sites, segment, rng)
    return prep if cm is None else _with_efficiency(_prepare(*cm[:2]), prep.eff and prep.eff.h_rows[cm[2]])


def _unique_rows(x: np.ndarray):
    """Distinct count vectors and their multiplicities (the independent-sites model only
    needs these)."""
    k = x.shape[1]
    if x.size and np.array_equal(x, np.round(x)) and x.max() < 2**15:
        base = int(x.max()) + 1
        if base**k < 2**62:
            key = x.astype(np.int64) @ (base ** np.arange(k, dtype=np.int64))
            uk, inv_first, cnt = np.unique(key, return_index=True, return_counts=True)
            return x[inv_first], cnt.astype(float)
    rows, cnt = np.unique(x, axis=0, return_counts=True)
    return rows, cnt.astype(float)


@dataclass(frozen=True)
class _RodData:
    """The counts as they are (no copy), the span of every rod with an observed site and the
    sums the fit needs; what the compiled kernels (:mod:`probeseq.decoding.rodchain`) work on."""

    counts: np.ndarray  # (n_rods, n_sites, K), float32 or float64
    mask: np.ndarray  # (n_rods, n_sites) bool, C-contiguous
    rods: np.ndarray  # (R',) int64
    first: np.ndarray  # (R',) int64
    span: np.ndarray  # (R',) int64
    n_obs: int
    sum_x: np.ndarray  # (K,)
    sum_n: np.ndarray  # (K,) integer parts
    log_factorial: float
    totals_mean: float
    totals_var: float
    distinct_rows: np.ndarray  # (U, K) distinct count vectors of the observed sites
    distinct_mult: np.ndarray  # (U,) their multiplicities
    eff: RodTerms | None = None  # per-rod relative efficiency (None: 1 for every rod)
    linear: bool = False  # soft evidence: fractional values read linearly (probeseq.lattice.evidence)
    own_scale: np.ndarray | None = None  # (K,) evidence a detected own ion adds, on average (linear)


_BLOCK_RODS = 2048  # rods per block when summarising the counts


def _rod_data(counts: np.ndarray, mask: np.ndarray, own_scale=None) -> _RodData:
    """Spans and summaries of the observed sites (compiled passes; no copy of the counts).

    With ``own_scale`` (K,) the values are soft evidence (:mod:`probeseq.lattice.evidence`), read
    linearly; ``own_scale`` is the evidence a detected own ion adds on average."""
    from .rodchain import spans, summarise

    if counts.dtype not in (np.float32, np.float64) or not counts.flags.c_contiguous:
        counts = np.ascontiguousarray(counts, dtype=np.float64)
    mask = np.ascontiguousarray(mask, dtype=bool)
    n_rods, _, k = counts.shape
    rods, first, span = spans(mask)
    sm = summarise(counts, mask)
    if own_scale is not None:
        # soft evidence is only decoded (the fits run on the counts): no distinct rows, no factorials
        log_fact, uniq, mult = 0.0, np.zeros((0, k)), np.zeros(0)
    elif sm["rows"] is not None:
        h = sm["n_hist"]
        log_fact = float(h @ gammaln(np.arange(h.size) + 1.0))
        uniq, mult = sm["rows"], sm["mult"]
    else:
        # fractional (or very large) counts: a block of rods at a time
        log_fact = 0.0
        parts = []
        for b0 in range(0, n_rods, _BLOCK_RODS):
            xo = counts[b0:b0 + _BLOCK_RODS][mask[b0:b0 + _BLOCK_RODS]].astype(np.float64)
            if xo.size:
                n_int = np.floor(xo + 1e-9)
                log_fact += _sum_log_factorial(n_int[n_int > 0])
                parts.append(_unique_rows(xo))
        if parts:
            rows = np.concatenate([r for r, _ in parts])
            cnt = np.concatenate([c for _, c in parts])
            uniq, inv = np.unique(rows, axis=0, return_inverse=True)
            mult = np.bincount(inv.reshape(-1), weights=cnt, minlength=len(uniq))
        else:
            uniq, mult = np.zeros((0, k)), np.zeros(0)
    linear = own_scale is not None
    return _RodData(counts=counts, mask=mask, rods=rods, first=first, span=span, n_obs=sm["n_obs"],
                    sum_x=sm["sum_x"], sum_n=sm["sum_x"] if linear else sm["sum_n"], log_factorial=log_fact,
                    totals_mean=sm["totals_mean"], totals_var=sm["totals_var"], distinct_rows=uniq,
                    distinct_mult=mult, linear=linear,
                    own_scale=None if own_scale is None else np.asarray(own_scale, dtype=float))


def _screen_data(data: _RodData, max_sites: int, segment: int, rng) -> _RodData:
    """The screening subset (:func:`_screen_arrays`) of the compiled engine."""
    cm = _screen_arrays(data.rods, data.mask[data.rods].sum(axis=1), data.n_obs, data.counts, data.mask,
                        max_sites, segment, rng)
    return data if cm is None else _with_efficiency(_rod_data(*cm[:2], own_scale=data.own_scale),
                                                    data.eff and data.eff.h_rows[cm[2]])


def _compiled_step(data: _RodData):
    """EM step (E-step by the compiled kernel, then the M-step of :func:`_hmm_step`)."""
    from .rodchain import fit_pass

    eff = data.eff
    h_rows = None if eff is None else eff.h_rows

    def step(params: DecoderParams):
        fp = fit_pass(data.counts, data.mask, data.rods, data.first, data.span, _eta_of(params),
                      params.extra_rate, params.transmat, params.stationary, h_rows, linear=data.linear)
        own, adj = fp.own, fp.split_extra
        own_ev = own if data.own_scale is None else own * data.own_scale  # own ions' share of the values
        if eff is None:
            n = data.n_obs
            if params.uniform_visibility:
                eta = float(np.clip(own.sum() / n, *ETA_BOUNDS))
            else:
                eta = eta_update(params, own, fp.sites_per_rod_state.sum(axis=0))
            mu = np.maximum((data.sum_n + adj - own_ev) / n, MIN_RATE)
        else:
            if params.uniform_visibility:
                eta = eta_mstep(eff.h, eff.n_sites, fp.own_per_rod_state.sum(axis=1), ETA_BOUNDS)
            else:
                eta = eta_update(params, fp.own_per_rod_state, fp.sites_per_rod_state, eff.h)
            mu = np.maximum((data.sum_n + adj - own_ev) / eff.sum_h, MIN_RATE)
        a = update_transmat(fp.xi, fp.first_posterior, params.transmat)
        return fp.loglik + _baseline(data, params.extra_rate), params.with_fit(a, eta, mu)

    return step


def _decode_compiled(columns: RodColumns, data: _RodData, params: DecoderParams, uncertain_below: float):
    """As :func:`_decode_prepared`, by the compiled kernel (float32 posteriors, int8 paths)."""
    from .rodchain import decode_pass

    ll, post, path, uncertain, per_rod_xi, occupancy = decode_pass(
        data.counts, data.mask, data.rods, data.first, data.span, _eta_of(params), params.extra_rate,
        params.transmat, params.stationary, uncertain_below, None if data.eff is None else data.eff.h_rows,
        linear=data.linear)
    runs = runs_table(path, data.mask, post)
    return ll + _baseline(data, params.extra_rate), path, post, uncertain, per_rod_xi, occupancy, runs


def _baseline(prep: _Prepared, mu: np.ndarray, b_split=None) -> float:
    """Sum over observed sites of log(Pois(n; mu h_r) B) (the state-independent part)."""
    eff = prep.eff
    if eff is None:
        out = float(np.dot(prep.sum_n, np.log(mu)) - prep.n_obs * mu.sum() - prep.log_factorial)
    else:
        out = float(np.dot(prep.sum_n, np.log(mu)) + eff.log_term - eff.sum_h * mu.sum() - prep.log_factorial)
    if b_split is not None and b_split.size:
        out += float(np.log(b_split).sum())
    return out


def _emission_tm(prep: _Prepared, params: DecoderParams):
    """Emission factors (L, R', K), time-major (1 - eta h_r at empty and unobserved cells), and
    the split-ion terms of the sites that have one (with ``1 - eta h_r`` of their rods, or None)."""
    eta, mu = _eta_of(params), params.extra_rate
    if prep.eff is None:
        emis = np.full(prep.x.shape, 1.0 - eta)
    elif np.ndim(eta) == 0:
        emis = np.empty(prep.x.shape)
        emis[...] = (1.0 - eta * prep.eff.h)[None, :, None]
    else:
        emis = np.empty(prep.x.shape)
        emis[...] = 1.0 - prep.eff.h[None, :, None] * eta
    if np.ndim(eta):
        emis[~prep.obs] = 1.0  # a state-dependent 1 - eta_k must not weigh unobserved cells
    emis.reshape(-1)[prep.nz_flat] += prep.nz_x * (eta / mu)[prep.nz_k]
    split = None
    if prep.fs_cell.size:
        if prep.eff is None:
            ome, mu_s = None, mu
        else:
            h_s = prep.eff.h[prep.fs_cell % prep.x.shape[1]]
            ome, mu_s = 1.0 - h_s[:, None] * eta, mu * h_s[:, None]
        c, b, xe = _split_terms(prep.fs_n, prep.fs_pi, prep.fs_pi_none, mu_s)
        fac = ((1.0 - eta) if ome is None else ome) + xe * (eta / mu)
        emis.reshape(-1, mu.size)[prep.fs_cell] = fac
        split = (c, b, xe, fac, ome)
    return emis, split


def _split_expected_counts(n, c, b, gamma, eta, mu, fac, ome=None):
    """E[y_j | x] at split-ion sites: the integer parts plus the posterior probability that the
    split ion is in channel j, given the state posteriors ``gamma`` (S, K); ``ome`` is
    ``1 - eta h_r`` of each site's rod ((S, 1); None: ``1 - eta``)."""
    base = (((1.0 - eta) if ome is None else ome) + n * (eta / mu)) / fac
    s = (gamma * base).sum(axis=1)
    return n + (c / b[:, None]) * (s[:, None] + gamma * (eta / mu) / fac)


def _hmm_estep(prep: _Prepared, params: DecoderParams, *, final: bool = False):
    """Forward-backward on the prepared rods; returns loglik, the result and (unless ``final``)
    :func:`_expected_own`."""
    eta, mu = _eta_of(params), params.extra_rate
    emis, split = _emission_tm(prep, params)
    fb = forward_backward_scaled(
        emis,  # used as work space
        params.transmat,
        params.stationary,
        pair_weight=prep.obs_pair_weight if final else prep.em_pair_weight,
        compute_xi=True,
        xi_per_sequence=final,
        emission_is_time_major=True,
        overwrite_emission=True,
    )
    del emis
    # unobserved cells carried the state-independent factor 1 - eta h_r: remove it
    if np.ndim(eta):
        ll_rods = fb.loglik  # unobserved cells carried 1
    elif prep.eff is None:
        ll_rods = fb.loglik - (~prep.obs).sum(axis=0) * math.log(1.0 - eta)
    else:
        ll_rods = fb.loglik - (~prep.obs).sum(axis=0) * np.log(1.0 - eta * prep.eff.h)
    loglik = float(ll_rods.sum()) + _baseline(prep, mu, None if split is None else split[1])
    if final:
        return loglik, fb, None
    return (loglik, fb) + (_expected_own(prep, params, fb.posteriors, split),)


def _expected_own(prep: _Prepared, params: DecoderParams, posteriors, split):
    """Expected own ions per channel, expected whole counts per channel and expected own ions per
    rod and state (R', K), from the state posteriors (R', L, K)."""
    eta, mu = _eta_of(params), params.extra_rate
    ev = np.broadcast_to(eta, mu.shape)
    k = mu.size
    # detection posterior r_k = eta xe_k / mu_k / factor_k, zero where xe_k = 0: the sums run
    # over the nonzero whole counts and the split-ion sites only
    gamma_flat = posteriors.transpose(1, 0, 2).reshape(-1)  # time-major, contiguous
    q = prep.nz_x * (eta / mu)[prep.nz_k]
    n_r = prep.x.shape[1]
    nz_rod = (prep.nz_flat // k) % n_r
    if prep.eff is None:
        w_own = gamma_flat[prep.nz_flat] * (q / ((1.0 - ev[prep.nz_k]) + q))
    else:
        w_own = gamma_flat[prep.nz_flat] * (q / ((1.0 - ev[prep.nz_k] * prep.eff.h[nz_rod]) + q))
    own_rod = np.bincount(nz_rod * k + prep.nz_k, weights=w_own, minlength=n_r * k).astype(float).reshape(n_r, k)
    own = np.bincount(prep.nz_k, weights=w_own, minlength=k).astype(float)
    counts = prep.sum_n.copy()
    if split is not None:
        c, b, xe, fac, ome = split
        g = gamma_flat.reshape(-1, k)[prep.fs_cell]
        own_s = g * (xe * (eta / mu) / fac)
        own += own_s.sum(axis=0)
        fs_rod = prep.fs_cell % n_r
        for j in range(k):
            own_rod[:, j] += np.bincount(fs_rod, weights=own_s[:, j], minlength=n_r)
        counts += (_split_expected_counts(prep.fs_n, c, b, g, eta, mu, fac, ome) - prep.fs_n).sum(axis=0)
    return own, counts, own_rod


def _hmm_step(prep: _Prepared):
    def step(params: DecoderParams):
        loglik, fb, (own, counts, own_rod) = _hmm_estep(prep, params)
        sites = None
        if not params.uniform_visibility:  # expected observed sites per rod and state
            sites = np.einsum("rlk,lr->rk", fb.posteriors, prep.obs.astype(float))
        if prep.eff is None:
            n = prep.n_obs
            eta = (float(np.clip(own.sum() / n, *ETA_BOUNDS)) if sites is None
                   else eta_update(params, own, sites.sum(axis=0)))
            mu = np.maximum((counts - own) / n, MIN_RATE)
        else:
            eta = (eta_mstep(prep.eff.h, prep.eff.n_sites, own_rod.sum(axis=1), ETA_BOUNDS) if sites is None
                   else eta_update(params, own_rod, sites, prep.eff.h))
            mu = np.maximum((counts - own) / prep.eff.sum_h, MIN_RATE)
        first_post = fb.posteriors[:, 0, :].sum(axis=0)
        a = update_transmat(fb.xi, first_post, params.transmat)
        return loglik, params.with_fit(a, eta, mu)

    return step
