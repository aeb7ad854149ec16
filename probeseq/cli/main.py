"""Command-line interface: a thin layer over the library.

Every command parses its options, calls one library function, writes what it returns and prints
a short summary. Errors a user can act on are printed as one line ``error: ...`` with exit code 1
(2 for a malformed command line); no traceback is ever shown unless ``PROBESEQ_DEBUG=1``.
"""

from __future__ import annotations

import json
import os
import sys
import warnings
from pathlib import Path
from typing import Annotated, List, Optional

import typer

from ..exceptions import InputError, ProbeseqError
from .common import _STATE, app, deprecated_option, renamed, say, split_list

__all__ = ['main', 'run']

# ---------------------------------------------------------------------- simulate
@app.command()
def simulate(
    ctx: typer.Context,
    out: Annotated[Path, typer.Argument(help="Ion file to write (.csv, .tsv, .h5); the truth (.truth.json) "
                                             "and lattice (.lattice.toml) are written beside it.")],
    pattern: Annotated[str, typer.Option(help="random | short-repeat | long-block | interspersed | per-metal | "
                                              "copied")] = "random",
    metals: Annotated[str, typer.Option(help="Comma-separated metal symbols.")] = "Co,Zn",
    composition: Annotated[Optional[str], typer.Option(help="Comma-separated site fractions (default equal).")] = None,
    persistence: Annotated[Optional[float], typer.Option(help="Markov persistence lam in [0, 1) "
                                                               "(default 0.5 short-repeat, 0.9 long-block, 0 otherwise).")] = None,
    copy_error: Annotated[float, typer.Option(help="Per-site copy error of the copied pattern.")] = 0.05,
    interspersed_metal: Annotated[Optional[str], typer.Option(help="The metal inserted as isolated units "
                                                                   "(interspersed; default the least abundant).")] = None,
    avoidance: Annotated[float, typer.Option(help="How strongly an interspersed metal avoids itself, in [0, 1]: "
                                                  "it follows itself with probability f (1 - avoidance).")] = 0.9,
    metal_patterns: Annotated[Optional[str], typer.Option(help="per-metal: one of random, short-repeat, "
                                                               "long-block, interspersed per metal, comma-separated "
                                                               "in --metals order.")] = None,
    lattice: Annotated[str, typer.Option(help="Lattice preset: honeycomb | triangular | square, or a lattice "
                                              "TOML file.")] = "honeycomb",
    a: Annotated[float, typer.Option("--a", help="Cell edge a, nm (with a preset).")] = 2.6,
    repeat: Annotated[float, typer.Option(help="Repeat along the rod, nm (with a preset).")] = 0.68,
    sites_per_repeat: Annotated[int, typer.Option(help="Metal sites per repeat (with a preset).")] = 3,
    tip_radius: Annotated[float, typer.Option(help="Needle tip (top) radius, nm.")] = 7.0,
    half_angle: Annotated[float, typer.Option(help="Needle half-angle, degrees.")] = 8.0,
    depth: Annotated[float, typer.Option(help="Analysed depth, nm.")] = 40.0,
    detection_efficiency: Annotated[float, typer.Option(help="Detection efficiency in (0, 1].")] = 0.5,
    lateral_blur: Annotated[float, typer.Option(help="Lateral blur (spread of positions across the rods), "
                                                     "nm.")] = 0.10,
    depth_blur: Annotated[float, typer.Option(help="Depth blur (spread of positions along the rods), nm.")] = 0.04,
    depth_scale: Annotated[float, typer.Option(help="Reconstruction artefact: reconstructed depth per true depth, "
                                                    "in [0.5, 2] (a depth scale fixed from an estimated image "
                                                    "compression factor, field factor or evaporation field); "
                                                    "1 = right.")] = 1.0,
    depth_scale_change: Annotated[float, typer.Option(help="Reconstruction artefact: relative change of the depth "
                                                           "scale over the analysed depth, in [-0.5, 0.5]: the local "
                                                           "scale at true depth z nm is --depth-scale * (1 + value * "
                                                           "z / --depth) (the specimen widens, the reconstruction's "
                                                           "error grows with depth). 0 = constant.")] = 0.0,
    plane_curvature: Annotated[float, typer.Option(help="Reconstruction artefact: curvature of the depth planes, "
                                                        "1/nm, in [-0.05, 0.05]: an ion r nm from the specimen axis "
                                                        "is moved by value * r^2 nm in depth (a wrong assumed tip "
                                                        "radius; positive: deeper at the edge). 0 = flat.")] = 0.0,
    magnification_change: Annotated[float, typer.Option(help="Reconstruction artefact: relative change of the "
                                                             "lateral magnification over the analysed depth, in "
                                                             "[-0.3, 0.3]: x and y (nm from the specimen axis) at "
                                                             "true depth z nm are multiplied by 1 + value * z / "
                                                             "--depth (a wrong shank angle). 0 = constant.")] = 0.0,
    edge_efficiency: Annotated[float, typer.Option(help="Reconstruction artefact: detection efficiency at the "
                                                        "specimen outline relative to the axis, in (0, 1]: an ion r "
                                                        "nm from the axis where the needle radius is R nm is kept "
                                                        "with probability 1 - (1 - value) (r / R)^2, on top of "
                                                        "--detection-efficiency (ions from the flank miss the "
                                                        "detector). 1 = uniform.")] = 1.0,
    mrp: Annotated[float, typer.Option(help="Mass resolving power m/dm (FWHM).")] = 600.0,
    seed: Annotated[int, typer.Option(help="Random seed.")] = 0,
    force: Annotated[bool, typer.Option(help="Replace existing files that probeseq wrote.")] = False,
    quiet: Annotated[bool, typer.Option("--quiet", "-q", help="Print nothing but errors.")] = False,
    packing: Annotated[Optional[str], deprecated_option("--packing", "--lattice")] = None,
    top_radius: Annotated[Optional[float], deprecated_option("--top-radius", "--tip-radius")] = None,
    eta: Annotated[Optional[float], deprecated_option("--eta", "--detection-efficiency")] = None,
    sigma_xy: Annotated[Optional[float], deprecated_option("--sigma-xy", "--lateral-blur")] = None,
    sigma_z: Annotated[Optional[float], deprecated_option("--sigma-z", "--depth-blur")] = None,
):
    """Simulate a run of a rod framework with known truth (synthetic data for tests and demos)."""
    from ..lattice.model import PRESETS, Lattice
    from ..outputs.folder import check_outfile
    from ..simulation.simulate import SimConfig, SimRun, simulate_run

    _STATE["quiet"] = quiet
    lattice = renamed(ctx, "--lattice", lattice, "--packing", packing)
    tip_radius = renamed(ctx, "--tip-radius", tip_radius, "--top-radius", top_radius)
    detection_efficiency = renamed(ctx, "--detection-efficiency", detection_efficiency, "--eta", eta)
    lateral_blur = renamed(ctx, "--lateral-blur", lateral_blur, "--sigma-xy", sigma_xy)
    depth_blur = renamed(ctx, "--depth-blur", depth_blur, "--sigma-z", sigma_z)
    mets = tuple(split_list(metals, "--metals"))
    comp = None
    if composition is not None:
        try:
            comp = tuple(float(v) for v in split_list(composition, "--composition"))
        except ValueError:
            raise InputError(f"--composition: '{composition}' is not a list of numbers") from None
    preset = str(lattice).lower() in PRESETS
    given_lattice = None if preset else Lattice.from_spec(lattice)
    inputs = [] if preset else [Path(lattice)]
    ion_file_kind_check(out)
    for what, p in SimRun.output_paths(out).items():
        check_outfile(p, force, inputs, what="OUT" if what == "ions" else f"OUT ({what} file)")
    mpat = None if metal_patterns is None else tuple(split_list(metal_patterns, "--metal-patterns"))
    cfg = SimConfig(pattern=pattern, metals=mets, composition=comp, persistence=persistence,
                    copy_error=copy_error, interspersed_metal=interspersed_metal, avoidance=avoidance,
                    metal_patterns=mpat, packing=str(lattice).lower() if preset else "honeycomb",
                    lattice=given_lattice, a_nm=a, repeat_nm=repeat, sites_per_repeat=sites_per_repeat,
                    top_radius_nm=tip_radius, half_angle_deg=half_angle, depth_nm=depth, eta=detection_efficiency,
                    sigma_xy_nm=lateral_blur, sigma_z_nm=depth_blur, mrp=mrp, seed=seed, depth_scale=depth_scale,
                    depth_scale_change=depth_scale_change, plane_curvature_per_nm=plane_curvature,
                    magnification_change=magnification_change, edge_efficiency=edge_efficiency)
    run = simulate_run(cfg)
    paths = run.write(out)
    c = run.truth["counts"]
    say(f"wrote {paths['ions']}: {c['ions']} ions ({c['metal_ions']} metal, {c['organic_ions']} linker, "
        f"{c['background_ions']} background) from {c['rods']} rods")
    say(f"wrote {paths['truth']} and {paths['lattice']}")


def ion_file_kind_check(path):
    from ..io.formats import ion_file_kind

    ion_file_kind(path)


# ---------------------------------------------------------------------- inspect
@app.command()
def inspect(
    ions: Annotated[Path, typer.Argument(help="Ion file (.csv, .tsv, .txt, .h5, .hdf5).")],
    length_unit: Annotated[Optional[str], typer.Option(metavar="UNIT", show_default="nm; an HDF5 file's length_unit "
                                                       "attribute when it has one",
                                                       help="nm | angstrom (unit of positions in the file).")] = None,
    position_dataset: Annotated[Optional[str], typer.Option(help="HDF5 path of an N x 3 position dataset.")] = None,
    mass_dataset: Annotated[Optional[str], typer.Option(help="HDF5 path of the mass-to-charge dataset.")] = None,
    strict: Annotated[bool, typer.Option(help="Treat NaN/inf or non-positive mass-to-charge as an error.")] = False,
    as_json: Annotated[bool, typer.Option("--json", help="Print the summary as JSON.")] = False,
):
    """Summarise an ion file: rows, extents, mass-to-charge range, rows dropped."""
    from ..io.readers import read_ions

    ion_list = read_ions(ions, length_unit=length_unit, position_dataset=position_dataset,
                         mass_dataset=mass_dataset, strict=strict)
    s = ion_list.summary()
    if as_json:
        typer.echo(json.dumps(s, indent=2, sort_keys=True))
        return
    typer.echo(f"file            {s['source']}")
    typer.echo(f"sha256          {s['sha256']}")
    typer.echo(f"ions            {s['n_ions']}")
    typer.echo(f"columns         {', '.join(s['columns'])}")
    typer.echo(f"length unit     {s['length_unit_in_file']} in file (shown in nm)")
    for k in ("x", "y", "z"):
        lo, hi = s[f"{k}_range_nm"]
        typer.echo(f"{k} range         {lo:.3f} .. {hi:.3f} nm")
    lo, hi = s["mass_to_charge_range_da"]
    typer.echo(f"mass-to-charge  {lo:.4f} .. {hi:.4f} Da")
    why = ", ".join(f"{n} {k}" for k, n in s["dropped"].items()) or "none"
    typer.echo(f"rows dropped    {s['rows_dropped']} ({why})")


# ---------------------------------------------------------------------- prepare
@app.command()
def prepare(
    metal_counts: Annotated[str, typer.Option(metavar="N,N,...", help="Numbers of metals to compile the decoding "
                                                                     "for, comma-separated (2 to 6).")] = "2,3,4",
    quiet: Annotated[bool, typer.Option("--quiet", "-q", help="Print nothing but errors.")] = False,
):
    """Compile the analysis's kernels once (for 2, 3 and 4 metals), so that no analysis waits for them.

    The compiled kernels are kept on disk and used by every later run. Without this step the first
    analysis after an install or an update compiles the kernels it needs (about 50 s), and again
    for each new number of metals. It analyses small simulated runs in a temporary folder (no file
    of yours is written), in worker processes ('probeseq --jobs N prepare' sets how many; default
    one per core), and prints each part's seconds. Under a minute on two cores; once done, a second
    run takes a few seconds.
    """
    import time

    from ..pipeline.prepare import compile_kernels

    _STATE["quiet"] = quiet
    try:
        counts = tuple(int(v) for v in split_list(metal_counts, "--metal-counts"))
    except ValueError:
        raise InputError(f"--metal-counts: '{metal_counts}' is not a list of whole numbers, e.g. 2,3,4") from None
    t0 = time.perf_counter()

    def started(parts, n):
        say(f"compiling the kernels of the analysis for {_and(counts)} metals: {len(parts)} parts in {n} "
            f"process{'es' if n > 1 else ''}")

    def done(r):
        what = f"{r.compiled} kernel{'s' if r.compiled != 1 else ''} compiled" if r.compiled else "all found compiled"
        say(f"  {r.part.name}: {r.seconds:.1f} s ({what})")

    results = compile_kernels(counts, progress=done, started=started)
    n = sum(r.compiled for r in results)
    say(f"kernels ready in {time.perf_counter() - t0:.1f} s ({n} compiled, the rest found in the cache)")


def _and(values) -> str:
    """'2, 3 and 4'."""
    v = [str(x) for x in values]
    return v[0] if len(v) == 1 else ", ".join(v[:-1]) + " and " + v[-1]


# ---------------------------------------------------------------------- entry point
def _show_warning(message, category, filename, lineno, file=None, line=None):
    text = str(message).splitlines()[0] if str(message) else category.__name__
    sys.stderr.write(f"warning: {text}\n")


class Terminated(KeyboardInterrupt):
    """SIGTERM or SIGHUP, raised where the program is, so that staging folders are cleaned up."""

    def __init__(self, signum: int):
        super().__init__(signum)
        self.signum = signum


_SIGNALLED = []  # the signal that stopped this command, whatever layer turned it into an exit code


def _raise_terminated(signum, frame):
    _SIGNALLED.append(signum)
    raise Terminated(signum)


def _catch_signals() -> dict:
    """Turn SIGTERM and SIGHUP into :class:`Terminated` (main thread only); return the old handlers."""
    import signal
    import threading

    old = {}
    if threading.current_thread() is not threading.main_thread():
        return old
    for name in ("SIGTERM", "SIGHUP"):
        sig = getattr(signal, name, None)
        if sig is not None:
            old[sig] = signal.signal(sig, _raise_terminated)
    return old


def _restore_signals(old: dict):
    import signal

    for sig, handler in old.items():
        signal.signal(sig, handler)


def _interrupted() -> int:
    import signal

    if _SIGNALLED:
        signum = _SIGNALLED[-1]
        sys.stderr.write(f"error: stopped by {signal.Signals(signum).name}; earlier results were left untouched\n")
        return 128 + int(signum)
    sys.stderr.write("error: interrupted; earlier results were left untouched\n")
    return 130


def main(argv: Optional[List[str]] = None) -> int:
    """Run the CLI; return the exit code. Never lets a traceback reach the user.

    SIGTERM and SIGHUP stop the command like Ctrl-C: its staging folder is removed, earlier
    results stay as they were, and the exit code is 128 + the signal number.
    """
    try:  # typer >= 0.20 carries its own copy of click
        from typer._click.exceptions import ClickException
    except ImportError:  # pragma: no cover - older typer uses click itself
        from click.exceptions import ClickException
    _register_commands()
    cmd = typer.main.get_command(app)
    old = warnings.showwarning
    warnings.showwarning = _show_warning
    old_signals = _catch_signals()
    _SIGNALLED.clear()
    try:
        rv = cmd.main(args=argv, prog_name="probeseq", standalone_mode=False)
        code = int(rv) if isinstance(rv, int) else 0
        if code == 130:  # the command-line layer turns Ctrl-C into exit code 130
            return _interrupted()
        return code
    except typer.Exit as e:
        if int(e.exit_code) == 130:  # Ctrl-C, as reported by the command-line layer
            return _interrupted()
        return int(e.exit_code)
    except typer.Abort:
        return _interrupted()
    except ClickException as e:
        if type(e).__name__ == "NoArgsIsHelpError" and getattr(e, "ctx", None) is not None:
            typer.echo(e.ctx.get_help())
            return 0
        msg = " ".join(e.format_message().split())
        sys.stderr.write(f"error: {msg} (see 'probeseq --help')\n")
        return 2
    except ProbeseqError as e:
        sys.stderr.write(f"error: {' '.join(str(e).split())}\n")
        return 1
    except KeyboardInterrupt:
        return _interrupted()
    except MemoryError:
        sys.stderr.write("error: out of memory; give a smaller input (an HDF5 ion file is read in blocks, a text "
                         "file is read whole), or for simulate/plan a smaller --tip-radius or --depth\n")
        return 1
    except Exception as e:  # last line of defence: one line, never a traceback
        if os.environ.get("PROBESEQ_DEBUG"):
            raise
        sys.stderr.write(f"error: internal error ({type(e).__name__}: {' '.join(str(e).split())}); "
                         "set PROBESEQ_DEBUG=1 for details\n")
        return 3
    finally:
        _restore_signals(old_signals)
        warnings.showwarning = old


def _register_commands():
    """Import the modules that add further commands to ``app``; give every command its whole summary.

    The summary of a command in ``probeseq --help`` is the first paragraph of its docstring,
    wrapped but never cut short (the command-line layer would otherwise shorten it to the width
    of the terminal). Every command's help names its arguments and values plainly
    (:class:`probeseq.cli.common.ReadableCommand`).
    """
    import inspect as _inspect

    from . import stages  # noqa: F401  (one way: cli_stages never imports this module)
    from .common import ReadableCommand

    for info in app.registered_commands:
        doc = _inspect.getdoc(info.callback) or ""
        if info.short_help is None and doc:
            info.short_help = " ".join(doc.split("\n\n")[0].split())
        if info.cls is None or info.cls is typer.core.TyperCommand:
            info.cls = ReadableCommand  # usage lines name the arguments plainly (IONS, not {ions})


def run():
    """Console-script entry point.

    After the command, the exit handlers run (child processes, temporary folders, weak-reference
    finalizers) and the streams are flushed; then the process ends without the interpreter's
    teardown of every loaded module, which took about 1.3 s after an analysis (numba, scipy and
    matplotlib loaded) and has nothing left to save: every output is written and closed by then.
    """
    import atexit

    code = main()
    code = code if isinstance(code, int) else (0 if code is None else 1)
    atexit._run_exitfuncs()
    for stream in (sys.stdout, sys.stderr):
        try:
            stream.flush()
        except (OSError, ValueError):  # a closed pipe: nothing more can be said
            pass
    os._exit(code)


if __name__ == "__main__":
    run()
