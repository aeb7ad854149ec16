"""Forward simulator: synthetic atom-probe runs of a rod framework with known truth.

The simulator is the ground truth for tests and benchmarks and the source of the sample data.
Everything it makes is invented. The model, stage by stage:

1. **Crystal.** A rod packing (:class:`~probeseq.lattice.model.Lattice` preset) seen down the rod axis,
   shifted by a random lattice offset. Metal sites sit along each rod at the pitch
   ``repeat / sites_per_repeat``; with ``helix_radius_nm > 0`` site ``k`` sits off the axis at angle
   ``2 pi k / sites_per_repeat`` (rods are helical chains, not lines).
2. **Sequence** of K metals with composition f per rod:
   ``random`` independent sites; ``short-repeat`` / ``long-block`` a Markov chain with persistence
   lam, ``P(stay in k) = f_k + lam (1 - f_k)`` (mean run length of k is ``1/((1 - lam)(1 - f_k))``),
   defaults lam = 0.5 and 0.9; ``interspersed`` one metal (``interspersed_metal``, the least
   abundant by default) inserted as isolated units, following itself with probability
   ``f_m (1 - avoidance)``; ``per-metal`` (three metals or more) one arrangement per metal
   (``metal_patterns``); ``copied`` one master sequence (persistence ``persistence``, default 0)
   that every rod repeats at the same depth, each site replaced by an independent draw with
   probability ``copy_error``. The chains of ``interspersed`` and ``per-metal`` are in
   :mod:`probeseq.simulation.chains`.
3. **Specimen**: a needle (cone frustum) of top radius ``top_radius_nm``, half-angle
   ``half_angle_deg`` and depth ``depth_nm``; only sites inside it can be detected.
4. **Detection**: each site yields one ion with probability ``eta``; a metal leaves as M+, M2+ or
   MO+ with ``branching``; isotopes are drawn with natural abundances (``periodictable``);
   mass-to-charge has a Gaussian peak of FWHM ``m / mrp`` and, for a share ``tail_fraction`` of
   ions, an exponential thermal tail towards high mass of mean ``tail_scale * m / mrp``. Linker
   fragments (H+, C+, C2+, O+, CO+, ...) arrive at ``organic_per_site`` per site, spread through
   the volume; a uniform background in mass-to-charge and space adds ``background_fraction`` of
   all ions.
5. **Reconstruction**: positions blurred laterally (``sigma_xy_nm``) and in depth (``sigma_z_nm``);
   then the crystal is mapped into the reconstruction frame by a rotation about z
   (``rotation_deg``), a lateral scale error (``scale``), an offset (``offset_nm``), and the rods are
   tilted away from z by ``tilt_deg`` towards azimuth ``tilt_azimuth_deg``.
6. **Reconstruction artefacts** (:mod:`probeseq.simulation.artefacts`; all off by default except
   the depth blur). A reconstruction turns the detector hits and their order into positions with a
   projection model whose parameters are only estimated, so the positions of stage 5 (the ideal
   ones, ``(x, y, zeta)``, with ``rho = sqrt(x^2 + y^2)`` the distance from the specimen axis, the z
   axis, and ``D = depth_nm``) come out distorted (the physical causes named below are recalled
   from memory):

   * ``sigma_z_nm`` -- depth blur (stage 5): the depth of an ion comes from its place in the
     evaporation sequence and the assumed surface, which the field evaporation of neighbouring
     ions and the roughness of the surface smear.
   * ``depth_scale`` -- the reconstructed depth is ``depth_scale * zeta``: the depth added per ion
     follows from the image compression factor, the field factor and the evaporation field, each
     only estimated, so the whole depth axis is stretched or squeezed.
   * ``depth_scale_change`` -- the local depth scale changes with depth,
     ``s(zeta) = depth_scale * (1 + depth_scale_change * zeta / D)``, so
     ``z_rec = depth_scale * (zeta + depth_scale_change * zeta^2 / (2 D))``: the specimen widens as
     it is evaporated and an error of the assumed shape or field grows with depth.
   * ``plane_curvature_per_nm`` -- kappa, 1/nm: every depth plane is curved, ``z_rec`` gets an extra
     ``kappa rho^2`` (positive: the planes bend towards larger z at the edge): an assumed tip radius
     that is wrong projects the flat planes of the crystal onto curved ones. The truth records the
     sag at the top radius, ``kappa top_radius_nm^2``.
   * ``magnification_change`` -- the lateral magnification changes with depth: ``x`` and ``y`` are
     multiplied by ``m(zeta) = 1 + magnification_change * zeta / D`` (a wrong shank angle makes the
     assumed radius grow at the wrong rate); the rods then fan out and are no longer straight.
   * ``edge_efficiency`` -- the detection efficiency falls towards the specimen edge (ions from the
     flank reach the edge of the detector or miss it): an ion at ``rho`` where the needle radius is
     ``R(zeta)`` is kept with probability ``1 - (1 - edge_efficiency) * min(rho / R, 1)^2``, so
     ``eta`` on the axis and ``eta * edge_efficiency`` at the outline, for every ion.

   The edge thinning acts on the ideal positions, then the lateral map and
   ``z_rec = Z(zeta) + kappa rho^2`` (``Z`` the depth-scale map, ``rho`` and ``zeta`` ideal) move
   every ion; the ions still leave (are ordered and get their voltage) by their true depth. The
   truth goes through the same map: ``SimRun.site_z_nm`` and the truth's ``rods[].z_nm`` are where
   each site's point on its rod axis lands (``rods[].z_ideal_nm`` the ideal depths), the straight
   rod axes are least-squares lines through the mapped axis points (``rods[].axis_xy_nm`` gives the
   points themselves with a magnification change), and the truth's ``reconstruction`` section lists
   the artefacts; :func:`true_depth_scale` gives the local depth scale at a reconstructed depth.

The reconstruction frame is the one the tool sees: a rod axis at depth z is
``rod_xy_nm + rod_tilt * z`` (for an ideal reconstruction exactly). The tilt is a rotation of the
crystal, so the planes of sites stay perpendicular to the rods: site depths depend on the lateral
position (``SimRun.site_z_nm``).
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..decoding.chain import mean_run_lengths, persistence_per_state
from ..decoding.chain import persistence as chain_persistence
from ..exceptions import InputError
from ..io.ions import IonList, IonMeta
from ..lattice.model import PRESETS, Lattice
from .artefacts import (axis_lines, check_artefacts, edge_keep, geometry_on, map_positions,
                        reconstruction_truth, true_depth_scale)
from .emission import (FRAGMENT_SETS, _draw_mass_to_charge, _emit_metal_ions, _emit_organic_ions,
                       _species_lines, _uniform_in_needle, ion_lines)
from .chains import METAL_PATTERNS, chain_sequences, interspersed_transmat, per_metal_transmat
from ..utils.tomlfile import short_repr
from ..utils.validate import check_memory, check_number, check_scale, check_seed

__all__ = ['SimConfig', 'SimRun', 'simulate_run', 'markov_sequences', 'ion_lines', 'true_depth_scale', 'PATTERNS',
           'DEFAULT_PERSISTENCE']

PATTERNS = ("random", "short-repeat", "long-block", "interspersed", "per-metal", "copied")


#: most ions a simulated run may hold (a bound on the work and memory of one run)
MAX_SIM_IONS = 200_000_000


#: largest needle top radius, nm: atom-probe specimens are sharpened to apex radii of tens of nm
#: (common practice; recalled from memory: about 20-100 nm), so a larger value is a slip of units
MAX_TOP_RADIUS_NM = 150.0


#: estimated peak memory per simulated ion (positions, species, truth arrays and temporaries), bytes;
#: measured about 220-240 B per ion all told for runs of 1.5e6 and 5.3e6 ions
BYTES_PER_ION = 200


#: estimated peak memory per site of the rod grid the simulator places (depths, positions, masks), bytes
BYTES_PER_GRID_SITE = 100


DEFAULT_PERSISTENCE = {"random": 0.0, "short-repeat": 0.5, "long-block": 0.9, "copied": 0.0}

#: smallest mean run length of the least abundant metal that the truth (and the classifier's
#: default) calls a long block, sites
LONG_BLOCK_SITES = 8.0


def _check_metal_symbol(symbol) -> None:
    """Refuse a metal that is not the symbol of an element with natural isotopes (before any work)."""
    import periodictable as pt

    if not isinstance(symbol, str) or not symbol:
        raise InputError(f"--metals: {symbol!r:.40} is not an element symbol (write e.g. Co,Zn)")
    try:
        el = pt.elements.symbol(symbol)
    except ValueError:
        proper = symbol[:1].upper() + symbol[1:].lower()
        try:
            hint = f"did you mean '{pt.elements.symbol(proper).symbol}'?" if proper != symbol else "e.g. Co,Zn"
        except ValueError:
            hint = "e.g. Co,Zn"
        raise InputError(f"--metals: '{symbol[:20]}' is not an element symbol (symbols are case-sensitive; "
                         f"{hint})") from None
    if getattr(el, "isotope", None) is not None or el.number == 0 or not any(i.abundance > 0 for i in el):
        raise InputError(f"--metals: '{symbol}' is not an element with naturally occurring isotopes")


@dataclass(frozen=True)
class SimConfig:
    """Parameters of a simulated run (lengths in nm, angles in degrees). See module docstring.

    Every field is checked on construction, before any work: metals must be element symbols
    with natural isotopes, numbers finite and in range, and the run's estimated size
    (:meth:`expected_size`) at most :data:`MAX_SIM_IONS` ions and within the available memory
    (:func:`probeseq.utils.validate.check_memory`); otherwise :class:`InputError` names the options to
    change.
    """

    pattern: str = "random"
    metals: tuple = ("Co", "Zn")
    composition: tuple | None = None
    persistence: float | None = None
    copy_error: float = 0.05
    interspersed_metal: str | None = None
    avoidance: float = 0.9
    metal_patterns: tuple | None = None
    packing: str = "honeycomb"
    a_nm: float = 2.6
    repeat_nm: float = 0.68
    sites_per_repeat: int = 3
    helix_radius_nm: float = 0.05
    top_radius_nm: float = 7.0
    half_angle_deg: float = 8.0
    depth_nm: float = 40.0
    eta: float = 0.5
    branching: tuple = (0.35, 0.55, 0.10)
    fragments: str = "default"
    mrp: float = 600.0
    tail_fraction: float = 0.5
    tail_scale: float = 1.5
    organic_per_site: float = 2.0
    background_fraction: float = 0.03
    sigma_xy_nm: float = 0.10
    sigma_z_nm: float = 0.04
    rotation_deg: float | None = None
    scale: float | None = None
    offset_nm: tuple | None = None
    tilt_deg: float | None = None
    tilt_azimuth_deg: float | None = None
    seed: int = 0
    lattice: Lattice | None = None
    # reconstruction artefacts (module docstring, stage 6); these values switch them off
    depth_scale: float = 1.0
    depth_scale_change: float = 0.0
    plane_curvature_per_nm: float = 0.0
    magnification_change: float = 0.0
    edge_efficiency: float = 1.0

    def __post_init__(self):
        if self.pattern not in PATTERNS:
            raise InputError(f"--pattern must be one of {', '.join(PATTERNS)}, got '{self.pattern}'")
        self._check_chain_fields()
        if self.lattice is not None and not isinstance(self.lattice, Lattice):
            raise InputError(f"lattice must be a Lattice, got {type(self.lattice).__name__}")
        if self.packing not in PRESETS:
            raise InputError(f"--lattice must be one of {', '.join(sorted(PRESETS))}, got '{self.packing}'")
        if isinstance(self.metals, str) or not isinstance(self.metals, (tuple, list)):
            raise InputError(f"--metals must be a list of element symbols, got {self.metals!r:.60}")
        if len(self.metals) < 2:
            raise InputError(f"--metals needs at least two metals, got {list(self.metals)}")
        if len(set(self.metals)) != len(self.metals):
            raise InputError(f"--metals lists a metal twice: {list(self.metals)}")
        for m in self.metals:
            _check_metal_symbol(m)
        if self.composition is not None:
            try:
                f = np.asarray(self.composition, float)
            except (TypeError, ValueError):
                f = np.full(0, np.nan)
            if f.shape != (len(self.metals),) or not (np.isfinite(f).all() and (f > 0).all()):
                raise InputError(f"--composition needs {len(self.metals)} positive finite fractions, "
                                 f"got {short_repr(self.composition, 80)}")
            if abs(f.sum() - 1.0) > 0.01:  # rounding (0.33,0.33,0.33) is fine; 0.3,0.3 is a mistake
                raise InputError(f"--composition: the site fractions must add up to 1, got {short_repr(self.composition, 80)} "
                                 f"(sum {f.sum():.3g})")
        check_number(self.eta, "--detection-efficiency (eta)", 0, 1, lo_open=True)
        check_number(self.persistence, "--persistence", 0, 1, hi_open=True, allow_none=True)
        check_number(self.copy_error, "--copy-error", 0, 1)
        for k, opt in (("a_nm", "--a"), ("repeat_nm", "--repeat"), ("top_radius_nm", "--tip-radius"),
                       ("depth_nm", "--depth"), ("mrp", "--mrp")):
            check_number(getattr(self, k), opt if k == "mrp" else f"{opt} ({k})", 0, lo_open=True)
        check_number(self.top_radius_nm, "--tip-radius (top_radius_nm)", 0, MAX_TOP_RADIUS_NM, lo_open=True)
        for k, opt in (("sigma_xy_nm", "--lateral-blur"), ("sigma_z_nm", "--depth-blur"),
                       ("organic_per_site", "organic_per_site"), ("helix_radius_nm", "helix_radius_nm")):
            check_number(getattr(self, k), f"{opt} ({k})" if opt != k else k, 0)
        check_number(self.sites_per_repeat, "--sites-per-repeat", 1, integer=True)
        check_number(self.background_fraction, "background_fraction", 0, 1, hi_open=True)
        check_number(self.half_angle_deg, "--half-angle (half_angle_deg)", 0, 45, hi_open=True)
        check_number(self.tail_fraction, "tail_fraction", 0, 1)
        check_number(self.tail_scale, "tail_scale", 0)
        check_number(self.rotation_deg, "rotation_deg", allow_none=True)
        check_scale(self.scale, "scale")
        check_number(self.tilt_deg, "tilt_deg", 0, 45, hi_open=True, allow_none=True)
        check_number(self.tilt_azimuth_deg, "tilt_azimuth_deg", allow_none=True)
        check_artefacts(self)
        if self.offset_nm is not None:
            off = np.atleast_1d(np.asarray(self.offset_nm, dtype=object))
            if off.shape != (2,):
                raise InputError(f"offset_nm must be two numbers (x, y) in nm, got {self.offset_nm!r:.60}")
            for v in off:
                check_number(v, "offset_nm")
        check_seed(self.seed)
        if not isinstance(self.seed, (int, np.integer)):
            raise InputError(f"--seed must be an integer from 0 to 2**63 - 1, got {self.seed!r:.40}")
        try:
            b = np.asarray(self.branching, float)
        except (TypeError, ValueError):
            b = np.full(0, np.nan)
        if b.shape not in ((3,), (4,)) or not np.isfinite(b).all() or (b < 0).any() or b.sum() <= 0:
            raise InputError(f"branching needs 3 or 4 non-negative fractions (M+, M2+, MO+[, M3+]), got "
                             f"{short_repr(self.branching, 60)}")
        if self.fragments not in FRAGMENT_SETS:
            raise InputError(f"--fragments must be one of {', '.join(FRAGMENT_SETS)}, got {short_repr(self.fragments, 40)}")
        lat = self.lattice if self.lattice is not None else Lattice.from_preset(
            self.packing, self.a_nm, self.repeat_nm, self.sites_per_repeat)
        if self.depth_nm < lat.pitch_nm:
            raise InputError(f"--depth (depth_nm) {self.depth_nm:g} nm is shorter than one site pitch "
                             f"({lat.pitch_nm:.3g} nm)")
        size = self.expected_size(lat)
        remedy = "reduce --tip-radius (top_radius_nm) or --depth (depth_nm)"
        if size["ions"] > MAX_SIM_IONS:
            raise InputError(f"the simulated needle (top radius {self.top_radius_nm:g} nm, depth {self.depth_nm:g} nm) "
                             f"would hold about {size['ions']:.2g} ions, more than the simulator's limit of "
                             f"{MAX_SIM_IONS:,}; {remedy}")
        check_memory(size["bytes"], f"simulating about {size['ions']:.2g} ions (top radius {self.top_radius_nm:g} nm, "
                     f"depth {self.depth_nm:g} nm)", remedy)

    def expected_size(self, lattice: Lattice | None = None) -> dict:
        """Estimated size of the run before simulating it.

        Parameters
        ----------
        lattice : Lattice, optional
            The lattice (default: ``self.lattice`` or the preset).

        Returns
        -------
        dict
            ``metal_sites`` (sites inside the needle), ``grid_sites`` (sites of all rods the
            simulator places, inside or not), ``ions`` (metal, linker and background) and
            ``bytes`` (estimated peak memory, from :data:`BYTES_PER_ION` and
            :data:`BYTES_PER_GRID_SITE`).

        Notes
        -----
        The run is simulated over the true depth ``depth_nm``: ``depth_scale`` and the other maps
        of the reconstruction move ions (the file's depth extent is about ``depth_scale *
        depth_nm``) but make none. ``edge_efficiency`` removes ions after they are made: ``ions``
        counts those kept, ``(1 + edge_efficiency) / 2`` of them (the mean of
        ``1 - (1 - edge_efficiency) (rho / R)^2`` over a uniform disc), while ``bytes`` counts all.
        """
        lat = lattice or self.lattice or Lattice.from_preset(self.packing, self.a_nm, self.repeat_nm,
                                                             self.sites_per_repeat)
        ta = math.tan(math.radians(self.half_angle_deg))
        r0, d = float(self.top_radius_nm), float(self.depth_nm)
        r1 = r0 + d * ta
        rho = lat.rod_density_per_nm2
        n_sites = math.floor(d / lat.pitch_nm)
        # sites inside: rods per area times the frustum volume, over the pitch
        inside = rho * math.pi * d * (r0 * r0 + r0 * r1 + r1 * r1) / 3 / lat.pitch_nm
        # rods placed: the disc the simulator searches (largest drawn offset, scale and tilt)
        off = 1.0 if self.offset_nm is None else float(np.max(np.abs(np.asarray(self.offset_nm, float))))
        scale = 0.96 if self.scale is None else min(float(self.scale), 1.0)
        tilt = math.tan(math.radians(1.5 if self.tilt_deg is None else float(self.tilt_deg)))
        reach = (r1 + off + tilt * d) / scale + 2 * lat.a_nm
        grid = rho * math.pi * reach * reach * n_sites
        made = inside * (self.eta + self.organic_per_site) / (1 - self.background_fraction)
        ions = made if self.edge_efficiency == 1.0 else made * (1.0 + self.edge_efficiency) / 2.0
        return {"metal_sites": inside, "grid_sites": grid, "ions": ions,
                "bytes": BYTES_PER_ION * made + BYTES_PER_GRID_SITE * grid}

    @property
    def composition_array(self) -> np.ndarray:
        k = len(self.metals)
        f = np.full(k, 1.0 / k) if self.composition is None else np.asarray(self.composition, float)
        return f / f.sum()

    @property
    def persistence_value(self) -> float:
        """The persistence of the run's chain (of the master chain for ``copied``)."""
        if self.pattern in ("interspersed", "per-metal"):
            return float(chain_persistence(self.transmat))
        return DEFAULT_PERSISTENCE[self.pattern] if self.persistence is None else float(self.persistence)

    @property
    def transmat(self) -> np.ndarray:
        """Transition matrix of the run's chain (of the master chain for ``copied``), (K, K)."""
        f = self.composition_array
        k = f.size
        if self.pattern == "interspersed":
            m = int(np.argmin(f)) if self.interspersed_metal is None else list(self.metals).index(self.interspersed_metal)
            return interspersed_transmat(f, m, self.avoidance)
        if self.pattern == "per-metal":
            return per_metal_transmat(f, self.metal_patterns, self.avoidance)
        lam = self.persistence_value
        return lam * np.eye(k) + (1.0 - lam) * np.tile(f, (k, 1))

    def _check_chain_fields(self):
        """The fields of the interspersed and per-metal chains (the chain itself is built once here,
        so a combination no chain can meet is refused before any work)."""
        check_number(self.avoidance, "--avoidance", 0.0, 1.0)
        if self.interspersed_metal is not None and self.interspersed_metal not in tuple(self.metals):
            raise InputError(f"--interspersed-metal '{self.interspersed_metal}' is not one of --metals "
                             f"{', '.join(map(str, self.metals))}")
        if self.pattern == "per-metal":
            mp = self.metal_patterns
            if mp is None or isinstance(mp, str) or not isinstance(mp, (tuple, list)):
                raise InputError("--pattern per-metal needs --metal-patterns, one of "
                                 f"{', '.join(METAL_PATTERNS)} per metal (e.g. long-block,random,interspersed)")
            bad = [x for x in mp if x not in METAL_PATTERNS]
            if bad:
                raise InputError(f"--metal-patterns: '{bad[0]}' is not one of {', '.join(METAL_PATTERNS)}")
        elif self.metal_patterns is not None:
            raise InputError("--metal-patterns is given but --pattern is not per-metal")


@dataclass(frozen=True)
class SimRun:
    """A simulated run: the ion list, the true lattice, and the truth per rod, site and ion.

    ``site_z_nm`` is (n_rods, n_sites): the depth of every site in the reconstruction frame (of its
    point on the rod axis, after the reconstruction artefacts). With a tilt, the site planes are
    perpendicular to the tilted rods, so site k of neighbouring rods sits at slightly different
    depths. ``seq`` is (n_rods, n_sites), -1 outside the specimen.

    ``rod_xy_nm`` (n_rods, 2) is each rod's axis at z = 0 and ``rod_tilt`` (2,) the rods' common
    ``(dx/dz, dy/dz)``. For an ideal reconstruction these are exact; with the artefacts that move
    positions the axes are least-squares lines through the mapped axis points of each rod's
    inside sites, ``rod_xy_nm`` and ``rod_tilt_per_rod`` (n_rods, 2) of each rod's own line (as in
    the truth's ``rods[]``) and ``rod_tilt`` of the joint fit with one slope for all rods (a
    magnification change fans the rods out, so their slopes differ).
    """

    ions: IonList
    lattice: Lattice
    truth: dict
    rod_xy_nm: np.ndarray
    rod_tilt: np.ndarray
    seq: np.ndarray
    site_z_nm: np.ndarray
    ion_rod: np.ndarray
    ion_site: np.ndarray
    ion_metal: np.ndarray
    ion_species: np.ndarray
    config: SimConfig = field(default_factory=SimConfig)
    rod_tilt_per_rod: np.ndarray | None = None

    @staticmethod
    def output_paths(out) -> dict:
        """The files :meth:`write` writes for ion file ``out``, by role."""
        out = Path(out)
        stem = out.with_suffix("")
        return {"ions": out, "truth": stem.parent / (stem.name + ".truth.json"),
                "lattice": stem.parent / (stem.name + ".lattice.toml")}

    def write(self, out, fmt: str | None = None) -> dict:
        """Write the ion list, ``<stem>.truth.json`` and ``<stem>.lattice.toml`` beside it.

        Returns the paths written, by role.
        """
        from ..io.readers import write_ions
        from ..utils.marks import MARK

        paths = self.output_paths(out)
        paths["ions"].parent.mkdir(parents=True, exist_ok=True)
        write_ions(self.ions, paths["ions"], fmt=fmt, mark=True)
        paths["truth"].write_text(json.dumps({**self.truth, "written_by": MARK}, indent=1, sort_keys=True))
        paths["lattice"].write_text(f"# {MARK}: the true lattice of a simulated run\n" + self.lattice.to_toml())
        return {k: str(v) for k, v in paths.items()}


# ---------------------------------------------------------------------- sequences
def markov_sequences(rng, n_rods, n_sites, f, lam):
    """(n_rods, n_sites) chains: at each step keep the state with prob lam, else redraw from f.

    P(stay in k) = f_k + lam (1 - f_k), P(k -> j) = (1 - lam) f_j; the first site is drawn from f
    (the stationary distribution).
    """
    k = len(f)
    cdf = np.cumsum(f)
    seq = np.empty((n_rods, n_sites), dtype=np.int8)
    seq[:, 0] = np.minimum(np.searchsorted(cdf, rng.random(n_rods), side="right"), k - 1)
    if n_sites > 1:
        fresh = np.minimum(np.searchsorted(cdf, rng.random((n_rods, n_sites)), side="right"), k - 1)
        keep = rng.random((n_rods, n_sites)) < lam
        for t in range(1, n_sites):
            seq[:, t] = np.where(keep[:, t], seq[:, t - 1], fresh[:, t])
    return seq


def simulate_sequences(cfg: SimConfig, n_rods: int, n_sites: int, rng) -> np.ndarray:
    """True site sequences (n_rods, n_sites) of metal indices for the configured pattern."""
    f = cfg.composition_array
    if cfg.pattern in ("interspersed", "per-metal"):
        return chain_sequences(rng, n_rods, n_sites, cfg.transmat, f)
    lam = cfg.persistence_value
    if cfg.pattern in ("random", "short-repeat", "long-block"):
        return markov_sequences(rng, n_rods, n_sites, f, lam)
    master = markov_sequences(rng, 1, n_sites, f, lam)[0]
    seq = np.broadcast_to(master, (n_rods, n_sites)).copy()
    err = rng.random((n_rods, n_sites)) < cfg.copy_error
    fresh = np.minimum(np.searchsorted(np.cumsum(f), rng.random((n_rods, n_sites)), side="right"), len(f) - 1)
    seq[err] = fresh[err]
    return seq


def _empirical_mean_runs(seq, inside, k):
    """Mean run length per metal of the true sequences over inside sites (runs cut at the mask)."""
    out = []
    for m in range(k):
        lengths = []
        for r in range(seq.shape[0]):
            s = np.where(inside[r], seq[r], -1)
            is_m = np.concatenate([[False], s == m, [False]])
            d = np.diff(is_m.astype(np.int8))
            starts, ends = np.flatnonzero(d == 1), np.flatnonzero(d == -1)
            lengths.append(ends - starts)
        ln = np.concatenate(lengths) if lengths else np.array([])
        out.append(float(ln.mean()) if ln.size else float("nan"))
    return out


# ---------------------------------------------------------------------- main
def simulate_run(cfg: SimConfig | None = None, **kwargs) -> SimRun:
    """Simulate one atom-probe run of a rod framework.

    Parameters
    ----------
    cfg : SimConfig, optional
        The configuration; keyword arguments override its fields (or build one).

    Returns
    -------
    SimRun
        Ions, true lattice and the truth (JSON-able ``truth`` plus per-rod and per-ion arrays).

    Examples
    --------
    >>> run = simulate_run(pattern="long-block", depth_nm=10, top_radius_nm=4, seed=3)
    >>> run.ions.n_ions > 1000
    True
    """
    if cfg is None:
        cfg = SimConfig(**kwargs)
    elif kwargs:
        cfg = SimConfig(**{**{f: getattr(cfg, f) for f in cfg.__dataclass_fields__}, **kwargs})
    rng = np.random.default_rng(cfg.seed)
    lat = cfg.lattice if cfg.lattice is not None else Lattice.from_preset(cfg.packing, cfg.a_nm, cfg.repeat_nm,
                                                                              cfg.sites_per_repeat)
    k = len(cfg.metals)
    dist = _draw_distortion(cfg, rng)
    rods = _place_rods(cfg, lat, dist, rng)
    rod_xy, inside, axis, site_zr, n_sites = rods["rod_xy"], rods["inside"], rods["axis"], rods["site_zr"], rods["n_sites"]
    n_rods = rod_xy.shape[0]
    seq = simulate_sequences(cfg, n_rods, n_sites, rng)
    species, lines = _species_lines(cfg)
    r_idx, s_idx, metal, xym, zm, sp_metal = _emit_metal_ions(cfg, rng, seq, inside, axis, site_zr, dist["R"])
    n_metal = r_idx.size
    sp_org, xyo, zo = _emit_organic_ions(cfg, rng, inside, k, dist["tilt"])
    n_org = sp_org.size

    # ---- background, uniform in m/z and space
    n_sig = n_metal + n_org
    n_bg = int(rng.poisson(cfg.background_fraction / (1 - cfg.background_fraction) * n_sig))
    xyb, zb = _uniform_in_needle(rng, n_bg, cfg)

    sp_all = np.concatenate([sp_metal, sp_org])
    mz = _draw_mass_to_charge(cfg, rng, sp_all, lines)
    max_mz = max(float(m.max()) for m, _ in lines) * 1.15
    mzb = rng.uniform(1.0, max_mz, n_bg)

    x = np.concatenate([xym[:, 0], xyo[:, 0], xyb[:, 0]])
    y = np.concatenate([xym[:, 1], xyo[:, 1], xyb[:, 1]])
    z = np.concatenate([zm, zo, zb])
    m = np.concatenate([mz, mzb])
    ion_rod = np.concatenate([r_idx, np.full(n_org + n_bg, -1)])
    ion_site = np.concatenate([s_idx, np.full(n_org + n_bg, -1)])
    ion_metal = np.concatenate([metal, np.full(n_org + n_bg, -1)])
    ion_species = np.concatenate([sp_all, np.full(n_bg, -1)])
    x, y, z, z_true, m, per_ion, (n_metal, n_org, n_bg) = _reconstruct(
        cfg, x, y, z, m, (ion_rod, ion_site, ion_metal, ion_species), (n_metal, n_org, n_bg))
    ions, (ion_rod, ion_site, ion_metal, ion_species) = _evaporate(cfg, rng, x, y, z, m, per_ion, z_true)

    counts = {"ions": int(z.size), "rods": int(n_rods), "metal_sites": int(inside.sum()),
              "metal_ions": int(n_metal), "organic_ions": int(n_org), "background_ions": int(n_bg)}
    geo = _truth_geometry(cfg, rods, dist["tilt"])
    truth = _build_truth(cfg, lat, seq, inside, rods, dist, species, counts, geo)
    seq_out = np.where(inside, seq, -1).astype(np.int64)
    return SimRun(ions=ions, lattice=lat, truth=truth, rod_xy_nm=geo["rod_xy"], rod_tilt=geo["tilt"], seq=seq_out,
                  site_z_nm=geo["site_z"], ion_rod=ion_rod, ion_site=ion_site, ion_metal=ion_metal,
                  ion_species=ion_species, config=cfg, rod_tilt_per_rod=geo["slope"])


def _reconstruct(cfg, x, y, z, m, per_ion, n_per_kind):
    """The reconstruction artefacts on the ions (module docstring, stage 6).

    The edge thinning keeps ions by their ideal positions, then the artefact maps move them. An
    artefact that is off draws and changes nothing.

    Parameters
    ----------
    cfg : SimConfig
    x, y, z : ndarray of float, nm
        Ideal positions of all ions, metal ions first, then linker, then background.
    m : ndarray of float, Da
        Mass-to-charge.
    per_ion : tuple of ndarray
        Per-ion truth arrays, thinned like the ions.
    n_per_kind : tuple of int
        Numbers of metal, linker and background ions.

    Returns
    -------
    tuple
        ``x, y, z`` mapped (nm), the ideal depth of the kept ions (nm), ``m``, ``per_ion`` and the
        numbers of metal, linker and background ions kept.
    """
    if cfg.edge_efficiency != 1.0:
        keep = edge_keep(cfg, x, y, z)
        ends = np.cumsum((0,) + tuple(n_per_kind))
        n_per_kind = tuple(int(keep[a:b].sum()) for a, b in zip(ends[:-1], ends[1:]))
        x, y, z, m = x[keep], y[keep], z[keep], m[keep]
        per_ion = tuple(a[keep] for a in per_ion)
    z_true = z
    x, y, z = map_positions(cfg, x, y, z)
    return x, y, z, z_true, m, per_ion, n_per_kind


def _truth_geometry(cfg, rods, tilt):
    """Site depths and rod axes of the truth after the artefact maps (the ideal ones, as they are,
    when no artefact moves positions).

    Returns a dict of ``site_z`` (n_rods, n_sites), ``rod_xy`` (n_rods, 2), ``slope`` (n_rods, 2),
    ``tilt`` (2,) and ``axis_xy`` ((n_rods, n_sites, 2) mapped axis points, or None).
    """
    rod_xy, site_zr, axis = rods["rod_xy"], rods["site_zr"], rods["axis"]
    if not geometry_on(cfg):
        return {"site_z": site_zr, "rod_xy": rod_xy, "slope": np.tile(tilt, (rod_xy.shape[0], 1)), "tilt": tilt,
                "axis_xy": None}
    ax, ay, site_z = map_positions(cfg, axis[..., 0], axis[..., 1], site_zr)
    axis_xy = np.stack([ax, ay], axis=-1)
    xy0, slope, common = axis_lines(axis_xy, site_z, rods["inside"], tilt)
    return {"site_z": site_z, "rod_xy": xy0, "slope": slope, "tilt": common, "axis_xy": axis_xy}


def _draw_distortion(cfg, rng):
    """Rotation, scale, offset and tilt of the crystal (drawn when not given) and the lattice shift."""
    rot = float(rng.uniform(0, 360) if cfg.rotation_deg is None else cfg.rotation_deg)
    scale = float(rng.uniform(0.96, 1.04) if cfg.scale is None else cfg.scale)
    offset = np.array(rng.uniform(-1.0, 1.0, 2) if cfg.offset_nm is None else cfg.offset_nm, float)
    tilt_deg = float(rng.uniform(0.3, 1.5) if cfg.tilt_deg is None else cfg.tilt_deg)
    tilt_az = float(rng.uniform(0, 360) if cfg.tilt_azimuth_deg is None else cfg.tilt_azimuth_deg)
    shift_frac = rng.random(2)
    th = math.radians(rot)
    R = scale * np.array([[math.cos(th), -math.sin(th)], [math.sin(th), math.cos(th)]])
    # tilt: a rotation of the crystal by tilt_deg about the in-plane axis perpendicular to the
    # azimuth, so that the rod axis e_z goes to (sin t cos az, sin t sin az, cos t); the site planes
    # stay perpendicular to the rods (sites of neighbouring rods are shifted in depth accordingly)
    tr, az = math.radians(tilt_deg), math.radians(tilt_az)
    u = np.array([-math.sin(az), math.cos(az), 0.0])
    K = np.array([[0, -u[2], u[1]], [u[2], 0, -u[0]], [-u[1], u[0], 0]])
    Rt = np.eye(3) + math.sin(tr) * K + (1 - math.cos(tr)) * (K @ K)
    d_tilted = Rt[:, 2]
    tilt = (R @ d_tilted[:2]) / d_tilted[2]  # (dx/dz, dy/dz) in the reconstruction frame
    return {"rot": rot, "scale": scale, "offset": offset, "tilt_deg": tilt_deg, "tilt_az": tilt_az,
            "shift_frac": shift_frac, "R": R, "Rt": Rt, "tilt": tilt, "t": math.tan(tr)}


def _place_rods(cfg, lat, dist, rng):
    """Rods and sites in the reconstruction frame, keeping the rods that pass through the needle.

    Returns a dict of ``rod_xy`` (axis at z = 0), ``inside`` (site mask), ``axis`` (lateral site
    positions), ``site_zr`` (site depths), ``zc`` (sites along the rod), ``n_sites`` and ``phase``.
    """
    pitch = lat.pitch_nm
    offset, Rt, R, tilt = dist["offset"], dist["Rt"], dist["R"], dist["tilt"]
    r_bottom = cfg.top_radius_nm + cfg.depth_nm * math.tan(math.radians(cfg.half_angle_deg))
    reach = (r_bottom + np.abs(offset).max() + abs(dist["t"]) * cfg.depth_nm) / min(dist["scale"], 1.0) + 2 * lat.a_nm
    shift = dist["shift_frac"] @ lat.cell_matrix.T
    rods_cryst = lat.rod_positions(reach, center_nm=-shift) + shift
    n_sites = int(math.floor(cfg.depth_nm / pitch))
    if n_sites < 1:
        raise InputError(f"depth_nm {cfg.depth_nm} is shorter than one site pitch ({pitch:.3g} nm)")
    phase = float(rng.random())
    zc = (np.arange(n_sites) + phase) * pitch  # site positions along the rod, crystal frame

    # site positions in the reconstruction frame: (n_rods, n_sites) depth and (n_rods, n_sites, 2) lateral
    site_zr = Rt[2, 0] * rods_cryst[:, :1] + Rt[2, 1] * rods_cryst[:, 1:2] + Rt[2, 2] * zc[None, :]
    lat_t = (rods_cryst @ Rt[:2, :2].T)[:, None, :] + Rt[None, None, :2, 2] * zc[None, :, None]
    axis = lat_t @ R.T + offset
    rod_xy = axis[:, 0, :] - tilt[None, :] * site_zr[:, :1]  # axis at z = 0

    # which (rod, site) lie inside the needle (radius grows with depth)
    radius_at = cfg.top_radius_nm + site_zr * math.tan(math.radians(cfg.half_angle_deg))
    inside = (np.sqrt((axis ** 2).sum(-1)) < radius_at) & (site_zr >= 0) & (site_zr <= cfg.depth_nm)
    keep_rods = inside.any(1)
    rod_xy, inside, axis, site_zr = rod_xy[keep_rods], inside[keep_rods], axis[keep_rods], site_zr[keep_rods]
    if rod_xy.shape[0] == 0:
        raise InputError(f"no rod passes through the simulated needle (top radius {cfg.top_radius_nm:g} nm, rod spacing "
                         f"{lat.nearest_rod_distance_nm:.3g} nm), so the run would hold no ion; increase --tip-radius "
                         "or reduce --a")
    return {"rod_xy": rod_xy, "inside": inside, "axis": axis, "site_zr": site_zr, "zc": zc,
            "n_sites": n_sites, "phase": phase}


def _evaporate(cfg, rng, x, y, z, m, per_ion, z_true=None):
    """Order the ions by their true depth ``z_true`` (default ``z``) with a little jitter; add pulse
    numbers and a voltage ramp (also by true depth).

    Returns the :class:`IonList` and the arrays of ``per_ion`` in the same order.
    """
    z_true = z if z_true is None else z_true
    order = np.argsort(z_true + rng.normal(0, 0.3, z.size), kind="stable")
    x, y, z, m, z_true = x[order], y[order], z[order], m[order], z_true[order]
    per_ion = tuple(a[order] for a in per_ion)
    pulse = np.cumsum(rng.geometric(0.01, z.size)).astype(np.float64)
    voltage = 3000.0 + 3000.0 * np.clip(z_true / cfg.depth_nm, 0, 1) + rng.normal(0, 5, z.size)
    ions = IonList(x=x, y=y, z=z, mass_to_charge=m, multiplicity=np.ones(z.size), pulse_number=pulse,
                   dc_voltage_v=voltage, meta=IonMeta(source="simulated"))
    return ions, per_ion


def _build_truth(cfg, lat, seq, inside, rods, dist, species, counts, geo):
    """The JSON-able truth of a run: pattern, composition, run lengths, distortion, reconstruction,
    counts and rods (``geo``: the site depths and rod axes of :func:`_truth_geometry`)."""
    k = len(cfg.metals)
    tilt = dist["tilt"]
    f = cfg.composition_array
    lam = cfg.persistence_value
    # along a rod every pattern (copied included: its master chain) has mean run 1/(1 - P_kk)
    # (1/((1-lam)(1-f_k)) for a persistence chain)
    tm = cfg.transmat
    mean_run_model = {el: float(v) for el, v in zip(cfg.metals, mean_run_lengths(tm))}
    site_counts = np.array([(seq[inside] == i).sum() for i in range(k)], float)
    emp_runs = _empirical_mean_runs(seq, inside, k)
    # the realised chain: 1 / (1 - P_kk) from the transition counts of the true sequences (unbiased by
    # runs cut at the rod ends, unlike the mean of observed run lengths)
    a, b = seq[:, :-1], seq[:, 1:]
    both = inside[:, :-1] & inside[:, 1:]
    stay = np.array([np.sum((a == i) & (b == i) & both) for i in range(k)], float)
    leave = np.array([np.sum((a == i) & both) for i in range(k)], float)
    realised_runs = [float(leave[i] / max(leave[i] - stay[i], 1.0)) for i in range(k)]
    return {
        "about": "Synthetic run from probeseq's forward simulator. rods[]: axis x = x0 + dxdz*z, "
                 "y = y0 + dydz*z (reconstruction frame, nm); seq: digit i means metals[i], '.' outside the specimen.",
        "pattern": cfg.pattern,
        "label": "rod-to-rod-copied" if cfg.pattern == "copied" else along_rod_class(tm, f),
        "along_rod": along_rod_class(tm, f),
        "per_metal": {el: c for el, c in zip(cfg.metals, metal_classes(tm, f))},
        "transmat": tm.tolist(),
        "rod_to_rod": "copied" if cfg.pattern == "copied" else "independent",
        "metals": list(cfg.metals),
        "composition": {el: float(f[i]) for i, el in enumerate(cfg.metals)},
        "composition_sites": {el: float(site_counts[i] / site_counts.sum()) for i, el in enumerate(cfg.metals)},
        "persistence": lam,
        "copy_error": cfg.copy_error if cfg.pattern == "copied" else None,
        "mean_run_length": mean_run_model,
        "mean_run_length_sites": {el: emp_runs[i] for i, el in enumerate(cfg.metals)},
        "mean_run_length_realised": {el: realised_runs[i] for i, el in enumerate(cfg.metals)},
        "eta": cfg.eta,
        "pitch_nm": lat.pitch_nm,
        "d_nn_nm": lat.nearest_rod_distance_nm,
        "sigma_xy_nm": cfg.sigma_xy_nm,
        "sigma_z_nm": cfg.sigma_z_nm,
        "distortion": {"rotation_deg": dist["rot"], "scale": dist["scale"], "offset_nm": dist["offset"].tolist(),
                       "tilt_deg": dist["tilt_deg"], "tilt_azimuth_deg": dist["tilt_az"], "tilt_x": float(tilt[0]),
                       "tilt_y": float(tilt[1]), "lattice_shift_frac": dist["shift_frac"].tolist(),
                       "site_phase": rods["phase"]},
        "counts": counts,
        "species": [{"formula": s[0], "charge": s[1], "kind": s[2], "metal": s[3]} for s in species],
        "site_s_nm": [round(float(v), 5) for v in rods["zc"]],
        "reconstruction": reconstruction_truth(cfg),
        "rods": _truth_rods(cfg, seq, inside, rods, geo),
        "config": {k2: (lat.to_dict() if k2 == "lattice" else list(v) if isinstance(v, tuple) else v)
                   for k2, v in ((f, getattr(cfg, f)) for f in cfg.__dataclass_fields__)},
    }


def _truth_rods(cfg, seq, inside, rods, geo) -> list:
    """The truth's ``rods[]``: axis line, site depths (mapped and ideal), axis points with a
    magnification change, and the sequence of the inside sites."""
    rod_xy, slope, site_z, site_ideal = geo["rod_xy"], geo["slope"], geo["site_z"], rods["site_zr"]
    out = []
    for r in range(rod_xy.shape[0]):
        ins = inside[r]
        rod = {"x0": round(float(rod_xy[r, 0]), 5), "y0": round(float(rod_xy[r, 1]), 5),
               "dxdz": round(float(slope[r, 0]), 7), "dydz": round(float(slope[r, 1]), 7),
               "z_nm": [round(float(v), 4) for v in site_z[r, ins]],
               "z_ideal_nm": [round(float(v), 4) for v in site_ideal[r, ins]],
               "seq": "".join(str(int(v)) for v in seq[r, ins])}
        if cfg.magnification_change != 0.0:
            rod["axis_xy_nm"] = [[round(float(a), 4), round(float(b), 4)] for a, b in geo["axis_xy"][r, ins]]
        out.append(rod)
    return out


def metal_classes(transmat, f, long_block_sites: float = LONG_BLOCK_SITES) -> list:
    """The true arrangement of each metal of a chain: ``interspersed`` when it follows itself less
    often than independent sites would (self-persistence < 0), ``random`` when as often, else
    ``long-block`` or ``short-repeat`` by its mean run length (the classifier's per-metal rule)."""
    lam_k = persistence_per_state(transmat, f)
    runs = mean_run_lengths(transmat)
    out = []
    for lk, r in zip(lam_k, runs):
        if abs(lk) < 1e-9:
            out.append("random")
        elif lk < 0:
            out.append("interspersed")
        else:
            out.append("long-block" if r >= long_block_sites else "short-repeat")
    return out


def along_rod_class(transmat, f, long_block_sites: float = LONG_BLOCK_SITES) -> str:
    """The along-rod class of a true chain (for copied rods, that of their master chain): ``random``
    for independent sites, else the class of the least abundant metal, with ``random`` for it read
    as ``short-repeat`` (the sites are not independent, but that metal has no runs of its own)."""
    classes = metal_classes(transmat, f, long_block_sites)
    if all(c == "random" for c in classes):
        return "random"
    c = classes[int(np.argmin(f))]
    return "short-repeat" if c == "random" else c
