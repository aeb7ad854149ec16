"""Analysis of one run, and of a batch of runs, into output folders: the library behind ``analyze``.

:func:`analyze_run` analyses one ion file or one run folder (ion file + ``run.toml``) and writes
its output folder; :func:`analyze_batch` does the same for every run folder of a folder, one task
per run on a dask cluster (local by default, or a running scheduler) or, without dask, in local
worker processes (:mod:`probeseq.study.cluster`), through :func:`analyze_run` itself, so a run
of a batch and a single run are analysed alike. Options given by the caller take precedence over
what ``run.toml`` says.

Examples
--------
>>> from probeseq.study.batch import analyze_batch                       # doctest: +SKIP
>>> from probeseq.pipeline import AnalysisOptions                   # doctest: +SKIP
>>> outcomes = analyze_batch("runs", "analysis_runs", options=AnalysisOptions(n_boot=100))  # doctest: +SKIP
>>> [(o.run, o.label if o.ok else o.error) for o in outcomes]       # doctest: +SKIP
"""

from __future__ import annotations

import time
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, Optional

from ..exceptions import InputError, ProbeseqError

__all__ = ['RunSource', 'RunAnalysis', 'BatchOutcome', 'resolve_run', 'analyze_run', 'analyze_batch', 'run_folders', 'summary_lines', 'DEFAULT_WORKERS']

#: worker processes of a batch without dask unless told otherwise (each run uses up to two threads);
#: a local dask cluster has one worker per core
DEFAULT_WORKERS = 2


# ---------------------------------------------------------------------- one run
@dataclass(frozen=True)
class RunSource:
    """Everything an analysis reads, resolved from the caller's options and ``run.toml``.

    Attributes
    ----------
    ions : Path
        The ion file.
    metals : tuple of str
    lattice : Lattice
    ranges : Path or None
        Range file to use instead of automatic ranging.
    name : str
        The run's name (``[sample] name``, else the folder's or file's name); free text.
    safe_name : str
        ``name`` made safe as a file-name component.
    sample : dict
        ``[sample]`` of ``run.toml`` plus ``detection_efficiency_given`` (empty for an ion file).
    inputs : tuple of Path
        Every file or folder read; an output may neither be nor contain one of them.
    """

    ions: Path
    metals: tuple
    lattice: object
    ranges: Optional[Path]
    name: str
    safe_name: str
    sample: dict = field(default_factory=dict)
    inputs: tuple = ()


def _metal_tuple(metals):
    """Metal symbols from a sequence or a comma-separated text; None when not given."""
    if metals is None or (not isinstance(metals, str) and len(metals) == 0):
        return None
    items = [m.strip() for m in metals.split(",")] if isinstance(metals, str) else [str(m) for m in metals]
    if len(items) < 2 or not all(items):
        raise InputError(f"--metals needs at least two metals, e.g. Co,Zn; got {','.join(items)!r:.80}")
    return tuple(items)


def _lattice_file(spec) -> list:
    """The lattice file named by a lattice spec, if it is a file (not a preset or a Lattice)."""
    from ..lattice.model import PRESETS, Lattice

    if spec is None or isinstance(spec, Lattice) or str(spec).lower() in PRESETS:
        return []
    return [Path(spec)]


def _build_lattice(spec, a, repeat, sites_per_repeat, where: str):
    """A Lattice from a preset (with its cell) or a file; cell options with a file are an error."""
    from ..lattice.model import PRESETS, Lattice

    if isinstance(spec, Lattice):
        return spec
    if str(spec).lower() not in PRESETS and (a is not None or repeat is not None or sites_per_repeat is not None):
        raise InputError(f"--a, --repeat and --sites-per-repeat go with a lattice preset, but {where} is the "
                         f"lattice file '{spec}' (give the cell in that file)")
    return Lattice.from_spec(spec, a=a, repeat=repeat, sites_per_repeat=3 if sites_per_repeat is None else
                             sites_per_repeat)


def resolve_run(source, *, metals=None, lattice=None, a: float | None = None, repeat: float | None = None,
                sites_per_repeat: int | None = None, ranges=None, allow_outside: bool = False) -> RunSource:
    """What one analysis reads: an ion file with the given options, or a run folder completed by them.

    Parameters
    ----------
    source : str or Path
        An ion file, or a run folder holding ``run.toml``.
    metals : sequence of str, optional
        Metal symbols; override ``[run] metals``. Required for an ion file.
    lattice : str, Path or Lattice, optional
        A preset name, a lattice TOML file or a Lattice; overrides ``[run] lattice``. Required
        for an ion file.
    a, repeat : float, optional, nm
        Cell edge and repeat along the rod of a preset lattice; override the values in
        ``run.toml`` when the lattice is its preset.
    sites_per_repeat : int, optional
        Metal sites per repeat of a preset lattice (default 3, or the value in ``run.toml``).
    ranges : str or Path, optional
        Range file; overrides ``[run] ranges``.
    allow_outside : bool
        Let ``run.toml`` name files outside the run folder (see :func:`probeseq.study.runinfo.read_run_folder`).

    Returns
    -------
    RunSource

    Raises
    ------
    InputError
        A missing or malformed input, or a required option not given.
    """
    from .runinfo import read_run_folder, safe_file_name

    src = Path(source)
    metals = _metal_tuple(metals)
    inputs = [src]
    if ranges is not None:
        inputs.append(Path(ranges))
    inputs += _lattice_file(lattice)
    if src.is_dir():
        desc = read_run_folder(src, allow_outside=allow_outside)
        inputs += [desc.folder / "run.toml", desc.ions]
        if desc.ranges is not None:
            inputs.append(desc.ranges)
        if lattice is None:
            inputs += _lattice_file(desc.lattice)
            largs = dict(desc.lattice_args)
            for key, value in (("a", a), ("repeat", repeat), ("sites_per_repeat", sites_per_repeat)):
                if value is not None:
                    largs[key] = value
            lat = _build_lattice(desc.lattice, largs.get("a"), largs.get("repeat"), largs.get("sites_per_repeat"),
                                 f"[run] lattice of {desc.folder / 'run.toml'}")
        else:
            lat = _build_lattice(lattice, a, repeat, sites_per_repeat, "--lattice")
        sample = dict(desc.sample)
        sample["detection_efficiency_given"] = desc.detection_efficiency
        return RunSource(ions=desc.ions, metals=metals or desc.metals, lattice=lat,
                         ranges=Path(ranges) if ranges is not None else desc.ranges, name=desc.name,
                         safe_name=desc.safe_name, sample=sample, inputs=tuple(inputs))
    if metals is None:
        raise InputError("--metals is required (or give a run folder with run.toml)")
    if lattice is None:
        raise InputError("--lattice is required (a lattice TOML file or a preset name)")
    lat = _build_lattice(lattice, a, repeat, sites_per_repeat, "--lattice")
    return RunSource(ions=src, metals=metals, lattice=lat, ranges=None if ranges is None else Path(ranges),
                     name=src.stem, safe_name=safe_file_name(src.stem), sample={}, inputs=tuple(inputs))


class _RunLog:
    """Progress callback that keeps every line for ``log.txt`` and passes each on to ``forward``.

    ``on_stage`` maps a stage name to a callable run (once) when that stage starts; ``on_counts``
    is called with the count stage's result (:class:`probeseq.pipeline.stages.CountResult`),
    ``on_decoded`` with the count array and the final decoding.
    """

    def __init__(self, forward: Optional[Callable[[str, str], None]] = None, on_stage: dict | None = None,
                 on_counts: Optional[Callable] = None, on_decoded: Optional[Callable] = None):
        self.t0 = time.perf_counter()
        self.lines = []
        self.forward = forward
        self.on_stage = dict(on_stage or {})
        self.on_counts = on_counts
        self.on_decoded = on_decoded

    def counted(self, count_result):
        """The count stage is done (the progress protocol of :mod:`probeseq.pipeline.options`)."""
        if self.on_counts is not None:
            self.on_counts(count_result)

    def decoded(self, columns, decoded):
        """The decoding is final (the progress protocol of :mod:`probeseq.pipeline.options`)."""
        if self.on_decoded is not None:
            self.on_decoded(columns, decoded)

    def __call__(self, stage: str, message: str):
        self.lines.append(f"[{time.perf_counter() - self.t0:7.1f} s] {stage}: {message}")
        if self.forward is not None:
            self.forward(stage, message)
        hook = self.on_stage.pop(stage, None)
        if hook is not None:
            hook()

    def advance(self, stage: str, done: int, total: int):
        """Pass the fraction done on to ``forward.advance``, when it has one; ``log.txt`` keeps
        only the stage lines (the progress protocol of :mod:`probeseq.pipeline.options`)."""
        fwd = getattr(self.forward, "advance", None)
        if fwd is not None:
            fwd(stage, done, total)


@dataclass(frozen=True)
class RunAnalysis:
    """One analysed run.

    Attributes
    ----------
    result : AnalysisResult
    outdir : Path
        The output folder written.
    source : RunSource
        What was read.
    """

    result: object
    outdir: Path
    source: RunSource


def analyze_run(source, out=None, *, options=None, metals=None, lattice=None, a: float | None = None,
                repeat: float | None = None, sites_per_repeat: int | None = None, ranges=None,
                length_unit: str | None = None, position_dataset: str | None = None,
                mass_dataset: str | None = None, strict: bool = False, allow_outside: bool = False,
                force: bool = False, progress: Optional[Callable[[str, str], None]] = None,
                command_line: str | None = None, tracks_table: str = "auto") -> RunAnalysis:
    """Analyse one ion file or run folder and write its output folder (complete or not at all).

    The output folder is checked before any work (:func:`probeseq.outputs.folder.check_outdir`: it may
    neither be nor contain an input, and replaces an earlier probeseq output only with
    ``force``). It holds what :func:`probeseq.pipeline.analysis.write_analysis` writes plus ``log.txt``
    (the progress lines and the summary of :func:`summary_lines`).

    Parameters
    ----------
    source : str or Path
        An ion file or a run folder (see :func:`resolve_run`).
    out : str or Path, optional
        Output folder (default ``analysis_<run name>`` in the working folder).
    options : AnalysisOptions, optional
        Settings of the analysis (default :class:`probeseq.pipeline.options.AnalysisOptions`).
    metals, lattice, a, repeat, sites_per_repeat, ranges, allow_outside
        See :func:`resolve_run`; they take precedence over ``run.toml``.
    length_unit : {"nm", "angstrom"}, optional
        Unit of the positions in the ion file (default: from the file, else nm).
    position_dataset, mass_dataset : str, optional
        HDF5 paths of the position (N x 3) and mass-to-charge datasets of other layouts.
    strict : bool
        NaN/inf or non-positive mass-to-charge rows are an error instead of being dropped.
    force : bool
        Replace an earlier probeseq output folder.
    progress : callable, optional
        ``progress(stage, message)`` as each stage starts.
    command_line : str, optional
        The command that asked for this analysis (recorded in the provenance and the manifest).
    tracks_table : {"auto", "csv", "hdf5", "both"}
        How the tracks table is written (:func:`probeseq.pipeline.analysis.write_analysis`): ``auto``
        gives tracks.csv up to 2,000,000 decoded sites and tracks.h5 above.

    Returns
    -------
    RunAnalysis

    Raises
    ------
    ProbeseqError
        Bad inputs or options (one line), or a failed fit.
    """
    from ..outputs.folder import check_outdir
    from ..pipeline.analysis import analyze_file, figures_ahead, tables_ahead, write_analysis
    from ..pipeline.options import AnalysisOptions
    from ..ranging.ranges import RangeSet

    run = resolve_run(source, metals=metals, lattice=lattice, a=a, repeat=repeat, sites_per_repeat=sites_per_repeat,
                      ranges=ranges, allow_outside=allow_outside)
    outdir = Path(out) if out is not None else Path(f"analysis_{run.safe_name}")
    check_outdir(outdir, force, run.inputs)
    from ..outputs.results import tracks_table_files

    tracks_table_files(tracks_table, 0)  # a bad choice is one error before any work
    from ..outputs.figurejobs import prewarm

    # matplotlib's one-time costs (about 1 s) paid in a thread from the binning on, while the compiled
    # kernels (which release the GIL) work; not earlier, where it would slow the start-up and the fits
    warm, ahead = [], []

    def draw_ahead(counted):
        # the spectrum and density figures need only the counts: a child draws them while this process
        # decodes (no fork while the warm-up thread holds matplotlib's locks)
        for t in warm:
            t.join()
        ahead.append(figures_ahead(counted))

    written = []

    def write_ahead(columns, decoded):
        # the tables and arrays need only the final decoding: a child writes them during the statistics
        for t in warm:
            t.join()
        written.append(tables_ahead(columns, decoded, outdir, tracks_table))

    log = _RunLog(progress, on_stage={"binning": lambda: warm.append(prewarm())}, on_counts=draw_ahead,
                  on_decoded=write_ahead)
    rs = RangeSet.from_toml(run.ranges) if run.ranges is not None else None
    prov = {"command_line": command_line, "sample": run.sample, "run_name": run.name,
            "ranges_file": None if run.ranges is None else str(run.ranges)}
    try:
        res = analyze_file(run.ions, run.metals, run.lattice, ranges=rs, options=options or AnalysisOptions(),
                           progress=log, provenance=prov, length_unit=length_unit, position_dataset=position_dataset,
                           mass_dataset=mass_dataset, strict=strict)
    except BaseException:
        for a in ahead + written:
            if a is not None:
                a.discard()
        raise

    def extra(folder):
        (folder / "log.txt").write_text("\n".join(log.lines + [""] + summary_lines(res)) + "\n", encoding="utf-8")

    log("writing", f"{outdir}")
    for t in warm:
        t.join()  # no fork (the table child, the figures' child) while the thread holds matplotlib's locks
    try:
        write_analysis(res, outdir, force=force, extra=extra, progress=log, inputs=list(run.inputs),
                       tracks_table=tracks_table, ahead=ahead[0] if ahead else None,
                       tables=written[0] if written else None)
    finally:
        for a in ahead + written:
            if a is not None:
                a.discard()
    return RunAnalysis(result=res, outdir=outdir, source=run)


def summary_lines(res, verbose: bool = False) -> list:
    """The text summary of an analysis (printed by ``analyze`` and kept in ``log.txt``).

    Parameters
    ----------
    res : AnalysisResult
    verbose : bool
        Add the classification's reasons, the registration and the decoder's fit.

    Returns
    -------
    list of str
        Lines without line ends; fractions are of metal atoms, run lengths in sites.
    """
    c = res.classification
    st = res.statistics
    lines = [f"verdict: {c.label} (along rods: {c.along_rod}; rod to rod: {c.rod_to_rod}; "
             f"confidence {c.confidence:.2f})"]
    d = res.to_dict()
    from ..utils.textformat import format_interval

    lines.append(f"{'metal':6s} {'fraction (spectrum), 95 % interval':>36s} {'mean run (sites), 95 % interval':>34s} "
                 f"{'x independent':>14s}")
    for m in res.metals:
        iv = d["composition_interval"][m] or {}
        f, flo, fhi = d["composition"][m], iv.get("low", float("nan")), iv.get("high", float("nan"))
        r, rlo, rhi = st.interval(f"mean_run_length_sites.{m}")
        ratio = st.estimates.get(f"run_length_ratio.{m}", float("nan"))
        fi = format_interval(flo, fhi, lambda v: f"{v:.3f}")
        ri = format_interval(rlo, rhi, lambda v: f"{v:.2f}")
        lines.append(f"{m:6s} {f'{f:.3f} ({fi})':>36s} {f'{r:.2f} ({ri})':>34s} {ratio:14.2f}")
    per_metal = getattr(c, "per_metal", None) or {}
    if per_metal:
        lines.append("each metal along the rods: " + ", ".join(f"{m} {d['class']}" for m, d in per_metal.items()))
    col = res.columns
    lines.append(f"rods {col.n_rods}, sites used {int(col.mask.sum())}, detection efficiency "
                 f"{res.decoded.eta:.3f}, persistence {st.estimates.get('persistence', float('nan')):.3f}")
    rec = reconstruction_line(col.params.get("reconstruction"))
    if rec:
        lines.append(rec)
    cp = getattr(res, "copies", None)
    if cp is not None and cp.applied:
        lines.append(f"copies: {int(cp.follows.sum())} of {int(res.columns.mask.any(1).sum())} rods follow one master "
                     f"sequence (copy error {cp.copy_error:.3f} +- {cp.copy_error_err:.3f}); their sites are decoded "
                     "from the pooled evidence of every copy")
    for w in res.warnings:
        lines.append(f"warning: {w}")
    if verbose:
        lines.append("reasons:")
        lines.extend(f"  - {r}" for r in c.reasons)
        reg = col.params.get("registration", {})
        if reg:
            lines.append(f"registration: rotation {reg.get('rotation_deg', float('nan')):.3f} +- "
                         f"{reg.get('rotation_deg_err', float('nan')):.3f} deg, scale {reg.get('scale', float('nan')):.4f}"
                         f" +- {reg.get('scale_err', float('nan')):.4f}, tilt {reg.get('tilt_deg', float('nan')):.3f} deg, "
                         f"lateral spread {reg.get('sigma_xy_nm', float('nan')):.3f} nm, misassigned fraction {col.misassigned_fraction:.3f}")
        dec = res.decoded
        lines.append(f"decoder: log-likelihood {dec.loglik:.1f}, {dec.n_iter} EM iterations "
                     f"({'converged' if dec.converged else 'NOT converged'}), LR {dec.lr_stat:.1f} "
                     f"(df {dec.lr_df}), BIC {dec.bic:.1f} vs {dec.bic_indep:.1f} independent")
    lines.append("timings (s): " + ", ".join(f"{k} {v:.2f}" for k, v in res.timings_s.items()))
    return lines


def reconstruction_line(rec) -> str:
    """One line on the reconstruction's calibration ("" when there is no record)."""
    if not rec:
        return ""
    d, lat = rec.get("depth") or {}, rec.get("lateral") or {}
    if not rec.get("applied") and not d:
        return "reconstruction: used as in the file (--as-reconstructed)" if rec.get("asked") is False else ""
    parts = []
    if d.get("calibrated"):
        parts.append(f"depth scale {d['mean_depth_scale']:.4f} +- {d.get('mean_depth_scale_err') or 0:.4f} "
                     f"(calibrated on the site pitch), plane sag at the outline {round(d.get('sag_at_radius_nm') or 0, 3) + 0.0:.3f} nm")
    else:
        parts.append(f"depth not calibrated ({d.get('reason', 'not asked for')})")
    if lat.get("applied"):
        parts.append(f"magnification change {100 * lat.get('magnification_change', 0):.1f} % over the depth (corrected)")
    return "reconstruction: " + "; ".join(parts)


# ---------------------------------------------------------------------- a batch of runs
def run_folders(folder) -> list:
    """The run folders (sub-folders holding ``run.toml``) of ``folder``, sorted by name."""
    from .runinfo import DESCRIPTION_NAME

    return sorted(p for p in Path(folder).iterdir() if p.is_dir() and (p / DESCRIPTION_NAME).is_file())


@dataclass(frozen=True)
class BatchOutcome:
    """How one run of a batch went.

    Attributes
    ----------
    run : str
        The run folder's name (also the name of its output folder).
    outdir : Path
        Its output folder (written only when ``ok``).
    ok : bool
    label : str or None
        The arrangement found (when ``ok``).
    confidence : float or None
        Confidence of the label, in [0, 1] (when ``ok``).
    reasons : tuple of str
        Why the label was given (when ``ok``).
    warnings : tuple of str
        Data-quality and other warnings, one line each.
    error : str or None
        Why the run failed, one line (when not ``ok``).
    seconds : float, s
        Wall time of the run.
    """

    run: str
    outdir: Path
    ok: bool
    label: Optional[str] = None
    confidence: Optional[float] = None
    reasons: tuple = ()
    warnings: tuple = ()
    error: Optional[str] = None
    seconds: float = 0.0


def _one_line(text: str) -> str:
    return " ".join(str(text).split())


def _batch_job(job: tuple) -> BatchOutcome:
    """Analyse one run folder of a batch (in a worker process); never raises but on an interrupt."""
    sub, outdir, kwargs = job
    t0 = time.perf_counter()
    caught = []
    try:
        with warnings.catch_warnings(record=True) as wlist:
            warnings.simplefilter("always")
            try:
                ra = analyze_run(sub, outdir, **kwargs)
            finally:
                caught = [_one_line(str(w.message).splitlines()[0]) if str(w.message) else w.category.__name__
                          for w in wlist]
    except ProbeseqError as e:
        return BatchOutcome(run=sub.name, outdir=outdir, ok=False, error=_one_line(e),
                            warnings=tuple(dict.fromkeys(caught)), seconds=time.perf_counter() - t0)
    except MemoryError:
        return BatchOutcome(run=sub.name, outdir=outdir, ok=False, error="out of memory",
                            warnings=tuple(dict.fromkeys(caught)), seconds=time.perf_counter() - t0)
    except Exception as e:  # one run's unexpected failure must not stop the others
        return BatchOutcome(run=sub.name, outdir=outdir, ok=False,
                            error=f"internal error ({type(e).__name__}: {_one_line(e)})",
                            warnings=tuple(dict.fromkeys(caught)), seconds=time.perf_counter() - t0)
    c = ra.result.classification
    return BatchOutcome(run=sub.name, outdir=outdir, ok=True, label=c.label, confidence=float(c.confidence),
                        reasons=tuple(c.reasons), warnings=tuple(dict.fromkeys(caught + list(ra.result.warnings))),
                        seconds=time.perf_counter() - t0)


def analyze_batch(folder, out, *, options=None, metals=None, lattice=None, a: float | None = None,
                  repeat: float | None = None, sites_per_repeat: int | None = None, ranges=None,
                  length_unit: str | None = None, position_dataset: str | None = None,
                  mass_dataset: str | None = None, strict: bool = False, allow_outside: bool = False,
                  force: bool = False, workers: int | None = None, scheduler: str | None = None,
                  progress: Optional[Callable[[BatchOutcome], None]] = None,
                  started: Optional[Callable] = None, command_line: str | None = None,
                  tracks_table: str = "auto") -> list:
    """Analyse every run folder of ``folder`` into ``out/<run folder name>``, one task per run.

    Each run goes through :func:`analyze_run` with the same options, which take precedence over
    each ``run.toml``. A run that fails is recorded with its one-line reason and the others go
    on; a run whose worker process dies is run once more, then recorded as failed. ``out`` is
    checked before any work (it may neither be nor contain the batch folder or a run folder) and
    is made only when the first run's results are complete. The options (and a lattice or range
    file given) are checked once, before any run starts. Each run's results depend on its run
    folder and the options alone (the seed is in ``options``), never on the workers.

    Parameters
    ----------
    folder : str or Path
        Folder whose sub-folders holding ``run.toml`` are the runs.
    out : str or Path
        Output folder of the batch.
    options, metals, lattice, a, repeat, sites_per_repeat, ranges, length_unit, position_dataset, mass_dataset, strict, allow_outside, force, command_line, tracks_table
        As for :func:`analyze_run`, for every run.
    workers : int, optional
        Local worker processes (at most the number of processors and of runs; ignored with a
        scheduler). Default: ``n_jobs`` of :func:`probeseq.runtime.configure` (the command line's
        ``--jobs``) when set, else one per core on a local dask cluster, or
        :data:`DEFAULT_WORKERS` processes without dask; each worker's compiled kernels then use
        its share of the cores (of ``n_jobs`` when set).
    scheduler : str, optional
        Address of a running dask scheduler (``tcp://HOST:PORT``) to send the runs to; default:
        the environment variable ``PROBESEQ_SCHEDULER``, else a local cluster (see
        :func:`probeseq.study.cluster.run_tasks`). Its workers need probeseq and the same paths;
        the paths are sent absolute.
    progress : callable, optional
        Called with each :class:`BatchOutcome` as its run finishes (in the order they finish).
    started : callable, optional
        Called as ``started(n_runs, where)`` (``where`` a :class:`probeseq.study.cluster.Workers`:
        ``where.count`` runs at a time, ``str(where)`` says where) once the checks have passed and
        the workers are ready, before the first run.

    Returns
    -------
    list of BatchOutcome
        One per run folder, sorted by folder name.

    Raises
    ------
    InputError
        No run folder, an unusable ``out``, or a bad option (before any run starts); a scheduler
        named without dask installed, malformed, unreachable or without workers (see
        :func:`probeseq.study.cluster.run_tasks`).
    """
    from ..lattice.model import Lattice
    from ..outputs.folder import check_outdir
    from ..pipeline.options import AnalysisOptions
    from ..ranging.ranges import RangeSet
    from .cluster import run_tasks, scheduler_address

    src = Path(folder)
    if not src.is_dir():
        raise InputError(f"batch folder not found: {src}")
    subs = run_folders(src)
    if not subs:
        raise InputError(f"{src}: holds no run folder (a sub-folder with run.toml)")
    out = Path(out)
    check_outdir(out, force, [src, *subs, *([Path(ranges)] if ranges is not None else []), *_lattice_file(lattice)])
    # one error before any work, not one failure per run
    from ..outputs.results import tracks_table_files

    tracks_table_files(tracks_table, 0)
    metals = _metal_tuple(metals)
    if lattice is not None:
        _build_lattice(lattice, a, repeat, sites_per_repeat, "--lattice")
    if ranges is not None:
        RangeSet.from_toml(ranges)
    if workers is not None and (isinstance(workers, bool) or not isinstance(workers, int) or workers < 1):
        raise InputError(f"workers must be a positive integer, got {workers!r}")
    remote = scheduler_address(scheduler)[0] is not None

    def sent(path):  # a worker elsewhere has another working folder
        return None if path is None else (Path(path).absolute() if remote else path)

    if isinstance(lattice, (Lattice, type(None))):
        lat = lattice
    else:
        lat = str(sent(lattice)) if _lattice_file(lattice) else str(lattice)
    kwargs = dict(options=options or AnalysisOptions(), metals=metals, lattice=lat, a=a,
                  repeat=repeat, sites_per_repeat=sites_per_repeat, ranges=sent(ranges), length_unit=length_unit,
                  position_dataset=position_dataset, mass_dataset=mass_dataset, strict=strict,
                  allow_outside=allow_outside, force=force, command_line=command_line, tracks_table=tracks_table)
    jobs = [(sent(sub), sent(out / sub.name), kwargs) for sub in subs]

    def lost(i, reason):
        return BatchOutcome(run=subs[i].name, outdir=jobs[i][1], ok=False, error=reason)

    return run_tasks(_batch_job, jobs, lost=lost, scheduler=scheduler, workers=workers, pool_default=DEFAULT_WORKERS,
                     names=[sub.name for sub in subs], started=None if started is None else
                     (lambda where: started(len(jobs), where)),
                     done=None if progress is None else (lambda i, outcome: progress(outcome)))
