"""Finding the nearest rod of each ion: the lattice symmetry, :class:`RodLocator` and its
compiled kernels.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numba
import numpy as np

from ..exceptions import InputError
from .model import Lattice

__all__ = ['RodLocator', 'lattice_symmetry']

_SHIFTS = 2  # image cells searched around the unit cell: -2..2 in each direction


def _rot(theta_rad: float) -> np.ndarray:
    c, s = math.cos(theta_rad), math.sin(theta_rad)
    return np.array([[c, -s], [s, c]])


# ====================================================================== lattice symmetry
def lattice_symmetry(lattice: Lattice, tol: float = 2e-3):
    """Rotational symmetry of the rod pattern about the lattice origin, up to a translation.

    Parameters
    ----------
    lattice : Lattice

    Returns
    -------
    order : int
        Largest n in (6, 4, 3, 2, 1) such that rotating the rod pattern by 360/n degrees gives the
        same pattern shifted by a vector ``t``.
    shift_frac : (2,) ndarray of float
        That ``t`` in fractional coordinates (rotated pattern = pattern + t, modulo the lattice).
    """
    C = lattice.cell_matrix
    Cinv = np.linalg.inv(C)
    rods = lattice.rods_frac
    for n in (6, 4, 3, 2):
        Rn = _rot(2 * math.pi / n)
        M = Cinv @ Rn @ C  # rotation in fractional coordinates
        if np.abs(M - np.rint(M)).max() > tol:
            continue
        rot = (rods @ M.T)
        for j in range(rods.shape[0]):
            t = rot[0] - rods[j]
            moved = rot - t
            d = moved[:, None, :] - rods[None, :, :]
            d -= np.rint(d)
            if (np.abs(d).max(-1) < tol).any(1).all():
                t = t - np.floor(t + 1e-9)
                return n, np.where(np.abs(t) < 1e-9, 0.0, t)
    return 1, np.zeros(2)


# ====================================================================== nearest-rod lookup
@dataclass(frozen=True, eq=False)
class RodLocator:
    """Exact nearest-rod assignment in fractional cell coordinates through a lookup table.

    The unit cell (in fractional coordinates) is cut into ``n_grid`` x ``n_grid`` cells. A grid cell
    whose four corners share one nearest rod and lie within the cutoff disc of that rod is wholly
    inside that rod's Voronoi cell and disc (both are convex), so its ions get the rod from the table.
    A grid cell that lies farther than the cutoff from every rod is marked excluded. The remaining
    grid cells carry a short, provably complete list of candidate rods (every rod that can be nearest
    to some point of the cell) and their ions are resolved exactly.

    A rod is coded ``b * 25 + (di + 2) * 5 + (dj + 2)``: basis rod ``b`` in the cell shifted by
    ``(di, dj)`` from the ion's cell.

    Parameters
    ----------
    lattice : Lattice
    cutoff_nm : float, nm
        Ions farther than this from every rod axis (lattice frame) are excluded; ``inf`` for none.
    n_grid : int
        Table size per axis, a power of two.
    """

    lattice: Lattice
    cutoff_nm: float
    n_grid: int
    table: np.ndarray = field(repr=False)  # (G*G,) int32: >=0 rod code; -1 excluded; <=-2 fallback row
    candidates: np.ndarray = field(repr=False)  # (n_fallback_cells, k_max) int32 rod codes
    code_frac: np.ndarray = field(repr=False)  # (n_codes, 2) rod position relative to the ion's cell
    code_cell: np.ndarray = field(repr=False)  # (n_codes, 2) int cell shift (di, dj)
    code_basis: np.ndarray = field(repr=False)  # (n_codes,) int basis index
    metric: np.ndarray = field(repr=False)  # (2, 2) C^T C, nm^2

    @classmethod
    def build(cls, lattice: Lattice, cutoff_nm: float = math.inf, n_grid: int = 256) -> "RodLocator":
        """Build the table for ``lattice`` (about 0.1 s for the presets at ``n_grid=256``)."""
        if n_grid & (n_grid - 1) or n_grid < 8:
            raise InputError(f"n_grid must be a power of two >= 8, got {n_grid}")
        C = lattice.cell_matrix
        g = C.T @ C
        nb = lattice.rods_per_cell
        sh = np.arange(-_SHIFTS, _SHIFTS + 1)
        di, dj = np.meshgrid(sh, sh, indexing="ij")
        di, dj = di.ravel(), dj.ravel()
        n_sh = di.size
        basis = np.repeat(np.arange(nb), n_sh)
        cell = np.column_stack([np.tile(di, nb), np.tile(dj, nb)])
        frac = cell + lattice.rods_frac[basis]
        G = n_grid
        # corners
        t = np.arange(G + 1) / G
        cu, cv = np.meshgrid(t, t, indexing="ij")
        c_code, c_d2 = _brute_nearest(cu.ravel(), cv.ravel(), frac, g)
        c_code = c_code.reshape(G + 1, G + 1)
        c_d2 = c_d2.reshape(G + 1, G + 1)
        same = ((c_code[:-1, :-1] == c_code[1:, :-1]) & (c_code[:-1, :-1] == c_code[:-1, 1:])
                & (c_code[:-1, :-1] == c_code[1:, 1:]))
        rc2 = cutoff_nm ** 2 if math.isfinite(cutoff_nm) else math.inf
        within = np.maximum.reduce([c_d2[:-1, :-1], c_d2[1:, :-1], c_d2[:-1, 1:], c_d2[1:, 1:]]) <= rc2
        table = np.where(same & within, c_code[:-1, :-1], -1).astype(np.int32).ravel()
        # half diagonal of a grid cell, nm (the longer diagonal of the parallelogram)
        e1, e2 = C[:, 0] / G, C[:, 1] / G
        h = 0.5 * max(np.linalg.norm(e1 + e2), np.linalg.norm(e1 - e2))
        mid = (np.arange(G) + 0.5) / G
        mu, mv = np.meshgrid(mid, mid, indexing="ij")
        mu, mv = mu.ravel(), mv.ravel()
        need = np.flatnonzero(table < 0)
        # per grid cell: the rods within 2 h of the nearest distance from its centre, nearest first
        # (compiled: the full cells x rods distance matrix would be hundreds of MB of temporaries)
        u, v = np.ascontiguousarray(mu[need]), np.ascontiguousarray(mv[need])
        frac_c, g_c = np.ascontiguousarray(frac, np.float64), np.ascontiguousarray(g, np.float64)
        dmin = np.empty(need.size)
        n_cand = np.empty(need.size, np.int64)
        _candidate_counts(u, v, frac_c, g_c, h, dmin, n_cand)
        excluded = dmin - h > cutoff_nm
        fb = need[~excluded]
        kmax = int(n_cand[~excluded].max()) if fb.size else 1
        cands = np.empty((fb.size, kmax), np.int32)
        _candidate_lists(u[~excluded], v[~excluded], frac_c, g_c, h, dmin[~excluded], cands)
        table[need[excluded]] = -1
        table[fb] = -2 - np.arange(fb.size, dtype=np.int32)
        for a in (table, cands, frac, cell, basis, g):
            a.flags.writeable = False
        return cls(lattice, float(cutoff_nm), int(G), table, cands, frac, cell.astype(np.int64),
                   basis.astype(np.int64), g)

    @property
    def fallback_share(self) -> float:
        """Share of the unit cell resolved exactly rather than from the table."""
        return float((self.table <= -2).mean())

    def locate(self, f1, f2):
        """Nearest rod of points given in fractional cell coordinates.

        Parameters
        ----------
        f1, f2 : (n,) ndarray of float
            Fractional coordinates along the cell vectors a and b.

        Returns
        -------
        ci, cj : (n,) ndarray of int64
            The cell of each point (floor of its fractional coordinates).
        code : (n,) ndarray of int32
            Rod code (see class notes), -1 where the point is beyond the cutoff.
        """
        G = self.n_grid
        shift = G.bit_length() - 1
        I1 = np.floor(f1 * G).astype(np.int64)
        I2 = np.floor(f2 * G).astype(np.int64)
        ci = I1 >> shift
        cj = I2 >> shift
        code = self.table[((I1 & (G - 1)) << shift) | (I2 & (G - 1))]
        fb = np.flatnonzero(code <= -2)
        if fb.size:
            code[fb] = self._exact(f1[fb] - ci[fb], f2[fb] - cj[fb], -2 - code[fb])
        return ci, cj, code

    def _exact(self, u, v, rows):
        cand = self.candidates[rows]  # (m, k)
        best = np.full(u.shape, np.inf)
        best_code = np.full(u.shape, -1, dtype=np.int32)
        g = self.metric
        u = np.asarray(u, dtype=np.float64)
        v = np.asarray(v, dtype=np.float64)
        for k in range(cand.shape[1]):
            c = cand[:, k]
            du = u - self.code_frac[c, 0]
            dv = v - self.code_frac[c, 1]
            d2 = g[0, 0] * du * du + 2 * g[0, 1] * du * dv + g[1, 1] * dv * dv
            better = d2 < best
            best = np.where(better, d2, best)
            best_code = np.where(better, c, best_code)
        best_code[best > self.cutoff_nm ** 2] = -1
        return best_code

    def nearest_exact(self, f1, f2):
        """Brute-force nearest rod (no table, no cutoff): (ci, cj, code, d2_nm2). For checks."""
        ci = np.floor(f1).astype(np.int64)
        cj = np.floor(f2).astype(np.int64)
        code, d2 = _brute_nearest(f1 - ci, f2 - cj, self.code_frac, self.metric)
        return ci, cj, code.astype(np.int32), d2

    def rod_frac(self, ci, cj, code):
        """Fractional position of the rod with ``code`` seen from cell (ci, cj); code must be >= 0."""
        return (np.column_stack([ci, cj]).astype(float) + self.code_frac[code])


_LOCATORS: dict = {}


def _cached_locator(lattice: Lattice, cutoff_nm: float, n_grid: int) -> RodLocator:
    """A RodLocator per (lattice geometry, cutoff, grid), built once per process."""
    key = (lattice.a_nm, lattice.b_nm, lattice.gamma_deg, lattice.rods_frac.tobytes(), float(cutoff_nm), n_grid)
    loc = _LOCATORS.get(key)
    if loc is None:
        if len(_LOCATORS) > 32:
            _LOCATORS.clear()
        loc = _LOCATORS[key] = RodLocator.build(lattice, cutoff_nm, n_grid)
    return loc


def _brute_nearest(u, v, frac, g):
    """Nearest of the rods ``frac`` (first on ties) and its squared distance, for every point."""
    u = np.ascontiguousarray(u, np.float64).ravel()
    v = np.ascontiguousarray(v, np.float64).ravel()
    code = np.empty(u.size, dtype=np.int64)
    dmin = np.empty(u.size)
    frac, g = (np.ascontiguousarray(a, np.float64).view() for a in (frac, g))
    frac.flags.writeable = g.flags.writeable = False  # one argument type for every caller: built once
    _brute_kernel(u, v, frac, g, code, dmin)
    return code, dmin


@numba.njit(cache=True, nogil=True)
def _brute_kernel(u, v, frac, g, code, dmin):
    for i in range(u.size):
        best = np.inf
        k = 0
        for c in range(frac.shape[0]):
            du = u[i] - frac[c, 0]
            dv = v[i] - frac[c, 1]
            d2 = g[0, 0] * du * du + 2 * g[0, 1] * du * dv + g[1, 1] * dv * dv
            if d2 < best:
                best = d2
                k = c
        code[i] = k
        dmin[i] = best


@numba.njit(cache=True, nogil=True, inline="always")
def _cell_d2(u, v, f0, f1, g):
    du = u - f0
    dv = v - f1
    return g[0, 0] * du * du + 2 * g[0, 1] * du * dv + g[1, 1] * dv * dv


@numba.njit(cache=True, nogil=True)
def _candidate_counts(u, v, frac, g, h, dmin, n_cand):
    """Distance from each point (u, v) to its nearest rod of ``frac`` (nm) and the number of rods
    within ``2 h`` of that distance."""
    for i in range(u.size):
        best = np.inf
        for c in range(frac.shape[0]):
            best = min(best, _cell_d2(u[i], v[i], frac[c, 0], frac[c, 1], g))
        dmin[i] = math.sqrt(best)
        lim = dmin[i] + 2 * h + 1e-12
        n = 0
        for c in range(frac.shape[0]):
            n += math.sqrt(_cell_d2(u[i], v[i], frac[c, 0], frac[c, 1], g)) <= lim
        n_cand[i] = n


@numba.njit(cache=True, nogil=True)
def _candidate_lists(u, v, frac, g, h, dmin, out):
    """Row i of ``out``: the rods within ``2 h`` of ``dmin[i]`` from point i, nearest first (ties
    by index), the row padded with the nearest."""
    kmax = out.shape[1]
    dist = np.empty(kmax)
    for i in range(u.size):
        lim = dmin[i] + 2 * h + 1e-12
        n = 0
        for c in range(frac.shape[0]):
            d = math.sqrt(_cell_d2(u[i], v[i], frac[c, 0], frac[c, 1], g))
            if d <= lim:
                q = n  # insertion into the sorted prefix
                while q > 0 and dist[q - 1] > d:
                    dist[q] = dist[q - 1]
                    out[i, q] = out[i, q - 1]
                    q -= 1
                dist[q] = d
                out[i, q] = c
                n += 1
        for q in range(n, kmax):
            out[i, q] = out[i, 0]


def _locator_arrays(locator):
    return (np.ascontiguousarray(locator.table, np.int32), np.int64(locator.n_grid),
            np.ascontiguousarray(locator.candidates, np.int32), np.ascontiguousarray(locator.code_frac, np.float64),
            np.ascontiguousarray(locator.metric, np.float64),
            np.float64(locator.cutoff_nm ** 2 if math.isfinite(locator.cutoff_nm) else np.inf))


def _gn_pass(x, y, zr, rr, p, C, loc, fit_r, r_lim, dist, ok):
    JTJ = np.zeros((6, 6))
    JTe = np.zeros(6)
    out = np.zeros(2)
    A = p[5] * _rot(p[4])
    Ainv = np.linalg.inv(A @ C)
    Rt = _rot(p[4])
    dR = np.array([[-math.sin(p[4]), -math.cos(p[4])], [math.cos(p[4]), -math.sin(p[4])]])
    _gn_kernel(x, y, zr, rr, np.ascontiguousarray(p, np.float64), C, Ainv, Rt, dR, *loc, float(fit_r),
               float(r_lim), dist, ok, JTJ, JTe, out)
    return JTJ, JTe, out[0], int(out[1])


@numba.njit(cache=True, nogil=True, inline="always")
def _locate_one(f1, f2, table, G, cand, code_frac, metric, cut2):
    """Nearest rod of one point in fractional coordinates: (ci, cj, code), code -1 beyond the cutoff."""
    sh = 0
    while (1 << sh) < G:
        sh += 1
    I1 = np.int64(math.floor(f1 * G))
    I2 = np.int64(math.floor(f2 * G))
    ci = I1 >> sh
    cj = I2 >> sh
    code = np.int64(table[((I1 & (G - 1)) << sh) | (I2 & (G - 1))])
    if code <= -2:
        code = nearest_candidate(cand, -2 - code, f1 - ci, f2 - cj, code_frac, metric, cut2)
    return ci, cj, code


@numba.njit(cache=True, nogil=True, inline="always")
def nearest_candidate(cand, row, u, v, code_frac, metric, cut2):
    """Nearest of the candidate rods ``cand[row]`` of a table cell to the point (u, v) within its
    unit cell (fractional coordinates, distances by ``metric``); -1 beyond the cutoff ``cut2``."""
    best = np.inf
    code = -1
    for q in range(cand.shape[1]):
        c = cand[row, q]
        du = u - code_frac[c, 0]
        dv = v - code_frac[c, 1]
        d2 = metric[0, 0] * du * du + 2 * metric[0, 1] * du * dv + metric[1, 1] * dv * dv
        if d2 < best:
            best = d2
            code = c
    return code if best <= cut2 else -1


@numba.njit(cache=True, nogil=True)
def _gn_kernel(x, y, zr, rr, p, C, Ainv, Rt, dR, table, G, cand, code_frac, metric, cut2, fit_r, r_lim,
               dist, ok, JTJ, JTe, out):
    sse = 0.0
    n_use = 0
    J = np.empty(6)
    Jy = np.empty(6)
    for i in range(x.size):
        px = x[i] - p[0] - p[2] * zr[i]
        py = y[i] - p[1] - p[3] * zr[i]
        f1 = Ainv[0, 0] * px + Ainv[0, 1] * py
        f2 = Ainv[1, 0] * px + Ainv[1, 1] * py
        ci, cj, code = _locate_one(f1, f2, table, G, cand, code_frac, metric, cut2)
        if code < 0:
            ok[i] = False
            dist[i] = np.inf
            continue
        ok[i] = True
        qf1 = ci + code_frac[code, 0]
        qf2 = cj + code_frac[code, 1]
        d1 = f1 - qf1
        d2 = f2 - qf2
        ex_ = C[0, 0] * d1 + C[0, 1] * d2
        ey_ = C[1, 0] * d1 + C[1, 1] * d2
        d = math.sqrt(ex_ * ex_ + ey_ * ey_)
        dist[i] = d
        if not (d < fit_r and rr[i] <= r_lim):
            continue
        q0 = C[0, 0] * qf1 + C[0, 1] * qf2
        q1 = C[1, 0] * qf1 + C[1, 1] * qf2
        Rq0 = Rt[0, 0] * q0 + Rt[0, 1] * q1
        Rq1 = Rt[1, 0] * q0 + Rt[1, 1] * q1
        dRq0 = p[5] * (dR[0, 0] * q0 + dR[0, 1] * q1)
        dRq1 = p[5] * (dR[1, 0] * q0 + dR[1, 1] * q1)
        z_ = zr[i]
        ex = x[i] - p[0] - p[2] * z_ - p[5] * Rq0
        ey = y[i] - p[1] - p[3] * z_ - p[5] * Rq1
        J[0] = 1.0; J[1] = 0.0; J[2] = z_; J[3] = 0.0; J[4] = dRq0; J[5] = Rq0
        Jy[0] = 0.0; Jy[1] = 1.0; Jy[2] = 0.0; Jy[3] = z_; Jy[4] = dRq1; Jy[5] = Rq1
        for a in range(6):
            JTe[a] += J[a] * ex + Jy[a] * ey
            for b in range(a, 6):
                JTJ[a, b] += J[a] * J[b] + Jy[a] * Jy[b]
        sse += ex * ex + ey * ey
        n_use += 1
    for a in range(6):
        for b in range(a):
            JTJ[a, b] = JTJ[b, a]
    out[0] = sse
    out[1] = n_use


_BOUNDARIES = {}


def _cell_boundaries(lattice: Lattice, n_angles: int) -> np.ndarray:
    """(rods_per_cell, n_angles) distances (nm, lattice frame) from each basis rod to the edge of its
    Voronoi cell, along the directions ``(k + 1/2) 2 pi / n_angles``; cached per lattice geometry."""
    key = (lattice.a_nm, lattice.b_nm, lattice.gamma_deg, lattice.rods_frac.tobytes(), n_angles)
    if key in _BOUNDARIES:
        return _BOUNDARIES[key]
    C = lattice.cell_matrix
    theta = (np.arange(n_angles) + 0.5) * (2 * math.pi / n_angles)
    u = np.stack([np.cos(theta), np.sin(theta)], axis=1)

    def block(reach):
        ij = np.arange(-reach, reach + 1)
        return np.stack(np.meshgrid(ij, ij, indexing="ij"), axis=-1).reshape(-1, 2).astype(float)

    # a rod's cell lies inside the cell of its own lattice translates (fewer rods, larger cells),
    # so rods farther than twice that cell's reach cannot cut it (1 % margin for the sampling)
    shifts = block(1)
    bound = 1.01 * float(_boundary(u, shifts[np.any(shifts != 0, axis=1)] @ C.T).max())
    height = min(lattice.a_nm, lattice.b_nm) * math.sin(math.radians(lattice.gamma_deg))
    shifts = block(int(math.ceil(2 * bound / height)) + 1)
    out = np.empty((lattice.rods_per_cell, n_angles))
    for b in range(lattice.rods_per_cell):
        d = ((lattice.rods_frac[None, :, :] + shifts[:, None, :]).reshape(-1, 2) - lattice.rods_frac[b]) @ C.T
        d2 = (d * d).sum(1)
        keep = np.flatnonzero((d2 > 1e-12) & (d2 <= (2 * bound) ** 2))
        d, d2 = d[keep[np.argsort(d2[keep], kind="stable")]], np.sort(d2[keep])
        # the twelve nearest bound the cell more tightly still; then only rods within twice that
        # reach enter the final pass
        near = 1.01 * float(_boundary(u, d[:12]).max())
        out[b] = _boundary(u, d[d2 <= (2 * near) ** 2])
    out.flags.writeable = False
    if len(_BOUNDARIES) > 16:
        _BOUNDARIES.clear()
    _BOUNDARIES[key] = out
    return out


def _boundary(u: np.ndarray, d: np.ndarray) -> np.ndarray:
    """Distance along each unit vector ``u`` to the nearest bisector of the points ``d`` (relative
    to the origin): the edge of the origin's Voronoi cell among them."""
    # (n_points, n_angles), reduced over the points; no BLAS call for so small a product
    proj = d[:, :1] * u[:, 0] + d[:, 1:] * u[:, 1]
    ahead = proj > 1e-12
    lim = np.full(proj.shape, np.inf)
    np.divide(((d * d).sum(1) / 2)[:, None], proj, out=lim, where=ahead)
    return lim.min(axis=0)
