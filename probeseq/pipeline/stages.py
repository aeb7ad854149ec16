"""The stages of the pipeline on an ion list or an ion file: range, count, decode.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field, replace
from typing import TYPE_CHECKING, Optional

import numpy as np

from .. import runtime
from ..exceptions import DataQualityWarning, InputError
from ..io.ions import IonList, check_position_extent
from ..lattice.model import Lattice
from ..lattice.rodcolumns import RodColumns
from ..ranging.channels import metal_visibility
from .options import AnalysisOptions, Progress, _check_ions, _Clock

if TYPE_CHECKING:  # type names only: these modules are heavy to import
    from ..ranging.auto import RangingResult

__all__ = ['CountResult', 'count_ions', 'count_file', 'range_file', 'range_sample', 'decode_stage', 'pool_copies']


def start_up() -> float:
    """Library start-up before the clock of a stage starts: :func:`probeseq.runtime.preload` with
    the stage modules imported and the first compiled call made; returns its seconds (0 after the
    first call in a process)."""
    return runtime.preload(_warm_stages)


def _warm_stages():
    from ..lattice import columns, registration  # noqa: F401
    from ..ranging import auto, channels  # noqa: F401
    from ..utils.draws import ion_uniforms

    ion_uniforms(0, 0, 1)  # the first compiled call sets up numba's typing and target contexts

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
        ``params["visibility"]`` holds each metal's visibility in the counts (the share of its
        ions counted as it, :func:`probeseq.ranging.channels.metal_visibility`, times the share
        of the own ions that land nearest their rod,
        :func:`probeseq.lattice.evidence.lateral_capture`), which the decoder uses.
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
        With ``advance(stage, done, total)`` it is also told the chunks of the counting pass done
        (the progress protocol of :mod:`probeseq.pipeline.options`).

    Returns
    -------
    CountResult
        Equal (count array, ranging, registration) to what :func:`analyze` with the same
        arguments records.
    """
    opts = options or AnalysisOptions()
    metals = _check_metals(metals)
    _check_ions(ions)
    start_up()
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
                                             n_blocks=len(bounds),
                                             message=f"ranging, drawing and binning all {n} ions in one pass")
    summary = ions.summary()
    summary["sampled_ions"] = int(len(sample))
    return CountResult(ranging=rr, columns=cols, n_metal_ions=n_metal, sample=sample, ions_summary=summary,
                       timings_s=clock.timings, ions=ions)


def _memory_sample(ions: IonList, sample_ions: int) -> IonList:
    """The sample blocks of an ion list in memory (the rows :func:`probeseq.io.readers.read_ion_sample`
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
    """Row indices of the sample blocks (see :func:`probeseq.io.readers.sample_blocks`)."""
    from ..io.readers import sample_blocks

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


def _fit_and_count(sample, metals, lattice, opts, ranges, clock, blocks, factor, *, n_blocks: int = 0,
                   strict: bool = False, where: str = "", message: str = ""):
    """Fits on the sample, then the pass over ``blocks()`` (``n_blocks`` of them, reported to the
    clock as each is done); returns (rr, cols, n_metal, tally, ext)."""
    rr, thin, geom, ev = _fit_on_sample(sample, metals, lattice, opts, ranges, clock)
    with clock.stage("binning", message):
        plan = _start_pass(rr, metals, thin, geom, opts.seed, ev)
        # the kernel puts each metal ion through the geometry's reconstruction correction
        reported = _advancing(blocks, clock, "binning", n_blocks)  # chunks done of n_blocks, to the clock
        counts, tally, ext, evidence = _run_pass(plan, None, factor, strict, reported, where=where)
        cols, n_metal = _finish_pass(geom, counts, metals, tally, thin, ev, evidence)
    return rr, cols, n_metal, tally, ext


def _advancing(blocks, clock, stage: str, n_blocks: int):
    """``blocks`` (a callable giving an iterator of blocks), reporting ``clock.advance(stage, i,
    n_blocks)`` once the consumer has finished block ``i`` (asks for the next, or ends); ``blocks``
    itself when the clock's callback takes no fractions or the count is unknown."""
    if not clock.reports_fractions or n_blocks < 1:
        return blocks

    def advancing():
        for i, block in enumerate(blocks(), 1):
            yield block
            clock.advance(stage, min(i, n_blocks), n_blocks)

    return advancing


def _fit_on_sample(sample: IonList, metals, lattice, opts, ranges, clock):
    """Ranging, detection balance, registration and column plan, all on the bounded sample."""
    from ..lattice.geometry import plan_columns
    from ..lattice.registration import register_lattice
    from ..ranging.channels import assign_channels

    m = sample.mass_to_charge
    stride = _ranging_stride(m.size)
    with runtime.single_threaded_blas():
        with clock.stage("ranging", f"ranging the mass spectrum of {m[::stride].size} sampled ions"):
            rr = range_sample(sample, metals, species=opts.species, ranges=ranges)
            ca = assign_channels(m, rr.ranges, metals)
            # the ranged ions' channels: a stride of the sample's (assignment is per ion)
            ca_fit = ca if stride == 1 else replace(ca, range_index=ca.range_index[::stride],
                                                    channel=ca.channel[::stride])
            thin = metal_visibility(rr, ca_fit)
            sel = (ca.metal_weights.sum(1) > 0)[ca.range_index]  # in a range holding a metal
        if not sel.any():
            raise InputError(f"no ions fall in ranges of the metals {', '.join(metals)}")
        with clock.stage("columns", f"registering the rod lattice on {int(sel.sum())} sampled metal ions"):
            x, y, z = sample.x[sel], sample.y[sel], sample.z[sel]
            reg = register_lattice(x, y, z, lattice, rotation_deg=opts.rotation_deg, scale=opts.scale,
                                   offset_nm=opts.offset_nm, random_state=opts.seed)
        with clock.stage("calibration", "calibrating depth scale, plane curvature and magnification on the lattice"):
            corr, reg, (x, y, z), placed = _correct(sample, sel, reg, lattice, opts)
        with clock.stage("columns", "placing the rods and sites"):
            # overlapped metal and fragment lines: refit their shares with the distance to the rod axes
            rr2 = _refine_overlaps(rr, placed, stride, reg)
            if rr2 is not rr:
                rr = rr2
                ca = assign_channels(m, rr.ranges, metals)
                ca_fit = ca if stride == 1 else replace(ca, range_index=ca.range_index[::stride],
                                                        channel=ca.channel[::stride])
                thin = metal_visibility(rr, ca_fit)
            geom = plan_columns(x, y, z, reg, random_state=opts.seed, correction=corr)
            lateral, ev = _evidence_table(rr, ca_fit, geom, reg, (x, y, z), ca.range_index[sel], opts)
    # a metal's own ion is counted at its site when it lands nearest its rod: part of the visibility
    return rr, thin * lateral, geom, ev


def _evidence_table(rr, ca_fit, geom, reg, xyz, range_index, opts):
    """(the share of the own ions that land nearest their rod,
    :func:`probeseq.lattice.evidence.lateral_capture`; the soft-evidence increments of the pass,
    :func:`probeseq.lattice.evidence.run_evidence_table`, or None when not asked for), both from
    the lateral width fitted on the sample's ions of pure metal ranges."""
    from ..lattice.evidence import lateral_capture, run_evidence_table, run_lateral_spread

    d = reg.axis_distance_nm(*xyz)
    if not opts.soft_evidence:
        return lateral_capture(geom.locator, run_lateral_spread(ca_fit, d, range_index, geom.locator)), None
    ev = run_evidence_table(rr, ca_fit, d, range_index, geom.locator)
    return ev.lateral_capture, ev


def _correct(sample: IonList, sel, reg, lattice, opts):
    """The reconstruction correction of the sample's metal ions (identity when not asked for or
    not found), the registration on the corrected positions, those positions and the sample with
    corrected positions (for the overlap refit)."""
    from ..lattice.calibrate import calibrate_reconstruction
    from ..lattice.correction import ReconstructionCorrection
    from ..lattice.registration import register_lattice

    x, y, z = sample.x[sel], sample.y[sel], sample.z[sel]
    if not opts.correct_reconstruction:
        corr = ReconstructionCorrection.identity(float(z.min()), float(z.max()),
                                                 report={"applied": False, "asked": False})
        return corr, reg, (x, y, z), sample
    corr = calibrate_reconstruction(x, y, z, reg, random_state=opts.seed, where=sample.meta.source or "")
    if corr.is_identity:
        return corr, reg, (x, y, z), sample
    x, y, z = corr.apply(x, y, z)
    with warnings.catch_warnings():  # the first registration has said what it had to say about the lattice
        warnings.simplefilter("ignore", DataQualityWarning)
        reg = register_lattice(x, y, z, lattice, rotation_deg=opts.rotation_deg, scale=opts.scale,
                               offset_nm=opts.offset_nm, random_state=opts.seed)
    sx, sy, sz = corr.apply(sample.x, sample.y, sample.z)
    placed = replace(sample, x=sx, y=sy, z=sz)
    return corr, reg, (x, y, z), placed


def _refine_overlaps(rr, sample: IonList, stride: int, reg):
    """The ranging result refitted where metal and fragment lines overlap, from the ranged ions'
    mass-to-charge and distance to the rod axes (:func:`probeseq.ranging.spatial.refine_overlaps`)."""
    from ..ranging.channels import assign_channels
    from ..ranging.spatial import mixed_ranges, refine_overlaps, warn_undetermined

    if not mixed_ranges(rr).any():
        warn_undetermined(rr)
        return rr
    m = sample.mass_to_charge[::stride]
    ri = assign_channels(m, rr.ranges, rr.metals).range_index
    d = reg.axis_distance_nm(sample.x[::stride], sample.y[::stride], sample.z[::stride])
    out = refine_overlaps(rr, ri, d, reg.lattice.nearest_rod_distance_nm)
    warn_undetermined(out)
    return out


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
    from ..ranging.auto import auto_range

    m = sample.mass_to_charge
    return auto_range(m[::_ranging_stride(m.size)], tuple(metals), species=species, ranges=ranges)


def _start_pass(rr, metals, thin, geom, seed, evidence=None):
    from ..lattice.counting import make_count_plan

    # every ranged metal ion is counted (nothing is thinned): the decoder models each metal's
    # visibility instead (``thin`` here is that visibility, kept in the columns' params)
    return make_count_plan(rr.ranges, metals, np.ones(len(metals)), geom, seed, evidence=evidence)


def _run_pass(plan, counts, factor, strict, blocks, where="", threads=None):
    """Feed the ``(row0, x, y, z, m)`` blocks of ``blocks()`` through the fused kernel; returns
    (counts, tally, extents, soft evidence or None).

    ``counts`` None: a float32 count array is made meanwhile (see
    :class:`probeseq.lattice.counting.CountPass`); should a bin reach 2**24 ions, where float32 stops
    counting exactly, the pass is run again (``blocks()`` called again) into a float64 array.
    With ``strict`` it stops with an :class:`InputError` at the first block holding an invalid row.
    """
    from ..lattice.counting import FLOAT32_LIMIT, CountPass

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
            return cp.counts, tally, ext, cp.evidence
        if counts is not None:
            raise InputError(f"a float32 count reached {FLOAT32_LIMIT:.0f} and is no longer exact: "
                             "pass a float64 count array")
    warnings.warn(f"{where or 'ion list'}: a rod site holds {FLOAT32_LIMIT:.0f} or more ions (is the lattice on "
                  f"the data's scale?); counting again in float64", DataQualityWarning, stacklevel=3)
    return _run_pass(plan, plan.new_counts(np.float64), factor, strict, blocks, where, threads)


def _finish_pass(geom, counts, metals, tally, thin, ev=None, evidence=None):
    from ..lattice.columns import columns_from_counts
    from ..lattice.counting import tally_dict

    t = tally_dict(tally)
    n_metal = t["n_metal"]
    if n_metal == 0:
        raise InputError(f"no ions fall in ranges of the metals {', '.join(metals)}")
    stats = {"n_ions": n_metal, "n_binned": t["n_binned"], "n_beyond_cutoff": t["n_beyond_cutoff"],
             "n_unused_rod": t["n_unused_rod"], "n_outside_depth": t["n_outside_depth"]}
    visibility = {m: float(v) for m, v in zip(metals, thin)}
    extra = {"visibility": visibility}
    if ev is not None:
        extra["evidence"] = {"capture": dict(zip(metals, ev.capture.tolist())),
                             "own_scale": dict(zip(metals, ev.own_scale.tolist())),
                             "lateral_spread": ev.spread.to_dict(), "lateral_capture": float(ev.lateral_capture),
                             "shared_with_second_rod": bool(ev.shared)}
    cols = columns_from_counts(geom, counts, metals, stats, extra_params=extra,
                               evidence=evidence if ev is not None else None)
    return cols, n_metal


def _check_metals(metals) -> tuple:
    """At least two metals, each an element symbol (checked before any file is read)."""
    from ..ranging.isotopes import check_metals

    metals = tuple(metals)
    if len(metals) < 2:
        raise InputError(f"--metals needs at least two metals, got {list(metals)}")
    return check_metals(metals, "--metals")


def decode_stage(columns: RodColumns, options: AnalysisOptions | None = None, *, progress: Progress = None):
    """Fit the rod model to every rod and decode it, and analyse groups of rods when single rods
    are not resolvable: the decoding stage of :func:`analyze` and :func:`analyze_file`.

    Parameters
    ----------
    columns : RodColumns
        Counts (n_rods, n_sites, n_metals) of the count stage (:attr:`CountResult.columns`, or
        read back with :func:`probeseq.lattice.rodcolumns.load_columns`).
    options : AnalysisOptions, optional
        Uses ``n_starts`` (EM starts), ``seed`` and ``uncertain_below``.
    progress : callable(stage, message), optional
        With ``advance(stage, done, total)`` it is also told the EM updates on all rods done, out
        of the iteration cap (the progress protocol of :mod:`probeseq.pipeline.options`).

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
    from ..decoding.decode import fit_decoder

    with clock.stage("decoding", f"fitting the rod model to {cols.n_rods} rods x {cols.n_sites} sites"):
        # the EM on all rods reports its updates out of the iteration cap (it usually converges sooner)
        em = (lambda done, total: clock.advance("decoding", done, total)) if clock.reports_fractions else None
        dec = fit_decoder(cols, n_starts=opts.n_starts, random_state=opts.seed,
                          uncertain_below=opts.uncertain_below, on_iteration=em)
    groups = None
    if not cols.resolvable:
        from ..decoding.groups import analyze_groups

        with clock.stage("groups", "single rods are not resolvable: analysing groups of rods"):
            groups = analyze_groups(cols, random_state=opts.seed)
    return dec, groups


def pool_copies(columns: RodColumns, decoded, *, progress: Progress = None):
    """When neighbouring rods' paths agree far beyond chance, decode the rods that follow one
    master sequence from the pooled evidence of every copy: the copy stage of :func:`analyze`
    and of the ``decode`` command, after the statistics of the single-rod decoding.

    Parameters
    ----------
    columns : RodColumns
    decoded : DecodeResult
        The single-rod decoding (:func:`decode_stage`).
    progress : callable(stage, message), optional

    Returns
    -------
    decoded : DecodeResult
        With the pooled posteriors and paths of the following rods (the input when not pooled).
    copies : CopyResult or None
        None when the paths give no sign of copying (or rods are not resolvable).
    """
    return _pool_copies(columns, decoded, _Clock(progress))


def _pool_copies(cols, dec, clock):
    from ..decoding.copies import copies_suspected, decode_copies, pooled_result

    if not cols.resolvable:
        return dec, None
    suspected, _ = copies_suspected(cols, dec)
    if not suspected:
        return dec, None
    with clock.stage("copies", "neighbouring rods agree: decoding a master sequence from every copy"):
        # pooled from the counts with the counts' fit (the soft-evidence model's approximations bias the
        # copy error; pooling many rods needs no help from the soft evidence)
        params = getattr(dec, "counts_params", None) or dec.params
        cr = decode_copies(replace(cols, evidence=None), params, dec.posteriors,
                           rod_efficiency=getattr(dec, "rod_efficiency", None))
    if not cr.applied:
        warnings.warn(f"neighbouring rods agree beyond chance but are decoded one at a time: {cr.reason}",
                      DataQualityWarning, stacklevel=3)
        return dec, cr
    return pooled_result(dec, cr), cr


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
    from ..io.readers import count_ions as n_rows

    return kind == "text" or bool(stream_above and n_rows(path, position_dataset, mass_dataset) <= stream_above)


def _read_all(path, progress, length_unit, position_dataset, mass_dataset, strict) -> IonList:
    from ..io.readers import read_ions

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
        As for :func:`probeseq.io.readers.read_ions`.
    progress : callable(stage, message), optional
        With ``advance(stage, done, total)`` it is also told the chunks of the counting pass done
        (the progress protocol of :mod:`probeseq.pipeline.options`).
    stream_above, chunk_size, sample_ions : int
        As for :func:`analyze_file`.

    Returns
    -------
    CountResult
        Equal (count array, ranging, registration) to what :func:`analyze_file` with the same
        arguments records.
    """
    from ..io.formats import ion_file_kind

    start_up()
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
        As for :func:`probeseq.io.readers.read_ions`.
    progress : callable(stage, message), optional
    stream_above, sample_ions : int
        As for :func:`analyze_file`.

    Returns
    -------
    ranging : RangingResult
    sample : IonList
        The sample (positions in nm, mass-to-charge in Da).
    """
    from ..io.formats import ion_file_kind
    from ..io.readers import IonSource

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
    from ..ranging.spatial import warn_unrefined

    warn_unrefined(rr, "without the rod lattice the ions' distance to the rod axes cannot check it ('analyze' "
                       "with the lattice refits such ranges)")
    return rr, sample


def _stream_sample(src, path, clock, sample_ions, strict) -> IonList:
    """The sample blocks of an open :class:`probeseq.io.readers.IonSource` (invalid rows dropped)."""
    from ..io.readers import read_ion_sample

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
    from ..io.readers import IonSource

    with IonSource(path, length_unit=length_unit, position_dataset=position_dataset,
                   mass_dataset=mass_dataset) as src:
        n = src.n
        sample = _stream_sample(src, path, clock, sample_ions, strict)

        def blocks():
            return _file_blocks(src, int(chunk_size))

        rr, cols, n_metal, tally, ext = _fit_and_count(
            sample, metals, lattice, opts, ranges, clock, blocks, src.factor, strict=strict, where=str(path),
            n_blocks=len(src.block_bounds(int(chunk_size))),
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
    from ..lattice.counting import tally_dict

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
