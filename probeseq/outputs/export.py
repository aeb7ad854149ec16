"""Exports of an ``analyze`` output folder: tables, JSON, a self-describing HDF5 file, figures.

``export_outdir(outdir, fmt, rods=..., depth_nm=(a, b))`` selects rods and a depth window and
writes one file. The HDF5 export holds the counts, posteriors, Viterbi paths, rod positions, site
depths and all fitted parameters, every dataset with a ``unit`` attribute and a ``description``,
so it can be read with h5py alone.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..exceptions import InputError
from ..utils.tomlfile import short_repr

__all__ = ['FORMATS', 'DEFAULT_MAX_RODS', 'OutputFolder', 'load_outdir', 'select_sites', 'export_outdir',
           'check_max_rods', 'parse_rods', 'parse_depth']

FORMATS = ("csv", "json", "hdf5", "svg", "pdf", "png")


#: most tracks an exported figure draws unless --max-rods says otherwise (every track labelled)
DEFAULT_MAX_RODS = 400


@dataclass(frozen=True)
class OutputFolder:
    """An analysis output folder read back: results, columns and decoded tracks."""

    path: Path
    results: dict
    columns: object
    decoded: object


def load_outdir(outdir) -> OutputFolder:
    """Read an ``analyze`` output folder, checking what it reads.

    ``results.json`` is checked by :func:`probeseq.outputs.results.load_results`, ``columns.h5`` by
    :func:`probeseq.lattice.rodcolumns.load_columns`, ``decoded.h5`` by :func:`probeseq.outputs.results.load_decoded`;
    then the decoding is checked against the columns (same metals, same rods and sites, a metal
    decoded at every used site).

    Raises
    ------
    InputError
        Names the file and what in it is wrong.
    """
    from ..lattice.rodcolumns import load_columns
    from .results import load_decoded, load_results

    d = Path(outdir)
    if not d.is_dir():
        raise InputError(f"analysis folder not found: {d}")
    res = load_results(d)
    cols = load_columns(d / "columns.h5")
    dec = load_decoded(d / "decoded.h5")
    _check_decoded_matches(cols, dec, d)
    return OutputFolder(d, res, cols, dec)


def _check_decoded_matches(cols, dec, d: Path) -> None:
    """decoded.h5 must describe the sites of columns.h5: same metals, shape and used sites."""
    if tuple(dec.metals) != tuple(cols.metals):
        raise InputError(f"{d}: decoded.h5 names metals {list(dec.metals)} but columns.h5 {list(cols.metals)}; "
                         "the folder mixes files of different analyses")
    if dec.viterbi.shape != cols.mask.shape:
        raise InputError(f"{d}: decoded.h5 holds {dec.viterbi.shape[0]} rods x {dec.viterbi.shape[1]} sites but "
                         f"columns.h5 {cols.n_rods} x {cols.n_sites}; the folder mixes files of different analyses")
    if (dec.viterbi[cols.mask] < 0).any():
        raise InputError(f"{d}: decoded.h5 has no metal at sites that columns.h5 uses; the folder mixes files of "
                         "different analyses")


def parse_rods(text, n_rods: int):
    """'3,5,10-12' -> sorted unique rod ids; errors name the ids that exist.

    Parameters
    ----------
    text : str or None
        Comma-separated rod ids and inclusive ranges ``a-b`` with ``a <= b``.
    n_rods : int
        Rods of the run (ids ``0 .. n_rods - 1``).

    Returns
    -------
    ndarray of int or None
        None when ``text`` is empty.

    Raises
    ------
    InputError
        A part that is not an id or a range, a reversed range (``10-5``: did you mean ``5-10``?),
        or an id the run does not have (the message gives the ids that exist).
    """
    if text is None or str(text).strip() == "":
        return None
    ids = []
    for part in str(text).split(","):
        part = part.strip()
        try:
            if "-" in part[1:]:
                a, b = (int(v) for v in part.split("-", 1))
                if b < a:
                    raise InputError(f"--rods: rod range {a}-{b} is reversed; did you mean {b}-{a}?")
                ids.extend(range(a, b + 1))
            else:
                ids.append(int(part))
        except InputError:
            raise
        except ValueError:
            raise InputError(f"--rods: '{part}' is not a rod id or a range like 10-12") from None
    ids = sorted(set(ids))
    bad = [i for i in ids if not 0 <= i < n_rods]
    if bad:
        raise InputError(f"--rods: unknown rod id(s) {', '.join(map(str, bad[:10]))}; rods 0-{n_rods - 1} exist")
    return np.array(ids, dtype=int)


def parse_depth(text):
    """'A:B' in nm -> (A, B); either side may be empty."""
    if text is None or str(text).strip() == "":
        return None
    s = str(text)
    if ":" not in s:
        raise InputError(f"--depth-window: '{s}' is not a window 'A:B' in nm")
    a, b = s.split(":", 1)
    try:
        lo = float(a) if a.strip() else -np.inf
        hi = float(b) if b.strip() else np.inf
    except ValueError:
        raise InputError(f"--depth-window: '{s}' is not a window 'A:B' of numbers in nm") from None
    if not lo < hi:
        raise InputError(f"--depth-window: empty window {s} (A must be below B)")
    return lo, hi


def select_sites(columns, rods=None, depth_nm=None):
    """Boolean (n_rods, n_sites) selection of used sites in the chosen rods and depth window.

    Raises
    ------
    InputError
        When the selection holds no decoded site; the message says where the chosen rods have
        decoded sites, which rods have decoded sites in the depth window, and what the run holds.
    """
    sel = columns.mask.copy()
    if rods is not None:
        keep = np.zeros(columns.n_rods, dtype=bool)
        keep[rods] = True
        sel &= keep[:, None]
    if depth_nm is not None:
        z = columns.site_depths_nm()
        sel &= (z >= depth_nm[0]) & (z <= depth_nm[1])
    if not sel.any():
        raise InputError("the selection holds no decoded site: " + _what_exists(columns, rods, depth_nm))
    return sel


def _what_exists(columns, rods, depth_nm) -> str:
    """Where the chosen rods have decoded sites, which rods the depth window holds, and the run's extent."""
    from .trackrods import rod_id_text

    def nm(v):
        return f"{round(float(v), 1) + 0.0:.1f}"  # + 0.0: no "-0.0"

    z, used = columns.site_depths_nm(), columns.mask
    parts = []
    if rods is not None:
        zr = z[rods][used[rods]]
        which = f"rod {int(rods[0])} has" if len(rods) == 1 else f"rods {rod_id_text(rods, 6)} have"
        parts.append(f"{which} decoded sites at {nm(zr.min())} to {nm(zr.max())} nm" if zr.size
                     else f"{which} no decoded site")
    if depth_nm is not None:
        lo, hi = depth_nm
        window = f"{'' if np.isinf(lo) else f'{lo:g}'}:{'' if np.isinf(hi) else f'{hi:g}'}"
        inside = np.flatnonzero((used & (z >= lo) & (z <= hi)).any(axis=1))
        parts.append(f"rods with decoded sites in {window} nm: {rod_id_text(inside, 6)} ({inside.size} rods)"
                     if inside.size else f"no rod has a decoded site in {window} nm")
    za = z[used]
    span = f"{nm(za.min())} to {nm(za.max())} nm" if za.size else "none"
    parts.append(f"rods 0-{columns.n_rods - 1} exist, with decoded sites at depths {span}")
    return "; ".join(parts)


def _tracks(of: OutputFolder, sel):
    """The tracks.csv columns for the selected sites, plus every metal's posterior and counts."""
    from .results import tracks_table

    col, dec = of.columns, of.decoded
    out = tracks_table(col, dec, select=sel)
    r, s = out["rod"], out["site"]
    for k, m in enumerate(col.metals):
        out[f"p_{m}"] = dec.posteriors[r, s, k]
        out[f"counts_{m}"] = col.counts[r, s, k]
    return out


def export_outdir(outdir, fmt: str, out=None, rods=None, depth_nm=None, size: str = "two-column",
                  dpi: int = 300, force: bool = False, max_rods: int = DEFAULT_MAX_RODS,
                  notes: list | None = None) -> Path:
    """Write one export of an analysis folder and return its path.

    Parameters
    ----------
    fmt : {"csv", "json", "hdf5", "svg", "pdf", "png"}
    out : path, optional
        Default ``OUTDIR/exports/tracks.<ext>``.
    rods : array of int, or str, optional
        Rod ids, or their text as on the command line (``"3,5,10-12"``, see :func:`parse_rods`).
    depth_nm : (float, float), optional
        Depth window, nm.
    force : bool
        Replace an existing file that probeseq wrote; the analysis folder's own files are never
        replaced (see :mod:`probeseq.outputs`).
    max_rods : int
        Figures only: the most tracks drawn, 1 to 400. When the selection holds more rods, the
        figure shows the ``max_rods`` of them nearest the centre of the field of view, lateral
        neighbours on adjacent tracks, and its caption says so. Tables hold every selected rod.
    notes : list, optional
        Receives one line per remark for the terminal: for a figure, the rule that chose its rods.
    """
    from ..utils.marks import MARK
    from .folder import check_outfile, staged_file, write_json

    fmt = str(fmt).lower()
    if fmt not in FORMATS:
        raise InputError(f"--format '{fmt}' is not supported; choose one of {', '.join(FORMATS)}")
    from .figures import SIZE_PRESETS_MM, _check_dpi

    if isinstance(size, str) and size not in SIZE_PRESETS_MM:  # (width_mm, height_mm) is checked when drawn
        raise InputError(f"--size {short_repr(size)} is not a figure width preset; choose one of "
                         f"{', '.join(SIZE_PRESETS_MM)}")
    _check_dpi(dpi)
    max_rods = check_max_rods(max_rods)
    ext = {"hdf5": "h5"}.get(fmt, fmt)
    path = Path(out) if out is not None else Path(outdir) / "exports" / f"tracks.{ext}"
    if path.suffix.lower() != f".{ext}":
        raise InputError(f"--out {path}: a {fmt} export needs a name ending in .{ext}")
    check_outfile(path, force, [outdir])
    of = load_outdir(outdir)
    if isinstance(rods, str):
        rods = parse_rods(rods, of.columns.n_rods)
    sel = select_sites(of.columns, rods, depth_nm)
    if fmt in ("svg", "pdf", "png"):
        choice = _figure_rods(of.columns, sel, rods is not None, depth_nm is not None, max_rods)
        if notes is not None:
            notes.append(f"tracks: {choice.rule}")
    with staged_file(path, force, [outdir]) as part:
        if fmt == "csv":
            from .results import _write_table

            t = _tracks(of, sel)
            fm = {k: "%.4f" for k in t if k not in ("rod", "site", "state")}
            _write_table(part, t, tuple(t), fm, comment=f"{MARK}: decoded tracks of {of.path.name}")
        elif fmt == "json":
            t = _tracks(of, sel)
            write_json(part, {"schema_version": of.results["schema_version"],
                              "classification": of.results["classification"],
                              "composition": of.results["composition"],
                              "units": {"rod_x_nm": "nm", "rod_y_nm": "nm", "z_nm": "nm",
                                        "posterior": "probability"},
                              "sites": {k: np.asarray(v).tolist() for k, v in t.items()}}, mark=True)
        elif fmt == "hdf5":
            _write_hdf5(of, sel, part)
        else:
            from .tracks import plot_tracks

            z = of.columns.site_depths_nm()[sel]
            plot_tracks(of.columns, of.decoded, part, rods=choice.ids, depth_nm=(float(z.min()), float(z.max())),
                        size=size, dpi=dpi, max_rods=max_rods, caption=f"Tracks: {choice.rule}.")
    return path


def check_max_rods(max_rods) -> int:
    """``--max-rods`` as an int from 1 to :data:`probeseq.outputs.trackrods.MAX_TRACKS`, else a one-line error."""
    from .trackrods import MAX_TRACKS

    if isinstance(max_rods, (bool, np.bool_)) or not isinstance(max_rods, (int, np.integer)) \
            or not 1 <= max_rods <= MAX_TRACKS:
        raise InputError(f"--max-rods {short_repr(max_rods)}: give a number of rods from 1 to {MAX_TRACKS} (the "
                         "most tracks one figure holds); a larger selection is drawn as its rods nearest the centre")
    return int(max_rods)


def _figure_rods(columns, sel, rods_given: bool, windowed: bool, max_rods: int):
    """The rods of an exported tracks figure and the rule that chose them (a :class:`RodChoice`).

    Every selected rod with decoded sites, in rod id order, when they are at most ``max_rods``;
    else the ``max_rods`` of them nearest the centre of the field of view, lateral neighbours on
    adjacent tracks.
    """
    from .trackrods import RodChoice, choose_rods, rod_id_text

    shown = sel.any(axis=1)
    what = ("of --rods " if rods_given else "") + "with decoded sites" + (" in the depth window" if windowed else "")
    r = np.flatnonzero(shown)
    if r.size > max_rods:
        c = choose_rods(columns, observed=shown, max_default=max_rods, max_rods=max_rods, what=what)
        return RodChoice(c.ids, None, f"{c.rule} (--max-rods {max_rods})", int(r.size))
    if rods_given and r.size == 1:
        return RodChoice(r, None, f"rod {int(r[0])} (the rod {what})", 1)
    if rods_given and r.size <= 12:
        return RodChoice(r, None, f"rods {rod_id_text(r)} (the rods {what}), in rod id order", int(r.size))
    return RodChoice(r, None, f"all {r.size} rods {what}, in rod id order", int(r.size))


def _write_hdf5(of: OutputFolder, sel, path):
    import h5py

    from ..utils.marks import MARK, h5_compression, to_jsonable

    col, dec = of.columns, of.decoded
    rods = np.flatnonzero(sel.any(1))
    sites = np.flatnonzero(sel.any(0))
    s0, s1 = sites.min(), sites.max() + 1
    sub = (rods[:, None], np.arange(s0, s1)[None, :])
    with h5py.File(path, "w") as f:
        f.attrs["about"] = ("probeseq export: decoded metal sequences along rods. Datasets carry 'unit' and "
                            "'description' attributes; index order is (rod, site[, metal]).")
        f.attrs["metals"] = json.dumps(list(col.metals))
        f.attrs["schema_version"] = int(of.results["schema_version"])
        f.attrs["written_by"] = MARK

        def put(name, data, unit, desc):
            d = f.create_dataset(name, data=data, **h5_compression(int(np.size(data))))
            d.attrs["unit"] = unit
            d.attrs["description"] = desc

        put("counts", col.counts[sub], "metal atoms per site", "metal counts per rod, site and metal channel")
        put("posteriors", dec.posteriors[sub].astype(np.float32), "probability",
            "posterior probability of each metal at each site")
        put("viterbi", dec.viterbi[sub].astype(np.int8), "metal index", "most probable metal sequence; -1 = not used")
        put("mask", (sel[sub]).astype(np.uint8), "1 = selected and used", "sites inside the analysed volume and selection")
        put("rod_id", rods, "1", "rod ids as in tracks.csv")
        put("rod_xy_nm", col.rod_xy_nm[rods], "nm", "rod axis position at depth z_ref_nm, reconstruction frame")
        put("site_index", np.arange(s0, s1), "1", "site index along the rods")
        put("site_z_nm", col.site_depths_nm()[sub], "nm", "depth of each site at its rod's axis")
        put("tilt", col.tilt, "dx/dz, dy/dz", "rod axis direction")
        put("transmat", np.asarray(dec.transmat), "probability", "fitted transition matrix (row: from, column: to)")
        put("stationary", np.asarray(dec.stationary), "probability", "stationary composition of the fitted chain")
        f.attrs["z_ref_nm"] = col.z_ref_nm
        f.attrs["pitch_nm"] = col.pitch_nm
        g = f.create_group("parameters")
        g.attrs["about"] = "all fitted parameters and settings, as JSON text"
        for key in ("classification", "composition", "statistics", "decoding", "columns", "ranging", "provenance"):
            g.attrs[key] = json.dumps(to_jsonable(of.results.get(key)), sort_keys=True)
