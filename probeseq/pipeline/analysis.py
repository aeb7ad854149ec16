"""The whole analysis, stage by stage: ranging -> columns -> decoding -> statistics -> classification.

:func:`analyze` runs the stages in order on an ion list and returns an :class:`AnalysisResult`;
:func:`write_analysis` writes its output folder (``results.json``, the tracks table, ``runs.csv`` and
the intermediate files). Each stage is a pure library call; this module only joins them, times
them and reports progress through an optional callback.

The stages are public so the stage commands run exactly what ``analyze`` runs:
:func:`range_file` (ranging on the run's sample), :func:`count_file` / :func:`count_ions`
(ranging, registration and the fused counting pass, giving a :class:`CountResult`) and
:func:`decode_stage` (the rod model, and groups of rods when single rods are not resolvable).
"""

from __future__ import annotations

import os
import platform
import sys
import threading
import time
import warnings
from dataclasses import replace
from pathlib import Path
from typing import Callable

import numpy as np

from .. import runtime
from .._version import __version__
from ..exceptions import DataQualityWarning, InputError
from ..io.ions import IonList
from ..lattice.model import Lattice
from ..lattice.rodcolumns import RodColumns
from ..outputs.reporttext import analysis_warnings
from ..outputs.results import RUNS_COLUMNS, RUNS_FORMATS, _write_replicates, _write_table, save_decoded, write_tracks
from .options import AnalysisOptions, AnalysisResult, Progress, _check_ions, _Clock
from .stages import (
    PASS_CHUNK,
    SAMPLE_IONS,
    STREAM_ABOVE_IONS,
    _check_metals,
    _check_pass_sizes,
    _count_ions,
    _count_stream,
    _decode_stage,
    _pool_copies,
    _whole_ions,
    start_up,
)

__all__ = ['analyze', 'analyze_file', 'write_analysis', 'write_density_figure']

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
    the run, then one fused pass of :mod:`probeseq.lattice.counting` that ranges, draws, assigns and
    counts every ion), :func:`decode_stage`, then statistics and classification. This is the
    same procedure as :func:`analyze_file`, so both give the same count array for the same ions.

    See Also
    --------
    analyze_file : the same from a file, streamed in chunks.
    """
    opts = options or AnalysisOptions()
    metals = _check_metals(metals)
    _check_ions(ions)
    start_up()
    return _analyze_ions(ions, metals, lattice, opts, ranges, progress, provenance, SAMPLE_IONS)


def _analyze_ions(ions, metals, lattice, opts, ranges, progress, provenance, sample_ions) -> AnalysisResult:
    """:func:`analyze` with checked arguments and a given sample size."""

    def counts_stage(clock):
        return _count_ions(ions, metals, lattice, opts, ranges, clock, sample_ions)

    return _run(counts_stage, metals, lattice, opts, progress, provenance, ions.meta)


def _run(counts_stage, metals, lattice, opts, progress, provenance, meta) -> AnalysisResult:
    """The stages after the count array, shared by the in-memory and the streamed analysis;
    ``counts_stage(clock)`` returns the :class:`CountResult`."""
    from ..statistics.classify import classify
    from ..statistics.summary import compute_statistics

    clock = _Clock(progress)
    with warnings.catch_warnings(record=True) as wlist:
        warnings.simplefilter("always")
        t_counts = time.perf_counter()
        counted = counts_stage(clock)
        clock.timings["to_counts"] = round(time.perf_counter() - t_counts, 4)
        on_counts = getattr(progress, "counted", None)  # optional: told the count stage's result
        if on_counts is not None:
            on_counts(counted)
        cols = counted.columns
        dec, groups = _decode_stage(cols, opts, clock)
        # the copies pooled now (they need only the single-rod decoding): the final decoding is then
        # known before the statistics, which read the single-rod decoding
        final, copies = _pool_copies(cols, dec, clock)
        on_decoded = getattr(progress, "decoded", None)  # optional: told the final decoding
        if on_decoded is not None:
            on_decoded(cols, final)
        with clock.stage("statistics", f"statistics with {opts.n_boot} bootstrap resamples over rods"):
            st = compute_statistics(dec, cols, n_boot=opts.n_boot, random_state=opts.seed)
        with clock.stage("classification", "classifying the arrangement"):
            cl = classify(st, dec.lr_pvalue, long_block_sites=opts.long_block_sites, alpha=opts.alpha,
                          copy_threshold=opts.copy_threshold)
        dec = final
        caught = [str(w.message).splitlines()[0] for w in wlist]
    clock.timings["total"] = round(time.perf_counter() - clock.t0, 4)
    prov = {"tool": "probeseq", "version": __version__, "python": sys.version.split()[0],
            "platform": f"{platform.system()} {platform.machine()}".strip(),
            "options": opts.to_dict(), "metals": list(metals),
            "lattice": lattice.to_dict(), "lattice_source": lattice.name, "seed": opts.seed,
            "input": {"source": meta.source, "sha256": meta.sha256}}
    prov.update(provenance or {})
    # the one warnings list: the terminal prints it, results.json stores it, the report lists it
    warn = analysis_warnings(cols, dec, groups, caught, prov)
    return AnalysisResult(metals=metals, lattice=lattice, options=opts, ions_summary=counted.ions_summary,
                          ranging=counted.ranging, n_metal_ions=counted.n_metal_ions, columns=cols, decoded=dec,
                          groups=groups, statistics=st, classification=cl, timings_s=clock.timings,
                          warnings=tuple(warn), provenance=prov, figure_ions=counted.figure_ions, copies=copies)




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
       :class:`probeseq.lattice.counting.CountPass` (validity, range lookup, metal draw, rod and site,
       count) on two threads. Plain layouts are read as zero-copy views of the page cache
       (:meth:`probeseq.io.readers.IonSource.mapped`), others through HDF5 with the next chunk read while
       the kernel runs.

    With the default ``sample_ions`` the result equals ``analyze(read_ions(path))`` (the same
    sample, fits and draws) when no row is dropped, whatever ``chunk_size``.

    The file's SHA-256 (provenance) is computed in a lowest-priority thread started once the
    count array is finished, which runs alongside the later stages. ``timings_s.read_to_counts``
    is the wall time from the first read to the finished count array; the checksum is not needed
    for the counts and is waited for at the end (``timings_s.checksum_wait``).
    ``timings_s.startup`` is the library start-up before the clock (imports, numba's runtime).
    """
    from ..io.formats import ion_file_kind

    t_start = start_up()
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
    from ..io.formats import file_sha256_mapped
    from ..io.ions import IonMeta

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


#: decoded sites below which :func:`figures_ahead` starts no child (the bundled sample, about 10^5
#: sites, decodes in about half a second: there the child only competed with the analysis, 9.6 s
#: against 9.0 s wall in alternating runs; at 4.3e6 sites it saved about a second)
AHEAD_MIN_SITES = 1_000_000


def count_stage_figure_jobs(ranging, columns: RodColumns, figure_ions, folder) -> list:
    """The figures that need only the count stage's results, as :class:`FigureJob` s saving into
    ``folder``: ``spectrum``, ``overlaps`` (when ranges were refitted) and ``density`` (when
    ``figure_ions`` are given). :func:`figures_ahead` draws them while the decoding runs."""
    from ..outputs.figurejobs import FigureJob

    folder = Path(folder)

    def spectrum():
        from ..ranging.plot import plot_ranging

        return plot_ranging(ranging, folder / "spectrum")

    def overlaps():
        from ..ranging.plot import plot_overlaps

        return plot_overlaps(ranging, folder / "overlaps")

    jobs = [FigureJob("spectrum", spectrum), FigureJob("overlaps", overlaps)]
    if figure_ions is not None:
        jobs.append(FigureJob("density", lambda: write_density_figure(figure_ions, ranging, columns,
                                                                      folder / "density.png")))
    return jobs


def figures_ahead(counted):
    """Start drawing the count stage's figures (:func:`count_stage_figure_jobs` of ``counted``, a
    :class:`CountResult`) in a forked child, when a second CPU is free, while this process decodes;
    hand the result to :func:`write_analysis` (``ahead=``). None when it does not pay (one CPU,
    ``--jobs 1``) or this process cannot fork."""
    from ..outputs.figurejobs import FiguresAhead, two_processes_pay
    from ..outputs.report import report_dpi

    # not judged on the load now: this process's own threads (the pass just ended) count as load, and
    # the figures are drawn by the time the output stage needs them whatever the load
    if not two_processes_pay(runtime.jobs(), load=0.0):
        return None
    if int(np.count_nonzero(counted.columns.mask)) < AHEAD_MIN_SITES:
        return None  # a small run decodes in less time than the child needs to start and draw
    ahead = FiguresAhead(lambda folder: count_stage_figure_jobs(counted.ranging, counted.columns,
                                                                counted.figure_ions, folder), report_dpi)
    if not ahead.started:
        ahead.discard()
        return None
    return ahead


#: decoded sites below which :func:`tables_ahead` starts no child: at 4.3e6 sites (1.1e7 ions) the
#: statistics take about 2 s, too short for a child at the lowest priority, which then held the
#: figures to one process (output stage 6.5-8.4 s with it, 5.1-6.7 s without, alternating runs);
#: at 4e7 sites (10^8 ions) the statistics take 8-10 s and the child saves 12-15 s
TABLES_AHEAD_MIN_SITES = 10_000_000


def tables_ahead(columns: RodColumns, decoded, outdir, tracks_table: str = "auto"):
    """Start writing the tables and arrays of ``outdir`` (:class:`TablesAhead`) once the decoding
    is final, while this process computes the statistics; hand the result to
    :func:`write_analysis` (``tables=``). None for runs under :data:`TABLES_AHEAD_MIN_SITES`
    decoded sites or where this process cannot fork."""
    from ..outputs.results import tracks_table_files

    n = int(np.count_nonzero(columns.mask))
    if n < TABLES_AHEAD_MIN_SITES:
        return None
    try:
        ahead = TablesAhead(columns, decoded, outdir, tracks_table_files(tracks_table, n))
    except (OSError, InputError):  # no hidden folder beside the output folder: the output stage writes
        return None                # everything itself (and says what is wrong with the folder)
    if not ahead.started:
        ahead.discard()
        return None
    return ahead


class TablesAhead(runtime.FolderChild):
    """The tracks table, ``runs.csv``, ``columns.h5`` and ``decoded.h5`` of an output folder,
    written by a forked child at the lowest priority into a hidden folder beside it
    (:func:`probeseq.outputs.folder.ahead_folder`) while this process computes the statistics: they
    need only the count array and the final decoding. :func:`write_analysis` moves them in
    (:meth:`collect`) and writes whatever the child did not finish itself.

    Parameters
    ----------
    columns : RodColumns
    decoded : DecodeResult
        The final decoding (copies pooled).
    outdir : path
        The output folder to be.
    files : tuple of str
        The tracks table's files (:func:`probeseq.outputs.results.tracks_table_files`).
    """

    def __init__(self, columns: RodColumns, decoded, outdir, files):
        from ..outputs.folder import ahead_folder

        self.files = tuple(files)
        self.folder = ahead_folder(outdir)
        self.start(_write_ahead, columns, decoded, self.folder, self.files)

    @property
    def names(self) -> tuple:
        """The files the child writes."""
        return self.files + ("runs.csv", "columns.h5", "decoded.h5")

    def collect(self, folder, files) -> set:
        """Wait for the child and move its files into ``folder`` when it wrote every one of them
        for the same tracks-table ``files``; returns the names moved (none when it failed). The
        hidden folder is removed."""
        moved = set()
        try:
            if tuple(files) == self.files and self.wait() and all((self.folder / n).is_file() for n in self.names):
                for n in self.names:
                    os.replace(self.folder / n, Path(folder) / n)
                    moved.add(n)
        finally:
            self.discard()
        return moved


def _write_ahead(columns, decoded, folder, files):
    """The child of :class:`TablesAhead`: at the lowest priority (it takes the CPU the statistics
    leave idle and never slows their parallel kernels), the arrays, then the tables."""
    try:
        os.nice(19)
    except (AttributeError, OSError):  # no priorities here: write at the same priority
        pass
    _write_arrays(columns, decoded, Path(folder))
    _write_tables(columns, decoded, Path(folder), files)


def write_figures(result: AnalysisResult, folder, progress: Progress = None, failures: list | None = None,
                  parallel: bool | None = None, drawn_ahead: dict | None = None) -> dict:
    """Save the figures of an analysis in ``folder`` (vector and PNG) and return the report's PNGs by name.

    The figures are drawn in this process and a forked child at once
    (:func:`probeseq.outputs.figurejobs.run_figure_jobs`); the returned value of each is its PNG at
    the report's resolution (bytes; None for a figure that failed), for
    :func:`probeseq.outputs.report.write_report`, which then draws none of them again.

    Files: ``tracks.svg/.png`` (rods nearest the centre; a PDF with ``probeseq export --format pdf``), ``spectrum.png/.svg``,
    ``density.png``, ``run_lengths.svg/.png``, ``rod_to_rod.svg/.png``, ``groups.svg/.png`` (when
    rods are not resolvable), ``overlaps.png/.svg`` (when overlapped metal and fragment lines were
    refitted with the ions' distance to the rod axes), ``reconstruction.png/.svg`` (the depth
    scale, plane curvature, magnification and detection efficiency calibrated on the lattice). A figure that cannot be drawn is skipped with a warning.
    Its one-line message is also appended to ``failures`` when a list is given (``write_analysis``
    adds them to the warnings of ``results.json`` and the report). ``parallel`` as in
    :func:`probeseq.outputs.figurejobs.run_figure_jobs` (default: judged now). ``drawn_ahead``:
    figures already in ``folder``, drawn while the analysis ran (``{name: (status, value)}`` of
    :meth:`probeseq.outputs.figurejobs.FiguresAhead.collect`); only the others are drawn.
    """
    from ..outputs.figurejobs import FigureJob, run_figure_jobs
    from ..outputs.figures import plot_group_variance, plot_rod_to_rod, plot_run_lengths
    from ..outputs.report import report_dpi
    from ..outputs.tracks import plot_tracks

    folder = Path(folder)
    if progress:
        progress("figures", "drawing the figures (tracks, run lengths, rod-to-rod, spectrum, density)")
    done = dict(drawn_ahead or {})

    def reconstruction():
        from ..lattice.plot import plot_reconstruction

        return plot_reconstruction(result.columns.params.get("reconstruction"), folder / "reconstruction",
                                   efficiency=result.decoded.to_dict().get("radial_efficiency"))

    # longest first (measured on the sample run): two processes take the next one as they come free
    jobs = [FigureJob("tracks", lambda: plot_tracks(result.columns, result.decoded, size="two-column"),
                      ("svg", "png")),
            FigureJob("reconstruction", reconstruction),
            FigureJob("run_lengths", lambda: plot_run_lengths(result.statistics), ("svg", "png"))]
    if result.statistics.rod_to_rod is not None:
        jobs.append(FigureJob("rod_to_rod", lambda: plot_rod_to_rod(result.statistics,
                                                                   copy_threshold=result.options.copy_threshold),
                              ("svg", "png")))
    if result.groups is not None:
        jobs.append(FigureJob("groups", lambda: plot_group_variance(result.groups), ("svg", "png")))
    early = count_stage_figure_jobs(result.ranging, result.columns, result.figure_ions, folder)
    jobs[3:3] = [j for j in early if j.name == "spectrum"]  # the order measured before: spectrum 4th
    jobs += [j for j in early if j.name != "spectrum"]
    jobs = [j for j in jobs if j.name not in done]
    figs = {}
    drawn = run_figure_jobs(jobs, folder, report_dpi, parallel=parallel) if jobs else {}
    for name, (status, value) in {**done, **drawn}.items():
        if status == "failed":
            warnings.warn(value, DataQualityWarning, stacklevel=2)
            if failures is not None:
                failures.append(value)
            value = None
        figs[name] = value
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
    from ..lattice.plot import plot_rod_density
    from ..ranging.channels import assign_channels

    sel = assign_channels(ions.mass_to_charge, ranging.ranges, columns.metals).weights().sum(1) > 0
    return plot_rod_density(ions.x[sel], ions.y[sel], ions.z[sel], columns, path)


def write_analysis(result: AnalysisResult, outdir, force: bool = False, extra: Callable | None = None,
                   report: bool = True, progress: Progress = None, inputs=(), tracks_table: str = "auto",
                   ahead=None, tables=None) -> Path:
    """Write an analysis output folder (staged: complete or not at all).

    Files: ``results.json``, the tracks table (``tracks.csv`` and/or ``tracks.h5``, see
    ``tracks_table``), ``runs.csv``, ``ranges.toml``, ``columns.h5``, ``decoded.h5``,
    ``bootstrap.h5``, ``probeseq-manifest.json``; with ``report``, ``figures/`` and ``report.html``.
    ``extra`` (called with the staging folder) may add more. ``inputs`` (paths) are the analysis's
    inputs, which the output folder may neither be nor contain; an existing folder is replaced only
    with ``force`` and only when it holds nothing but probeseq's outputs (see :mod:`probeseq.outputs`).
    ``tracks_table`` is one of :data:`probeseq.outputs.results.TRACKS_TABLE_CHOICES`: ``auto``
    writes ``tracks.csv`` up to 2,000,000 decoded sites and the same table as ``tracks.h5`` above
    (a CSV of a 10^8-ion run is about 2 GB of text; ``probeseq export OUTDIR --format csv`` still
    writes it). ``results.json`` names the file(s) under ``outputs.tracks_table``. ``ahead``: the
    figures drawn while the analysis ran (:func:`figures_ahead`), moved in rather than drawn again;
    ``tables``: the tables and arrays written meanwhile (:func:`tables_ahead`), likewise.
    """
    from ..outputs.folder import staged_outdir, write_json
    from ..outputs.results import tracks_table_files

    files = tracks_table_files(tracks_table, int(np.count_nonzero(result.columns.mask)))
    command = result.provenance.get("command_line")
    with staged_outdir(outdir, force=force, inputs=inputs, command=command) as st:
        write_json(st / "results.json", _results_dict(result, files))
        # whether the figures go to two processes is judged before the table child starts (which
        # would otherwise count as the other CPU's load)
        from ..outputs.figurejobs import two_processes_pay

        # the figures drawn during the analysis first: their child is then no load on the judgement below
        drawn = ahead.collect(st / "figures") if (ahead is not None and report) else {}
        parallel = two_processes_pay(runtime.jobs()) if report else False
        if tables is not None and tables.running:
            parallel = False  # the figures in this process: the tables' child keeps the other CPU
        # two forked children write the tables and the arrays while this process draws the figures,
        # unless a child writes them already (their files are moved in afterwards)
        children = []
        if tables is None:
            children = _table_children(result, st, files)
        try:
            _write_rest(result, st, report, progress, extra, files, parallel, drawn)
            if tables is not None and not tables.collect(st, files):  # it failed: written here after all
                children = _table_children(result, st, files)
            for child, what in children:
                child.join(what)
        finally:
            for child, _ in children:
                child.kill()
            if ahead is not None:
                ahead.discard()
            if tables is not None:
                tables.discard()
    return Path(outdir)


def _table_children(result, st, files) -> list:
    """Two forked children writing the tables and the arrays: ``[(child, what it writes)]``."""
    cols, dec = result.columns, result.decoded
    return [(runtime.Background(_write_tables, cols, dec, st, files), ", ".join(files + ("runs.csv",))),
            (runtime.Background(_write_arrays, cols, dec, st), "columns.h5, decoded.h5")]


def _results_dict(result, files) -> dict:
    """``results.json``: the result's dictionary and, under ``outputs``, the files of the tracks table."""
    d = result.to_dict()
    d["outputs"] = {"tracks_table": list(files)}
    return d


def _write_tables(columns, decoded, st, files):
    """The tracks table and runs.csv, in a forked child while this process draws the figures (the
    compiled table formatter is loaded there once, about 1 s in a fresh process; the tracks table
    of a 10^8-ion run takes about 9 s)."""
    from ..outputs.results import runs_table, write_tracks_h5

    if "tracks.csv" in files:
        write_tracks(st / "tracks.csv", columns, decoded)
    if "tracks.h5" in files:
        write_tracks_h5(st / "tracks.h5", columns, decoded)
    _write_table(st / "runs.csv", runs_table(columns, decoded), RUNS_COLUMNS, RUNS_FORMATS)


def _write_arrays(columns, decoded, st):
    """columns.h5 and decoded.h5, in a second forked child (about 1.5 s at 10^7 ions)."""
    from ..lattice.rodcolumns import save_columns

    save_columns(columns, st / "columns.h5")
    save_decoded(decoded, st / "decoded.h5")


def _write_rest(result, st, report, progress, extra, files, parallel=None, drawn=None):
    """Everything of an output folder but what the children write meanwhile (:func:`_write_tables`,
    :func:`_write_arrays`)."""
    result.ranging.to_toml(st / "ranges.toml")
    _write_replicates(result.statistics, st / "bootstrap.h5")
    if report:
        from ..outputs.folder import write_json
        from ..outputs.report import write_report

        failures = []
        figs = write_figures(result, st / "figures", progress, failures, parallel, drawn)
        if failures:  # one warnings list: results.json and the report both carry the figures not drawn
            result = replace(result, warnings=tuple(dict.fromkeys(tuple(result.warnings) + tuple(failures))))
            write_json(st / "results.json", _results_dict(result, files))
        if progress:
            progress("report", "writing report.html")
        # a figure that failed (None) is left out of the report, not drawn and warned about twice
        write_report(result, st / "report.html", ions=result.figure_ions, figures=figs)
    if extra is not None:
        extra(st)
