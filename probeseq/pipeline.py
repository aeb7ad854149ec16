"""The whole analysis, stage by stage: ranging -> columns -> decoding -> statistics -> classification.

:func:`analyze` runs the stages in order on an ion list and returns an :class:`AnalysisResult`;
:func:`write_analysis` writes its output folder (``results.json``, ``tracks.csv``, ``runs.csv`` and
the intermediate files). Each stage is a pure library call; this module only joins them, times
them and reports progress through an optional callback.

The stages are public so the stage commands run exactly what ``analyze`` runs:
:func:`range_file` (ranging on the run's sample), :func:`count_file` / :func:`count_ions`
(ranging, registration and the fused counting pass, giving a :class:`CountResult`) and
:func:`decode_stage` (the rod model, and groups of rods when single rods are not resolvable).
"""

from __future__ import annotations

import json
import sys
import threading
import time
import warnings
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import TYPE_CHECKING, Callable, Optional

import numpy as np

from . import runtime
from ._version import __version__
from .data import RodColumns
from .exceptions import DataQualityWarning, InputError
from .ions import IonList, check_position_extent
from .lattice import Lattice

if TYPE_CHECKING:  # type names only: these modules are heavy to import
    from .classify import Classification
    from .decode import DecodeResult
    from .groups import GroupResult
    from .ranging import RangingResult
    from .stats import RunStatistics

__all__ = ["AnalysisOptions", "AnalysisResult", "analyze", "analyze_file", "write_analysis", "RESULTS_SCHEMA_VERSION",
           "CountResult", "count_ions", "count_file", "range_file", "range_sample", "decode_stage",
           "write_density_figure",
           "DecodedTracks", "save_decoded", "load_decoded", "read_replicates", "load_results",
           "TRACKS_COLUMNS", "RUNS_COLUMNS"]

#: version of the results.json layout; bumped when a key changes meaning or moves
RESULTS_SCHEMA_VERSION = 1
TRACKS_COLUMNS = ("rod", "rod_x_nm", "rod_y_nm", "site", "z_nm", "state", "posterior")
#: largest accepted --n-boot and --n-starts (each resample or start costs a pass over every rod)
MAX_BOOT = 100_000
RUNS_COLUMNS = ("rod", "first_site", "last_site", "length_sites", "length_nm", "z_start_nm", "z_end_nm",
                "metal", "mean_posterior")

Progress = Optional[Callable[[str, str], None]]
TRACKS_FORMATS = {"rod": "%d", "rod_x_nm": "%.4f", "rod_y_nm": "%.4f", "site": "%d", "z_nm": "%.4f",
                  "posterior": "%.4f"}
RUNS_FORMATS = {"length_nm": "%.4f", "z_start_nm": "%.4f", "z_end_nm": "%.4f", "mean_posterior": "%.4f"}


def tracks_table(columns: RodColumns, decoded, select=None, rods: slice | None = None) -> dict:
    """One row per decoded site (the columns of ``tracks.csv``) as 1-D arrays.

    Parameters
    ----------
    columns : RodColumns
    decoded : DecodeResult or DecodedTracks
    select : (n_rods, n_sites) ndarray of bool, optional
        Sites to include (default: every used site, ``columns.mask``).
    rods : slice, optional
        Only these rods (a block of the table; see :func:`write_tracks`).
    """
    sel = columns.mask if select is None else select
    if rods is None:
        r, s = np.nonzero(sel)
    else:
        r, s = np.nonzero(sel[rods])
        r += rods.indices(sel.shape[0])[0]
    z = columns.site_z_nm[s] + columns.site_z_offset_nm[r]
    xy = columns.rod_xy_nm[r] + columns.tilt[None, :] * (z - columns.z_ref_nm)[:, None]
    state = decoded.viterbi[r, s]
    return {"rod": r, "rod_x_nm": xy[:, 0], "rod_y_nm": xy[:, 1], "site": s, "z_nm": z,
            "state": np.asarray(columns.metals, dtype=object)[state], "posterior": decoded.posteriors[r, s, state]}


def runs_table(columns: RodColumns, decoded) -> dict:
    """Runs of equal metal along each rod's Viterbi path (the columns of ``runs.csv``)."""
    runs = decoded.runs
    first, last = np.asarray(runs["first_site"], int), np.asarray(runs["last_site"], int)
    length = np.asarray(runs["length"], int)
    rod = np.asarray(runs["rod"], int)
    off = columns.site_z_offset_nm[rod]
    return {"rod": rod, "first_site": first, "last_site": last,
            "length_sites": length, "length_nm": length * columns.pitch_nm,
            "z_start_nm": columns.site_z_nm[first] + off, "z_end_nm": columns.site_z_nm[last] + off,
            "metal": np.asarray(columns.metals, dtype=object)[np.asarray(runs["metal"], int)],
            "mean_posterior": np.asarray(runs["mean_posterior"], float)}


@dataclass(frozen=True)
class AnalysisOptions:
    """Every setting of an analysis (recorded in the provenance).

    Attributes
    ----------
    seed : int
        Seed of every random choice (EM starts, bootstraps, nulls), in [0, 2**63); the same seed
        gives the same results.
    n_starts : int
        EM starts of the decoder, 1 to :data:`probeseq.decode.MAX_STARTS`.
    n_boot : int
        Bootstrap resamples over rods, 20 to :data:`MAX_BOOT`.
    long_block_sites : float, sites
        Mean run length of the least abundant metal at or above which runs are long blocks (> 1).
    alpha : float
        Significance level of the tests, in (0, 0.5].
    copy_threshold : float
        Neighbouring-rod correlation at or above which (when significant) rods count as copied,
        in (0, 1).
    rotation_deg, scale, offset_nm
        Registration overrides (None = fit): degrees, reconstruction / crystal length (in
        [0.2, 5], see :data:`probeseq.validate.SCALE_RANGE`), nm.
    uncertain_below : float
        Sites whose best posterior is below this are flagged uncertain.
    """

    seed: int = 0
    n_starts: int = 4
    n_boot: int = 200
    long_block_sites: float = 8.0
    alpha: float = 0.01
    copy_threshold: float = 0.3
    rotation_deg: Optional[float] = None
    scale: Optional[float] = None
    offset_nm: Optional[tuple] = None
    uncertain_below: float = 0.8
    species: Optional[tuple] = None

    def __post_init__(self):
        from .validate import check_number, check_scale, check_seed

        check_seed(self.seed)
        if self.seed is not None and not isinstance(self.seed, (int, np.integer)):
            raise InputError(f"--seed must be an integer from 0 to 2**63 - 1, got {type(self.seed).__name__}")
        from .decode import MAX_STARTS  # here: the decoder's module is heavy to import

        check_number(self.n_starts, "--n-starts", 1, MAX_STARTS, integer=True)
        check_number(self.n_boot, "--n-boot", 20, MAX_BOOT, integer=True)
        check_number(self.long_block_sites, "--long-block-sites", 1, lo_open=True)
        check_number(self.alpha, "--alpha", 0, 0.5, lo_open=True)
        check_number(self.copy_threshold, "--copy-threshold", 0, 1, lo_open=True, hi_open=True)
        check_number(self.uncertain_below, "--uncertain-below", 0.5, 1)
        check_number(self.rotation_deg, "--rotation-deg", -360, 360, allow_none=True)
        check_scale(self.scale)
        if self.offset_nm is not None:
            off = tuple(self.offset_nm) if isinstance(self.offset_nm, (tuple, list, np.ndarray)) else (self.offset_nm,)
            if len(off) != 2:
                raise InputError(f"--offset-nm takes two numbers 'x,y' in nm, got {len(off)}")
            for v in off:
                check_number(v, "--offset-nm")

    def to_dict(self) -> dict:
        return {k: (list(v) if isinstance(v, tuple) else v) for k, v in self.__dict__.items()}


@dataclass(frozen=True)
class AnalysisResult:
    """Everything :func:`analyze` found, stage by stage.

    Attributes
    ----------
    metals : tuple of str
        Metal symbols, in channel order.
    lattice : Lattice
    options : AnalysisOptions
    ions_summary : dict
        The ``ions`` section of ``results.json`` (rows, extents in nm, mass-to-charge range in Da).
    ranging : RangingResult
        The ranged mass spectrum.
    n_metal_ions : int
        Ions of the run in a range holding a metal.
    columns : RodColumns
        Counts (n_rods, n_sites, n_metals) with their geometry.
    decoded : DecodeResult
        Fitted rod model, Viterbi paths (n_rods, n_sites) and posteriors (n_rods, n_sites, n_metals).
    groups : GroupResult or None
        The groups-of-rods analysis when single rods are not resolvable, else None.
    statistics : RunStatistics
    classification : Classification
    timings_s : dict of str -> float
        Wall time of each stage, s.
    warnings : tuple of str
    provenance : dict
        Tool, version, options, inputs and seed (the ``provenance`` section of ``results.json``).
    figure_ions : IonList or None
        Ions kept for the figures, if any.
    """

    metals: tuple
    lattice: Lattice
    options: AnalysisOptions
    ions_summary: dict
    ranging: RangingResult
    n_metal_ions: int
    columns: RodColumns
    decoded: DecodeResult
    groups: Optional[GroupResult]
    statistics: RunStatistics
    classification: Classification
    timings_s: dict
    warnings: tuple
    provenance: dict = field(default_factory=dict)
    figure_ions: Optional[IonList] = field(default=None, repr=False, compare=False)

    # ------------------------------------------------------------------ tables
    def tracks_table(self) -> dict:
        """One row per decoded (unmasked) site: the columns of ``tracks.csv`` as 1-D arrays."""
        return tracks_table(self.columns, self.decoded)

    def runs_table(self) -> dict:
        """Runs of equal metal along each rod's Viterbi path (``runs.csv``)."""
        return runs_table(self.columns, self.decoded)

    # ------------------------------------------------------------------ results.json
    def to_dict(self) -> dict:
        """The ``results.json`` layout (schema version :data:`RESULTS_SCHEMA_VERSION`)."""
        st = self.statistics.to_dict()
        cls = self.classification.to_dict()
        rd = self.ranging.to_dict()
        rcomp = rd.get("composition", {})
        # composition: the spectrum's (background-subtracted, overlaps deconvolved, all metal ions);
        # the rod model's site occupancy is kept beside it (statistics.composition)
        comp, comp_iv = {}, {}
        for m in self.metals:
            c = rcomp.get(m) or {}
            f, sd = c.get("fraction"), c.get("fraction_err")
            if f is None:
                f = st["composition"][m]
                comp_iv[m] = st["intervals"].get(f"composition.{m}")
            else:
                comp_iv[m] = {"estimate": f, "low": f - 1.96 * (sd or 0.0), "high": f + 1.96 * (sd or 0.0)}
            comp[m] = f
        col = self.columns
        dec = self.decoded.to_dict()
        return {
            "schema_version": RESULTS_SCHEMA_VERSION,
            "provenance": self.provenance,
            "classification": cls,
            "composition": comp,
            "composition_interval": comp_iv,
            "composition_source": "mass spectrum: atomic fractions of metal atoms, background subtracted, "
                                  "overlaps deconvolved (95 % interval from counting and background errors)",
            "composition_sites_model": {m: st["composition"][m] for m in self.metals},
            "statistics": st,
            "columns": {"n_rods": int(col.n_rods), "n_sites": int(col.n_sites),
                        "n_sites_used": int(col.mask.sum()), "pitch_nm": col.pitch_nm,
                        "resolvable": bool(col.resolvable), "crosstalk": float(col.crosstalk),
                        "n_metal_ions": int(self.n_metal_ions),
                        "metal_atoms_in_rods": float(col.counts.sum()),
                        "registration": col.params},
            "decoding": dec,
            "groups": None if self.groups is None else self.groups.to_dict(),
            "ranging": self.ranging.to_dict(),
            "ions": self.ions_summary,
            "warnings": list(self.warnings),
            "timings_s": self.timings_s,
        }


class _Clock:
    def __init__(self, progress: Progress):
        self.t0 = time.perf_counter()
        self.timings = {}
        self.progress = progress

    def stage(self, name: str, message: str):
        if self.progress is not None:
            self.progress(name, message)
        return _Timed(self, name)


class _Timed:
    def __init__(self, clock, name):
        self.clock, self.name = clock, name

    def __enter__(self):
        self.t = time.perf_counter()
        return self

    def __exit__(self, *exc):
        self.clock.timings[self.name] = round(time.perf_counter() - self.t, 4)
        return False


def analyze(ions: IonList, metals, lattice: Lattice, *, ranges=None, options: AnalysisOptions | None = None,
            progress: Progress = None, provenance: dict | None = None) -> AnalysisResult:
    """Run the whole pipeline on an ion list held in memory.

    Parameters
    ----------
    ions : IonList
    metals : sequence of str
        Metal symbols, in channel order.
    lattice : Lattice
    ranges : RangeSet, optional
        Ranges to use (e.g. an edited file) instead of automatic ranging.
    options : AnalysisOptions, optional
    progress : callable(stage, message), optional
        Called as each stage starts.
    provenance : dict, optional
        Recorded in the results (command line, input checksum...).

    Returns
    -------
    AnalysisResult

    Notes
    -----
    The stages are :func:`count_ions` (ranging and registration fitted on a bounded sample of
    :data:`SAMPLE_IONS` ions taken as :data:`SAMPLE_BLOCKS` contiguous blocks spread evenly over
    the run, then one fused pass of :mod:`probeseq.counting` that ranges, draws, assigns and
    counts every ion), :func:`decode_stage`, then statistics and classification. This is the
    same procedure as :func:`analyze_file`, so both give the same count array for the same ions.

    See Also
    --------
    analyze_file : the same from a file, streamed in chunks.
    """
    opts = options or AnalysisOptions()
    metals = _check_metals(metals)
    _check_ions(ions)
    runtime.preload()
    return _analyze_ions(ions, metals, lattice, opts, ranges, progress, provenance, SAMPLE_IONS)


def _analyze_ions(ions, metals, lattice, opts, ranges, progress, provenance, sample_ions) -> AnalysisResult:
    """:func:`analyze` with checked arguments and a given sample size."""

    def counts_stage(clock):
        return _count_ions(ions, metals, lattice, opts, ranges, clock, sample_ions)

    return _run(counts_stage, metals, lattice, opts, progress, provenance, ions.meta)


def _check_ions(ions):
    if not isinstance(ions, IonList) or len(ions) == 0:
        raise InputError("no ions to analyse")


@dataclass(frozen=True)
class CountResult:
    """The count stage of one run (:func:`count_file`, :func:`count_ions`): ranging, registration
    and the count array, exactly as :func:`analyze_file` makes them.

    Attributes
    ----------
    ranging : RangingResult
        The ranged mass spectrum (fitted on at most :data:`RANGING_IONS` ions of the sample).
    columns : RodColumns
        Counts (n_rods, n_sites, n_metals), whole ions per site, with their geometry;
        ``params["detection_balance"]`` holds the per-metal thinning factors of the pass.
    n_metal_ions : int
        Ions of the whole run that fall in a range holding a metal.
    sample : IonList
        The bounded sample (``sample_ions`` ions at most, in :data:`SAMPLE_BLOCKS` depth blocks)
        on which the spectrum was ranged and the lattice registered; positions in nm.
    ions_summary : dict
        Rows, extents (nm), mass-to-charge range (Da), dropped rows and sample size (the ``ions``
        section of ``results.json``). For a streamed file ``sha256`` is None (:func:`analyze_file`
        computes the checksum alongside the later stages).
    timings_s : dict
        Wall time of each stage, s.
    ions : IonList or None
        The whole ion list when it was held in memory (text files, :func:`count_ions`), else None.

    Notes
    -----
    Unpacks as ``ranging, columns, n_metal_ions = count_file(...)``.
    """

    ranging: RangingResult
    columns: RodColumns
    n_metal_ions: int
    sample: IonList = field(repr=False)
    ions_summary: dict
    timings_s: dict
    ions: Optional[IonList] = field(default=None, repr=False)

    @property
    def figure_ions(self) -> IonList:
        """The ions the figures draw: the whole list when held in memory, else the sample."""
        return self.sample if self.ions is None else self.ions

    def __iter__(self):
        return iter((self.ranging, self.columns, self.n_metal_ions))


def count_ions(ions: IonList, metals, lattice: Lattice, *, ranges=None, options: AnalysisOptions | None = None,
               progress: Progress = None) -> CountResult:
    """Range, register and count an ion list held in memory: the count stage of :func:`analyze`.

    Parameters
    ----------
    ions : IonList
        Positions in nm, mass-to-charge in Da.
    metals : sequence of str
        Metal symbols, in channel order.
    lattice : Lattice
    ranges : RangeSet, optional
        Ranges to use instead of automatic ranging.
    options : AnalysisOptions, optional
        Uses ``seed`` (registration, column plan and the per-ion metal draws), ``species`` and the
        registration overrides ``rotation_deg``, ``scale``, ``offset_nm``.
    progress : callable(stage, message), optional

    Returns
    -------
    CountResult
        Equal (count array, ranging, registration) to what :func:`analyze` with the same
        arguments records.
    """
    opts = options or AnalysisOptions()
    metals = _check_metals(metals)
    _check_ions(ions)
    runtime.preload()
    return _count_ions(ions, metals, lattice, opts, ranges, _Clock(progress), SAMPLE_IONS)


def _count_ions(ions, metals, lattice, opts, ranges, clock, sample_ions) -> CountResult:
    """The count stage on an ion list in memory: sample, fits, then the fused pass over every ion."""
    n = len(ions)
    with clock.stage("sampling", f"taking a sample of {min(n, sample_ions)} of {n} ions in "
                                 f"{SAMPLE_BLOCKS} depth blocks"):
        sample = _memory_sample(ions, sample_ions)
    x, y, z = _same_float(ions.x, ions.y, ions.z)
    m = ions.mass_to_charge
    bounds = [(s, min(n, s + PASS_CHUNK)) for s in range(0, n, PASS_CHUNK)]

    def blocks():
        return ((s, x[s:e], y[s:e], z[s:e], m[s:e]) for s, e in bounds)

    rr, cols, n_metal, _, _ = _fit_and_count(sample, metals, lattice, opts, ranges, clock, blocks, 1.0,
                                             message=f"ranging, drawing and binning all {n} ions in one pass")
    summary = ions.summary()
    summary["sampled_ions"] = int(len(sample))
    return CountResult(ranging=rr, columns=cols, n_metal_ions=n_metal, sample=sample, ions_summary=summary,
                       timings_s=clock.timings, ions=ions)


def _memory_sample(ions: IonList, sample_ions: int) -> IonList:
    """The sample blocks of an ion list in memory (the rows :func:`probeseq.io.read_ion_sample`
    reads from a file)."""
    return ions.subset(_block_index(len(ions), SAMPLE_BLOCKS, _block_rows(sample_ions)))


#: ions of the bounded sample on which ranging and registration are fitted (both paths)
SAMPLE_IONS = 1_500_000
#: contiguous blocks, spread evenly over the run, that make up the sample
SAMPLE_BLOCKS = 256
#: sampled ions (an even stride over the sample) on which the mass spectrum is ranged; the
#: registration uses every sampled metal ion. The whole sample: the spectrum's composition has a
#: counting error of about 0.001 from 1.5e6 ions (0.002 from 4e5), for about 0.1 s more
RANGING_IONS = 1_500_000
#: ions per block of the fused pass (four float32 columns of 4 MiB each)
PASS_CHUNK = 1 << 20


def _block_rows(sample_ions: int) -> int:
    return max(1, -(-int(sample_ions) // SAMPLE_BLOCKS))


def _block_index(n: int, n_blocks: int, block_rows: int) -> np.ndarray:
    """Row indices of the sample blocks (see :func:`probeseq.io.sample_blocks`)."""
    from .io import sample_blocks

    starts = sample_blocks(n, n_blocks, block_rows)
    if starts.size == 1 and n <= n_blocks * block_rows:
        return np.arange(n)
    return (starts[:, None] + np.arange(block_rows)[None, :]).ravel()


def _same_float(x, y, z):
    """x, y, z in one float type (float32 when all are float32, else float64) for the fused pass."""
    if x.dtype == y.dtype == z.dtype and x.dtype in (np.float32, np.float64):
        return x, y, z
    dt = np.float32 if all(a.dtype == np.float32 for a in (x, y, z)) else np.float64
    return x.astype(dt), y.astype(dt), z.astype(dt)


def _fit_and_count(sample, metals, lattice, opts, ranges, clock, blocks, factor, *, strict: bool = False,
                   where: str = "", message: str = ""):
    """Fits on the sample, then the pass over ``blocks()``; returns (rr, cols, n_metal, tally, ext)."""
    rr, thin, geom = _fit_on_sample(sample, metals, lattice, opts, ranges, clock)
    with clock.stage("binning", message):
        plan = _start_pass(rr, metals, thin, geom, opts.seed)
        counts, tally, ext = _run_pass(plan, None, factor, strict, blocks, where=where)
        cols, n_metal = _finish_pass(geom, counts, metals, tally, thin)
    return rr, cols, n_metal, tally, ext


def _fit_on_sample(sample: IonList, metals, lattice, opts, ranges, clock):
    """Ranging, detection balance, registration and column plan, all on the bounded sample."""
    from .columns import plan_columns
    from .ranging import assign_channels
    from .registration import register_lattice

    m = sample.mass_to_charge
    stride = _ranging_stride(m.size)
    with runtime.single_threaded_blas():
        with clock.stage("ranging", f"ranging the mass spectrum of {m[::stride].size} sampled ions"):
            rr = range_sample(sample, metals, species=opts.species, ranges=ranges)
            ca = assign_channels(m, rr.ranges, metals)
            # the ranged ions' channels: a stride of the sample's (assignment is per ion)
            ca_fit = ca if stride == 1 else replace(ca, range_index=ca.range_index[::stride],
                                                    channel=ca.channel[::stride])
            thin = detection_balance(rr, ca_fit)
            sel = (ca.metal_weights.sum(1) > 0)[ca.range_index]  # in a range holding a metal
        if not sel.any():
            raise InputError(f"no ions fall in ranges of the metals {', '.join(metals)}")
        with clock.stage("columns", f"registering the rod lattice on {int(sel.sum())} sampled metal ions"):
            x, y, z = sample.x[sel], sample.y[sel], sample.z[sel]
            reg = register_lattice(x, y, z, lattice, rotation_deg=opts.rotation_deg, scale=opts.scale,
                                   offset_nm=opts.offset_nm, random_state=opts.seed)
            geom = plan_columns(x, y, z, reg, random_state=opts.seed)
    return rr, thin, geom


def _ranging_stride(n: int) -> int:
    """Stride over the sample's ions that leaves at most :data:`RANGING_IONS` to range."""
    return max(1, -(-int(n) // RANGING_IONS))


def range_sample(sample: IonList, metals, *, species=None, ranges=None):
    """Range the mass spectrum of a sample as the count stage does.

    Parameters
    ----------
    sample : IonList
        The sample of a run (:attr:`CountResult.sample`, :func:`range_file`); an even stride of at
        most :data:`RANGING_IONS` of its ions is ranged.
    metals : sequence of str
        Metal symbols, in channel order.
    species : sequence of str, optional
        Framework ions to predict instead of the defaults (``AnalysisOptions.species``).
    ranges : RangeSet, optional
        Ranges to use instead of automatic ranging (their shares and composition are still fitted).

    Returns
    -------
    RangingResult
    """
    from .ranging import auto_range

    m = sample.mass_to_charge
    return auto_range(m[::_ranging_stride(m.size)], tuple(metals), species=species, ranges=ranges)


def _start_pass(rr, metals, thin, geom, seed):
    from .counting import make_count_plan

    return make_count_plan(rr.ranges, metals, thin, geom, seed)


def _run_pass(plan, counts, factor, strict, blocks, where="", threads=None):
    """Feed the ``(row0, x, y, z, m)`` blocks of ``blocks()`` through the fused kernel; returns
    (counts, tally, extents).

    ``counts`` None: a float32 count array is made meanwhile (see
    :class:`probeseq.counting.CountPass`); should a bin reach 2**24 ions, where float32 stops
    counting exactly, the pass is run again (``blocks()`` called again) into a float64 array.
    With ``strict`` it stops with an :class:`InputError` at the first block holding an invalid row.
    """
    from .counting import FLOAT32_LIMIT, CountPass

    if threads is None:
        threads = runtime.pass_threads()  # None: the pass's own default
    with CountPass(plan, counts, threads=threads, factor=factor, strict=strict) as cp:
        for row0, x, y, z, m in blocks():
            cp.add(row0, x, y, z, m)
            if strict and cp.first_bad_row >= 0:
                raise InputError(f"{where or 'ion list'}: data row {cp.first_bad_row + 1} holds NaN or infinite "
                                 f"values or a non-positive mass_to_charge (--strict)")
        tally, ext = cp.result()
        if not cp.saturated:
            return cp.counts, tally, ext
        if counts is not None:
            raise InputError(f"a float32 count reached {FLOAT32_LIMIT:.0f} and is no longer exact: "
                             "pass a float64 count array")
    warnings.warn(f"{where or 'ion list'}: a rod site holds {FLOAT32_LIMIT:.0f} or more ions (is the lattice on "
                  f"the data's scale?); counting again in float64", DataQualityWarning, stacklevel=3)
    return _run_pass(plan, plan.new_counts(np.float64), factor, strict, blocks, where, threads)


def _finish_pass(geom, counts, metals, tally, thin):
    from .columns import columns_from_counts
    from .counting import tally_dict

    t = tally_dict(tally)
    n_metal = t["n_metal"]
    if n_metal == 0:
        raise InputError(f"no ions fall in ranges of the metals {', '.join(metals)}")
    stats = {"n_ions": n_metal, "n_binned": t["n_binned"], "n_beyond_cutoff": t["n_beyond_cutoff"],
             "n_unused_rod": t["n_unused_rod"], "n_outside_depth": t["n_outside_depth"]}
    balance = {m: float(v) for m, v in zip(metals, thin)}
    cols = columns_from_counts(geom, counts, metals, stats, extra_params={"detection_balance": balance})
    return cols, n_metal


def realise_channels(weights, rng) -> np.ndarray:
    """Draw each ion's metal from its channel weights: (n, K) float -> (n,) int (-1 = not a metal).

    Ions in ranges shared between species carry fractional metal weights (an ion in a range shared
    by 64Zn2+ and O2+ is a Zn ion with probability w). The rod model counts whole ions per site, so
    each ion is given one identity drawn with these probabilities: the expected counts equal the
    weights, and every site holds whole ions, as the emission model assumes.

    Parameters
    ----------
    weights : (n, K) array of float
    rng : numpy.random.Generator or (n,) array of float
        Source of the uniform numbers, or the numbers themselves (in [0, 1); the fused pass uses
        :func:`probeseq.counting.ion_uniforms`). Ion i is metal k for the first k whose
        cumulative weight exceeds its number.
    """
    w = np.asarray(weights, dtype=np.float64)
    if w.ndim != 2:
        raise InputError(f"weights must be (n_ions, n_metals), got shape {w.shape}")
    cum = np.cumsum(np.minimum(w, 1.0), axis=1)
    if isinstance(rng, np.random.Generator):
        u = rng.random(w.shape[0])
    else:
        u = np.asarray(rng, dtype=np.float64)
        if u.shape != (w.shape[0],):
            raise InputError(f"uniform numbers have shape {u.shape}, expected ({w.shape[0]},)")
    k = (u[:, None] >= cum).sum(1)
    return np.where(k < w.shape[1], k, -1)


def draw_metal_ions(assignment, thin, rng=None, *, seed=None, start: int = 0) -> np.ndarray:
    """Metal of each ion (-1 = none) drawn from its channel weights thinned by ``thin`` (per metal).

    With ``seed`` the draws are those of the fused pass: ion ``start + i`` uses
    ``ion_uniforms(seed, start, n)[i]``, whatever the chunking (the reference of the compiled
    kernel); otherwise ``rng`` (a numpy Generator) supplies them.
    """
    n = assignment.range_index.shape[0]
    if seed is not None:
        from .counting import ion_uniforms

        rng = ion_uniforms(seed, start, n)
    elif rng is None:
        raise InputError("draw_metal_ions: give rng or seed")
    return realise_channels(assignment.weights() * np.asarray(thin)[None, :], rng)


def detection_balance(ranging, assignment) -> np.ndarray:
    """Per-metal thinning factors that equalise how well each metal's own ions are seen in the rods.

    An ion in a range shared with another species carries the range's share ``s`` of a metal, so a
    true ion there counts ``s`` of itself and the rest of the range's ions add diffuse weight. The
    share of metal k's ions that is seen as its own is ``rho_k = sum_j N_j s_jk^2 / n_k`` (N_j ions
    in range j; n_k the metal's fitted ions over all its peaks, tails included). When it differs
    between metals (Fe2+ under CO+, for example), the rod model, which has one detection efficiency
    for all metals, would read the difference as composition. Returns ``min(rho) / rho_k`` (<= 1):
    every metal is thinned to the least well seen one.
    """
    w = np.asarray(assignment.metal_weights, float)  # (n_ranges + 1, K), last row unranged
    n_range = np.bincount(assignment.range_index + 1, minlength=w.shape[0] + 1)
    counts = np.concatenate([n_range[1:w.shape[0]], n_range[:1]])  # ranges 0.., then unranged
    own = (counts[:, None] * w ** 2).sum(0)
    n_k = np.asarray(ranging.amounts, float) @ np.asarray(ranging.species_metal_atoms, float)
    with np.errstate(divide="ignore", invalid="ignore"):
        rho = np.where(n_k > 0, own / n_k, np.nan)
    if not np.isfinite(rho).all() or (rho <= 0).any():
        return np.ones(w.shape[1])
    return np.minimum(1.0, rho.min() / rho)


def _check_metals(metals) -> tuple:
    metals = tuple(metals)
    if len(metals) < 2:
        raise InputError(f"--metals needs at least two metals, got {list(metals)}")
    return metals


def decode_stage(columns: RodColumns, options: AnalysisOptions | None = None, *, progress: Progress = None):
    """Fit the rod model to every rod and decode it, and analyse groups of rods when single rods
    are not resolvable: the decoding stage of :func:`analyze` and :func:`analyze_file`.

    Parameters
    ----------
    columns : RodColumns
        Counts (n_rods, n_sites, n_metals) of the count stage (:attr:`CountResult.columns`, or
        read back with :func:`probeseq.data.load_columns`).
    options : AnalysisOptions, optional
        Uses ``n_starts`` (EM starts), ``seed`` and ``uncertain_below``.
    progress : callable(stage, message), optional

    Returns
    -------
    decoded : DecodeResult
        Fitted parameters, Viterbi paths (n_rods, n_sites) and posteriors (n_rods, n_sites,
        n_metals).
    groups : GroupResult or None
        The groups-of-rods analysis when ``columns.resolvable`` is False, else None.
    """
    return _decode_stage(columns, options or AnalysisOptions(), _Clock(progress))


def _decode_stage(cols, opts, clock):
    from .decode import fit_decoder

    with clock.stage("decoding", f"fitting the rod model to {cols.n_rods} rods x {cols.n_sites} sites"):
        dec = fit_decoder(cols, n_starts=opts.n_starts, random_state=opts.seed,
                          uncertain_below=opts.uncertain_below)
    groups = None
    if not cols.resolvable:
        from .groups import analyze_groups

        with clock.stage("groups", "single rods are not resolvable: analysing groups of rods"):
            groups = analyze_groups(cols, random_state=opts.seed)
    return dec, groups


def _run(counts_stage, metals, lattice, opts, progress, provenance, meta) -> AnalysisResult:
    """The stages after the count array, shared by the in-memory and the streamed analysis;
    ``counts_stage(clock)`` returns the :class:`CountResult`."""
    from .classify import classify
    from .stats import compute_statistics

    clock = _Clock(progress)
    with warnings.catch_warnings(record=True) as wlist:
        warnings.simplefilter("always")
        t_counts = time.perf_counter()
        counted = counts_stage(clock)
        clock.timings["to_counts"] = round(time.perf_counter() - t_counts, 4)
        cols = counted.columns
        dec, groups = _decode_stage(cols, opts, clock)
        with clock.stage("statistics", f"statistics with {opts.n_boot} bootstrap resamples over rods"):
            st = compute_statistics(dec, cols, n_boot=opts.n_boot, random_state=opts.seed)
        with clock.stage("classification", "classifying the arrangement"):
            cl = classify(st, dec.lr_pvalue, long_block_sites=opts.long_block_sites, alpha=opts.alpha,
                          copy_threshold=opts.copy_threshold)
        caught = [str(w.message).splitlines()[0] for w in wlist]
    warn = list(dict.fromkeys(caught + list(getattr(dec, "warnings", []))))
    if not cols.resolvable:
        warn.insert(0, f"single rods are not resolvable (expected crosstalk {cols.crosstalk:.2f}); "
                       "per-rod sequences are unreliable, see the groups-of-rods analysis")
    clock.timings["total"] = round(time.perf_counter() - clock.t0, 4)
    prov = {"tool": "probeseq", "version": __version__, "python": sys.version.split()[0],
            "options": opts.to_dict(), "metals": list(metals),
            "lattice": lattice.to_dict(), "lattice_source": lattice.name, "seed": opts.seed,
            "input": {"source": meta.source, "sha256": meta.sha256}}
    prov.update(provenance or {})
    return AnalysisResult(metals=metals, lattice=lattice, options=opts, ions_summary=counted.ions_summary,
                          ranging=counted.ranging, n_metal_ions=counted.n_metal_ions, columns=cols, decoded=dec,
                          groups=groups, statistics=st, classification=cl, timings_s=clock.timings,
                          warnings=tuple(warn), provenance=prov, figure_ions=counted.figure_ions)


#: HDF5 files with at most this many ions are read whole and passed to :func:`analyze`
#: (0: every HDF5 file is streamed; both paths give the same count array)
STREAM_ABOVE_IONS = 0


def _check_pass_sizes(chunk_size, sample_ions):
    if isinstance(chunk_size, bool) or not isinstance(chunk_size, (int, np.integer)) or chunk_size < 1:
        raise InputError(f"chunk_size must be a positive integer, got {chunk_size!r}")
    if isinstance(sample_ions, bool) or not isinstance(sample_ions, (int, np.integer)) or sample_ions < 1000:
        raise InputError(f"sample_ions must be an integer >= 1000, got {sample_ions!r}")


def _read_whole(path, kind, stream_above, position_dataset, mass_dataset) -> bool:
    """Whether an ion file is read whole (text, or HDF5 of at most ``stream_above`` ions) rather
    than streamed."""
    from .io import count_ions as n_rows

    return kind == "text" or bool(stream_above and n_rows(path, position_dataset, mass_dataset) <= stream_above)


def _read_all(path, progress, length_unit, position_dataset, mass_dataset, strict) -> IonList:
    from .io import read_ions

    if progress:
        progress("reading", f"{path}")
    return read_ions(path, length_unit=length_unit, position_dataset=position_dataset,
                     mass_dataset=mass_dataset, strict=strict)


def _whole_ions(path, kind, stream_above, progress, length_unit, position_dataset, mass_dataset,
                strict) -> IonList | None:
    """The whole ion list, checked, when the file is read whole (:func:`_read_whole`); None when
    it is to be streamed."""
    if not _read_whole(path, kind, stream_above, position_dataset, mass_dataset):
        return None
    ions = _read_all(path, progress, length_unit, position_dataset, mass_dataset, strict)
    _check_ions(ions)
    return ions


def count_file(path, metals, lattice: Lattice, *, ranges=None, options: AnalysisOptions | None = None,
               length_unit=None, position_dataset=None, mass_dataset=None, strict: bool = False,
               progress: Progress = None, stream_above: int = STREAM_ABOVE_IONS, chunk_size: int = PASS_CHUNK,
               sample_ions: int = SAMPLE_IONS) -> CountResult:
    """Range, register and count an ion file: the count stage of :func:`analyze_file`.

    Text files (and HDF5 files of at most ``stream_above`` ions) are read whole and counted by
    :func:`count_ions`'s procedure; HDF5 files are streamed (a sample, then one fused pass in
    chunks of ``chunk_size`` ions), exactly as :func:`analyze_file` does.

    Parameters
    ----------
    path : str or Path
        Ion file (.csv, .tsv, .txt, .h5).
    metals : sequence of str
        Metal symbols, in channel order.
    lattice : Lattice
    ranges : RangeSet, optional
        Ranges to use instead of automatic ranging.
    options : AnalysisOptions, optional
        Uses ``seed``, ``species``, ``rotation_deg``, ``scale`` and ``offset_nm``.
    length_unit, position_dataset, mass_dataset, strict
        As for :func:`probeseq.io.read_ions`.
    progress : callable(stage, message), optional
    stream_above, chunk_size, sample_ions : int
        As for :func:`analyze_file`.

    Returns
    -------
    CountResult
        Equal (count array, ranging, registration) to what :func:`analyze_file` with the same
        arguments records.
    """
    from .io import ion_file_kind

    runtime.preload()
    opts = options or AnalysisOptions()
    metals = _check_metals(metals)
    kind = ion_file_kind(path)
    _check_pass_sizes(chunk_size, sample_ions)
    clock = _Clock(progress)
    ions = _whole_ions(path, kind, stream_above, progress, length_unit, position_dataset, mass_dataset, strict)
    if ions is not None:
        return _count_ions(ions, metals, lattice, opts, ranges, clock, sample_ions)
    return _count_stream(path, metals, lattice, opts, ranges, clock, length_unit=length_unit,
                         position_dataset=position_dataset, mass_dataset=mass_dataset, strict=strict,
                         chunk_size=chunk_size, sample_ions=sample_ions)


def range_file(path, metals, *, species=None, ranges=None, length_unit=None, position_dataset=None,
               mass_dataset=None, strict: bool = False, progress: Progress = None,
               stream_above: int = STREAM_ABOVE_IONS, sample_ions: int = SAMPLE_IONS):
    """Range the mass spectrum of an ion file on the sample :func:`count_file` ranges.

    The sample is the one of the count stage (:data:`SAMPLE_BLOCKS` contiguous blocks of at most
    ``sample_ions`` ions in all, spread evenly over the file: the whole file when it is smaller),
    and the spectrum is ranged by :func:`range_sample`, so with the same ``species`` and
    ``ranges`` the result equals :attr:`CountResult.ranging`. An HDF5 file is read only in its
    sample blocks (so ``strict`` checks the sampled rows); a text file is read whole.

    Parameters
    ----------
    path : str or Path
        Ion file (.csv, .tsv, .txt, .h5).
    metals : sequence of str
        Metal symbols, in channel order.
    species : sequence of str, optional
        Framework ions to predict instead of the defaults.
    ranges : RangeSet, optional
        Ranges to use instead of automatic ranging.
    length_unit, position_dataset, mass_dataset, strict
        As for :func:`probeseq.io.read_ions`.
    progress : callable(stage, message), optional
    stream_above, sample_ions : int
        As for :func:`analyze_file`.

    Returns
    -------
    ranging : RangingResult
    sample : IonList
        The sample (positions in nm, mass-to-charge in Da).
    """
    from .io import IonSource, ion_file_kind

    metals = _check_metals(metals)
    kind = ion_file_kind(path)
    _check_pass_sizes(PASS_CHUNK, sample_ions)
    clock = _Clock(progress)
    ions = _whole_ions(path, kind, stream_above, progress, length_unit, position_dataset, mass_dataset, strict)
    if ions is not None:
        n = len(ions)
        with clock.stage("sampling", f"taking a sample of {min(n, sample_ions)} of {n} ions in "
                                     f"{SAMPLE_BLOCKS} depth blocks"):
            sample = _memory_sample(ions, sample_ions)
    else:
        with IonSource(path, length_unit=length_unit, position_dataset=position_dataset,
                       mass_dataset=mass_dataset) as src:
            sample = _stream_sample(src, path, clock, sample_ions, strict)
        if sample.meta.n_dropped:  # the count stage reports the whole file's; ranging sees only the sample
            why = ", ".join(f"{k} {v}" for k, v in sample.meta.dropped.items())
            warnings.warn(f"{path}: dropped {sample.meta.n_dropped} rows of the sample ranged ({why})",
                          DataQualityWarning, stacklevel=2)
    n_fit = sample.mass_to_charge[::_ranging_stride(len(sample))].size
    with runtime.single_threaded_blas():
        with clock.stage("ranging", f"ranging the mass spectrum of {n_fit} sampled ions"):
            rr = range_sample(sample, metals, species=species, ranges=ranges)
    return rr, sample


def _stream_sample(src, path, clock, sample_ions, strict) -> IonList:
    """The sample blocks of an open :class:`probeseq.io.IonSource` (invalid rows dropped)."""
    from .io import read_ion_sample

    n = src.n
    with clock.stage("sampling", f"reading a sample of {min(n, sample_ions)} of {n} ions in "
                                 f"{SAMPLE_BLOCKS} depth blocks"):
        sample, _ = read_ion_sample(src, SAMPLE_BLOCKS, _block_rows(sample_ions), strict=strict)
    if len(sample) == 0:
        raise InputError(f"{path}: no valid ions in the sample (all rows dropped)")
    return sample


def _count_stream(path, metals, lattice, opts, ranges, clock, *, length_unit, position_dataset, mass_dataset,
                  strict, chunk_size, sample_ions, after_pass=None) -> CountResult:
    """The count stage of a streamed HDF5 file: sample, fits, then the fused pass in chunks.

    ``after_pass()`` is called once the count array is finished and the file closed (before the
    dropped rows are reported).
    """
    from .io import IonSource

    with IonSource(path, length_unit=length_unit, position_dataset=position_dataset,
                   mass_dataset=mass_dataset) as src:
        n = src.n
        sample = _stream_sample(src, path, clock, sample_ions, strict)

        def blocks():
            return _file_blocks(src, int(chunk_size))

        rr, cols, n_metal, tally, ext = _fit_and_count(
            sample, metals, lattice, opts, ranges, clock, blocks, src.factor, strict=strict, where=str(path),
            message=f"ranging, drawing and binning all {n} ions in chunks of {chunk_size}")
        # the sample was checked on reading; the rows outside it are checked by their extent
        check_position_extent({"x": (float(ext[0]), float(ext[1])), "y": (float(ext[2]), float(ext[3])),
                               "z": (float(ext[4]), float(ext[5]))}, str(path))
        unit = src.unit
    if after_pass is not None:
        after_pass()
    summary = _stream_summary(path, tally, ext, unit, n, len(sample))
    return CountResult(ranging=rr, columns=cols, n_metal_ions=n_metal, sample=sample, ions_summary=summary,
                       timings_s=clock.timings)


def _stream_summary(path, tally, ext, unit, n_rows, n_sample) -> dict:
    """The ``ions`` section of a streamed file from the pass's tally and extents (``sha256``
    None); warns of dropped rows, and raises when no row was valid."""
    from .counting import tally_dict

    t = tally_dict(tally)
    dropped = {}
    if t["n_nonfinite"]:
        dropped["non-finite"] = t["n_nonfinite"]
    if t["n_nonpositive"]:
        dropped["non-positive mass_to_charge"] = t["n_nonpositive"]
    if dropped:
        why = ", ".join(f"{v} {k}" for k, v in dropped.items())
        warnings.warn(f"{path}: dropped {sum(dropped.values())} rows ({why})", DataQualityWarning, stacklevel=3)
    if t["n_valid"] == 0:
        raise InputError(f"{path}: no valid ions (all {n_rows} rows dropped: {dropped})")
    n_valid = int(tally[1])
    summary = {"n_ions": n_valid, "source": str(path), "sha256": None,
               "length_unit_in_file": unit, "rows_dropped": int(sum(dropped.values())),
               "dropped": dropped, "columns": ["x", "y", "z", "mass_to_charge"]}
    if n_valid:
        summary.update({"x_range_nm": [float(ext[0]), float(ext[1])], "y_range_nm": [float(ext[2]), float(ext[3])],
                        "z_range_nm": [float(ext[4]), float(ext[5])],
                        "mass_to_charge_range_da": [float(ext[6]), float(ext[7])]})
    summary.update({"n_rows": int(n_rows), "sampled_ions": int(n_sample),
                    "sample_blocks": int(SAMPLE_BLOCKS), "streamed": True})
    return summary


def analyze_file(path, metals, lattice: Lattice, *, ranges=None, options: AnalysisOptions | None = None,
                 progress: Progress = None, provenance: dict | None = None, length_unit=None,
                 position_dataset=None, mass_dataset=None, strict: bool = False,
                 stream_above: int = STREAM_ABOVE_IONS, chunk_size: int = PASS_CHUNK,
                 sample_ions: int = SAMPLE_IONS) -> AnalysisResult:
    """Run the whole pipeline on an ion file; HDF5 files are streamed with bounded memory.

    The stages are those of the library: the count stage :func:`count_file` (ranging,
    registration and the fused counting pass), :func:`decode_stage`, then statistics and
    classification. Text files (and HDF5 files of at most ``stream_above`` ions, 0 by default) are
    read whole and analysed as by :func:`analyze` (with a sample of at most ``sample_ions`` ions,
    taken by the same rule as from a streamed file). An HDF5 file is read in two steps, so peak
    memory is the count array plus a sample and two chunks:

    1. a sample of at most ``sample_ions`` ions, read as :data:`SAMPLE_BLOCKS` contiguous blocks
       spread evenly over the file (each a thin depth slice of the whole cross-section), on which
       the spectrum is ranged (:data:`RANGING_IONS` of them) and the lattice registered;
    2. one pass over the file in chunks of at most ``chunk_size`` ions through the fused kernel of
       :class:`probeseq.counting.CountPass` (validity, range lookup, metal draw, rod and site,
       count) on two threads. Plain layouts are read as zero-copy views of the page cache
       (:meth:`probeseq.io.IonSource.mapped`), others through HDF5 with the next chunk read while
       the kernel runs.

    With the default ``sample_ions`` the result equals ``analyze(read_ions(path))`` (the same
    sample, fits and draws) when no row is dropped, whatever ``chunk_size``.

    The file's SHA-256 (provenance) is computed in a lowest-priority thread started once the
    count array is finished, which runs alongside the later stages. ``timings_s.read_to_counts``
    is the wall time from the first read to the finished count array; the checksum is not needed
    for the counts and is waited for at the end (``timings_s.checksum_wait``).
    ``timings_s.startup`` is the library start-up before the clock (imports, numba's runtime).
    """
    from .io import ion_file_kind

    t_start = runtime.preload()
    opts = options or AnalysisOptions()
    metals = _check_metals(metals)
    kind = ion_file_kind(path)
    _check_pass_sizes(chunk_size, sample_ions)
    t0 = time.perf_counter()
    ions = _whole_ions(path, kind, stream_above, progress, length_unit, position_dataset, mass_dataset, strict)
    if ions is not None:
        t_read = time.perf_counter() - t0
        res = _analyze_ions(ions, metals, lattice, opts, ranges, progress, provenance, sample_ions)
        res.timings_s["startup"] = round(t_start, 4)
        res.timings_s["read"] = round(t_read, 4)
        res.timings_s["read_to_counts"] = round(t_read + res.timings_s["to_counts"], 4)
        res.timings_s["total"] = round(time.perf_counter() - t0, 4)
        return res
    res, t_wait = _analyze_stream(path, metals, lattice, opts, ranges, progress, provenance, t0,
                                  dict(length_unit=length_unit, position_dataset=position_dataset,
                                       mass_dataset=mass_dataset, strict=strict, chunk_size=chunk_size,
                                       sample_ions=sample_ions))
    res.timings_s["startup"] = round(t_start, 4)
    res.timings_s["checksum_wait"] = round(t_wait, 4)
    res.timings_s["total"] = round(time.perf_counter() - t0, 4)
    return res


def _analyze_stream(path, metals, lattice, opts, ranges, progress, provenance, t0, read_args):
    """:func:`analyze_file` on a streamed HDF5 file; returns (result, seconds waited for the checksum).

    The checksum thread starts once the count array is finished (``after_pass``): hashing during
    the pass slowed the pass (both read the file through memory maps of the page cache):
    read_to_counts at 1e8 ions had a median of 1.90 s against 1.65 s with the checksum after it,
    in 8 alternating runs each.
    """
    from .io import file_sha256_mapped
    from .ions import IonMeta

    sha = {}
    hasher = threading.Thread(target=runtime.background_checksum, args=(file_sha256_mapped, path, sha), daemon=True,
                              name="probeseq-sha256")

    def counts_stage(clock):
        def after_pass():
            clock.timings["read_to_counts"] = round(time.perf_counter() - t0, 4)
            hasher.start()

        return _count_stream(path, metals, lattice, opts, ranges, clock, after_pass=after_pass, **read_args)

    meta = IonMeta(str(path), "", read_args["length_unit"] or "nm")
    try:
        res = _run(counts_stage, metals, lattice, opts, progress, provenance, meta)
    finally:
        t_wait = time.perf_counter()
        if hasher.ident is not None:
            hasher.join()
        t_wait = time.perf_counter() - t_wait
    if isinstance(sha.get("hex"), BaseException):
        raise sha["hex"]
    res.provenance["input"] = {"source": str(path), "sha256": sha["hex"]}
    return replace(res, ions_summary={**res.ions_summary, "sha256": sha["hex"]}), t_wait


def _file_blocks(src, chunk: int):
    """Yield ``(row0, x, y, z, m)`` blocks of an open IonSource in file order.

    Plain layouts are served as zero-copy views of the page cache (a memory map of each block's
    bytes, unmapped after use); others are read into two alternating buffer sets, the next block
    being read in a thread while the kernel (which releases the GIL) works on the current one.
    """
    from concurrent.futures import ThreadPoolExecutor

    bounds = src.block_bounds(chunk)
    if src.raw:
        for s, e in bounds:
            with src.mapped(s, e) as v:
                if v is None:
                    v = src.read(s, e, src.buffers(e - s))
                yield s, v["x"], v["y"], v["z"], v["mass_to_charge"]
                v = None
        return
    size = max(e - s for s, e in bounds)
    bufs = [src.buffers(size), src.buffers(size)] if len(bounds) > 1 else [src.buffers(size)]
    with ThreadPoolExecutor(max_workers=1) as ex:
        pending = ex.submit(src.read, *bounds[0], bufs[0])
        for i, (s, e) in enumerate(bounds):
            views = pending.result()
            if i + 1 < len(bounds):
                pending = ex.submit(src.read, *bounds[i + 1], bufs[(i + 1) % 2])
            yield s, views["x"], views["y"], views["z"], views["mass_to_charge"]


def write_tracks(path, columns: RodColumns, decoded, rods_per_block: int = 1024):
    """Write ``tracks.csv`` a block of rods at a time (bounded memory, compiled formatting)."""
    from .tables import write_csv

    n = columns.n_rods
    blocks = (tracks_table(columns, decoded, rods=slice(b, min(n, b + rods_per_block)))
              for b in range(0, n, rods_per_block))
    write_csv(path, blocks, TRACKS_COLUMNS, TRACKS_FORMATS)


def _fast_formats(table: dict, columns, fmt: dict) -> bool:
    """Whether the compiled formatter writes this table exactly as printf would: every float
    column has a fixed-point format and the other columns are integers or text."""
    for c in columns:
        kind = np.asarray(table[c][:0] if hasattr(table[c], "dtype") else table[c]).dtype.kind
        f = fmt.get(c)
        if kind == "f" and not (f and f.startswith("%.") and f.endswith("f") and f[2:-1].isdigit()):
            return False
        if kind not in "fiubOU" or (kind in "iub" and f not in (None, "%d")):
            return False
        if kind in "OU" and f not in (None, "%s"):
            return False
    return True


def _write_table(path: Path, table: dict, columns, fmt: dict | None = None, comment: str | None = None):
    """Write columns of equal length as CSV, floats with the given printf formats.

    ``comment`` is written first as one ``# ...`` line (readers that skip comments ignore it).

    Rows are formatted in blocks, so memory stays bounded for tables of tens of millions of rows;
    tables of fixed-point floats, integers and text go through the compiled formatter of
    :mod:`probeseq.tables`.
    """
    fmt = fmt or {}
    if all(isinstance(table[c], np.ndarray) for c in columns) and _fast_formats(table, columns, fmt):
        from .tables import write_csv

        write_csv(path, [table], list(columns), fmt, comment=comment)
        return
    cols = [np.asarray(table[c]) for c in columns]
    row = ",".join(fmt.get(c, "%s") for c in columns) + "\n"
    with open(path, "w", encoding="utf-8", newline="") as fh:
        if comment is not None:
            fh.write(f"# {comment}\n")
        fh.write(",".join(columns) + "\n")
        n = len(cols[0]) if cols else 0
        step = 200_000
        for s0 in range(0, n, step):
            block = [c[s0:s0 + step].tolist() for c in cols]
            fh.write("".join(row % r for r in zip(*block)))


def save_decoded(decoded, path):
    """Viterbi paths, posteriors, mask and uncertainty flags of a decoding (HDF5 ``/decoded``)."""
    import h5py

    with h5py.File(path, "w") as f:
        g = f.create_group("decoded")
        g.attrs["metals"] = json.dumps(list(decoded.metals))
        g.attrs["uncertain_below"] = float(decoded.uncertain_below)
        for name, data, unit in (("viterbi", decoded.viterbi.astype(np.int8, copy=False), "metal index, -1 = masked"),
                                 ("posteriors", decoded.posteriors.astype(np.float32, copy=False), "probability"),
                                 ("mask", np.ascontiguousarray(decoded.mask).view(np.uint8), "1 = site used"),
                                 ("uncertain", np.ascontiguousarray(decoded.uncertain).view(np.uint8), "1 = best posterior below uncertain_below"),
                                 ("stationary", np.asarray(decoded.stationary, float), "probability"),
                                 ("transmat", np.asarray(decoded.transmat, float), "probability")):
            d = g.create_dataset(name, data=data, **({"compression": "gzip", "compression_opts": 1} if data.size > 4096 else {}))
            d.attrs["unit"] = unit


@dataclass(frozen=True)
class DecodedTracks:
    """The per-site part of a decoding, as read back from ``decoded.h5``."""

    metals: tuple
    viterbi: np.ndarray
    posteriors: np.ndarray
    mask: np.ndarray
    uncertain: np.ndarray
    stationary: np.ndarray
    transmat: np.ndarray
    uncertain_below: float


def load_decoded(path) -> DecodedTracks:
    """Read ``decoded.h5`` written by :func:`save_decoded`, checking what it reads.

    Checked: the group and every dataset (type and shape before reading: paths and flags
    (n_rods, n_sites), posteriors (n_rods, n_sites, n_metals), stationary (n_metals,), transmat
    (n_metals, n_metals)), path values in [-1, n_metals), finite posteriors in [0, 1], and
    ``uncertain_below`` in (0, 1].

    Raises
    ------
    InputError
        Missing, truncated or damaged file, or a failed check; the message names the file and
        the dataset or attribute.
    """
    from .validate import h5_array, h5_attr_json, h5_attr_number, h5_group, open_h5

    p = Path(path)
    if not p.is_file():
        raise InputError(f"{p}: not found (the output folder is incomplete or from an older probeseq)")
    with open_h5(p, "decoded file") as f:
        g = h5_group(f, "decoded", p, "not written by probeseq's decoding")
        metals = h5_attr_json(g, "metals", p)
        if not isinstance(metals, list) or len(metals) < 2 or not all(isinstance(m, str) and m for m in metals):
            raise InputError(f"{p}: attribute 'metals' must be a list of at least two metal symbols, got {metals!r:.60}")
        k = len(metals)
        vit = g.get("viterbi")
        shape = getattr(vit, "shape", None)
        if shape is None or len(shape) != 2:
            h5_array(g, "viterbi", p, "iu", shape=(None, None))  # names what is wrong
        rs = (int(shape[0]), int(shape[1]))
        viterbi = h5_array(g, "viterbi", p, "iu", shape=rs)
        posteriors = h5_array(g, "posteriors", p, "f", shape=rs + (k,))
        mask = h5_array(g, "mask", p, "biu", shape=rs).astype(bool)
        uncertain = h5_array(g, "uncertain", p, "biu", shape=rs).astype(bool)
        stationary = h5_array(g, "stationary", p, "f", shape=(k,))
        transmat = h5_array(g, "transmat", p, "f", shape=(k, k))
        below = h5_attr_number(g, "uncertain_below", p, 0, 1, lo_open=True)
    if viterbi.size and (viterbi.min() < -1 or viterbi.max() >= k):
        raise InputError(f"{p}: dataset 'viterbi' holds metal indices outside -1..{k - 1} ({k} metals)")
    if viterbi.size and (viterbi[mask] < 0).any():
        raise InputError(f"{p}: dataset 'viterbi' marks used sites as masked (-1)")
    for name, arr in (("posteriors", posteriors), ("stationary", stationary), ("transmat", transmat)):
        if not (np.isfinite(arr).all() and (arr.size == 0 or (arr.min() >= 0 and arr.max() <= 1 + 1e-6))):
            raise InputError(f"{p}: dataset '{name}' must hold probabilities in [0, 1] (found NaN, infinite or "
                             "out-of-range values)")
    return DecodedTracks(metals=tuple(metals), viterbi=viterbi, posteriors=posteriors, mask=mask,
                         uncertain=uncertain, stationary=stationary, transmat=transmat, uncertain_below=below)


def _write_replicates(stats, path):
    """Bootstrap replicates of every statistic (for ``compare``'s tests of differences)."""
    import h5py

    with h5py.File(path, "w") as f:
        g = f.create_group("replicates")
        g.attrs["n_boot"] = int(stats.n_boot)
        g.attrs["about"] = "bootstrap over rods: one value per resample, same order in every dataset"
        for name, rep in sorted(stats.replicates.items()):
            if rep is None:
                continue
            d = g.create_dataset(name, data=np.asarray(rep, dtype=float))
            d.attrs["estimate"] = float(stats.estimates.get(name, np.nan))


def read_replicates(outdir) -> dict:
    """Bootstrap replicates written by :func:`write_analysis`: name -> (n_boot,) array.

    A folder without ``bootstrap.h5`` gives an empty dict (no difference tests). Every dataset of
    ``/replicates`` must be a 1-D floating-point array, all of one length (the resamples).

    Raises
    ------
    InputError
        Truncated or damaged file, a missing group, or a dataset of another type or shape.
    """
    from .validate import h5_array, h5_group, open_h5

    p = Path(outdir) / "bootstrap.h5"
    if not p.is_file():
        return {}
    out = {}
    with open_h5(p, "bootstrap file") as f:
        g = h5_group(f, "replicates", p, "not written by 'probeseq analyze'")
        for name in g:
            out[name] = h5_array(g, name, p, "fiu", shape=(None,)).astype(float, copy=False)
    sizes = {v.size for v in out.values()}
    if len(sizes) > 1:
        raise InputError(f"{p}: the replicate datasets differ in length ({', '.join(map(str, sorted(sizes)))}); "
                         "each must hold one value per resample")
    return out


def load_results(outdir) -> dict:
    """Read and check ``results.json`` of an ``analyze`` output folder.

    Checked: valid JSON holding an object; the schema version; ``classification`` (``label``
    text, ``confidence`` a number in [0, 1]); ``composition`` (metal -> number or null);
    ``statistics`` with ``intervals`` (name -> null or an object whose ``estimate``, ``low``,
    ``high`` are numbers or null); ``provenance`` (``sample`` an object, ``metals`` a list of
    text, ``run_name`` text, where present).

    Returns
    -------
    dict
        The parsed results.

    Raises
    ------
    InputError
        Names the file and the key that is missing or of the wrong type.
    """
    from .validate import read_json, require

    d = Path(outdir)
    p = d / "results.json"
    if not p.is_file():
        raise InputError(f"{d}: no results.json (not an 'analyze' output folder)")
    res = read_json(p)
    require(res, "schema_version", "integer", str(p), allow_none=True, optional=True)
    v = res.get("schema_version")
    if v != RESULTS_SCHEMA_VERSION or isinstance(v, bool):
        raise InputError(f"{d}: written with results schema version {v}; this probeseq reads version "
                         f"{RESULTS_SCHEMA_VERSION} (re-run 'probeseq analyze')")
    cls = require(res, "classification", dict, str(p))
    where = f"{p} [classification]"
    require(cls, "label", str, where)
    conf = require(cls, "confidence", "number", where)
    if not 0 <= conf <= 1:
        raise InputError(f"{where}: 'confidence' must be a number in [0, 1], got {conf}")
    for key in ("along_rod", "rod_to_rod"):
        require(cls, key, str, where, optional=True)
    comp = require(res, "composition", dict, str(p))
    for m in comp:
        require(comp, m, "number", f"{p} [composition]", allow_none=True)
    st = require(res, "statistics", dict, str(p))
    intervals = require(st, "intervals", dict, f"{p} [statistics]")
    for name in intervals:
        iv = require(intervals, name, dict, f"{p} [statistics.intervals]", allow_none=True)
        for key in () if iv is None else ("estimate", "low", "high"):
            require(iv, key, "number", f"{p} [statistics.intervals.{name}]", optional=True)
    prov = require(res, "provenance", dict, str(p))
    where = f"{p} [provenance]"
    require(prov, "sample", dict, where, optional=True)
    metals = require(prov, "metals", list, where, optional=True)
    if metals is not None and not all(isinstance(m, str) for m in metals):
        raise InputError(f"{where}: 'metals' must be a list of metal symbols, got {metals!r:.60}")
    require(prov, "run_name", str, where, optional=True)
    return res


def write_figures(result: AnalysisResult, folder, progress: Progress = None) -> dict:
    """Save the figures of an analysis in ``folder`` (vector and PNG) and return them by name.

    Files: ``tracks.svg/.pdf/.png`` (rods nearest the centre), ``spectrum.png/.svg``,
    ``density.png``, ``run_lengths.svg/.png``, ``rod_to_rod.svg/.png``, ``groups.svg/.png`` (when
    rods are not resolvable). A figure that cannot be drawn is skipped with a warning.
    """
    from .plotting import plot_group_variance, plot_rod_to_rod, plot_run_lengths, plot_tracks, save_figure

    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    figs = {}

    def attempt(name, make, exts):
        try:
            fig = make()
        except Exception as e:  # a figure must never cost the results
            warnings.warn(f"figure '{name}' not drawn: {e}", DataQualityWarning, stacklevel=2)
            figs[name] = None
            return
        if fig is None:
            return
        for ext in exts:
            save_figure(fig, folder / f"{name}.{ext}")
        figs[name] = fig

    if progress:
        progress("figures", "drawing the figures (tracks, run lengths, rod-to-rod, spectrum, density)")
    attempt("tracks", lambda: plot_tracks(result.columns, result.decoded, size="two-column"), ("svg", "pdf", "png"))
    attempt("run_lengths", lambda: plot_run_lengths(result.statistics), ("svg", "png"))
    if result.statistics.rod_to_rod is not None:
        attempt("rod_to_rod", lambda: plot_rod_to_rod(result.statistics,
                                                     copy_threshold=result.options.copy_threshold), ("svg", "png"))
    if result.groups is not None:
        attempt("groups", lambda: plot_group_variance(result.groups), ("svg", "png"))

    def spectrum():
        from .ranging_plot import plot_ranging

        return plot_ranging(result.ranging, folder / "spectrum")

    attempt("spectrum", spectrum, ())
    if result.figure_ions is not None:
        attempt("density", lambda: write_density_figure(result.figure_ions, result.ranging, result.columns,
                                                        folder / "density.png"), ())
    return figs


def write_density_figure(ions: IonList, ranging, columns: RodColumns, path):
    """Draw the metal-ion density across the rods with the registered lattice (``density.png``).

    Parameters
    ----------
    ions : IonList
        The ions to draw (:attr:`CountResult.figure_ions`); those in ranges holding a metal of
        ``columns.metals`` are drawn, positions in nm.
    ranging : RangingResult
    columns : RodColumns
    path : str or Path
        PNG file to write.

    Returns
    -------
    matplotlib.figure.Figure
    """
    from .columns_plot import plot_rod_density
    from .ranging import assign_channels

    sel = assign_channels(ions.mass_to_charge, ranging.ranges, columns.metals).weights().sum(1) > 0
    return plot_rod_density(ions.x[sel], ions.y[sel], ions.z[sel], columns, path)


def write_analysis(result: AnalysisResult, outdir, force: bool = False, extra: Callable | None = None,
                   report: bool = True, progress: Progress = None, inputs=()) -> Path:
    """Write an analysis output folder (staged: complete or not at all).

    Files: ``results.json``, ``tracks.csv``, ``runs.csv``, ``ranges.toml``, ``columns.h5``,
    ``decoded.h5``, ``bootstrap.h5``, ``probeseq-manifest.json``; with ``report``, ``figures/`` and
    ``report.html``. ``extra`` (called with the staging folder) may add more. ``inputs`` (paths)
    are the analysis's inputs, which the output folder may neither be nor contain; an existing
    folder is replaced only with ``force`` and only when it holds nothing but probeseq's outputs
    (see :mod:`probeseq.outputs`).
    """
    from .outputs import staged_outdir, write_json

    command = result.provenance.get("command_line")
    with staged_outdir(outdir, force=force, inputs=inputs, command=command) as st:
        write_json(st / "results.json", result.to_dict())
        tracks = runtime.Background(write_tracks, st / "tracks.csv", result.columns, result.decoded)
        try:
            _write_rest(result, st, report, progress, extra)
            tracks.join("tracks.csv")
        finally:
            tracks.kill()
    return Path(outdir)


def _write_rest(result, st, report, progress, extra):
    """Everything of an output folder but tracks.csv (written meanwhile in a child process)."""
    from .data import save_columns

    _write_table(st / "runs.csv", result.runs_table(), RUNS_COLUMNS, RUNS_FORMATS)
    result.ranging.ranges.to_toml(st / "ranges.toml")
    save_columns(result.columns, st / "columns.h5")
    _write_replicates(result.statistics, st / "bootstrap.h5")
    save_decoded(result.decoded, st / "decoded.h5")
    if report:
        from .report import write_report

        figs = write_figures(result, st / "figures", progress)
        if progress:
            progress("report", "writing report.html")
        write_report(result, st / "report.html", ions=result.figure_ions,
                     figures={k: v for k, v in figs.items() if v is not None and k != "density"})
    if extra is not None:
        extra(st)
