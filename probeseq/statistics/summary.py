"""The statistics of one run: :class:`RunStatistics`, from decoded paths or posteriors.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field

import numpy as np

from ..decoding.chain import (
    RUN_LENGTH_DEFINITIONS,
    independent_run_lengths,
    mean_run_lengths,
    stationary_distribution,
)
from ..exceptions import DataQualityWarning, InputError
from ..utils.marks import to_jsonable
from .agreement import (
    _BLOCK_BYTES,
    _EPS,
    RodAgreement,
    _corr_from_sums,
    _corrected_from_sums,
    _kappa,
    neighbour_pairs,
    rod_agreement,
)
from .markov import (
    _state_dtype,
    composition_from_occupancy,
    entropy_bits,
    entropy_rate_bits,
    g2_markov_test,
    persistence,
    transition_counts_from_paths,
    transition_matrix,
)
from .runs import _run_histograms, _run_length_tables, _runs_per_rod, _z_from_sums

__all__ = ['RunStatistics', 'compute_statistics', 'statistics_from_arrays']

# ---------------------------------------------------------------------- results
@dataclass(frozen=True)
class RunStatistics:
    """Statistics of one run's decoded sequences, with bootstrap replicates over rods.

    Attributes
    ----------
    metals : tuple of str
    pitch_nm : float, nm
    n_rods : int
    n_sites_used : int
        Unmasked sites over all rods.
    estimates : dict of str -> float
        Point estimates under dotted names, e.g. ``composition.Co``,
        ``mean_run_length_sites.Zn``, ``persistence``, ``runs_test.z``, ``rod_to_rod.corr``.
    replicates : dict of str -> (n_boot,) ndarray of float
        The same statistics in each bootstrap resample.
    transmat : (K, K) ndarray of float
        Fitted transition matrix used for the estimates.
    composition : (K,) ndarray of float
    occupancy : (K,) ndarray of float
        Expected sites of each metal over all rods.
    least_abundant : int
        Index of the metal with the smallest composition.
    markov_test : dict
        ``lr_stat``, ``lr_df``, ``lr_pvalue`` of the decoder (or of G^2 when it gave none),
        ``bic``, ``bic_indep``, ``g2``, ``g2_df``, ``g2_pvalue`` on the expected counts.
    run_lengths : dict
        Per metal symbol, the output of :func:`run_length_distribution` for decoded runs.
    runs_test_per_metal : dict
        Per metal symbol: ``z``, ``p``, ``n_runs``, ``expected_runs``.
    rod_to_rod : RodAgreement or None
        None when there are no neighbour pairs.
    n_boot : int
    random_state : int or None
    notes : tuple of str
        What the estimates rest on, e.g. hard counts when no expected counts were given.
    """

    metals: tuple
    pitch_nm: float
    n_rods: int
    n_sites_used: int
    estimates: dict
    replicates: dict
    transmat: np.ndarray
    composition: np.ndarray
    occupancy: np.ndarray
    least_abundant: int
    markov_test: dict
    run_lengths: dict
    runs_test_per_metal: dict
    rod_to_rod: RodAgreement | None
    n_boot: int
    random_state: int | None = None
    notes: tuple = field(default_factory=tuple)

    def interval(self, name: str, level: float = 0.95):
        """(estimate, low, high) of a statistic: the bootstrap percentile interval."""
        if name not in self.estimates:
            raise InputError(f"no statistic named {name!r}; known: {', '.join(sorted(self.estimates))}")
        est = float(self.estimates[name])
        rep = self.replicates.get(name)
        if rep is None:
            return est, float("nan"), float("nan")
        rep = np.asarray(rep, dtype=float)
        rep = rep[np.isfinite(rep)]
        if rep.size == 0:
            return est, float("nan"), float("nan")
        q = 100.0 * (1.0 - level) / 2.0
        lo, hi = np.percentile(rep, [q, 100.0 - q])
        return est, float(lo), float(hi)

    def to_dict(self) -> dict:
        """JSON-able summary (NaN and infinities become None).

        ``definitions`` says in one line per key what each run-length number is
        (:data:`probeseq.decoding.chain.RUN_LENGTH_DEFINITIONS`): ``mean_run_length_sites`` is the
        headline, ``1 / (1 - P_kk)`` of the fitted chain.
        """
        e = self.estimates
        out = {
            "metals": list(self.metals),
            "pitch_nm": to_jsonable(self.pitch_nm),
            "n_rods": int(self.n_rods),
            "n_sites_used": int(self.n_sites_used),
            "n_boot": int(self.n_boot),
            "random_state": self.random_state,
            "least_abundant": self.metals[self.least_abundant],
            "transmat": to_jsonable(self.transmat),
            "notes": list(self.notes),
        }
        for grp in ("composition", "mean_run_length_sites", "mean_run_length_nm", "run_length_ratio",
                    "independent_run_length_sites", "persistence_per_metal"):
            out[grp] = {mt: to_jsonable(e[f"{grp}.{mt}"]) for mt in self.metals}
        for key in ("persistence", "entropy_rate_bits", "entropy_independent_bits"):
            out[key] = to_jsonable(e[key])
        out["runs_test"] = {
            "metal": self.metals[self.least_abundant],
            "z": to_jsonable(e["runs_test.z"]),
            "p": to_jsonable(e["runs_test.p"]),
            "per_metal": {mt: {kk: to_jsonable(vv) for kk, vv in d.items()} for mt, d in self.runs_test_per_metal.items()},
        }
        rr = self.rod_to_rod
        if rr is None:
            out["rod_to_rod"] = None
        else:
            out["rod_to_rod"] = {
                "metal": self.metals[rr.metal],
                "corr": to_jsonable(rr.corr),
                "corr_lags": {str(int(d)): to_jsonable(c) for d, c in zip(rr.lags, rr.corr_lags)},
                "statistic": to_jsonable(rr.statistic),
                "best_lag": int(rr.best_lag),
                "p_value": to_jsonable(rr.p_value),
                "null_mean": to_jsonable(rr.null_mean),
                "n_null": int(np.isfinite(rr.null).sum()),
                "corr_nonneighbour": to_jsonable(rr.corr_nonneighbour),
                "p_nonneighbour": to_jsonable(rr.p_nonneighbour),
                "kappa": to_jsonable(rr.kappa),
                "corr_corrected": to_jsonable(rr.corr_corrected),
                "corr_corrected_lags": {str(int(d)): to_jsonable(c) for d, c in zip(rr.lags, rr.corr_corrected_lags)},
                "statistic_corrected": to_jsonable(rr.statistic_corrected),
                "reliability": to_jsonable(rr.reliability),
                "n_pairs": rr.n_pairs,
                "n_sites_compared": rr.n_sites_compared,
            }
        out["markov_test"] = {k: to_jsonable(v) for k, v in self.markov_test.items()}
        out["run_lengths"] = {
            mt: {k: to_jsonable(v) for k, v in d.items()} for mt, d in self.run_lengths.items()
        }
        # which mean run length is the headline, and how it differs from the decoded runs' mean
        out["definitions"] = {k: v for k, v in RUN_LENGTH_DEFINITIONS.items() if k in out}
        out["intervals"] = {}
        for name in sorted(self.estimates):
            est, lo, hi = self.interval(name)
            out["intervals"][name] = {"estimate": to_jsonable(est), "low": to_jsonable(lo), "high": to_jsonable(hi)}
        return out


# ---------------------------------------------------------------------- main entry points
def _chain_block(trans_sum, occ_sum, metals, pitch_nm, transmat=None):
    """Chain statistics for a batch: trans_sum (B, K, K), occ_sum (B, K) -> dict name -> (B,)."""
    p = transition_matrix(trans_sum) if transmat is None else np.asarray(transmat, float)[None]
    f = occ_sum / np.maximum(occ_sum.sum(axis=-1, keepdims=True), _EPS)
    mu = stationary_distribution(p)
    mrl = mean_run_lengths(p)
    ind = independent_run_lengths(f)
    lam, lam_k = persistence(p, mu)
    out = {
        "persistence": lam,
        "entropy_rate_bits": entropy_rate_bits(p, mu),
        "entropy_independent_bits": entropy_bits(f),
    }
    for k, mt in enumerate(metals):
        out[f"composition.{mt}"] = f[:, k]
        out[f"mean_run_length_sites.{mt}"] = mrl[:, k]
        out[f"mean_run_length_nm.{mt}"] = mrl[:, k] * pitch_nm
        out[f"independent_run_length_sites.{mt}"] = ind[:, k]
        with np.errstate(invalid="ignore"):
            out[f"run_length_ratio.{mt}"] = mrl[:, k] / ind[:, k]
        out[f"persistence_per_metal.{mt}"] = lam_k[:, k]
    out["markov_test.g2"] = g2_markov_test(trans_sum)[0]
    return out


def statistics_from_arrays(*, per_rod_transitions, per_rod_occupancy, metals, pitch_nm,
                           viterbi=None, posteriors=None, mask=None, neighbours=None,
                           rod_xy_nm=None, transmat=None, lr_stat=None, lr_df=None,
                           lr_pvalue=None, bic=None, bic_indep=None, n_boot: int = 200,
                           random_state=None, max_lag: int = 3, n_null: int = 199) -> RunStatistics:
    """Statistics of a run from plain arrays, with bootstrap intervals over rods.

    Parameters
    ----------
    per_rod_transitions : (n_rods, K, K) ndarray of float
        Expected (posterior-summed) transition counts of each rod; hard counts also work.
    per_rod_occupancy : (n_rods, K) ndarray of float
        Expected sites of each metal per rod.
    metals : sequence of str, length K
    pitch_nm : float, nm
        Site pitch along the rods.
    viterbi : (n_rods, n_sites) ndarray of int, optional
        Decoded states, -1 at masked sites, of any integer dtype (int8 and int16 are used as
        they are); from ``posteriors`` when omitted.
    posteriors : (n_rods, n_sites, K) ndarray of float, optional
        Posterior state probabilities, float32 or float64; the rod-to-rod correlation uses them
        when given. Only the slice of the least abundant metal is read, in its own dtype (sums are
        taken in float64, so float32 posteriors give the results of their float64 copy).
    mask : (n_rods, n_sites) ndarray of bool, optional
        Sites used; ``viterbi >= 0`` when omitted.
    neighbours : (n_pairs, 2) ndarray of int, optional
        Neighbouring rod pairs; found from ``rod_xy_nm`` when omitted.
    rod_xy_nm : (n_rods, 2) ndarray of float, nm, optional
    transmat : (K, K) ndarray of float, optional
        Fitted transition matrix for the point estimates; the M-step of the summed counts when
        omitted. Bootstrap replicates always re-estimate it from resampled counts.
    lr_stat, lr_df, lr_pvalue, bic, bic_indep : float, optional
        The decoder's likelihood-ratio test of the chain against independent sites, and BICs.
    n_boot : int
        Bootstrap resamples over rods (at least 10).
    random_state : int or numpy.random.Generator, optional
    max_lag : int, sites
        Largest depth lag for rod-to-rod agreement.
    n_null : int
        Null replicates of the rod-to-rod test.

    Returns
    -------
    RunStatistics
    """
    metals, tr, occ, pitch = _check_run_arrays(per_rod_transitions, per_rod_occupancy, metals, pitch_nm,
                                               n_boot, max_lag)
    k = len(metals)
    n_rods = tr.shape[0]
    n_boot = int(n_boot)
    seed = random_state if isinstance(random_state, (int, np.integer)) or random_state is None else None
    rng = np.random.default_rng(random_state)
    notes = []
    post, vit = _check_decoded_arrays(viterbi, posteriors, mask, n_rods, k)
    m = vit >= 0

    # point estimates
    tr_sum = tr.sum(axis=0)
    occ_sum = occ.sum(axis=0)
    if transmat is not None:
        p_fit = np.asarray(transmat, dtype=float)
        if p_fit.shape != (k, k):
            raise InputError(f"transmat must be ({k}, {k}), got shape {p_fit.shape}")
    else:
        p_fit = transition_matrix(tr_sum)
    est = {key: float(v[0]) for key, v in _chain_block(tr_sum[None], occ_sum[None], metals, pitch, p_fit).items()}
    comp = composition_from_occupancy(occ_sum)
    least = int(np.argmin(comp))

    # bootstrap over rods
    w = rng.multinomial(n_rods, np.full(n_rods, 1.0 / n_rods), size=n_boot).astype(float)
    tr_b = np.einsum("br,rij->bij", w, tr)
    occ_b = w @ occ
    reps = _chain_block(tr_b, occ_b, metals, pitch)
    if transmat is not None:
        _centre_on_fit(reps, est, _chain_block(tr_sum[None], occ_sum[None], metals, pitch))

    mk = _markov_test_summary(tr_sum, est, notes, lr_stat, lr_df, lr_pvalue, bic, bic_indep)
    runs_pm = _runs_test_estimates(vit, k, metals, least, w, est, reps)

    # run-length distribution of decoded runs (tabulated without listing the runs)
    rld = _run_length_tables(*_run_histograms(vit, k), k, p_fit, comp, None)
    run_lengths = {metals[s]: d for s, d in rld.items()}

    rr = _rod_to_rod_estimates(post, vit, m, least, k, neighbours, rod_xy_nm, max_lag, n_null, n_boot,
                               rng, est, reps, notes)

    return RunStatistics(
        metals=metals, pitch_nm=pitch, n_rods=int(n_rods), n_sites_used=int(np.count_nonzero(m)),
        estimates=est, replicates={key: np.asarray(v, dtype=float) for key, v in reps.items()},
        transmat=p_fit, composition=comp, occupancy=occ_sum, least_abundant=least,
        markov_test=mk, run_lengths=run_lengths, runs_test_per_metal=runs_pm, rod_to_rod=rr,
        n_boot=n_boot, random_state=int(seed) if seed is not None else None, notes=tuple(notes),
    )


#: natural range of the chain statistics whose replicates :func:`_centre_on_fit` moves (by name prefix)
_CHAIN_RANGES = {"persistence": (-1.0, 1.0), "persistence_per_metal": (-1.0, 1.0), "entropy_rate_bits": (0.0, np.inf),
                 "mean_run_length_sites": (1.0, np.inf), "mean_run_length_nm": (0.0, np.inf),
                 "run_length_ratio": (0.0, np.inf)}


def _centre_on_fit(reps: dict, est: dict, resampled_est: dict) -> None:
    """Place the bootstrap replicates of the chain statistics around the reported estimates, in place.

    The replicates re-estimate the transition matrix from the resampled rods' summed transition
    counts (refitting the decoder per resample would cost a whole EM each). When the reported
    estimate comes from the decoder's fitted matrix (``transmat`` given), the two estimators can
    differ by a nearly constant amount: with soft evidence the decoded posteriors' transition
    counts are not the fit's (a mean run of 21.8 sites against the fit's 20.3 on a 10^7-ion run,
    whose interval then missed its own estimate). Each replicate is moved by the difference of
    the two estimates on the whole sample, ``est - est_counts``, so the interval has the spread of
    the rod bootstrap around the reported value (the basic bootstrap's assumption that the spread
    does not depend on that shift), and kept in the statistic's natural range.
    """
    for key, rep in reps.items():
        prefix = key.split(".", 1)[0]
        if prefix not in _CHAIN_RANGES:
            continue
        shift = float(est[key]) - float(np.asarray(resampled_est[key]).ravel()[0])
        if shift != 0.0 and math.isfinite(shift):
            lo, hi = _CHAIN_RANGES[prefix]
            reps[key] = np.clip(np.asarray(rep, float) + shift, lo, hi)


def _check_run_arrays(per_rod_transitions, per_rod_occupancy, metals, pitch_nm, n_boot, max_lag):
    """Validate the per-rod count arrays and scalar settings of :func:`statistics_from_arrays`.

    Returns ``(metals, transitions, occupancy, pitch)`` with metals as a tuple of str and the
    arrays as float.
    """
    metals = tuple(str(mt) for mt in metals)
    k = len(metals)
    if k < 2:
        raise InputError(f"metals: need at least 2 metals, got {len(metals)}")
    tr = np.asarray(per_rod_transitions, dtype=float)
    occ = np.asarray(per_rod_occupancy, dtype=float)
    if tr.ndim != 3 or tr.shape[1:] != (k, k):
        raise InputError(f"per_rod_transitions must be (n_rods, {k}, {k}), got shape {tr.shape}")
    n_rods = tr.shape[0]
    if occ.shape != (n_rods, k):
        raise InputError(f"per_rod_occupancy must be ({n_rods}, {k}), got shape {occ.shape}")
    if not (np.isfinite(tr).all() and np.isfinite(occ).all()) or (tr < 0).any() or (occ < 0).any():
        raise InputError("per_rod_transitions and per_rod_occupancy must be finite and non-negative")
    if n_rods < 1:
        raise InputError("per_rod_transitions: no rods")
    pitch = float(pitch_nm)
    if not (math.isfinite(pitch) and pitch > 0):
        raise InputError(f"pitch_nm must be a positive number of nm, got {pitch_nm}")
    if int(n_boot) < 10:
        raise InputError(f"n_boot must be at least 10, got {n_boot}")
    if int(max_lag) < 0:
        raise InputError(f"max_lag must be >= 0 sites, got {max_lag}")
    return metals, tr, occ, pitch


def _check_decoded_arrays(viterbi, posteriors, mask, n_rods, k):
    """Validate the decoded states and posteriors; return ``(posteriors, states)``.

    The states come back in a small signed dtype, -1 at masked sites (decoded from the
    posteriors when ``viterbi`` is None); the posteriors are None when not given.
    """
    post = None if posteriors is None else np.asarray(posteriors)
    if post is not None and post.dtype.kind not in "fiub":
        post = np.asarray(post, dtype=float)
    if post is not None and (post.ndim != 3 or post.shape[0] != n_rods or post.shape[2] != k):
        raise InputError(f"posteriors must be ({n_rods}, n_sites, {k}), got shape {post.shape}")
    if mask is not None:
        mask = np.asarray(mask, dtype=bool)
    if viterbi is None:
        if post is None:
            raise InputError("give viterbi or posteriors: the decoded states are needed")
        vit = _argmax_states(post)
    else:
        vit = np.asarray(viterbi)
    if vit.ndim != 2 or vit.shape[0] != n_rods:
        raise InputError(f"viterbi must be ({n_rods}, n_sites), got shape {vit.shape}")
    if post is not None and post.shape[1] != vit.shape[1]:
        raise InputError(f"posteriors have {post.shape[1]} sites, viterbi {vit.shape[1]}")
    if mask is not None and mask.shape != vit.shape:
        raise InputError(f"mask shape {mask.shape} does not match viterbi {vit.shape}")
    # decoded states in a small signed dtype, -1 at masked sites
    vit, top = _used_states(vit, mask, k, own=viterbi is None)
    if top >= k:
        raise InputError(f"viterbi holds state {top}, expected states 0..{k - 1}")
    return post, vit


def _markov_test_summary(tr_sum, est, notes, lr_stat, lr_df, lr_pvalue, bic, bic_indep):
    """Markov test summary: the decoder's likelihood-ratio test when given, G^2 on counts otherwise.

    Adds the G^2 statistic to ``est`` and a note to ``notes`` when the decoder's test is missing.
    """
    g2, g2_df, g2_p = g2_markov_test(tr_sum)
    mk = {
        "lr_stat": float(g2) if lr_stat is None else float(lr_stat),
        "lr_df": int(g2_df) if lr_df is None else int(lr_df),
        "lr_pvalue": float(g2_p) if lr_pvalue is None else float(lr_pvalue),
        "bic": None if bic is None else float(bic),
        "bic_indep": None if bic_indep is None else float(bic_indep),
        "g2": float(g2), "g2_df": int(g2_df), "g2_pvalue": float(g2_p),
        "source": "decoder" if lr_pvalue is not None else "g2 on expected transition counts",
    }
    if lr_pvalue is None:
        notes.append("Markov test: no likelihood-ratio test from the decoder; G^2 on expected counts used")
    est["markov_test.g2"] = float(g2)
    return mk


def _runs_test_estimates(vit, k, metals, least, w, est, reps):
    """Runs test on decoded paths, per rod so the bootstrap weights ``w`` can resample it.

    Adds the least abundant metal's z and p to ``est`` and ``reps``; returns the per-metal table.
    """
    r_rod, e_rod, v_rod = _runs_per_rod(vit, k)
    z, pz = _z_from_sums(r_rod.sum(0), e_rod.sum(0), v_rod.sum(0))
    runs_pm = {mt: {"z": float(z[s]), "p": float(pz[s]), "n_runs": float(r_rod[:, s].sum()),
                    "expected_runs": float(e_rod[:, s].sum())} for s, mt in enumerate(metals)}
    est["runs_test.z"], est["runs_test.p"] = float(z[least]), float(pz[least])
    zb, pb = _z_from_sums(w @ r_rod[:, least], w @ e_rod[:, least], w @ v_rod[:, least])
    reps["runs_test.z"], reps["runs_test.p"] = zb, pb
    return runs_pm


def _rod_to_rod_estimates(post, vit, m, least, k, neighbours, rod_xy_nm, max_lag, n_null, n_boot,
                          rng, est, reps, notes):
    """Rod-to-rod agreement of the least abundant metal, with bootstrap replicates over pairs.

    Fills ``est`` and ``reps`` and appends to ``notes``; returns the :class:`RodAgreement`, or
    None when there are no neighbouring rod pairs.
    """
    nb = None if neighbours is None else np.asarray(neighbours, dtype=np.int64).reshape(-1, 2)
    if nb is None and rod_xy_nm is not None:
        nb = neighbour_pairs(rod_xy_nm)
    rr = None
    if nb is not None and len(nb):
        # only the one slice of the posteriors is read (a view, in its own dtype; sums in float64)
        vals = post[:, :, least] if post is not None else (vit == least)
        rr = rod_agreement(vals, m, nb, metal=least, states=vit, n_states=k, max_lag=max_lag,
                           n_null=n_null, rng=rng)
        est["rod_to_rod.corr"] = rr.corr
        est["rod_to_rod.statistic"] = rr.statistic
        est["rod_to_rod.p_value"] = rr.p_value
        est["rod_to_rod.kappa"] = rr.kappa
        est["rod_to_rod.corr_corrected"] = rr.corr_corrected
        est["rod_to_rod.statistic_corrected"] = rr.statistic_corrected
        for d, c in zip(rr.lags, rr.corr_lags):
            est[f"rod_to_rod.corr_lag.{int(d)}"] = float(c)
        _rod_to_rod_replicates(rr, max_lag, n_boot, rng, reps)
    else:
        notes.append("rod-to-rod agreement: no neighbouring rod pairs")
    if post is None:
        notes.append("rod-to-rod agreement on decoded states (no posteriors given)")
    return rr


def _rod_to_rod_replicates(rr, max_lag, n_boot, rng, reps):
    """Bootstrap replicates of the rod-to-rod statistics, resampling neighbour pairs into ``reps``."""
    wp = rng.multinomial(rr.n_pairs, np.full(rr.n_pairs, 1.0 / rr.n_pairs), size=n_boot).astype(float)
    bs = np.einsum("bp,plc->blc", wp, rr.pair_sums)  # (B, L, 5)
    cl = _corr_from_sums(bs)  # (B, L)
    cc = _corrected_from_sums(bs)
    for li, d in enumerate(rr.lags):
        reps[f"rod_to_rod.corr_lag.{int(d)}"] = cl[:, li]
    reps["rod_to_rod.corr"] = cl[:, int(max_lag)]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        stat_b = np.nanmax(cl, axis=1)
        best_b = np.argmax(np.where(np.isfinite(cl), cl, -np.inf), axis=1)
    reps["rod_to_rod.statistic"] = stat_b
    reps["rod_to_rod.corr_corrected"] = cc[:, int(max_lag)]
    reps["rod_to_rod.statistic_corrected"] = np.where(np.isfinite(stat_b), cc[np.arange(n_boot), best_b], np.nan)
    ok = np.isfinite(rr.null)
    if ok.any():
        nul = np.sort(rr.null[ok])
        ge = nul.size - np.searchsorted(nul, stat_b, side="left")
        reps["rod_to_rod.p_value"] = np.where(np.isfinite(stat_b), (1.0 + ge) / (1.0 + nul.size), np.nan)
    reps["rod_to_rod.kappa"] = _kappa(np.einsum("bp,pij->bij", wp, rr.pair_confusion))


def _argmax_states(post) -> np.ndarray:
    """Most probable state per site of (n_rods, n_sites, K) posteriors, in blocks of rods, as a
    small signed integer array (no full int64 temporary)."""
    n_rods, n_sites, k = post.shape
    out = np.empty((n_rods, n_sites), dtype=_state_dtype(k))
    step = max(1, _BLOCK_BYTES // max(1, 8 * n_sites))
    for r0 in range(0, n_rods, step):
        out[r0:r0 + step] = np.argmax(post[r0:r0 + step], axis=2)
    return out


def _used_states(vit, mask, k: int, own: bool = False):
    """Decoded states with -1 wherever the mask is off or the state is negative, and the largest
    state at a used site.

    The result has the smallest signed dtype holding ``k`` states; it is ``vit`` itself, changed in
    place, when ``own`` (the caller made it) and it already has that dtype, else a new array filled
    in blocks of rods (no full int64 temporary).
    """
    dt = _state_dtype(max(int(k), 1))
    n_rods, n_sites = vit.shape
    out = vit if (own and vit.dtype == dt) else np.empty(vit.shape, dtype=dt)
    step = max(1, _BLOCK_BYTES // max(1, 8 * n_sites))
    top = -1
    for r0 in range(0, n_rods, step):
        v = vit[r0:r0 + step]
        if v.dtype.kind != "i":
            v = v.astype(np.int64)
        use = v >= 0
        if mask is not None:
            use &= mask[r0:r0 + step]
        if use.any():
            top = max(top, int(v[use].max()))
        if top < k:
            out[r0:r0 + step] = np.where(use, v, v.dtype.type(-1))
    return out, top


_DECODED_FIELDS = ("transmat", "metals", "pitch_nm", "viterbi", "posteriors", "mask",
                   "per_rod_transitions", "per_rod_occupancy", "lr_stat", "lr_df", "lr_pvalue",
                   "bic", "bic_indep", "neighbours", "rod_xy_nm")


def compute_statistics(decoded_like, columns_like=None, n_boot: int = 200, random_state=None,
                       max_lag: int = 3, n_null: int = 199) -> RunStatistics:
    """Statistics of a decoded run, read from a decoding result.

    Reads the attributes ``transmat, metals, pitch_nm, viterbi, posteriors, mask,
    per_rod_transitions, per_rod_occupancy, lr_stat, lr_df, lr_pvalue, bic, bic_indep,
    neighbours, rod_xy_nm`` of ``decoded_like``; any that is missing or None is taken from
    ``columns_like`` (e.g. :class:`~probeseq.lattice.rodcolumns.RodColumns`) when it has it. Without expected
    counts, hard counts on the decoded path are used, with a :class:`DataQualityWarning` because
    they do not account for decoding noise.

    Parameters
    ----------
    decoded_like : object
        A decoding result.
    columns_like : object, optional
        The rod columns the decoding was run on.
    n_boot, random_state, max_lag, n_null
        As in :func:`statistics_from_arrays`.

    Returns
    -------
    RunStatistics
    """
    vals = {}
    for name in _DECODED_FIELDS:
        v = getattr(decoded_like, name, None)
        if v is None and columns_like is not None:
            v = getattr(columns_like, name, None)
        vals[name] = v
    for req in ("metals", "pitch_nm"):
        if vals[req] is None:
            raise InputError(f"decoding result: no {req!r} (nor on the columns given)")
    if vals["per_rod_transitions"] is None or vals["per_rod_occupancy"] is None:
        path = vals["viterbi"]
        if path is None and vals["posteriors"] is not None:
            post = np.asarray(vals["posteriors"])
            if post.ndim != 3:
                raise InputError(f"decoding result: posteriors must be (n_rods, n_sites, K), got shape {post.shape}")
            path = _argmax_states(post)
        if path is None:
            raise InputError("decoding result: no per_rod_transitions/per_rod_occupancy and no decoded states")
        warnings.warn("decoding result has no expected transition counts; counting on the decoded path, "
                      "which does not account for decoding noise", DataQualityWarning, stacklevel=2)
        tr, occ = transition_counts_from_paths(path, len(tuple(vals["metals"])), vals["mask"])
        vals["per_rod_transitions"], vals["per_rod_occupancy"] = tr, occ
    return statistics_from_arrays(n_boot=n_boot, random_state=random_state, max_lag=max_lag,
                                  n_null=n_null, **vals)
