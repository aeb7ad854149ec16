"""Fitting and running the decoder: :func:`fit_decoder`, :func:`decode`, :class:`DecodeResult`.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field

import numpy as np
from scipy import stats

from ..exceptions import ConvergenceWarning, DataQualityWarning, InputError
from ..lattice.rodcolumns import RodColumns
from ..utils.marks import finite_or_none
from ..utils.validate import check_seed
from .chain import RUN_LENGTH_DEFINITIONS, runs_table
from .efficiency import RadialEfficiency, fit_radial_efficiency
from .hmm import run_em, viterbi
from .model import (
    ETA_BOUNDS,
    LOW_COUNT_MIN,
    REFINE_FACTOR,
    LOW_COUNT_SHARE,
    SCREEN_ITER,
    SCREEN_SEGMENT,
    SCREEN_SITES,
    UNCERTAIN_BELOW,
    DecoderParams,
    _compiled_step,
    _decode_compiled,
    _emission_tm,
    _hmm_estep,
    _hmm_step,
    _prepare,
    _Prepared,
    _rod_data,
    _screen_data,
    _subset,
    _with_efficiency,
)

from .independent import independent_step
from .passes import count_totals
from .starts import evidence_start
from .starts import initial_params as _initial_params

__all__ = ['DecodeResult', 'fit_decoder', 'decode', 'sample_model']

@dataclass(frozen=True)
class DecodeResult:
    """Fitted rod model, decoded sequences and model comparison.

    Attributes
    ----------
    metals : tuple of str
        Metal symbols in channel (state) order.
    transmat : (K, K) ndarray of float
        Transition matrix.
    stationary : (K,) ndarray of float
        Stationary distribution = composition.
    persistence : float
        :func:`probeseq.decoding.chain.persistence` of ``transmat`` (``1 - p01 - p10`` for two metals),
        dimensionless; the statistics' ``persistence`` of the same matrix.
    eta : float
        Detection efficiency of a site's own ion.
    extra_rate : (K,) ndarray of float, counts per site
        Mean extra counts per site per channel (the identified quantity).
    crosstalk_rate : float, counts per site
        Composition-proportional part of the extras (largest value leaving background >= 0).
    background : (K,) ndarray of float, counts per site
        Remaining extras per channel.
    extra_fraction : float
        Share of the counts that are extras: ``sum(mu) / (eta + sum(mu))``.
    loglik : float
        Log-likelihood of the hidden-Markov model (natural log).
    n_iter : int
        EM iterations on all rods after the screening of the starts (0 when parameters were
        given). Small when the screening already ran on every site (fewer than ``SCREEN_SITES``):
        the fit then continues from the screened optimum.
    converged : bool
    n_params : int
        ``K (K - 1) + 1 + K`` free parameters.
    loglik_indep, n_params_indep : float, int
        The independent-sites model (nan when not fitted).
    lr_stat, lr_df, lr_pvalue : float, int, float
        Likelihood ratio ``2 (loglik - loglik_indep)``, df ``(K - 1)^2``, chi-square p-value.
    bic, bic_indep : float
        ``-2 loglik + n_params ln(n_obs)``.
    n_obs : int
        Observed (unmasked) sites.
    viterbi : (n_rods, n_sites) ndarray of int
        Most probable metal index per site, -1 at masked sites.
    posteriors : (n_rods, n_sites, K) ndarray of float
        Posterior metal probabilities, 0 at masked sites.
    mask : (n_rods, n_sites) ndarray of bool
    uncertain : (n_rods, n_sites) ndarray of bool
        Observed sites whose largest posterior is below ``uncertain_below``.
    uncertain_below : float
    per_rod_transitions : (n_rods, K, K) ndarray of float
        Expected transition counts between consecutive observed sites, per rod.
    per_rod_occupancy : (n_rods, K) ndarray of float
        Expected number of observed sites in each metal, per rod.
    runs : dict of str -> (n_runs,) ndarray
        ``rod, first_site, last_site, length, metal`` (int) and ``mean_posterior`` (float) of
        every run of equal metal in the Viterbi paths, broken at masked sites.
    start_logliks : (n_starts,) ndarray of float
        Log-likelihood of every start after screening (on the screening subset).
    loglik_history : (n_evaluated,) ndarray of float
        Log-likelihood at every EM iteration on all rods.
    warnings : list of str
    rod_efficiency : (n_rods,) ndarray of float or None
        Relative detection efficiency ``h_r`` the model used (rod r: ``eta h_r``, extra rates
        ``extra_rate * h_r``); None when it is 1 for every rod.
    efficiency_source : str or None
        ``"radial fit"`` or ``"given"`` (None with ``rod_efficiency`` None).
    radial_efficiency : RadialEfficiency or None
        The radial efficiency fit of :func:`fit_decoder` (None when not run).
    n_iter_screening : int
        EM iterations of the best start on the screening subset (0 when parameters were given).
    n_obs_screening : int
        Observed sites of the screening subset (equal to ``n_obs`` when it is every site; 0 when
        parameters were given).
    """

    metals: tuple
    transmat: np.ndarray
    stationary: np.ndarray
    persistence: float
    eta: float
    extra_rate: np.ndarray
    crosstalk_rate: float
    background: np.ndarray
    extra_fraction: float
    loglik: float
    n_iter: int
    converged: bool
    n_params: int
    loglik_indep: float
    n_params_indep: int
    lr_stat: float
    lr_df: int
    lr_pvalue: float
    bic: float
    bic_indep: float
    n_obs: int
    viterbi: np.ndarray
    posteriors: np.ndarray
    mask: np.ndarray
    uncertain: np.ndarray
    uncertain_below: float
    per_rod_transitions: np.ndarray
    per_rod_occupancy: np.ndarray
    runs: dict
    start_logliks: np.ndarray = field(default_factory=lambda: np.zeros(0))
    loglik_history: np.ndarray = field(default_factory=lambda: np.zeros(0))
    warnings: list = field(default_factory=list)
    rod_efficiency: np.ndarray | None = None
    efficiency_source: str | None = None
    radial_efficiency: RadialEfficiency | None = None
    n_iter_screening: int = 0
    n_obs_screening: int = 0
    visibility: np.ndarray | None = None
    model_eta: float | None = None
    counts_params: DecoderParams | None = None

    @property
    def used_soft_evidence(self) -> bool:
        """True when the sites were decoded from the columns' soft evidence, not their counts."""
        return self.model_eta is not None

    @property
    def params(self) -> DecoderParams:
        """The parameters as a :class:`DecoderParams` (to decode other columns with them)."""
        eta = self.eta if self.model_eta is None else self.model_eta
        return DecoderParams(transmat=self.transmat, eta=eta, extra_rate=self.extra_rate, visibility=self.visibility)

    def to_dict(self) -> dict:
        """JSON-serialisable summary (no per-site arrays; NaN and infinities become None).

        ``mean_decoded_run_length_sites`` is the mean length, in sites, of the runs on the Viterbi
        paths (runs cut by a rod end or the mask included, so it is shorter than the fitted chain's
        ``1 / (1 - A_kk)``, which the statistics report as ``mean_run_length_sites``).
        """
        num = finite_or_none
        obs = self.mask
        lengths = self.runs["length"]
        metal = self.runs["metal"]
        mean_run = {
            m: (num(lengths[metal == i].mean()) if np.any(metal == i) else None)
            for i, m in enumerate(self.metals)
        }
        return {
            "metals": list(self.metals),
            "model": "tied-emission hidden Markov model (see probeseq.decoding)",
            "transmat": self.transmat.tolist(),
            "stationary": self.stationary.tolist(),
            "persistence": num(self.persistence),
            "eta": num(self.eta),
            "soft_evidence": self.used_soft_evidence,
            "eta_of_soft_evidence_fit": None if self.model_eta is None else num(self.model_eta),
            "visibility": self._visibility_dict(),
            "extra_rate_per_site": self.extra_rate.tolist(),
            "crosstalk_rate_per_site": num(self.crosstalk_rate),
            "background_per_site": self.background.tolist(),
            "extra_fraction": num(self.extra_fraction),
            "loglik": num(self.loglik),
            "n_iter": int(self.n_iter),
            "n_iter_screening": int(self.n_iter_screening),
            "n_obs_screening": int(self.n_obs_screening),
            "n_starts": int(np.size(self.start_logliks)),
            "fitted": bool(np.size(self.start_logliks) > 0),
            "converged": bool(self.converged),
            "n_params": int(self.n_params),
            "loglik_indep": num(self.loglik_indep),
            "n_params_indep": int(self.n_params_indep),
            "lr_stat": num(self.lr_stat),
            "lr_df": int(self.lr_df),
            "lr_pvalue": num(self.lr_pvalue),
            "bic": num(self.bic),
            "bic_indep": num(self.bic_indep),
            "n_rods": int(obs.shape[0]),
            "n_sites": int(obs.shape[1]),
            "n_obs": int(self.n_obs),
            "uncertain_below": num(self.uncertain_below),
            "n_uncertain": int(self.uncertain.sum()),
            "fraction_uncertain": num(self.uncertain.sum() / max(self.n_obs, 1)),
            "n_runs": int(lengths.size),
            "mean_decoded_run_length_sites": mean_run,
            "mean_decoded_run_length_definition": RUN_LENGTH_DEFINITIONS["mean_decoded_run_length_sites"],
            "start_logliks": [num(v) for v in self.start_logliks],
            "warnings": list(self.warnings),
            "efficiency": self._efficiency_dict(),
            "radial_efficiency": None if self.radial_efficiency is None else self.radial_efficiency.to_dict(),
        }

    def _visibility_dict(self) -> dict:
        """Per metal: the share of its ions the ranging counts as it (``a_k``), and the share of its
        sites whose own ion was counted (``eta a_k``)."""
        vis = np.ones(len(self.metals)) if self.visibility is None else np.asarray(self.visibility, float)
        return {"relative": {m: finite_or_none(v) for m, v in zip(self.metals, vis)},
                "sites_seen": {m: finite_or_none(self.eta * v) for m, v in zip(self.metals, vis)},
                "definition": ("eta is the instrument's detection efficiency; a metal's relative visibility is "
                               "the share of its ions that can tell its sites (from the mass spectrum: counted "
                               "as it, or with soft evidence inside its ranges), so a site of it shows its own "
                               "ion with probability eta times that")}

    def _efficiency_dict(self) -> dict:
        """How the detection efficiency varied between rods (``eta`` alone when it did not)."""
        h = self.rod_efficiency
        if h is None:
            return {"per_rod": False, "source": None, "eta": finite_or_none(self.eta)}
        used = h[self.mask.any(axis=1)]
        n = self.mask.sum(axis=1)[self.mask.any(axis=1)]
        return {"per_rod": True, "source": self.efficiency_source, "eta": finite_or_none(self.eta),
                "h_min": finite_or_none(used.min()), "h_max": finite_or_none(used.max()),
                "h_mean_over_sites": finite_or_none(n @ used / max(n.sum(), 1)),
                "eta_min": finite_or_none(self.eta * used.min()), "eta_max": finite_or_none(self.eta * used.max())}


def _check_columns(columns) -> list:
    if not isinstance(columns, RodColumns):
        raise InputError(f"columns must be a probeseq.lattice.rodcolumns.RodColumns, got {type(columns).__name__}")
    c, m = columns.counts, columns.mask
    if c.shape[2] < 2:
        raise InputError(f"columns.counts: decoding needs at least two metal channels, got {c.shape[2]}")
    if not m.any():
        raise InputError(f"columns.mask: all {m.size} sites are masked; nothing to decode")
    per_metal, non_finite, negative = count_totals(c, m)  # one pass, observed sites only
    if non_finite:
        raise InputError("columns.counts: found non-finite values at unmasked sites")
    if negative:
        raise InputError("columns.counts: found negative counts at unmasked sites")
    have = [columns.metals[i] for i in np.flatnonzero(per_metal > 0)]
    if len(have) < 2:
        raise InputError(
            f"columns.counts: need counts in at least two metal channels, found counts only in {have}"
        )
    notes = []
    total = per_metal.sum()
    for i, name in enumerate(columns.metals):
        share = per_metal[i] / total
        if per_metal[i] < LOW_COUNT_MIN or share < LOW_COUNT_SHARE:
            msg = (
                f"metal {name} has almost no counts ({per_metal[i]:.1f}, {100 * share:.2f} % of metal counts;"
                f" expected >= {LOW_COUNT_MIN:g} and >= {100 * LOW_COUNT_SHARE:g} %): the counts cannot"
                f" support it as a state; its transition row and composition are poorly determined"
            )
            notes.append(msg)
    return notes


#: most EM starts and iterations a fit accepts (more gains nothing and only makes a run hang)
MAX_STARTS = 1_000


MAX_ITER = 100_000


def _check_options(n_starts, max_iter, tol, uncertain_below):
    if not isinstance(n_starts, (int, np.integer)) or isinstance(n_starts, bool) or not 1 <= n_starts <= MAX_STARTS:
        raise InputError(f"n_starts (--n-starts) must be an integer in [1, {MAX_STARTS}], got {n_starts!r}")
    if not isinstance(max_iter, (int, np.integer)) or isinstance(max_iter, bool) or not 1 <= max_iter <= MAX_ITER:
        raise InputError(f"max_iter must be an integer in [1, {MAX_ITER}], got {max_iter!r}")
    if not (isinstance(tol, (int, float)) and math.isfinite(tol) and tol > 0):
        raise InputError(f"tol must be a positive number (log-likelihood per site), got {tol!r}")
    _check_uncertain(uncertain_below)


ENGINES = ("compiled", "numpy")


def _check_engine(engine):
    if engine not in ENGINES:
        raise InputError(f"engine must be one of {', '.join(ENGINES)}, got {engine!r}")


def _check_uncertain(uncertain_below):
    if not (isinstance(uncertain_below, (int, float)) and 0 < uncertain_below <= 1):
        raise InputError(f"uncertain_below must be a probability in (0, 1], got {uncertain_below!r}")


def _compiled_data(columns: RodColumns, h):
    """What the compiled engine works on: the soft evidence, read linearly, when the columns carry
    it (:attr:`RodColumns.evidence`), else the counts."""
    if columns.evidence is None:
        return _with_efficiency(_rod_data(columns.counts, columns.mask), h)
    stored = (columns.params or {}).get("evidence") or {}
    scale = [float((stored.get("own_scale") or {}).get(m, 1.0)) for m in columns.metals]
    return _with_efficiency(_rod_data(columns.evidence, columns.mask, own_scale=np.asarray(scale)), h)


def _check_visibility(visibility, columns: RodColumns, soft: bool = False):
    """The per-metal visibility as (K,) floats in (0, 1], or None for 1 everywhere (``soft``: the
    metals' capture by their ranges, which is their visibility when decoding soft evidence)."""
    if visibility is None:
        stored = (columns.params or {}).get("visibility")
        if soft:
            stored = ((columns.params or {}).get("evidence") or {}).get("capture")
        if not isinstance(stored, dict):
            return None
        visibility = [stored.get(m, 1.0) for m in columns.metals]
    try:
        v = np.array(visibility, dtype=np.float64).reshape(-1)
    except (TypeError, ValueError):
        raise InputError(f"visibility must be {columns.n_metals} numbers in (0, 1], one per metal") from None
    if v.shape != (columns.n_metals,) or not (np.isfinite(v).all() and (v > 0).all() and (v <= 1).all()):
        raise InputError(f"visibility must be {columns.n_metals} numbers in (0, 1], one per metal, got {visibility!r}")
    return None if np.all(v == 1.0) else v


def _check_rod_efficiency(rod_efficiency, columns: RodColumns, eta: float | None = None):
    """The per-rod efficiency as a float64 array, or None when it is None or 1 for every rod."""
    if rod_efficiency is None:
        return None
    try:
        h = np.array(rod_efficiency, dtype=np.float64).reshape(-1)
    except (TypeError, ValueError):
        raise InputError(f"rod_efficiency must be {columns.n_rods} positive numbers (one per rod), "
                         f"got {type(rod_efficiency).__name__}") from None
    if h.shape != (columns.n_rods,):
        raise InputError(f"rod_efficiency must have one value per rod ({columns.n_rods}), got {h.size}")
    if not (np.isfinite(h).all() and (h > 0).all()):
        raise InputError("rod_efficiency must be finite and positive (relative detection efficiency)")
    if np.all(h == 1.0):
        return None
    h_max = float(h[columns.mask.any(axis=1)].max())
    if eta is not None and not eta * h_max < 1.0:
        raise InputError(f"params.eta * rod_efficiency must stay below 1, got {eta} * {h_max:.4g}")
    if eta is None and not ETA_BOUNDS[0] * h_max < 1.0:
        raise InputError(f"rod_efficiency up to {h_max:.4g} leaves no room for a detection efficiency")
    return h


def _decode_prepared(columns: RodColumns, prep: _Prepared, params: DecoderParams, uncertain_below: float):
    """Posteriors, Viterbi, per-rod statistics and runs for given parameters."""
    n_rods, n_sites, k = columns.counts.shape
    loglik, fb, _ = _hmm_estep(prep, params, final=True)
    log_emis, _ = _emission_tm(prep, params)
    np.log(log_emis, out=log_emis)
    _, path_al = viterbi(log_emis, params.transmat, params.stationary, lengths=prep.span, time_major=True)
    del log_emis

    mask = columns.mask
    length = prep.x.shape[0]
    if len(prep.rods) == n_rods and not prep.first.any() and length == n_sites:
        post = fb.posteriors  # (R, T, K) view of the time-major array
        path = path_al
    else:
        t = np.arange(length)
        inside = t[None, :] < prep.span[:, None]
        rod_idx = np.broadcast_to(prep.rods[:, None], inside.shape)[inside]
        site_idx = (prep.first[:, None] + t[None, :])[inside]
        post = np.zeros((n_rods, n_sites, k))
        post[rod_idx, site_idx] = fb.posteriors[inside]
        path = np.full((n_rods, n_sites), -1, dtype=np.int64)
        path[rod_idx, site_idx] = path_al[inside]
    if not mask.all():
        post[~mask] = 0.0
        path[~mask] = -1
    per_rod_xi = np.zeros((n_rods, k, k))
    per_rod_xi[prep.rods] = fb.xi
    occupancy = np.einsum("rtk->rk", post)
    best = post[:, :, 0].copy()
    for i in range(1, k):
        np.maximum(best, post[:, :, i], out=best)
    uncertain = mask & (best < uncertain_below)
    runs = runs_table(path, mask, post)
    return loglik, path, post, uncertain, per_rod_xi, occupancy, runs


def _n_params(k: int) -> tuple[int, int]:
    return k * (k - 1) + 1 + k, (k - 1) + 1 + k


def _build_result(columns, params, loglik, decoded, *, n_obs, uncertain_below, n_iter, converged,
                  loglik_indep, start_logliks, history, notes, rod_efficiency=None, efficiency_source=None,
                  radial=None, screening=(0, 0), detection_efficiency=None, counts_params=None) -> DecodeResult:
    """The :class:`DecodeResult` of a fit or decode; ``detection_efficiency`` (the instrument's, from
    the fit of the counts) is reported as ``eta`` when the decoding read soft evidence, whose own
    fitted ``eta`` is kept as ``model_eta``."""
    path, post, uncertain, per_rod_xi, occupancy, runs = decoded
    k = params.n_metals
    n_par, n_par_ind = _n_params(k)
    df = (k - 1) ** 2
    log_n = math.log(max(n_obs, 1))
    if np.isfinite(loglik_indep):
        lr = 2.0 * (loglik - loglik_indep)
        if lr < -1e-6 * max(1.0, abs(loglik)):
            notes.append(
                f"the independent-sites fit has a higher log-likelihood than the Markov fit by {-lr / 2:.3g};"
                " the Markov fit may sit in a local optimum (try more starts)"
            )
        lr = max(lr, 0.0)
        pval = float(stats.chi2.sf(lr, df))
        bic_ind = -2.0 * loglik_indep + n_par_ind * log_n
    else:
        lr, pval, bic_ind = float("nan"), float("nan"), float("nan")
    mu = params.extra_rate
    return DecodeResult(
        metals=tuple(columns.metals),
        transmat=params.transmat.copy(),
        stationary=params.stationary,
        persistence=params.persistence,
        eta=params.eta if detection_efficiency is None else float(detection_efficiency),
        extra_rate=mu.copy(),
        crosstalk_rate=params.crosstalk_rate,
        background=params.background,
        extra_fraction=float(mu.sum() / (float(params.state_eta @ params.stationary) + mu.sum())),
        loglik=float(loglik),
        n_iter=int(n_iter),
        converged=bool(converged),
        n_params=n_par,
        loglik_indep=float(loglik_indep),
        n_params_indep=n_par_ind,
        lr_stat=float(lr),
        lr_df=df,
        lr_pvalue=pval,
        bic=float(-2.0 * loglik + n_par * log_n),
        bic_indep=float(bic_ind),
        n_obs=int(n_obs),
        viterbi=path,
        posteriors=post,
        mask=columns.mask.copy(),
        uncertain=uncertain,
        uncertain_below=float(uncertain_below),
        per_rod_transitions=per_rod_xi,
        per_rod_occupancy=occupancy,
        runs=runs,
        start_logliks=np.asarray(start_logliks, dtype=float),
        loglik_history=np.asarray(history, dtype=float),
        warnings=list(notes),
        visibility=params.visibility.copy(),
        model_eta=None if detection_efficiency is None else params.eta,
        counts_params=counts_params,
        rod_efficiency=None if rod_efficiency is None else rod_efficiency.copy(),
        efficiency_source=None if rod_efficiency is None else efficiency_source,
        radial_efficiency=radial,
        n_iter_screening=int(screening[0]),
        n_obs_screening=int(screening[1]),
    )


def decode(columns: RodColumns, params: DecoderParams, uncertain_below: float = UNCERTAIN_BELOW,
           engine: str = "compiled", rod_efficiency=None) -> DecodeResult:
    """Decode every rod with given (fixed) parameters; no fitting.

    Parameters
    ----------
    columns : RodColumns
        Counts per rod, site and metal channel.
    params : DecoderParams
        Model parameters, e.g. the true ones of a simulation or a fit to another run.
    uncertain_below : float
        Sites whose largest posterior is below this level are flagged uncertain.
    engine : {"compiled", "numpy"}
        See :func:`fit_decoder`.
    rod_efficiency : (n_rods,) array_like of float, optional
        Relative detection efficiency ``h_r`` of every rod (dimensionless, > 0, with
        ``params.eta * h_r < 1``): rod r is decoded with ``eta h_r`` and extra rates
        ``extra_rate * h_r``. None (or all 1): the same efficiency for every rod.

    Returns
    -------
    DecodeResult
        With ``n_iter = 0`` and the independent-sites fields set to nan.
    """
    notes = _check_columns(columns)
    _check_uncertain(uncertain_below)
    _check_engine(engine)
    if not isinstance(params, DecoderParams):
        raise InputError(f"params must be a DecoderParams, got {type(params).__name__}")
    if params.n_metals != columns.n_metals:
        raise InputError(f"params describe {params.n_metals} metals, columns have {columns.n_metals}")
    h = _check_rod_efficiency(rod_efficiency, columns, params.eta)
    for msg in notes:
        warnings.warn(msg, DataQualityWarning, stacklevel=2)
    if engine == "compiled":
        prep = _compiled_data(columns, h)
        loglik, *decoded = _decode_compiled(columns, prep, params, uncertain_below)
    else:
        prep = _with_efficiency(_prepare(columns.counts, columns.mask), h)
        loglik, *decoded = _decode_prepared(columns, prep, params, uncertain_below)
    return _build_result(
        columns, params, loglik, decoded, n_obs=prep.n_obs, uncertain_below=uncertain_below, n_iter=0,
        converged=True, loglik_indep=float("nan"), start_logliks=[], history=[loglik], notes=notes,
        rod_efficiency=h, efficiency_source="given",
        detection_efficiency=params.eta if engine == "compiled" and columns.evidence is not None else None,
    )


def _note_unconverged(trace, what: str, outcome: str, max_iter: int, tol: float, notes: list):
    """Warn (to the caller of :func:`fit_decoder`) and note that an EM fit stopped unconverged."""
    if trace.converged:
        return
    msg = (f"{what} did not converge in max_iter={max_iter} iterations: last change in"
           f" log-likelihood {trace.last_change:.4g} (tolerance {tol:.4g}); {outcome}")
    notes.append(msg)
    warnings.warn(msg, ConvergenceWarning, stacklevel=3)


def _fit_efficiency(columns: RodColumns, rod_efficiency, radial_efficiency: bool):
    """The per-rod efficiency of a fit (None: 1 for all), its source and the radial fit (or None)."""
    h = _check_rod_efficiency(rod_efficiency, columns)
    if rod_efficiency is not None or not radial_efficiency:
        return h, "given", None
    radial = fit_radial_efficiency(columns)
    if radial.applied:
        return _check_rod_efficiency(radial.per_rod, columns), "radial fit", radial
    return None, None, radial


def _decode_sites(columns, compiled: bool, prep, params, fit_loglik: float, h, visibility, uncertain_below):
    """Decode every rod with the fitted parameters: from the soft evidence when the columns carry it
    (compiled engine), with the chain and efficiency fitted on the counts, else from the counts.
    Returns (soft, the parameters decoded with, log-likelihood, decoded arrays)."""
    if compiled and columns.evidence is not None:
        dec_prep = _compiled_data(columns, h)
        dec_params = evidence_start(dec_prep, params, _check_visibility(visibility, columns, soft=True))
        _, *decoded = _decode_compiled(columns, dec_prep, dec_params, uncertain_below)
        return True, dec_params, fit_loglik, decoded  # the fit's, compared with the independent-sites fit
    decode_fn = _decode_compiled if compiled else _decode_prepared
    loglik, *decoded = decode_fn(columns, prep, params, uncertain_below)
    return False, params, loglik, decoded


def _fit_independent(prep, params: DecoderParams, rng, k: int, max_iter: int, tol_abs: float, notes: list):
    """The independent-sites model, from the Markov fit and from the moment start; the best trace."""
    ind_step = independent_step(prep, params.visibility)
    p_mom = _initial_params(prep, rng, k, random=False, visibility=params.visibility)
    ind_traces = [
        run_em(ind_step, (params.stationary, params.eta, params.extra_rate), max_iter=max_iter, tol=tol_abs),
        run_em(ind_step, (p_mom.stationary, p_mom.eta, p_mom.extra_rate), max_iter=max_iter, tol=tol_abs),
    ]
    ind = max(ind_traces, key=lambda tr: tr.loglik)
    _note_unconverged(ind, "independent-sites fit", "using the best fit", max_iter, tol_abs, notes)
    return ind


def _screen_starts(screen_step, screen, rng, k: int, n_starts: int, max_iter: int, tol: float, visibility):
    """EM of every start on the screening subset (the first from moment estimates, the others
    random); returns (each start's log-likelihood, the best start's trace)."""
    starts = []
    for i in range(n_starts):
        p0 = _initial_params(screen, rng, k, random=i > 0, visibility=visibility)
        starts.append(run_em(screen_step, p0, max_iter=max_iter, tol=tol * screen.n_obs))
    start_ll = [tr.loglik for tr in starts]
    return start_ll, starts[int(np.argmax(start_ll))]


def fit_decoder(
    columns: RodColumns,
    n_starts: int = 4,
    max_iter: int = 200,
    tol: float = 1e-6,
    random_state=None,
    uncertain_below: float = UNCERTAIN_BELOW,
    engine: str = "compiled",
    rod_efficiency=None,
    radial_efficiency: bool = True,
    visibility=None,
    on_iteration=None,
) -> DecodeResult:
    """Fit the rod model to all rods by EM, then decode every rod.

    Parameters
    ----------
    columns : RodColumns
        Counts per rod, site and metal channel, with the mask of used sites.
    n_starts : int
        Number of EM starts (the first from moment estimates, the others random); each runs
        ``SCREEN_ITER`` iterations on a subset of at most ``SCREEN_SITES`` observed sites and
        the best continues on all rods.
    max_iter : int
        Iteration limit of the EM on all rods (and of each independent-sites fit).
    tol : float, log-likelihood per observed site
        Convergence when the log-likelihood changes by less than ``tol * n_obs``.
    random_state : None, int or numpy.random.Generator
        Seed of the random starts and of the screening subset.
    uncertain_below : float
        Sites whose largest posterior is below this level are flagged uncertain.
    engine : {"compiled", "numpy"}
        ``"compiled"`` (default) runs the recursions rod by rod in compiled code on all cores
        (:mod:`probeseq.decoding.rodchain`), with memory of a few rods' length beyond the counts and the
        results, and gives float32 posteriors and int8 paths; ``"numpy"`` runs the batched
        numpy recursions of :mod:`probeseq.decoding.hmm` on all rods at once (several float64 arrays of
        the count array's size; float64 posteriors, int64 paths). Both fit the same model, agree
        to rounding. Only ``"compiled"`` reads soft evidence (``columns.evidence``).
    rod_efficiency : (n_rods,) array_like of float, optional
        Relative detection efficiency ``h_r`` of every rod (dimensionless, > 0): rod r has
        ``eta h_r`` and extra rates ``extra_rate * h_r``, and the fitted ``eta`` and
        ``extra_rate`` are those of a rod with ``h = 1``. Given, it is used as it is and the
        radial fit is not run. None (or all 1): no per-rod efficiency unless the radial fit
        supplies one.
    radial_efficiency : bool
        With ``rod_efficiency`` None: fit the efficiency's variation with the radial position
        (:func:`probeseq.decoding.efficiency.fit_radial_efficiency`), use its ``per_rod`` when it
        is ``applied`` (significant, enough rods) and keep the fit in the result
        (``radial_efficiency``). False: the same efficiency for every rod, as before.
    visibility : (K,) array_like of float in (0, 1], optional
        Relative visibility ``a_k`` of each metal (:class:`DecoderParams`). None: the count stage's
        ``columns.params["visibility"]`` when present, else 1 for every metal.
    on_iteration : callable, optional
        Progress of the EM on all rods, the longest step: ``on_iteration(done, max_iter)`` after
        each of its updates (:func:`probeseq.decoding.hmm.run_em`). The fit usually converges
        before ``max_iter``, so ``done / max_iter`` understates how far it is.

    Returns
    -------
    DecodeResult

    Raises
    ------
    InputError
        Fewer than two metals with counts, all sites masked, negative or non-finite counts, bad options.

    Warns
    -----
    DataQualityWarning
        A metal has almost no counts.
    ConvergenceWarning
        A fit reached ``max_iter`` (the message gives the last change in log-likelihood; the best fit
        found is returned).
    """
    notes = _check_columns(columns)
    _check_options(n_starts, max_iter, tol, uncertain_below)
    _check_engine(engine)
    check_seed(random_state)
    h, source, radial = _fit_efficiency(columns, rod_efficiency, radial_efficiency)
    for msg in notes:
        warnings.warn(msg, DataQualityWarning, stacklevel=2)
    rng = np.random.default_rng(random_state)
    k = columns.n_metals
    compiled = engine == "compiled"
    vis = _check_visibility(visibility, columns)
    if compiled:
        prep = _with_efficiency(_rod_data(columns.counts, columns.mask), h)
        screen = _screen_data(prep, SCREEN_SITES, SCREEN_SEGMENT, rng)
        make_step = _compiled_step
    else:
        prep = _with_efficiency(_prepare(columns.counts, columns.mask), h)
        screen = _subset(prep, columns.counts, columns.mask, SCREEN_SITES, SCREEN_SEGMENT, rng)
        make_step = _hmm_step
    tol_abs = tol * prep.n_obs

    start_ll, best = _screen_starts(make_step(screen), screen, rng, k, n_starts, min(SCREEN_ITER, max_iter), tol, vis)
    start = best.params
    if compiled and prep.n_obs > REFINE_FACTOR * SCREEN_SITES:  # refined on a share of the rods first
        mid = _screen_data(prep, prep.n_obs // REFINE_FACTOR, columns.n_sites, rng)
        start = run_em(make_step(mid), start, max_iter=max_iter, tol=tol * mid.n_obs).params
    trace = run_em(make_step(prep), start, max_iter=max_iter, tol=tol_abs, on_iteration=on_iteration)
    params = trace.params
    _note_unconverged(trace, "hidden-Markov fit", "returning the best fit", max_iter, tol_abs, notes)

    ind = _fit_independent(prep, params, rng, k, max_iter, tol_abs, notes)

    if not columns.resolvable:
        notes.append(
            "columns report single rods as not resolvable: per-rod sequences mix neighbouring rods;"
            " see probeseq.decoding.groups.analyze_groups"
        )
    soft, dec_params, loglik, decoded = _decode_sites(columns, compiled, prep, params, trace.loglik, h, visibility,
                                                      uncertain_below)
    return _build_result(
        columns, dec_params, loglik, decoded, n_obs=prep.n_obs, uncertain_below=uncertain_below,
        n_iter=trace.n_iter, converged=trace.converged, loglik_indep=ind.loglik,
        start_logliks=start_ll, history=trace.history, notes=notes, rod_efficiency=h, efficiency_source=source,
        radial=radial, screening=(best.n_iter, screen.n_obs), detection_efficiency=params.eta if soft else None,
        counts_params=params if soft else None,
    )


def sample_model(params: DecoderParams, n_rods: int, n_sites: int, random_state=None, rod_efficiency=None):
    """Draw rods from the model itself (for parametric bootstrap and checks).

    Parameters
    ----------
    params : DecoderParams
    n_rods, n_sites : int
    random_state : None, int or numpy.random.Generator
    rod_efficiency : (n_rods,) array_like of float, optional
        Relative detection efficiency ``h_r`` of every rod (``eta h_r <= 1``); None: 1.

    Returns
    -------
    counts : (n_rods, n_sites, K) ndarray of float
        Own ion (probability ``eta h_r``) plus Poisson(``extra_rate * h_r``) extras per channel.
    states : (n_rods, n_sites) ndarray of int
        The metal of every site; the chain starts stationary.
    """
    if n_rods < 1 or n_sites < 1:
        raise InputError(f"n_rods and n_sites must be >= 1, got {n_rods}, {n_sites}")
    rng = np.random.default_rng(random_state)
    k = params.n_metals
    cum = np.cumsum(params.transmat, axis=1)
    cum[:, -1] = 1.0
    states = np.empty((n_rods, n_sites), dtype=np.int64)
    f_cum = np.cumsum(params.stationary)
    f_cum[-1] = 1.0
    states[:, 0] = np.searchsorted(f_cum, rng.random(n_rods), side="right")
    u = rng.random((n_rods, n_sites))
    for t in range(1, n_sites):
        states[:, t] = (u[:, t, None] >= cum[states[:, t - 1]]).sum(axis=1)
    if rod_efficiency is None:
        rate, eta = params.extra_rate, params.eta
    else:
        h = np.asarray(rod_efficiency, dtype=float).reshape(-1)
        if h.shape != (n_rods,) or not (np.isfinite(h).all() and (h > 0).all() and params.eta * h.max() <= 1.0):
            raise InputError(f"rod_efficiency must be {n_rods} positive numbers with eta * h <= 1")
        rate, eta = params.extra_rate[None, None, :] * h[:, None, None], (params.eta * h)[:, None]
    if not params.uniform_visibility:
        eta = eta * params.visibility[states]  # a site of metal k shows its own ion with eta a_k
    counts = rng.poisson(rate, size=(n_rods, n_sites, k)).astype(float)
    det = rng.random((n_rods, n_sites)) < eta
    r, t = np.nonzero(det)
    counts[r, t, states[r, t]] += 1.0
    return counts, states
