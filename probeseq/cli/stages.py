"""CLI commands of the pipeline stages (ranging, columns, decoding, analysis), joined to ``app``.

``app`` and the shared helpers come from :mod:`probeseq.cli.common`; this module never imports
:mod:`probeseq.cli`, which loads it when a command runs (one-way dependency, no import cycle).

Each command is a thin wrapper: parse, call one library function, write, summarise.
"""

from __future__ import annotations

import io
import os
import shlex
import sys
import time
from pathlib import Path
from typing import Annotated, Optional

import typer

from ..exceptions import InputError
from ..utils.marks import figure_metadata
from .common import _STATE, app, deprecated_option, renamed, say, split_list

# ---------------------------------------------------------------------- shared options
#: what --help gives as the default of --length-unit (the readers' rule)
LENGTH_UNIT_DEFAULT = "nm; an HDF5 file's length_unit attribute when it has one"


LengthUnit = Annotated[Optional[str], typer.Option(metavar="UNIT", show_default=LENGTH_UNIT_DEFAULT,
                                                   help="nm | angstrom: unit of the positions in the ion file.")]


PosDataset = Annotated[Optional[str], typer.Option(help="HDF5 path of an N x 3 position dataset (other layouts).")]


MassDataset = Annotated[Optional[str], typer.Option(help="HDF5 path of the mass-to-charge dataset (other layouts).")]


Strict = Annotated[bool, typer.Option(help="Treat NaN/inf or non-positive mass-to-charge rows as an error.")]


Metals = Annotated[Optional[str], typer.Option(metavar="A,B", help="Comma-separated metal symbols, e.g. Co,Zn.")]


LatticeOpt = Annotated[Optional[str], typer.Option(metavar="FILE|PRESET", help="Lattice TOML file, or a preset: "
                                                                               "honeycomb | triangular | square.")]


AOpt = Annotated[Optional[float], typer.Option("--a", help="Cell edge a, nm (with a preset).")]


RepeatOpt = Annotated[Optional[float], typer.Option(help="Repeat along the rod, nm (with a preset).")]


SitesOpt = Annotated[int, typer.Option(help="Metal sites per repeat (with a preset).")]


RangesOpt = Annotated[Optional[Path], typer.Option(help="Range file (TOML) to use instead of automatic ranging.")]


Quiet = Annotated[bool, typer.Option("--quiet", "-q", help="Print nothing but errors.")]


Verbose = Annotated[bool, typer.Option("--verbose", "-v", help="Print more detail.")]


Force = Annotated[bool, typer.Option(help="Replace an existing output that probeseq wrote (only once the new one is "
                                            "complete; files probeseq did not write are never replaced).")]


ForceFile = Annotated[bool, typer.Option(help="Replace an existing output file that probeseq wrote.")]


SchedulerOpt = Annotated[Optional[str], typer.Option(
    metavar="ADDRESS", help="A running dask scheduler (tcp://HOST:PORT) to send the runs to, one task per run; "
                            "default: the environment variable PROBESEQ_SCHEDULER, else a local dask cluster "
                            "with one worker per core (local processes without dask; pip install "
                            "probeseq[cluster]).")]


def _command_line() -> str:
    return "probeseq " + " ".join(shlex.quote(a) for a in sys.argv[1:])


def _lattice_inputs(spec) -> list:
    """The lattice file named by ``--lattice``, if it is a file (not a preset)."""
    return [Path(spec)] if spec is not None and str(spec).lower().endswith(".toml") else []


def _parse_offset(text: Optional[str]):
    if text is None:
        return None
    try:
        vals = [float(v) for v in split_list(text, "--offset-nm")]
    except ValueError:
        raise InputError(f"--offset-nm: '{text}' is not two numbers 'x,y' (nm)") from None
    if len(vals) != 2:
        raise InputError(f"--offset-nm takes two numbers 'x,y' in nm, got {len(vals)}")
    return tuple(vals)


def _lattice(spec, a, repeat, sites_per_repeat):
    from ..lattice.model import Lattice

    if spec is None:
        raise InputError("--lattice is required (a lattice TOML file or a preset name)")
    return Lattice.from_spec(spec, a=a, repeat=repeat, sites_per_repeat=sites_per_repeat)


def _metals(text):
    """--metals as a tuple of element symbols, checked before any file is read."""
    from ..ranging.isotopes import check_metals

    mets = split_list(text, "--metals")
    if len(mets) < 2:
        raise InputError("--metals needs at least two metals, e.g. --metals Co,Zn")
    return check_metals(mets, "--metals")


#: a stage's live line shows its time left once this fraction is done and ...
ETA_MIN_FRACTION = 0.02


#: ... this many seconds have passed since it started
ETA_MIN_SECONDS = 1.0


def _duration(seconds: float, precise: bool = False) -> str:
    """Elapsed time for a progress line: ``42 s`` (``4.2 s`` when ``precise`` and under 10 s),
    ``3 min 05 s`` above 90 s, ``2 h 05 min`` above 90 min."""
    s = max(0.0, float(seconds))
    if precise and s < 10:
        return f"{s:.1f} s"
    if s < 90:
        return f"{s:.0f} s"
    if s < 5400:
        m, r = divmod(int(round(s)), 60)
        return f"{m} min {r:02d} s"
    h, m = divmod(int(round(s / 60)), 60)
    return f"{h} h {m:02d} min"


def _about(seconds: float) -> str:
    """A time left, rounded as far as an estimate deserves: whole seconds under 10 s, 5 s steps
    to 90 s, whole minutes to 90 min, tenths of an hour beyond."""
    s = max(0.0, float(seconds))
    if s < 9.5:
        return f"{max(1, round(s))} s"
    if s < 90:
        return f"{5 * max(2, round(s / 5))} s"
    if s < 5400:
        return f"{max(2, round(s / 60))} min"
    return f"{s / 3600:.1f} h"


def live_status(elapsed: float, fraction: Optional[float], sep: str = "\u00b7") -> str:
    """The live end of a stage's progress line on a terminal.

    Parameters
    ----------
    elapsed : float, s
        Time since the stage started.
    fraction : float in [0, 1] or None
        How far the stage is (None: it has not said).
    sep : str
        Between the percentage and the elapsed time.

    Returns
    -------
    str
        `` (3 s)`` without a fraction; with one, the percentage done, ``sep`` and the elapsed
        time, then the time left ``elapsed * (1 - fraction) / fraction`` once at least
        :data:`ETA_MIN_FRACTION` is done and :data:`ETA_MIN_SECONDS` have passed, as in
        ``  40 % - 2 s, about 3 s left`` (:func:`_about` rounds it).
    """
    if fraction is None:
        return f" ({_duration(elapsed)})"
    f = min(1.0, max(0.0, float(fraction)))
    text = f"  {int(100 * f + 1e-9)} % {sep} {_duration(elapsed)}"
    if ETA_MIN_FRACTION <= f < 1 and elapsed >= ETA_MIN_SECONDS:
        text += f", about {_about(elapsed * (1 - f) / f)} left"
    return text


def _separator(stream) -> str:
    """A middle dot when the stream's encoding has one, else a hyphen."""
    try:
        "\u00b7".encode(getattr(stream, "encoding", None) or "ascii")
        return "\u00b7"
    except (LookupError, UnicodeError):
        return "-"


def _fit_width(line: str, status: str, width: int) -> str:
    """``line + status`` cut to ``width - 1`` characters (the message shortened first, so the
    status stays in view); as it is when ``width`` is unknown (0)."""
    text = line + status
    if width <= 0 or len(text) < width:
        return text
    room = width - 1 - len(status)
    if room >= 24:
        return line[:room - 3] + "..." + status
    return text[:width - 1]


class _Reporter:
    """Progress lines on standard error (unless quiet); ``log.txt`` keeps its own copy
    (:func:`probeseq.study.batch.analyze_run`).

    Each stage prints one line ``[   3.1 s] stage: message`` when it starts. Off a terminal (a
    log file, a pipe) that is all. On a terminal a ticker redraws the current stage's line with
    its elapsed time and, once the stage reports how far it is (:meth:`advance`, the progress
    protocol of :mod:`probeseq.pipeline.options`), the percentage done and an estimate of the time
    left (:func:`live_status`); when the next stage starts, the line is left with the stage's
    elapsed time.

    Parameters
    ----------
    quiet : bool
        Write nothing.
    verbose : bool
        Kept for the caller's summary; the progress lines are the same.
    stream : text stream, optional
        Where to write; default ``sys.stderr`` as it is when the reporter is made. The live line is
        drawn only when ``stream.isatty()``.
    clock : callable, optional
        Seconds of a monotonic clock (default :func:`time.perf_counter`).
    tick_s : float, s
        Interval between redraws of the live line.
    """

    def __init__(self, quiet: bool, verbose: bool, *, stream=None, clock=None, tick_s: float = 0.5):
        import threading

        self.quiet, self.verbose = quiet, verbose
        self.stream = sys.stderr if stream is None else stream
        self._now = clock or time.perf_counter
        self.tick_s = float(tick_s)
        self.t0 = self._now()
        self._tty = (not quiet) and bool(getattr(self.stream, "isatty", lambda: False)())
        self._sep = _separator(self.stream)
        self._current = None  # [stage, line, start (clock s), fraction or None]
        self._lock = threading.Lock()
        self._stop = threading.Event()
        self._thread = None

    def _tick(self):
        while not self._stop.wait(self.tick_s):
            self.redraw()

    def _width(self) -> int:
        try:
            return os.get_terminal_size(self.stream.fileno()).columns
        except (AttributeError, OSError, ValueError, io.UnsupportedOperation):
            return 0

    def _draw(self, status: str):
        """Redraw the current stage's line ending in ``status`` (lock held, terminal only)."""
        self.stream.write("\r\x1b[K" + _fit_width(self._current[1], status, self._width()))
        self.stream.flush()

    def redraw(self):
        """Redraw the current stage's live line (what the ticker does; nothing off a terminal)."""
        with self._lock:
            if self._tty and self._current is not None:
                _, _, start, fraction = self._current
                self._draw(live_status(self._now() - start, fraction, self._sep))

    def _close_line(self):
        """Leave the current stage's line with its elapsed time and end it (lock held)."""
        if self._tty and self._current is not None:
            self._draw(f" ({_duration(self._now() - self._current[2], precise=True)})")
            self.stream.write("\n")
        self._current = None

    def __call__(self, stage: str, message: str):
        line = f"[{self._now() - self.t0:7.1f} s] {stage}: {message}"
        if self.quiet:
            return
        with self._lock:
            if self._tty:
                self._close_line()
                self._current = [stage, line, self._now(), None]
                self._draw("")  # cut to the terminal's width, so that a redraw overwrites all of it
                if self._thread is None:
                    import threading

                    self._thread = threading.Thread(target=self._tick, daemon=True)
                    self._thread.start()
            else:
                self.stream.write(line + "\n")
            self.stream.flush()

    def advance(self, stage: str, done: int, total: int):
        """``done`` of ``total`` units of ``stage`` are done: shown on the stage's live line at the
        next redraw (terminal only; ignored for a stage other than the current one)."""
        if not self._tty or total <= 0:
            return
        with self._lock:
            if self._current is not None and self._current[0] == stage:
                self._current[3] = min(1.0, max(0.0, done / total))

    def done(self):
        """End the ticker (call before printing the summary)."""
        self._stop.set()
        with self._lock:
            self._close_line()
            if self._tty:
                self.stream.flush()


# ---------------------------------------------------------------------- range
@app.command("range")
def range_cmd(
    ions: Annotated[Path, typer.Argument(help="Ion file (.csv, .tsv, .txt, .h5).")],
    metals: Metals = None,
    species: Annotated[Optional[str], typer.Option(help="Comma-separated framework ions to predict instead of the "
                                                        "defaults, e.g. CO,H2O,C++ (one + per charge).")] = None,
    out: Annotated[Path, typer.Option(help="Range file (TOML) to write.")] = Path("ranges.toml"),
    figure: Annotated[Optional[Path], typer.Option(help="Spectrum figure to write (.png or .svg).")] = None,
    ranges: RangesOpt = None,
    length_unit: LengthUnit = None, position_dataset: PosDataset = None, mass_dataset: MassDataset = None,
    strict: Strict = False, force: ForceFile = False, quiet: Quiet = False,
):
    """Range the mass spectrum: find peaks, match ions, calibrate, and write an editable range file."""
    from ..outputs.folder import check_outfile, staged_file
    from ..pipeline.stages import range_file
    from ..ranging.ranges import RangeSet

    _STATE["quiet"] = quiet
    inputs = [ions, ranges]
    check_outfile(out, force, inputs)
    figures = _figure_pair(figure)
    for f in figures:
        check_outfile(f, force, inputs + [out], what="--figure")
    mets = _metals(metals)
    given = RangeSet.from_toml(ranges) if ranges is not None else None
    # the ranging of 'analyze': the same sample of the file, ranged by the same call
    rr, _ = range_file(ions, mets, species=split_list(species, "--species") or None, ranges=given,
                       length_unit=length_unit, position_dataset=position_dataset, mass_dataset=mass_dataset,
                       strict=strict)
    with staged_file(out, force, inputs) as part:
        rr.to_toml(part)
    say(f"wrote {out}: {len(rr.ranges)} ranges")
    d = rr.to_dict()
    comp = d.get("composition", {})
    for m in mets:
        c = comp.get(m, {})
        if c:
            say(f"  {m:3s} {100 * c['fraction']:6.2f} % +- {100 * c['fraction_err']:.2f} % (atomic, of metal atoms)")
    if len(rr.unmatched):
        say(f"  {len(rr.unmatched)} strong peaks unmatched (left unranged): " + "; ".join(rr.unmatched_nearest[:6]))
    if figures:
        import matplotlib.pyplot as plt

        from ..ranging.plot import plot_ranging

        fig = plot_ranging(rr)
        try:
            for f in figures:
                with staged_file(f, force, inputs + [out], what="--figure") as part:
                    fig.savefig(part, dpi=150, format=f.suffix[1:], metadata=figure_metadata(f))
        finally:
            plt.close(fig)
        say(f"wrote {' and '.join(map(str, figures))}")


def _figure_pair(figure) -> list:
    """``--figure X.png`` (or ``.svg``, or no suffix) writes ``X.png`` and ``X.svg``."""
    if figure is None:
        return []
    p = Path(figure)
    if p.suffix.lower() not in ("", ".png", ".svg"):
        raise InputError(f"--figure {p}: expected a .png or .svg name (both are written)")
    stem = p.with_suffix("") if p.suffix else p
    return [stem.with_name(stem.name + ".png"), stem.with_name(stem.name + ".svg")]


# ---------------------------------------------------------------------- columns
@app.command()
def columns(
    ions: Annotated[Path, typer.Argument(help="Ion file (.csv, .tsv, .txt, .h5).")],
    metals: Metals = None,
    lattice: LatticeOpt = None, a: AOpt = None, repeat: RepeatOpt = None, sites_per_repeat: SitesOpt = 3,
    ranges: RangesOpt = None,
    out: Annotated[Path, typer.Option(help="Output folder.")] = Path("columns_out"),
    rotation_deg: Annotated[Optional[float], typer.Option(help="Fix the lattice rotation, degrees.")] = None,
    scale: Annotated[Optional[float], typer.Option(help="Fix the lateral scale (reconstruction / crystal).")] = None,
    offset_nm: Annotated[Optional[str], typer.Option(help="Fix the lattice offset 'x,y', nm.")] = None,
    seed: Annotated[int, typer.Option(help="Random seed.")] = 0,
    as_reconstructed: Annotated[bool, typer.Option(help="Use the file's positions as they are: no calibration "
                                                        "of the depth scale, plane curvature and lateral "
                                                        "magnification on the lattice.")] = False,
    drawn_metals: Annotated[bool, typer.Option(help="Decode one metal drawn per ion by its range's shares "
                                                    "instead of each ion's soft evidence (its range's shares "
                                                    "and its distance to the rod axis).")] = False,
    length_unit: LengthUnit = None, position_dataset: PosDataset = None, mass_dataset: MassDataset = None,
    strict: Strict = False, force: Force = False, quiet: Quiet = False,
):
    """Register the rod lattice and cut the rods into sites: writes columns.h5, registration.json, a figure."""
    from ..lattice.rodcolumns import save_columns
    from ..outputs.folder import check_outdir, staged_outdir, write_json
    from ..pipeline.analysis import write_density_figure
    from ..pipeline.options import AnalysisOptions
    from ..pipeline.stages import count_file
    from ..ranging.ranges import RangeSet

    _STATE["quiet"] = quiet
    inputs = [ions, ranges, *_lattice_inputs(lattice)]
    check_outdir(out, force, inputs)
    mets = _metals(metals)
    lat = _lattice(lattice, a, repeat, sites_per_repeat)
    opts = AnalysisOptions(seed=seed, rotation_deg=rotation_deg, scale=scale, offset_nm=_parse_offset(offset_nm),
                           correct_reconstruction=not as_reconstructed, soft_evidence=not drawn_metals)
    given = RangeSet.from_toml(ranges) if ranges is not None else None
    # the count stage of 'analyze': sample, ranging, visibility, registration, fused pass (counts, soft evidence)
    counted = count_file(ions, mets, lat, ranges=given, options=opts, length_unit=length_unit,
                         position_dataset=position_dataset, mass_dataset=mass_dataset, strict=strict)
    cols, rr = counted.columns, counted.ranging
    with staged_outdir(out, force=force, inputs=inputs, command=_command_line()) as st:
        save_columns(cols, st / "columns.h5")
        write_json(st / "registration.json", {"resolvable": cols.resolvable, "misassigned_fraction": cols.misassigned_fraction,
                                              "n_rods": cols.n_rods, "n_sites": cols.n_sites, **cols.params})
        rr.to_toml(st / "ranges.toml")
        write_density_figure(counted.figure_ions, rr, cols, st / "density.png")
    reg = cols.params.get("registration", {})
    say(f"wrote {out}: {cols.n_rods} rods x {cols.n_sites} sites ({int(cols.mask.sum())} used)")
    if reg:
        say(f"  rotation {reg.get('rotation_deg', float('nan')):.2f} deg, scale {reg.get('scale', float('nan')):.4f}, "
            f"lateral spread {reg.get('sigma_xy_nm', float('nan')):.3f} nm")
    say(f"  misassigned fraction {cols.misassigned_fraction:.3f} (a rod's ions expected nearer another rod): single rods {'resolvable' if cols.resolvable else 'NOT resolvable'}")
    from ..study.batch import reconstruction_line

    rec = reconstruction_line(cols.params.get("reconstruction"))
    if rec:
        say(f"  {rec}")


# ---------------------------------------------------------------------- decode
@app.command()
def decode(
    columns_dir: Annotated[Path, typer.Argument(help="Folder written by 'probeseq columns'.")],
    out: Annotated[Path, typer.Option(help="Output folder.")] = Path("decode_out"),
    n_starts: Annotated[int, typer.Option(help="EM starts.")] = 4,
    seed: Annotated[int, typer.Option(help="Random seed.")] = 0,
    force: Force = False, quiet: Quiet = False,
):
    """Fit the hidden Markov model to every rod and decode the metal sequences."""
    from ..lattice.rodcolumns import load_columns
    from ..outputs.folder import check_outdir, staged_outdir, write_json
    from ..pipeline.options import AnalysisOptions
    from ..pipeline.stages import decode_stage, pool_copies

    _STATE["quiet"] = quiet
    opts = AnalysisOptions(seed=seed, n_starts=n_starts)
    check_outdir(out, force, [columns_dir])
    cols = load_columns(Path(columns_dir) / "columns.h5")
    # the decoding stage of 'analyze' (and its groups-of-rods analysis when rods are not resolvable),
    # then its copy stage: rods that copy one master sequence pooled
    dec, groups = decode_stage(cols, opts)
    dec, copies = pool_copies(cols, dec)
    with staged_outdir(out, force=force, inputs=[columns_dir], command=_command_line()) as st:
        write_json(st / "decoding.json", {"decoding": dec.to_dict(),
                                          "groups": None if groups is None else groups.to_dict(),
                                          "copies": None if copies is None else copies.to_dict()})
        _write_decoded_tables(st, cols, dec)
    say(f"wrote {out}: {cols.n_rods} rods decoded; log-likelihood {dec.loglik:.1f}, "
        f"detection efficiency {dec.eta:.3f}, persistence {dec.persistence:.3f}")
    say(f"  independent sites: likelihood-ratio {dec.lr_stat:.1f} (df {dec.lr_df}), p = {dec.lr_pvalue:.3g}; "
        f"BIC {dec.bic:.1f} vs {dec.bic_indep:.1f}")


def _write_decoded_tables(folder, cols, dec):
    """The tracks table, ``runs.csv`` and ``decoded.h5`` (paths, posteriors, flags), as 'analyze' writes
    them with ``--tracks-table auto``."""
    from ..outputs.results import (RUNS_COLUMNS, RUNS_FORMATS, _write_table, runs_table, save_decoded,
                                   tracks_table_files, write_tracks, write_tracks_h5)

    files = tracks_table_files("auto", int(cols.mask.sum()))
    if "tracks.csv" in files:
        write_tracks(folder / "tracks.csv", cols, dec)
    else:
        write_tracks_h5(folder / "tracks.h5", cols, dec)
    _write_table(folder / "runs.csv", runs_table(cols, dec), RUNS_COLUMNS, RUNS_FORMATS)
    save_decoded(dec, folder / "decoded.h5")


# ---------------------------------------------------------------------- analyze
SitesOrRunOpt = Annotated[Optional[int], typer.Option("--sites-per-repeat", help="Metal sites per repeat (with a "
                                                                                 "preset; default 3).")]


@app.command()
def analyze(
    ions: Annotated[Path, typer.Argument(help="Ion file (.csv, .tsv, .txt, .h5), a run folder holding the "
                                              "ion file and run.toml, or a batch folder of run folders.")],
    metals: Metals = None,
    lattice: LatticeOpt = None, a: AOpt = None, repeat: RepeatOpt = None, sites_per_repeat: SitesOrRunOpt = None,
    out: Annotated[Optional[Path], typer.Option(help="Output folder (default: analysis_<name>); for a batch, "
                                                     "the folder of the runs' output folders.")] = None,
    ranges: RangesOpt = None,
    seed: Annotated[int, typer.Option(help="Random seed; the same seed gives the same results.")] = 0,
    long_block_sites: Annotated[float, typer.Option(help="Mean run length (sites) of the least abundant metal at "
                                                         "or over which runs are long blocks.")] = 8.0,
    alpha: Annotated[float, typer.Option(help="Significance level of the tests.")] = 0.01,
    copy_threshold: Annotated[float, typer.Option(help="Neighbouring-rod correlation at or over which "
                                                       "(if significant) rods are copied.")] = 0.3,
    n_boot: Annotated[int, typer.Option(help="Bootstrap resamples over rods.")] = 200,
    n_starts: Annotated[int, typer.Option(help="EM starts of the decoder.")] = 4,
    rotation_deg: Annotated[Optional[float], typer.Option(help="Fix the lattice rotation, degrees.")] = None,
    scale: Annotated[Optional[float], typer.Option(help="Fix the lateral scale (reconstruction / crystal).")] = None,
    offset_nm: Annotated[Optional[str], typer.Option(help="Fix the lattice offset 'x,y', nm.")] = None,
    as_reconstructed: Annotated[bool, typer.Option(help="Use the file's positions as they are: no calibration "
                                                        "of the depth scale, plane curvature and lateral "
                                                        "magnification on the lattice.")] = False,
    drawn_metals: Annotated[bool, typer.Option(help="Decode one metal drawn per ion by its range's shares "
                                                    "instead of each ion's soft evidence (its range's shares "
                                                    "and its distance to the rod axis).")] = False,
    length_unit: LengthUnit = None, position_dataset: PosDataset = None, mass_dataset: MassDataset = None,
    allow_outside: Annotated[bool, typer.Option(help="Let a run folder's run.toml name files outside the run "
                                                     "folder (refused by default).")] = False,
    tracks_table: Annotated[str, typer.Option(metavar="auto|csv|hdf5|both",
                                              help="How the tracks table (one row per decoded site) is written: "
                                                   "auto = tracks.csv up to 2,000,000 sites, tracks.h5 (the same "
                                                   "columns in HDF5) above; 'probeseq export OUTDIR --format csv' "
                                                   "writes the CSV at any time.")] = "auto",
    strict: Strict = False, force: Force = False, quiet: Quiet = False, verbose: Verbose = False,
    scheduler: SchedulerOpt = None,
):
    """Run the whole analysis: ranging, columns, decoding, statistics and classification; also for a batch.

    IONS may be an ion file, a run folder (the ion file plus run.toml), or a batch folder: a
    folder of run folders, each analysed into OUT/<run folder name> with the same options, which
    take precedence over each run.toml, one task per run on a local dask cluster or the
    --scheduler's. A batch shows its progress on a terminal, prints a summary line per run and
    exits with 1 if any run failed; the others are still written.
    """
    from ..pipeline.options import AnalysisOptions
    from ..study.batch import analyze_run, run_folders, summary_lines
    from ..study.runinfo import safe_file_name

    _STATE["quiet"] = quiet
    # options first: a bad value is one error before any work, not one failure per run of a batch
    opts = AnalysisOptions(seed=seed, n_starts=n_starts, n_boot=n_boot, long_block_sites=long_block_sites,
                           alpha=alpha, copy_threshold=copy_threshold, rotation_deg=rotation_deg, scale=scale,
                           offset_nm=_parse_offset(offset_nm), correct_reconstruction=not as_reconstructed,
                           soft_evidence=not drawn_metals)
    mets = _metals(metals) if metals is not None else None
    common = dict(options=opts, metals=mets, lattice=lattice, a=a, repeat=repeat, sites_per_repeat=sites_per_repeat,
                  ranges=ranges, length_unit=length_unit, position_dataset=position_dataset,
                  mass_dataset=mass_dataset, strict=strict, allow_outside=allow_outside, force=force,
                  command_line=_command_line(), tracks_table=tracks_table)
    src = Path(ions)
    if src.is_dir() and not (src / "run.toml").exists() and run_folders(src):
        batch_out = Path(out) if out is not None else Path(f"analysis_{safe_file_name(src.resolve().name)}")
        return _batch(src, batch_out, common, verbose, scheduler)
    if scheduler is not None:
        sys.stderr.write("note: --scheduler is for a batch folder of run folders; this single run is analysed "
                         "here\n")
    rep = _Reporter(quiet, verbose)
    try:
        ra = analyze_run(src, out, progress=rep, **common)
    finally:
        rep.done()
    for line in summary_lines(ra.result, verbose=verbose):
        say(line)
    if not (ra.outdir / "tracks.csv").exists():
        say(f"tracks table: {ra.outdir / 'tracks.h5'} (HDF5, {int(ra.result.columns.mask.sum()):,} decoded sites); "
            f"'probeseq export {ra.outdir} --format csv' writes it as CSV")


def _batch(src: Path, out: Path, common: dict, verbose: bool, scheduler: Optional[str]):
    """Analyse a batch folder with :func:`probeseq.study.batch.analyze_batch`: progress on a
    terminal, then one summary line per run."""
    from ..study.batch import analyze_batch
    from .progress import RunProgress, batch_summary

    live = RunProgress(_STATE["quiet"])

    def start(n_runs, where):
        say(f"analysing {n_runs} run folders of {src} on {where} into {out}")
        live.started(n_runs, where)

    try:
        outcomes = analyze_batch(src, out, progress=lambda o: live.finished(o.ok, o.run, o.error), started=start,
                                 scheduler=scheduler, **common)
    finally:
        live.close()
    batch_summary(outcomes, out, time.perf_counter() - live.t0, verbose)
    failed = [o for o in outcomes if not o.ok]
    if failed:
        where = "" if _STATE["quiet"] else "; reasons in the summary above"
        rest = "no run was written" if len(failed) == len(outcomes) else f"the others were written to {out}"
        raise InputError(f"{len(failed)} of {len(outcomes)} runs failed ({', '.join(o.run for o in failed[:5])}"
                         f"{', ...' if len(failed) > 5 else ''}{where}); {rest}")


# ---------------------------------------------------------------------- compare
@app.command()
def compare(
    outdirs: Annotated[list[Path], typer.Argument(help="Analysis output folders, or folders holding them.")],
    by: Annotated[str, typer.Option(help="Metadata field ([sample] of run.toml) to order the runs by.")] =
        "synthesis_temperature_c",
    out: Annotated[Path, typer.Option(help="Output folder for comparison.csv, comparison.json and the figure.")] =
        Path("comparison"),
    seed: Annotated[int, typer.Option(help="Random seed of the difference tests.")] = 0,
    force: Force = False, quiet: Quiet = False,
):
    """Compare analysed runs: statistics with intervals ordered by a metadata field, and difference tests."""
    from ..outputs.folder import check_outdir, staged_outdir, write_json
    from ..outputs.results import _write_table
    from ..study.compare import compare_runs, load_runs, plot_comparison

    _STATE["quiet"] = quiet
    check_outdir(out, force, outdirs)
    records = load_runs(outdirs)
    inputs = [*outdirs, *(r.folder for r in records)]
    check_outdir(out, force, inputs)
    comp = compare_runs(records, order_by=by, random_state=seed)
    rows = comp.table_rows()
    cols = ("run", "order_value", "label", "statistic", "estimate", "low", "high")
    table = {c: [r[c] if r[c] is not None else "" for r in rows] for c in cols}
    with staged_outdir(out, force=force, inputs=inputs, command=_command_line()) as st:
        _write_table(st / "comparison.csv", table, cols)
        dcols = ("run_a", "run_b", "statistic", "difference", "low", "high", "p_value", "p_value_text",
                 "interval_text")
        _write_table(st / "differences.csv", {c: [d.get(c) if d.get(c) is not None else "" for d in comp.differences]
                                              for c in dcols}, dcols)
        write_json(st / "comparison.json", comp.to_dict())
        plot_comparison(comp, st / "comparison.png")
        plot_comparison(comp, st / "comparison.svg")
    for line in comp.text_lines():  # intervals "low to high", p-values at the resolution of their test
        say(line)
    say(f"wrote {out}/comparison.csv, differences.csv, comparison.json, comparison.png/.svg")


# ---------------------------------------------------------------------- plan
@app.command()
def plan(
    ctx: typer.Context,
    metals: Metals = None,
    lattice: LatticeOpt = None, a: AOpt = None, repeat: RepeatOpt = None, sites_per_repeat: SitesOpt = 3,
    detection_efficiency: Annotated[float, typer.Option(help="Detection efficiency of the instrument, "
                                                             "(0, 1].")] = 0.5,
    lateral_blur: Annotated[float, typer.Option(help="Lateral blur (spread of positions across the rods), "
                                                     "nm.")] = 0.15,
    runs_per_pattern: Annotated[int, typer.Option(help="Simulated runs per arrangement.")] = 4,
    runs_per_persistence: Annotated[int, typer.Option(help="Simulated runs per persistence of the scan.")] = 3,
    tip_radius: Annotated[float, typer.Option(help="Needle tip (top) radius of the simulated runs, nm.")] = 5.0,
    depth: Annotated[float, typer.Option(help="Depth of the simulated runs, nm.")] = 25.0,
    out: Annotated[Optional[Path], typer.Option(help="Write the plan as JSON here.")] = None,
    seed: Annotated[int, typer.Option(help="Random seed.")] = 0,
    force: ForceFile = False, quiet: Quiet = False, scheduler: SchedulerOpt = None,
    efficiency: Annotated[Optional[float], deprecated_option("--efficiency", "--detection-efficiency")] = None,
    lateral_resolution: Annotated[Optional[float], deprecated_option("--lateral-resolution", "--lateral-blur")] = None,
    radius: Annotated[Optional[float], deprecated_option("--radius", "--tip-radius")] = None,
):
    """Before acquiring: simulate runs under your conditions and report what the analysis can tell apart.

    Each simulated run is one task on a local dask cluster or the --scheduler's; the plan is the
    same whatever the workers (every run has its own seed).
    """
    from ..outputs.folder import check_outfile, staged_file, write_json
    from ..study.plan import plan_experiment
    from .progress import RunProgress

    _STATE["quiet"] = quiet
    detection_efficiency = renamed(ctx, "--detection-efficiency", detection_efficiency, "--efficiency", efficiency)
    lateral_blur = renamed(ctx, "--lateral-blur", lateral_blur, "--lateral-resolution", lateral_resolution)
    tip_radius = renamed(ctx, "--tip-radius", tip_radius, "--radius", radius)
    inputs = _lattice_inputs(lattice)
    if out is not None:
        check_outfile(out, force, inputs)
    mets = _metals(metals)
    lat = _lattice(lattice, a, repeat, sites_per_repeat)

    live = RunProgress(quiet, "simulated runs", announce=True)
    try:
        res = plan_experiment(mets, lat, efficiency=detection_efficiency, lateral_resolution_nm=lateral_blur,
                              n_per_pattern=runs_per_pattern, n_per_persistence=runs_per_persistence,
                              top_radius_nm=tip_radius, depth_nm=depth, seed=seed, scheduler=scheduler,
                              progress=lambda i, n: live.finished(True), started=live.started)
    finally:
        live.close()
    say(f"expected confusion (rows: true arrangement, columns: label given), {res.n_runs} simulated runs")
    say(f"{'':18s}" + "".join(f"{lab[:12]:>13s}" for lab in res.labels))
    for i, p in enumerate(res.patterns):
        say(f"{p:18s}" + "".join(f"{v:13d}" for v in res.confusion[i]))
    say(f"labels right: {100 * res.accuracy:.0f} %")
    for lam, r in zip(res.persistences, res.detection_rate):
        say(f"persistence {lam:.2f}: told from random in {100 * r:.0f} % of runs")
    if res.smallest_detectable_persistence is None:
        say(f"no persistence in the scan is told from random in {100 * res.power:.0f} % of runs")
    else:
        say(f"smallest persistence told from random in >= {100 * res.power:.0f} % of runs: "
            f"{res.smallest_detectable_persistence:.2f}")
    if out is not None:
        with staged_file(out, force, inputs) as part:
            write_json(part, res.to_dict(), mark=True)
        say(f"wrote {out}")


# ---------------------------------------------------------------------- export
@app.command()
def export(
    ctx: typer.Context,
    outdir: Annotated[Path, typer.Argument(help="An 'analyze' output folder.")],
    format: Annotated[str, typer.Option("--format", metavar="FORMAT", help="csv | json | hdf5 | svg | pdf | png")] = "csv",
    rods: Annotated[Optional[str], typer.Option(metavar="IDS", show_default="all", help="Rod ids and ranges, e.g. "
                                                "3,5,10-12 (the rod column of tracks.csv).")] = None,
    depth_window: Annotated[Optional[str], typer.Option(metavar="A:B", show_default="all", help="Depth window in "
                                                        "nm; either side may be left empty.")] = None,
    max_rods: Annotated[int, typer.Option(metavar="N", help="Figures: the most tracks drawn, 1-400 (every track "
                                                            "labelled); a larger selection shows its N rods nearest "
                                                            "the centre of the field of view, and says so.")] = 400,
    out: Annotated[Optional[Path], typer.Option(metavar="FILE", show_default="OUTDIR/exports/tracks.<ext>",
                                                help="File to write.")] = None,
    size: Annotated[str, typer.Option(metavar="PRESET", help="Figure width preset: one-column | "
                                                             "two-column.")] = "two-column",
    dpi: Annotated[int, typer.Option(metavar="DPI", help="Resolution of PNG figures.")] = 300,
    force: ForceFile = False, quiet: Quiet = False,
    depth: Annotated[Optional[str], deprecated_option("--depth", "--depth-window")] = None,
):
    """Export decoded tracks (tables, JSON, self-describing HDF5) or the tracks figure (SVG, PDF, PNG)."""
    from ..outputs.export import export_outdir, parse_depth

    _STATE["quiet"] = quiet
    depth_window = renamed(ctx, "--depth-window", depth_window, "--depth", depth)
    notes = []
    path = export_outdir(outdir, format, out=out, rods=rods, depth_nm=parse_depth(depth_window), size=size,
                         dpi=dpi, force=force, max_rods=max_rods, notes=notes)
    say(f"wrote {path}")
    for n in notes:
        say(f"  {n}")
