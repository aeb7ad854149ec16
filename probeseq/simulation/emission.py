"""Ions the simulator emits: the species of metals and linker fragments, where they come from and
their mass-to-charge.

Metals leave as M+, M2+, MO+ and, with a fourth ``branching`` entry, M3+ (heavy metals with many
isotopes then sit at a third of their mass, among singly charged lighter ions). Linker fragments
come from a set: ``default`` (H, C, O and small molecules) or ``carbon-rich`` (adds C2+, C2H+,
CH+, CH2+, C2H3+ and C3+, whose lines fall on light metals: C2+ at 24 Da beside 24Mg+, CH+ at 13 Da
beside 26Mg2+). Isotope lines of every species come from periodictable's natural abundances
(:func:`probeseq.simulation.simulate.ion_lines`).
"""

from __future__ import annotations

import math

import numpy as np

from ..exceptions import InputError

__all__ = ["ORGANIC_SPECIES", "FRAGMENT_SETS", "CARBON_RICH_EXTRA", "METAL_FORMS", "ion_lines", "fragment_species"]

# Linker-fragment ions of an organic framework and their relative rates (invented for the
# simulator; the species are the usual small fragments of hydrocarbon/carboxylate linkers).
ORGANIC_SPECIES = (
    ("H", 1, 0.20), ("H2", 1, 0.08), ("C", 1, 0.12), ("C", 2, 0.08), ("O", 1, 0.10),
    ("OH", 1, 0.06), ("H2O", 1, 0.08), ("CO", 1, 0.12), ("C2H2", 1, 0.06), ("CO2", 1, 0.10),
)



#: extra fragments of a carbon-rich linker (invented rates), on top of :data:`ORGANIC_SPECIES`
CARBON_RICH_EXTRA = (
    ("C2", 1, 0.10), ("C2H", 1, 0.08), ("CH", 1, 0.06), ("CH2", 1, 0.04), ("C2H3", 1, 0.04), ("C3", 1, 0.03),
)

#: fragment sets by name
FRAGMENT_SETS = {"default": ORGANIC_SPECIES, "carbon-rich": ORGANIC_SPECIES + CARBON_RICH_EXTRA}

#: the metal species of each entry of ``branching``, in order
METAL_FORMS = ((lambda el: el, 1), (lambda el: el, 2), (lambda el: el + "O", 1), (lambda el: el, 3))


def fragment_species(cfg):
    """(formula, charge, rate) of the linker fragments of a configuration."""
    return FRAGMENT_SETS[cfg.fragments]


def _species_lines(cfg):
    """Ion species (formula, charge, kind, metal index) and their isotope lines: metals, then linker."""
    species = []
    lines = []
    for mi, el in enumerate(cfg.metals):
        for form, charge in METAL_FORMS[:len(cfg.branching)]:
            species.append((form(el), charge, "metal", mi))
            lines.append(ion_lines(form(el), charge))
    for formula, charge, _ in fragment_species(cfg):
        species.append((formula, charge, "organic", -1))
        lines.append(ion_lines(formula, charge))
    return species, lines


def _emit_metal_ions(cfg, rng, seq, inside, axis, site_zr, R):
    """Detected metal ions: rod and site indices, metal, blurred positions and species index."""
    detected = inside & (rng.random(inside.shape) < cfg.eta)
    r_idx, s_idx = np.nonzero(detected)
    n_metal = r_idx.size
    metal = seq[r_idx, s_idx].astype(np.int64)
    ang = 2 * math.pi * s_idx / cfg.sites_per_repeat + rng.uniform(0, 2 * math.pi)
    helix = cfg.helix_radius_nm * np.column_stack([np.cos(ang), np.sin(ang)]) @ R.T
    zm = site_zr[r_idx, s_idx] + (rng.normal(0, cfg.sigma_z_nm, n_metal) if cfg.sigma_z_nm else 0.0)
    xym = axis[r_idx, s_idx] + helix + rng.normal(0, cfg.sigma_xy_nm, (n_metal, 2))
    branching = np.asarray(cfg.branching, float) / np.sum(cfg.branching)
    nb = branching.size
    which = np.minimum(np.searchsorted(np.cumsum(branching), rng.random(n_metal), side="right"), nb - 1)
    sp_metal = metal * nb + which
    return r_idx, s_idx, metal, xym, zm, sp_metal


def _emit_organic_ions(cfg, rng, inside, k, tilt):
    """Linker-fragment ions, uniform through the needle volume: species index and positions."""
    n_org = int(rng.poisson(cfg.organic_per_site * inside.sum() / max(cfg.eta, 1e-9) * cfg.eta))
    frags = fragment_species(cfg)
    rates = np.array([w for _, _, w in frags])
    sp_org = len(cfg.branching) * k + np.minimum(
        np.searchsorted(np.cumsum(rates / rates.sum()), rng.random(n_org), side="right"), len(frags) - 1)
    xyo, zo = _uniform_in_needle(rng, n_org, cfg)
    xyo = xyo + tilt[None, :] * zo[:, None]
    return sp_org, xyo, zo


def _draw_mass_to_charge(cfg, rng, sp_all, lines):
    """Mass-to-charge of the signal ions: an isotope line, a Gaussian peak and a thermal tail."""
    mz = np.empty(sp_all.size)
    for si, (mzs, ps) in enumerate(lines):
        sel = np.flatnonzero(sp_all == si)
        if sel.size:
            mz[sel] = mzs[np.minimum(np.searchsorted(np.cumsum(ps), rng.random(sel.size), side="right"), len(ps) - 1)]
    width = mz / cfg.mrp / 2.3548
    mz = mz + rng.normal(0, 1, mz.size) * width
    tailed = rng.random(mz.size) < cfg.tail_fraction
    mz[tailed] += rng.exponential(1.0, tailed.sum()) * cfg.tail_scale * mz[tailed] / cfg.mrp
    return mz


# ---------------------------------------------------------------------- isotope patterns
def _formula_atoms(formula: str) -> list:
    import periodictable as pt

    f = pt.formula(formula)
    return [(el, n) for el, n in f.atoms.items()]


def ion_lines(formula: str, charge: int, min_abundance: float = 1e-5):
    """Isotope lines of an ion: (m/z in Da, fraction), neutral isotope masses / charge.

    Isotope masses and abundances from ``periodictable`` (AME2020 masses, CIAAW-2021 abundances).
    """
    masses = np.array([0.0])
    probs = np.array([1.0])
    for el, n in _formula_atoms(formula):
        iso = [(i.mass, i.abundance / 100.0) for i in el if i.abundance > 0]
        if not iso:
            raise InputError(f"element {el} has no natural isotopes")
        im = np.array([m for m, _ in iso])
        ip = np.array([p for _, p in iso])
        ip = ip / ip.sum()
        for _ in range(int(n)):
            masses = (masses[:, None] + im[None, :]).ravel()
            probs = (probs[:, None] * ip[None, :]).ravel()
            # merge lines that coincide to 1e-4 Da and prune negligible ones
            key = np.round(masses, 4)
            uk, inv = np.unique(key, return_inverse=True)
            p2 = np.bincount(inv, probs)
            m2 = np.bincount(inv, probs * masses) / p2
            keep = p2 >= min_abundance
            masses, probs = m2[keep], p2[keep] / p2[keep].sum()
    return masses / charge, probs


def _uniform_in_needle(rng, n, cfg):
    """n points uniform in the cone frustum (axis on z, reconstruction frame)."""
    if n == 0:
        return np.zeros((0, 2)), np.zeros(0)
    ta = math.tan(math.radians(cfg.half_angle_deg))
    r0, d = cfg.top_radius_nm, cfg.depth_nm
    # depth density proportional to r(z)^2: sample by rejection
    rmax2 = (r0 + d * ta) ** 2
    z = np.empty(0)
    while z.size < n:
        cand = rng.uniform(0, d, 2 * (n - z.size) + 16)
        acc = rng.random(cand.size) < (r0 + cand * ta) ** 2 / rmax2
        z = np.concatenate([z, cand[acc]])
    z = z[:n]
    r = (r0 + z * ta) * np.sqrt(rng.random(n))
    a = rng.uniform(0, 2 * math.pi, n)
    return np.column_stack([r * np.cos(a), r * np.sin(a)]), z
