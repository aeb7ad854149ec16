"""Which rods a tracks figure shows, by a stated rule: rod ids, a region, a rod and its neighbours,
a random sample, or by default a compact patch nearest the centre of the field of view.

:func:`choose_rods` returns the rods in display order with the rule as one sentence, which the
figure prints as its caption and ``probeseq export`` prints in the terminal.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..exceptions import InputError

__all__ = ['DEFAULT_TRACKS', 'MAX_TRACKS', 'CENTRE_RULE', 'NEIGHBOUR_ORDER', 'RodChoice', 'rod_id_text',
           'parse_rod_ids', 'choose_rods', 'select_rods']

#: rods shown when no selection is given
DEFAULT_TRACKS = 24


#: most tracks one figure may hold
MAX_TRACKS = 400


# ---------------------------------------------------------------------------------- rod selection
def parse_rod_ids(text: str) -> np.ndarray:
    """Rod ids from text such as ``"3,5,10-14"`` (ranges inclusive).

    Parameters
    ----------
    text : str

    Returns
    -------
    (n,) ndarray of int
    """
    out = []
    for item in str(text).split(","):
        item = item.strip()
        if not item:
            raise InputError(f"rods: empty item in {text!r} (expected e.g. '3,5,10-14')")
        lo, sep, hi = item.partition("-")
        try:
            a = int(lo)
            b = int(hi) if sep else a
        except ValueError:
            raise InputError(f"rods: {item!r} in {text!r} is not a rod id or a range a-b of rod ids") from None
        if b < a:
            raise InputError(f"rods: rod range {a}-{b} is reversed; did you mean {b}-{a}?")
        out.extend(range(a, b + 1))
    return np.asarray(out, dtype=np.int64)


def _rod_id_array(rods, n_rods: int, what: str = "rods") -> np.ndarray:
    if isinstance(rods, str):
        ids = parse_rod_ids(rods)
    else:
        arr = np.atleast_1d(np.asarray(rods))
        if arr.size == 0:
            raise InputError(f"{what}: no rod id given; rods are numbered 0..{n_rods - 1}")
        if arr.dtype.kind == "f" and np.all(np.isfinite(arr)) and np.all(arr == np.round(arr)):
            arr = arr.astype(np.int64)
        if arr.dtype.kind not in "iu" or arr.ndim != 1:
            raise InputError(f"{what}: expected integer rod ids, got {rods!r}")
        ids = arr.astype(np.int64)
    bad = ids[(ids < 0) | (ids >= n_rods)]
    if bad.size:
        shown = ", ".join(str(int(v)) for v in bad[:5]) + (", ..." if bad.size > 5 else "")
        raise InputError(f"{what}: unknown rod id(s) {shown}; this run has rods 0..{n_rods - 1}")
    _, first = np.unique(ids, return_index=True)
    return ids[np.sort(first)]


def _chain_order(xy: np.ndarray) -> np.ndarray:
    """Order points so each is followed by its nearest unvisited point (lateral neighbours adjacent)."""
    m = xy.shape[0]
    if m <= 2:
        return np.arange(m)
    centre = xy.mean(axis=0)
    start = int(np.argmax(((xy - centre) ** 2).sum(1)))
    order = [start]
    left = np.ones(m, dtype=bool)
    left[start] = False
    cur = start
    for _ in range(m - 1):
        d = ((xy - xy[cur]) ** 2).sum(1)
        d[~left] = np.inf
        cur = int(np.argmin(d))
        order.append(cur)
        left[cur] = False
    return np.asarray(order, dtype=np.int64)


def _neighbours_of(columns, rod: int) -> np.ndarray:
    nb = columns.neighbours
    mine = np.concatenate([nb[nb[:, 0] == rod, 1], nb[nb[:, 1] == rod, 0]]) if nb.size else np.zeros(0, np.int64)
    xy = columns.rod_xy_nm
    if mine.size == 0 and columns.n_rods > 1:
        d = np.sqrt(((xy - xy[rod]) ** 2).sum(1))
        d[rod] = np.inf
        mine = np.flatnonzero(d <= 1.2 * d.min())
    mine = np.unique(mine)
    ang = np.arctan2(xy[mine, 1] - xy[rod, 1], xy[mine, 0] - xy[rod, 0])
    return mine[np.argsort(ang, kind="stable")]


def _in_region(xy: np.ndarray, region) -> tuple:
    try:
        vals = tuple(float(v) for v in region)
    except (TypeError, ValueError):
        vals = ()
    if len(vals) == 4 and all(map(math.isfinite, vals)) and vals[0] < vals[1] and vals[2] < vals[3]:
        x0, x1, y0, y1 = vals
        inside = (xy[:, 0] >= x0) & (xy[:, 0] <= x1) & (xy[:, 1] >= y0) & (xy[:, 1] <= y1)
        return inside, f"box x {x0:g}..{x1:g} nm, y {y0:g}..{y1:g} nm"
    if len(vals) == 3 and all(map(math.isfinite, vals)) and vals[2] > 0:
        cx, cy, r = vals
        inside = (xy[:, 0] - cx) ** 2 + (xy[:, 1] - cy) ** 2 <= r * r
        return inside, f"disc centre ({cx:g}, {cy:g}) nm, radius {r:g} nm"
    raise InputError(f"region: expected a box (x_min, x_max, y_min, y_max) or a disc (x, y, radius) in nm "
                     f"with min < max and radius > 0, got {region!r}")


@dataclass(frozen=True)
class RodChoice:
    """The rods of a tracks figure and the rule that chose them.

    Attributes
    ----------
    ids : (n,) ndarray of int
        Rod ids in display order (top track first).
    centre : int or None
        The rod given as ``neighbours_of``.
    rule : str
        One sentence saying which rods are shown and in what order (the figure's caption).
    n_candidates : int
        Number of rods the rule chose from.
    """

    ids: np.ndarray
    centre: int | None
    rule: str
    n_candidates: int


#: how the centre rule reads in captions
CENTRE_RULE = "nearest the centre of the field of view (the median rod position)"


#: how the display order of a compact patch reads in captions
NEIGHBOUR_ORDER = "ordered so that lateral neighbours are adjacent tracks"


def rod_id_text(ids, limit: int = 12) -> str:
    """Rod ids as compact text, e.g. ``"3, 5, 10-12"`` (runs of consecutive ids joined).

    Parameters
    ----------
    ids : sequence of int
        Rod ids, in any order (shown sorted).
    limit : int
        At most this many items are shown; more end with ``", ..."``.

    Returns
    -------
    str
    """
    v = np.unique(np.asarray(ids, dtype=np.int64))
    if v.size == 0:
        return "none"
    cut = np.flatnonzero(np.diff(v) != 1) + 1
    items = [f"{int(p[0])}" if p.size == 1 else f"{int(p[0])}-{int(p[-1])}" for p in np.split(v, cut)]
    return ", ".join(items[:limit]) + (", ..." if len(items) > limit else "")


def _nearest_centre(pool: np.ndarray, xy: np.ndarray, mid: np.ndarray, n: int) -> np.ndarray:
    """The ``n`` rods of ``pool`` nearest ``mid`` (nm), in neighbour order."""
    d = ((xy[pool] - mid) ** 2).sum(1)
    keep = pool[np.argsort(d, kind="stable")[:n]]
    return keep[_chain_order(xy[keep])]


def _check_max_rods(max_rods) -> int:
    if isinstance(max_rods, (bool, np.bool_)) or not isinstance(max_rods, (int, np.integer)) \
            or not 1 <= max_rods <= MAX_TRACKS:
        raise InputError(f"max_rods: expected a number of rods from 1 to {MAX_TRACKS} (the most tracks one figure "
                         f"holds), got {max_rods!r}")
    return int(max_rods)


def _chosen(columns, rods, region, neighbours_of, sample, random_state, pool, max_rods, what):
    """``(ids, centre, rule)`` of an explicit choice (see :func:`choose_rods`)."""
    n, xy = columns.n_rods, columns.rod_xy_nm
    if rods is not None:
        ids = _rod_id_array(rods, n)
        order = "in rod id order" if np.all(np.diff(ids) > 0) else "in the order given"
        if ids.size == 1:
            return ids, None, f"rod {int(ids[0])}"
        return ids, None, (f"rods {rod_id_text(ids)}, {order}" if ids.size <= 12 else f"{ids.size} rods given, {order}")
    if neighbours_of is not None:
        if isinstance(neighbours_of, (bool, np.bool_)) or not isinstance(neighbours_of, (int, np.integer)):
            raise InputError(f"neighbours_of: expected one rod id, got {neighbours_of!r}")
        centre = int(_rod_id_array([neighbours_of], n, "neighbours_of")[0])
        ids = np.concatenate([[centre], _neighbours_of(columns, centre)]).astype(np.int64)
        return ids, centre, (f"rod {centre} (centre) and its {ids.size - 1} nearest neighbours, in order of their "
                             "angle around it")
    if region is not None:
        inside, desc = _in_region(xy, region)
        ids = np.flatnonzero(inside)
        if ids.size == 0:
            raise InputError(f"region ({desc}) holds no rod axis; rod axes span x {xy[:, 0].min():.2f}.."
                             f"{xy[:, 0].max():.2f} nm, y {xy[:, 1].min():.2f}..{xy[:, 1].max():.2f} nm")
        return ids[_chain_order(xy[ids])], None, f"the {ids.size} rods whose axes lie in the {desc}, {NEIGHBOUR_ORDER}"
    if isinstance(sample, (bool, np.bool_)) or not isinstance(sample, (int, np.integer)) or sample < 1:
        raise InputError(f"sample: expected a number of rods >= 1, got {sample!r}")
    if sample > max_rods:
        raise InputError(f"sample: {sample} rods asked, but at most {max_rods} tracks fit one figure")
    rng = np.random.default_rng(random_state)
    ids = np.sort(rng.choice(pool, size=min(int(sample), pool.size), replace=False))
    seed = f" (seed {random_state})" if isinstance(random_state, (int, np.integer)) else ""
    return ids, None, f"a random sample of {ids.size} of the {pool.size} rods {what}{seed}, in rod id order"


def choose_rods(columns, *, rods=None, region=None, neighbours_of=None, sample=None, random_state=None,
                observed=None, max_default: int = DEFAULT_TRACKS, max_rods: int = MAX_TRACKS,
                what: str = "with decoded sites") -> RodChoice:
    """Choose the rods of a tracks figure (or an export) by a stated rule, in display order.

    At most one way of choosing may be given. Rod ids are the row indices of ``columns``
    (the ``rod`` column of ``tracks.csv``). Whatever the choice, a figure never holds more
    than ``max_rods`` tracks: a larger choice keeps the ``max_rods`` of its rods nearest the
    centre of the field of view, and the rule says so.

    Parameters
    ----------
    columns : RodColumns
    rods : sequence of int or str, optional
        These rods, in the order given (text such as ``"3,5,10-14"`` is accepted).
    region : tuple of float, nm, optional
        Rods whose axis at ``columns.z_ref_nm`` lies in the box ``(x_min, x_max, y_min, y_max)`` or
        the disc ``(x, y, radius)``; ordered so that lateral neighbours are adjacent tracks.
    neighbours_of : int, optional
        That rod followed by its nearest neighbours (by angle around it).
    sample : int, optional
        A random sample of this many rods among those with observed sites, in id order.
    random_state : None, int or numpy.random.Generator
        Seed of ``sample``.
    observed : (n_rods,) ndarray of bool, optional
        Rods with observed sites (default: any unmasked site).
    max_default : int
        With no choice given: every observed rod when there are at most this many, else the
        ``max_default`` observed rods nearest the centre of the field of view (the median
        position of the observed rods), lateral neighbours on adjacent tracks.
    max_rods : int
        The most tracks the figure may hold, 1 to :data:`MAX_TRACKS`.
    what : str
        How the observed rods are described in the rule (e.g. ``"with decoded sites in the
        depth window"``).

    Returns
    -------
    RodChoice
        The ids in display order, the ``neighbours_of`` rod, the rule as one sentence and the
        number of rods chosen from.
    """
    given = [k for k, v in (("rods", rods), ("region", region), ("neighbours_of", neighbours_of),
                            ("sample", sample)) if v is not None]
    if len(given) > 1:
        raise InputError(f"choose rods one way only; got {', '.join(given)}")
    max_rods = _check_max_rods(max_rods)
    obs = columns.mask.any(axis=1) if observed is None else np.asarray(observed, dtype=bool)
    xy = columns.rod_xy_nm
    pool = np.flatnonzero(obs) if obs.any() else np.arange(columns.n_rods)
    mid = np.median(xy[pool], axis=0)
    if given:
        ids, centre, rule = _chosen(columns, rods, region, neighbours_of, sample, random_state, pool, max_rods, what)
    else:
        centre, limit = None, min(int(max_default), max_rods)
        if pool.size > limit:
            ids = _nearest_centre(pool, xy, mid, limit)
            rule = f"the {limit} of the {pool.size} rods {what} {CENTRE_RULE}, {NEIGHBOUR_ORDER}"
        else:
            ids = pool[_chain_order(xy[pool])]
            rule = f"all {ids.size} rods {what}, {NEIGHBOUR_ORDER}"
    n_candidates = int(ids.size) if given else int(pool.size)
    if ids.size > max_rods:
        rule = (f"{max_rods} of {ids.size} rods ({rule}), the ones {CENTRE_RULE}, "
                f"{NEIGHBOUR_ORDER}; at most {max_rods} tracks are drawn")
        ids = ids[:max_rods] if centre is not None else _nearest_centre(ids, xy, mid, max_rods)
    return RodChoice(ids.astype(np.int64), centre, rule, n_candidates)


def select_rods(columns, *, rods=None, region=None, neighbours_of=None, sample=None, random_state=None,
                observed=None, max_default: int = DEFAULT_TRACKS):
    """The rods of a tracks figure, in display order: ``(ids, centre)`` of :func:`choose_rods`.

    Parameters
    ----------
    columns, rods, region, neighbours_of, sample, random_state, observed, max_default
        See :func:`choose_rods`.

    Returns
    -------
    ids : (n,) ndarray of int
        Selected rod ids in display order.
    centre : int or None
        The rod given as ``neighbours_of``.
    """
    c = choose_rods(columns, rods=rods, region=region, neighbours_of=neighbours_of, sample=sample,
                    random_state=random_state, observed=observed, max_default=max_default)
    return c.ids, c.centre
