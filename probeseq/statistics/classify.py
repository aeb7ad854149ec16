"""Classify the metal arrangement of a run from its sequence statistics.

Rules (thresholds settable, defaults in brackets):

* ``along_rod`` is ``random`` when the independent-sites model is not rejected by the decoder's
  likelihood-ratio test (p >= ``alpha`` [0.01]); otherwise ``interspersed`` when the least abundant
  metal avoids itself (see below); otherwise ``short-repeat`` when the least abundant metal's mean
  run length (fitted chain, ``1 / (1 - P_kk)``) is under ``long_block_sites`` [8] sites and
  ``long-block`` when at or over it.
* **Each metal** k is described by its self-persistence ``lam_k = (P_kk - f_k) / (1 - f_k)``: how
  much more (or less) often it follows itself than independent sites of the same composition
  would (``P_kk`` against ``f_k``), scaled so that the same arrangement gives the same value at any
  composition (0 for independent sites, 1 for a metal that never ends a run, ``-f_k / (1 - f_k)``
  for one that never follows itself). The test is a Wald test with the bootstrap standard error
  over rods, ``z = lam_k / se``: the metal is ``interspersed`` when ``Phi(z) < alpha`` (it follows
  itself significantly less often than chance), has runs when ``1 - Phi(z) < alpha`` (``long-block``
  or ``short-repeat`` by its mean run length), and is ``random`` otherwise; ``undetermined`` when
  fewer than ``min_minority_sites`` of its sites were decoded. For three metals or more this
  per-metal description stands beside the run's label.
* ``rod_to_rod`` is ``copied`` when neighbouring rods agree significantly (circular-shift
  permutation p < ``alpha``) and their correlation, corrected for decoding noise and taken at the
  best of the small depth lags, is at least ``copy_threshold`` [0.3]; otherwise ``independent``.
* ``label`` is ``rod-to-rod-copied`` when copied, else the along-rod class.
* ``confidence`` is the calibrated probability that the label is right: the share of bootstrap
  resamples over rods that give the same label (``bootstrap_share``), mapped through an isotonic
  calibration fitted on simulated runs of every arrangement (``confidence_table.json`` beside this
  module, made by ``tests/benchmarks/bench_arrangements.py --write-table``). In a
  resample the likelihood-ratio statistic is the observed one shifted by how much the G^2 statistic
  of the resampled expected transition counts (Anderson & Goodman 1957, df = (K-1)^2) differs from
  G^2 of all counts, ``LR_b = LR + G2_b - G2``; the least abundant metal's avoidance uses the
  resample's ``lam_k`` over the full data's standard error; the rod-to-rod p-value of a resample compares its
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

import json
import math
from dataclasses import dataclass, field
from functools import lru_cache
from pathlib import Path

import numpy as np
from scipy import stats as _sps

from ..exceptions import InputError
from ..utils.textformat import format_p
from .summary import RunStatistics

__all__ = ['Classification', 'classify', 'metal_descriptions', 'calibrated_confidence', 'LABELS', 'ALONG_ROD_CLASSES',
           'ROD_TO_ROD_CLASSES', 'METAL_CLASSES']

ALONG_ROD_CLASSES = frozenset({"random", "short-repeat", "long-block", "interspersed", "undetermined"})


ROD_TO_ROD_CLASSES = frozenset({"independent", "copied", "undetermined"})


LABELS = frozenset({"random", "short-repeat", "long-block", "interspersed", "rod-to-rod-copied", "undetermined"})

#: the arrangement of one metal along the rods
METAL_CLASSES = frozenset({"random", "short-repeat", "long-block", "interspersed", "undetermined"})

#: the isotonic calibration of the confidence (bootstrap share -> probability the label is right)
CONFIDENCE_TABLE = Path(__file__).with_name("confidence_table.json")


@dataclass(frozen=True)
class Classification:
    """The arrangement class of a run and why.

    Attributes
    ----------
    label : str
        One of ``random``, ``short-repeat``, ``long-block``, ``interspersed``, ``rod-to-rod-copied``,
        ``undetermined``.
    along_rod : str
        ``random``, ``short-repeat``, ``long-block``, ``interspersed`` or ``undetermined``.
    rod_to_rod : str
        ``independent``, ``copied`` or ``undetermined``.
    confidence : float
        Calibrated probability that the label is right, in [0, 1] (see module docstring); 0 when
        undetermined.
    reasons : tuple of str
        Plain-language reasons quoting the numbers.
    label_shares : dict of str -> float
        Share of resamples giving each label.
    thresholds : dict
        The thresholds used.
    bootstrap_share : float
        Share of bootstrap resamples giving the same label (before calibration).
    per_metal : dict of str -> dict
        Per metal: ``class`` (one of :data:`METAL_CLASSES`), ``self_neighbour`` (``P_kk``, with
        ``self_neighbour_low``/``_high``), ``independent`` (``f_k``), ``self_persistence``
        (``lam_k``, with ``_low``/``_high``), ``p_avoid``, ``p_runs``.
    """

    label: str
    along_rod: str
    rod_to_rod: str
    confidence: float
    reasons: tuple
    label_shares: dict = field(default_factory=dict)
    thresholds: dict = field(default_factory=dict)
    bootstrap_share: float = 0.0
    per_metal: dict = field(default_factory=dict)

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
            "bootstrap_share": float(self.bootstrap_share),
            "per_metal": {m: {k: (v if isinstance(v, str) else _json_num(v)) for k, v in d.items()}
                          for m, d in self.per_metal.items()},
        }


def _json_num(x):
    x = float(x)
    return x if math.isfinite(x) else None


@lru_cache(maxsize=1)
def _calibration():
    """(shares, probabilities) of the confidence calibration; identity when the table is absent."""
    try:
        t = json.loads(CONFIDENCE_TABLE.read_text(encoding="utf-8"))
        x, y = np.asarray(t["share"], float), np.asarray(t["probability"], float)
        if x.ndim == 1 and x.shape == y.shape and x.size >= 2 and np.all(np.diff(x) >= 0):
            return x, y
    except (OSError, ValueError, KeyError, TypeError):
        pass
    return np.array([0.0, 1.0]), np.array([0.0, 1.0])


def calibrated_confidence(share: float) -> float:
    """The probability that a label is right given the share of bootstrap resamples that agree
    with it (piecewise-linear through the isotonic calibration table)."""
    x, y = _calibration()
    return float(np.clip(np.interp(float(share), x, y), 0.0, 1.0))


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


def _p_eq(p, n_draws=None) -> str:
    """'= 0.003', '< 1e-300' (analytic) or '≤ 0.005' (at the floor of ``n_draws`` null draws) for a
    p-value in a sentence: the text of :func:`probeseq.utils.textformat.format_p`, as in the report."""
    t = format_p(p, n_draws)
    return t if t[0] in "<≤" else f"= {t}"


def _n_null(rr) -> int:
    """Finite null draws of a rod-to-rod test (its p-value's resolution is 1 / (n + 1))."""
    return int(np.isfinite(np.asarray(rr.null, dtype=float)).sum())


def _span(lo, hi, nd=None) -> str:
    """An interval as 'lo-hi', or 'lo to hi' when a bound is negative."""
    sep = " to " if (math.isfinite(lo) and lo < 0) or (math.isfinite(hi) and hi < 0) else "-"
    return f"{_fmt(lo, nd)}{sep}{_fmt(hi, nd)}"


def _along(p_lr, run_len, alpha, long_block_sites, minority_avoids=False):
    if p_lr >= alpha:
        return "random"
    if minority_avoids:
        return "interspersed"
    return "long-block" if run_len >= long_block_sites else "short-repeat"


def _self_persistence_se(stats, mt) -> float:
    """Bootstrap standard error over rods of a metal's self-persistence (NaN without replicates)."""
    rep = stats.replicates.get(f"persistence_per_metal.{mt}")
    if rep is None:
        return math.nan
    r = np.asarray(rep, float)
    r = r[np.isfinite(r)]
    return float(np.std(r, ddof=1)) if r.size >= 10 else math.nan


def metal_descriptions(stats: RunStatistics, alpha: float = 0.01, long_block_sites: float = 8,
                       min_metal_sites: int = 20, chain_rejected: bool = True) -> dict:
    """The arrangement of each metal along the rods, from its self-persistence (module docstring).

    With ``chain_rejected=False`` (independent sites not rejected for the run as a whole) every
    metal with enough sites is ``random``: a departure of one metal is not claimed when the chain
    cannot be told from independent sites (the numbers are still given).

    Returns
    -------
    dict of str -> dict
        See :attr:`Classification.per_metal`.
    """
    out = {}
    est = stats.estimates
    for k, mt in enumerate(stats.metals):
        f = float(stats.composition[k])
        lam = float(est.get(f"persistence_per_metal.{mt}", math.nan))
        se = _self_persistence_se(stats, mt)
        z = lam / se if se > 0 else math.nan
        p_avoid = float(_sps.norm.cdf(z)) if math.isfinite(z) else math.nan
        p_runs = float(_sps.norm.sf(z)) if math.isfinite(z) else math.nan
        run_len = float(est.get(f"mean_run_length_sites.{mt}", math.nan))
        lam_lo, lam_hi = (stats.interval(f"persistence_per_metal.{mt}")[1:]
                          if f"persistence_per_metal.{mt}" in est else (math.nan, math.nan))
        if float(stats.occupancy[k]) < min_metal_sites or not math.isfinite(p_avoid):
            cls = "undetermined"
        elif not chain_rejected:
            cls = "random"
        elif p_avoid < alpha:
            cls = "interspersed"
        elif p_runs < alpha:
            cls = "long-block" if run_len >= long_block_sites else "short-repeat"
        else:
            cls = "random"
        out[mt] = {"class": cls, "self_neighbour": f + lam * (1.0 - f),
                   "self_neighbour_low": f + lam_lo * (1.0 - f), "self_neighbour_high": f + lam_hi * (1.0 - f),
                   "independent": f, "self_persistence": lam, "self_persistence_low": lam_lo,
                   "self_persistence_high": lam_hi, "self_persistence_se": se, "p_avoid": p_avoid, "p_runs": p_runs}
    return out


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
    per_metal = metal_descriptions(stats, alpha, long_block_sites, min_minority_sites,
                                   chain_rejected=not (math.isfinite(p_lr) and p_lr >= alpha))
    avoids = per_metal[mt]["class"] == "interspersed"
    along = rod = "undetermined"
    if math.isfinite(p_lr) and math.isfinite(run_len) and stats.n_rods >= min_rods \
            and stats.n_sites_used >= min_sites and minority >= min_minority_sites:
        along = _along(p_lr, run_len, alpha, long_block_sites, avoids)
    if not no_pairs and stats.n_rods >= min_rods and stats.n_sites_used >= min_sites:
        rod = "copied" if (rr.p_value < alpha and rr.statistic_corrected >= copy_threshold) else "independent"

    if blockers:
        reasons.extend(f"undetermined: {b}" for b in blockers)
        reasons.extend(_evidence(stats, p_lr, alpha, long_block_sites, copy_threshold, along, rod))
        reasons.extend(_metal_evidence(stats, per_metal, alpha))
        return Classification(label="undetermined", along_rod=along, rod_to_rod=rod, confidence=0.0,
                              reasons=tuple(reasons), label_shares={}, thresholds=thresholds, per_metal=per_metal)

    label = "rod-to-rod-copied" if rod == "copied" else along

    # ---- bootstrap labels
    shares, share, n_ok = _bootstrap_labels(stats, p_lr, alpha, long_block_sites, copy_threshold, label,
                                            per_metal[mt]["self_persistence_se"])
    conf = calibrated_confidence(share) if n_ok else 0.0
    reasons.extend(_evidence(stats, p_lr, alpha, long_block_sites, copy_threshold, along, rod))
    reasons.extend(_metal_evidence(stats, per_metal, alpha))
    if n_ok:
        reasons.append(f"{_fmt(100 * share, 0)} % of {n_ok} bootstrap resamples over rods give the same "
                       f"label ({label}); on simulated runs, labels with that agreement were right "
                       f"{_fmt(100 * conf, 0)} % of the time (the confidence)")
    else:
        reasons.append("no bootstrap resample could be labelled, so the confidence is 0")
    return Classification(label=label, along_rod=along, rod_to_rod=rod, confidence=conf,
                          reasons=tuple(reasons), label_shares=shares, thresholds=thresholds,
                          bootstrap_share=share, per_metal=per_metal)


def _bootstrap_labels(stats, p_lr, alpha, long_block_sites, copy_threshold, label, se_avoid=math.nan):
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
    along_b = np.where(run_b >= long_block_sites, "long-block", "short-repeat")
    lam_b = rep.get(f"persistence_per_metal.{mt}")
    if lam_b is not None and se_avoid > 0:
        with np.errstate(invalid="ignore"):
            avoid_b = _sps.norm.cdf(np.asarray(lam_b, float) / se_avoid) < alpha
        along_b = np.where(avoid_b, "interspersed", along_b)
    along_b = np.where(p_b >= alpha, "random", along_b)
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


def _pct(x) -> str:
    if not math.isfinite(x):
        return "n/a"
    v = 100.0 * x
    return f"{v:.0f}" if abs(v) >= 10 else f"{v:.1f}"


def _metal_evidence(stats, per_metal, alpha):
    """One plain-language line per metal: how often it sits next to itself against chance."""
    out = []
    for k, (mt, d) in enumerate(per_metal.items()):
        cls = d["class"]
        head = (f"{mt} sits next to {mt} {_pct(d['self_neighbour'])} % of the time (95 % interval "
                f"{_pct(d['self_neighbour_low'])}-{_pct(d['self_neighbour_high'])} %), against "
                f"{_pct(d['independent'])} % for independent sites")
        if cls == "undetermined":
            out.append(f"{head}: too few {mt} sites were decoded ({_fmt(float(stats.occupancy[k]))}) to tell how "
                       f"it is arranged, so {mt} is undetermined")
        elif cls == "interspersed":
            out.append(f"{head}: it avoids itself (p {_p_eq(d['p_avoid'])} < {alpha:g}), so {mt} is interspersed")
        elif cls in ("short-repeat", "long-block"):
            out.append(f"{head}: it forms runs (p {_p_eq(d['p_runs'])} < {alpha:g}), so {mt} is {cls}")
        elif (d["p_avoid"] < alpha or d["p_runs"] < alpha):
            out.append(f"{head}: not claimed as a departure, since independent sites are not rejected for the "
                       f"run as a whole, so {mt} is random")
        else:
            out.append(f"{head}: no significant departure, so {mt} is random")
    return out


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
            out.append(f"independent sites are not rejected: {test} p {_p_eq(p_lr)} >= alpha {alpha:g}")
        else:
            out.append(f"independent sites are rejected: {test} p {_p_eq(p_lr)} < alpha {alpha:g}")
    key = f"mean_run_length_sites.{mt}"
    if key in stats.estimates:
        e, lo, hi = stats.interval(key)
        ind = stats.estimates.get(f"independent_run_length_sites.{mt}", float("nan"))
        ratio = stats.estimates.get(f"run_length_ratio.{mt}", float("nan"))
        nm = e * stats.pitch_nm
        out.append(f"runs of {mt} (least abundant) average {_fmt(e)} sites ({_fmt(nm)} nm), 95 % interval "
                   f"{_span(lo, hi)}, {_fmt(ratio)} times what independent sites give ({_fmt(ind)} sites)")
        if along == "interspersed":
            out.append(f"{mt} follows itself significantly less often than independent sites would, so "
                       "interspersed (isolated units between runs of the others)")
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
                   f"{_fmt(rr.null_mean, 2)} on average, p {_p_eq(rr.p_value, _n_null(rr))}")
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
                       f"(p {_p_eq(rr.p_nonneighbour, min(_n_null(rr), 999))} for neighbours exceeding them)")
    return out
