"""Site sequences of the simulator that are not a plain persistence chain: one metal inserted as
isolated units (``interspersed``) and a different arrangement for each metal (``per-metal``).

Both are stationary first-order Markov chains with the run's composition ``f`` as stationary
distribution, given by their transition matrix ``P``:

* **interspersed** (metal ``m``, strength ``s`` in [0, 1]): ``m`` follows itself with
  ``P_mm = f_m (1 - s)``, below the ``f_m`` of independent sites (never, for ``s = 1``), and the
  inserted units are spread evenly over the other metals: ``P_im = q = f_m (1 - P_mm) / (1 - f_m)``
  for every ``i != m``; the remaining probability of each row goes to the metals other than ``m``
  in proportion to their fractions. The chain keeps ``f`` (``sum_i f_i P_ij = f_j``) and needs
  ``q <= 1``, i.e. ``P_mm >= (2 f_m - 1) / f_m``: a metal of at most half of the sites can avoid
  itself completely. For two metals the persistence is ``lam = P_mm + P_oo - 1 = -s f_m / (1 - f_m)``.
* **per-metal** (K >= 3): each metal k gets a target self-transition ``P_kk``: ``random``
  ``f_k``, ``short-repeat`` ``f_k + 0.5 (1 - f_k)``, ``long-block`` ``f_k + 0.9 (1 - f_k)``,
  ``interspersed`` ``f_k (1 - s)``. The other entries are the ones closest (in the sum of absolute
  differences, a linear programme) to "leave k for the others in proportion to their fractions",
  ``(1 - P_kk) f_j / (1 - f_k)``, under the constraints that rows sum to one and ``f`` stays the
  stationary distribution; when no chain meets them the run is refused.

The self-persistence of metal k, ``lam_k = (P_kk - f_k) / (1 - f_k)`` (the one definition in
:func:`probeseq.decoding.chain.persistence_per_state`), is negative for an interspersed metal,
0 for a random one and positive for runs.
"""

from __future__ import annotations

import numpy as np

from ..exceptions import InputError

__all__ = ["METAL_PATTERNS", "interspersed_transmat", "per_metal_transmat", "chain_sequences", "self_transition"]

#: arrangements a single metal can have in a ``per-metal`` run
METAL_PATTERNS = ("random", "short-repeat", "long-block", "interspersed")

#: self-persistence of the metal patterns with runs (as the run-wide patterns' default persistence)
_RUN_PERSISTENCE = {"short-repeat": 0.5, "long-block": 0.9}


def self_transition(pattern: str, f_k: float, avoidance: float) -> float:
    """Target ``P_kk`` of one metal with fraction ``f_k`` under a metal pattern."""
    if pattern == "random":
        return float(f_k)
    if pattern == "interspersed":
        return float(f_k) * (1.0 - float(avoidance))
    if pattern in _RUN_PERSISTENCE:
        lam = _RUN_PERSISTENCE[pattern]
        return float(f_k) + lam * (1.0 - float(f_k))
    raise InputError(f"metal pattern must be one of {', '.join(METAL_PATTERNS)}, got '{pattern}'")


def interspersed_transmat(f, m: int, avoidance: float) -> np.ndarray:
    """Transition matrix of a chain in which metal ``m`` avoids itself (see module docstring).

    Parameters
    ----------
    f : (K,) array of float
        Composition (site fractions), summing to 1.
    m : int
        Index of the interspersed metal.
    avoidance : float
        Strength ``s`` in [0, 1]: ``P_mm = f_m (1 - s)``.

    Returns
    -------
    (K, K) ndarray of float
        Row-stochastic, with stationary distribution ``f``.
    """
    f = np.asarray(f, dtype=float)
    k = f.size
    s = float(avoidance)
    if not 0.0 <= s <= 1.0:
        raise InputError(f"--avoidance must be in [0, 1], got {avoidance}")
    fm = f[m]
    pmm = fm * (1.0 - s)
    q = fm * (1.0 - pmm) / (1.0 - fm)
    if q > 1.0 + 1e-12:
        smax = 1.0 - (2.0 * fm - 1.0) / (fm * fm)
        raise InputError(f"an interspersed metal with {100 * fm:.0f} % of the sites cannot avoid itself with "
                         f"strength {s:g}: at most {max(smax, 0.0):.2f} (or give it at most half of the sites)")
    others = np.arange(k) != m
    w = np.where(others, f, 0.0) / (1.0 - fm)  # shares among the metals other than m
    p = np.empty((k, k))
    p[m] = (1.0 - pmm) * w
    p[m, m] = pmm
    for i in np.flatnonzero(others):
        p[i] = (1.0 - q) * w
        p[i, m] = q
    return p


def per_metal_transmat(f, patterns, avoidance: float = 0.9) -> np.ndarray:
    """Reversible transition matrix with one arrangement per metal (see module docstring).

    Parameters
    ----------
    f : (K,) array of float
        Composition, K >= 3.
    patterns : sequence of str, length K
        One of :data:`METAL_PATTERNS` per metal.
    avoidance : float
        Strength of every ``interspersed`` metal.

    Returns
    -------
    (K, K) ndarray of float

    Raises
    ------
    InputError
        When no chain of this form has these self-transitions at this composition.
    """
    from scipy.optimize import linprog

    f = np.asarray(f, dtype=float)
    k = f.size
    if len(patterns) != k:
        raise InputError(f"--metal-patterns needs one pattern per metal ({k}), got {len(patterns)}")
    if k < 3:
        raise InputError("--metal-patterns needs three metals or more (two metals share one persistence: use "
                         "--pattern)")
    d = np.array([self_transition(p, fk, avoidance) for p, fk in zip(patterns, f)])
    # unknowns: the off-diagonal P_ij (n of them), then t_ij >= |P_ij - target_ij|
    off = [(i, j) for i in range(k) for j in range(k) if i != j]
    n = len(off)
    target = np.array([(1.0 - d[i]) * f[j] / (1.0 - f[i]) for i, j in off])
    a_eq, b_eq = [], []
    for i in range(k):  # rows sum to one
        a_eq.append([1.0 if a == i else 0.0 for a, _ in off] + [0.0] * n)
        b_eq.append(1.0 - d[i])
    for j in range(k):  # f stays stationary: sum_i f_i P_ij = f_j
        a_eq.append([f[a] if b == j else 0.0 for a, b in off] + [0.0] * n)
        b_eq.append(f[j] * (1.0 - d[j]))
    eye = np.eye(n)
    a_ub = np.vstack([np.hstack([eye, -eye]), np.hstack([-eye, -eye])])
    b_ub = np.concatenate([target, -target])
    res = linprog(np.concatenate([np.zeros(n), np.ones(n)]), A_ub=a_ub, b_ub=b_ub, A_eq=np.array(a_eq),
                  b_eq=np.array(b_eq), bounds=[(0, None)] * (2 * n), method="highs")
    if not res.success:
        raise InputError(f"the metal patterns {', '.join(patterns)} cannot be combined at composition "
                         f"{', '.join(f'{x:.2f}' for x in f)} (an interspersed metal needs enough sites of the others "
                         "to sit between, and a blocky one leaves them few): change the composition or weaken "
                         "--avoidance")
    p = np.diag(d)
    for (i, j), v in zip(off, res.x[:n]):
        p[i, j] = max(v, 0.0)
    return p / p.sum(axis=1, keepdims=True)


def chain_sequences(rng, n_rods: int, n_sites: int, transmat, f) -> np.ndarray:
    """(n_rods, n_sites) int8 sequences of a Markov chain, the first site drawn from ``f``."""
    p = np.asarray(transmat, dtype=float)
    k = p.shape[0]
    cum = np.cumsum(p, axis=1)
    seq = np.empty((n_rods, n_sites), dtype=np.int8)
    seq[:, 0] = np.minimum(np.searchsorted(np.cumsum(f), rng.random(n_rods), side="right"), k - 1)
    for t in range(1, n_sites):
        u = rng.random(n_rods)
        prev = seq[:, t - 1]
        seq[:, t] = np.minimum((u[:, None] >= cum[prev]).sum(axis=1), k - 1)
    return seq
