"""The options of an analysis and its typed result (the content of results.json).

Progress protocol
-----------------
Every stage function takes ``progress``, a callable (or None) called as
``progress(stage, message)`` once when each stage starts (``stage`` a short name such as
``"decoding"``, ``message`` one line of text); a plain two-argument function is enough.
A progress object may also have a method ``advance(stage, done, total)``: the long stages then
report how far they are, ``done`` of ``total`` units of the stage that last started (chunks of
the fused pass over the ions, EM updates of the decoder on all rods out of its iteration cap),
``done`` rising to at most ``total``. It is looked up with ``getattr``, so callbacks without it
keep working, and it may be called often (once per chunk or iteration): it should return at
once. Stages report through :class:`_Clock` (``clock.stage(name, message)`` and
``clock.advance(name, done, total)``), never by calling ``progress`` themselves. A progress
object may also have ``counted(result)``: the analysis calls it once with the count stage's
:class:`~probeseq.pipeline.stages.CountResult`, before the decoding (the command line draws the
figures that need only the counts meanwhile, :func:`probeseq.pipeline.analysis.figures_ahead`).
Likewise ``decoded(columns, decoded)``: called once with the count array and the final decoding
(copies pooled), before the statistics (the command line writes the tables and arrays
meanwhile, :func:`probeseq.pipeline.analysis.tables_ahead`).
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Callable, Optional

import numpy as np

from ..exceptions import InputError
from ..io.ions import IonList
from ..lattice.model import Lattice
from ..lattice.rodcolumns import RodColumns
from ..outputs.results import RESULTS_SCHEMA_VERSION, runs_table, tracks_table

if TYPE_CHECKING:  # type names only: these modules are heavy to import
    from ..decoding.decode import DecodeResult
    from ..decoding.groups import GroupResult
    from ..ranging.auto import RangingResult
    from ..statistics.classify import Classification
    from ..statistics.summary import RunStatistics

__all__ = ['AnalysisOptions', 'AnalysisResult']

#: largest accepted --n-boot and --n-starts (each resample or start costs a pass over every rod)
MAX_BOOT = 100_000


#: ``progress(stage, message)`` as each stage starts; an object that also has
#: ``advance(stage, done, total)`` is told the fraction done of the long stages (see the
#: module's "Progress protocol")
Progress = Optional[Callable[[str, str], None]]


@dataclass(frozen=True)
class AnalysisOptions:
    """Every setting of an analysis (recorded in the provenance).

    Attributes
    ----------
    seed : int
        Seed of every random choice (EM starts, bootstraps, nulls), in [0, 2**63); the same seed
        gives the same results.
    n_starts : int
        EM starts of the decoder, 1 to :data:`probeseq.decoding.decode.MAX_STARTS`.
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
        [0.2, 5], see :data:`probeseq.utils.validate.SCALE_RANGE`), nm.
    uncertain_below : float
        Sites whose best posterior is below this are flagged uncertain.
    species : tuple of str, optional
        Framework ions to predict instead of the defaults.
    correct_reconstruction : bool
        Calibrate the reconstruction on the lattice (depth scale, plane curvature, lateral
        magnification against depth; :mod:`probeseq.lattice.calibrate`) before cutting sites;
        False keeps the file's positions as they are (``--as-reconstructed``).
    soft_evidence : bool
        Decode from each ion's soft evidence (its range's share of each metal times its radial
        likelihood ratio, :mod:`probeseq.lattice.evidence`); False decodes the counts of one
        drawn metal per ion (``--drawn-metals``).
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
    correct_reconstruction: bool = True
    soft_evidence: bool = True

    def __post_init__(self):
        from ..utils.validate import check_number, check_scale, check_seed

        check_seed(self.seed)
        if self.seed is not None and not isinstance(self.seed, (int, np.integer)):
            raise InputError(f"--seed must be an integer from 0 to 2**63 - 1, got {type(self.seed).__name__}")
        from ..decoding.decode import MAX_STARTS  # here: the decoder's module is heavy to import

        check_number(self.n_starts, "--n-starts", 1, MAX_STARTS, integer=True)
        check_number(self.n_boot, "--n-boot", 20, MAX_BOOT, integer=True)
        check_number(self.long_block_sites, "--long-block-sites", 1, lo_open=True)
        check_number(self.alpha, "--alpha", 0, 0.5, lo_open=True)
        check_number(self.copy_threshold, "--copy-threshold", 0, 1, lo_open=True, hi_open=True)
        check_number(self.uncertain_below, "--uncertain-below", 0.5, 1)
        check_number(self.rotation_deg, "--rotation-deg", -360, 360, allow_none=True)
        check_scale(self.scale)
        if not isinstance(self.correct_reconstruction, (bool, np.bool_)):
            raise InputError(f"correct_reconstruction must be True or False, got {self.correct_reconstruction!r:.40}")
        if not isinstance(self.soft_evidence, (bool, np.bool_)):
            raise InputError(f"soft_evidence must be True or False, got {self.soft_evidence!r:.40}")
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
    copies : CopyResult or None
        The copy-aware decoding when neighbouring rods' paths agree far beyond chance
        (:func:`probeseq.pipeline.stages.pool_copies`; ``decoded`` then holds the pooled
        posteriors of the rods that follow the master, the statistics those of single rods);
        None otherwise.
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
    copies: Optional[object] = field(default=None, repr=False, compare=False)

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
                        "resolvable": bool(col.resolvable), "misassigned_fraction": float(col.misassigned_fraction),
                        "n_metal_ions": int(self.n_metal_ions),
                        "metal_atoms_in_rods": float(col.counts.sum()),
                        "registration": {k: v for k, v in col.params.items() if k != "reconstruction"}},
            "reconstruction": col.params.get("reconstruction"),
            "decoding": dec,
            "groups": None if self.groups is None else self.groups.to_dict(),
            "copies": None if self.copies is None else self.copies.to_dict(),
            "ranging": self.ranging.to_dict(),
            "ions": self.ions_summary,
            "warnings": list(self.warnings),
            "timings_s": self.timings_s,
        }


class _Clock:
    """Times the stages (``timings``, s) and reports them to a :data:`Progress` callback.

    Parameters
    ----------
    progress : callable(stage, message), optional
        With an ``advance(stage, done, total)`` method, it is also told the fraction done.
    """

    def __init__(self, progress: Progress):
        self.t0 = time.perf_counter()
        self.timings = {}
        self.progress = progress
        self._advance = getattr(progress, "advance", None)

    def stage(self, name: str, message: str):
        """Report that stage ``name`` starts; returns a context manager that records its wall time."""
        if self.progress is not None:
            self.progress(name, message)
        return _Timed(self, name)

    @property
    def reports_fractions(self) -> bool:
        """Whether the progress callback takes ``advance`` calls (when not, stages may skip counting)."""
        return self._advance is not None

    def advance(self, name: str, done: int, total: int):
        """Report ``done`` of ``total`` units (chunks, iterations) of stage ``name`` to
        ``progress.advance``; nothing when the callback has no such method or ``total`` < 1."""
        if self._advance is not None and total >= 1:
            self._advance(name, int(done), int(total))


class _Timed:
    def __init__(self, clock, name):
        self.clock, self.name = clock, name

    def __enter__(self):
        self.t = time.perf_counter()
        return self

    def __exit__(self, *exc):
        self.clock.timings[self.name] = round(time.perf_counter() - self.t, 4)
        return False


def _check_ions(ions):
    if not isinstance(ions, IonList) or len(ions) == 0:
        raise InputError("no ions to analyse")
