"""Copy-aware decoding: rods that copy one master sequence pool their evidence.

When neighbouring rods agree far beyond chance (the ``rod-to-rod-copied`` arrangement), decoding
each rod alone throws away the evidence of every other copy. The model here:

* a **master sequence** ``M_t`` over the site planes t (site t of every rod is the same crystal
  plane), a Markov chain with transition matrix ``A`` started from its stationary distribution;
* every following rod copies it: its site holds ``M_t`` with probability ``1 - eps`` and is
  otherwise an independent draw from the composition ``f``, so
  ``C[m, k] = P(S = k | M = m) = (1 - eps) [m = k] + eps f_k``;
* the counts of a rod site given its metal k have the decoder's emission factor ``e_rt(k)``
  (:func:`probeseq.decoding.model.emission_factors`, parameters of the per-rod fit kept).

Then the master's emission at plane t is ``E_t(m) = prod_r sum_k C[m, k] e_rt(k)`` over the rods
observed there, the master posterior ``P(M_t = m | data)`` comes from one forward-backward pass
over t, and each rod site's posterior is
``P(S_rt = k | data) = sum_m P(M_t = m | data) C[m, k] e_rt(k) / sum_k' C[m, k'] e_rt(k')``
(given ``M_t`` a rod site depends on its own counts only). EM fits ``A`` (expected master
transitions, :func:`probeseq.decoding.hmm.update_transmat`) and ``eps`` (the expected share of rod
sites that are redraws, ``eps f_k e(k)`` against ``C[m, k] e(k)``).

Which rods follow the master: a rod follows when its expected share of copied sites exceeds what
chance agreement gives with :data:`FOLLOW_Z` standard errors; the master is refitted on the
followers and the others keep their single-rod decoding. Too few rods, or no follower, fall back
to independent rods with the reason (``CopyResult.reason``).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from ..lattice.rodcolumns import RodColumns
from .copypass import master_log_emission, rod_pass
from .hmm import forward_backward, update_transmat
from .model import DecoderParams, _eta_of

__all__ = ['CopyResult', 'decode_copies', 'copies_suspected', 'pooled_result', 'MIN_RODS', 'FOLLOW_Z',
           'SUSPECT_KAPPA', 'SUSPECT_Z']

#: fewest rods a master sequence is pooled from
MIN_RODS = 4

#: a rod follows the master when its copied share is this many standard errors above chance
FOLLOW_Z = 3.0

#: neighbouring rods' posteriors must agree beyond chance by this kappa (excess agreement over
#: what chance gives, as a share of what it leaves) and this many standard errors (pairs of rods as
#: units) before the copy-aware decoding is tried. On simulated runs z stays below 1 for
#: independent rods and reaches 10-80 for copied ones, where kappa can be as small as 0.01 when the
#: evidence per site is weak
SUSPECT_KAPPA = 0.005
SUSPECT_Z = 5.0

@dataclass(frozen=True)
class CopyResult:
    """The copy-aware decoding of a run (:func:`decode_copies`).

    Attributes
    ----------
    applied : bool
        False when the rods were left to their single-rod decoding (``reason`` says why).
    reason : str
    copy_error : float
        Fitted ``eps``: the share of a following rod's sites redrawn from the composition.
    copy_error_err : float
        Its standard error (binomial, from the expected counts).
    master_transmat : (K, K) ndarray of float
    master_posterior : (n_sites, K) ndarray of float
        ``P(M_t = m | data)``; rows of planes no following rod observes hold the prior.
    follows : (n_rods,) ndarray of bool
        Rods decoded from the pooled evidence.
    copied_share : (n_rods,) ndarray of float
        Expected share of each rod's observed sites that copy the master (NaN without sites).
    chance_share : float
        Share of sites that would agree with the master by chance (``sum f_k^2``).
    posteriors : (n_rods, n_sites, K) ndarray of float
        Site posteriors (pooled for followers, the single-rod ones for the others).
    n_iter : int
    loglik : float
        Log-likelihood of the followers' counts under the master model (state factors only).
    """

    applied: bool
    reason: str
    copy_error: float = float("nan")
    copy_error_err: float = float("nan")
    master_transmat: np.ndarray = field(default_factory=lambda: np.zeros((0, 0)))
    master_posterior: np.ndarray = field(default_factory=lambda: np.zeros((0, 0)))
    follows: np.ndarray = field(default_factory=lambda: np.zeros(0, bool))
    copied_share: np.ndarray = field(default_factory=lambda: np.zeros(0))
    chance_share: float = float("nan")
    posteriors: np.ndarray | None = None
    n_iter: int = 0
    loglik: float = float("nan")

    def to_dict(self) -> dict:
        def num(v):
            v = float(v)
            return round(v, 6) if math.isfinite(v) else None

        out = {"applied": bool(self.applied), "reason": self.reason, "copy_error": num(self.copy_error),
               "copy_error_err": num(self.copy_error_err), "n_iter": int(self.n_iter), "loglik": num(self.loglik),
               "chance_share": num(self.chance_share)}
        if self.follows.size:
            out.update({"n_rods_following": int(self.follows.sum()), "n_rods": int(self.follows.size),
                        "rods_following": np.flatnonzero(self.follows).tolist(),
                        "master_transmat": np.round(self.master_transmat, 6).tolist()})
        return out


def _pass_args(columns: RodColumns, params: DecoderParams, efficiency):
    """The arrays and emission parameters the compiled passes take (:mod:`.copypass`)."""
    soft = columns.evidence is not None  # the decoder read the soft evidence: so do the copies
    values = columns.evidence if soft else columns.counts
    return values, columns.mask, _eta_of(params), params.extra_rate, efficiency, soft


def _master_terms(columns, params, rods, C, efficiency):
    """log E_t(m) summed over the given rods, (T, K)."""
    values, mask, eta, mu, h, soft = _pass_args(columns, params, efficiency)
    return master_log_emission(values, mask, np.asarray(rods, np.int64), eta, mu, C, h, linear=soft)


def _rod_posteriors(columns, params, rods, C, gamma, eps, f, efficiency, posteriors=True):
    """Site posteriors of rods given the master posterior (None without ``posteriors``), their
    expected redraws and observed sites."""
    values, mask, eta, mu, h, soft = _pass_args(columns, params, efficiency)
    return rod_pass(values, mask, np.asarray(rods, np.int64), eta, mu, C, gamma, eps, f, h, linear=soft,
                    posteriors=posteriors)


def decode_copies(columns: RodColumns, params: DecoderParams, single_posteriors=None, *, rod_efficiency=None,
                  max_iter: int = 50, tol: float = 1e-6, copy_error: float = 0.1) -> CopyResult:
    """Decode rods that copy one master sequence from their pooled evidence.

    Parameters
    ----------
    columns : RodColumns
        Counts (n_rods, n_sites, K); site t of every rod is the same crystal plane.
    params : DecoderParams
        The per-rod fit (its emission parameters are kept; its composition starts the master).
    single_posteriors : (n_rods, n_sites, K) ndarray, optional
        The single-rod posteriors, kept for rods that do not follow.
    rod_efficiency : (n_rods,) ndarray of float, optional
        Relative detection efficiency of each rod (as for the per-rod decoder).
    max_iter, tol
        EM iterations and the change of the log-likelihood per observed site that stops them.
    copy_error : float
        Starting ``eps``.

    Returns
    -------
    CopyResult
    """
    n_rods, K = columns.n_rods, columns.n_metals
    observed = columns.mask.any(axis=1)
    if int(observed.sum()) < MIN_RODS:
        return CopyResult(applied=False, reason=f"too few rods to pool ({int(observed.sum())}, need {MIN_RODS})")
    f = np.asarray(params.stationary, float)
    rods = np.flatnonzero(observed)
    A = np.asarray(params.transmat, float)
    eps = float(copy_error)
    result = None
    for _round in range(2):  # fit on all rods, then on the followers only
        A, eps, gamma, ll, n_iter = _fit_master(columns, params, rods, A, eps, f, rod_efficiency, max_iter, tol)
        C = (1 - eps) * np.eye(K) + eps * f[None, :]
        post, redraw, n_obs = _rod_posteriors(columns, params, np.arange(n_rods), C, gamma, eps, f, rod_efficiency)
        share = np.where(n_obs > 0, 1 - redraw / np.maximum(n_obs, 1), np.nan)
        chance = float(f @ f)
        # a rod that does not follow the master agrees with it by chance only: its copied share
        # (copies plus redraws that hit the master's metal) against chance agreement
        agree = share + (1 - share) * chance
        se = np.sqrt(chance * (1 - chance) / np.maximum(n_obs, 1))
        follows = observed & (agree > chance + FOLLOW_Z * se)
        result = (A, eps, gamma, ll, n_iter, C, post, share, chance, follows, n_obs, redraw)
        new_rods = np.flatnonzero(follows)
        if new_rods.size < MIN_RODS:
            return CopyResult(applied=False, reason=f"no copy structure: {new_rods.size} of {rods.size} rods follow a "
                                                    "common master sequence", follows=follows, copied_share=share,
                                                    chance_share=chance)
        if np.array_equal(new_rods, rods):
            break
        rods = new_rods
    A, eps, gamma, ll, n_iter, C, post, share, chance, follows, n_obs, redraw = result
    if single_posteriors is not None:
        keep = ~follows
        post[keep] = np.asarray(single_posteriors, float)[keep]
    n_f = float(n_obs[follows].sum())
    eps_err = math.sqrt(max(eps * (1 - eps), 1e-12) / max(n_f, 1.0))
    return CopyResult(applied=True, reason="", copy_error=eps, copy_error_err=eps_err, master_transmat=A,
                      master_posterior=gamma, follows=follows, copied_share=share, chance_share=chance,
                      posteriors=post, n_iter=n_iter, loglik=ll)


def _fit_master(columns, params, rods, A, eps, f, efficiency, max_iter, tol):
    """EM of the master chain and the copy error on the given rods."""
    K = A.shape[0]
    n_obs = max(int(columns.mask[rods].sum()), 1)
    prev = -np.inf
    gamma = np.full((columns.n_sites, K), 1.0 / K)
    ll = -np.inf
    it = 0
    for it in range(1, max_iter + 1):
        C = (1 - eps) * np.eye(K) + eps * f[None, :]
        logE = _master_terms(columns, params, rods, C, efficiency)
        start = _stationary(A)
        fb = forward_backward(logE[None], A, start)
        gamma = fb.posteriors[0]
        ll = float(fb.loglik[0])
        _, redraw, nobs = _rod_posteriors(columns, params, rods, C, gamma, eps, f, efficiency, posteriors=False)
        eps = float(np.clip(redraw.sum() / max(nobs.sum(), 1), 1e-4, 0.999))
        A = update_transmat(fb.xi, gamma[0], A)
        if abs(ll - prev) < tol * n_obs:
            break
        prev = ll
    return A, eps, gamma, ll, it


def _stationary(A):
    w, v = np.linalg.eig(A.T)
    i = int(np.argmin(np.abs(w - 1)))
    p = np.abs(np.real(v[:, i]))
    return p / p.sum()


def pooled_result(decoded, copies: CopyResult):
    """The decoding with the pooled posteriors of the rods that follow the master.

    Each site's metal is the largest pooled posterior (the site-wise most probable metal: the
    master's chain, not the rod's, links the sites of a following rod); ``uncertain`` and the run
    listing follow. Rods that do not follow keep their single-rod decoding.

    Parameters
    ----------
    decoded : DecodeResult
    copies : CopyResult
        An applied copy-aware decoding of the same columns.

    Returns
    -------
    DecodeResult
    """
    from dataclasses import replace

    from .chain import runs_table

    if not copies.applied or copies.posteriors is None:
        return decoded
    follow = copies.follows
    post = np.array(decoded.posteriors, dtype=float, copy=True)
    post[follow] = copies.posteriors[follow]
    path = np.array(decoded.viterbi, copy=True)
    path[follow] = np.where(decoded.mask[follow], post[follow].argmax(-1), -1)
    uncertain = decoded.mask & (post.max(-1) < decoded.uncertain_below)
    return replace(decoded, posteriors=post.astype(decoded.posteriors.dtype, copy=False),
                   viterbi=path.astype(decoded.viterbi.dtype, copy=False), uncertain=uncertain,
                   runs=runs_table(path, decoded.mask, post))


def copies_suspected(columns: RodColumns, decoded) -> tuple:
    """Whether neighbouring rods' posteriors agree beyond chance (a cheap test that decides
    whether :func:`decode_copies` is tried).

    For a neighbouring pair (i, j) the agreement at a site both observe is
    ``sum_k P_i(k) P_j(k)`` (the probability that the two sites hold the same metal); chance is
    ``sum_k m_k^2`` with ``m`` the mean posterior over all observed sites (what independent rods
    give); kappa is ``(agreement - chance) / (1 - chance)``. The z score uses the pairs' mean
    agreements as independent units (sites of one pair are not independent). Posteriors rather
    than paths: where the evidence is weak a path leans to the abundant metal, which makes paths
    agree without copying, while a posterior stays calibrated.

    Returns
    -------
    suspected : bool
        ``z >= SUSPECT_Z`` and ``kappa >= SUSPECT_KAPPA``.
    detail : dict
        ``agreement``, ``chance``, ``kappa``, ``z``, ``n_pairs``.
    """
    from .passes import pair_agreement

    nb = np.asarray(columns.neighbours, np.int64).reshape(-1, 2)
    per_pair, m = pair_agreement(decoded.posteriors, decoded.mask, nb)  # one compiled pass each
    chance = float(m @ m)
    per_pair = per_pair[np.isfinite(per_pair)]
    if per_pair.size < 2:
        return False, {"agreement": None, "chance": chance, "kappa": None, "z": None, "n_pairs": int(per_pair.size)}
    agree = float(per_pair.mean())
    kappa = (agree - chance) / max(1 - chance, 1e-12)
    z = (agree - chance) / max(float(per_pair.std(ddof=1)) / math.sqrt(per_pair.size), 1e-12)
    detail = {"agreement": agree, "chance": chance, "kappa": kappa, "z": z, "n_pairs": int(per_pair.size)}
    return bool(kappa >= SUSPECT_KAPPA and z >= SUSPECT_Z), detail
