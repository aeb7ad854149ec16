"""Batched hidden-Markov computations over many sequences of equal length.

The rods of a run are decoded together: every function here steps over depth (the site index)
once, carrying all rods in one ``(n_seq, n_states)`` array, so the Python loop runs ``n_steps``
times whatever the number of rods. Sequences of different length are padded at the end with
emission likelihood 1 (log-emission 0), which leaves every result of the real sites unchanged.

* :func:`forward_backward` -- scaled forward-backward (Rabiner 1989, section V.A): per-sequence
  log-likelihood, posterior state marginals and expected transition counts. The variables are
  rescaled every ``RESCALE_EVERY`` steps (every step when the range checks ask for it), which
  keeps every number in range for sequences of any length (checked on 5 x 10^4 sites).
* :func:`viterbi` -- the most probable state path, in log space.
* :func:`update_transmat` -- the transition-matrix M-step for a chain that starts in its own
  stationary distribution (a generalised EM step with a back-tracking guard, so the likelihood
  never decreases); :func:`stationary_distribution` is :func:`probeseq.decoding.chain.stationary_distribution`,
  kept here under its old name.
* :func:`run_em` -- the generic EM loop: iteration limit, tolerance, best-so-far tracking.

Layout convention: arrays are ``(n_seq, n_steps, n_states)`` at the interface; internally the
loops work on ``(n_steps, n_seq, n_states)`` so each step reads one contiguous block.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np

from ..exceptions import InputError
from .chain import stationary_distribution

__all__ = ['ForwardBackwardResult', 'EMTrace', 'forward_backward', 'forward_backward_scaled', 'viterbi', 'transition_q', 'update_transmat', 'run_em']

@dataclass(frozen=True)
class ForwardBackwardResult:
    """Output of :func:`forward_backward`.

    Attributes
    ----------
    loglik : (n_seq,) ndarray of float
        Log-likelihood of each sequence (natural log), ``-inf`` for an impossible sequence.
    posteriors : (n_seq, n_steps, n_states) ndarray of float
        Posterior state marginals; each row sums to 1 (rows of impossible sequences are 0).
    xi : (n_states, n_states) or (n_seq, n_states, n_states) ndarray of float, or None
        Expected number of transitions i -> j, summed over the steps t-1 -> t whose
        ``pair_weight[:, t]`` is set (all steps when no weight was given); per sequence when
        ``xi_per_sequence`` was asked for. None when ``compute_xi`` was False.
    """

    loglik: np.ndarray
    posteriors: np.ndarray
    xi: np.ndarray | None


@dataclass(frozen=True)
class EMTrace:
    """Result of :func:`run_em`.

    Attributes
    ----------
    params : object
        The parameters with the highest log-likelihood evaluated.
    loglik : float
        Their log-likelihood.
    history : (n_evaluated,) ndarray of float
        Log-likelihood at every evaluated parameter set, in order.
    n_iter : int
        Number of EM updates made.
    converged : bool
        Whether the last change in log-likelihood fell below the tolerance.
    last_change : float
        The last change in log-likelihood (nan when only one evaluation was made).
    """

    params: object
    loglik: float
    history: np.ndarray
    n_iter: int
    converged: bool
    last_change: float


def _check_chain(transmat, startprob, n_states: int):
    a = np.asarray(transmat, dtype=float)
    p = np.asarray(startprob, dtype=float)
    if a.shape != (n_states, n_states):
        raise InputError(f"transmat must have shape ({n_states}, {n_states}), got {a.shape}")
    if p.shape != (n_states,):
        raise InputError(f"startprob must have shape ({n_states},), got {p.shape}")
    if not (np.all(np.isfinite(a)) and np.all(a >= 0) and np.allclose(a.sum(1), 1.0, atol=1e-8)):
        raise InputError("transmat must be non-negative with rows summing to 1")
    if not (np.all(np.isfinite(p)) and np.all(p >= 0) and abs(p.sum() - 1.0) < 1e-8):
        raise InputError("startprob must be non-negative and sum to 1")
    return a, p


def _check_emission(arr, name: str) -> np.ndarray:
    e = np.asarray(arr, dtype=float)
    if e.ndim != 3 or e.shape[1] < 1 or e.shape[2] < 1:
        raise InputError(f"{name} must have shape (n_seq, n_steps, n_states), got {e.shape}")
    return e


def forward_backward(
    log_emission,
    transmat,
    startprob,
    *,
    pair_weight=None,
    compute_xi: bool = True,
    xi_per_sequence: bool = False,
) -> ForwardBackwardResult:
    """Scaled forward-backward over many sequences at once, from log-emissions.

    Parameters
    ----------
    log_emission : (n_seq, n_steps, n_states) ndarray of float
        ``log p(observation_t | state)``; 0 at a site without an observation (a masked or
        padded site), ``-inf`` where the observation is impossible in a state.
    transmat : (n_states, n_states) ndarray of float
        Transition matrix, rows sum to 1.
    startprob : (n_states,) ndarray of float
        Distribution of the first state.
    pair_weight : (n_seq, n_steps) ndarray of float or bool, optional
        Weight of the transition t-1 -> t in ``xi`` (column 0 is ignored). Default 1 for all.
    compute_xi : bool
        Whether to compute the expected transition counts.
    xi_per_sequence : bool
        Return ``xi`` per sequence, shape (n_seq, n_states, n_states).

    Returns
    -------
    ForwardBackwardResult
    """
    le = _check_emission(log_emission, "log_emission").transpose(1, 0, 2)
    shift = le[:, :, 0].copy()
    for k in range(1, le.shape[2]):
        np.maximum(shift, le[:, :, k], out=shift)
    if np.isnan(shift).any() or np.isposinf(shift).any():
        raise InputError("log_emission must not contain nan or +inf")
    shift[np.isneginf(shift)] = 0.0  # an impossible site: every state -inf
    emission = np.empty(le.shape)  # time-major
    with np.errstate(under="ignore"):
        np.subtract(le, shift[:, :, None], out=emission)
        np.exp(emission, out=emission)
    return forward_backward_scaled(
        emission,
        transmat,
        startprob,
        log_scale=shift.T,
        pair_weight=pair_weight,
        compute_xi=compute_xi,
        xi_per_sequence=xi_per_sequence,
        emission_is_time_major=True,
        overwrite_emission=True,
    )


RESCALE_EVERY = 8


"""Steps between rescalings of the forward and backward variables (see forward_backward_scaled)."""


_TINY, _HUGE = 1e-200, 1e200


def _passes(e, a, p, block: int, checked: bool, overwrite: bool = False):
    """Forward and backward passes, rescaled every ``block`` steps (time-major arrays).

    The forward variables are divided by their sum ``c_t`` at the rescaling steps (every
    ``block``-th step); the backward variables start at ``1 / n`` (``n`` the final forward sum)
    and are divided by the same ``c_t``, so that ``alpha_t * beta_t`` is the posterior at every
    step without further normalisation and ``w_t = e_t * beta_t / c_t`` gives the transition
    posteriors ``alpha_{t-1}(i) A_ij w_t(j)`` directly (Rabiner 1989, eqs. 91-95, with the
    scale factors of the skipped steps set to 1).

    Returns ``(alpha, gamma, w, log_scale_sum, impossible)``, or None when ``checked`` is False
    and a forward sum left the safe range (the caller then repeats with ``block=1,
    checked=True``, which also marks impossible sequences). With ``overwrite`` ``w`` is
    written into ``e``.
    """
    n_steps, n_seq, n_states = e.shape
    ones = np.ones(n_states)
    alpha = np.empty((n_steps, n_seq, n_states))
    beta = np.empty((n_steps, n_seq, n_states))
    w = e if overwrite else np.empty((n_steps, n_seq, n_states))
    impossible = np.zeros(n_seq, dtype=bool)
    scale = np.ones((n_steps, n_seq))
    steps = np.zeros(n_steps, dtype=bool)
    steps[::block] = True
    s = np.empty(n_seq)
    if checked:
        lo, hi = 0.0, np.inf
    else:
        # between rescalings a sum can shrink or grow by at most emax^block
        emax = max(float(e.max()), 1.0)
        lo, hi = _TINY * emax**block, _HUGE / emax**block
        if not lo < hi:
            return None

    def rescale(x, t):
        np.matmul(x, ones, out=s)
        if checked:
            bad = ~(s > 0)
            if bad.any():
                impossible[:] |= bad
                s[bad] = 1.0
        elif not (s.min() > lo and s.max() < hi):
            return False
        scale[t] = s
        x *= (1.0 / s)[:, None]
        return True

    np.multiply(p, e[0], out=alpha[0])
    if not rescale(alpha[0], 0):
        return None
    for t in range(1, n_steps):
        np.matmul(alpha[t - 1], a, out=alpha[t])
        np.multiply(alpha[t], e[t], out=alpha[t])
        if steps[t] and not rescale(alpha[t], t):
            return None
    final = alpha[-1] @ ones
    if checked:
        impossible |= ~(final > 0)
    elif not (final.min() > lo and final.max() < hi):
        return None
    with np.errstate(divide="ignore"):
        inv_final = np.where(final > 0, 1.0 / np.where(final > 0, final, 1.0), 0.0)
    inv_scale = 1.0 / scale
    beta[-1] = inv_final[:, None]
    at = np.ascontiguousarray(a.T)
    for t in range(n_steps - 1, 0, -1):
        np.multiply(e[t], beta[t], out=w[t])
        if steps[t]:
            w[t] *= inv_scale[t][:, None]
        np.matmul(w[t], at, out=beta[t - 1])
    np.multiply(e[0], beta[0], out=w[0])
    w[0] *= inv_scale[0][:, None]
    gamma = np.multiply(alpha, beta, out=beta)
    with np.errstate(divide="ignore"):
        log_c = np.log(scale[steps]).sum(axis=0) + np.log(final)
    return alpha, gamma, w, log_c, impossible


def forward_backward_scaled(
    emission,
    transmat,
    startprob,
    *,
    log_scale=None,
    pair_weight=None,
    compute_xi: bool = True,
    xi_per_sequence: bool = False,
    emission_is_time_major: bool = False,
    overwrite_emission: bool = False,
) -> ForwardBackwardResult:
    """Scaled forward-backward from emission likelihoods given up to a factor per site.

    The true emission likelihood of sequence r at step t in state k is
    ``emission[r, t, k] * exp(log_scale[r, t])``: any positive factor common to the states of
    one site may be taken out, which is how very small or very large likelihoods stay in range.

    Parameters
    ----------
    emission : (n_seq, n_steps, n_states) ndarray of float
        Non-negative emission likelihoods up to a per-site factor (1 at unobserved sites).
        With ``emission_is_time_major`` the array is (n_steps, n_seq, n_states) instead (it is
        read, not modified).
    transmat : (n_states, n_states) ndarray of float
        Transition matrix.
    startprob : (n_states,) ndarray of float
        Distribution of the first state.
    log_scale : (n_seq, n_steps) ndarray of float, optional
        Per-site log factors added to the log-likelihood; 0 when omitted.
    pair_weight, compute_xi, xi_per_sequence
        As in :func:`forward_backward`.
    emission_is_time_major : bool
        See ``emission``.
    overwrite_emission : bool
        Allow a time-major ``emission`` to be used as work space (its values are destroyed);
        saves one array of the emission's size.

    Returns
    -------
    ForwardBackwardResult

    Notes
    -----
    The forward variables are rescaled to sum 1 every ``RESCALE_EVERY`` steps rather than at
    every step, and the backward variables by the same factors, which halves the work in the
    loops over depth. Before and after every rescaling the sums are checked to lie in a range
    that keeps every intermediate value away from underflow and overflow; otherwise (and for
    sequences whose observations are impossible) the computation is repeated with a rescaling
    at every step, the textbook scheme.
    """
    if emission_is_time_major:
        e = np.asarray(emission, dtype=float)
        if e.ndim != 3:
            raise InputError(f"emission must be 3-D, got shape {e.shape}")
        n_steps, n_seq, n_states = e.shape
        own = overwrite_emission and e is emission and e.flags.c_contiguous and e.flags.writeable
    else:
        e0 = _check_emission(emission, "emission")
        n_seq, n_steps, n_states = e0.shape
        e = np.ascontiguousarray(e0.transpose(1, 0, 2))
        own = e is not e0 and not np.shares_memory(e, e0)
    a, p = _check_chain(transmat, startprob, n_states)

    # rescaling every RESCALE_EVERY steps keeps the loops short; if any sum leaves the safe
    # range (or a sequence is impossible) everything is repeated with a rescaling every step
    with np.errstate(divide="ignore", invalid="ignore", over="ignore", under="ignore"):
        # a failed first attempt stops in the forward pass, before e is written to
        out = _passes(e, a, p, RESCALE_EVERY, checked=False, overwrite=own)
    if out is None:
        with np.errstate(under="ignore"):
            out = _passes(e, a, p, 1, checked=True, overwrite=own)
    alpha, gamma_tm, w, loglik, impossible = out

    xi = None
    if compute_xi and n_steps > 1:
        ww = w[1:]
        if pair_weight is not None:
            pw = np.asarray(pair_weight, dtype=float)
            if pw.shape != (n_seq, n_steps):
                raise InputError(f"pair_weight must have shape {(n_seq, n_steps)}, got {pw.shape}")
            ww *= pw.T[1:, :, None]
        if xi_per_sequence:
            # (n_seq, K, T-1) @ (n_seq, T-1, K)
            xi = np.matmul(alpha[:-1].transpose(1, 2, 0), ww.transpose(1, 0, 2)) * a[None]
        else:
            xi = (alpha[:-1].reshape(-1, n_states).T @ ww.reshape(-1, n_states)) * a
    elif compute_xi:
        xi = np.zeros((n_seq, n_states, n_states)) if xi_per_sequence else np.zeros((n_states, n_states))
    del alpha, w
    gamma = gamma_tm.transpose(1, 0, 2)
    if log_scale is not None:
        ls = np.asarray(log_scale, dtype=float)
        if ls.shape != (n_seq, n_steps):
            raise InputError(f"log_scale must have shape {(n_seq, n_steps)}, got {ls.shape}")
        loglik = loglik + ls.sum(axis=1)
    if impossible.any():
        loglik[impossible] = -np.inf
        gamma[impossible] = 0.0
        if xi is not None and xi_per_sequence:
            xi[impossible] = 0.0
    return ForwardBackwardResult(loglik=loglik, posteriors=gamma, xi=xi)


def viterbi(log_emission, transmat, startprob, *, lengths=None, time_major: bool = False):
    """Most probable state path of every sequence (log space).

    Ties are broken towards the lower state index (of the predecessor, and of the last state).

    Parameters
    ----------
    log_emission : (n_seq, n_steps, n_states) ndarray of float
        As in :func:`forward_backward`.
    transmat : (n_states, n_states) ndarray of float
    startprob : (n_states,) ndarray of float
    lengths : (n_seq,) ndarray of int, optional
        Real length of each sequence; steps after it are padding. The best path then ends at
        the sequence's last real step (padding is not optimised over, unlike sites with
        log-emission 0 inside a sequence, which are hidden states of the path). Path entries
        in the padding are -1. Default: every sequence has ``n_steps`` steps.
    time_major : bool
        ``log_emission`` is given as (n_steps, n_seq, n_states) instead.

    Returns
    -------
    logprob : (n_seq,) ndarray of float
        Joint log-probability of each best path with the observations.
    path : (n_seq, n_steps) ndarray of int
        The best state path.
    """
    le0 = _check_emission(log_emission, "log_emission")
    if time_major:
        n_steps, n_seq, n_states = le0.shape
        le = le0
    else:
        n_seq, n_steps, n_states = le0.shape
        le = np.ascontiguousarray(le0.transpose(1, 0, 2))
    a, p = _check_chain(transmat, startprob, n_states)
    with np.errstate(divide="ignore"):
        loga = np.log(a)
        logp = np.log(p)
    # forward max-product; the back-pointers are recomputed during the trace-back from the
    # stored scores, which gives the same argmax (same sums) and is faster than storing them
    delta = np.empty((n_steps, n_seq, n_states))
    np.add(logp, le[0], out=delta[0])
    tmp = np.empty((n_seq, n_states))
    for t in range(1, n_steps):
        prev, out = delta[t - 1], delta[t]
        np.add(prev[:, 0:1], loga[0], out=out)
        for i in range(1, n_states):
            np.add(prev[:, i : i + 1], loga[i], out=tmp)
            np.maximum(out, tmp, out=out)
        out += le[t]
    rows = np.arange(n_seq)
    if lengths is None:
        last = np.full(n_seq, n_steps - 1)
    else:
        last = np.asarray(lengths, dtype=np.int64).reshape(-1) - 1
        if last.shape != (n_seq,) or np.any(last < 0) or np.any(last >= n_steps):
            raise InputError(f"lengths must be {n_seq} integers in [1, {n_steps}], got {lengths!r}")
    path = np.empty((n_steps, n_seq), dtype=np.int64)
    path[-1] = delta[-1].argmax(axis=1)
    loga_t = np.ascontiguousarray(loga.T)
    for t in range(n_steps - 1, 0, -1):
        path[t - 1] = (delta[t - 1] + loga_t[path[t]]).argmax(axis=1)
        ends = last == t - 1
        if ends.any():
            path[t - 1][ends] = delta[t - 1][ends].argmax(axis=1)
    logprob = delta[last, rows, path[last, rows]]
    path = np.ascontiguousarray(path.T)
    if lengths is not None:
        path[np.arange(n_steps)[None, :] > last[:, None]] = -1
    return logprob, path


def _xlogy(x, y):
    with np.errstate(divide="ignore", invalid="ignore"):
        out = np.where(x > 0, x * np.log(np.where(y > 0, y, 1.0)), 0.0)
        out = np.where((x > 0) & (y <= 0), -np.inf, out)
    return out


def transition_q(transmat, xi, first_posterior) -> float:
    """Expected complete-data log-likelihood of the chain part.

    ``sum_ij xi_ij log A_ij + sum_i g_i log pi_i(A)`` with ``pi(A)`` the stationary
    distribution (the start distribution is tied to it).

    Parameters
    ----------
    transmat : (K, K) ndarray of float
    xi : (K, K) ndarray of float
        Expected transition counts.
    first_posterior : (K,) ndarray of float
        Summed posterior of the first state of every sequence.

    Returns
    -------
    float
    """
    a = np.asarray(transmat, dtype=float)
    return float(_xlogy(xi, a).sum() + _xlogy(first_posterior, stationary_distribution(a)).sum())


def update_transmat(xi, first_posterior, transmat_old, min_prob: float = 0.0) -> np.ndarray:
    """Generalised-EM update of a transition matrix whose chain starts stationary.

    The row-normalised expected transition counts maximise the transition part of the
    expected complete-data log-likelihood; the start part (the first state of each sequence is
    drawn from the stationary distribution) has no closed-form maximiser. The normalised
    counts are taken when they do not lower the full expected log-likelihood
    (:func:`transition_q`); otherwise the step towards them is halved until it does (at most
    30 times, then the old matrix is kept). This makes every EM iteration non-decreasing.

    Parameters
    ----------
    xi : (K, K) ndarray of float
        Expected transition counts.
    first_posterior : (K,) ndarray of float
        Summed posterior of the first state of every sequence.
    transmat_old : (K, K) ndarray of float
        Current transition matrix.
    min_prob : float
        Floor applied to every entry before renormalising (0 keeps structural zeros).

    Returns
    -------
    (K, K) ndarray of float
    """
    xi = np.asarray(xi, dtype=float)
    old = np.asarray(transmat_old, dtype=float)
    rows = xi.sum(axis=1, keepdims=True)
    new = np.where(rows > 0, xi / np.where(rows > 0, rows, 1.0), old)
    if min_prob > 0:
        new = np.maximum(new, min_prob)
        new /= new.sum(axis=1, keepdims=True)
    q_old = transition_q(old, xi, first_posterior)
    step = 1.0
    for _ in range(30):
        cand = old + step * (new - old)
        if transition_q(cand, xi, first_posterior) >= q_old - 1e-12 * max(1.0, abs(q_old)):
            return cand
        step *= 0.5
    return old


def run_em(
    step: Callable,
    params,
    *,
    max_iter: int,
    tol: float,
    min_iter: int = 1,
    on_iteration: Callable[[int, int], None] | None = None,
) -> EMTrace:
    """Generic EM loop.

    Parameters
    ----------
    step : callable
        ``step(params) -> (loglik, new_params)``: evaluates the log-likelihood at ``params``
        (E-step) and returns it with the updated parameters (M-step).
    params : object
        Starting parameters.
    max_iter : int
        Largest number of updates.
    tol : float
        Convergence when the absolute change in log-likelihood between two successive
        evaluations is below ``tol``.
    min_iter : int
        Updates made before convergence is tested.
    on_iteration : callable, optional
        Progress hook, called as ``on_iteration(done, max_iter)`` after each update, ``done``
        counting the updates made so far (1 to ``max_iter``); the evaluation that ends the loop
        (converged, or ``max_iter`` reached) calls it no more. Its return value is ignored.

    Returns
    -------
    EMTrace
        The best evaluated parameters (the last update is evaluated too, so the returned
        parameters always carry their own log-likelihood).
    """
    history = []
    best_params, best_ll = params, -np.inf
    current = params
    converged = False
    n_iter = 0
    for i in range(max_iter + 1):
        ll, nxt = step(current)
        ll = float(ll)
        history.append(ll)
        if i == 0 or ll > best_ll:
            best_ll, best_params = ll, current
        if len(history) >= 2 and i >= min_iter and abs(history[-1] - history[-2]) < tol:
            converged = True
            break
        if i == max_iter:
            break
        current = nxt
        n_iter += 1
        if on_iteration is not None:
            on_iteration(n_iter, max_iter)
    last = history[-1] - history[-2] if len(history) >= 2 else float("nan")
    return EMTrace(
        params=best_params,
        loglik=best_ll,
        history=np.asarray(history),
        n_iter=n_iter,
        converged=converged,
        last_change=float(last),
    )
