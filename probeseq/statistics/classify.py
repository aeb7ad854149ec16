"""Classify the metal arrangement of a run from its sequence statistics.

Rules (thresholds settable, defaults in brackets):

* ``along_rod`` is ``random`` when the independent-sites model is not rejected by the decoder's
  likelihood-ratio test (p >= ``alpha`` [0.01]); otherwise ``short-repeat`` when the least abundant
  metal's mean run length (fitted chain, ``1 / (1 - P_kk)``) is under ``long_block_sites`` [8]
  sites and ``long-block`` when at or over it.
* ``rod_to_rod`` is ``copied`` when neighbouring rods agree significantly (circular-shift
  permutation p < ``alpha``) and their correlation, corrected for decoding noise and taken at the
  best of the small depth lags, is at least ``copy_threshold`` [0.3]; otherwise ``independent``.
* ``label`` is ``rod-to-rod-copied`` when copied, else the along-rod class.
* ``confidence`` is the share of bootstrap resamples over rods that give the same label. In a
  resample the likelihood-ratio statistic is the observed one shifted by how much the G^2 statistic
  of the resampled expected transition counts (Anderson & Goodman 1957, df = (K-1)^2) differs from
  G^2 of all counts, ``LR_b = LR + G2_b - G2``; the rod-to-rod p-value of a resample compares its
  correlation with the null replicates of the full data.
* ``undetermined`` (never a guess) when there are fewer than ``min_rods`` rods, fewer than
  ``min_sites`` decoded sites, fewer than ``min_minority_sites`` expected sites of the least
  abundant metal, no neighbouring rod pairs, or no finite test result.

Why ``copy_threshold = 0.3``: a copied rod repeats a master sequence with each site redrawn from
the composition with probability e, so two copies share the master at a site with probability
(1 - e)^2 and the correlation of a metal's indicator between them is (1 - e)^2: 0.90 for e = 0.05,
0.64 for e = 0.2, 0.3 for e = 0.45. Decoding noise lowers the correlation of the posteriors by
the factor sqrt(r_i r_j), r = the share of the indicator's variance the posteriors recover (about
the detection efficiency when sites are independent: a site without an ion tells nothing), so the
statistics divide it out (Spearman's correction for attenuation) and the threshold applies to the
correlation of the true indicators whatever the efficiency. Independent rods give 0 on average, but
lateral blur hands some of one rod's ions to its neighbour, and that crosstalk makes independent
neighbours agree a little at the same depth. The permutation test detects that agreement as real,
so a floor is needed. 0.3 is well above the few per cent that ~10 % crosstalk gives (up to about
0.1 after the correction) and below what copies with copy errors up to 0.45 give.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy import stats as _sps

from ..exceptions import InputError
from .summary import RunStatistics

__all__ = ['Classification', 'classify', 'LABELS', 'ALONG_ROD_CLASSES', 'ROD_TO_ROD_CLASSES']

ALONG_ROD_CLASSES = frozenset({"random", "short-repeat", "long-block", "undetermined"})


ROD_TO_ROD_CLASSES = frozenset({"independent", "copied", "undetermined"})


LABELS = frozenset({"random", "short-repeat", "long-block", "rod-to-rod-copied", "undetermined"})


@dataclass(frozen=True)
class Classification:
    """The arrangement class of a run and why.

    Attributes
    ----------
    label : str
        One of ``random``, ``short-repeat``, ``long-block``, ``rod-to-rod-copied``, ``undetermined``.
    along_rod : str
        ``random``, ``short-repeat``, ``long-block`` or ``undetermined``.
    rod_to_rod : str
        ``independent``, ``copied`` or ``undetermined``.
    confidence : float
        Share of bootstrap resamples giving the same label, in [0, 1]; 0 when undetermined.
    reasons : tuple of str
        Plain-language reasons quoting the numbers.
    label_shares : dict of str -> float
        Share of resamples giving each label.
    thresholds : dict
        The thresholds used.
    """

    label: str
    along_rod: str
    rod_to_rod: str
    confidence: float
    reasons: tuple
    label_shares: dict = field(default_factory=dict)
    thresholds: dict = field(default_factory=dict)

    def to_dict(self) -> dict:
        """JSON-able form."""
        return {
            "label": self.label,
            "along_rod": self.along_rod,
            "rod_to_rod": self.rod_to_rod,
            "confidence": float(self.confidence),
            "reasons": list(self.reasons),
            "label_shares": {k: float(v) for k, v in sorted(self.label_shares.items())},
            "thresholds": dict(self.thresholds),
        }


def _check_thresholds(alpha, long_block_sites, copy_threshold, min_rods, min_sites, min_minority_sites):
    def num(name, v):
        try:
            x = float(v)
        except (TypeError, ValueError):
            raise InputError(f"{name} must be a number, got {v!r}") from None
        if not math.isfinite(x):
            raise InputError(f"{name} must be finite, got {v!r}")
        return x

    a = num("alpha", alpha)
    if not 0.0 < a < 1.0:
        raise InputError(f"alpha must be in (0, 1), got {alpha}")
    lb = num("long_block_sites", long_block_sites)
    if lb < 1.0:
        raise InputError(f"long_block_sites must be >= 1 site, got {long_block_sites}")
    ct = num("copy_threshold", copy_threshold)
    if not 0.0 <= ct <= 1.0:
        raise InputError(f"copy_threshold must be in [0, 1], got {copy_threshold}")
    out = [a, lb, ct]
    for name, v, lo in (("min_rods", min_rods, 1), ("min_sites", min_sites, 1),
                        ("min_minority_sites", min_minority_sites, 0)):
        x = num(name, v)
        if x < lo or x != int(x):
            raise InputError(f"{name} must be an integer >= {lo}, got {v}")
        out.append(int(x))
    return out


def _fmt(x, nd=None) -> str:
    """Numbers for reasons: 2-3 significant figures, no trailing noise."""
    if x is None or not math.isfinite(float(x)):
        return "n/a"
    x = float(x)
    if nd is not None:
        return f"{x:.{nd}f}"
    ax = abs(x)
    if ax >= 100:
        return f"{x:.0f}"
    if ax >= 10:
        return f"{x:.1f}".rstrip("0").rstrip(".")
    if ax >= 0.01 or ax == 0:
        return f"{x:.2f}".rstrip("0").rstrip(".") if ax >= 1 else f"{x:.2f}"
    return f"{x:.1e}"


def _fmt_p(p) -> str:
    if p is None or not math.isfinite(float(p)):
        return "n/a"
    p = float(p)
    return f"{p:.3f}" if p >= 0.001 else f"{p:.1e}"


def _span(lo, hi, nd=None) -> str:
    """An interval as 'lo-hi', or 'lo to hi' when a bound is negative."""
    sep = " to " if (math.isfinite(lo) and lo < 0) or (math.isfinite(hi) and hi < 0) else "-"
    return f"{_fmt(lo, nd)}{sep}{_fmt(hi, nd)}"


def _along(p_lr, run_len, alpha, long_block_sites):
    if p_lr >= alpha:
        return "random"
    return "long-block" if run_len >= long_block_sites else "short-repeat"


def classify(stats: RunStatistics, lr_pvalue: float | None = None, long_block_sites: float = 8,
             alpha: float = 0.01, copy_threshold: float = 0.3, min_rods: int = 5,
             min_sites: int = 200, min_minority_sites: int = 20) -> Classification:
    """Classify a run's arrangement from its statistics.

    Parameters
    ----------
    stats : RunStatistics
        From :func:`probeseq.statistics.summary.compute_statistics`.
    lr_pvalue : float, optional
        p-value of the likelihood-ratio test of independent sites against the fitted chain; the
        one recorded in ``stats.markov_test`` when omitted.
    long_block_sites : float, sites
        Mean run length of the least abundant metal at or over which runs are long blocks (>= 1).
    alpha : float
        Significance level of both tests, in (0, 1).
    copy_threshold : float
        Smallest neighbouring-rod correlation called copied, in [0, 1].
    min_rods : int
        Fewest rods to classify.
    min_sites : int
        Fewest decoded sites (all rods) to classify.
    min_minority_sites : int
        Fewest expected sites of the least abundant metal to classify.

    Returns
    -------
    Classification
    """
    if not isinstance(stats, RunStatistics):
        raise InputError(f"stats must be a RunStatistics, got {type(stats).__name__}")
    alpha, long_block_sites, copy_threshold, min_rods, min_sites, min_minority_sites = _check_thresholds(
        alpha, long_block_sites, copy_threshold, min_rods, min_sites, min_minority_sites)
    thresholds = {"alpha": alpha, "long_block_sites": long_block_sites, "copy_threshold": copy_threshold,
                  "min_rods": min_rods, "min_sites": min_sites, "min_minority_sites": min_minority_sites}
    mk = stats.markov_test
    if lr_pvalue is None:
        lr_pvalue = mk.get("lr_pvalue")
    p_lr = float("nan") if lr_pvalue is None else float(lr_pvalue)
    if math.isfinite(p_lr) and not 0.0 <= p_lr <= 1.0:
        raise InputError(f"lr_pvalue must be a probability in [0, 1], got {lr_pvalue}")
    metals = stats.metals
    m = stats.least_abundant
    mt = metals[m]
    est = stats.estimates
    rr = stats.rod_to_rod

    # ---- can it be classified at all?
    blockers = []
    if stats.n_rods < min_rods:
        blockers.append(f"only {stats.n_rods} rods were decoded; at least {min_rods} are needed to "
                        "estimate the statistics and their intervals")
    if stats.n_sites_used < min_sites:
        blockers.append(f"only {stats.n_sites_used} sites were decoded; at least {min_sites} are needed")
    minority = float(stats.occupancy[m])
    if minority < min_minority_sites:
        blockers.append(f"the least abundant metal, {mt}, fills only {_fmt(minority)} sites; at least "
                        f"{min_minority_sites} are needed to measure its runs")
    if not math.isfinite(p_lr):
        blockers.append("there is no likelihood-ratio test of independent sites against the fitted chain")
    run_len = float(est.get(f"mean_run_length_sites.{mt}", float("nan")))
    if not math.isfinite(run_len) and not blockers:
        blockers.append(f"the mean run length of {mt} is not finite (the fitted chain never leaves {mt})")
    no_pairs = rr is None or rr.n_pairs == 0 or not math.isfinite(rr.statistic) or not math.isfinite(rr.p_value)
    if no_pairs:
        blockers.append("there are no neighbouring rod pairs with sites decoded in both, so agreement "
                        "between rods cannot be tested")

    reasons = []
    along = rod = "undetermined"
    if math.isfinite(p_lr) and math.isfinite(run_len) and stats.n_rods >= min_rods \
            and stats.n_sites_used >= min_sites and minority >= min_minority_sites:
        along = _along(p_lr, run_len, alpha, long_block_sites)
    if not no_pairs and stats.n_rods >= min_rods and stats.n_sites_used >= min_sites:
        rod = "copied" if (rr.p_value < alpha and rr.statistic_corrected >= copy_threshold) else "independent"

    if blockers:
        reasons.extend(f"undetermined: {b}" for b in blockers)
        reasons.extend(_evidence(stats, p_lr, alpha, long_block_sites, copy_threshold, along, rod))
        return Classification(label="undetermined", along_rod=along, rod_to_rod=rod, confidence=0.0,
                              reasons=tuple(reasons), label_shares={}, thresholds=thresholds)

    label = "rod-to-rod-copied" if rod == "copied" else along

    # ---- bootstrap labels
    shares, conf, n_ok = _bootstrap_labels(stats, p_lr, alpha, long_block_sites, copy_threshold, label)
    reasons.extend(_evidence(stats, p_lr, alpha, long_block_sites, copy_threshold, along, rod))
    if n_ok:
        reasons.append(f"{_fmt(100 * conf, 0)} % of {n_ok} bootstrap resamples over rods give the same "
                       f"label ({label})")
    else:
        reasons.append("no bootstrap resample could be labelled, so the confidence is 0")
    return Classification(label=label, along_rod=along, rod_to_rod=rod, confidence=conf,
                          reasons=tuple(reasons), label_shares=shares, thresholds=thresholds)


def _bootstrap_labels(stats, p_lr, alpha, long_block_sites, copy_threshold, label):
    rep = stats.replicates
    mt = stats.metals[stats.least_abundant]
    mk = stats.markov_test
    df = int(mk.get("lr_df") or mk.get("g2_df") or 1)
    g2 = float(mk.get("g2", float("nan")))
    g2_b = rep.get("markov_test.g2")
    run_b = rep.get(f"mean_run_length_sites.{mt}")
    if g2_b is None or run_b is None:
        return {}, 0.0, 0
    lr_obs = float(_sps.chi2.isf(p_lr, df)) if p_lr > 0 else math.inf
    with np.errstate(invalid="ignore"):
        lr_b = np.maximum(lr_obs + (np.asarray(g2_b) - g2), 0.0) if math.isfinite(lr_obs) else np.full(len(g2_b), np.inf)
    p_b = _sps.chi2.sf(lr_b, df)
    along_b = np.where(p_b >= alpha, "random", np.where(run_b >= long_block_sites, "long-block", "short-repeat"))
    ok = ~np.isnan(run_b) | (p_b >= alpha)
    stat_b = rep.get("rod_to_rod.statistic_corrected")
    pr_b = rep.get("rod_to_rod.p_value")
    if stat_b is not None and pr_b is not None:
        copied_b = (np.asarray(pr_b) < alpha) & (np.asarray(stat_b) >= copy_threshold)
        ok &= np.isfinite(stat_b) & np.isfinite(pr_b)
        labels = np.where(copied_b, "rod-to-rod-copied", along_b)
    else:
        labels = along_b
    labels = labels[ok]
    n = int(labels.size)
    if n == 0:
        return {}, 0.0, 0
    names, counts = np.unique(labels, return_counts=True)
    shares = {str(a): float(c) / n for a, c in zip(names, counts)}
    return shares, float(shares.get(label, 0.0)), n


def _evidence(stats, p_lr, alpha, long_block_sites, copy_threshold, along, rod):
    """Plain-language reasons quoting the numbers behind each part of the label."""
    out = []
    mt = stats.metals[stats.least_abundant]
    comp = ", ".join(f"{x} {_fmt(100 * stats.composition[i], 1)} %" for i, x in enumerate(stats.metals))
    out.append(f"composition {comp} (from posterior site occupancy over {stats.n_rods} rods, "
               f"{stats.n_sites_used} sites)")
    if math.isfinite(p_lr):
        src = stats.markov_test.get("source", "")
        test = "likelihood-ratio test" + ("" if src == "decoder" else " (G^2 on expected transition counts)")
        if p_lr >= alpha:
            out.append(f"independent sites are not rejected: {test} p = {_fmt_p(p_lr)} >= alpha {alpha:g}")
        else:
            out.append(f"independent sites are rejected: {test} p = {_fmt_p(p_lr)} < alpha {alpha:g}")
    key = f"mean_run_length_sites.{mt}"
    if key in stats.estimates:
        e, lo, hi = stats.interval(key)
        ind = stats.estimates.get(f"independent_run_length_sites.{mt}", float("nan"))
        ratio = stats.estimates.get(f"run_length_ratio.{mt}", float("nan"))
        nm = e * stats.pitch_nm
        out.append(f"runs of {mt} (least abundant) average {_fmt(e)} sites ({_fmt(nm)} nm), 95 % interval "
                   f"{_span(lo, hi)}, {_fmt(ratio)} times what independent sites give ({_fmt(ind)} sites)")
        if along in ("short-repeat", "long-block"):
            rel = "at or over" if along == "long-block" else "under"
            out.append(f"that is {rel} the long-block threshold of {long_block_sites:g} sites, so {along}")
    if "persistence" in stats.estimates:
        e, lo, hi = stats.interval("persistence")
        out.append(f"persistence {_fmt(e, 2)} (95 % interval {_span(lo, hi, 2)}; 0 = independent sites)")
    if "entropy_rate_bits" in stats.estimates:
        out.append(f"entropy rate {_fmt(stats.estimates['entropy_rate_bits'], 3)} bits per site against "
                   f"{_fmt(stats.estimates['entropy_independent_bits'], 3)} for independent sites")
    rr = stats.rod_to_rod
    if rr is not None and rr.n_pairs and math.isfinite(rr.statistic):
        e, lo, hi = stats.interval("rod_to_rod.statistic_corrected") \
            if "rod_to_rod.statistic_corrected" in stats.estimates else (rr.statistic_corrected, math.nan, math.nan)
        top = int(rr.lags.max()) if len(rr.lags) else 0
        where = "at the same depth" if rr.best_lag == 0 else f"at a depth lag of {rr.best_lag} sites"
        out.append(f"neighbouring rods ({rr.n_pairs} pairs) agree on {stats.metals[rr.metal]} best {where} "
                   f"(of lags -{top}..{top}): correlation {_fmt(e, 2)} after correcting for decoding noise "
                   f"(95 % interval {_span(lo, hi, 2)}), {_fmt(rr.statistic, 2)} on the posteriors, which "
                   f"recover {_fmt(100 * rr.reliability, 0)} % of the variance; circularly shifted rods give "
                   f"{_fmt(rr.null_mean, 2)} on average, p = {_fmt_p(rr.p_value)}")
        if rod == "copied":
            out.append(f"significant (p < {alpha:g}) and at or above the copy threshold {copy_threshold:g}, "
                       "so rods are copied")
            out.append("copied rods are not independent replicates, so the along-rod test and the intervals "
                       "over rods overstate the evidence about the along-rod arrangement")
        elif rod == "independent":
            why = []
            if not rr.p_value < alpha:
                why.append(f"not significant (p >= {alpha:g})")
            if not rr.statistic_corrected >= copy_threshold:
                why.append(f"below the copy threshold {copy_threshold:g}")
            out.append("agreement " + " and ".join(why) + ", so rods are independent")
            if 1.0 / (1 + np.isfinite(rr.null).sum()) >= alpha:
                out.append(f"the shift null has only {int(np.isfinite(rr.null).sum())} replicates, too few to "
                           f"reach p < {alpha:g}")
        if math.isfinite(rr.corr_nonneighbour):
            out.append(f"non-neighbouring rods give {_fmt(rr.corr_nonneighbour, 2)} at the same depth "
                       f"(p = {_fmt_p(rr.p_nonneighbour)} for neighbours exceeding them)")
    return out
