"""CLI commands of the pipeline stages (ranging, columns, decoding, analysis), joined to ``app``.

Each command is a thin wrapper: parse, call one library function, write, summarise.
"""

from __future__ import annotations

import json
import shlex
import sys
import time
from pathlib import Path
from typing import Annotated, Optional

import typer

from .cli import _STATE, app, say, split_list
from .exceptions import InputError
from .outputs import figure_metadata

# ---------------------------------------------------------------------- shared options
LengthUnit = Annotated[Optional[str], typer.Option(help="nm | angstrom: unit of the positions in the ion file.")]
PosDataset = Annotated[Optional[str], typer.Option(help="HDF5 path of an N x 3 position dataset (other layouts).")]
MassDataset = Annotated[Optional[str], typer.Option(help="HDF5 path of the mass-to-charge dataset (other layouts).")]
Strict = Annotated[bool, typer.Option(help="Treat NaN/inf or non-positive mass-to-charge rows as an error.")]
Metals = Annotated[Optional[str], typer.Option(help="Comma-separated metal symbols, e.g. Co,Zn.")]
LatticeOpt = Annotated[Optional[str], typer.Option(help="Lattice TOML file, or a preset: honeycomb | triangular | square.")]
AOpt = Annotated[Optional[float], typer.Option("--a", help="Cell edge a, nm (with a preset).")]
RepeatOpt = Annotated[Optional[float], typer.Option(help="Repeat along the rod, nm (with a preset).")]
SitesOpt = Annotated[int, typer.Option(help="Metal sites per repeat (with a preset).")]
RangesOpt = Annotated[Optional[Path], typer.Option(help="Range file (TOML) to use instead of automatic ranging.")]
Quiet = Annotated[bool, typer.Option("--quiet", "-q", help="Print nothing but errors.")]
Verbose = Annotated[bool, typer.Option("--verbose", "-v", help="Print more detail.")]
Force = Annotated[bool, typer.Option(help="Replace an existing output that probeseq wrote (only once the new one is "
                                            "complete; files probeseq did not write are never replaced).")]
ForceFile = Annotated[bool, typer.Option(help="Replace an existing output file that probeseq wrote.")]


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
    from .lattice import Lattice

    if spec is None:
        raise InputError("--lattice is required (a lattice TOML file or a preset name)")
    return Lattice.from_spec(spec, a=a, repeat=repeat, sites_per_repeat=sites_per_repeat)


def _metals(text):
    mets = split_list(text, "--metals")
    if len(mets) < 2:
        raise InputError("--metals needs at least two metals, e.g. --metals Co,Zn")
    return tuple(mets)


def _read(path, length_unit, position_dataset, mass_dataset, strict):
    from .io import read_ions

    return read_ions(path, length_unit=length_unit, position_dataset=position_dataset,
                     mass_dataset=mass_dataset, strict=strict)


class _Reporter:
    """Progress on standard error (unless quiet), and a copy of every line for ``log.txt``.

    Each stage prints one line when it starts; on a terminal a ticker keeps the line's elapsed
    time running while the stage works, so a long step never looks frozen.
    """

    def __init__(self, quiet: bool, verbose: bool):
        import threading

        self.quiet, self.verbose = quiet, verbose
        self.t0 = time.perf_counter()
        self.lines = []
        self._tty = (not quiet) and sys.stderr.isatty()
        self._current = None
        self._lock = threading.Lock()
        self._stop = threading.Event()
        self._thread = None

    def _tick(self):
        while not self._stop.wait(0.5):
            with self._lock:
                if self._current is None:
                    continue
                line, start = self._current
                sys.stderr.write(f"\r{line} ({time.perf_counter() - start:.0f} s)")
                sys.stderr.flush()

    def __call__(self, stage: str, message: str):
        line = f"[{time.perf_counter() - self.t0:7.1f} s] {stage}: {message}"
        self.lines.append(line)
        if self.quiet:
            return
        with self._lock:
            if self._tty:
                if self._current is not None:
                    sys.stderr.write("\n")
                sys.stderr.write(line)
                self._current = (line, time.perf_counter())
                if self._thread is None:
                    import threading

                    self._thread = threading.Thread(target=self._tick, daemon=True)
                    self._thread.start()
            else:
                sys.stderr.write(line + "\n")
            sys.stderr.flush()

    def done(self):
        """End the ticker (call before printing the summary)."""
        self._stop.set()
        with self._lock:
            if self._tty and self._current is not None:
                sys.stderr.write("\n")
                sys.stderr.flush()
            self._current = None

    def note(self, message: str):
        self.lines.append(message)
        if self.verbose and not self.quiet:
            sys.stderr.write(message + "\n")


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
    from .outputs import check_outfile, staged_file
    from .ranging import RangeSet, auto_range

    _STATE["quiet"] = quiet
    inputs = [ions, ranges]
    check_outfile(out, force, inputs)
    figures = _figure_pair(figure)
    for f in figures:
        check_outfile(f, force, inputs + [out], what="--figure")
    mets = _metals(metals)
    il = _read(ions, length_unit, position_dataset, mass_dataset, strict)
    given = RangeSet.from_toml(ranges) if ranges is not None else None
    rr = auto_range(il.mass_to_charge, mets, species=split_list(species, "--species") or None, ranges=given)
    with staged_file(out, force, inputs) as part:
        rr.to_toml(part)
    say(f"wrote {out}: {len(rr.ranges)} ranges")
    d = rr.to_dict()
    comp = d.get("composition", {})
    for m in mets:
        c = comp.get(m, {})
        if c:
            say(f"  {m:3s} {100 * c['fraction']:6.2f} % +- {100 * c['sigma']:.2f} % (atomic, of metal atoms)")
    if len(rr.unmatched):
        say(f"  {len(rr.unmatched)} strong peaks unmatched (left unranged): " + "; ".join(rr.unmatched_nearest[:6]))
    if figures:
        import matplotlib.pyplot as plt

        from .ranging_plot import plot_ranging

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
    length_unit: LengthUnit = None, position_dataset: PosDataset = None, mass_dataset: MassDataset = None,
    strict: Strict = False, force: Force = False, quiet: Quiet = False,
):
    """Register the rod lattice and cut the rods into sites: writes columns.h5, registration.json, a figure."""
    from .columns import build_columns
    from .columns_plot import plot_rod_density
    from .data import save_columns
    from .outputs import check_outdir, staged_outdir, write_json
    from .ranging import RangeSet, assign_channels, auto_range
    from .validate import check_scale, check_seed

    _STATE["quiet"] = quiet
    inputs = [ions, ranges, *_lattice_inputs(lattice)]
    check_outdir(out, force, inputs)
    mets = _metals(metals)
    lat = _lattice(lattice, a, repeat, sites_per_repeat)
    check_seed(seed)
    scale = check_scale(scale)
    offset = _parse_offset(offset_nm)
    il = _read(ions, length_unit, position_dataset, mass_dataset, strict)
    given = RangeSet.from_toml(ranges) if ranges is not None else None
    rr = auto_range(il.mass_to_charge, mets, ranges=given)
    w = assign_channels(il.mass_to_charge, rr.ranges, mets).weights()
    sel = w.sum(1) > 0
    cols = build_columns(il.x[sel], il.y[sel], il.z[sel], w[sel], mets, lat, rotation_deg=rotation_deg,
                         scale=scale, offset_nm=offset, random_state=seed)
    with staged_outdir(out, force=force, inputs=inputs, command=_command_line()) as st:
        save_columns(cols, st / "columns.h5")
        write_json(st / "registration.json", {"resolvable": cols.resolvable, "crosstalk": cols.crosstalk,
                                              "n_rods": cols.n_rods, "n_sites": cols.n_sites, **cols.params})
        rr.to_toml(st / "ranges.toml")
        plot_rod_density(il.x[sel], il.y[sel], il.z[sel], cols, st / "density.png")
    reg = cols.params.get("registration", {})
    say(f"wrote {out}: {cols.n_rods} rods x {cols.n_sites} sites ({int(cols.mask.sum())} used)")
    if reg:
        say(f"  rotation {reg.get('rotation_deg', float('nan')):.2f} deg, scale {reg.get('scale', float('nan')):.4f}, "
            f"lateral spread {reg.get('sigma_xy_nm', float('nan')):.3f} nm")
    say(f"  expected crosstalk {cols.crosstalk:.3f}: single rods {'resolvable' if cols.resolvable else 'NOT resolvable'}")


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
    from .data import load_columns
    from .decode import fit_decoder
    from .outputs import check_outdir, staged_outdir, write_json

    _STATE["quiet"] = quiet
    check_outdir(out, force, [columns_dir])
    cols = load_columns(Path(columns_dir) / "columns.h5")
    dec = fit_decoder(cols, n_starts=n_starts, random_state=seed)
    groups = None
    if not cols.resolvable:
        from .groups import analyze_groups

        groups = analyze_groups(cols, random_state=seed)
    with staged_outdir(out, force=force, inputs=[columns_dir], command=_command_line()) as st:
        write_json(st / "decoding.json", {"decoding": dec.to_dict(),
                                          "groups": None if groups is None else groups.to_dict()})
        _write_decoded_tables(st, cols, dec)
    say(f"wrote {out}: {cols.n_rods} rods decoded; log-likelihood {dec.loglik:.1f}, "
        f"detection efficiency {dec.eta:.3f}, persistence {dec.persistence:.3f}")
    say(f"  independent sites: likelihood-ratio {dec.lr_stat:.1f} (df {dec.lr_df}), p = {dec.lr_pvalue:.3g}; "
        f"BIC {dec.bic:.1f} vs {dec.bic_indep:.1f}")


def _write_decoded_tables(folder, cols, dec):
    from .pipeline import RUNS_COLUMNS, RUNS_FORMATS, _write_table, runs_table, write_tracks

    write_tracks(folder / "tracks.csv", cols, dec)
    _write_table(folder / "runs.csv", runs_table(cols, dec), RUNS_COLUMNS, RUNS_FORMATS)


# ---------------------------------------------------------------------- analyze
@app.command()
def analyze(
    ions: Annotated[Path, typer.Argument(help="Ion file (.csv, .tsv, .txt, .h5), or a run folder holding the "
                                              "ion file and run.toml.")],
    metals: Metals = None,
    lattice: LatticeOpt = None, a: AOpt = None, repeat: RepeatOpt = None, sites_per_repeat: SitesOpt = 3,
    out: Annotated[Optional[Path], typer.Option(help="Output folder (default: analysis_<name>).")] = None,
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
    length_unit: LengthUnit = None, position_dataset: PosDataset = None, mass_dataset: MassDataset = None,
    allow_outside: Annotated[bool, typer.Option(help="Let a run folder's run.toml name files outside the run "
                                                     "folder (refused by default).")] = False,
    strict: Strict = False, force: Force = False, quiet: Quiet = False, verbose: Verbose = False,
):
    """Run the whole analysis: ranging, columns, decoding, statistics and classification.

    IONS may be an ion file, a run folder (ion file + run.toml), or a folder of run folders
    (a batch: each run is written to OUT/<run folder name>).
    """
    from .lattice import Lattice
    from .pipeline import AnalysisOptions
    from .pipeline import analyze_file, write_analysis
    from .outputs import check_outdir
    from .ranging import RangeSet
    from .runinfo import read_run_folder, safe_file_name

    _STATE["quiet"] = quiet
    # options first: a bad value is one error before any work, not one failure per run of a batch
    opts = AnalysisOptions(seed=seed, n_starts=n_starts, n_boot=n_boot, long_block_sites=long_block_sites,
                           alpha=alpha, copy_threshold=copy_threshold, rotation_deg=rotation_deg, scale=scale,
                           offset_nm=_parse_offset(offset_nm))
    sample = {}
    src = Path(ions)
    inputs = [src, ranges, *_lattice_inputs(lattice)]
    if src.is_dir() and not (src / "run.toml").exists() and _run_folders(src):
        flags = ["--seed", str(seed), "--long-block-sites", str(long_block_sites), "--alpha", str(alpha),
                 "--copy-threshold", str(copy_threshold), "--n-boot", str(n_boot), "--n-starts", str(n_starts)]
        if strict:
            flags.append("--strict")
        if allow_outside:
            flags.append("--allow-outside")
        if force:
            flags.append("--force")
        default_out = Path(f"analysis_{safe_file_name(src.resolve().name)}")
        return _batch(src, Path(out) if out is not None else default_out, flags, force)
    if src.is_dir():
        desc = read_run_folder(src, allow_outside=allow_outside)
        inputs += [desc.folder / "run.toml", desc.ions, desc.ranges, *_lattice_inputs(desc.lattice)]
        sample = dict(desc.sample)
        ion_path = desc.ions
        mets = _metals(metals) if metals else desc.metals
        if lattice is None:
            lat = Lattice.from_spec(desc.lattice, a=desc.lattice_args.get("a"),
                                    repeat=desc.lattice_args.get("repeat"),
                                    sites_per_repeat=desc.lattice_args.get("sites_per_repeat", 3))
        else:
            lat = _lattice(lattice, a, repeat, sites_per_repeat)
        ranges = ranges or desc.ranges
        sample["detection_efficiency_given"] = desc.detection_efficiency
        name = desc.name
        default_out = f"analysis_{desc.safe_name}"
    else:
        ion_path = src
        if metals is None:
            raise InputError("--metals is required (or give a run folder with run.toml)")
        mets = _metals(metals)
        lat = _lattice(lattice, a, repeat, sites_per_repeat)
        name = src.stem
        default_out = f"analysis_{safe_file_name(name)}"
    outdir = Path(out) if out is not None else Path(default_out)
    check_outdir(outdir, force, inputs)
    rep = _Reporter(quiet, verbose)
    rs = RangeSet.from_toml(ranges) if ranges is not None else None
    prov = {"command_line": _command_line(), "sample": sample, "run_name": name}
    try:
        res = analyze_file(ion_path, mets, lat, ranges=rs, options=opts, progress=rep, provenance=prov,
                           length_unit=length_unit, position_dataset=position_dataset, mass_dataset=mass_dataset,
                           strict=strict)
    except BaseException:
        rep.done()
        raise

    def extra(folder):
        (folder / "log.txt").write_text("\n".join(rep.lines + [""] + _summary_lines(res)) + "\n", encoding="utf-8")

    rep("writing", f"{outdir}")
    try:
        write_analysis(res, outdir, force=force, extra=extra, progress=rep, inputs=inputs)
    finally:
        rep.done()
    for line in _summary_lines(res, verbose=verbose):
        say(line)


def _run_folders(folder: Path) -> list:
    return sorted(p for p in folder.iterdir() if p.is_dir() and (p / "run.toml").is_file())


def _batch_one(job):
    """Analyse one run folder of a batch in a worker process; returns (name, exit code, summary)."""
    import contextlib
    import io

    from .cli import main

    sub, outdir, flags = job
    err = io.StringIO()
    with contextlib.redirect_stderr(err):
        code = main(["analyze", str(sub), "--out", str(outdir), "-q", *flags])
    summary = ""
    res = outdir / "results.json"
    if code == 0 and res.is_file():
        r = json.loads(res.read_text())
        c = r["classification"]
        summary = f"{c['label']} (confidence {c['confidence']:.2f})"
    else:
        summary = err.getvalue().strip().splitlines()[-1] if err.getvalue().strip() else f"exit {code}"
    return sub.name, code, summary


def _batch(src: Path, out: Path, flags: list, force: bool):
    """Analyse every run folder under ``src`` into ``out/<run>``, two at a time (both cores)."""
    import os
    from concurrent.futures import ProcessPoolExecutor

    from .outputs import check_outdir

    subs = _run_folders(src)
    check_outdir(out, force, [src, *subs])  # each run's folder is made when its results are complete
    jobs = [(sub, out / sub.name, flags) for sub in subs]
    workers = max(1, min(2, os.cpu_count() or 1, len(jobs)))
    say(f"analysing {len(jobs)} run folders of {src} with {workers} processes into {out}")
    failed = 0
    with ProcessPoolExecutor(max_workers=workers) as ex:
        for name, code, summary in ex.map(_batch_one, jobs):
            failed += code != 0
            say(f"  {name:32s} {summary}")
    if failed:
        raise InputError(f"{failed} of {len(jobs)} runs failed (see above); the others were written to {out}")


def _summary_lines(res, verbose: bool = False) -> list:
    c = res.classification
    st = res.statistics
    lines = [f"verdict: {c.label} (along rods: {c.along_rod}; rod to rod: {c.rod_to_rod}; "
             f"confidence {c.confidence:.2f})"]
    d = res.to_dict()
    lines.append(f"{'metal':6s} {'fraction':>18s} {'mean run (sites)':>24s} {'x independent':>14s}")
    for m in res.metals:
        iv = d["composition_interval"][m] or {}
        f, flo, fhi = d["composition"][m], iv.get("low", float("nan")), iv.get("high", float("nan"))
        r, rlo, rhi = st.interval(f"mean_run_length_sites.{m}")
        ratio = st.estimates.get(f"run_length_ratio.{m}", float("nan"))
        lines.append(f"{m:6s} {f:8.3f} [{flo:.3f}-{fhi:.3f}] {r:10.2f} [{rlo:.2f}-{rhi:.2f}] {ratio:14.2f}")
    col = res.columns
    lines.append(f"rods {col.n_rods}, sites used {int(col.mask.sum())}, detection efficiency "
                 f"{res.decoded.eta:.3f}, persistence {st.estimates.get('persistence', float('nan')):.3f}")
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
                         f"lateral spread {reg.get('sigma_xy_nm', float('nan')):.3f} nm, crosstalk {col.crosstalk:.3f}")
        dec = res.decoded
        lines.append(f"decoder: log-likelihood {dec.loglik:.1f}, {dec.n_iter} EM iterations "
                     f"({'converged' if dec.converged else 'NOT converged'}), LR {dec.lr_stat:.1f} "
                     f"(df {dec.lr_df}), BIC {dec.bic:.1f} vs {dec.bic_indep:.1f} independent")
    lines.append("timings (s): " + ", ".join(f"{k} {v:.2f}" for k, v in res.timings_s.items()))
    return lines


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
    from .compare import compare_runs, load_runs, plot_comparison
    from .outputs import check_outdir, staged_outdir, write_json
    from .pipeline import _write_table

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
        dcols = ("run_a", "run_b", "statistic", "difference", "low", "high", "p_value")
        _write_table(st / "differences.csv", {c: [d[c] if d[c] is not None else "" for d in comp.differences]
                                              for c in dcols}, dcols)
        write_json(st / "comparison.json", comp.to_dict())
        plot_comparison(comp, st / "comparison.png")
        plot_comparison(comp, st / "comparison.svg")
    say(f"{'run':28s} {by:>12s} {'label':>18s}  key statistics (estimate [95 % interval])")
    show = [s for s in comp.statistics if s.startswith("mean_run_length_sites.") or s == "persistence"]
    for rec in comp.runs:
        parts = []
        for s in show:
            iv = rec.intervals.get(s) or {}
            e, lo, hi = iv.get("estimate"), iv.get("low"), iv.get("high")
            if e is not None:
                parts.append(f"{s.replace('mean_run_length_sites.', 'run ')} {e:.2f} [{lo or float('nan'):.2f}-"
                             f"{hi or float('nan'):.2f}]")
        say(f"{rec.name[:28]:28s} {str(rec.metadata.get(by, '-')):>12s} {rec.label:>18s}  " + "; ".join(parts))
    sig = [d for d in comp.differences if d["p_value"] is not None and d["p_value"] == d["p_value"]
           and d["p_value"] < 0.01 and (d["statistic"] in show)]
    for d in sig:
        say(f"  {d['run_a']} vs {d['run_b']}: {d['statistic']} differs by {d['difference']:.3g} "
            f"(95 % interval {d['low']:.3g} to {d['high']:.3g}, bootstrap p = {d['p_value']:.3g})")
    for n in comp.notes:
        say(f"note: {n}")
    say(f"wrote {out}/comparison.csv, differences.csv, comparison.json, comparison.png/.svg")


# ---------------------------------------------------------------------- plan
@app.command()
def plan(
    metals: Metals = None,
    lattice: LatticeOpt = None, a: AOpt = None, repeat: RepeatOpt = None, sites_per_repeat: SitesOpt = 3,
    efficiency: Annotated[float, typer.Option(help="Detection efficiency of the instrument, (0, 1].")] = 0.5,
    lateral_resolution: Annotated[float, typer.Option(help="Lateral resolution (spread of positions), nm.")] = 0.15,
    runs_per_pattern: Annotated[int, typer.Option(help="Simulated runs per arrangement.")] = 4,
    runs_per_persistence: Annotated[int, typer.Option(help="Simulated runs per persistence of the scan.")] = 3,
    radius: Annotated[float, typer.Option(help="Needle top radius of the simulated runs, nm.")] = 5.0,
    depth: Annotated[float, typer.Option(help="Depth of the simulated runs, nm.")] = 25.0,
    out: Annotated[Optional[Path], typer.Option(help="Write the plan as JSON here.")] = None,
    seed: Annotated[int, typer.Option(help="Random seed.")] = 0,
    force: ForceFile = False, quiet: Quiet = False,
):
    """Before acquiring: simulate runs under your conditions and report what the analysis can tell apart."""
    from .outputs import check_outfile, staged_file, write_json
    from .plan import plan_experiment

    _STATE["quiet"] = quiet
    inputs = _lattice_inputs(lattice)
    if out is not None:
        check_outfile(out, force, inputs)
    mets = _metals(metals)
    lat = _lattice(lattice, a, repeat, sites_per_repeat)

    def prog(i, n):
        if not quiet:
            sys.stderr.write(f"\rsimulated and analysed {i}/{n} runs")
            sys.stderr.flush()
            if i == n:
                sys.stderr.write("\n")

    res = plan_experiment(mets, lat, efficiency=efficiency, lateral_resolution_nm=lateral_resolution,
                          n_per_pattern=runs_per_pattern, n_per_persistence=runs_per_persistence,
                          top_radius_nm=radius, depth_nm=depth, seed=seed, progress=prog)
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
    outdir: Annotated[Path, typer.Argument(help="An 'analyze' output folder.")],
    format: Annotated[str, typer.Option("--format", help="csv | json | hdf5 | svg | pdf | png")] = "csv",
    rods: Annotated[Optional[str], typer.Option(help="Rod ids, e.g. 3,5,10-12 (default all).")] = None,
    depth: Annotated[Optional[str], typer.Option(help="Depth window 'A:B' in nm (default all).")] = None,
    out: Annotated[Optional[Path], typer.Option(help="File to write (default OUTDIR/exports/tracks.<ext>).")] = None,
    size: Annotated[str, typer.Option(help="Figure width preset: one-column | two-column.")] = "two-column",
    dpi: Annotated[int, typer.Option(help="Resolution of PNG figures.")] = 300,
    force: ForceFile = False, quiet: Quiet = False,
):
    """Export decoded tracks (tables, JSON, self-describing HDF5) or the tracks figure (SVG, PDF, PNG)."""
    from .export import export_outdir, load_outdir, parse_depth, parse_rods

    _STATE["quiet"] = quiet
    of = load_outdir(outdir)
    path = export_outdir(outdir, format, out=out, rods=parse_rods(rods, of.columns.n_rods),
                         depth_nm=parse_depth(depth), size=size, dpi=dpi, force=force)
    say(f"wrote {path}")
